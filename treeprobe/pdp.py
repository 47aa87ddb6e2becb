"""Partial dependence: brute force for any predictor, exact and fast for tree ensembles.

The partial dependence of a model ``f`` on a feature set ``S`` (Friedman 2001,
eq. 9, in its empirical form) averages the model over background rows with the
features in ``S`` held at ``z``::

    F_S(z) = (1/n) sum_i f(z_S, x_{i, not S})

The brute-force estimate evaluates ``f`` on ``n`` modified copies of the
background per point ``z``. For a tree ensemble the same number follows from the
tree structure alone, which is what makes exact H-statistics cheap
(:mod:`treeprobe.measure`).

Exact partial dependence of a tree (our derivation from the definitions)
------------------------------------------------------------------------
A tree is a sum over its leaves ``L`` of ``v_L * 1[x in R_L]``. The region
``R_L`` is the set of rows that take the path's direction at every ancestor
split of ``L``; grouping the ancestors by split feature, it is a product of
per-feature conditions, ``1[x in R_L] = prod_j C_Lj(x_j)`` where ``C_Lj(x_j)``
says that ``x_j`` goes the path's way at every ancestor split on ``j`` (missing
values, ``zero_as_missing`` and category lists included, because ``C_Lj`` is
evaluated with the ensemble's own routing rule). Features not split on along
the path have ``C_Lj = 1``. By linearity::

    F_S(z) = sum_L v_L * prod_{j in S} C_Lj(z_j) * w_L(S)
    w_L(S) = (1/n) #{i : row i satisfies C_Lk for every k outside S}

Call ``fail(i, L)`` the set of path features whose condition row ``i`` fails.
Then ``w_L(S)`` is the share of background rows with ``fail(i, L)`` a subset of
``S``, i.e. with ``|fail(i, L)| - |fail(i, L) & S| == 0``. One pass that records
``fail`` for every row and every (leaf, path feature) gives every ``w_L(S)``.
The engine below computes, per chunk of trees, the boolean matrix ``fail`` of
shape (rows, path entries), one column per (leaf, distinct path feature), and the
per-leaf failure counts; everything else is sums over those columns.

This module owns both engines. :func:`partial_dependence` is the public entry
point; :mod:`treeprobe.measure` calls only :func:`exact_parts` (per-row pieces
of every ``F_j``, ``F_jk - F_j - F_k``, the triple terms, ``F`` and
``F - F_notj`` for H-statistics, from the tree structure) and
:func:`brute_parts` (``F_S`` by averaging predictions), besides the row
preparation helpers. Paths and parents come from :mod:`treeprobe.paths`.

References
----------
.. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", Annals of Statistics 29(5), 2001, section 8.2, eq. 9.
.. [2] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 2008, section 8.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from scipy.sparse import csr_matrix

from .checks import check_choice, check_int
from .data import model_matrix, numeric_array
from .errors import DataError, ParameterError
from .graph import ForestGraph
from .io import load_model
from .paths import encode_sets, leaf_steps, parent_links, tree_nodes
from .progress import progress_bar

__all__ = ["partial_dependence"]

# Cells (rows x columns) of one working matrix: bounds the memory of every chunk.
CELL_BUDGET = 2**23
# Bytes of modified rows one brute-force batch may hold.
BRUTE_BATCH_BYTES = 256 * 1024**2


# --------------------------------------------------------------------------- models
@dataclass(frozen=True)
class FittedModel:
    """A model resolved for partial dependence: a tree ensemble or a prediction callable."""

    ensemble: ForestGraph | None
    predict: Callable[[Any], Any] | None

    @property
    def is_tree(self) -> bool:
        return self.ensemble is not None


def resolve_model(model: Any) -> FittedModel:
    """Turn the user's ``model`` argument into a :class:`FittedModel`.

    A :class:`ForestGraph` is used as is; a plain callable (a function, not a
    model object with a ``predict`` method) is a predictor; anything else goes
    through :func:`treeprobe.load_model`.
    """
    if isinstance(model, ForestGraph):
        return FittedModel(model, None)
    if callable(model) and not hasattr(model, "predict"):
        return FittedModel(None, model)
    return FittedModel(load_model(model), None)


# --------------------------------------------------------------------------- data
@dataclass(frozen=True)
class PreparedData:
    """Rows ready for partial dependence.

    ``matrix`` is the float64 feature matrix in the model's column order (tree
    ensembles; for a callable it is the numeric view used for checks), ``frame``
    the DataFrame handed to a callable (None for arrays), ``names`` the column names.
    """

    matrix: np.ndarray
    frame: pd.DataFrame | None
    names: tuple[str, ...]

    @property
    def n_rows(self) -> int:
        return int(self.matrix.shape[0])

    def take(self, rows: np.ndarray) -> PreparedData:
        frame = None if self.frame is None else self.frame.iloc[rows].reset_index(drop=True)
        return PreparedData(self.matrix[rows], frame, self.names)


def _numeric_view(frame: pd.DataFrame) -> np.ndarray:
    out = np.empty(frame.shape, dtype=np.float64)
    for j, col in enumerate(frame.columns):
        series = frame[col]
        if isinstance(series.dtype, pd.CategoricalDtype):
            codes = series.cat.codes.to_numpy().astype(np.float64)
            codes[codes < 0] = np.nan
            out[:, j] = codes
        else:
            out[:, j] = pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    return out


def prepare_rows(fitted: FittedModel, X: Any, *, min_rows: int = 1) -> PreparedData:
    """Validate ``X`` against the model and return it as :class:`PreparedData`.

    Raises
    ------
    DataError
        Columns that do not match the model, fewer than ``min_rows`` rows, or a
        column that is missing (NaN) in every row.
    """
    if fitted.is_tree:
        ens = fitted.ensemble
        matrix = model_matrix(ens, X)
        names = ens.feature_names
        frame = None
    elif isinstance(X, pd.DataFrame):
        frame = X.reset_index(drop=True)
        names = tuple(str(c) for c in frame.columns)
        if len(set(names)) != len(names):
            raise DataError(f"data has duplicate column names: {sorted(n for n in set(names) if names.count(n) > 1)}")
        matrix = _numeric_view(frame)
    else:
        matrix = numeric_array(X)
        names = tuple(f"x{j}" for j in range(matrix.shape[1]))
        frame = None
    if matrix.shape[0] < min_rows:
        raise DataError(f"data has {matrix.shape[0]} rows; at least {min_rows} are needed")
    # A callable may take non-numeric columns, so a frame's own missing-value test decides.
    all_missing = frame.isna().all(axis=0).to_numpy() if frame is not None else np.isnan(matrix).all(axis=0)
    if matrix.shape[0] and all_missing.any():
        raise DataError(f"column {names[int(np.flatnonzero(all_missing)[0])]!r} is missing (NaN) in every row")
    return PreparedData(matrix, frame, tuple(names))


def feature_index(names: Sequence[str], feature: Any, *, parameter: str) -> int:
    """Position of ``feature`` (a name, or an integer position) among ``names``."""
    if isinstance(feature, (int, np.integer)) and not isinstance(feature, bool):
        if not 0 <= feature < len(names):
            raise ParameterError(f"{parameter}: feature position {feature} is outside 0..{len(names) - 1}")
        return int(feature)
    name = str(feature)
    if name not in names:
        shown = ", ".join(names[:8]) + (" ..." if len(names) > 8 else "")
        raise ParameterError(f"{parameter}: unknown feature {name!r}; the model's features are {shown}")
    return names.index(name)


# --------------------------------------------------------------------------- outputs
def leaf_value_column(ens: ForestGraph, output: int) -> tuple[np.ndarray, np.ndarray]:
    """Trees adding to raw output ``output`` and, per node, its weighted value for that output."""
    trees = ens.trees_of_output(output)
    column = np.where(ens.output_of_tree[ens.tree] == -1, output, 0) if ens.value.shape[1] > 1 else np.zeros(
        ens.n_nodes, dtype=np.int64
    )
    weighted = ens.value[np.arange(ens.n_nodes), column] * ens.tree_weight[ens.tree]
    return trees, weighted


# --------------------------------------------------------------------------- path tables
@dataclass(frozen=True)
class PathTable:
    """Root-to-leaf paths of a chunk of trees, grouped by (leaf, split feature).

    An *entry* is one distinct feature on one leaf's path; its *steps* are the
    ancestor splits of the leaf on that feature with the direction the path takes.
    Entries are sorted by leaf, then feature; steps by entry.
    """

    leaf_value: np.ndarray        # (n_leaves,) weighted leaf value for the chosen output
    used_nodes: np.ndarray        # (n_used,) internal nodes on the paths
    step_node: np.ndarray         # (n_steps,) position of the step's node in used_nodes
    step_left: np.ndarray         # (n_steps,) whether the path goes left there
    entry_step_start: np.ndarray  # (n_entries,)
    entry_leaf: np.ndarray        # (n_entries,) local leaf index
    entry_feature: np.ndarray     # (n_entries,)
    leaf_entry_start: np.ndarray  # (n_leaves,)
    constant: float               # summed value of single-leaf trees

    @property
    def n_leaves(self) -> int:
        return int(self.leaf_value.shape[0])

    @property
    def n_entries(self) -> int:
        return int(self.entry_leaf.shape[0])


def path_table(
    ens: ForestGraph, trees: np.ndarray, node_value: np.ndarray, links: tuple[np.ndarray, np.ndarray]
) -> PathTable:
    """Build the :class:`PathTable` of ``trees`` (global tree indices)."""
    parent, is_left = links
    nodes = tree_nodes(ens, trees)
    leaf_nodes = nodes[ens.feature[nodes] < 0]
    single = leaf_nodes[parent[leaf_nodes] < 0]
    leaves = leaf_nodes[parent[leaf_nodes] >= 0]
    if not leaves.size:
        empty = np.zeros(0, dtype=np.int64)
        return PathTable(np.zeros(0), empty, empty, np.zeros(0, bool), empty, empty, empty, empty,
                         float(node_value[single].sum()))
    leaf_of_step, node_of_step, left_of_step = leaf_steps(parent, is_left, leaves)
    feature_of_step = ens.feature[node_of_step].astype(np.int64)
    order = np.lexsort((node_of_step, feature_of_step, leaf_of_step))
    leaf_of_step, node_of_step = leaf_of_step[order], node_of_step[order]
    left_of_step, feature_of_step = left_of_step[order], feature_of_step[order]
    key = leaf_of_step * ens.n_features + feature_of_step
    entry_step_start = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    entry_leaf = leaf_of_step[entry_step_start]
    used_nodes, node_position = np.unique(node_of_step, return_inverse=True)
    return PathTable(
        leaf_value=node_value[leaves],
        used_nodes=used_nodes,
        step_node=node_position.ravel(),
        step_left=left_of_step,
        entry_step_start=entry_step_start,
        entry_leaf=entry_leaf,
        entry_feature=feature_of_step[entry_step_start],
        leaf_entry_start=np.flatnonzero(np.r_[True, entry_leaf[1:] != entry_leaf[:-1]]),
        constant=float(node_value[single].sum()),
    )


def tree_chunks(ens: ForestGraph, trees: np.ndarray, n_rows: int) -> list[np.ndarray]:
    """Split ``trees`` into chunks whose path steps times ``n_rows`` stay near :data:`CELL_BUDGET`."""
    leaves = ens.feature < 0
    steps = np.bincount(ens.tree[leaves], weights=ens.depth[leaves], minlength=ens.n_trees)[trees]
    budget = max(1.0, CELL_BUDGET / max(n_rows, 1))
    chunk_id = np.floor(np.cumsum(steps) / budget).astype(np.int64)
    _, starts = np.unique(chunk_id, return_index=True)
    return [c for c in np.split(trees, starts[1:]) if c.size]


def failed_conditions(ens: ForestGraph, table: PathTable, matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Which path conditions each row fails (entry-major layout, so gathers copy contiguous rows).

    Returns
    -------
    fail : ndarray of bool, shape (n_entries, n_rows)
        Row fails the leaf's condition on the entry's feature (goes the other way at
        one of the leaf's ancestor splits on that feature).
    n_failed : ndarray of int16, shape (n_leaves, n_rows)
        Number of path features whose condition the row fails; 0 means the row reaches the leaf.
    """
    columns = np.ascontiguousarray(matrix.astype(ens.split_dtype, copy=False).T)
    values = columns[ens.feature[table.used_nodes]]
    nodes = np.broadcast_to(table.used_nodes[:, None], values.shape)
    goes_left = ens._goes_left(nodes.ravel(), values.ravel()).reshape(values.shape)
    step_fail = goes_left[table.step_node] != table.step_left[:, None]
    fail = np.logical_or.reduceat(step_fail, table.entry_step_start, axis=0)
    n_failed = np.add.reduceat(fail, table.leaf_entry_start, axis=0, dtype=np.int16)
    return fail, n_failed


def _sum_rows_by(values: np.ndarray, group: np.ndarray, into: np.ndarray) -> None:
    """Add row ``r`` of ``values`` into row ``group[r]`` of ``into`` (groups < 0 are dropped)."""
    keep = group >= 0
    if not keep.any():
        return
    group = group[keep]
    order = np.argsort(group, kind="stable")
    sorted_group = group[order]
    starts = np.flatnonzero(np.r_[True, sorted_group[1:] != sorted_group[:-1]])
    into[sorted_group[starts]] += np.add.reduceat(values[np.flatnonzero(keep)[order]], starts, axis=0)


# --------------------------------------------------------------------------- exact engine (H-statistics)
def _run_tasks(function: Callable, tasks: list, n_jobs: int, label: str, progress: bool | None) -> list:
    """``function(*task)`` for every task, in order, in ``n_jobs`` joblib workers, with one progress bar."""
    results = []
    with progress_bar(len(tasks), label, enabled=progress) as bar:
        if n_jobs == 1:
            for task in tasks:
                results.append(function(*task))
                bar.update()
            return results
        for result in Parallel(n_jobs=n_jobs, return_as="generator")(delayed(function)(*task) for task in tasks):
            results.append(result)
            bar.update()
    return results


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
    """:func:`~treeprobe.paths.encode_sets` keys of the features of entry combos."""
    return encode_sets(np.column_stack([table.entry_feature[member] for member in combos]), n_features)


def _lookup(keys: np.ndarray, known: np.ndarray) -> np.ndarray:
    """Position of each key in the sorted array ``known``, -1 when absent."""
    if not known.size:
        return np.full(keys.shape, -1, dtype=np.int64)
    position = np.minimum(np.searchsorted(known, keys), known.size - 1)
    return np.where(known[position] == keys, position, -1)


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
    ``F - F_notj`` (``rest`` only when ``want_against_rest``); all up to constants.
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
        sums["prediction"] += table.leaf_value @ (n_failed == 0)
        if want_against_rest:
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
                _sum_rows_by(term, target[pick], sums["triple"])
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



@dataclass(frozen=True)
class ExactParts:
    """Per-row pieces of the partial dependence functions of one output, from the tree structure.

    Every array is uncentred and exact up to an additive constant per column
    (centring over the rows removes it), one row per data row.

    Attributes
    ----------
    main : ndarray (n_rows, n_features)
        ``F_j`` for every feature ``j``.
    pair : ndarray (n_rows, len(pairs))
        ``F_jk - F_j - F_k`` for each requested pair, in the order given.
    triple : ndarray (n_rows, len(triples))
        ``F_jkl - F_jk - F_jl - F_kl + F_j + F_k + F_l`` for each requested triple.
    prediction : ndarray (n_rows,)
        The model's raw output ``F``.
    rest : ndarray (n_rows, n_features)
        ``F - F_notj`` (zeros unless ``against_rest``).
    """

    main: np.ndarray
    pair: np.ndarray
    triple: np.ndarray
    prediction: np.ndarray
    rest: np.ndarray


def exact_parts(
    ens: ForestGraph,
    matrix: np.ndarray,
    output: int,
    pairs: Sequence[tuple[int, int]],
    triples: Sequence[tuple[int, int, int]],
    *,
    against_rest: bool,
    n_jobs: int = 1,
    progress: bool | None = None,
) -> ExactParts:
    """The exact engine: :class:`ExactParts` of raw output ``output`` at the rows of ``matrix``.

    ``matrix`` is both the background and the evaluation points (as for
    H-statistics); ``pairs`` and ``triples`` hold feature indices in ascending
    order. Tree chunks run in ``n_jobs`` joblib workers; their sums add up.
    """
    p = ens.n_features
    pair_keys = encode_sets(np.array(pairs, dtype=np.int64).reshape(-1, 2), p)
    triple_keys = encode_sets(np.array(triples, dtype=np.int64).reshape(-1, 3), p)
    sorted_pairs, sorted_triples = np.unique(pair_keys), np.unique(triple_keys)
    chunks = tree_chunks(ens, ens.trees_of_output(output), matrix.shape[0])
    tasks = [(ens, matrix, chunk, output, sorted_pairs, sorted_triples, bool(against_rest)) for chunk in chunks]
    n_rows = matrix.shape[0]
    total = {"main": np.zeros((p, n_rows)), "pair": np.zeros((sorted_pairs.size, n_rows)),
             "triple": np.zeros((sorted_triples.size, n_rows)), "prediction": np.zeros(n_rows),
             "rest": np.zeros((p, n_rows))}
    for part in _run_tasks(_exact_sums, tasks, n_jobs, f"H-statistics (exact, output {output})", progress):
        total = {name: total[name] + part[name] for name in total}
    return ExactParts(
        main=total["main"].T,
        pair=total["pair"].T[:, np.searchsorted(sorted_pairs, pair_keys)],
        triple=total["triple"].T[:, np.searchsorted(sorted_triples, triple_keys)],
        prediction=total["prediction"],
        rest=total["rest"].T,
    )


# --------------------------------------------------------------------------- brute force
def model_output(values: Any, n_rows: int, output: int | None) -> np.ndarray:
    """Check a predictor's return value and select ``output`` (all outputs as columns when None)."""
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim == 2 and arr.shape[1] == 1:
        arr = arr[:, 0]
    if arr.ndim not in (1, 2) or arr.shape[0] != n_rows:
        raise DataError(
            f"model returned an array of shape {arr.shape} for {n_rows} rows; expected ({n_rows},) or ({n_rows}, n_outputs)"
        )
    if not np.all(np.isfinite(arr)):
        raise DataError(f"model returned {int(np.sum(~np.isfinite(arr)))} non-finite predictions for {n_rows} rows")
    if arr.ndim == 1:
        if output not in (None, 0):
            raise DataError(f"output={output} requested but the model has one output")
        return arr
    if output is None:
        return arr
    if not 0 <= output < arr.shape[1]:
        raise DataError(f"output must lie in 0..{arr.shape[1] - 1}, got {output}")
    return arr[:, output]


def _modified_rows(background: PreparedData, points: PreparedData, start: int, stop: int, columns: Sequence[int]):
    n_back = background.n_rows
    point_rows = np.repeat(np.arange(start, stop), n_back)
    if background.frame is None:
        block = np.tile(background.matrix, (stop - start, 1))
        block[:, columns] = points.matrix[point_rows][:, columns]
        return block
    block = background.frame.iloc[np.tile(np.arange(n_back), stop - start)].reset_index(drop=True)
    for j in columns:
        name = background.frame.columns[j]
        block[name] = points.frame[name].iloc[point_rows].reset_index(drop=True)
    return block


def brute_partial_dependence(
    predict: Callable[[Any], np.ndarray],
    background: PreparedData,
    points: PreparedData,
    columns: Sequence[int],
    output: int | None,
    row_bytes: int | None = None,
) -> np.ndarray:
    """``F_S`` at every row of ``points`` by averaging ``predict`` over modified background rows.

    Batches of point rows are sized so that one batch of modified rows, counted at
    ``row_bytes`` each (default: the row itself; more when the predictor's working
    memory grows with the model, see :func:`predictor_row_bytes`), holds about
    :data:`BRUTE_BATCH_BYTES`.
    """
    n_back = background.n_rows
    row_bytes = row_bytes or 8 * max(background.matrix.shape[1], 1)
    per_batch = max(1, BRUTE_BATCH_BYTES // (row_bytes * n_back))
    pieces = []
    for start in range(0, points.n_rows, per_batch):
        stop = min(start + per_batch, points.n_rows)
        block = _modified_rows(background, points, start, stop, columns)
        predicted = model_output(predict(block), (stop - start) * n_back, output)
        pieces.append(predicted.reshape((stop - start, n_back) + predicted.shape[1:]).mean(axis=1))
    return np.concatenate(pieces, axis=0)


def predictor_row_bytes(ens: ForestGraph | None, n_columns: int) -> int:
    """Working bytes per predicted row: the row, plus leaf indices and values per tree for an ensemble."""
    if ens is None:
        return 8 * max(n_columns, 1)
    return 8 * (n_columns + ens.n_trees * (1 + ens.value.shape[1]) + ens.n_outputs)


def ensemble_predictor(ens: ForestGraph, scale: str) -> Callable[[np.ndarray], np.ndarray]:
    """Predictor of ``ens`` on checked matrices: raw margin or the link's scale."""
    if scale == "margin":
        return lambda matrix: ens.predict_raw(matrix, checked=True)
    return ens.predict



def brute_parts(
    fitted: FittedModel,
    data: PreparedData,
    sets: Sequence[tuple[int, ...]],
    output: int | None,
    *,
    scale: str = "margin",
    n_jobs: int = 1,
    progress: bool | None = None,
) -> tuple[np.ndarray, list[np.ndarray]]:
    """The brute-force engine: the prediction at the rows and ``F_S`` at the rows for every set ``S``.

    ``data`` is both the background and the evaluation points. Predicting the
    rows themselves first checks the model's output shape on the user's own
    data. Each value is (n_rows,) or (n_rows, n_outputs) when ``output`` is
    None on a multi-output model; sets run in ``n_jobs`` joblib workers.
    """
    predict = ensemble_predictor(fitted.ensemble, scale) if fitted.is_tree else fitted.predict
    row_bytes = predictor_row_bytes(fitted.ensemble, data.matrix.shape[1])
    prediction = model_output(predict(data.frame if data.frame is not None else data.matrix), data.n_rows, output)
    tasks = [(predict, data, data, list(s), output, row_bytes) for s in sets]
    return prediction, _run_tasks(brute_partial_dependence, tasks, n_jobs, "H-statistics (brute)", progress)


# --------------------------------------------------------------------------- exact
def exact_partial_dependence(
    ens: ForestGraph, background: np.ndarray, grid_rows: np.ndarray, columns: Sequence[int], output: int
) -> np.ndarray:
    """``F_S`` of raw output ``output`` at ``grid_rows`` (columns ``S`` used), background ``background``.

    Implements ``F_S(z) = base + sum_L v_L prod_{j in S} C_Lj(z_j) w_L(S)``; see the module docstring.
    """
    trees, node_value = leaf_value_column(ens, output)
    in_set = np.zeros(ens.n_features, dtype=bool)
    in_set[list(columns)] = True
    links = parent_links(ens)
    result = np.full(grid_rows.shape[0], ens.base_score[output])
    for chunk in tree_chunks(ens, trees, max(background.shape[0], grid_rows.shape[0])):
        table = path_table(ens, chunk, node_value, links)
        result += table.constant
        if not table.n_leaves:
            continue
        entry_in_set = in_set[table.entry_feature][:, None]
        fail, n_failed = failed_conditions(ens, table, background)
        failed_in_set = np.add.reduceat(fail & entry_in_set, table.leaf_entry_start, axis=0, dtype=np.int16)
        share = (n_failed == failed_in_set).mean(axis=1)
        grid_fail, _ = failed_conditions(ens, table, grid_rows)
        grid_failed_in_set = np.add.reduceat(grid_fail & entry_in_set, table.leaf_entry_start, axis=0, dtype=np.int16)
        result += (table.leaf_value * share) @ (grid_failed_in_set == 0)
    return result


METHODS = ("auto", "exact", "brute")
SCALES = ("margin", "probability")
# Links under which the raw margin already is the prediction scale.
_MARGIN_IS_PREDICTION = ("identity", "proba")


def check_output(ens: ForestGraph, output: Any) -> int:
    """The ``output`` option of a tree ensemble: an integer in ``0..n_outputs - 1``."""
    return check_int("output", output, low=0, high=ens.n_outputs - 1)


def choose_exact(fitted: FittedModel, method: str, scale: str) -> bool:
    """Whether the exact engine runs for these (checked) ``method`` and ``scale`` options.

    Raises
    ------
    ParameterError
        ``method="exact"`` without a tree ensemble or on the probability
        scale, and ``scale="probability"`` on a model whose link leaves the
        margin unchanged (regression): there the two scales agree and only the
        margin gets the exact engine.
    """
    ens = fitted.ensemble
    if method == "exact" and not fitted.is_tree:
        raise ParameterError("method='exact' needs a tree ensemble; a callable model needs method='brute' or 'auto'")
    if method == "exact" and scale != "margin":
        raise ParameterError("method='exact' computes margin-scale values; use scale='margin' or method='brute'")
    if scale == "probability" and ens is not None and ens.link in _MARGIN_IS_PREDICTION:
        raise ParameterError(
            f"scale='probability' needs a model with a probability link, but this model's link is {ens.link!r} "
            f"(objective {ens.objective!r}): its margin already is its prediction; use scale='margin', which "
            "gives the same values with the exact engine"
        )
    return fitted.is_tree and method != "brute" and scale == "margin"


def _feature_columns(features: Any, names: Sequence[str]) -> list[int]:
    if isinstance(features, (str, int, np.integer)) or len(features) == 0:
        raise ParameterError(f"features must be a non-empty sequence of feature names, got {features!r}")
    columns = [feature_index(names, f, parameter="features") for f in features]
    if len(set(columns)) != len(columns):
        raise ParameterError(f"features lists a feature twice: {list(features)}")
    return columns


def _grid_values(grid: Any, n_columns: int) -> np.ndarray:
    values = np.asarray(grid, dtype=np.float64)
    if values.ndim == 1 and n_columns == 1:
        values = values[:, None]
    if values.ndim != 2 or values.shape[1] != n_columns:
        raise ParameterError(f"grid must have shape (n_points, {n_columns}), got {values.shape}")
    return values


def _grid_frame(data: PreparedData, columns: list[int], grid_values: np.ndarray) -> pd.DataFrame | None:
    """Grid points as a DataFrame of the background's dtypes (for a callable given a DataFrame)."""
    if data.frame is None:
        return None
    frame = data.frame.iloc[np.zeros(grid_values.shape[0], dtype=np.int64)].reset_index(drop=True)
    for position, j in enumerate(columns):
        name = data.frame.columns[j]
        column = data.frame[name]
        if isinstance(column.dtype, pd.CategoricalDtype):
            codes = np.where(np.isnan(grid_values[:, position]), -1, grid_values[:, position]).astype(np.int64)
            frame[name] = pd.Categorical.from_codes(codes, dtype=column.dtype)
        else:
            frame[name] = grid_values[:, position]
    return frame


def partial_dependence(
    model: Any,
    X: Any,
    features: Sequence[Any],
    grid: Any,
    *,
    method: str = "auto",
    output: int | None = None,
    scale: str = "margin",
) -> np.ndarray:
    """Partial dependence of a model on a set of features at given grid points.

    Parameters
    ----------
    model : ForestGraph, model object, model file or callable
        A :class:`~treeprobe.graph.ForestGraph`, anything
        :func:`treeprobe.load_model` reads, or a function ``predict(X) -> array``.
    X : ndarray or DataFrame of shape (n_rows, n_features)
        Background rows averaged over. For a callable, DataFrames are passed on
        as DataFrames (dtypes kept).
    features : sequence of str or int
        The set ``S`` (names, or column positions).
    grid : array-like of shape (n_points, len(features))
        Values of the features in ``S`` at which to evaluate. Categorical
        features take their integer category codes.
    method : {"auto", "exact", "brute"}, default "auto"
        "exact" reads the tree structure (tree ensembles, margin scale only);
        "brute" averages predictions over modified rows; "auto" picks "exact"
        whenever it applies.
    output : int, optional
        Output (class) of a multi-output model; None returns every output.
    scale : {"margin", "probability"}, default "margin"
        Raw margin (log-odds for classifiers) or the link's scale (brute only;
        refused when the link is the identity, where both scales agree).

    Returns
    -------
    ndarray of shape (n_points,), or (n_points, n_outputs) for all outputs of a multi-output model
        Uncentred partial dependence, ``F_S(z) = (1/n) sum_i f(z_S, x_{i, not S})``.

    Raises
    ------
    ParameterError
        An invalid ``method``, ``scale``, ``features``, ``grid`` or ``output``,
        or a combination the model does not support (see ``scale``).
    DataError
        Rows that do not fit the model, or a predictor returning the wrong shape.

    Notes
    -----
    Friedman's estimate ([1]_, eq. 9). The exact path gives the same number as
    brute force on the common graph, without ``n_points * n_rows`` predictions;
    see the module docstring. When features in ``S`` are dependent on the others
    the modified rows leave the data's support and the model is extrapolating.

    References
    ----------
    .. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
       machine", Annals of Statistics 29(5), 2001.

    Examples
    --------
    >>> import numpy as np
    >>> f = lambda X: X[:, 0] * X[:, 1]
    >>> X = np.array([[1.0, 2.0], [3.0, 4.0]])
    >>> partial_dependence(f, X, [0], [[1.0], [2.0]])
    array([3., 6.])
    """
    method = check_choice("method", method, METHODS)
    scale = check_choice("scale", scale, SCALES)
    fitted = resolve_model(model)
    use_exact = choose_exact(fitted, method, scale)
    data = prepare_rows(fitted, X, min_rows=1)
    columns = _feature_columns(features, data.names)
    grid_values = _grid_values(grid, len(columns))
    if fitted.is_tree and output is not None:
        check_output(fitted.ensemble, output)
    grid_matrix = np.full((grid_values.shape[0], data.matrix.shape[1]), np.nan)
    grid_matrix[:, columns] = grid_values
    if use_exact:
        ens = fitted.ensemble
        outputs = [output] if output is not None else list(range(ens.n_outputs))
        values = [exact_partial_dependence(ens, data.matrix, grid_matrix, columns, k) for k in outputs]
        return values[0] if len(values) == 1 else np.column_stack(values)
    points = PreparedData(grid_matrix, _grid_frame(data, columns, grid_values), data.names)
    predict = ensemble_predictor(fitted.ensemble, scale) if fitted.is_tree else fitted.predict
    return brute_partial_dependence(predict, data, points, columns, output,
                                    predictor_row_bytes(fitted.ensemble, data.matrix.shape[1]))
