"""Friedman and Popescu's H-statistics: how much of a model's variation is interaction.

For features ``j`` and ``k`` the model's two-way partial dependence ``F_jk``
would equal ``F_j + F_k`` if the model were additive in them. The H-statistic
measures the share of the variance of ``F_jk`` that this sum leaves unexplained,
on the data points themselves [1]_ (section 8). All partial dependence
functions are centred to mean zero over the rows::

    H2_jk  = sum_i [F_jk(x_i) - F_j(x_i) - F_k(x_i)]^2 / sum_i F_jk(x_i)^2          (eq. 44)
    H2_j   = sum_i [F(x_i) - F_j(x_i) - F_notj(x_i)]^2 / sum_i F(x_i)^2             (eq. 45)
    H2_jkl = sum_i [F_jkl - F_jk - F_jl - F_kl + F_j + F_k + F_l]^2 / sum_i F_jkl^2  (eq. 46)

Because a ratio hides the size of what it divides, every statistic also comes
with ``h``, the root mean square of its numerator, in the model's output units
(raw margin by default) [3]_.

Two ways to get the partial dependence functions:

* brute force, for any predictor: ``n`` predictions per point and set, so
  ``n^2`` per function (batched to bound memory, parallel over functions);
* exact, for tree ensembles (:mod:`treeprobe.pdp` derives the leaf-wise form
  ``F_S(z) = sum_L v_L prod_{j in S} C_Lj(z_j) w_L(S)`` and owns the engine,
  :func:`treeprobe.pdp.exact_parts`; this module turns its per-row parts into
  statistics). Substituting it in
  eq. 44, a leaf whose path splits on ``j`` but not on ``k`` contributes the
  same term to ``F_jk`` and to ``F_j`` (its share ``w_L({j, k}) = w_L({j})``) and
  a constant to ``F_k``, so only leaves whose paths split on both features
  survive in the numerator::

      F_jk - F_j - F_k = sum_{L splits on j and k} v_L [C_Lj C_Lk w_L(jk) - C_Lj w_L(j) - C_Lk w_L(k)] + const

  Pairs that share no path have ``H = 0`` exactly and cost nothing. Inclusion
  and exclusion gives the analogue for triples (leaves splitting on all three).
  For eq. 45, ``F(z) - F_notj(z) = sum_{L splits on j} v_L [z reaches L apart from j]
  (C_Lj(z_j) - share of rows meeting C_Lj)``, the tree walk that branches both
  ways at splits on ``j`` written leaf by leaf. The exact path reproduces brute
  force on the common graph to rounding (float64 throughout).

Limits
------
Partial dependence moves one feature while holding the others at observed
values; when features are dependent this evaluates the model off the data and
H-statistics may report interactions the model never uses on real rows.
H-statistics describe the model, not the world: a model's interactions are not
the data's, and neither is causation. H2 is a ratio: a large H2 on a tiny
partial dependence is noise; read it beside ``h`` (tables rank by ``h``, and
``h_negligible`` flags an ``h`` of at most 1% of the predictions' spread).
Values are estimates on the sampled rows.

References
----------
.. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 2008, section 8.
.. [2] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", Annals of Statistics 29(5), 2001.
.. [3] A. Inglis, A. Parnell and C. B. Hurley, "Visualizing variable importance
   and variable interaction effects in machine learning models", Journal of
   Computational and Graphical Statistics 31(3), 2022 (the unnormalised statistic).
"""

from __future__ import annotations

import itertools
import time
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .checks import check_bool, check_choice, check_int, check_n_jobs, check_progress, check_seed
from .errors import ParameterError
from .output import to_jsonable
from .paths import decode_sets, encode_sets, sets_on_paths
from .pdp import (
    METHODS,
    SCALES,
    FittedModel,
    PreparedData,
    SubsetLayout,
    brute_parts,
    check_output,
    choose_exact,
    exact_parts,
    exact_subset_parts,
    feature_index,
    prepare_rows,
    resolve_model,
)

__all__ = ["MeasureResult", "h_statistic", "LIMITS", "NEGLIGIBLE_H_SHARE"]

LIMITS = (
    "H-statistics describe the fitted model, not the world: a model's interactions are not the data's, and "
    "structure is not causation. Partial dependence extrapolates when features are dependent, which can "
    "create or hide interactions. Read h2 (a ratio) beside h (its size in output units)."
)
# Callables have no tree structure to pick triples from; take them among the strongest pairs.
AUTO_TRIPLE_TOP_PAIRS = 10
# Convention (ours): an interaction whose root-mean-square size h is at most 1% of the
# standard deviation of the predictions moves them by a hundredth of their typical spread.
NEGLIGIBLE_H_SHARE = 0.01
_SCHEMA = "treeprobe.measure/3"
_PAIR_COLUMNS = ["feature_a", "feature_b", "output", "h2", "h", "pd_variance", "h_negligible", "shares_path"]
_REST_COLUMNS = ["feature", "output", "h2", "h", "pd_variance", "h_negligible"]
_TRIPLE_COLUMNS = ["feature_a", "feature_b", "feature_c", "output", "h2", "h", "pd_variance", "h_negligible",
                   "shares_path"]
_FACTS = ("method", "n_rows", "scale", "output", "limits")


# --------------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class MeasureResult:
    """H-statistics of one model on one set of rows.

    Every table has the same columns whatever the options (an empty table
    keeps them), and is ranked by ``h`` descending (within ``output``):
    the interaction's size in output units, so that a large ratio ``h2`` on a
    tiny partial dependence does not come first.

    Attributes
    ----------
    pairs : DataFrame
        One row per (feature pair, output): ``feature_a``, ``feature_b``,
        ``output`` (the output analysed; 0 for single-output models), ``h2``
        (eq. 44), ``h`` (root mean square of the interaction part, output
        units), ``pd_variance`` (variance of the centred ``F_jk`` over the rows),
        ``h_negligible`` (``h <= NEGLIGIBLE_H_SHARE * sd``, ``sd`` the standard
        deviation of the model's output on the rows, same scale: a convention,
        see ``NEGLIGIBLE_H_SHARE``), ``shares_path`` (the features meet on a
        root-to-leaf path; missing for callables).
    against_rest : DataFrame
        ``feature``, ``output``, ``h2`` (eq. 45), ``h``, ``pd_variance``
        (variance of ``F_j``), ``h_negligible``.
    triples : DataFrame
        ``feature_a``, ``feature_b``, ``feature_c``, ``output``, ``h2`` (eq. 46),
        ``h``, ``pd_variance`` (variance of ``F_jkl``), ``h_negligible``, ``shares_path``.
    method : {"exact", "brute"}
    n_rows : int
        Rows the statistics were computed on (after sampling).
    scale : {"margin", "probability"}
    output : int or None
        The output analysed, or None for all outputs.
    seconds : float
        Wall time of the computation (not compared by ``==``).
    """

    pairs: pd.DataFrame
    against_rest: pd.DataFrame
    triples: pd.DataFrame
    method: str
    n_rows: int
    scale: str
    output: int | None
    seconds: float
    limits: str = field(default=LIMITS)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, MeasureResult):
            return NotImplemented
        return all(getattr(self, name) == getattr(other, name) for name in _FACTS) and all(
            getattr(self, name).equals(getattr(other, name)) for name in ("pairs", "against_rest", "triples"))

    __hash__ = None  # type: ignore[assignment]

    def to_dict(self) -> dict:
        """JSON-ready dictionary: schema, the facts, the limits and each table as a list of records (NaN becomes None)."""
        return to_jsonable(
            {
                "schema": _SCHEMA,
                "method": self.method,
                "n_rows": int(self.n_rows),
                "scale": self.scale,
                "output": self.output,
                "seconds": float(self.seconds),
                "limits": self.limits,
                "negligible_h_share": NEGLIGIBLE_H_SHARE,
                "pairs": self.pairs,
                "against_rest": self.against_rest,
                "triples": self.triples,
            }
        )


# --------------------------------------------------------------------------- statistics
def _centre(values: np.ndarray) -> np.ndarray:
    return values - values.mean(axis=0)


def _ratio(numerator: np.ndarray, total: np.ndarray) -> tuple[float, float, float]:
    """``(h2, h, variance of total)`` for centred vectors; h2 is NaN when the total is zero."""
    top, bottom = float(np.sum(numerator**2)), float(np.sum(total**2))
    h2 = top / bottom if bottom > 0 else float("nan")
    return h2, float(np.sqrt(top / numerator.size)), bottom / numerator.size


@dataclass
class _Plan:
    """The statistics one call computes, as feature-index tuples, and the sets meeting on a path."""

    pairs: list[tuple[int, ...]]
    triples: list[tuple[int, ...]]
    against_rest: list[int]
    auto_triples: bool
    on_paths: dict[int, np.ndarray] | None


@dataclass
class _Parts:
    """Centred numerators and totals of every requested statistic, and the prediction spread, for one output."""

    output: int
    prediction_sd: float
    pair: dict[tuple[int, ...], tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    against_rest: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = field(default_factory=dict)
    triple: dict[tuple[int, ...], tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)


def _sub_pairs(plan: _Plan) -> list[tuple[int, ...]]:
    """The pairs asked for and the pairs inside the triples asked for (eq. 46 needs them), sorted."""
    return sorted(set(plan.pairs) | {sub for t in plan.triples for sub in itertools.combinations(t, 2)})


def _exact_output(fitted: FittedModel, data: PreparedData, output: int, plan: _Plan, n_jobs: int,
                  progress: bool | None) -> _Parts:
    """Numerators and totals of one output from the exact engine (:func:`treeprobe.pdp.exact_parts`)."""
    needed = _sub_pairs(plan)
    raw = exact_parts(fitted.ensemble, data.matrix, output, needed, plan.triples,
                      against_rest=bool(plan.against_rest), n_jobs=n_jobs, progress=progress)
    main, pair_part, triple_part = _centre(raw.main), _centre(raw.pair), _centre(raw.triple)
    column = {pair: i for i, pair in enumerate(needed)}
    prediction = _centre(raw.prediction)
    parts = _Parts(output, float(np.std(prediction)))
    for a, b in plan.pairs:
        numerator = pair_part[:, column[(a, b)]]
        parts.pair[(a, b)] = (numerator, main[:, a] + main[:, b] + numerator)
    for i, triple in enumerate(plan.triples):
        numerator = triple_part[:, i]
        full = numerator + main[:, list(triple)].sum(axis=1)
        for sub in itertools.combinations(triple, 2):
            full = full + pair_part[:, column[sub]]
        parts.triple[triple] = (numerator, full)
    rest = _centre(raw.rest)
    for j in plan.against_rest:
        parts.against_rest[j] = (rest[:, j] - main[:, j], prediction, main[:, j])
    return parts


def _brute_outputs(fitted: FittedModel, data: PreparedData, output: int | None, plan: _Plan, scale: str,
                   n_jobs: int, progress: bool | None) -> list[_Parts]:
    """Numerators and totals of every output from brute-force partial dependence of every needed set."""
    n_features = data.matrix.shape[1]
    singles = sorted({j for s in plan.pairs + plan.triples for j in s} | set(plan.against_rest))
    complements = [tuple(k for k in range(n_features) if k != j) for j in plan.against_rest]
    sets = [(j,) for j in singles] + _sub_pairs(plan) + list(plan.triples) + complements
    prediction, values = brute_parts(fitted, data, sets, output, scale=scale, n_jobs=n_jobs, progress=progress)
    pd_of = dict(zip(sets, values, strict=True))
    n_outputs = 1 if prediction.ndim == 1 else prediction.shape[1]
    result = []
    for k in range(n_outputs):
        def column(v: np.ndarray, k: int = k) -> np.ndarray:
            return _centre(v if v.ndim == 1 else v[:, k])

        centred_prediction = column(prediction)
        parts = _Parts(output if n_outputs == 1 and output is not None else k, float(np.std(centred_prediction)))
        for a, b in plan.pairs:
            full = column(pd_of[(a, b)])
            parts.pair[(a, b)] = (full - column(pd_of[(a,)]) - column(pd_of[(b,)]), full)
        for t in plan.triples:
            full = column(pd_of[t])
            numerator = full - sum(column(pd_of[sub]) for sub in itertools.combinations(t, 2))
            numerator = numerator + sum(column(pd_of[(j,)]) for j in t)
            parts.triple[t] = (numerator, full)
        for j, complement in zip(plan.against_rest, complements, strict=True):
            main = column(pd_of[(j,)])
            parts.against_rest[j] = (centred_prediction - main - column(pd_of[complement]), centred_prediction, main)
        result.append(parts)
    return result


def _auto_triples(fitted: FittedModel, data: PreparedData, output: int | None, results: list[_Parts], plan: _Plan,
                  scale: str, n_jobs: int, progress: bool | None) -> list[_Parts]:
    """Score the triples whose three pairs all rank among the strongest pairs (callables, ``triples="auto"``)."""
    strength: dict[tuple[int, ...], float] = {}
    for parts in results:
        for pair, (numerator, full) in parts.pair.items():
            h2 = _ratio(numerator, full)[0]
            strength[pair] = max(strength.get(pair, 0.0), 0.0 if np.isnan(h2) else h2)
    top = set(sorted(strength, key=strength.get, reverse=True)[:AUTO_TRIPLE_TOP_PAIRS])
    features = sorted({j for pair in top for j in pair})
    chosen = [t for t in itertools.combinations(features, 3) if all(s in top for s in itertools.combinations(t, 2))]
    if not chosen:
        return results
    extra = _brute_outputs(fitted, data, output, _Plan([], chosen, [], False, None), scale, n_jobs, progress)
    for parts, more in zip(results, extra, strict=True):
        parts.triple.update(more.triple)
    return results


# --------------------------------------------------------------------------- tables
def _rows_of(parts: _Parts, names: Sequence[str], on_paths: dict[int, np.ndarray] | None) -> tuple[list, list, list]:
    """Table rows of one output: h2, h, pd_variance, h_negligible (and shares_path) per statistic."""
    cut = NEGLIGIBLE_H_SHARE * parts.prediction_sd

    def on_path(sets: Any, size: int) -> dict[tuple[int, ...], Any]:
        if on_paths is None or not len(sets):
            return dict.fromkeys(sets, pd.NA)
        found = np.isin(encode_sets(np.array(list(sets)).reshape(-1, size), len(names)), on_paths[size])
        return {members: bool(flag) for members, flag in zip(sets, found, strict=True)}

    shared = {**on_path(parts.pair, 2), **on_path(parts.triple, 3)}

    def row(members: tuple[int, ...], numerator: np.ndarray, full: np.ndarray, columns: Sequence[str]) -> dict:
        h2, h, variance = _ratio(numerator, full)
        return {**{c: names[m] for c, m in zip(columns, members, strict=True)}, "output": parts.output, "h2": h2,
                "h": h, "pd_variance": variance, "h_negligible": h <= cut, "shares_path": shared[members]}

    pairs = [row(m, *v, ("feature_a", "feature_b")) for m, v in parts.pair.items()]
    triples = [row(m, *v, ("feature_a", "feature_b", "feature_c")) for m, v in parts.triple.items()]
    rest = []
    for j, (numerator, total, main) in parts.against_rest.items():
        h2, h, _ = _ratio(numerator, total)
        rest.append({"feature": names[j], "output": parts.output, "h2": h2, "h": h,
                     "pd_variance": float(np.mean(main**2)), "h_negligible": h <= cut})
    return pairs, rest, triples


def _frame(rows: list[dict], columns: list[str]) -> pd.DataFrame:
    """One ranked table: fixed columns and dtypes, by output, then ``h`` descending (NaN last)."""
    frame = pd.DataFrame(rows, columns=columns)
    names = {column: "str" for column in columns if column.startswith("feature")}
    frame = frame.astype({**names, "output": np.int64, "h2": np.float64, "h": np.float64, "pd_variance": np.float64,
                          "h_negligible": bool})
    if "shares_path" in frame:
        frame["shares_path"] = frame["shares_path"].astype("boolean")
    frame = frame.sort_values(["output", "h"], ascending=[True, False], na_position="last", kind="stable")
    return frame.reset_index(drop=True)


def _tables(per_output: list[_Parts], names: Sequence[str], plan: _Plan) -> dict[str, pd.DataFrame]:
    rows: tuple[list, list, list] = ([], [], [])
    for parts in per_output:
        for bucket, new in zip(rows, _rows_of(parts, names, plan.on_paths), strict=True):
            bucket.extend(new)
    return {"pairs": _frame(rows[0], _PAIR_COLUMNS), "against_rest": _frame(rows[1], _REST_COLUMNS),
            "triples": _frame(rows[2], _TRIPLE_COLUMNS)}


# --------------------------------------------------------------------------- parameters
def _check_options(method, sample, random_state, scale, n_jobs, progress, against_rest) -> None:
    check_choice("method", method, METHODS)
    check_int("sample", sample, low=2, allow_none=True)
    check_seed("random_state", random_state)
    check_choice("scale", scale, SCALES)
    check_n_jobs(n_jobs)
    check_progress(progress)
    check_bool("against_rest", against_rest)


def _feature_sets(spec: Any, order: int, names: Sequence[str], parameter: str) -> list[tuple[int, ...]]:
    try:
        items = list(spec)
    except TypeError:
        raise ParameterError(f"{parameter} must be a list of feature {order}-tuples, got {spec!r}") from None
    out = []
    for item in items:
        if isinstance(item, str) or not hasattr(item, "__len__") or len(item) != order:
            raise ParameterError(f"{parameter}: each entry must name {order} features, got {item!r}")
        members = tuple(sorted(feature_index(names, f, parameter=parameter) for f in item))
        if len(set(members)) != order:
            raise ParameterError(f"{parameter}: entry {item!r} repeats a feature")
        out.append(members)
    return sorted(set(out))


def _outputs(fitted: FittedModel, output: Any) -> list[int] | None:
    """Outputs the exact engine walks (every one when ``output`` is None); None for a callable."""
    if not fitted.is_tree:
        check_int("output", output, low=0, allow_none=True)
        return None
    if output is None:
        return list(range(fitted.ensemble.n_outputs))
    return [check_output(fitted.ensemble, output)]


def _plan(fitted: FittedModel, names: Sequence[str], outputs: list[int] | None, pairs: Any, triples: Any,
          against_rest: bool) -> _Plan:
    """Which pairs, triples and features against the rest to score (defaults from the tree paths)."""
    ens, n_features = fitted.ensemble, len(names)
    on_paths = None
    if ens is not None:
        trees = np.unique(np.concatenate([ens.trees_of_output(k) for k in outputs]))
        # Triples on paths are found only when triples are asked for: the walk costs as much as the pairs'.
        on_paths = {order: sets_on_paths(ens, order, trees) for order in ((2, 3) if triples not in (None, False)
                                                                          else (2,))}
    if pairs is None:
        pair_list = ([tuple(m) for m in decode_sets(on_paths[2], n_features, 2).tolist()] if ens is not None
                     else list(itertools.combinations(range(n_features), 2)))
    else:
        pair_list = _feature_sets(pairs, 2, names, "pairs")
    auto_triples = False
    if triples in (None, False):
        triple_list: list[tuple[int, ...]] = []
    elif isinstance(triples, str) and triples != "auto":
        raise ParameterError(f"triples must be None, False, True, 'auto' or a list of 3-tuples, got {triples!r}")
    elif triples is True or isinstance(triples, str):
        auto_triples = ens is None
        triple_list = [tuple(m) for m in decode_sets(on_paths[3], n_features, 3).tolist()] if ens is not None else []
    else:
        triple_list = _feature_sets(triples, 3, names, "triples")
    rest_list: list[int] = []
    if against_rest:
        rest_list = np.unique(ens.feature[ens.feature >= 0]).tolist() if ens is not None else list(range(n_features))
    return _Plan(pair_list, triple_list, rest_list, auto_triples, on_paths)


# --------------------------------------------------------------------------- rows
def _sample_rows(data: PreparedData, sample: int | None, random_state: int | None) -> PreparedData:
    if sample is None or sample >= data.n_rows:
        return data
    rows = np.sort(np.random.default_rng(random_state).choice(data.n_rows, size=sample, replace=False))
    return data.take(rows)


def _warn_constant(data: PreparedData) -> None:
    matrix = data.matrix
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        spread = np.nanmax(matrix, axis=0) - np.nanmin(matrix, axis=0)
    some_missing = np.isnan(matrix).any(axis=0)
    constant = np.flatnonzero((spread == 0) & ~some_missing)
    if constant.size:
        shown = ", ".join(repr(data.names[j]) for j in constant[:10])
        warnings.warn(
            f"constant column(s) {shown} in the rows used: their partial dependence is flat and every "
            "H-statistic involving them is 0 (or undefined)", UserWarning, stacklevel=4,
        )


def _rows(fitted: FittedModel, X: Any, sample: int | None, random_state: int | None) -> PreparedData:
    """The checked rows, sampled; warns about constant columns."""
    data = _sample_rows(prepare_rows(fitted, X, min_rows=2), sample, random_state)
    _warn_constant(data)
    return data


# --------------------------------------------------------------------------- row subsets
def _centred_in(values: np.ndarray, layout: SubsetLayout) -> np.ndarray:
    """``values`` (..., n_entries) centred over the entries of each subset (:class:`treeprobe.pdp.SubsetLayout`), in place."""
    values -= (np.add.reduceat(values, layout.start, axis=-1) / layout.size)[..., layout.subset]
    return values


def _squares_in(values: np.ndarray, layout: SubsetLayout) -> np.ndarray:
    """(..., k): sum of squares of ``values`` (..., n_entries) over the entries of each subset."""
    return np.add.reduceat(values * values, layout.start, axis=-1)


def subset_pair_h(
    ensemble: Any,
    X: Any,
    pairs: Sequence[Sequence[Any]],
    subsets: np.ndarray,
    *,
    output: int | None = None,
    progress: bool | None = None,
) -> np.ndarray:
    """H² and h (eq. 44) of ``pairs`` on many row subsets of ``X`` from one exact pass, shape (k, 2, n_pairs).

    Row ``i`` of ``X`` is in subset ``b`` when ``subsets[b, i]``; each subset is
    both the background and the evaluation rows, so entry ``[b, :, m]`` equals
    ``h2`` and ``h`` of ``pairs[m]`` from ``h_statistic(ensemble, X[subsets[b]],
    pairs=pairs, against_rest=False, sample=None, output=output)`` (to
    rounding), without one engine pass per subset
    (:func:`treeprobe.pdp.exact_subset_parts`). ``output`` None means output 0
    (single-output models). Pairs name features by name or position. For the
    resampling intervals of :func:`treeprobe.triage`; checks ``X`` against the model.
    """
    fitted = resolve_model(ensemble)
    if not fitted.is_tree:
        raise ParameterError("subset H-statistics need a tree ensemble")
    data = prepare_rows(fitted, X, min_rows=2)
    subsets = np.asarray(subsets, dtype=bool)
    if subsets.ndim != 2 or subsets.shape[1] != data.n_rows or np.any(subsets.sum(axis=1) < 2):
        raise ParameterError(f"subsets must be a boolean (k, {data.n_rows}) matrix with at least 2 rows in every "
                             f"subset, got shape {subsets.shape}")
    output_index = 0 if output is None else check_output(fitted.ensemble, output)
    wanted = [tuple(sorted(feature_index(data.names, f, parameter="pairs") for f in pair)) for pair in pairs]
    out = np.zeros((subsets.shape[0], 2, len(wanted)))
    if not wanted:
        return out
    parts = exact_subset_parts(fitted.ensemble, data.matrix, output_index, wanted, subsets, progress=progress)
    layout, members = parts.layout, parts.members
    main = _centred_in(parts.main, layout)
    position = {tuple(pair): m for m, pair in enumerate(members.tolist())}
    column = np.array([position[pair] for pair in wanted])
    statistics = np.zeros((2, members.shape[0], subsets.shape[0]))
    for chosen, numerator in parts.blocks:
        numerator = _centred_in(numerator, layout)
        top = _squares_in(numerator, layout)
        numerator += main[members[chosen, 0]]
        numerator += main[members[chosen, 1]]
        bottom = _squares_in(numerator, layout)
        with np.errstate(divide="ignore", invalid="ignore"):
            statistics[0, chosen] = np.where(bottom > 0, top / bottom, np.nan)
        statistics[1, chosen] = np.sqrt(top / layout.size)
    return statistics[:, column].transpose(2, 0, 1)


# --------------------------------------------------------------------------- public
def h_statistic(
    model: Any,
    X: Any,
    *,
    pairs: Sequence[Sequence[Any]] | None = None,
    triples: Any = None,
    against_rest: bool = True,
    method: str = "auto",
    sample: int | None = 1000,
    random_state: int | None = 0,
    output: int | None = None,
    scale: str = "margin",
    n_jobs: int = 1,
    progress: bool | None = None,
) -> MeasureResult:
    """Friedman and Popescu's H-statistics of a fitted model on data.

    Parameters
    ----------
    model : ForestGraph, model object, model file or callable
        A :class:`~treeprobe.graph.ForestGraph`, anything
        :func:`treeprobe.load_model` reads (loaded here), or any function
        ``predict(X) -> array`` (then ``method`` must be "brute" or "auto").
    X : ndarray or DataFrame of shape (n_rows, n_features)
        The rows both averaged over and evaluated at. For a tree ensemble the
        columns are matched by :meth:`ForestGraph.check_X` (categorical dtypes
        become codes); a callable receives DataFrames (dtypes kept) when ``X`` is
        one, arrays otherwise. Array columns of a callable are named ``x0``, ``x1``, ...
    pairs : list of (feature, feature), optional
        Pairs to score (names or column positions). Default: for a tree ensemble
        every pair that meets on some root-to-leaf path, for a callable every pair.
    triples : None, False, True, "auto" or list of 3-tuples, default None
        Three-way statistics. "auto" (or True): for a tree ensemble every triple
        of features that meet on one root-to-leaf path; for a callable, the
        triples whose three pairs are all among the ``AUTO_TRIPLE_TOP_PAIRS`` (10)
        pairs with the largest ``h2``.
    against_rest : bool, default True
        Also score each feature against all others (eq. 45): the features the
        model splits on (tree ensembles) or every column (callables).
    method : {"auto", "exact", "brute"}, default "auto"
        "exact" uses the tree structure (tree ensembles on the margin scale);
        "brute" predicts ``n`` modified rows per point and set; "auto" picks
        "exact" when it applies.
    sample : int or None, default 1000
        Rows drawn without replacement (with ``random_state``) from ``X``; None
        uses every row. Brute force costs ``sample**2`` predictions per function.
    random_state : int or None, default 0
        Seed of the row sample.
    output : int, optional
        Output (class) of a multi-output model; None scores every output. The
        ``output`` column is there either way.
    scale : {"margin", "probability"}, default "margin"
        Raw margin (log-odds for classifiers, as in [1]_) or the link's scale
        (probabilities; brute force through ``ForestGraph.predict``). Refused
        for a model whose link is the identity (regression) or whose margin
        already is a probability: there both scales agree and ``"margin"``
        gets the exact engine.
    n_jobs : int, default 1
        Parallel jobs (joblib) over partial dependence functions (brute) or tree
        chunks (exact); -1 uses every core.
    progress : bool or None, default None
        Progress bar on stderr (:func:`treeprobe.progress.progress_bar`); None
        shows it only when stderr is a terminal.

    Returns
    -------
    MeasureResult
        Tables ``pairs``, ``against_rest`` and ``triples`` (fixed columns, see
        :class:`MeasureResult`), each ranked by ``h`` descending within
        ``output``, and the facts of the run. ``h_negligible`` marks rows with
        ``h <= NEGLIGIBLE_H_SHARE * sd(prediction)`` (1%, our convention): such
        an interaction moves predictions by a hundredth of their spread, whatever
        its ``h2``.

    Raises
    ------
    ParameterError
        An invalid option, an unknown or repeated feature in ``pairs`` /
        ``triples``, ``method="exact"`` for a callable or on the probability
        scale, ``scale="probability"`` on an identity link.
    DataError
        Columns that do not match the model, fewer than 2 rows, an all-missing
        column, or a predictor that returns the wrong shape. A constant column
        only warns (its statistics are 0 or undefined).

    Notes
    -----
    With centred partial dependence functions ``F`` evaluated at the rows::

        H2_jk = sum_i [F_jk - F_j - F_k]^2 / sum_i F_jk^2,   h_jk = sqrt(mean_i [F_jk - F_j - F_k]^2)

    and likewise eqs. 45 and 46 of [1]_ (module docstring). ``h`` is the
    unnormalised statistic advocated by [2]_; H2 is NaN when the denominator is 0.

    Memory: the exact path keeps ``8 * n_rows * (n_pairs + n_triples + 2 * n_features)``
    bytes of per-row sums, about 40 bytes per (leaf, pair of its path features), and a
    working set of a few times ``CELL_BUDGET`` bits per tree chunk; the brute path holds
    about 256 MB of modified rows per batch and, when its estimated duration exceeds a
    minute, warns with the estimate before it starts.

    H-statistics extrapolate when features are dependent, describe the model
    rather than the world, and say nothing about causation (see ``LIMITS``).

    To run the brute path on a Dask cluster, use joblib's Dask backend (needs
    ``treeprobe[dask]``)::

        from dask.distributed import Client
        import joblib
        client = Client("scheduler-address:8786")
        with joblib.parallel_backend("dask"):
            result = h_statistic(model, X, n_jobs=-1)

    References
    ----------
    .. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
       ensembles", Annals of Applied Statistics 2(3), 2008, section 8.
    .. [2] A. Inglis, A. Parnell and C. B. Hurley, "Visualizing variable
       importance and variable interaction effects in machine learning models",
       JCGS 31(3), 2022.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> X = rng.uniform(-1, 1, size=(200, 2))
    >>> result = h_statistic(lambda A: A[:, 0] * A[:, 1], X, against_rest=False)
    >>> bool(abs(result.pairs["h2"][0] - 1.0) < 0.1)  # x0 * x1 is pure interaction: H2 = 1 up to sampling
    True
    """
    started = time.perf_counter()
    _check_options(method, sample, random_state, scale, n_jobs, progress, against_rest)
    fitted = resolve_model(model)
    use_exact = choose_exact(fitted, method, scale)
    outputs = _outputs(fitted, output)
    data = _rows(fitted, X, sample, random_state)
    plan = _plan(fitted, data.names, outputs, pairs, triples, against_rest)
    if use_exact:
        per_output = [_exact_output(fitted, data, k, plan, n_jobs, progress) for k in outputs]
    else:
        per_output = _brute_outputs(fitted, data, output, plan, scale, n_jobs, progress)
        if plan.auto_triples:
            per_output = _auto_triples(fitted, data, output, per_output, plan, scale, n_jobs, progress)
    return MeasureResult(
        **_tables(per_output, data.names, plan),
        method="exact" if use_exact else "brute",
        n_rows=data.n_rows,
        scale=scale,
        output=output,
        seconds=time.perf_counter() - started,
    )
