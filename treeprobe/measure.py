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
  ``F_S(z) = sum_L v_L prod_{j in S} C_Lj(z_j) w_L(S)``). Substituting it in
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
partial dependence is noise; read it beside ``h``. Values are estimates on the
sampled rows.

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
import sys
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy.sparse import csr_matrix

from .errors import DataError
from .graph import ForestGraph
from .output import to_jsonable
from .pdp import (
    CELL_BUDGET,
    FittedModel,
    PathTable,
    PreparedData,
    brute_partial_dependence,
    ensemble_predictor,
    failed_conditions,
    feature_index,
    leaf_value_column,
    model_output,
    parent_links,
    path_table,
    predictor_row_bytes,
    prepare_rows,
    resolve_model,
    sum_rows_by,
    tree_chunks,
)

__all__ = ["MeasureResult", "h_statistic", "LIMITS"]

LIMITS = (
    "H-statistics describe the fitted model, not the world: a model's interactions are not the data's, and "
    "structure is not causation. Partial dependence extrapolates when features are dependent, which can "
    "create or hide interactions. Read h2 (a ratio) beside h (its size in output units)."
)
# Callables have no tree structure to pick triples from; take them among the strongest pairs.
AUTO_TRIPLE_TOP_PAIRS = 10
_SCHEMA = "treeprobe.measure/2"


# --------------------------------------------------------------------------- result
@dataclass(frozen=True)
class MeasureResult:
    """H-statistics of one model on one set of rows.

    Attributes
    ----------
    pairs : DataFrame
        One row per feature pair (and output, column ``output``, for multi-output
        models), sorted by ``h2`` descending: ``feature_a``, ``feature_b``, ``h2``
        (eq. 44), ``h`` (root mean square of the interaction part, output units),
        ``pd_variance`` (variance of the centred ``F_jk`` over the rows),
        ``shares_path`` (the features meet on a root-to-leaf path; missing for callables).
    against_rest : DataFrame
        ``feature``, ``h2`` (eq. 45), ``h``, ``pd_variance`` (variance of ``F_j``).
    triples : DataFrame
        ``feature_a``, ``feature_b``, ``feature_c``, ``h2`` (eq. 46), ``h``,
        ``pd_variance`` (variance of ``F_jkl``), ``shares_path``.
    method : {"exact", "brute"}
    n_rows : int
        Rows the statistics were computed on (after sampling).
    scale : {"margin", "probability"}
    output : int or None
        The output analysed, or None for all outputs.
    seconds : float
        Wall time of the computation.
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
                "pairs": self.pairs,
                "against_rest": self.against_rest,
                "triples": self.triples,
            }
        )


# --------------------------------------------------------------------------- progress
class _Progress:
    """A one-line counter on stderr, shown only on a terminal."""

    def __init__(self, total: int, label: str, enabled: bool | None) -> None:
        self.total, self.label, self.done = total, label, 0
        self.enabled = sys.stderr.isatty() if enabled is None else bool(enabled)

    def advance(self, steps: int = 1) -> None:
        self.done += steps
        if self.enabled:
            sys.stderr.write(f"\r{self.label}: {self.done}/{self.total}")
            sys.stderr.flush()

    def close(self) -> None:
        if self.enabled:
            sys.stderr.write("\n")
            sys.stderr.flush()


def _run_tasks(function: Callable, tasks: list, n_jobs: int, progress: _Progress) -> list:
    from joblib import Parallel, delayed

    if n_jobs == 1:
        results = []
        for task in tasks:
            results.append(function(*task))
            progress.advance()
        return results
    results = []
    for result in Parallel(n_jobs=n_jobs, return_as="generator")(delayed(function)(*task) for task in tasks):
        results.append(result)
        progress.advance()
    return results


# --------------------------------------------------------------------------- structure
def _entry_combos(table: PathTable, order: int) -> tuple[np.ndarray, ...]:
    """All sets of ``order`` entries of one leaf, as index arrays in feature order."""
    counts = np.diff(np.r_[table.leaf_entry_start, table.n_entries])
    size = counts[table.entry_leaf]
    position = np.arange(table.n_entries) - table.leaf_entry_start[table.entry_leaf]
    largest = int(counts.max(initial=0))
    parts: list[tuple[np.ndarray, ...]] = []
    for offsets in itertools.combinations(range(1, largest), order - 1):
        first = np.flatnonzero(position + offsets[-1] < size)
        parts.append((first,) + tuple(first + d for d in offsets))
    if not parts:
        return tuple(np.zeros(0, dtype=np.int64) for _ in range(order))
    return tuple(np.concatenate([p[i] for p in parts]) for i in range(order))


def _combo_keys(table: PathTable, combos: tuple[np.ndarray, ...], n_features: int) -> np.ndarray:
    key = np.zeros(combos[0].shape, dtype=np.int64)
    for member in combos:
        key = key * n_features + table.entry_feature[member]
    return key


def _lookup(keys: np.ndarray, known: np.ndarray) -> np.ndarray:
    """Position of each key in the sorted array ``known``, -1 when absent."""
    if not known.size:
        return np.full(keys.shape, -1, dtype=np.int64)
    position = np.minimum(np.searchsorted(known, keys), known.size - 1)
    return np.where(known[position] == keys, position, -1)


def _shared_path_keys(ens: ForestGraph, trees: np.ndarray, order: int) -> np.ndarray:
    """Sorted keys of the feature sets of size ``order`` that meet on some root-to-leaf path."""
    links = parent_links(ens)
    node_value = np.zeros(ens.n_nodes)
    found = [np.zeros(0, dtype=np.int64)]
    for chunk in tree_chunks(ens, trees, 1):
        table = path_table(ens, chunk, node_value, links)
        found.append(np.unique(_combo_keys(table, _entry_combos(table, order), ens.n_features)))
    return np.unique(np.concatenate(found))


def _decode(key: int, order: int, n_features: int) -> tuple[int, ...]:
    members = []
    for _ in range(order):
        key, member = divmod(int(key), n_features)
        members.append(member)
    return tuple(reversed(members))


# --------------------------------------------------------------------------- exact sums
def _exact_sums(
    ens: ForestGraph,
    matrix: np.ndarray,
    trees: np.ndarray,
    output: int,
    pair_keys: np.ndarray,
    triple_keys: np.ndarray,
    want_against_rest: bool,
) -> dict[str, np.ndarray]:
    """Leaf-wise sums of one group of trees (see the module docstring); all are additive over trees.

    Returns, one row per function and one column per data row: ``main`` (p, n),
    the uncentred ``F_j``; ``pair`` (n_pairs, n) and ``triple`` (n_triples, n), the
    interaction parts; ``prediction`` (n,) and ``rest`` (p, n), ``F`` and
    ``F - F_notj``; all up to constants.
    """
    n_rows, n_features = matrix.shape[0], ens.n_features
    _, node_value = leaf_value_column(ens, output)
    links = parent_links(ens)
    sums = {
        "main": np.zeros((n_features, n_rows)),
        "pair": np.zeros((pair_keys.size, n_rows)),
        "triple": np.zeros((triple_keys.size, n_rows)),
        "prediction": np.zeros(n_rows),
        "rest": np.zeros((n_features, n_rows)),
    }
    block = max(1, CELL_BUDGET // max(n_rows, 1))
    for chunk in tree_chunks(ens, trees, n_rows):
        table = path_table(ens, chunk, node_value, links)
        if not table.n_leaves:
            continue
        fail, n_failed = failed_conditions(ens, table, matrix)
        entry_value = table.leaf_value[table.entry_leaf]
        reach_apart = (n_failed[table.entry_leaf] - fail) == 0
        share_one = reach_apart.mean(axis=1)
        passed = (~fail).astype(np.float64)
        sums["main"] += _grouping(table.entry_feature, entry_value * share_one, n_features) @ passed
        if want_against_rest:
            sums["prediction"] += table.leaf_value @ (n_failed == 0)
            centred_pass = reach_apart * (passed - passed.mean(axis=1, keepdims=True))
            sums["rest"] += _grouping(table.entry_feature, entry_value, n_features) @ centred_pass
            del centred_pass
        del reach_apart
        if pair_keys.size:
            _add_pair_terms(table, fail, n_failed, passed, share_one, pair_keys, n_features, block, sums["pair"])
        if triple_keys.size:
            combos = _entry_combos(table, 3)
            target = _lookup(_combo_keys(table, combos, n_features), triple_keys)
            wanted = np.flatnonzero(target >= 0)
            for start in range(0, wanted.size, block):
                pick = wanted[start:start + block]
                term = _interaction_term(table, fail, n_failed, share_one, [c[pick] for c in combos])
                sum_rows_by(term, target[pick], sums["triple"])
    return sums


def _grouping(group: np.ndarray, weight: np.ndarray, n_groups: int) -> csr_matrix:
    """Sparse (n_groups, n_members) matrix: ``matrix @ values`` sums weighted rows by group."""
    return csr_matrix((weight, (group, np.arange(group.size))), shape=(n_groups, group.size))


def _double_failure_share(
    table: PathTable, fail: np.ndarray, n_failed: np.ndarray, first: np.ndarray, second: np.ndarray
) -> np.ndarray:
    """Share of rows failing exactly the two entries ``first`` and ``second`` of their leaf, and nothing else.

    Such rows are few, so they are counted from the sparse set of (entry, row)
    failures on leaves failed twice, grouped by (row, leaf).
    """
    entries, rows = np.nonzero(fail & (n_failed[table.entry_leaf] == 2))
    order = np.lexsort((entries, rows * table.n_leaves + table.entry_leaf[entries]))
    entries = entries[order]
    n_entries = table.n_entries
    keys, counts = np.unique(entries[0::2] * n_entries + entries[1::2], return_counts=True)
    position = _lookup(first * n_entries + second, keys)
    return np.where(position >= 0, counts[np.maximum(position, 0)], 0) / fail.shape[1]


def _add_pair_terms(
    table: PathTable,
    fail: np.ndarray,
    n_failed: np.ndarray,
    passed: np.ndarray,
    share_one: np.ndarray,
    pair_keys: np.ndarray,
    n_features: int,
    block: int,
    into: np.ndarray,
) -> None:
    """Add ``v_L [C_a C_b w_L(ab) - C_a w_L(a) - C_b w_L(b)]`` of every leaf into its pair's row.

    ``w_L(ab) = w_L(a) + w_L(b) - w_L(none) + share failing exactly a and b``
    (rows whose failures lie inside {a, b}). The linear terms are one sparse
    product; only the product ``C_a C_b`` needs a pass per leaf and pair.
    """
    first, second = _entry_combos(table, 2)
    target = _lookup(_combo_keys(table, (first, second), n_features), pair_keys)
    order = np.flatnonzero(target >= 0)
    order = order[np.argsort(target[order], kind="stable")]
    first, second, target = first[order], second[order], target[order]
    if not target.size:
        return
    leaf = table.entry_leaf[first]
    value = table.leaf_value[leaf]
    share_none = (n_failed == 0).mean(axis=1)[leaf]
    share_two = share_one[first] + share_one[second] - share_none + _double_failure_share(
        table, fail, n_failed, first, second)
    linear = csr_matrix(
        (-np.r_[value * share_one[first], value * share_one[second]], (np.r_[target, target], np.r_[first, second])),
        shape=(pair_keys.size, table.n_entries),
    )
    into += linear @ passed
    weight = (value * share_two)[:, None]
    for start in range(0, target.size, block):
        stop = min(start + block, target.size)
        both = ~(fail[first[start:stop]] | fail[second[start:stop]])
        piece_target = target[start:stop]
        starts = np.flatnonzero(np.r_[True, piece_target[1:] != piece_target[:-1]])
        into[piece_target[starts]] += np.add.reduceat(both * weight[start:stop], starts, axis=0)


def _interaction_term(
    table: PathTable, fail: np.ndarray, n_failed: np.ndarray, share_one: np.ndarray, members: list[np.ndarray]
) -> np.ndarray:
    """Inclusion-exclusion over the subsets of each combo's features, one row per combo.

    For members ``M`` of one leaf ``L``: ``v_L * sum_{T subset of M, T nonempty}
    (-1)^{|M|-|T|} prod_{j in T} C_Lj(x_j) w_L(T)``. The empty set gives a
    constant, which centring removes.
    """
    leaf = table.entry_leaf[members[0]]
    leaf_failed = n_failed[leaf]
    member_fail = [fail[m] for m in members]
    term = np.zeros(leaf_failed.shape)
    order = len(members)
    for size in range(1, order + 1):
        sign = 1.0 if (order - size) % 2 == 0 else -1.0
        for subset in itertools.combinations(range(order), size):
            if size == 1:
                share = share_one[members[subset[0]]]
            else:
                outside = leaf_failed.copy()
                for s in subset:
                    outside -= member_fail[s]
                share = (outside == 0).mean(axis=1)
            inside = ~member_fail[subset[0]]
            for s in subset[1:]:
                inside = inside & ~member_fail[s]
            term += inside * (sign * share)[:, None]
    return term * table.leaf_value[leaf][:, None]


# --------------------------------------------------------------------------- statistics
def _centre(values: np.ndarray) -> np.ndarray:
    return values - values.mean(axis=0)


def _ratio(numerator: np.ndarray, total: np.ndarray) -> tuple[float, float, float]:
    """``(h2, h, variance of total)`` for centred vectors; h2 is NaN when the total is zero."""
    top, bottom = float(np.sum(numerator**2)), float(np.sum(total**2))
    h2 = top / bottom if bottom > 0 else float("nan")
    return h2, float(np.sqrt(top / numerator.size)), bottom / numerator.size


@dataclass
class _Functions:
    """Centred numerators and totals of every requested statistic, for one output."""

    pair: dict[tuple[int, int], tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    against_rest: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = field(default_factory=dict)
    triple: dict[tuple[int, int, int], tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)


def _exact_functions(
    ens: ForestGraph,
    matrix: np.ndarray,
    output: int,
    pairs: list[tuple[int, int]],
    triples: list[tuple[int, int, int]],
    against_rest: list[int],
    n_jobs: int,
    progress: bool | None,
) -> _Functions:
    p = ens.n_features
    needed_pairs = set(pairs) | {sub for t in triples for sub in itertools.combinations(t, 2)}
    pair_keys = np.array(sorted(a * p + b for a, b in needed_pairs), dtype=np.int64)
    triple_keys = np.array(sorted((a * p + b) * p + c for a, b, c in triples), dtype=np.int64)
    trees = ens.trees_of_output(output)
    chunks = tree_chunks(ens, trees, matrix.shape[0])
    bar = _Progress(len(chunks), f"H-statistics (exact, output {output})", progress)
    tasks = [(ens, matrix, chunk, output, pair_keys, triple_keys, bool(against_rest)) for chunk in chunks]
    total: dict[str, np.ndarray] | None = None
    for part in _run_tasks(_exact_sums, tasks, n_jobs, bar):
        total = part if total is None else {k: total[k] + part[k] for k in total}
    bar.close()
    main = _centre(total["main"].T)
    pair_part = _centre(total["pair"].T)
    index = {key: i for i, key in enumerate(pair_keys.tolist())}
    functions = _Functions()
    for a, b in pairs:
        numerator = pair_part[:, index[a * p + b]]
        functions.pair[(a, b)] = (numerator, main[:, a] + main[:, b] + numerator)
    triple_part = _centre(total["triple"].T)
    for i, (a, b, c) in enumerate(sorted(triples, key=lambda t: (t[0] * p + t[1]) * p + t[2])):
        numerator = triple_part[:, i]
        full = main[:, a] + main[:, b] + main[:, c] + numerator
        for x, y in ((a, b), (a, c), (b, c)):
            full = full + pair_part[:, index[x * p + y]]
        functions.triple[(a, b, c)] = (numerator, full)
    prediction = _centre(total["prediction"])
    rest = _centre(total["rest"].T)
    for j in against_rest:
        functions.against_rest[j] = (rest[:, j] - main[:, j], prediction, main[:, j])
    return functions


def _brute_functions(
    predict: Callable,
    data: PreparedData,
    output: int | None,
    pairs: list[tuple[int, int]],
    triples: list[tuple[int, int, int]],
    against_rest: list[int],
    n_jobs: int,
    progress: bool | None,
    row_bytes: int,
) -> list[_Functions]:
    """Brute-force partial dependence of every needed set, then the statistics' parts per output."""
    n_features = data.matrix.shape[1]
    singles = sorted({j for s in list(pairs) + list(triples) for j in s} | set(against_rest))
    sets: list[tuple[int, ...]] = [(j,) for j in singles]
    sets += sorted(set(pairs) | {sub for t in triples for sub in itertools.combinations(t, 2)})
    sets += list(triples)
    sets += [tuple(k for k in range(n_features) if k != j) for j in against_rest]
    # Predicting the rows themselves first checks the model's output shape on the user's own data.
    prediction = model_output(predict(data.frame if data.frame is not None else data.matrix), data.n_rows, output)
    bar = _Progress(len(sets), "H-statistics (brute)", progress)
    tasks = [(predict, data, data, list(s), output, row_bytes) for s in sets]
    values = _run_tasks(brute_partial_dependence, tasks, n_jobs, bar)
    bar.close()
    pd_of = {s: v for s, v in zip(sets, values, strict=True)}
    n_outputs = 1 if prediction.ndim == 1 else prediction.shape[1]
    result = []
    for k in range(n_outputs):
        def column(v: np.ndarray, k: int = k) -> np.ndarray:
            return _centre(v if v.ndim == 1 else v[:, k])

        functions = _Functions()
        for a, b in pairs:
            full = column(pd_of[(a, b)])
            functions.pair[(a, b)] = (full - column(pd_of[(a,)]) - column(pd_of[(b,)]), full)
        for t in triples:
            full = column(pd_of[t])
            numerator = full.copy()
            for sub in itertools.combinations(t, 2):
                numerator -= column(pd_of[sub])
            for j in t:
                numerator += column(pd_of[(j,)])
            functions.triple[t] = (numerator, full)
        centred_prediction = column(prediction)
        for j in against_rest:
            rest = column(pd_of[tuple(i for i in range(n_features) if i != j)])
            main = column(pd_of[(j,)])
            functions.against_rest[j] = (centred_prediction - main - rest, centred_prediction, main)
        result.append(functions)
    return result


def _tables(
    functions: _Functions, names: Sequence[str], output: int | None, shared: Callable[[tuple[int, ...]], Any]
) -> tuple[list[dict], list[dict], list[dict]]:
    pair_rows, rest_rows, triple_rows = [], [], []
    extra = {} if output is None else {"output": output}
    for (a, b), (numerator, full) in functions.pair.items():
        h2, h, variance = _ratio(numerator, full)
        pair_rows.append({"feature_a": names[a], "feature_b": names[b], **extra, "h2": h2, "h": h,
                          "pd_variance": variance, "shares_path": shared((a, b))})
    for j, (numerator, total, main) in functions.against_rest.items():
        h2, h, _ = _ratio(numerator, total)
        rest_rows.append({"feature": names[j], **extra, "h2": h2, "h": h, "pd_variance": float(np.mean(main**2))})
    for (a, b, c), (numerator, full) in functions.triple.items():
        h2, h, variance = _ratio(numerator, full)
        triple_rows.append({"feature_a": names[a], "feature_b": names[b], "feature_c": names[c], **extra,
                            "h2": h2, "h": h, "pd_variance": variance, "shares_path": shared((a, b, c))})
    return pair_rows, rest_rows, triple_rows


def _frame(rows: list[dict], columns: list[str], multi: bool) -> pd.DataFrame:
    frame = pd.DataFrame(rows, columns=columns)
    if "shares_path" in frame:
        frame["shares_path"] = frame["shares_path"].astype("boolean")
    by = (["output"] if multi else []) + ["h2"]
    ascending = [True] * multi + [False]
    return frame.sort_values(by, ascending=ascending, na_position="last", kind="stable").reset_index(drop=True)


# --------------------------------------------------------------------------- parameters
def _check_options(method, sample, random_state, scale, n_jobs, progress, against_rest) -> None:
    if method not in ("auto", "exact", "brute"):
        raise DataError(f"method must be 'auto', 'exact' or 'brute', got {method!r}")
    if sample is not None and (isinstance(sample, bool) or not isinstance(sample, (int, np.integer)) or sample < 2):
        raise DataError(f"sample must be None or an integer of at least 2, got {sample!r}")
    if random_state is not None and (isinstance(random_state, bool) or not isinstance(random_state, (int, np.integer))):
        raise DataError(f"random_state must be an integer or None, got {random_state!r}")
    if scale not in ("margin", "probability"):
        raise DataError(f"scale must be 'margin' or 'probability', got {scale!r}")
    if isinstance(n_jobs, bool) or not isinstance(n_jobs, (int, np.integer)) or n_jobs == 0:
        raise DataError(f"n_jobs must be a non-zero integer (-1 for all cores), got {n_jobs!r}")
    if progress is not None and not isinstance(progress, bool):
        raise DataError(f"progress must be None (on a terminal only), True or False, got {progress!r}")
    if not isinstance(against_rest, bool):
        raise DataError(f"against_rest must be True or False, got {against_rest!r}")


def _feature_sets(spec: Any, order: int, names: Sequence[str], parameter: str) -> list[tuple[int, ...]]:
    try:
        items = list(spec)
    except TypeError:
        raise DataError(f"{parameter} must be a list of feature {order}-tuples, got {spec!r}") from None
    out = []
    for item in items:
        if isinstance(item, str) or not hasattr(item, "__len__") or len(item) != order:
            raise DataError(f"{parameter}: each entry must name {order} features, got {item!r}")
        members = tuple(sorted(feature_index(names, f, parameter=parameter) for f in item))
        if len(set(members)) != order:
            raise DataError(f"{parameter}: entry {item!r} repeats a feature")
        out.append(members)
    return sorted(set(out))


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
            "H-statistic involving them is 0 (or undefined)", UserWarning, stacklevel=3,
        )


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
        Output (class) of a multi-output model; None scores every output and adds
        an ``output`` column.
    scale : {"margin", "probability"}, default "margin"
        Raw margin (log-odds for classifiers, as in [1]_) or the link's scale
        (probabilities; brute force through ``ForestGraph.predict``).
    n_jobs : int, default 1
        Parallel jobs (joblib) over partial dependence functions (brute) or tree
        chunks (exact); -1 uses every core.
    progress : bool or None, default None
        Progress line on stderr; None shows it only when stderr is a terminal.

    Returns
    -------
    MeasureResult
        Tables ``pairs``, ``against_rest`` and ``triples`` and the facts of the run.

    Raises
    ------
    DataError
        Columns that do not match the model, fewer than 2 rows, an all-missing
        column, an unknown feature in ``pairs``/``triples``, a predictor that
        returns the wrong shape, or an invalid option. A constant column only
        warns (its statistics are 0 or undefined).

    Notes
    -----
    With centred partial dependence functions ``F`` evaluated at the rows::

        H2_jk = sum_i [F_jk - F_j - F_k]^2 / sum_i F_jk^2,   h_jk = sqrt(mean_i [F_jk - F_j - F_k]^2)

    and likewise eqs. 45 and 46 of [1]_ (module docstring). ``h`` is the
    unnormalised statistic advocated by [2]_; H2 is NaN when the denominator is 0.

    Memory: the exact path keeps ``8 * n_rows * (n_pairs + n_triples + 2 * n_features)``
    bytes of per-row sums plus a working set of a few times ``CELL_BUDGET`` cells per
    tree chunk; the brute path holds about 256 MB of modified rows per batch.

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
    fitted: FittedModel = resolve_model(model)
    if not fitted.is_tree and method == "exact":
        raise DataError("method='exact' needs a tree ensemble; a callable model needs method='brute' or 'auto'")
    if method == "exact" and scale != "margin":
        raise DataError("method='exact' computes margin-scale statistics; use scale='margin' or method='brute'")
    data = prepare_rows(fitted, X, min_rows=2)
    data = _sample_rows(data, sample, random_state)
    _warn_constant(data)
    names = data.names
    ens = fitted.ensemble
    use_exact = fitted.is_tree and method != "brute" and scale == "margin"
    if ens is not None:
        if output is not None and (isinstance(output, bool) or not isinstance(output, (int, np.integer))
                                   or not 0 <= output < ens.n_outputs):
            raise DataError(f"output must be None or an integer in 0..{ens.n_outputs - 1}, got {output!r}")
        outputs = [output] if output is not None else list(range(ens.n_outputs))
        n_features = ens.n_features
    else:
        if output is not None and (isinstance(output, bool) or not isinstance(output, (int, np.integer)) or output < 0):
            raise DataError(f"output must be None or a non-negative integer, got {output!r}")
        n_features = len(names)
    shared_keys: dict[int, np.ndarray] = {}
    if ens is not None:
        model_trees = np.concatenate([ens.trees_of_output(k) for k in outputs])
        for order in (2, 3):
            shared_keys[order] = _shared_path_keys(ens, np.unique(model_trees), order)

    if pairs is None:
        if ens is not None:
            pair_list = [_decode(k, 2, n_features) for k in shared_keys[2]]
        else:
            pair_list = list(itertools.combinations(range(n_features), 2))
    else:
        pair_list = _feature_sets(pairs, 2, names, "pairs")
    if triples in (None, False):
        triple_list: list[tuple[int, ...]] = []
        auto_triples = False
    elif isinstance(triples, str) and triples != "auto":
        raise DataError(f"triples must be None, False, True, 'auto' or a list of 3-tuples, got {triples!r}")
    elif triples is True or isinstance(triples, str):
        auto_triples = ens is None
        triple_list = [_decode(k, 3, n_features) for k in shared_keys[3]] if ens is not None else []
    else:
        auto_triples = False
        triple_list = _feature_sets(triples, 3, names, "triples")
    if against_rest:
        rest_list = sorted(set(np.unique(ens.feature[ens.feature >= 0]).tolist())) if ens is not None else list(
            range(n_features))
    else:
        rest_list = []

    def shares_path(members: tuple[int, ...]) -> Any:
        if ens is None:
            return pd.NA
        key = 0
        for m in members:
            key = key * n_features + m
        return bool(_lookup(np.array([key]), shared_keys[len(members)])[0] >= 0)

    per_output: list[tuple[int | None, _Functions]] = []
    if use_exact:
        for k in outputs:
            functions = _exact_functions(ens, data.matrix, k, pair_list, triple_list, rest_list, n_jobs, progress)
            per_output.append((k, functions))
    else:
        predict = ensemble_predictor(ens, scale) if ens is not None else fitted.predict
        row_bytes = predictor_row_bytes(ens, data.matrix.shape[1])
        results = _brute_functions(predict, data, output, pair_list, triple_list, rest_list, n_jobs, progress,
                                   row_bytes)
        if auto_triples:
            results = _add_auto_triples(predict, data, output, results, n_jobs, progress, row_bytes)
        labels = [output] if len(results) == 1 and output is not None else list(range(len(results)))
        per_output = list(zip(labels, results, strict=True))
    multi = len(per_output) > 1
    rows: tuple[list, list, list] = ([], [], [])
    for k, functions in per_output:
        for bucket, new in zip(rows, _tables(functions, names, k if multi else None, shares_path), strict=True):
            bucket.extend(new)
    lead = ["output"] if multi else []
    pair_frame = _frame(rows[0], ["feature_a", "feature_b", *lead, "h2", "h", "pd_variance", "shares_path"], multi)
    rest_frame = _frame(rows[1], ["feature", *lead, "h2", "h", "pd_variance"], multi)
    triple_frame = _frame(
        rows[2], ["feature_a", "feature_b", "feature_c", *lead, "h2", "h", "pd_variance", "shares_path"], multi
    )
    return MeasureResult(
        pairs=pair_frame,
        against_rest=rest_frame,
        triples=triple_frame,
        method="exact" if use_exact else "brute",
        n_rows=data.n_rows,
        scale=scale,
        output=output,
        seconds=time.perf_counter() - started,
    )


def _add_auto_triples(
    predict: Callable, data: PreparedData, output: int | None, results: list[_Functions], n_jobs: int,
    progress: bool | None, row_bytes: int,
) -> list[_Functions]:
    """Score the triples whose three pairs all rank among the strongest pairs (callables, ``triples="auto"``)."""
    strength: dict[tuple[int, int], float] = {}
    for functions in results:
        for pair, (numerator, full) in functions.pair.items():
            h2 = _ratio(numerator, full)[0]
            strength[pair] = max(strength.get(pair, 0.0), 0.0 if np.isnan(h2) else h2)
    top = set(sorted(strength, key=strength.get, reverse=True)[:AUTO_TRIPLE_TOP_PAIRS])
    features = sorted({j for pair in top for j in pair})
    triple_list = [t for t in itertools.combinations(features, 3) if all(s in top for s in itertools.combinations(t, 2))]
    if not triple_list:
        return results
    extra = _brute_functions(predict, data, output, [], triple_list, [], n_jobs, progress, row_bytes)
    for functions, more in zip(results, extra, strict=True):
        functions.triple.update(more.triple)
    return results
