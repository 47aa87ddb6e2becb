"""Triage: is a feature pair a real interaction of the model, a co-split, or an artefact?

Sharing root-to-leaf paths is necessary for a tree ensemble to make two
features interact, not sufficient: an additive effect split in sequence
shares paths too, and two dependent features can stand in for each other.
This module joins, per pair, the path structure of :mod:`treeprobe.cooccurrence`,
Friedman and Popescu's H-statistic of :mod:`treeprobe.measure` with a resampling
interval and a noise floor, and the dependence of the two features in the
data, and gives each pair one verdict:

``interaction``
    The pair shares paths, its interaction size ``h`` clears the noise floor
    (with a target; without one, its H² is clearly above a small convention),
    and ``h`` is not negligible against the spread of the predictions.
``dependent``
    The pair shares paths and the two features are strongly dependent in the
    data, so partial dependence extrapolates and H cannot be trusted; the
    column ``leans`` says which verdict H alone would give.
``co-split``
    The pair shares paths but H or its size stays within the noise: the trees
    split on both without a joint effect worth the name. The column ``faint``
    marks the pairs whose ``h`` clears the noise floor while too small to
    count: weak interactions the model does use.
``absent``
    The pair never shares a root-to-leaf path, so the model cannot make the two
    interact: H = 0 exactly.

The noise floor follows Friedman and Popescu ([1]_, section 8.3): fit an
additive version of the same model (same library and hyperparameters, each
feature in its own interaction-constraint group) to ``y``; build synthetic
targets with no interaction, the additive fit plus permuted residuals; refit
the unconstrained model on each, as it was trained, and compute H on each
refit. All pairs are tested together, so that the chance of any false call
holds at a stated level (:func:`treeprobe.floor.max_ratio_test`); when some pairs clear it by
a wide margin, every other pair is tested again against a null that keeps
those interactions (Notes of :func:`triage`). We take the floor on ``h``,
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

import copy
import inspect
import time
from dataclasses import dataclass, field, fields
from itertools import combinations
from typing import Any

import numpy as np
import pandas as pd

from .checks import check_bool, check_float, check_int, check_n_jobs, check_progress, check_seed
from .cooccurrence import structure
from .data import model_matrix
from .dependence import pair_dependence
from .errors import DataError, MissingLibraryError, ParameterError, UnsupportedModelError
from .floor import SharedFirstRound, check_refit_level, floor_test
from .graph import ForestGraph
from .io import load_model
from .measure import h_statistic, subset_pair_h
from .output import to_jsonable
from .parallel import threads_per_fit
from .refit import (
    Recipe,
    calibrate_step,
    checked_target,
    live_model_of,
    training_recipe,
)

__all__ = ["TriageResult", "triage", "triage_classes", "class_analysed", "VERDICTS", "PAIR_COLUMNS", "TRIPLE_COLUMNS", "FEATURE_COLUMNS", "LIMITS"]

# The one verdict order: tables, tallies, legends and rules follow it.
VERDICTS = ("interaction", "dependent", "co-split", "absent")
PAIR_COLUMNS = (
    "feature_a", "feature_b", "paths", "trees", "cover_share", "nested_gain", "first_level", "first_tree",
    "h2", "h", "h2_low", "h2_high", "h_low", "h_high", "effect", "null_h2", "null_h", "p_value", "p_adjusted",
    "rank_correlation", "information_correlation", "dependence", "verdict", "leans", "faint", "strength",
)
TRIPLE_COLUMNS = (
    "feature_a", "feature_b", "feature_c", "paths", "trees", "cover_share", "nested_gain",
    "h2", "h", "effect", "dependence", "verdict", "leans", "strength",
)
FEATURE_COLUMNS = ("feature", "used", "splits", "gain", "cover", "h2_rest", "h_rest")
LIMITS = (
    "Verdicts rest on conventions (the thresholds in the verdict rules) and on H-statistics, which extrapolate when features are "
    "dependent. They describe this model, not the world: structure is not causation, and a model's interactions "
    "are not the data-generating process's. Where the model decides about people (credit, health, hiring), this "
    "supports, and does not replace, the model-risk review that local rules require."
)
_SCHEMA = "treeprobe.triage/4"
# Resamples for the intervals when no floor test runs (with one, the refits give the evidence).
_RESAMPLES_WITHOUT_FLOOR = 20
_STRUCTURE_DEFAULTS = (("paths", 0), ("trees", 0), ("cover_share", 0.0), ("nested_gain", 0.0), ("first_level", -1),
                       ("first_tree", -1))


# --------------------------------------------------------------------- the verdict rule
def _rules(thresholds: dict, noise_floor: bool) -> dict[str, str]:
    """One sentence per verdict (in ``VERDICTS`` order), written from the thresholds :func:`_verdict` applies."""
    size = f"h is at least {thresholds['min_effect']:.0%} of the spread (standard deviation) of the model's predictions"
    if noise_floor:
        interaction = (
            f"Shares paths, its size h clears the noise floor (refits on targets without interaction; all pairs tested "
            f"together at family-wise level {thresholds['level']:g}; when some pairs clear it by a wide margin, the "
            f"others are tested again against a null that keeps those interactions), and {size}. H² is reported, not "
            "required: large main effects dilute it."
        )
        co_split = (
            "Shares paths, but h stays within the noise floor or is negligible: the trees split on both without a "
            f"joint effect worth the name. 'faint' marks a pair whose h clears the floor while under "
            f"{thresholds['min_effect']:.0%} of the spread: a weak interaction the model does use."
        )
    else:
        interaction = (
            f"Shares paths, the lower end of its H² interval is above {thresholds['min_h2']:g}, the lower end of h is "
            f"above 0, and {size} (no noise floor: no target or no refits)."
        )
        co_split = ("Shares paths, but H² or its size h stays within the noise or is negligible: the trees split on "
                    "both without a joint effect.")
    return {
        "interaction": interaction,
        "dependent": (
            "Shares paths, but the two features are strongly dependent in the data (|rank correlation| or information "
            f"correlation at least {thresholds['max_dependence']:g}), so partial dependence extrapolates and H cannot "
            "be trusted; 'leans' gives the verdict H alone would give."
        ),
        "co-split": co_split,
        "absent": "Never on a common root-to-leaf path: the model cannot make the two interact, and H = 0 exactly.",
    }


def _verdict(h2_low: np.ndarray, h_low: np.ndarray, p_adjusted: np.ndarray, effect: np.ndarray,
             dependence: np.ndarray, shares_path: np.ndarray,
             thresholds: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Verdict, ``leans`` and ``faint`` of each row, from its numbers alone (the rule of :func:`triage`, Notes).

    ``h2_low`` and ``h_low`` are the lower ends of the intervals (the point
    values where there is none), ``p_adjusted`` the family-wise p-value of the
    noise-floor test (NaN: no test), ``dependence`` NaN where unknown.
    """
    p_adjusted = np.asarray(p_adjusted, dtype=float)
    shares_path = np.asarray(shares_path, dtype=bool)
    tested = ~np.isnan(p_adjusted)
    evidence = shares_path & tested & (np.nan_to_num(p_adjusted, nan=1.0) <= thresholds["level"])
    large = np.asarray(effect, dtype=float) >= thresholds["min_effect"]
    untested = (np.asarray(h2_low) > thresholds["min_h2"]) & (np.asarray(h_low) > 0) & large
    clears = np.where(tested, evidence & large, untested)
    leans = np.where(~shares_path, "absent", np.where(clears, "interaction", "co-split"))
    dependent = shares_path & (np.nan_to_num(np.asarray(dependence, dtype=float)) >= thresholds["max_dependence"])
    return np.where(dependent, "dependent", leans), leans, evidence & ~large & ~dependent


def _same(left: Any, right: Any) -> bool:
    if isinstance(left, pd.DataFrame) or isinstance(right, pd.DataFrame):
        return isinstance(left, pd.DataFrame) and isinstance(right, pd.DataFrame) and left.equals(right)
    if isinstance(left, ForestGraph) or isinstance(right, ForestGraph):
        return left is right
    return bool(left == right)


@dataclass(frozen=True, eq=False)
class TriageResult:
    """Verdicts on feature pairs (and triples) of one model on one data set.

    Two results are equal when they hold the same model object and equal
    tables, rules, thresholds and facts.

    Attributes
    ----------
    pairs : DataFrame
        One row per pair of used features, sorted by verdict (``VERDICTS``
        order: interaction, dependent, co-split, absent) then ``strength``.
        Columns (``PAIR_COLUMNS``):
        ``feature_a``, ``feature_b``; structure (:func:`treeprobe.structure`):
        ``paths``, ``trees``, ``cover_share``, ``nested_gain``, ``first_level``,
        ``first_tree``; H (:func:`treeprobe.h_statistic`): ``h2``, ``h``,
        ``h2_low``/``h2_high`` and ``h_low``/``h_high`` (subsampling intervals
        over ``resamples`` half-size row subsamples, for the pairs sharing a
        path with ``effect >= min_effect``, the only ones an interval can turn
        into ``interaction``; NaN elsewhere or without; see Notes), ``effect`` =
        ``h / sd(prediction)``, ``null_h2`` (the first round's ``1 - level``
        quantile of H² over refits), ``null_h`` (the noise floor: the ``h`` the
        pair must exceed), ``p_value`` (the pair's empirical p-value) and
        ``p_adjusted`` (family-wise; :func:`treeprobe.floor.max_ratio_test`), all NaN without
        ``y``; dependence: ``rank_correlation``
        (Spearman), ``information_correlation`` (``sqrt(1 - exp(-2 I))``),
        ``dependence`` = the larger of their absolute values; ``verdict``,
        ``leans`` (for ``dependent``: the verdict H alone gives, else equal to
        ``verdict``), ``faint`` (``h`` clears the noise floor while ``effect``
        is under ``min_effect``: a weak interaction; False without a floor),
        ``strength`` = ``effect`` (0 for ``absent``), the score to rank by.
    triples : DataFrame
        The same for feature triples that share a path; no rows unless asked.
        Columns (``TRIPLE_COLUMNS``): ``feature_a``, ``feature_b``,
        ``feature_c``, ``paths``, ``trees``, ``cover_share``, ``nested_gain``,
        ``h2``, ``h``, ``effect``, ``dependence`` (largest of the three
        pairs'), ``verdict``, ``leans``, ``strength``; no interval or null
        refits, so H² and ``h`` stand for their lower ends and the floor is 0.
    features : DataFrame
        Columns (``FEATURE_COLUMNS``): ``feature``, ``used``, ``splits``,
        ``gain``, ``cover``, ``h2_rest``, ``h_rest`` (H of the feature against
        all others, eq. 45 of [1]).
    ensemble : ForestGraph
    rules : dict
        The rule of each verdict in one sentence, with the thresholds used,
        keyed in ``VERDICTS`` order. The one source of rule texts.
    thresholds : dict
        ``min_h2``, ``min_effect``, ``max_dependence``, ``level``, ``confidence``.
    facts : dict
        ``n_rows``, ``n_rows_available``, ``resamples``, ``null_refits``,
        ``has_target``, ``prediction_sd``, ``output``, ``scale``, ``seconds``,
        ``refit_notes``, ``refit_recipe`` (library, rounds and each training
        parameter's value and origin: stored, given, recovered or default;
        None without refits), ``refit_recipe_text`` (the same in one line) and
        ``refit_threads_per_fit`` (1 inside parallel workers, 0 = every free core).
    """

    pairs: pd.DataFrame
    triples: pd.DataFrame
    features: pd.DataFrame
    ensemble: ForestGraph
    rules: dict
    thresholds: dict
    facts: dict
    limits: str = field(default=LIMITS)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, TriageResult):
            return NotImplemented
        return all(_same(getattr(self, f.name), getattr(other, f.name)) for f in fields(self))

    __hash__ = None  # type: ignore[assignment]

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


# --------------------------------------------------------------------- data
def _split_target(X: Any, y: Any, graph: ForestGraph) -> tuple[Any, Any]:
    if isinstance(y, str):
        if not isinstance(X, pd.DataFrame):
            raise DataError(f"y={y!r} names a column, but X is not a DataFrame")
        if y in graph.feature_names:
            raise DataError(f"target column {y!r} is one of the model's features; name the column the model was "
                            "trained to predict")
        if y not in X.columns:
            raise DataError(f"target column {y!r} is not in the data; columns are {', '.join(map(str, X.columns))}")
        return X.drop(columns=[y]), X[y].to_numpy()
    if y is None:
        return X, None
    target = np.asarray(y)
    if target.ndim != 1 or target.shape[0] != len(X):
        raise DataError(f"y has shape {target.shape}; expected one value per row of X ({len(X)} rows)")
    return X, target


def class_analysed(graph: ForestGraph, output: int) -> str | None:
    """Which class a classifier's statistics describe, in words; None for a regression model.

    Binary models with one margin describe the positive class (log-odds);
    multiclass models one output (class) at a time.

    Examples
    --------
    >>> from treeprobe.graph import ForestGraph
    >>> stump = ForestGraph.from_arrays(feature=[0, -1, -1], threshold=[0.5, 0, 0], left=[1, -1, -1],
    ...                                 right=[2, -1, -1], value=[0.0, -1.0, 1.0], tree_offsets=[0, 3], link="logit")
    >>> class_analysed(stump, 0)
    'class 1 (the positive class; log-odds margin)'
    """
    labels = graph.provenance.class_labels
    if graph.n_outputs > 1:
        label = labels[output] if output < len(labels) else output
        return f"class {label} (output {output} of {graph.n_outputs})"
    if graph.link in ("logit", "proba") or len(labels) == 2:
        positive = labels[1] if len(labels) == 2 else 1
        return f"class {positive} (the positive class; {'log-odds margin' if graph.link == 'logit' else 'probability'})"
    return None


def _refit_recipe(graph: ForestGraph, live_model: Any, params: dict | None) -> Recipe:
    """The recipe of the noise-floor refits, built before any H computation; a model that cannot be refit says what still runs."""
    try:
        return training_recipe(graph, live_model=live_model, params=params)
    except (UnsupportedModelError, MissingLibraryError) as exc:
        raise type(exc)(
            f"{exc}. The noise floor needs refits; without them the triage still runs: give no target "
            "(command line: leave out --target) or null_refits=0 (--null-refits 0)"
        ) from None


def _take_rows(X: Any, index: np.ndarray) -> Any:
    return X.iloc[index].reset_index(drop=True) if isinstance(X, pd.DataFrame) else np.asarray(X)[index]


def _sample_rows(matrix: np.ndarray, sample: int | None, rng: np.random.Generator) -> np.ndarray:
    """Sorted indices of the rows H and dependence are computed on (all rows when ``sample`` is None or larger)."""
    n_rows = matrix.shape[0]
    if n_rows < 2:
        raise DataError(f"the data has {n_rows} row(s); triage needs at least 2")
    if sample is None or sample >= n_rows:
        return np.arange(n_rows)
    return np.sort(rng.choice(n_rows, size=sample, replace=False))


def _prediction_sd(graph: ForestGraph, matrix: np.ndarray, output: int) -> float:
    raw = graph.predict_raw(matrix, checked=True)
    return float(np.std(raw if raw.ndim == 1 else raw[:, output]))


# ------------------------------------------------------------------ H pieces
def _subsample_intervals(graph: ForestGraph, rows: Any, point: np.ndarray, names: list[tuple[str, str]], *,
                         resamples: int, confidence: float, rng: np.random.Generator, output: int | None,
                         progress: bool | None) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper ends of the subsampling intervals of H² and h (each of shape (2, n_pairs); Notes of triage)."""
    # Subsampling without replacement (half the rows) rather than the bootstrap: a
    # bootstrap sample repeats rows, and since the rows are both the partial-dependence
    # background and the evaluation points, repeated rows bias H (we saw bootstrap
    # intervals lying wholly above the point value).
    # All subsamples share one exact pass over the trees (subset_pair_h); each equals
    # _pair_h on its own rows.
    n_rows = len(rows)
    half = max(2, n_rows // 2)
    subsets = np.zeros((resamples, n_rows), dtype=bool)
    for b in range(resamples):
        subsets[b, rng.choice(n_rows, size=half, replace=False)] = True
    subs = subset_pair_h(graph, rows, names, subsets, output=output, progress=progress)
    alpha = (1.0 - confidence) / 2.0
    shrink = np.sqrt(half / n_rows)
    spread = subs - point[None]
    low = np.maximum(point - shrink * np.quantile(spread, 1.0 - alpha, axis=0), 0.0)
    high = point - shrink * np.quantile(spread, alpha, axis=0)
    return low, high


# ------------------------------------------------------------------ tables
def _lookup(table: pd.DataFrame, keys: list, column: str, default: Any) -> list:
    """``table[column]`` at each key of ``keys`` (index labels or label tuples), ``default`` where absent; one reindex."""
    if not keys:
        return []
    index = pd.MultiIndex.from_tuples(keys) if isinstance(keys[0], tuple) else pd.Index(keys)
    found = table[column].reindex(index)
    values = found.where(found.notna(), default)
    if table[column].dtype.kind in "iub":
        values = values.astype(table[column].dtype)
    return values.tolist()


def _pair_frame(walked: Any, hres: Any, used_names: list[str], include_absent: bool) -> pd.DataFrame:
    """Structure and H columns of every pair: all used-feature pairs, or only those sharing a path."""
    shared = walked.pairs.set_index(["feature_a", "feature_b"])
    keys = list(combinations(used_names, 2)) if include_absent else [tuple(k) for k in shared.index]
    frame = pd.DataFrame(keys, columns=["feature_a", "feature_b"])
    for column, default in _STRUCTURE_DEFAULTS:
        frame[column] = _lookup(shared, keys, column, default)
    h = hres.pairs.set_index(["feature_a", "feature_b"])
    frame["h2"] = np.asarray(_lookup(h, keys, "h2", 0.0), dtype=float)
    frame["h"] = np.asarray(_lookup(h, keys, "h", 0.0), dtype=float)
    return frame


def _triple_frame(walked: Any, hres: Any, pairs: pd.DataFrame, scale: float, thresholds: dict) -> pd.DataFrame:
    """Verdicts on triples sharing a path, by the pair rule with H² and h as their own lower ends and no floor."""
    members = ["feature_a", "feature_b", "feature_c"]
    frame = walked.triples[members + ["paths", "trees", "cover_share", "nested_gain"]].copy()
    h = hres.triples.set_index(members) if len(hres.triples) else pd.DataFrame(columns=["h2", "h"])
    keys = [tuple(r) for r in frame[members].itertuples(index=False, name=None)]
    frame["h2"] = np.asarray(_lookup(h, keys, "h2", 0.0), dtype=float)
    frame["h"] = np.asarray(_lookup(h, keys, "h", 0.0), dtype=float)
    frame["effect"] = frame["h"] / scale
    dep = {frozenset((a, b)): d for a, b, d in pairs[["feature_a", "feature_b", "dependence"]].itertuples(index=False)}
    frame["dependence"] = [max(np.nan_to_num(dep.get(frozenset(p), 0.0)) for p in combinations(k, 2)) for k in keys]
    frame["verdict"], frame["leans"], _ = _verdict(frame["h2"], frame["h"], np.full(len(frame), np.nan),
                                                   frame["effect"], frame["dependence"], np.ones(len(frame), dtype=bool),
                                                   thresholds)
    frame["strength"] = frame["effect"]
    return frame.sort_values("strength", ascending=False, kind="stable").reset_index(drop=True)[list(TRIPLE_COLUMNS)]


def _feature_frame(walked: Any, hres: Any, names: tuple[str, ...], used: np.ndarray) -> pd.DataFrame:
    rest = hres.against_rest.set_index("feature") if len(hres.against_rest) else pd.DataFrame(columns=["h2", "h"])
    features = walked.features[["feature", "splits", "gain", "cover"]].copy()
    features.insert(1, "used", used)
    features["h2_rest"] = np.asarray(_lookup(rest, list(names), "h2", np.nan), dtype=float)
    features["h_rest"] = np.asarray(_lookup(rest, list(names), "h", np.nan), dtype=float)
    return features[list(FEATURE_COLUMNS)]


def _with_verdicts(frame: pd.DataFrame, thresholds: dict) -> pd.DataFrame:
    """Add ``verdict``, ``leans`` and ``strength``, and sort by verdict (``VERDICTS`` order) then strength."""
    sharing = frame["paths"].to_numpy() > 0
    h2_low = np.where(np.isnan(frame["h2_low"]), frame["h2"], frame["h2_low"])
    h_low = np.where(np.isnan(frame["h_low"]), frame["h"], frame["h_low"])
    frame["verdict"], frame["leans"], frame["faint"] = _verdict(h2_low, h_low, frame["p_adjusted"], frame["effect"],
                                                                frame["dependence"], sharing, thresholds)
    frame["strength"] = np.where(sharing, frame["effect"], 0.0)
    rank = frame["verdict"].map({v: i for i, v in enumerate(VERDICTS)})
    return (frame.assign(_rank=rank)
            .sort_values(["_rank", "faint", "strength", "paths"], ascending=[True, False, False, False], kind="stable")
            .drop(columns="_rank").reset_index(drop=True)[list(PAIR_COLUMNS)])


def _sharing(frame: pd.DataFrame) -> tuple[np.ndarray, list[tuple[str, str]]]:
    sharing = frame["paths"].to_numpy() > 0
    return sharing, [tuple(k) for k in frame.loc[sharing, ["feature_a", "feature_b"]].to_numpy()]


def _with_intervals(frame: pd.DataFrame, graph: ForestGraph, rows: Any, *, resamples: int, confidence: float,
                    min_effect: float, rng: np.random.Generator, output: int | None,
                    progress: bool | None) -> pd.DataFrame:
    """Add ``h2_low``, ``h2_high``, ``h_low``, ``h_high`` for pairs sharing a path whose ``effect`` reaches
    ``min_effect`` (NaN elsewhere or without resamples): no interval makes the others interactions."""
    deciding = (frame["paths"].to_numpy() > 0) & (frame["effect"].to_numpy() >= min_effect)
    names = [tuple(k) for k in frame.loc[deciding, ["feature_a", "feature_b"]].to_numpy()]
    low, high = np.full((2, len(frame)), np.nan), np.full((2, len(frame)), np.nan)
    if resamples and names:
        point = np.vstack([frame.loc[deciding, "h2"].to_numpy(), frame.loc[deciding, "h"].to_numpy()])
        low[:, deciding], high[:, deciding] = _subsample_intervals(graph, rows, point, names, resamples=resamples,
                                                                   confidence=confidence, rng=rng, output=output,
                                                                   progress=progress)
    frame["h2_low"], frame["h2_high"], frame["h_low"], frame["h_high"] = low[0], high[0], low[1], high[1]
    return frame


def _with_noise_floor(frame: pd.DataFrame, recipe: Recipe | None, matrix: np.ndarray, target: np.ndarray | None,
                      rows: np.ndarray, *, feature_names: tuple[str, ...], refits: int, level: float, spread: float,
                      max_dependence: float, output: int | None, random_state: int, n_jobs: int,
                      progress: bool | None, shared: SharedFirstRound | None) -> tuple[pd.DataFrame, list[str], dict]:
    """Add ``null_h2``, ``null_h``, ``p_value``, ``p_adjusted`` (NaN without a target or refits), refit notes and facts."""
    sharing, names = _sharing(frame)
    family = frame.loc[sharing, "dependence"].fillna(0.0).to_numpy() < max_dependence
    columns = {name: np.full(len(frame), np.nan) for name in ("null_h2", "null_h", "p_value", "p_adjusted")}
    notes: list[str] = []
    facts: dict = {}
    if recipe is not None and target is not None and refits and names:
        found, notes, facts = floor_test(recipe, matrix, target, rows, names, frame.loc[sharing, "h"].to_numpy(),
                                         family, feature_names=feature_names, refits=refits, level=level, spread=spread,
                                         output=output, random_state=random_state, n_jobs=n_jobs, progress=progress,
                                         shared=shared)
        for name, values in found.items():
            columns[name][sharing] = values
    for name, values in columns.items():
        frame[name] = values
    return frame, notes, facts


def _with_dependence(frame: pd.DataFrame, graph: ForestGraph, matrix: np.ndarray, random_state: int) -> pd.DataFrame:
    """Add ``rank_correlation``, ``information_correlation`` and ``dependence`` (the larger in absolute value)."""
    index = {name: j for j, name in enumerate(graph.feature_names)}
    categorical = np.array([kind == "categorical" for kind in graph.feature_types])
    columns = [(index[a], index[b]) for a, b in zip(frame["feature_a"], frame["feature_b"], strict=True)]
    rank, info = pair_dependence(matrix, columns, categorical=categorical, random_state=random_state)
    frame["rank_correlation"], frame["information_correlation"] = rank, info
    frame["dependence"] = np.fmax(np.abs(rank), info)
    return frame


def _near_misses(frame: pd.DataFrame, thresholds: dict, shown: int = 5) -> list[str]:
    """A note naming the pairs of non-negligible size that beat their own refits but not the family-wise floor."""
    level = thresholds["level"]
    missed = frame[(frame["verdict"] == "co-split") & (frame["p_value"] <= level) & (frame["p_adjusted"] > level)
                   & (frame["effect"] >= thresholds["min_effect"])].sort_values("effect", ascending=False)
    if missed.empty:
        return []
    named = ", ".join(f"{a} × {b} (effect {e:.2f}, p_adjusted {p:.2f})" for a, b, e, p in
                      missed[["feature_a", "feature_b", "effect", "p_adjusted"]].head(shown).itertuples(index=False))
    more = f" and {len(missed) - shown} more" if len(missed) > shown else ""
    return [f"Near the floor: {named}{more} beat every refit of their own (p_value {level:g} or less) but not the "
            "largest over all pairs tested together, so they stay co-split at this level. With few rows many pairs "
            "raise the floor; a higher --level (API: level) calls them, at the cost of more chance calls."]


def _checked_thresholds(*, min_h2: Any, min_effect: Any, max_dependence: Any, level: Any, confidence: Any) -> dict:
    confidence = check_float("confidence", confidence, low=0.5, high=1.0)
    if confidence == 1.0:
        raise ParameterError("confidence must be a finite number in 0.5..1.0, below 1, got 1.0")
    return {"min_h2": check_float("min_h2", min_h2, low=0.0, high=1.0),
            "min_effect": check_float("min_effect", min_effect, low=0.0),
            "max_dependence": check_float("max_dependence", max_dependence, low=0.0, high=1.0),
            "level": check_float("level", level, low=0.0, high=0.5),
            "confidence": confidence}


# -------------------------------------------------------------------- set-up and one output
@dataclass(frozen=True)
class _Prepared:
    """What the triages of every output of one model on one data set share: checked options, the model, the
    refit recipe, the coded data, the sampled rows and the random state right after drawing them."""

    graph: ForestGraph
    thresholds: dict
    triples: bool
    include_absent: bool
    resamples: int
    null_refits: int
    has_floor: bool
    random_state: int
    n_jobs: int
    progress: bool | None
    recipe: Recipe | None
    target: np.ndarray | None
    matrix_all: np.ndarray
    chosen: np.ndarray
    rows: Any
    matrix: np.ndarray
    rng: np.random.Generator
    output: int | None


def _prepare(model: Any, X: Any, y: Any, *, triples: Any, sample: Any, resamples: Any, null_refits: Any, level: Any,
             confidence: Any, min_h2: Any, min_effect: Any, max_dependence: Any, params: Any, include_absent: Any,
             random_state: Any, n_jobs: Any, progress: Any, output: Any) -> _Prepared:
    """Check the options (``output`` too, unless None: every output), load the model once, build the refit recipe
    and draw the rows: everything but the per-output work."""
    graph = load_model(model)
    if output is not None:
        output = check_int("output", output, low=0, high=graph.n_outputs - 1)
    thresholds = _checked_thresholds(min_h2=min_h2, min_effect=min_effect, max_dependence=max_dependence,
                                     level=level, confidence=confidence)
    triples = check_bool("triples", triples)
    include_absent = check_bool("include_absent", include_absent)
    sample = check_int("sample", sample, low=2, allow_none=True)
    resamples = check_int("resamples", resamples, low=0, allow_none=True)
    null_refits = check_int("null_refits", null_refits, low=0)
    random_state = check_seed("random_state", random_state, allow_none=False)
    n_jobs = check_n_jobs(n_jobs)
    progress = check_progress(progress)
    if params is not None and not isinstance(params, dict):
        raise ParameterError(f"params must be a dict of training parameters or None, got {type(params).__name__}")

    X, target = _split_target(X, y, graph)
    has_floor = target is not None and null_refits > 0
    if has_floor:
        check_refit_level(null_refits, thresholds["level"])
    if resamples is None:
        resamples = 0 if has_floor else _RESAMPLES_WITHOUT_FLOOR
    recipe = _refit_recipe(graph, live_model_of(model), params) if target is not None and null_refits else None
    matrix_all = model_matrix(graph, X)
    if recipe is not None:
        target = checked_target(target, matrix_all.shape[0], recipe.task)
        recipe = calibrate_step(recipe, graph, matrix_all, target, seed=random_state)
    rng = np.random.default_rng(random_state)
    chosen = _sample_rows(matrix_all, sample, rng)
    return _Prepared(graph=graph, thresholds=thresholds, triples=triples, include_absent=include_absent,
                     resamples=resamples, null_refits=null_refits, has_floor=has_floor, random_state=random_state,
                     n_jobs=n_jobs, progress=progress, recipe=recipe, target=target, matrix_all=matrix_all,
                     chosen=chosen, rows=_take_rows(X, chosen), matrix=matrix_all[chosen], rng=rng, output=output)


def _walk(prepared: _Prepared, output: int) -> Any:
    """The structure walk of the trees of ``output`` (triples too when asked for)."""
    graph = prepared.graph
    return structure(graph, max_order=3 if prepared.triples else 2, output=output if graph.n_outputs > 1 else None)


def _sharing_pairs(walked: Any) -> list[tuple[str, str]]:
    """The pairs that share a path in a walk: those a triage of its output tests."""
    pairs = walked.pairs[walked.pairs["paths"] > 0]
    return list(zip(pairs["feature_a"], pairs["feature_b"], strict=True))


def _triage_output(prepared: _Prepared, output: int, started: float, shared: SharedFirstRound | None,
                   walked: Any = None) -> TriageResult:
    """The triage of one output (class) of a prepared model and data set (``walked``: its structure walk, if done)."""
    graph, thresholds, recipe, target = prepared.graph, prepared.thresholds, prepared.recipe, prepared.target
    triples, rows, matrix, progress = prepared.triples, prepared.rows, prepared.matrix, prepared.progress
    # Every output starts from the random state right after the row sample, as a triage of that output alone.
    rng = copy.deepcopy(prepared.rng)
    h_output = output if graph.n_outputs > 1 else None
    walked = _walk(prepared, output) if walked is None else walked
    used = walked.features["splits"].to_numpy() > 0
    used_names = [name for name, flag in zip(graph.feature_names, used, strict=True) if flag]
    hres = h_statistic(graph, rows, pairs=[tuple(k) for k in walked.pairs[["feature_a", "feature_b"]].to_numpy()] or None,
                       triples=triples or None, against_rest=True, sample=None, output=h_output, progress=progress)
    prediction_sd = _prediction_sd(graph, matrix, output)
    scale = prediction_sd if prediction_sd > 0 else 1.0

    frame = _pair_frame(walked, hres, used_names, prepared.include_absent)
    frame["effect"] = frame["h"] / scale
    frame = _with_intervals(frame, graph, rows, resamples=prepared.resamples, confidence=thresholds["confidence"],
                            min_effect=thresholds["min_effect"], rng=rng, output=h_output, progress=progress)
    frame = _with_dependence(frame, graph, matrix, prepared.random_state)
    frame, refit_notes, null_facts = _with_noise_floor(frame, recipe, prepared.matrix_all, target, matrix,
                                                       feature_names=graph.feature_names, refits=prepared.null_refits,
                                                       level=thresholds["level"], spread=scale,
                                                       max_dependence=thresholds["max_dependence"], output=h_output,
                                                       random_state=prepared.random_state, n_jobs=prepared.n_jobs,
                                                       progress=progress, shared=shared)
    frame = _with_verdicts(frame, thresholds)
    refit_notes = [*refit_notes, *_near_misses(frame, thresholds)]
    triple_frame = (_triple_frame(walked, hres, frame, scale, thresholds) if triples
                    else pd.DataFrame(columns=list(TRIPLE_COLUMNS)))

    facts = {
        "n_rows": int(len(prepared.chosen)),
        "n_rows_available": int(prepared.matrix_all.shape[0]),
        "resamples": prepared.resamples,
        "null_refits": prepared.null_refits if prepared.has_floor else 0,
        "has_target": target is not None,
        "prediction_sd": prediction_sd,
        "output": output,
        "class_analysed": class_analysed(graph, output),
        "scale": "margin",
        "seconds": time.perf_counter() - started,
        "refit_notes": refit_notes,
        "refit_recipe": None if recipe is None else recipe.to_dict(),
        "refit_recipe_text": "" if recipe is None else recipe.describe(),
        "refit_threads_per_fit": None if recipe is None else threads_per_fit(prepared.n_jobs),
        "null_rounds": null_facts.get("null_rounds"),
        "floor_rounds": null_facts.get("floor_rounds", 0),
        "kept_in_null": null_facts.get("kept_in_null", []),
        "refits_total": null_facts.get("refits_total", 0),
        "additive_rounds": null_facts.get("additive_rounds"),
        "additive_family": null_facts.get("additive_family"),
        "label_change_share": null_facts.get("label_change_share"),
        "null_separable": bool(null_facts.get("null_separable", False)),
    }
    return TriageResult(pairs=frame, triples=triple_frame, features=_feature_frame(walked, hres, graph.feature_names, used),
                        ensemble=graph, rules=_rules(thresholds, prepared.has_floor), thresholds=thresholds, facts=facts)


# -------------------------------------------------------------------- public
def triage(
    model: Any,
    X: Any,
    y: Any = None,
    *,
    triples: bool = False,
    sample: int | None = 1000,
    resamples: int | None = None,
    null_refits: int = 19,
    level: float = 0.05,
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
    """Give every feature pair a verdict: interaction, dependent, co-split or absent.

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
    resamples : int, optional
        Half-size row subsamples for the intervals of H² and ``h`` (0: none;
        the point values are used). Default 20 without a noise floor, 0 with
        one: the refits then give the evidence, and the intervals would only
        be shown. Intervals are computed for the pairs whose ``effect``
        reaches ``min_effect``: below it a pair is not an interaction
        whatever its interval.
    null_refits : int, default 19
        Refits on synthetic targets for the noise floor (used only with ``y``).
        The smallest p-value they can give is ``1 / (null_refits + 1)``, so at
        least ``1 / level - 1`` are needed (19 at the default 5%). Each refit
        trains the model once more on all rows of ``X`` as it was trained;
        when some pairs clear the floor by a wide margin, a second round of
        ``null_refits`` refits follows (Notes). The cost is about
        ``null_refits`` times the original training time per round, spread
        over ``n_jobs`` workers.
    level : float, default 0.05
        Family-wise level of the noise-floor test: for a model without any
        interaction, the chance that some pair clears the floor is at most
        ``level``, however many pairs there are (Notes).
    confidence : float, default 0.90
        Nominal coverage of the subsampling intervals.
    min_h2 : float, default 0.05
        Smallest lower end of H² counted as interaction when there is no noise
        floor (a convention of ours). With a floor H² is reported, not
        required: large main effects dilute it while ``h`` stays large.
    min_effect : float, default 0.05
        Smallest ``h / sd(prediction)`` counted as a non-negligible effect (a
        convention of ours: an interaction part under 5% of the prediction
        spread rarely matters in practice).
    max_dependence : float, default 0.7
        Dependence (|Spearman| or information correlation) from which a pair is
        ``dependent``; 0.7 as "strong correlation" is common practice.
    params : dict, optional
        Training parameters for the refits, overriding those read from the model
        (a saved XGBoost file stores few; see :func:`treeprobe.refit.training_recipe`).
    output : int, optional
        Output (class) of a multiclass model, 0-based; default the first output.
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

    Raises
    ------
    ParameterError
        An option outside what it accepts (the message names it).
    DataError
        Data that do not fit the model, or a target of the wrong length.

    Notes
    -----
    With a target and refits, ``p`` the pair's family-wise p-value of the
    noise-floor test (column ``p_adjusted``), ``effect = h / sd(F(x))`` and
    ``D`` the dependence::

        absent       if paths == 0
        dependent    if D >= max_dependence          (leans: what H alone says)
        interaction  if p <= level and effect >= min_effect
        co-split     otherwise; faint = (p <= level and effect < min_effect)

    Without a floor, with ``L2`` and ``Lh`` the lower ends of the intervals of
    H² and ``h`` (the point values when there are no resamples), the
    ``interaction`` line reads ``L2 > min_h2 and Lh > 0 and effect >=
    min_effect``. Triples follow that rule with ``L2 = H²`` and ``Lh = h``.
    ``result.rules`` states the rule in words with the thresholds used.

    The noise floor follows Friedman and Popescu ([1]_, section 8.3) and asks
    of each pair whether its ``h`` is larger than a model without that
    interaction would show. First round: an additive fit (one
    interaction-constraint group per feature, early-stopped) gives targets
    without any interaction; the model is refitted ``null_refits`` times, as
    it was trained (same rounds: an overfit model overfits its refits too),
    and ``h`` of every pair is computed on each refit on the same rows. The
    pairs that are not strongly dependent (``D < max_dependence``; known
    before any H) are tested together by :func:`treeprobe.floor.max_ratio_test` at
    family-wise level ``level``; dependent pairs get p-values against the
    same yardstick but are never found. A real interaction spills onto other
    pairs, near it and (in overfit models) far from it, and a null without
    any interaction cannot show that: in a first study the pairs without
    true interaction that cleared this round did so by 2-32%. So when some
    pairs clear it by a wide margin (``h`` at least 1.5 times their floor;
    our convention), every other pair is tested again, on a second round of
    refits to targets drawn from a null fitted with interaction constraints
    that allow exactly those pairs: the null then carries the model's clear
    interactions and their spill-over, and forbids the pair under test. The
    pairs kept in the null keep their first-round values; the others get
    their second-round ``p_value``, ``p_adjusted`` and floor ``null_h``. For
    a model without any interaction the second round runs only after a false
    first-round call, so the family-wise level holds.

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
    started = time.perf_counter()
    prepared = _prepare(model, X, y, triples=triples, sample=sample, resamples=resamples, null_refits=null_refits,
                        level=level, confidence=confidence, min_h2=min_h2, min_effect=min_effect,
                        max_dependence=max_dependence, params=params, include_absent=include_absent,
                        random_state=random_state, n_jobs=n_jobs, progress=progress,
                        output=0 if output is None else output)
    return _triage_output(prepared, prepared.output, started, shared=None)


def triage_classes(model: Any, X: Any, y: Any = None, **options: Any) -> list[TriageResult]:
    """Triage every output (class) of a model: :func:`triage` with ``output=k`` for each ``k``, sharing the work.

    Parameters
    ----------
    model, X, y
        As for :func:`triage`.
    **options
        Any keyword option of :func:`triage` but ``output`` (``sample``,
        ``null_refits``, ``level``, ``n_jobs``, ...), with its defaults.

    Returns
    -------
    list of TriageResult
        One per output, in output order; each equal to ``triage(model, X, y,
        output=k, ...)`` with the same options (its ``facts["seconds"]``
        aside; the floor's ``h`` values may differ in the last digit, as the
        refits score more pairs at once). A single-output model gives a list
        of one.

    Raises
    ------
    ParameterError
        As :func:`triage`, and for an option :func:`triage` does not take (or ``output``).
    DataError
        As :func:`triage`.

    Notes
    -----
    The model is loaded, the options and data checked, the refit recipe
    built and the rows drawn once. With a target, the first round of the
    noise floor (Notes of :func:`triage`) is the same for every class: the
    same additive fit, the same synthetic labels and the same refits of the
    multiclass model; only the pairs scored on each refit differ. It runs
    once here, scoring every class's pairs on every refit
    (:class:`treeprobe.floor.SharedFirstRound`), instead of once per class.
    Second rounds stay per class: each keeps that class's clear interactions
    in its null.
    """
    started = time.perf_counter()
    defaults = {name: parameter.default for name, parameter in inspect.signature(triage).parameters.items()
                if parameter.kind is inspect.Parameter.KEYWORD_ONLY and name != "output"}
    unknown = sorted(set(options) - set(defaults))
    if unknown:
        raise ParameterError(f"triage_classes takes the options of triage but output; got {', '.join(unknown)} "
                             f"(options: {', '.join(defaults)})")
    prepared = _prepare(model, X, y, **{**defaults, **options}, output=None)
    graph = prepared.graph
    walks = [_walk(prepared, k) for k in range(graph.n_outputs)]
    shared = (SharedFirstRound({k: _sharing_pairs(walked) for k, walked in enumerate(walks)})
              if prepared.has_floor and graph.n_outputs > 1 else None)
    results = []
    for k, walked in enumerate(walks):
        results.append(_triage_output(prepared, k, started, shared, walked))
        started = time.perf_counter()
    return results
