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
``S``. For H-statistics (background = evaluation rows) the engine keeps, per
chunk of trees, the rows passing each (leaf, path feature) *entry* as bit-packed
row sets (64 rows a word), and per leaf the rows failing at least one, two and
three entries (bit-sliced counting). The rows failing nothing but entry ``e``
are ``~twos & fail_e``, those failing exactly ``{a, b}`` are
``~threes & fail_a & fail_b``, so every share needed is a few AND and popcount
steps. The per-row functions use that ``C_Lj`` reads feature ``j`` alone:
between consecutive thresholds of the splits on ``j`` every value goes the same
way (:class:`RowCells`), so an entry passes an interval of such *cells* and
``F_j`` is a sum of weighted cell intervals, and the product terms of a pair a
sum of weighted cell boxes, added up once for all trees with running sums.
Only ``F - F_notj`` needs whole rows (the rows failing exactly one entry);
those sums are taken a byte of rows at a time. Partial dependence at points
other than the background (:func:`partial_dependence`) counts the failures of
the points and of the background directly (:func:`failed_conditions`).

This module owns both engines. :func:`partial_dependence` is the public entry
point; :mod:`treeprobe.measure` calls only :func:`exact_parts` (per-row pieces
of every ``F_j``, ``F_jk - F_j - F_k``, the triple terms, ``F`` and
``F - F_notj`` for H-statistics, from the tree structure) and
:func:`brute_parts` (``F_S`` by averaging predictions), besides the row
preparation helpers, and :func:`exact_subset_parts` (``F_j`` and the pair
terms of many row subsets from one pass: the row sets above are built once
for all rows and each share is counted inside each subset; a pair's boxes and
linear terms become the corners of one grid per pair, summed with one column
per subset and read at each subset's own rows). Paths and parents come from
:mod:`treeprobe.paths`.

References
----------
.. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", Annals of Statistics 29(5), 2001, section 8.2, eq. 9.
.. [2] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 2008, section 8.
"""

from __future__ import annotations

import itertools
import os
import time
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from scipy.sparse import csc_matrix, csr_matrix

from .checks import check_choice, check_int, close_name
from .data import model_matrix, numeric_array
from .errors import DataError, ParameterError
from .graph import ZERO_MISSING_BOUND, ForestGraph
from .io import load_model
from .paths import decode_sets, encode_sets, leaf_steps, parent_links, tree_nodes
from .progress import progress_bar

__all__ = ["partial_dependence"]

# Cells (rows x columns) of one working matrix: bounds the memory of every chunk.
CELL_BUDGET = 2**25
# Bytes of modified rows one brute-force batch may hold.
BRUTE_BATCH_BYTES = 256 * 1024**2
# Estimated brute-force time above which a warning states the estimate before the work starts.
BRUTE_NOTICE_SECONDS = 60.0


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
        close = close_name(name, names)
        if close is not None:
            raise ParameterError(f"{parameter}: unknown feature {name!r}; did you mean {close!r}?")
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
    leaf_node: np.ndarray         # (n_leaves,) global node index of each leaf
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
        return PathTable(np.zeros(0), empty, empty, empty, np.zeros(0, bool), empty, empty, empty, empty,
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
        leaf_node=leaves,
        used_nodes=used_nodes,
        step_node=node_position.ravel(),
        step_left=left_of_step,
        entry_step_start=entry_step_start,
        entry_leaf=entry_leaf,
        entry_feature=feature_of_step[entry_step_start],
        leaf_entry_start=np.flatnonzero(np.r_[True, entry_leaf[1:] != entry_leaf[:-1]]),
        constant=float(node_value[single].sum()),
    )


def _leaves_splitting_on(table: PathTable, features: np.ndarray) -> PathTable:
    """The part of ``table`` whose leaves split on at least one of ``features`` (p,) bool, all their entries kept.

    Node positions (``used_nodes``) are kept as they are; the other leaves add
    only constants to the partial dependence of those features and their pairs.
    """
    keep_leaf = np.logical_or.reduceat(features[table.entry_feature], table.leaf_entry_start) if table.n_leaves \
        else np.zeros(0, dtype=bool)
    if keep_leaf.all():
        return table
    keep_entry = keep_leaf[table.entry_leaf]
    step_count = np.diff(np.r_[table.entry_step_start, table.step_node.size])
    keep_step = np.repeat(keep_entry, step_count)
    step_position = np.cumsum(keep_step) - 1
    new_leaf = np.cumsum(keep_leaf) - 1
    entry_leaf = new_leaf[table.entry_leaf[keep_entry]]
    return PathTable(
        leaf_value=table.leaf_value[keep_leaf],
        leaf_node=table.leaf_node[keep_leaf],
        used_nodes=table.used_nodes,
        step_node=table.step_node[keep_step],
        step_left=table.step_left[keep_step],
        entry_step_start=step_position[table.entry_step_start[keep_entry]],
        entry_leaf=entry_leaf,
        entry_feature=table.entry_feature[keep_entry],
        leaf_entry_start=np.flatnonzero(np.r_[True, entry_leaf[1:] != entry_leaf[:-1]]) if entry_leaf.size
        else np.zeros(0, dtype=np.int64),
        constant=table.constant,
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


# --------------------------------------------------------------------------- row cells and bit sets
def _popcount(words: np.ndarray) -> np.ndarray:
    """Set bits of every row of a uint64 matrix (``np.bitwise_count`` from numpy 2.0, else by bytes)."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(words).sum(axis=-1, dtype=np.int64)
    return _popcount_by_bytes(words)


def _popcount_by_bytes(words: np.ndarray) -> np.ndarray:
    return np.unpackbits(np.ascontiguousarray(words).view(np.uint8), axis=-1).sum(axis=-1, dtype=np.int64)


# Bit r of byte b, as floats: turns per-byte weight sums into per-row sums with one small product.
_BYTE_BITS = np.unpackbits(np.arange(256, dtype=np.uint8)[:, None], axis=1, bitorder="little").astype(np.float64)


def _weighted_row_sums(words: np.ndarray, group: np.ndarray, weight: np.ndarray, n_groups: int,
                       n_rows: int) -> np.ndarray:
    """(n_groups, n_rows): ``out[g, i] = sum of weight[k] over row sets k of group g holding row i``.

    Works a byte (8 rows) at a time, on the non-zero bytes only. Where they are
    many, the weights are first summed per (group, byte position, byte value) and
    each of the 256 byte values spreads its sum over its set bits with one small
    product; where they are few, each byte spreads its own weight.
    """
    as_bytes = np.ascontiguousarray(words).view(np.uint8)
    n_bytes = as_bytes.shape[1]
    out = np.zeros((n_groups, n_bytes * 8))
    block = max(1, CELL_BUDGET // (256 * max(n_groups, 1)))
    for start in range(0, n_bytes, block):
        piece = as_bytes[:, start:start + block]
        width = piece.shape[1]
        item, position = np.nonzero(piece)
        value = piece[item, position]
        target = out[:, start * 8:(start + width) * 8]
        if 8 * item.size < n_groups * width * 256:
            spots = ((group[item] * width + position) * 8)[:, None] + np.arange(8)
            target += np.bincount(spots.ravel(), weights=(weight[item][:, None] * _BYTE_BITS[value]).ravel(),
                                  minlength=n_groups * width * 8).reshape(n_groups, width * 8)
            continue
        index = (group[item] * width + position) * 256 + value
        sums = np.bincount(index, weights=weight[item], minlength=n_groups * width * 256)
        target += (sums.reshape(-1, 256) @ _BYTE_BITS).reshape(n_groups, width * 8)
    return out[:, :n_rows]


def _subset_counts(words: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """(n, k): set bits of each row of ``words`` inside each of the ``k`` row sets ``masks`` (k, n_words)."""
    if masks.shape[0] > 1:
        return _counts_by_word(words, masks)
    out = np.empty((masks.shape[0], words.shape[0]), dtype=np.int64)
    for b, mask in enumerate(masks):
        out[b] = _popcount(words & mask)
    # A transposed view: copying into (n, k) order costs more than the strided reads that follow.
    return out.T


def _bit_counts(words: np.ndarray) -> np.ndarray:
    """Set bits of every uint64 word, elementwise (uint8)."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(words)
    as_bits = np.unpackbits(np.ascontiguousarray(words).view(np.uint8).reshape(words.shape + (8,)), axis=-1)
    return as_bits.reshape(words.shape + (64,)).sum(axis=-1, dtype=np.uint8)


def _counts_by_word(words: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """:func:`_subset_counts` for many row sets: word position by word position, every set at once, over
    blocks of rows small enough to stay in cache (about three times faster than one pass per set)."""
    n_words = words.shape[1]
    out = np.zeros((words.shape[0], masks.shape[0]), dtype=np.int64)
    # Empty row sets (a fifth of the failure sets of entry pairs, typically) count nothing in any subset.
    items = np.flatnonzero(np.any(words, axis=1))
    words = words[items]
    # Counts stay below 2**16 for up to 65,535 rows: a narrow running total halves the memory traffic.
    total = np.zeros((items.size, masks.shape[0]), dtype=np.uint16 if n_words * 64 < 2**16 else np.int64)
    block = max(1, 2**17 // masks.shape[0])
    for start in range(0, items.size, block):
        piece, running = words[start:start + block], total[start:start + block]
        for word in range(n_words):
            running += _bit_counts(piece[:, word, None] & masks[None, :, word])
    out[items] = total
    return out


def _column_bincount(index: np.ndarray, weights: np.ndarray, length: int) -> np.ndarray:
    """``np.bincount`` of every column of ``weights`` (n,) or (n, k) at once: shape (length,) or (length, k)."""
    if weights.ndim == 1:
        return np.bincount(index, weights=weights, minlength=length)
    k = weights.shape[1]
    spots = (index[:, None] * k + np.arange(k)).ravel()
    return np.bincount(spots, weights=weights.ravel(), minlength=length * k).reshape(length, k)


def _summed_by_index(index: np.ndarray, scale: np.ndarray, source: np.ndarray,
                     table: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The distinct values of ``index`` and, at each, the sum of ``scale[m] * table[source[m]]`` over the items
    ``m`` there: a sparse bincount whose wide weights (rows of ``table``, (n_sources, k)) are never gathered."""
    positions, inverse = np.unique(index, return_inverse=True)
    spread = csr_matrix((scale, (inverse.ravel(), source)), shape=(positions.size, table.shape[0]))
    return positions, np.asarray(spread @ table)


def _unpack(words: np.ndarray, n_rows: int) -> np.ndarray:
    """Boolean (k, n_rows) matrix of uint64 row sets (bit ``i % 64`` of word ``i // 64`` is row ``i``)."""
    return np.unpackbits(np.ascontiguousarray(words).view(np.uint8), axis=-1, count=n_rows, bitorder="little")


@dataclass(frozen=True)
class RowCells:
    """The rows binned per feature so that one cell's rows go the same way at every split on the feature.

    Regular cells ``0..K_j`` lie between the sorted distinct thresholds ``T_j``
    of the numeric splits on feature ``j``: value ``v`` is in cell ``c(v)``, the
    number of thresholds at which it goes right, and a split at ``T_j[k]`` sends
    it left exactly when ``c(v) <= k``, so a path's conditions on ``j`` keep an
    interval of regular cells. Special values (missing, read as missing by a
    ``zero_as_missing`` split, or any value of a feature with categorical
    splits) get one cell per distinct value, numbered after the regular ones and
    routed by the graph's own rule. ``prefix`` holds, per feature and ``k``, the
    set of rows in cells below ``k`` as uint64 words, so the rows of any cell
    interval cost two lookups.
    """

    n_rows: int
    n_regular: np.ndarray        # (p,) K_j + 1 (0 for features routed by value only)
    n_cells: np.ndarray          # (p,) regular plus special cells
    node_rank: np.ndarray        # (n_nodes,) index of the node's threshold in T_j, -1 where not regular
    special_offset: np.ndarray   # (p + 1,) CSR offsets of special_values
    special_values: np.ndarray   # distinct special values per feature (in split precision)
    cell: np.ndarray             # (p, n_rows) cell of every row
    rank: np.ndarray             # (p, n_rows) position of the row's cell among the occupied cells
    snap_offset: np.ndarray      # (p + 1,) CSR offsets of snap
    snap: np.ndarray             # per feature and cell bound k: occupied cells below k
    prefix_offset: np.ndarray    # (p + 1,) first row of each feature's prefix sets
    prefix: np.ndarray           # (sum(n_cells + 1), n_words) rows with cell < k
    valid: np.ndarray            # (n_words,) the bits that stand for rows

    @property
    def n_words(self) -> int:
        return int(self.valid.shape[0])


def _routed_by_value(ens: ForestGraph) -> tuple[np.ndarray, np.ndarray]:
    """Features whose every value is special (categorical or non-numeric thresholds), and features with a
    ``zero_as_missing`` split."""
    inner = ens.feature >= 0
    feature = ens.feature[inner]
    whole = np.zeros(ens.n_features, dtype=bool)
    whole[feature[ens.is_categorical[inner] | np.isnan(ens.threshold[inner])]] = True
    zero = np.zeros(ens.n_features, dtype=bool)
    zero[feature[ens.zero_as_missing[inner]]] = True
    return whole, zero


def _feature_cells(column: np.ndarray, thresholds: np.ndarray, special: np.ndarray, n_regular: int, side: str):
    """Cells of one column: regular by threshold count, special by distinct value after the regular ones."""
    cell = np.empty(column.shape[0], dtype=np.int64)
    cell[~special] = np.searchsorted(thresholds, column[~special], side=side)
    values, inverse = np.unique(column[special], return_inverse=True)
    cell[special] = n_regular + inverse.ravel()
    return cell, values


def _prefix_sets(cell: np.ndarray, n_cells: int, n_words: int) -> np.ndarray:
    """(n_cells + 1, n_words) uint64: row ``i`` is in set ``k`` when ``cell[i] < k``."""
    rows = np.arange(cell.shape[0])
    own = np.zeros((n_cells + 1, n_words), dtype=np.uint64)
    np.bitwise_or.at(own, (cell + 1, rows >> 6), np.left_shift(np.uint64(1), (rows & 63).astype(np.uint64)))
    return np.bitwise_or.accumulate(own, axis=0)


def row_cells(ens: ForestGraph, matrix: np.ndarray) -> RowCells:
    """:class:`RowCells` of the rows of ``matrix`` (the model's float matrix) for the splits of ``ens``."""
    n_rows, p = matrix.shape
    n_words = max(1, -(-n_rows // 64))
    values = matrix.astype(ens.split_dtype, copy=False).astype(np.float64)
    whole, zero = _routed_by_value(ens)
    side = "right" if ens.threshold_rule == "<" else "left"
    node_rank = np.full(ens.n_nodes, -1, dtype=np.int64)
    by_feature = np.argsort(ens.feature, kind="stable")
    bounds = np.searchsorted(ens.feature[by_feature], np.arange(p + 1))
    cells, specials, prefixes, snaps, ranks = [], [], [], [], []
    n_regular = np.zeros(p, dtype=np.int64)
    for j in range(p):
        nodes = by_feature[bounds[j]:bounds[j + 1]]
        column = values[:, j]
        if whole[j]:
            thresholds = np.zeros(0)
            special = np.ones(n_rows, dtype=bool)
        else:
            thresholds, node_rank[nodes] = np.unique(ens.threshold[nodes], return_inverse=True)
            n_regular[j] = thresholds.size + 1
            special = np.isnan(column) | (zero[j] & (np.abs(column) <= ZERO_MISSING_BOUND))
        cell, special_values = _feature_cells(column, thresholds, special, int(n_regular[j]), side)
        n_cells = int(n_regular[j]) + special_values.size
        occupied = np.unique(cell)
        cells.append(cell)
        specials.append(special_values)
        ranks.append(np.searchsorted(occupied, cell))
        snaps.append(np.searchsorted(occupied, np.arange(n_cells + 1)))
        prefixes.append(_prefix_sets(cell, n_cells, n_words))
    valid = np.zeros(n_words, dtype=np.uint64)
    valid[: n_rows // 64] = ~np.uint64(0)
    if n_rows % 64:
        valid[n_rows // 64] = (np.uint64(1) << np.uint64(n_rows % 64)) - np.uint64(1)
    n_cells = np.array([prefix.shape[0] - 1 for prefix in prefixes], dtype=np.int64)
    return RowCells(
        n_rows=n_rows,
        n_regular=n_regular,
        n_cells=n_cells,
        node_rank=node_rank,
        special_offset=np.r_[0, np.cumsum([s.size for s in specials])].astype(np.int64),
        special_values=np.concatenate(specials) if specials else np.zeros(0),
        cell=np.array(cells).reshape(p, n_rows),
        rank=np.array(ranks).reshape(p, n_rows),
        snap_offset=np.r_[0, np.cumsum(n_cells + 1)].astype(np.int64),
        snap=np.concatenate(snaps) if snaps else np.zeros(0, np.int64),
        prefix_offset=np.r_[0, np.cumsum(n_cells + 1)].astype(np.int64),
        prefix=np.concatenate(prefixes) if prefixes else np.zeros((0, n_words), np.uint64),
        valid=valid,
    )


@dataclass(frozen=True)
class EntryCells:
    """The cells each path entry (one leaf's conditions on one feature) lets through, as cell intervals.

    Intervals are sorted by entry and every entry has at least one (its regular
    interval, possibly empty); each special cell it passes adds a one-cell interval.
    """

    entry: np.ndarray   # (n_intervals,)
    low: np.ndarray     # (n_intervals,) first cell
    high: np.ndarray    # (n_intervals,) one past the last cell
    start: np.ndarray   # (n_entries,) first interval of each entry
    count: np.ndarray   # (n_entries,)


def _special_passes(ens: ForestGraph, table: PathTable, cells: RowCells, step_nodes: np.ndarray,
                    entry_steps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Entries and special cells where the entry's conditions hold, by the graph's routing rule."""
    n_special = np.diff(cells.special_offset)[table.entry_feature]
    pair_entry = np.repeat(np.arange(table.n_entries), n_special)
    pair_special = np.arange(pair_entry.size) - np.repeat(np.cumsum(n_special) - n_special, n_special)
    if not pair_entry.size:
        return pair_entry, pair_special
    steps = entry_steps[pair_entry]
    step = np.repeat(table.entry_step_start[pair_entry], steps)
    step += np.arange(step.size) - np.repeat(np.cumsum(steps) - steps, steps)
    value = cells.special_values[cells.special_offset[table.entry_feature[pair_entry]] + pair_special]
    value = np.repeat(value, steps).astype(ens.split_dtype)
    fails = ens._goes_left(step_nodes[step], value) != table.step_left[step]
    failed = np.logical_or.reduceat(fails, np.cumsum(steps) - steps)
    keep = ~failed
    return pair_entry[keep], cells.n_regular[table.entry_feature[pair_entry[keep]]] + pair_special[keep]


def entry_cells(ens: ForestGraph, table: PathTable, cells: RowCells) -> EntryCells:
    """:class:`EntryCells` of a path table: a regular interval from threshold ranks, special cells one by one."""
    step_nodes = table.used_nodes[table.step_node]
    entry_steps = np.diff(np.r_[table.entry_step_start, step_nodes.size])
    bound = cells.node_rank[step_nodes] + 1
    regular = bound > 0
    low = np.maximum.reduceat(np.where(table.step_left | ~regular, 0, bound), table.entry_step_start)
    high = np.minimum.reduceat(np.where(table.step_left & regular, bound, np.iinfo(np.int64).max),
                               table.entry_step_start)
    high = np.minimum(high, cells.n_regular[table.entry_feature])
    empty = low >= high
    low[empty], high[empty] = 0, 0
    special_entry, special_cell = _special_passes(ens, table, cells, step_nodes, entry_steps)
    entry = np.r_[np.arange(table.n_entries), special_entry]
    order = np.argsort(entry, kind="stable")
    count = np.bincount(entry, minlength=table.n_entries)
    return EntryCells(entry=entry[order], low=np.r_[low, special_cell][order],
                      high=np.r_[high, special_cell + 1][order], start=np.cumsum(count) - count, count=count)


def _entry_rows(table: PathTable, cells: RowCells, intervals: EntryCells) -> np.ndarray:
    """(n_entries, n_words) rows meeting each entry's conditions (the union of its intervals)."""
    base = cells.prefix_offset[table.entry_feature[intervals.entry]]
    rows = cells.prefix[base + intervals.high] & ~cells.prefix[base + intervals.low]
    return np.bitwise_or.reduceat(rows, intervals.start, axis=0)


def _failure_counts(table: PathTable, fail: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per leaf, the rows failing at least one, two and three of its entries (bit-sliced counting)."""
    counts = np.diff(np.r_[table.leaf_entry_start, table.n_entries])
    shape = (table.n_leaves, fail.shape[1])
    ones, twos, threes = np.zeros(shape, np.uint64), np.zeros(shape, np.uint64), np.zeros(shape, np.uint64)
    for position in range(int(counts.max(initial=0))):
        leaves = np.flatnonzero(counts > position)
        failed = fail[table.leaf_entry_start[leaves] + position]
        threes[leaves] |= twos[leaves] & failed
        twos[leaves] |= ones[leaves] & failed
        ones[leaves] |= failed
    return ones, twos, threes


# --------------------------------------------------------------------------- exact engine (H-statistics)
def _run_tasks(function: Callable, tasks: list, n_jobs: int, label: str, progress: bool | None,
               consume: Callable[[Any], None] | None = None) -> list:
    """``function(*task)`` for every task, in order, in ``n_jobs`` joblib workers, with one progress bar.

    Results are returned as a list, or handed to ``consume`` one by one as they arrive (then the list is empty).
    """
    results: list = []
    keep = consume if consume is not None else results.append
    with progress_bar(len(tasks), label, enabled=progress) as bar:
        if n_jobs == 1:
            for task in tasks:
                keep(function(*task))
                bar.update()
            return results
        for result in Parallel(n_jobs=n_jobs, return_as="generator")(delayed(function)(*task) for task in tasks):
            keep(result)
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


def _expand(counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For items with ``counts`` members each: the item and the member's position, one entry per member."""
    item = np.repeat(np.arange(counts.size), counts)
    return item, np.arange(item.size) - np.repeat(np.cumsum(counts) - counts, counts)


@dataclass(frozen=True)
class _ExactJob:
    """What every tree chunk of one exact run shares: the graph, the rows' cells and the sums asked for."""

    ens: ForestGraph
    cells: RowCells
    node_value: np.ndarray       # weighted leaf value of every node for the output
    links: tuple[np.ndarray, np.ndarray]
    pair_keys: np.ndarray        # sorted encode_sets keys of the pairs
    pair_members: np.ndarray     # (n_pairs, 2) their features
    triple_keys: np.ndarray
    against_rest: bool
    # (k, n_words) row sets, each both background and evaluation rows of one run (all rows: ``cells.valid``).
    masks: np.ndarray
    # (p,) bool: the features whose ``F_j`` (and pairs) are asked for; None: all. Leaves whose paths split on none
    # of them add only constants to those functions and are skipped (only without ``rest`` and triples).
    features: np.ndarray | None = None

    @property
    def segment_offset(self) -> np.ndarray:
        """Start of each (pair, side) step function of the linear terms, plus the total size (n_cells + 1 each)."""
        size = self.cells.n_cells[self.pair_members.ravel()] + 1
        return np.r_[0, np.cumsum(size)]


def _pair_boxes(job: _ExactJob, intervals: EntryCells, first: np.ndarray, second: np.ndarray, target: np.ndarray,
                weights: tuple[np.ndarray, np.ndarray, np.ndarray]) -> tuple[dict, tuple[np.ndarray, np.ndarray]]:
    """Cell boxes of the product terms and the step functions of the linear terms of entry pairs.

    ``weights`` are, per entry pair, the weight of ``C_a C_b`` (one column per
    row set of :attr:`_ExactJob.masks`), the factor of the weights of ``C_a`` and
    ``C_b`` alone, and, per entry, what that factor multiplies (the shares
    ``w_L({j})``, one column per row set). Boxes (first feature's interval x second feature's) are
    returned with corners snapped to the occupied cells (:attr:`RowCells.snap`);
    the linear terms come back summed as jumps of the per (pair, side) step
    functions laid out at :attr:`_ExactJob.segment_offset`: the positions that
    have one, and their sums (a dense layout would be mostly zeros, once per row set).
    """
    cells = job.cells
    both, alone, share_one = weights
    n_first, n_second = intervals.count[first], intervals.count[second]
    combo, k = _expand(n_first * n_second)
    i_first = intervals.start[first][combo] + k // n_second[combo]
    i_second = intervals.start[second][combo] + k % n_second[combo]
    low, high = intervals.low, intervals.high
    keep = (low[i_first] < high[i_first]) & (low[i_second] < high[i_second]) & np.any(both[combo] != 0, axis=1)
    combo, i_first, i_second = combo[keep], i_first[keep], i_second[keep]
    pair = target[combo]
    snap_a = cells.snap_offset[job.pair_members[pair, 0]]
    snap_b = cells.snap_offset[job.pair_members[pair, 1]]
    boxes = {"pair": pair.astype(np.int32), "weight": both[combo],
             "a_low": cells.snap[snap_a + low[i_first]].astype(np.int32),
             "a_high": cells.snap[snap_a + high[i_first]].astype(np.int32),
             "b_low": cells.snap[snap_b + low[i_second]].astype(np.int32),
             "b_high": cells.snap[snap_b + high[i_second]].astype(np.int32)}
    combo_a, k_a = _expand(n_first)
    combo_b, k_b = _expand(n_second)
    intervals_alone = np.concatenate((intervals.start[first][combo_a] + k_a, intervals.start[second][combo_b] + k_b))
    base = job.segment_offset[np.concatenate((2 * target[combo_a], 2 * target[combo_b] + 1))]
    factor = np.concatenate((alone[combo_a], alone[combo_b]))
    entry = np.concatenate((first[combo_a], second[combo_b]))
    steps = _summed_by_index(np.concatenate((base + low[intervals_alone], base + high[intervals_alone])),
                             np.concatenate((factor, -factor)), np.concatenate((entry, entry)), share_one)
    return boxes, steps


def _exact_chunk(job: _ExactJob, trees: np.ndarray) -> dict[str, Any]:
    """Leaf-wise pieces of one group of trees (see the module docstring); every piece adds up over groups.

    Shares ``w_L(S)`` come from bit-packed row sets: per leaf, the rows failing
    at least one, two and three of its path features (bit-sliced counting), so
    the rows failing nothing but a given entry or pair of entries are a few
    AND/popcount steps, counted inside each row set of ``job.masks`` (the
    shares, and so the weights of ``main``, ``boxes`` and ``linear``, carry one
    column per row set). Per-row functions come back as the summed jumps of
    weighted cell intervals (``main``), cell boxes and the jumps of per-feature
    step functions (``boxes`` and ``linear``, the pair terms), evaluated once for all groups, and as dense
    sums where they need whole rows (``rest``, ``triple``); ``rest_leaf`` holds the
    per-leaf weights read at the leaves the rows reach.
    """
    ens, cells, pair_keys, triple_keys = job.ens, job.cells, job.pair_keys, job.triple_keys
    n_rows, n_features = cells.n_rows, ens.n_features
    table = path_table(ens, trees, job.node_value, job.links)
    if job.features is not None:
        table = _leaves_splitting_on(table, job.features)
    parts: dict[str, Any] = {"main": None, "boxes": None, "linear": None, "rest_leaf": None, "rest": None,
                             "triple": None}
    if not table.n_leaves:
        return parts
    intervals = entry_cells(ens, table, cells)
    passes = _entry_rows(table, cells, intervals)
    fail = passes ^ cells.valid
    ones, twos, threes = _failure_counts(table, fail)
    leaf = table.entry_leaf
    n_kept = _popcount(job.masks)
    none = _subset_counts(~ones, job.masks)
    exactly = ~twos[leaf] & fail
    if job.features is None:
        exactly_count = _subset_counts(exactly, job.masks)
    else:
        # Shares are read only at the entries on the features asked for (their F_j and pair terms).
        exactly_count = np.zeros((table.n_entries, job.masks.shape[0]), dtype=np.int64)
        wanted = np.flatnonzero(job.features[table.entry_feature])
        exactly_count[wanted] = _subset_counts(exactly[wanted], job.masks)
    share_one = (none[leaf] + exactly_count) / n_kept
    value = table.leaf_value[leaf]
    base = cells.prefix_offset[table.entry_feature[intervals.entry]]
    scale = value[intervals.entry]
    parts["main"] = _summed_by_index(np.r_[base + intervals.low, base + intervals.high], np.r_[scale, -scale],
                                     np.r_[intervals.entry, intervals.entry], share_one)
    if job.against_rest:
        passing = _popcount(passes) / n_rows
        parts["rest_leaf"] = (table.leaf_node[leaf], table.entry_feature, value * (1.0 - passing))
        parts["rest"] = _weighted_row_sums(exactly, table.entry_feature, -value * passing, n_features, n_rows)
    if pair_keys.size:
        first, second = _entry_combos(table, 2)
        target = _lookup(_combo_keys(table, (first, second), n_features), pair_keys)
        wanted = target >= 0
        first, second, target = first[wanted], second[wanted], target[wanted]
        combo_leaf = leaf[first]
        double = _subset_counts(~threes[combo_leaf] & fail[first] & fail[second], job.masks)
        share_two = (none[combo_leaf] + exactly_count[first] + exactly_count[second] + double) / n_kept
        leaf_value = table.leaf_value[combo_leaf][:, None]
        parts["boxes"], parts["linear"] = _pair_boxes(job, intervals, first, second, target, (
            leaf_value * share_two, -leaf_value[:, 0], share_one))
    if triple_keys.size:
        # Triples and the rest are asked for with the single row set of all rows only.
        parts["triple"] = _triple_sums(table, _unpack(fail, n_rows).astype(bool), share_one[:, 0], triple_keys,
                                       n_features)
    return parts


def _triple_sums(table: PathTable, fail: np.ndarray, share_one: np.ndarray, triple_keys: np.ndarray,
                 n_features: int) -> np.ndarray:
    """Per-row triple terms (:func:`_interaction_term`) of the leaves splitting on each requested triple."""
    n_failed = np.add.reduceat(fail, table.leaf_entry_start, axis=0, dtype=np.int16)
    out = np.zeros((triple_keys.size, fail.shape[1]))
    combos = _entry_combos(table, 3)
    target = _lookup(_combo_keys(table, combos, n_features), triple_keys)
    wanted = np.flatnonzero(target >= 0)
    block = max(1, CELL_BUDGET // max(fail.shape[1], 1))
    for start in range(0, wanted.size, block):
        pick = wanted[start:start + block]
        term = _interaction_term(table, fail, n_failed, share_one, [c[pick] for c in combos])
        _sum_rows_by(term, target[pick], out)
    return out


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


def _interval_sums(cells: RowCells, steps: np.ndarray) -> np.ndarray:
    """(p, n_rows, ...): per feature, the summed weights of the cell intervals holding each row's cell, from the
    intervals' jumps ``steps`` (+weight at the first cell, -weight one past the last; laid out at
    :attr:`RowCells.prefix_offset`)."""
    out = np.empty((cells.n_cells.size, cells.n_rows) + steps.shape[1:])
    for j in range(out.shape[0]):
        out[j] = np.cumsum(steps[cells.prefix_offset[j]:cells.prefix_offset[j + 1]], axis=0)[cells.cell[j]]
    return out


def _segment_running_sums(offset: np.ndarray, steps: np.ndarray) -> np.ndarray:
    """Running sums of ``steps`` (n, ...) restarted at every segment start ``offset`` (its last entry: n)."""
    size = np.diff(offset)
    # Every interval closes inside its segment, so the running sum is back at 0 (up to rounding) at each end.
    running = np.cumsum(steps, axis=0)
    running -= np.repeat(np.concatenate((np.zeros((1,) + steps.shape[1:]), running[offset[1:-1] - 1])), size, axis=0)
    return running


def _linear_sums(cells: RowCells, members: np.ndarray, offset: np.ndarray, steps: np.ndarray) -> np.ndarray:
    """(n_pairs, n_rows, ...): the linear terms of each pair, a step function of each of its two features,
    from their summed jumps (``steps``, segments starting at ``offset``; trailing axes kept)."""
    running = _segment_running_sums(offset, steps)
    out = np.zeros((members.shape[0], cells.n_rows) + steps.shape[1:])
    # Feature by feature: a small table of that feature's step functions, read at the rows' cells.
    for side in (0, 1):
        for feature in np.unique(members[:, side]):
            pairs = np.flatnonzero(members[:, side] == feature)
            table = running[offset[2 * pairs + side][:, None] + np.arange(cells.n_cells[feature] + 1)]
            out[pairs] += table[:, cells.cell[feature]]
    return out


def _coordinate_counts(points: Sequence[tuple[np.ndarray, np.ndarray]], n_pairs: int, span: int) -> np.ndarray:
    """(n_pairs, span): for each pair and coordinate ``c``, how many of the pair's distinct coordinates (the
    (pair, coordinate) arrays of ``points``) are at most ``c``: a row's grid line is that count at its own cell."""
    present = np.zeros((n_pairs, span), dtype=bool)
    for pair, coordinate in points:
        present[pair, coordinate] = True
    return np.cumsum(present, axis=1)


def _pair_axes(pair: np.ndarray, low: np.ndarray, high: np.ndarray, span: int, n_pairs: int) -> np.ndarray:
    """(n_pairs, span): :func:`_coordinate_counts` of the ``low`` and ``high`` ends of the pairs' boxes on one axis."""
    return _coordinate_counts([(pair, low), (pair, high)], n_pairs, span)


def _running_sum_down(grid: np.ndarray) -> None:
    """``np.cumsum(grid, axis=0)`` in place; line by line when lines are long (one vector add each, several times
    faster than numpy's cumsum over a leading axis)."""
    if grid[0].size < 256:
        np.cumsum(grid, axis=0, out=grid)
        return
    for line in range(1, grid.shape[0]):
        grid[line] += grid[line - 1]


def _box_sums(cells: RowCells, members: np.ndarray, boxes: dict, out: np.ndarray) -> np.ndarray:
    """Add to ``out`` (n_pairs, n_rows, ...), per pair, the summed weights (n_boxes, ...) of its boxes holding each row.

    ``boxes`` are sorted by pair.

    Box corners, snapped to the cells the rows occupy, are numbered among
    the pair's own distinct corners, so a pair's grid has one line per distinct
    corner coordinate on each axis, after a leading zero line; a 2-D running sum
    of the corner weights gives every box sum at once, read at each row's grid
    point (the number of the pair's corners at or below its cell on each axis).
    """
    n_pairs = members.shape[0]
    pair = boxes["pair"]
    if not pair.size:
        return out
    # Snapped coordinates run from 0 to the occupied cell count of the feature.
    span = int(cells.snap[cells.snap_offset[1:] - 1].max()) + 1
    a_count = _pair_axes(pair, boxes["a_low"], boxes["a_high"], span, n_pairs)
    b_count = _pair_axes(pair, boxes["b_low"], boxes["b_high"], span, n_pairs)
    height, width = a_count[:, -1] + 1, b_count[:, -1] + 1
    bounds = np.searchsorted(pair, np.arange(n_pairs + 1))
    weight = boxes["weight"]
    trailing = weight.shape[1:]
    # Corners are built for batches of pairs holding about CELL_BUDGET / 32 boxes (~100 bytes each at work).
    per_batch = max(1, CELL_BUDGET // 32)
    cuts = np.unique(np.r_[np.searchsorted(bounds, np.arange(per_batch, bounds[-1], per_batch)), n_pairs])
    first = 0
    for last in cuts[cuts > 0]:
        pick = slice(bounds[first], bounds[last])
        box_pair = pair[pick]
        # Grid line of a corner: its rank among the pair's corners, after the leading zero line.
        a_low, a_high = a_count[box_pair, boxes["a_low"][pick]], a_count[box_pair, boxes["a_high"][pick]]
        b_low, b_high = b_count[box_pair, boxes["b_low"][pick]], b_count[box_pair, boxes["b_high"][pick]]
        line = width[box_pair]
        corner = np.stack([a_low * line + b_low, a_high * line + b_low, a_low * line + b_high,
                           a_high * line + b_high])
        local = bounds[first:last + 1] - bounds[first]
        for k in np.flatnonzero(np.diff(local)):
            # Per pair, so that the signed corner weights (one column per row set) are never all held at once.
            own = weight[bounds[first + k]:bounds[first + k + 1]]
            grid = _column_bincount(corner[:, local[k]:local[k + 1]].ravel(), np.concatenate((own, -own, -own, own)),
                                    int(height[first + k] * width[first + k]))
            grid = grid.reshape((-1, width[first + k]) + trailing)
            _running_sum_down(grid)
            np.cumsum(grid, axis=1, out=grid)
            fa, fb = members[first + k]
            out[first + k] += grid.reshape((-1,) + trailing)[a_count[first + k, cells.rank[fa]] * width[first + k]
                                                             + b_count[first + k, cells.rank[fb]]]
        first = last
    return out


def _reached_leaf_sums(leaves: np.ndarray, n_nodes: int, leaf_node: np.ndarray, feature: np.ndarray,
                       weight: np.ndarray, n_features: int) -> np.ndarray:
    """(p, n_rows): per row, the weights of the entries of the leaves it reaches (``leaves`` from apply).

    One sparse product (rows x leaves reached) @ (leaves x features), taken over
    blocks of rows to bound the memory of the reached-leaf matrix.
    """
    n_rows, n_trees = leaves.shape
    known, leaf_index = np.unique(leaf_node, return_inverse=True)
    index_of_node = np.full(n_nodes, -1, dtype=np.int64)
    index_of_node[known] = np.arange(known.size)
    entries = csr_matrix((weight, (leaf_index.ravel(), feature)), shape=(known.size, n_features))
    out = np.zeros((n_features, n_rows))
    # About 40 bytes per reached leaf at work: blocks of CELL_BUDGET / 8 of them.
    block = max(1, CELL_BUDGET // 8 // max(n_trees, 1))
    for start in range(0, n_rows, block):
        index = index_of_node[leaves[start:start + block]]
        row, column = np.nonzero(index >= 0)
        reached = csr_matrix((np.ones(row.size), (row, index[row, column])), shape=(index.shape[0], known.size))
        out[:, start:start + index.shape[0]] = (reached @ entries).toarray().T
    return out


def _joined(pieces: list, width: int) -> list[np.ndarray]:
    return [np.concatenate([piece[i] for piece in pieces]) for i in range(width)]


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


def _run_exact_job(job: _ExactJob, trees: np.ndarray, n_jobs: int, label: str, progress: bool | None,
                   dense: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray, list[dict]]:
    """Run :func:`_exact_chunk` over the tree chunks of ``trees``; the pieces every pair and row-set run needs.

    Dense pieces named in ``dense`` are added into its arrays, the jumps of
    ``main`` and ``linear`` as they come. Returns ``main`` (p, n_rows, k) from
    :func:`_interval_sums`, the summed linear jumps (n_segments, k) and the
    chunks' remaining pieces (their pair boxes among them).
    """
    cells, n_sets = job.cells, job.masks.shape[0]
    tasks = [(job, chunk) for chunk in tree_chunks(job.ens, trees, cells.n_rows)]
    linear = np.zeros((int(job.segment_offset[-1]), n_sets))
    main_steps = np.zeros((int(cells.prefix_offset[-1]), n_sets))
    pieces = []

    def consume(part: dict) -> None:
        # Dense pieces are added as they come, so memory does not grow with the number of chunks.
        if part["main"] is None:
            return
        for name, steps in (("main", main_steps), ("linear", linear)):
            if part[name] is not None:
                positions, sums = part.pop(name)
                steps[positions] += sums
        for name, total in dense.items():
            if part[name] is not None:
                total += part.pop(name)
        pieces.append(part)

    _run_tasks(_exact_chunk, tasks, n_jobs, label, progress, consume=consume)
    return _interval_sums(cells, main_steps), linear, pieces


def _joined_boxes(job: _ExactJob, pieces: list[dict]) -> dict | None:
    """The pair boxes of all chunks in one set of arrays sorted by pair (None without pairs)."""
    if not (job.pair_keys.size and pieces):
        return None
    # Field by field, each chunk's share dropped once joined, to keep one copy of the boxes at a time.
    boxes = {name: np.concatenate([part["boxes"].pop(name) for part in pieces])
             for name in ("pair", "weight", "a_low", "a_high", "b_low", "b_high")}
    order = np.argsort(boxes["pair"], kind="stable")
    return {name: values[order] for name, values in boxes.items()}


def _pair_sums(job: _ExactJob, boxes: dict | None, linear: np.ndarray, start: int, stop: int) -> np.ndarray:
    """(stop - start, n_rows, k): ``F_jk - F_j - F_k`` (up to a constant) of the pairs ``start:stop`` of the job.

    ``boxes`` are sorted by pair, so a range of pairs owns a slice of them, and a
    slice of the linear jumps (:attr:`_ExactJob.segment_offset`).
    """
    cells, members = job.cells, job.pair_members[start:stop]
    if boxes is None:
        return np.zeros((stop - start, cells.n_rows, linear.shape[1]))
    segments = job.segment_offset[2 * start:2 * stop + 1]
    low, high = np.searchsorted(boxes["pair"], [start, stop])
    part = {name: values[low:high] for name, values in boxes.items()}
    part["pair"] = part["pair"] - start
    return _box_sums(cells, members, part,
                     _linear_sums(cells, members, segments - segments[0], linear[segments[0]:segments[-1]]))


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
    order. Tree chunks run in ``n_jobs`` joblib workers; their pieces add up.
    """
    p, n_rows = ens.n_features, matrix.shape[0]
    pair_members = np.array(pairs, dtype=np.int64).reshape(-1, 2)
    pair_keys = encode_sets(pair_members, p)
    triple_keys = encode_sets(np.array(triples, dtype=np.int64).reshape(-1, 3), p)
    sorted_pairs, sorted_triples = np.unique(pair_keys), np.unique(triple_keys)
    trees, node_value = leaf_value_column(ens, output)
    cells = row_cells(ens, matrix)
    job = _ExactJob(ens=ens, cells=cells, node_value=node_value, links=parent_links(ens), pair_keys=sorted_pairs,
                    pair_members=decode_sets(sorted_pairs, p, 2), triple_keys=sorted_triples,
                    against_rest=bool(against_rest), masks=cells.valid[None])
    rest = np.zeros((p, n_rows))
    triple = np.zeros((sorted_triples.size, n_rows))
    main, linear, pieces = _run_exact_job(job, trees, n_jobs, f"H-statistics (exact, output {output})",
                                          progress, {"rest": rest, "triple": triple})
    leaves = ens.apply(matrix, checked=True)[:, trees]
    pair = _pair_sums(job, _joined_boxes(job, pieces), linear, 0, sorted_pairs.size)
    if against_rest and pieces:
        rest += _reached_leaf_sums(leaves, ens.n_nodes, *_joined([part["rest_leaf"] for part in pieces], 3), p)
    return ExactParts(
        main=main[..., 0].T,
        pair=pair[..., 0].T[:, np.searchsorted(sorted_pairs, pair_keys)],
        triple=triple.T[:, np.searchsorted(sorted_triples, triple_keys)],
        prediction=node_value[leaves].sum(axis=1),
        rest=rest.T,
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



def _duration_text(seconds: float) -> str:
    """A duration for people: ``"45 s"``, ``"12 min"``, ``"3 h 05 min"``."""
    if seconds < 60:
        return f"{seconds:.0f} s"
    if seconds < 3600:
        return f"{seconds / 60:.0f} min"
    hours, minutes = divmod(round(seconds / 60), 60)
    return f"{hours} h {minutes:02d} min"


def _warn_long_brute_force(n_sets: int, n_rows: int, seconds_for_rows: float, n_jobs: int) -> None:
    """Warn before starting when brute force is expected to take over :data:`BRUTE_NOTICE_SECONDS`.

    The estimate scales the time of predicting the rows once: every function
    predicts ``n_rows`` modified copies of the rows (``n_rows**2`` predictions),
    spread over ``n_jobs`` workers (negative counts as joblib reads them).
    """
    workers = max(1, (os.cpu_count() or 1) + 1 + n_jobs) if n_jobs < 0 else n_jobs
    estimate = seconds_for_rows * n_rows * n_sets / workers
    if estimate > BRUTE_NOTICE_SECONDS:
        warnings.warn(
            f"brute-force partial dependence: {n_sets:,} functions of {n_rows:,}² predictions each, estimated "
            f"{_duration_text(estimate)} on this machine (probability scale and callables have no exact form; a "
            "smaller sample shortens it quadratically)", UserWarning, stacklevel=4)


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
    started = time.perf_counter()
    prediction = model_output(predict(data.frame if data.frame is not None else data.matrix), data.n_rows, output)
    _warn_long_brute_force(len(sets), data.n_rows, time.perf_counter() - started, n_jobs)
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


# --------------------------------------------------------------------------- exact engine on row subsets
def _subset_masks(subsets: np.ndarray, n_words: int) -> np.ndarray:
    """(k, n_words) uint64 row sets of a boolean (k, n_rows) matrix (bit ``i % 64`` of word ``i // 64`` is row ``i``)."""
    n_sets, n_rows = subsets.shape
    bits = np.zeros((n_sets, n_words * 64), dtype=np.uint64)
    bits[:, :n_rows] = subsets
    bits = bits.reshape(n_sets, n_words, 64) << np.arange(64, dtype=np.uint64)
    return np.bitwise_or.reduce(bits, axis=2)


@dataclass(frozen=True)
class SubsetLayout:
    """The (row, subset) entries of many row subsets, subset by subset, rows ascending within each.

    Per-row values of every subset are kept at these entries only (a row
    outside a subset has no value there), so the sums per subset are sums over
    consecutive entries.
    """

    row: np.ndarray     # (n_entries,) the row of each entry
    subset: np.ndarray  # (n_entries,) its subset
    start: np.ndarray   # (k,) first entry of each subset
    size: np.ndarray    # (k,) rows in each subset

    @classmethod
    def of(cls, subsets: np.ndarray) -> SubsetLayout:
        """The layout of a boolean (k, n_rows) matrix (row ``i`` is in subset ``b`` when ``subsets[b, i]``)."""
        subset, row = np.nonzero(subsets)
        size = subsets.sum(axis=1)
        return cls(row=row, subset=subset, start=np.cumsum(size) - size, size=size)


@dataclass(frozen=True)
class SubsetParts:
    """Per-entry pieces of the partial dependence functions on many row subsets (:func:`exact_subset_parts`).

    Attributes
    ----------
    layout : SubsetLayout
        The (row, subset) entries the values stand at.
    main : ndarray (p, n_entries)
        ``F_j`` of every feature ``j`` of the pairs, each entry in its own subset's function (0 for the
        other features: leaves splitting on none of the pairs' features are not walked).
    members : ndarray (n_unique_pairs, 2)
        The distinct pairs asked for (ascending features).
    blocks : iterator of (ndarray of int, ndarray (n_block, n_entries))
        Positions in ``members`` and ``F_jk - F_j - F_k`` of those pairs, block
        by block so that all pairs need not be held at once.

    Every value is uncentred, exact up to an additive constant per (function, subset).
    """

    layout: SubsetLayout
    main: np.ndarray
    members: np.ndarray
    blocks: Iterator[tuple[np.ndarray, np.ndarray]]


# Floats in one batch of padded pair grids (k columns each): a few MB, so that the running sums stay in cache.
SUBSET_GRID_BUDGET = 2**21


def _linear_corners(job: _ExactJob, linear: np.ndarray) -> dict:
    """The summed jumps of the pairs' linear terms as boxes with one corner (no upper ends).

    A jump of the step function of side ``a`` at cell ``c`` adds its weight to
    every row whose cell on ``a`` is ``c`` or above, whatever its cell on ``b``:
    in the pair's grid, one corner at (``c``, 0), and likewise (0, ``c``) for
    side ``b``. Returns ``pair``, snapped ``a_low`` and ``b_low``, and ``weight``
    (n, k), the jumps read from ``linear`` (laid out at :attr:`_ExactJob.segment_offset`).
    """
    cells, offset = job.cells, job.segment_offset
    position = np.flatnonzero(np.any(linear != 0, axis=1))
    segment = np.searchsorted(offset, position, side="right") - 1
    pair, side = segment // 2, segment % 2
    coordinate = cells.snap[cells.snap_offset[job.pair_members[pair, side]] + position - offset[segment]]
    zero = np.zeros_like(coordinate)
    return {"pair": pair, "a_low": np.where(side == 0, coordinate, zero),
            "b_low": np.where(side == 1, coordinate, zero), "weight": linear[position]}


def _box_corners(boxes: dict) -> dict:
    """The signed corners of every box, box by box, as (``pair``, ``a``, ``b``, ``sign``, ``box``) arrays: four
    per box, or one (at ``a_low``, ``b_low``) for boxes without upper ends (the linear terms' jumps)."""
    n_boxes = boxes["pair"].size
    if "a_high" not in boxes:
        return {"pair": boxes["pair"], "a": boxes["a_low"], "b": boxes["b_low"], "sign": np.ones(n_boxes),
                "box": np.arange(n_boxes)}
    pick = {"a": ("a_low", "a_high", "a_low", "a_high"), "b": ("b_low", "b_low", "b_high", "b_high")}
    corners = {axis: np.column_stack([boxes[name] for name in names]).ravel() for axis, names in pick.items()}
    return {"pair": np.repeat(boxes["pair"], 4), **corners, "sign": np.tile([1.0, -1.0, -1.0, 1.0], n_boxes),
            "box": np.repeat(np.arange(n_boxes), 4)}


def _corner_lines(corners: list[dict], n_pairs: int, span: int) -> tuple[np.ndarray, np.ndarray]:
    """(n_pairs, span) per axis: how many of the pair's distinct corner coordinates lie at or below each snapped
    coordinate; a row's grid line is that count at its own coordinate (line 0: below every corner)."""
    a_lines, b_lines = (_coordinate_counts([(part["pair"], part[axis]) for part in corners], n_pairs, span)
                        for axis in ("a", "b"))
    return a_lines, b_lines


def _grid_batches(height: np.ndarray, width: np.ndarray, n_sets: int) -> tuple[np.ndarray, list[int]]:
    """Pairs in order of grid size and the cuts of that order into batches whose padded grids (the largest height
    times the largest width, ``n_sets`` columns) hold about :data:`SUBSET_GRID_BUDGET` floats."""
    order = np.lexsort((width, height))
    cuts, start, widest = [0], 0, 0
    for position, pair in enumerate(order):
        widest = max(widest, int(width[pair]))
        if position > start and (position + 1 - start) * int(height[pair]) * widest * n_sets > SUBSET_GRID_BUDGET:
            cuts.append(position)
            start, widest = position, int(width[pair])
    return order, cuts + [order.size]


def _corner_grid_sums(shape: tuple[int, int], lines: tuple[np.ndarray, np.ndarray], rows: tuple[np.ndarray, np.ndarray],
                     corners: dict, weights: np.ndarray, layout: SubsetLayout) -> np.ndarray:
    """(n_pairs, n_entries): per pair, the sum of the weights of its corners at or below each entry's row on
    both axes, in that entry's subset column.

    ``shape`` is the padded (height, width) of the batch's grids, ``lines``
    the pairs' :func:`_corner_lines`, ``rows`` the rows' grid lines on each
    axis (n_pairs, n_rows), ``corners`` the batch's corners (``pair`` numbered
    within the batch, snapped ``a`` and ``b``, ``sign``, and ``box``: their row
    of ``weights`` (n, k)). One sparse product puts the signed weights on the
    grids; the grids of the batch are padded to one height and width and laid
    out (height, width, pair, subset), so each running sum is one vector
    addition per grid line for all pairs and subsets at once (the second after
    a transposed copy).
    """
    a_lines, b_lines = lines
    n_pairs, n_sets = a_lines.shape[0], weights.shape[1]
    height, width = shape
    pair = corners["pair"]
    cell = (a_lines[pair, corners["a"]] * width + b_lines[pair, corners["b"]]) * n_pairs + pair
    # Corners come box by box: their columns need no sorting.
    starts = np.searchsorted(corners["box"], np.arange(weights.shape[0] + 1))
    spread = csc_matrix((corners["sign"], cell, starts), shape=(height * width * n_pairs, weights.shape[0]))
    grid = np.asarray(spread @ weights).reshape(height, width, -1)
    for line in range(1, height):
        grid[line] += grid[line - 1]
    # Along the second axis after a transposed copy: adding whole lines is several times faster than strided ones.
    grid = np.ascontiguousarray(grid.transpose(1, 0, 2))
    for line in range(1, width):
        grid[line] += grid[line - 1]
    a_row, b_row = rows
    base = ((b_row * height + a_row) * n_pairs + np.arange(n_pairs)[:, None]) * n_sets
    return grid.ravel()[base[:, layout.row] + layout.subset]


def _chunk_corners(boxes: dict, rank: np.ndarray, ends: tuple[np.ndarray, np.ndarray]) -> dict:
    """One chunk's boxes as corners sorted by the rank of their pair (the batch order), without the corners at
    a feature's end (no row lies at or above it); ``weight`` holds the boxes' weights in the same order and
    ``box_rank`` their ranks, ``box`` points each corner to its box."""
    order = np.argsort(rank[boxes["pair"]], kind="stable")
    boxes = {name: values[order] for name, values in boxes.items()}
    corners = _box_corners(boxes)
    keep = (corners["a"] < ends[0][corners["pair"]]) & (corners["b"] < ends[1][corners["pair"]])
    corners = {name: values[keep] for name, values in corners.items()}
    corners["rank"] = rank[corners.pop("pair")]
    return {"corners": corners, "weight": boxes["weight"], "box_rank": rank[boxes["pair"]]}


def _batch_corners(chunks: list[dict], bounds: tuple[int, int]) -> tuple[dict, np.ndarray]:
    """The corners (``pair`` numbered from 0 within the batch) and weight rows of batch ranks ``bounds``."""
    parts, weights, start = [], [], 0
    for chunk in chunks:
        low, high = np.searchsorted(chunk["corners"]["rank"], bounds)
        first, last = np.searchsorted(chunk["box_rank"], bounds)
        part = {name: values[low:high] for name, values in chunk["corners"].items()}
        part["box"] = part["box"] - first + start
        parts.append(part)
        weights.append(chunk["weight"][first:last])
        start += last - first
    corners = {name: np.concatenate([part[name] for part in parts]) for name in parts[0]}
    corners["pair"] = corners.pop("rank") - bounds[0]
    return corners, np.concatenate(weights)


def exact_subset_parts(
    ens: ForestGraph,
    matrix: np.ndarray,
    output: int,
    pairs: Sequence[tuple[int, int]],
    subsets: np.ndarray,
    *,
    progress: bool | None = None,
) -> SubsetParts:
    """The exact engine for many row subsets at once: ``F_j`` and ``F_jk - F_j - F_k`` at each subset's rows.

    Row subset ``b`` (row ``i`` is in it when ``subsets[b, i]``) is both the
    background and the evaluation rows of its own partial dependence functions,
    as if :func:`exact_parts` ran on ``matrix[subsets[b]]``. Everything that does
    not depend on which rows are in a subset (the rows' cells, the path
    tables, which rows fail which conditions, the boxes of every pair and their
    grids' lines) is built once; the shares ``w_L(S)`` are counted per subset (a
    popcount of the failure row sets AND the subset, every subset in one pass
    over the words), and every weight, running sum and grid carries one column
    per subset. Values are read only at the rows of their own subset
    (:class:`SubsetLayout`).

    Returns
    -------
    SubsetParts
    """
    p, n_rows = ens.n_features, matrix.shape[0]
    subsets = np.asarray(subsets, dtype=bool).reshape(-1, n_rows)
    layout = SubsetLayout.of(subsets)
    keys = np.unique(encode_sets(np.array(pairs, dtype=np.int64).reshape(-1, 2), p))
    members = decode_sets(keys, p, 2)
    trees, node_value = leaf_value_column(ens, output)
    cells = row_cells(ens, matrix)
    job = _ExactJob(ens=ens, cells=cells, node_value=node_value, links=parent_links(ens), pair_keys=keys,
                    pair_members=members, triple_keys=np.zeros(0, dtype=np.int64), against_rest=False,
                    masks=_subset_masks(subsets, cells.n_words), features=np.isin(np.arange(p), members))
    main, linear, pieces = _run_exact_job(job, trees, 1, f"resampling (exact, output {output})", progress, {})
    main = main[:, layout.row, layout.subset]
    # The boxes of the product terms, chunk by chunk, and the linear terms' jumps as one-corner boxes.
    boxes = [piece["boxes"] for piece in pieces if piece["boxes"] is not None and piece["boxes"]["pair"].size]
    boxes.append(_linear_corners(job, linear))
    del pieces, linear
    # Snapped coordinates run from 0 to the occupied cell count of the feature (its end).
    occupied = cells.snap[cells.snap_offset[1:] - 1]
    ends = (occupied[members[:, 0]], occupied[members[:, 1]])
    a_lines, b_lines = _corner_lines([_box_corners(part) for part in boxes], keys.size, int(occupied.max()) + 1)
    # Lines up to the last occupied coordinate: corners at the end are dropped, as no row reaches them.
    height = np.take_along_axis(a_lines, ends[0][:, None] - 1, axis=1)[:, 0] + 1
    width = np.take_along_axis(b_lines, ends[1][:, None] - 1, axis=1)[:, 0] + 1
    order, cuts = _grid_batches(height, width, subsets.shape[0])
    rank = np.empty(keys.size, dtype=np.int64)
    rank[order] = np.arange(keys.size)
    chunks = [_chunk_corners(part, rank, ends) for part in boxes]
    del boxes

    def blocks() -> Iterator[tuple[np.ndarray, np.ndarray]]:
        for low, high in zip(cuts[:-1], cuts[1:], strict=True):
            chosen = order[low:high]
            lines = (a_lines[chosen], b_lines[chosen])
            rows = (np.take_along_axis(lines[0], cells.rank[members[chosen, 0]], axis=1),
                    np.take_along_axis(lines[1], cells.rank[members[chosen, 1]], axis=1))
            shape = (int(height[chosen].max()), int(width[chosen].max()))
            yield chosen, _corner_grid_sums(shape, lines, rows, *_batch_corners(chunks, (low, high)), layout)

    return SubsetParts(layout=layout, main=main, members=members, blocks=blocks())
