"""Triage: is a feature pair a real interaction of the model, a co-split, or an artefact?

Sharing root-to-leaf paths is necessary for a tree ensemble to make two
features interact, not sufficient: an additive effect split in sequence
shares paths too, and two dependent features can stand in for each other.
This module joins, per pair, the path structure of :mod:`treeprobe.cooccurrence`,
Friedman and Popescu's H-statistic of :mod:`treeprobe.measure` with a resampling
interval and a noise floor, and the dependence of the two features in the
data, and gives each pair one verdict:

``interaction``
    The pair shares paths, its H² is clearly above a small convention, its
    interaction size ``h`` clears the noise floor, and ``h`` is not negligible
    against the spread of the predictions.
``co-split``
    The pair shares paths but H or its size stays within the noise: the trees
    split on both without a joint effect worth the name.
``dependent``
    The pair shares paths and the two features are strongly dependent in the
    data, so partial dependence extrapolates and H cannot be trusted; the
    column ``leans`` says which verdict H alone would give.
``absent``
    The pair never shares a root-to-leaf path, so the model cannot make the two
    interact: H = 0 exactly.

The noise floor follows Friedman and Popescu ([1]_, section 8.3): fit an
additive version of the same model (same library and hyperparameters, each
feature in its own interaction-constraint group) to ``y``; build synthetic
targets with no interaction, the additive fit plus permuted residuals; refit
the unconstrained model on each and compute H on each refit. A pair's floor is
the upper ``null_quantile`` of its null values. We take the floor on ``h``,
the interaction's root mean square in output units, rather than on H²: a
refit on a target without interaction leaves pairs with no main effect with a
near-zero partial dependence variance, the denominator of H², so null H²
values of such pairs scatter widely while their ``h`` stays at the noise
level (we saw null H² above 0.5 for a product pair whose additive projection
is zero). The null H² quantile is reported too. For classifiers residuals are not exchangeable, so the
synthetic labels are drawn from the additive fit's probabilities instead (a
parametric form of the same null; our adaptation). Without ``y`` only
``min_h2``, ``min_effect`` and the resampling interval are available.

Dependence is measured on the same rows by Spearman's rank correlation and by
the information coefficient of correlation ``sqrt(1 - exp(-2 I))`` of the
mutual information ``I`` ([2]_; estimated with scikit-learn's nearest-neighbour
estimator [3]_), which equals ``|rho|`` for Gaussian pairs and catches
non-monotone dependence.

Limits
------
Every threshold here is a convention, not a law; the defaults are common
practice or our choice, stated in :func:`triage`. H-statistics describe the
fitted model, not the world; a model's interactions are not causal claims.
Where a model decides about people (credit, health, hiring), this output
supports, and does not replace, the model-risk review that local rules require.

References
----------
.. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 916-954, 2008.
.. [2] E. H. Linfoot, "An informational measure of correlation", Information
   and Control 1(1), 85-89, 1957.
.. [3] A. Kraskov, H. Stögbauer and P. Grassberger, "Estimating mutual
   information", Physical Review E 69, 066138, 2004.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from itertools import combinations
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError
from .graph import ForestGraph
from .output import to_jsonable
from .progress import progress_bar

__all__ = ["TriageResult", "triage", "VERDICTS", "VERDICT_RULES", "LIMITS"]

VERDICTS = ("interaction", "dependent", "co-split", "absent")
LIMITS = (
    "Verdicts rest on conventions (the thresholds in the verdict rules) and on H-statistics, which extrapolate when features are "
    "dependent. They describe this model, not the world: structure is not causation, and a model's interactions "
    "are not the data-generating process's. Where the model decides about people (credit, health, hiring), this "
    "supports, and does not replace, the model-risk review that local rules require."
)
_SCHEMA = "treeprobe.triage/2"


def _rules(min_h2: float, min_effect: float, max_dependence: float, null_quantile: float, refits: bool) -> dict:
    floor = (
        f"the lower end of its size h exceeds the {null_quantile:.0%} quantile of h over refits on targets "
        "without interaction, "
        if refits
        else "(no noise floor: no target or no refits) "
    )
    return {
        "interaction": (
            f"Shares paths, the lower end of its H² interval is above {min_h2:g}, {floor}and h is at least "
            f"{min_effect:.0%} of the spread (standard deviation) of the model's predictions."
        ),
        "co-split": (
            "Shares paths, but H² or its size h stays within the noise or is negligible: the trees split on both "
            "without a joint effect."
        ),
        "dependent": (
            f"Shares paths, but the two features are strongly dependent in the data (|rank correlation| or information "
            f"correlation at least {max_dependence:g}), so partial dependence extrapolates and H cannot be trusted; "
            "'leans' gives the verdict H alone would give."
        ),
        "absent": "Never on a common root-to-leaf path: the model cannot make the two interact, and H = 0 exactly.",
    }


VERDICT_RULES = _rules(0.05, 0.05, 0.7, 0.95, True)


@dataclass(frozen=True)
class TriageResult:
    """Verdicts on feature pairs (and triples) of one model on one data set.

    Attributes
    ----------
    pairs : DataFrame
        One row per pair of used features, sorted by verdict (interaction,
        dependent, co-split, absent) then ``strength``. Columns:
        ``feature_a``, ``feature_b``; structure (:func:`treeprobe.structure`):
        ``paths``, ``trees``, ``cover_share``, ``nested_gain``, ``first_level``,
        ``first_tree``; H (:func:`treeprobe.h_statistic`): ``h2``, ``h``,
        ``h2_low``/``h2_high`` and ``h_low``/``h_high`` (subsampling intervals
        over ``resamples`` half-size row subsamples, NaN without; see Notes), ``effect`` =
        ``h / sd(prediction)``, ``null_h`` and ``null_h2`` (the refits'
        ``null_quantile`` of ``h`` and of H²; NaN without ``y``; ``null_h`` is
        the noise floor); dependence: ``rank_correlation``
        (Spearman), ``information_correlation`` (``sqrt(1 - exp(-2 I))``),
        ``dependence`` = the larger of their absolute values; ``verdict``,
        ``leans`` (for ``dependent``: the verdict H alone gives, else equal to
        ``verdict``), ``strength`` = ``effect`` (0 for ``absent``), the score
        to rank by.
    triples : DataFrame
        The same for feature triples that share a path (when asked):
        ``feature_a``, ``feature_b``, ``feature_c``, structure columns, ``h2``,
        ``h``, ``effect``, ``dependence`` (largest of the three pairs'),
        ``verdict``, ``leans``, ``strength``; no interval or null refits.
    features : DataFrame
        ``feature``, ``used``, ``splits``, ``gain``, ``cover``, ``h2_rest``,
        ``h_rest`` (H of the feature against all others, eq. 45 of [1]).
    ensemble : ForestGraph
    rules : dict
        The rule of each verdict in one sentence, with the thresholds used.
    thresholds : dict
        ``min_h2``, ``min_effect``, ``max_dependence``, ``null_quantile``, ``confidence``.
    facts : dict
        ``n_rows``, ``resamples``, ``null_refits``, ``prediction_sd``, ``output``,
        ``has_target``, ``seconds``, ``refit_notes``.
    """

    pairs: pd.DataFrame
    triples: pd.DataFrame
    features: pd.DataFrame
    ensemble: ForestGraph
    rules: dict
    thresholds: dict
    facts: dict
    limits: str = field(default=LIMITS)

    def to_dict(self) -> dict:
        """JSON-ready dictionary: schema, facts, thresholds, rules, limits and the three tables."""
        return to_jsonable(
            {
                "schema": _SCHEMA,
                "model": self.ensemble.summary(),
                "facts": self.facts,
                "thresholds": self.thresholds,
                "rules": self.rules,
                "limits": self.limits,
                "pairs": self.pairs,
                "triples": self.triples,
                "features": self.features,
            }
        )


# --------------------------------------------------------------------- checks
def _check_fraction(value: Any, name: str, *, low: float = 0.0, high: float = 1.0, open_high: bool = False) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise DataError(f"{name} must be a number, got {value!r}")
    v = float(value)
    if not (low <= v < high if open_high else low <= v <= high):
        raise DataError(f"{name} must lie in [{low}, {high}{')' if open_high else ']'}, got {value!r}")
    return v


def _check_count(value: Any, name: str, minimum: int = 0) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise DataError(f"{name} must be a whole number >= {minimum}, got {value!r}")
    return int(value)


def _split_target(X: Any, y: Any) -> tuple[Any, Any]:
    if isinstance(y, str):
        if not isinstance(X, pd.DataFrame):
            raise DataError(f"y={y!r} names a column, but X is not a DataFrame")
        if y not in X.columns:
            raise DataError(f"target column {y!r} is not in the data; columns are {', '.join(map(str, X.columns))}")
        return X.drop(columns=[y]), X[y].to_numpy()
    if y is None:
        return X, None
    target = np.asarray(y)
    if target.ndim != 1 or target.shape[0] != len(X):
        raise DataError(f"y has shape {target.shape}; expected one value per row of X ({len(X)} rows)")
    return X, target


# ---------------------------------------------------------------- dependence
def _dependence(matrix: np.ndarray, pairs: list[tuple[int, int]], categorical: np.ndarray,
                random_state: int) -> tuple[np.ndarray, np.ndarray]:
    """Spearman rank correlation and information correlation of every pair, on rows where both are present."""
    from scipy.stats import spearmanr
    from sklearn.feature_selection import mutual_info_classif, mutual_info_regression

    rank = np.full(len(pairs), np.nan)
    info = np.full(len(pairs), np.nan)
    for i, (a, b) in enumerate(pairs):
        both = ~np.isnan(matrix[:, a]) & ~np.isnan(matrix[:, b])
        xa, xb = matrix[both, a], matrix[both, b]
        if xa.size < 5 or np.ptp(xa) == 0 or np.ptp(xb) == 0:
            continue
        if not (categorical[a] or categorical[b]):
            rank[i] = float(spearmanr(xa, xb).statistic)
        if categorical[b]:
            mi = mutual_info_classif(xa[:, None], xb.astype(np.int64), discrete_features=[bool(categorical[a])],
                                     random_state=random_state)[0]
        else:
            mi = mutual_info_regression(xa[:, None], xb, discrete_features=[bool(categorical[a])],
                                        random_state=random_state)[0]
        info[i] = float(np.sqrt(1.0 - np.exp(-2.0 * max(mi, 0.0))))
    return rank, info


# ------------------------------------------------------------------ H pieces
def _pair_h(model: ForestGraph, rows: pd.DataFrame | np.ndarray, names: list[tuple[str, str]],
            output: int | None) -> np.ndarray:
    """H² and h of the given pairs on ``rows`` (background = evaluation rows), shape (2, n_pairs)."""
    from .measure import h_statistic

    out = np.zeros((2, len(names)))
    if not names:
        return out
    result = h_statistic(model, rows, pairs=names, against_rest=False, sample=None, output=output, progress=False)
    table = result.pairs.set_index(["feature_a", "feature_b"])
    for i, (a, b) in enumerate(names):
        key = (a, b) if (a, b) in table.index else (b, a)
        if key in table.index:
            out[0, i] = float(table.loc[key, "h2"])
            out[1, i] = float(table.loc[key, "h"])
    return out


def _take_rows(X: Any, index: np.ndarray) -> Any:
    return X.iloc[index].reset_index(drop=True) if isinstance(X, pd.DataFrame) else np.asarray(X)[index]


def _null_h(ens: ForestGraph, source: Any, X: Any, y: np.ndarray, rows: Any, names: list[tuple[str, str]], *, refits: int,
             params: dict | None, output: int | None, random_state: int, n_jobs: int,
             progress: bool | None) -> tuple[np.ndarray, list[str]]:
    """H² and h of every pair on ``refits`` models refitted to targets without interaction ([1]_, section 8.3).

    Returns an array of shape (refits, 2, n_pairs) and notes for the reader.
    """
    from joblib import Parallel, delayed

    from .io import load_model
    from .refit import (
        BINARY,
        REGRESSION,
        design_matrix,
        fit_model,
        import_library,
        predict_model,
        task_of,
        training_setup,
    )

    # A live booster reports its full training configuration; the loaded graph keeps only what files store.
    setup_from = source if not isinstance(source, (ForestGraph, str)) and not hasattr(source, "__fspath__") else ens
    library, run_params, rounds, model_names, notes = training_setup(setup_from, None, params, None)
    matrix, target, columns = design_matrix(X, y, model_names)
    module = import_library(library)
    objective = str(run_params.get("objective", ens.objective))
    task = task_of(library, objective)
    additive_groups = [[j] for j in range(matrix.shape[1])]
    additive = fit_model(library, module, run_params, matrix, target, rounds, additive_groups, columns)
    fitted = np.asarray(predict_model(library, module, additive, matrix, columns, objective), dtype=np.float64)
    rng = np.random.default_rng(random_state)
    seeds = rng.integers(0, 2**31 - 1, size=refits)

    def synthetic(seed: int) -> np.ndarray:
        draw = np.random.default_rng(seed)
        if task == REGRESSION:
            return fitted + draw.permutation(target - fitted)
        if task == BINARY:
            return (draw.random(target.size) < np.clip(fitted.ravel(), 0.0, 1.0)).astype(np.float64)
        probability = fitted.reshape(target.size, -1)
        cumulative = probability.cumsum(axis=1)
        return (draw.random((target.size, 1)) > cumulative[:, :-1]).sum(axis=1).astype(np.float64)

    def one(seed: int) -> np.ndarray:
        refit = load_model(fit_model(library, module, run_params, matrix, synthetic(seed), rounds, None, columns),
                           feature_names=columns)
        return _pair_h(refit, rows, names, output)

    with progress_bar(refits, "null refits", enabled=progress) as bar:
        if n_jobs == 1:
            values = []
            for seed in seeds:
                values.append(one(int(seed)))
                bar.update()
        else:
            values = Parallel(n_jobs=n_jobs)(delayed(one)(int(seed)) for seed in seeds)
            bar.update(refits)
    notes = list(notes) + [
        f"Noise floor from {refits} refits of the {library} model on synthetic targets without interaction "
        f"({'additive fit plus permuted residuals' if task == REGRESSION else 'labels drawn from the additive fit'})."
    ]
    return np.stack(values) if values else np.zeros((0, 2, len(names))), notes


# -------------------------------------------------------------------- public
def triage(
    model: Any,
    X: Any,
    y: Any = None,
    *,
    triples: bool = False,
    sample: int | None = 1000,
    resamples: int = 20,
    null_refits: int = 10,
    null_quantile: float = 0.95,
    confidence: float = 0.90,
    min_h2: float = 0.05,
    min_effect: float = 0.05,
    max_dependence: float = 0.7,
    params: dict | None = None,
    output: int | None = None,
    include_absent: bool = True,
    random_state: int = 0,
    n_jobs: int = 1,
    progress: bool | None = None,
) -> TriageResult:
    """Give every feature pair a verdict: interaction, co-split, dependent or absent.

    Parameters
    ----------
    model : ForestGraph or anything :func:`treeprobe.load_model` accepts
        The fitted tree ensemble.
    X : DataFrame or ndarray of shape (n_rows, n_features)
        Data holding the model's feature columns (matched by name for a
        DataFrame; extra columns are ignored).
    y : array-like of shape (n_rows,) or str, optional
        The target, or the name of its column in ``X``. Needed for the noise
        floor refits; without it only ``min_h2`` and the interval are used.
    triples : bool, default False
        Also give verdicts to feature triples that share a path.
    sample : int or None, default 1000
        Rows drawn (seeded) from ``X`` for H and dependence; None uses all rows.
    resamples : int, default 20
        Half-size row subsamples for the intervals of H² and ``h`` (0: none;
        the point values are used).
    null_refits : int, default 10
        Refits on synthetic targets for the noise floor (used only with ``y``).
        Each refit trains the model once more on all rows of ``X``: the cost is
        about ``null_refits`` times the original training time, spread over
        ``n_jobs`` workers.
    null_quantile : float, default 0.95
        Quantile of the null values of ``h`` taken as the noise floor.
    confidence : float, default 0.90
        Nominal coverage of the subsampling intervals.
    min_h2 : float, default 0.05
        Smallest H² ever counted as interaction (a convention of ours).
    min_effect : float, default 0.05
        Smallest ``h / sd(prediction)`` counted as a non-negligible effect (a
        convention of ours: an interaction part under 5% of the prediction
        spread rarely matters in practice).
    max_dependence : float, default 0.7
        Dependence (|Spearman| or information correlation) from which a pair is
        ``dependent``; 0.7 as "strong correlation" is common practice.
    params : dict, optional
        Training parameters for the refits, overriding those read from the model
        (a saved XGBoost file stores few; see :func:`treeprobe.refit.training_setup`).
    output : int, optional
        Output (class) of a multiclass model; default the first output.
    include_absent : bool, default True
        Keep rows for used-feature pairs that never share a path (verdict ``absent``).
    random_state : int, default 0
        Seed for the row sample, subsamples, refits and the mutual information estimator.
    n_jobs : int, default 1
        Parallel workers for the refits (joblib).
    progress : bool, optional
        Progress bar on standard error; default: only on a terminal.

    Returns
    -------
    TriageResult

    Notes
    -----
    With ``L2`` and ``Lh`` the lower ends of the intervals of H² and ``h``
    (the point values when ``resamples == 0``), ``q_h`` the refits'
    ``null_quantile`` of ``h`` (0 without refits), ``effect = h / sd(F(x))``
    and ``D`` the dependence::

        absent       if paths == 0
        dependent   if D >= max_dependence          (leans: what H alone says)
        interaction  if L2 > min_h2 and Lh > q_h and effect >= min_effect
        co-split     otherwise

    The intervals follow subsampling ([2]_): with ``T`` the point value on
    ``n`` rows and ``T_b`` its value on subsample ``b`` of ``m = n / 2`` rows
    drawn without replacement, the interval is
    ``[T - sqrt(m/n) q_hi, T - sqrt(m/n) q_lo]`` (lower end clipped at 0), where
    ``q_lo, q_hi`` are quantiles of ``T_b - T``. If smaller samples inflate H,
    the interval moves down, so the evidence asked of an interaction grows.

    References
    ----------
    .. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
       ensembles", Annals of Applied Statistics 2(3), 2008, section 8.
    .. [2] D. N. Politis, J. P. Romano and M. Wolf, "Subsampling", Springer,
       1999 (the interval of section 2.2, rate sqrt(n)).
    """
    from .cooccurrence import structure
    from .io import load_model
    from .measure import h_statistic

    started = time.perf_counter()
    ens = model if isinstance(model, ForestGraph) else load_model(model)
    null_quantile = _check_fraction(null_quantile, "null_quantile", low=0.5)
    confidence = _check_fraction(confidence, "confidence", low=0.5, open_high=True)
    min_h2 = _check_fraction(min_h2, "min_h2")
    min_effect = _check_fraction(min_effect, "min_effect", high=np.inf)
    max_dependence = _check_fraction(max_dependence, "max_dependence")
    resamples = _check_count(resamples, "resamples")
    null_refits = _check_count(null_refits, "null_refits")
    if sample is not None:
        sample = _check_count(sample, "sample", 2)
    if output is None:
        output = 0
    if not 0 <= output < ens.n_outputs:
        raise DataError(f"output must lie in 0..{ens.n_outputs - 1}, got {output}")
    X, target = _split_target(X, y)
    matrix_all = ens.check_X(X)
    n_all = matrix_all.shape[0]
    if n_all < 2:
        raise DataError(f"the data has {n_all} row(s); triage needs at least 2")
    rng = np.random.default_rng(random_state)
    chosen = np.sort(rng.choice(n_all, size=sample, replace=False)) if sample is not None and sample < n_all else np.arange(n_all)
    rows = _take_rows(X, chosen)
    matrix = matrix_all[chosen]

    walked = structure(ens, max_order=3 if triples else 2, output=output if ens.n_outputs > 1 else None)
    used = walked.features["splits"].to_numpy() > 0
    names = list(ens.feature_names)
    used_names = [n for n, u in zip(names, used) if u]
    shared = walked.pairs.set_index(["feature_a", "feature_b"])
    pair_list = list(combinations(used_names, 2)) if include_absent else [tuple(k) for k in shared.index]
    h_out = output if ens.n_outputs > 1 else None
    hres = h_statistic(ens, rows, pairs=[tuple(k) for k in shared.index] or None, triples=bool(triples) or None,
                       against_rest=True, sample=None, output=h_out, progress=progress)
    hp = hres.pairs.set_index(["feature_a", "feature_b"])
    raw = ens.predict_raw(matrix, checked=True)
    prediction_sd = float(np.std(raw if raw.ndim == 1 else raw[:, output]))
    scale = prediction_sd if prediction_sd > 0 else 1.0

    frame = pd.DataFrame(pair_list, columns=["feature_a", "feature_b"])
    for col, default in (("paths", 0), ("trees", 0), ("cover_share", 0.0), ("nested_gain", 0.0),
                         ("first_level", -1), ("first_tree", -1)):
        frame[col] = [shared[col].get(k, default) if k in shared.index else default for k in pair_list]
    frame["h2"] = [float(hp["h2"].get(k, 0.0)) if k in hp.index else 0.0 for k in pair_list]
    frame["h"] = [float(hp["h"].get(k, 0.0)) if k in hp.index else 0.0 for k in pair_list]
    sharing = frame["paths"].to_numpy() > 0
    share_names = [k for k, s in zip(pair_list, sharing) if s]

    low = np.full((2, len(frame)), np.nan)
    high = np.full((2, len(frame)), np.nan)
    if resamples and share_names:
        # Subsampling without replacement (half the rows) rather than the bootstrap: a
        # bootstrap sample repeats rows, and since the rows are both the partial-dependence
        # background and the evaluation points, repeated rows bias H (we saw bootstrap
        # intervals lying wholly above the point value).
        n_rows = len(chosen)
        half = max(2, n_rows // 2)
        point = np.vstack([frame.loc[sharing, "h2"].to_numpy(), frame.loc[sharing, "h"].to_numpy()])
        subs = np.empty((resamples, 2, len(share_names)))
        with progress_bar(resamples, "resampling", enabled=progress) as bar:
            for b in range(resamples):
                pick = np.sort(rng.choice(n_rows, size=half, replace=False))
                subs[b] = _pair_h(ens, _take_rows(rows, pick), share_names, h_out)
                bar.update()
        alpha = (1.0 - confidence) / 2.0
        shrink = np.sqrt(half / n_rows)
        spread = subs - point[None]
        low[:, sharing] = np.maximum(point - shrink * np.quantile(spread, 1.0 - alpha, axis=0), 0.0)
        high[:, sharing] = point - shrink * np.quantile(spread, alpha, axis=0)
    frame["h2_low"], frame["h2_high"] = low[0], high[0]
    frame["h_low"], frame["h_high"] = low[1], high[1]
    frame["effect"] = frame["h"] / scale

    null = np.full((2, len(frame)), np.nan)
    refit_notes: list[str] = []
    if target is not None and null_refits and share_names:
        values, refit_notes = _null_h(ens, model, X, target, rows, share_names, refits=null_refits, params=params,
                                      output=h_out, random_state=random_state, n_jobs=n_jobs, progress=progress)
        null[:, sharing] = np.quantile(values, null_quantile, axis=0)
    frame["null_h2"], frame["null_h"] = null[0], null[1]

    index = {n: j for j, n in enumerate(names)}
    categorical = np.array([t == "categorical" for t in ens.feature_types])
    rank, info = _dependence(matrix, [(index[a], index[b]) for a, b in pair_list], categorical, random_state)
    frame["rank_correlation"] = rank
    frame["information_correlation"] = info
    frame["dependence"] = np.fmax(np.abs(rank), info)

    h2_evidence = np.where(np.isnan(low[0]), frame["h2"], low[0])
    h_evidence = np.where(np.isnan(low[1]), frame["h"], low[1])
    clears = ((h2_evidence > min_h2) & (h_evidence > np.nan_to_num(null[1], nan=0.0))
              & (frame["effect"].to_numpy() >= min_effect))
    leans = np.where(~sharing, "absent", np.where(clears, "interaction", "co-split"))
    dependent = sharing & (np.nan_to_num(frame["dependence"].to_numpy()) >= max_dependence)
    frame["verdict"] = np.where(dependent, "dependent", leans)
    frame["leans"] = leans
    frame["strength"] = np.where(sharing, frame["effect"], 0.0)
    order = {"interaction": 0, "dependent": 1, "co-split": 2, "absent": 3}
    frame = (frame.assign(_rank=frame["verdict"].map(order))
             .sort_values(["_rank", "strength", "paths"], ascending=[True, False, False], kind="stable")
             .drop(columns="_rank").reset_index(drop=True))

    triple_frame = _triple_verdicts(walked, hres, frame, scale, min_h2, min_effect, max_dependence) if triples else \
        pd.DataFrame(columns=["feature_a", "feature_b", "feature_c", "verdict", "strength"])

    rest = hres.against_rest.set_index("feature") if len(hres.against_rest) else pd.DataFrame(columns=["h2", "h"])
    features = walked.features[["feature", "splits", "gain", "cover"]].copy()
    features.insert(1, "used", used)
    features["h2_rest"] = [float(rest["h2"].get(n, np.nan)) if n in rest.index else np.nan for n in names]
    features["h_rest"] = [float(rest["h"].get(n, np.nan)) if n in rest.index else np.nan for n in names]

    thresholds = {"min_h2": min_h2, "min_effect": min_effect, "max_dependence": max_dependence,
                  "null_quantile": null_quantile, "confidence": confidence}
    has_floor = target is not None and null_refits > 0
    facts = {
        "n_rows": int(len(chosen)),
        "n_rows_available": int(n_all),
        "resamples": resamples,
        "null_refits": null_refits if has_floor else 0,
        "has_target": target is not None,
        "prediction_sd": prediction_sd,
        "output": output,
        "scale": "margin",
        "seconds": time.perf_counter() - started,
        "refit_notes": refit_notes,
    }
    return TriageResult(
        pairs=frame,
        triples=triple_frame,
        features=features,
        ensemble=ens,
        rules=_rules(min_h2, min_effect, max_dependence, null_quantile, has_floor),
        thresholds=thresholds,
        facts=facts,
    )


def _triple_verdicts(walked: Any, hres: Any, pairs: pd.DataFrame, scale: float, min_h2: float, min_effect: float,
                     max_dependence: float) -> pd.DataFrame:
    """Verdicts on triples sharing a path: H² against ``min_h2``, effect, and the largest pairwise dependence."""
    members = ["feature_a", "feature_b", "feature_c"]
    frame = walked.triples[members + ["paths", "trees", "cover_share", "nested_gain"]].copy()
    ht = hres.triples.set_index(members) if len(hres.triples) else None
    keys = [tuple(r) for r in frame[members].itertuples(index=False, name=None)]
    frame["h2"] = [float(ht["h2"].get(k, 0.0)) if ht is not None and k in ht.index else 0.0 for k in keys]
    frame["h"] = [float(ht["h"].get(k, 0.0)) if ht is not None and k in ht.index else 0.0 for k in keys]
    frame["effect"] = frame["h"] / scale
    dep = {frozenset((a, b)): d for a, b, d in pairs[["feature_a", "feature_b", "dependence"]].itertuples(index=False)}
    frame["dependence"] = [max(np.nan_to_num(dep.get(frozenset(p), 0.0)) for p in combinations(k, 2)) for k in keys]
    clears = (frame["h2"] > min_h2) & (frame["effect"] >= min_effect)
    leans = np.where(clears, "interaction", "co-split")
    frame["verdict"] = np.where(frame["dependence"] >= max_dependence, "dependent", leans)
    frame["leans"] = leans
    frame["strength"] = frame["effect"]
    return frame.sort_values("strength", ascending=False, kind="stable").reset_index(drop=True)

