"""Interaction structure of a fitted tree ensemble, read from its trees alone.

Every root-to-leaf path of a regression tree is a conjunction of conditions on
the features it splits on, so the leaf's value can depend jointly on those
features and on no others: a path that splits on ``k`` distinct features can
express at most a ``k``-way interaction ([1]_, section 5; [2]_, section 8).
Counting, over all paths of all trees, which feature sets occur together, and
weighting them by the training mass the paths route (cover) and by the loss
reduction of the splits made inside regions the other members already cut
(nested gain), shows which interactions the fitted model *can* use and how
much of its fit happened inside them. No data are needed: gain and cover
are stored in the model ([3]_, [4]_).

This is a structural reading. A pair that co-occurs on many paths is a pair
the model is able to combine, not proof that the prediction varies jointly in
it (a later split may leave the function additive); the data-based
H-statistics of :mod:`treeprobe` measure that. Neither says anything about the
world: a model's interactions are not the data-generating process's, and
structure is not causation.

References
----------
.. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", The Annals of Applied Statistics 2(3), 916-954, 2008.
.. [2] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", The Annals of Statistics 29(5), 1189-1232, 2001.
.. [3] T. Chen and C. Guestrin, "XGBoost: a scalable tree boosting system",
   KDD 2016 (gain, equation 7; cover as the hessian sum).
.. [4] G. Ke et al., "LightGBM: a highly efficient gradient boosting decision
   tree", NeurIPS 2017.
"""

from __future__ import annotations

import string
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .checks import check_int
from .errors import ParameterError
from .graph import ForestGraph
from .io import load_model
from .paths import (
    ancestor_masks,
    decode_sets,
    depth_levels,
    encode_sets_with,
    list_subsets,
    mask_member_lists,
    parent_links,
    tree_nodes,
)

__all__ = ["StructureResult", "structure", "structure_by_round", "MAX_ORDER", "LIMITS"]

MAX_ORDER = 8
_MEMBER_COLUMNS = tuple(f"feature_{letter}" for letter in string.ascii_lowercase[:MAX_ORDER])
_SET_COLUMNS = ("paths", "trees", "leaf_cover", "cover_share", "nested_gain", "first_level", "first_tree")
_FEATURE_COLUMNS = ("feature", "splits", "gain", "cover", "tree_openings", "mean_level", "leaf_paths", "first_tree")
# Nodes per walked chunk: bounds the (nodes x words) path masks and the subset
# expansion (at most C(depth, k) rows per distinct path) to tens of megabytes.
_CHUNK_NODES = 1 << 15
# Largest key space summed in a table indexed by the key (see _aggregate_chunk).
_DENSE_KEYS = 1 << 20
_SCHEMA = "treeprobe.structure/2"
LIMITS = (
    "Path co-occurrence shows which feature sets the trees can combine, not that the prediction varies jointly "
    "in them (check with the H-statistic); it describes the model, not the world, and is not causation."
)


# --------------------------------------------------------------------- validation
def _check_order(value: Any, name: str) -> int:
    return check_int(name, value, low=2, high=MAX_ORDER)


def _selected_trees(ensemble: ForestGraph, trees: Any, output: Any) -> np.ndarray:
    """Original indices of the walked trees, ascending."""
    n_trees = ensemble.n_trees
    if trees is None:
        chosen = np.arange(n_trees)
    elif isinstance(trees, (slice, range)):
        chosen = np.arange(n_trees)[trees]
    else:
        raw = np.asarray(trees)
        if raw.ndim != 1 or not (np.issubdtype(raw.dtype, np.integer) or raw.size == 0):
            raise ParameterError(f"trees must be a slice, a range or a 1-D sequence of tree indices, got {trees!r}")
        chosen = raw.astype(np.int64)
        bad = (chosen < 0) | (chosen >= n_trees)
        if bad.any():
            raise ParameterError(f"trees holds index {int(chosen[bad][0])}; the model has trees 0..{n_trees - 1}")
        if np.unique(chosen).size != chosen.size:
            raise ParameterError("trees lists a tree more than once; each tree can be walked once")
    if output is not None:
        if isinstance(output, (bool, np.bool_)) or not isinstance(output, (int, np.integer)):
            raise ParameterError(f"output must be an integer output index or None, got {output!r}")
        if not 0 <= output < ensemble.n_outputs:
            raise ParameterError(f"output must lie in 0..{ensemble.n_outputs - 1}, got {output}")
        chosen = np.intersect1d(chosen, ensemble.trees_of_output(int(output)))
    chosen = np.sort(chosen)
    if chosen.size == 0:
        raise ParameterError(f"the selection trees={trees!r}, output={output!r} holds no tree of the model's {n_trees}")
    return chosen


# --------------------------------------------------------------------- helpers
def _group_sorted(columns: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sort rows of a 2-D unsigned array; return the order and the start of every group of equal rows."""
    order = np.lexsort(columns.T[::-1])
    ordered = columns[order]
    new = np.ones(len(order), dtype=bool)
    new[1:] = np.any(ordered[1:] != ordered[:-1], axis=1)
    return order, np.flatnonzero(new)


@dataclass
class _SetRecords:
    """Partial sums for feature sets of one order, keyed by (set key, bucket)."""

    key: np.ndarray
    bucket: np.ndarray
    paths: np.ndarray
    leaf_cover: np.ndarray
    nested_gain: np.ndarray
    first_level: np.ndarray
    trees: np.ndarray
    first_position: np.ndarray

    @classmethod
    def concat(cls, parts: list[_SetRecords]) -> _SetRecords:
        if not parts:
            empty_i, empty_f = np.zeros(0, np.int64), np.zeros(0)
            return cls(empty_i, empty_i, empty_i, empty_f, empty_f, empty_i, empty_i, empty_i)
        return cls(*(np.concatenate([getattr(p, name) for p in parts]) for name in cls.__dataclass_fields__))

    def combined(self) -> _SetRecords:
        """Merge rows with equal (key, bucket); tree counts add because chunks hold disjoint trees."""
        if self.key.size == 0:
            return self
        if self.bucket.min() == self.bucket.max():
            order = np.argsort(self.key)
            starts = np.flatnonzero(np.diff(self.key[order], prepend=-1))
        else:
            order, starts = _group_sorted(np.column_stack([self.key, self.bucket]).astype(np.uint64))
        return _SetRecords(
            key=self.key[order][starts],
            bucket=self.bucket[order][starts],
            paths=np.add.reduceat(self.paths[order], starts),
            leaf_cover=np.add.reduceat(self.leaf_cover[order], starts),
            nested_gain=np.add.reduceat(self.nested_gain[order], starts),
            first_level=np.minimum.reduceat(self.first_level[order], starts),
            trees=np.add.reduceat(self.trees[order], starts),
            first_position=np.minimum.reduceat(self.first_position[order], starts),
        )


def _tree_runs(key: np.ndarray, position: np.ndarray, n_keys: int) -> tuple[np.ndarray, np.ndarray]:
    """Sort rows by (key, position); return the order and the start of every run of one (key, position).

    Both are packed into one int64 (``key * 2**b + position``) when that cannot
    overflow, so one integer sort does the work of a lexicographic one.
    """
    first = int(position.min())
    shift = (int(position.max()) - first).bit_length()
    if n_keys << shift < 2**63:
        packed = (key << shift) | (position - first)
        order = np.argsort(packed)
        ordered = packed[order]
        return order, np.flatnonzero(np.diff(ordered, prepend=-1))
    order = np.lexsort((position, key))
    new = np.ones(order.size, dtype=bool)
    new[1:] = (key[order][1:] != key[order][:-1]) | (position[order][1:] != position[order][:-1])
    return order, np.flatnonzero(new)


def _aggregate_chunk(key, bucket_of_position, position, paths, leaf_cover, nested_gain, depth,
                     n_keys) -> _SetRecords:
    """Sum per (set, bucket) and count the distinct trees behind each.

    ``n_keys`` bounds the keys. When the chunk's trees share one bucket and the
    key space is small (at most ``_DENSE_KEYS`` and a few times the row
    count), sums and minima are taken over the keys directly (``bincount``)
    and only the packed (key, position) integers are sorted, to count trees;
    otherwise rows are sorted on (key, position) and summed in runs (buckets
    never decrease with the position, so runs of one set are runs of its
    buckets).
    """
    if key.size == 0:
        return _SetRecords.concat([])
    first, last = int(position.min()), int(position.max())
    one_bucket = bucket_of_position[first] == bucket_of_position[last]
    if one_bucket and n_keys <= min(_DENSE_KEYS, 8 * key.size):
        return _dense_aggregate(key, position, paths, leaf_cover, nested_gain, depth, n_keys,
                                int(bucket_of_position[first]))
    order, tree_start = _tree_runs(key, position, n_keys)
    tree_key = key[order][tree_start]
    tree_position = position[order][tree_start]
    tree_bucket = bucket_of_position[tree_position]
    group = np.ones(tree_start.size, dtype=bool)
    group[1:] = (tree_key[1:] != tree_key[:-1]) | (tree_bucket[1:] != tree_bucket[:-1])
    group_start = np.flatnonzero(group)
    starts = tree_start[group_start]
    return _SetRecords(
        key=tree_key[group_start],
        bucket=tree_bucket[group_start],
        paths=np.add.reduceat(paths[order], starts),
        leaf_cover=np.add.reduceat(leaf_cover[order], starts),
        nested_gain=np.add.reduceat(nested_gain[order], starts),
        first_level=np.minimum.reduceat(depth[order], starts),
        trees=np.diff(np.append(group_start, tree_start.size)),
        first_position=tree_position[group_start],
    )


def _dense_aggregate(key, position, paths, leaf_cover, nested_gain, depth, n_keys, bucket) -> _SetRecords:
    """:func:`_aggregate_chunk` for one bucket and a small key space: tables indexed by the key itself."""
    first = int(position.min())
    shift = (int(position.max()) - first).bit_length()
    pairs = np.sort((key << shift) | (position - first))
    pairs = pairs[np.flatnonzero(np.diff(pairs, prepend=-1))]
    tree_key = pairs >> shift
    run = np.flatnonzero(np.diff(tree_key, prepend=-1))
    present = tree_key[run]
    lowest = np.full(n_keys, np.iinfo(np.int64).max)
    np.minimum.at(lowest, key, depth)
    return _SetRecords(
        key=present,
        bucket=np.full(present.size, bucket, dtype=np.int64),
        paths=np.bincount(key, weights=paths, minlength=n_keys)[present].astype(np.int64),
        leaf_cover=np.bincount(key, weights=leaf_cover, minlength=n_keys)[present],
        nested_gain=np.bincount(key, weights=nested_gain, minlength=n_keys)[present],
        first_level=lowest[present],
        trees=np.diff(np.append(run, tree_key.size)),
        first_position=(pairs[run] & ((1 << shift) - 1)) + first,
    )


def _leaf_weights(ensemble: ForestGraph, leaves: np.ndarray) -> tuple[np.ndarray, str]:
    cover = ensemble.cover[leaves]
    if np.all(np.isfinite(cover)):
        return cover, "cover"
    samples = ensemble.n_samples[leaves]
    if np.all(np.isfinite(samples)):
        return samples, "n_samples"
    return np.full(leaves.size, np.nan), "unknown"


def _local_index(nodes: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """Positions in ``nodes`` (ascending node indices) of the nodes ``targets``; only meaningful where they occur."""
    if nodes.size and nodes[-1] - nodes[0] == nodes.size - 1:
        return targets - nodes[0]
    return np.searchsorted(nodes, targets)


def _subtree_totals(
    ensemble: ForestGraph, nodes: np.ndarray, is_leaf: np.ndarray, levels: list[np.ndarray]
) -> tuple[np.ndarray, np.ndarray]:
    """Leaf count and leaf weight below every node of a chunk of whole trees, bottom-up."""
    below_leaves = is_leaf.astype(np.int64)
    below_weight = np.zeros(nodes.size)
    below_weight[is_leaf] = _leaf_weights(ensemble, nodes[is_leaf])[0]
    local_left = _local_index(nodes, ensemble.left[nodes])
    local_right = _local_index(nodes, ensemble.right[nodes])
    for members in levels[-2::-1]:
        inner = members[~is_leaf[members]]
        below_leaves[inner] = below_leaves[local_left[inner]] + below_leaves[local_right[inner]]
        below_weight[inner] = below_weight[local_left[inner]] + below_weight[local_right[inner]]
    return below_leaves, below_weight


@dataclass
class _SplitNodes:
    """What every split node of one chunk adds to the feature sets it closes.

    ``others`` lists (left-aligned, ``n_others`` per row) the features of the
    node's strict ancestors other than its own. ``leaves`` and ``weight`` are
    the subtree's leaf count and leaf weight where the feature completes on
    the path (it is not among the ancestors), else 0; ``leaf_paths`` is per
    used feature.
    """

    position: np.ndarray
    feature: np.ndarray
    gain: np.ndarray
    leaves: np.ndarray
    weight: np.ndarray
    depth: np.ndarray
    others: np.ndarray
    n_others: np.ndarray
    leaf_paths: np.ndarray

    @classmethod
    def of_chunk(cls, ensemble, nodes, node_position, rank, masks, below_leaves, below_weight, n_used) -> _SplitNodes:
        one = np.uint64(1)
        split_nodes = np.flatnonzero(rank >= 0)
        split_rank = rank[split_nodes]
        word, bit = split_rank >> 6, one << (split_rank & 63).astype(np.uint64)
        ancestors = masks[split_nodes]
        row = np.arange(split_nodes.size)
        completes = (ancestors[row, word] & bit) == 0
        ancestors[row, word] &= ~bit
        leaves = np.where(completes, below_leaves[split_nodes], 0)
        others, n_others = mask_member_lists(ancestors)
        return cls(
            position=node_position[split_nodes],
            feature=split_rank,
            gain=np.nan_to_num(ensemble.gain[nodes[split_nodes]]),
            leaves=leaves,
            weight=np.where(completes, below_weight[split_nodes], 0.0),
            depth=ensemble.depth[nodes[split_nodes]].astype(np.int64) + 1,
            others=others,
            n_others=n_others,
            leaf_paths=np.bincount(split_rank, weights=leaves, minlength=n_used).astype(np.int64),
        )

    def records(self, size: int, bucket_of_position: np.ndarray, n_used: int) -> _SetRecords:
        """Records of the ``size``-sets ``{feature} + T``, ``T`` among the other ancestor features, of every node."""
        owner, subsets = list_subsets(self.others, self.n_others, size - 1)
        return _aggregate_chunk(
            key=encode_sets_with(subsets, self.feature[owner], n_used),
            bucket_of_position=bucket_of_position,
            position=self.position[owner],
            paths=self.leaves[owner],
            leaf_cover=self.weight[owner],
            nested_gain=self.gain[owner],
            depth=self.depth[owner],
            n_keys=n_used**size,
        )


def _walk(
    ensemble: ForestGraph,
    walked: np.ndarray,
    bucket_of_position: np.ndarray,
    max_order: int,
    feature_rank: np.ndarray,
    n_used: int,
) -> tuple[dict[int, _SetRecords], np.ndarray]:
    """Walk the trees ``walked`` (original indices) in chunks and collect set records per order.

    Every set is counted from the split nodes alone. A split node ``s`` on ``j``
    with ancestor features ``A(s)`` adds its gain to every set ``{j} + T``,
    ``T`` a subset of ``A(s) - {j}``; when ``j`` is not in ``A(s)`` it is the
    node where those sets first complete on the paths through it, so it also
    adds the leaf count and leaf weight of its subtree (each leaf has exactly
    one such completing ancestor per set).

    Returns the records of every order 2..max_order and, per used feature (by rank),
    the number of leaves whose path splits on it.
    """
    parent, _ = parent_links(ensemble)
    sizes = (ensemble.tree_offsets[walked + 1] - ensemble.tree_offsets[walked]).astype(np.int64)
    chunk_of_tree = np.cumsum(sizes) // _CHUNK_NODES
    boundaries = np.append(np.flatnonzero(np.diff(chunk_of_tree, prepend=-1)), walked.size)
    parts: dict[int, list[_SetRecords]] = {k: [] for k in range(2, max_order + 1)}
    leaf_paths = np.zeros(n_used, dtype=np.int64)
    for first, stop in zip(boundaries[:-1], boundaries[1:], strict=True):
        positions = np.arange(first, stop)
        nodes = tree_nodes(ensemble, walked[positions])
        rank = np.where(ensemble.feature[nodes] >= 0, feature_rank[np.maximum(ensemble.feature[nodes], 0)], -1)
        levels = depth_levels(ensemble.depth[nodes])
        masks = ancestor_masks(_local_index(nodes, parent[nodes]), rank, levels, n_used)
        below_leaves, below_weight = _subtree_totals(ensemble, nodes, rank < 0, levels)
        split = _SplitNodes.of_chunk(ensemble, nodes, np.repeat(positions, sizes[positions]), rank, masks,
                                     below_leaves, below_weight, n_used)
        leaf_paths += split.leaf_paths
        if split.position.size == 0:
            continue
        for size in range(2, max_order + 1):
            parts[size].append(split.records(size, bucket_of_position, n_used))
    records = {size: _SetRecords.concat(chunks).combined() for size, chunks in parts.items()}
    return records, leaf_paths


def _prepare(ensemble: ForestGraph, walked: np.ndarray, max_order: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Dense ranks of the features the walked trees split on, so masks and keys stay small."""
    nodes = tree_nodes(ensemble, walked)
    used = np.unique(ensemble.feature[nodes][ensemble.feature[nodes] >= 0])
    rank = np.full(ensemble.n_features, -1, dtype=np.int64)
    rank[used] = np.arange(used.size)
    if used.size and float(used.size) ** max_order >= 2.0**62:
        raise ParameterError(
            f"max_order={max_order} is too high for {used.size} used features (set keys would overflow); lower it"
        )
    return used, rank, int(used.size)


def _set_frame(
    ensemble: ForestGraph,
    records: _SetRecords,
    used: np.ndarray,
    size: int,
    walked: np.ndarray,
    total_cover: float,
) -> pd.DataFrame:
    members = used[decode_sets(records.key, max(used.size, 1), size)] if records.key.size else np.zeros((0, size), np.int64)
    names = np.asarray(ensemble.feature_names, dtype=object)
    order = np.lexsort((records.key, -records.paths, -records.nested_gain))
    frame = {_MEMBER_COLUMNS[i]: names[members[order, i]] for i in range(size)}
    frame.update(
        paths=records.paths[order].astype(np.int64),
        trees=records.trees[order].astype(np.int64),
        leaf_cover=records.leaf_cover[order],
        cover_share=records.leaf_cover[order] / total_cover if total_cover > 0 else np.full(order.size, np.nan),
        nested_gain=records.nested_gain[order],
        first_level=records.first_level[order].astype(np.int64),
        first_tree=walked[records.first_position[order]].astype(np.int64),
    )
    table = pd.DataFrame(frame, columns=[*_MEMBER_COLUMNS[:size], *_SET_COLUMNS]).reset_index(drop=True)
    # Name columns get pandas' text dtype even when empty, so dtypes do not depend on the row count.
    return table.astype(dict.fromkeys(_MEMBER_COLUMNS[:size], "str"))


def _feature_frame(ensemble: ForestGraph, walked: np.ndarray, leaf_paths: np.ndarray, used: np.ndarray) -> pd.DataFrame:
    nodes = tree_nodes(ensemble, walked)
    position = np.repeat(np.arange(walked.size), np.diff(ensemble.tree_offsets)[walked])
    inner = ensemble.feature[nodes] >= 0
    split_nodes = nodes[inner]
    feature = ensemble.feature[split_nodes]
    k = ensemble.n_features
    splits = np.bincount(feature, minlength=k).astype(np.int64)
    depth_sum = np.bincount(feature, weights=ensemble.depth[split_nodes] + 1.0, minlength=k)
    roots = ensemble.feature[ensemble.tree_offsets[walked]]
    first_position = np.full(k, walked.size, dtype=np.int64)
    np.minimum.at(first_position, feature, position[inner])
    all_leaf_paths = np.zeros(k, dtype=np.int64)
    all_leaf_paths[used] = leaf_paths
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_level = np.where(splits > 0, depth_sum / np.maximum(splits, 1), np.nan)
    return pd.DataFrame(
        {
            "feature": list(ensemble.feature_names),
            "splits": splits,
            "gain": np.bincount(feature, weights=np.nan_to_num(ensemble.gain[split_nodes]), minlength=k),
            "cover": np.bincount(feature, weights=np.nan_to_num(ensemble.cover[split_nodes]), minlength=k),
            "tree_openings": np.bincount(roots[roots >= 0], minlength=k).astype(np.int64),
            "mean_level": mean_level,
            "leaf_paths": all_leaf_paths,
            "first_tree": np.where(splits > 0, np.append(walked, -1)[np.minimum(first_position, walked.size)], -1),
        },
        columns=list(_FEATURE_COLUMNS),
    )


def _total_leaf_cover(ensemble: ForestGraph, walked: np.ndarray) -> tuple[float, str, np.ndarray]:
    nodes = tree_nodes(ensemble, walked)
    leaves = nodes[ensemble.feature[nodes] < 0]
    weight, basis = _leaf_weights(ensemble, leaves)
    per_position = np.bincount(
        np.searchsorted(ensemble.tree_offsets[walked], leaves, side="right") - 1, weights=weight, minlength=walked.size
    )
    return float(weight.sum()), basis, per_position


def _json_records(frame: pd.DataFrame) -> list[dict]:
    out = []
    for row in frame.to_dict(orient="records"):
        clean = {}
        for name, value in row.items():
            if isinstance(value, (float, np.floating)):
                clean[name] = None if not np.isfinite(value) else float(value)
            elif isinstance(value, (np.integer, int)) and not isinstance(value, bool):
                clean[name] = int(value)
            else:
                clean[name] = value
        out.append(clean)
    return out


# --------------------------------------------------------------------- results
@dataclass(frozen=True, eq=False)
class StructureResult:
    """Path structure of the walked trees; see :func:`structure` for every column.

    Tables have the same columns whatever ``max_order`` (an empty ``triples``
    keeps its columns). ``==`` compares every table and fact.

    Attributes
    ----------
    features : DataFrame
        One row per model feature.
    pairs, triples : DataFrame
        One row per feature set of order 2 (3) that occurs on a root-to-leaf
        path; ``triples`` is empty when ``max_order`` is 2.
    sets : dict of int to DataFrame
        Tables of orders 4..``max_order`` (empty dict when ``max_order <= 3``).
    ensemble_summary : dict
        ``ForestGraph.summary()`` of the whole model.
    n_trees_walked : int
        Number of trees walked.
    tree_indices : ndarray of int64
        Original indices of the walked trees, ascending.
    total_leaf_cover : float
        Sum of the leaf weights (see ``cover_basis``) over all walked leaves.
    cover_basis : {"cover", "n_samples", "unknown"}
        Leaf weight used for ``leaf_cover`` and ``cover_share``: the model's
        cover (hessian sum), the training row count when cover is not stored,
        or "unknown" (``leaf_cover`` and shares are NaN) when neither is.
    max_order : int
        Largest set order computed.
    """

    features: pd.DataFrame
    pairs: pd.DataFrame
    triples: pd.DataFrame
    sets: dict = field(default_factory=dict)
    ensemble_summary: dict = field(default_factory=dict)
    n_trees_walked: int = 0
    tree_indices: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    total_leaf_cover: float = float("nan")
    cover_basis: str = "unknown"
    max_order: int = 2

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, StructureResult):
            return NotImplemented
        facts = ("ensemble_summary", "n_trees_walked", "cover_basis", "max_order")
        return (
            all(getattr(self, name) == getattr(other, name) for name in facts)
            and np.array_equal(self.tree_indices, other.tree_indices)
            and (self.total_leaf_cover == other.total_leaf_cover
                 or (np.isnan(self.total_leaf_cover) and np.isnan(other.total_leaf_cover)))
            and all(getattr(self, name).equals(getattr(other, name)) for name in ("features", "pairs", "triples"))
            and self.sets.keys() == other.sets.keys()
            and all(self.sets[k].equals(other.sets[k]) for k in self.sets)
        )

    __hash__ = None  # type: ignore[assignment]

    def table(self, order: int) -> pd.DataFrame:
        """The set table of one order (1 gives ``features``)."""
        if order == 1:
            return self.features
        if order == 2:
            return self.pairs
        if order == 3 and self.max_order >= 3:
            return self.triples
        if order in self.sets:
            return self.sets[order]
        raise ParameterError(f"order must lie in 1..{self.max_order} for this result, got {order!r}")

    def to_dict(self) -> dict:
        """A JSON-ready dict; see the schema in :func:`structure`."""
        total = self.total_leaf_cover
        return {
            "schema": _SCHEMA,
            "limits": LIMITS,
            "model": {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.ensemble_summary.items()},
            "max_order": self.max_order,
            "n_trees_walked": self.n_trees_walked,
            "tree_indices": [int(t) for t in self.tree_indices],
            "total_leaf_cover": float(total) if np.isfinite(total) else None,
            "cover_basis": self.cover_basis,
            "features": _json_records(self.features),
            "pairs": _json_records(self.pairs),
            "triples": _json_records(self.triples),
            "sets": {str(order): _json_records(frame) for order, frame in sorted(self.sets.items())},
        }


# --------------------------------------------------------------------- public API
def structure(
    ensemble: Any,
    *,
    max_order: int = 3,
    trees: slice | range | Sequence[int] | np.ndarray | None = None,
    output: int | None = None,
) -> StructureResult:
    """Which feature sets the trees combine on their root-to-leaf paths, and how much.

    Parameters
    ----------
    ensemble : ForestGraph or anything :func:`treeprobe.load_model` accepts
        The fitted model (a file path is parsed; no data are needed).
    max_order : int, default 3
        Largest feature-set size to count, 2..``MAX_ORDER``. The work grows as
        ``C(d, max_order)`` per distinct path, ``d`` = distinct features on it.
    trees : slice, range or sequence of int, optional
        Original indices of the trees to walk (e.g. ``slice(500, None)`` for
        the late rounds). Default: all trees.
    output : int, optional
        Walk only the trees that add to this raw output (one class of a
        multiclass model); combined with ``trees`` by intersection.

    Returns
    -------
    StructureResult
        With the tables below. Depths count splits: the root split has depth 1,
        so a node's depth is ``ForestGraph.depth + 1``. Gains that the model
        does not store (NaN) count as 0. Trees are walked in ascending index
        order; ``first_tree`` is always an original tree index.

        ``features`` (one row per model feature ``j``, model order):

        - ``feature``: name; ``splits``: number of split nodes on ``j``;
        - ``gain`` = sum of ``gain`` over those nodes, ``cover`` = sum of their
          ``cover``: equal to ``ForestGraph.feature_totals()`` on the walked
          trees (XGBoost ``get_score`` weight/total_gain/total_cover, LightGBM
          ``feature_importance`` split/gain);
        - ``tree_openings``: number of walked trees whose root splits on ``j``;
        - ``mean_level``: mean depth of the split nodes on ``j`` (NaN if unused);
        - ``leaf_paths``: number of leaves whose root path splits on ``j``;
        - ``first_tree``: smallest tree index with a split on ``j`` (-1 if unused).

        ``pairs``, ``triples`` and ``sets[k]`` (one row per feature set ``S``
        of that size occurring on at least one root-to-leaf path; members in
        columns ``feature_a``, ``feature_b``, ... in model feature order):

        - ``paths`` = #{leaves ``l`` : ``S`` is a subset of ``F(l)``}, where
          ``F(l)`` is the set of features split on between the root and ``l``;
        - ``trees`` = number of trees holding such a leaf;
        - ``leaf_cover`` = sum of ``w(l)`` over those leaves, ``w`` = leaf
          cover (``cover_basis``);
        - ``cover_share`` = ``leaf_cover / total_leaf_cover``: the share of the
          training mass routed through splits on every member of ``S``;
        - ``nested_gain`` = sum of ``gain(s)`` over split nodes ``s`` with
          feature ``j(s)`` in ``S`` and ``S - {j(s)}`` a subset of ``A(s)``, the
          features of the strict ancestors of ``s``: the loss reduction earned
          inside regions the other members already cut (each node counted
          once per set);
        - ``first_level``: smallest depth of such a node ``s``, i.e. the depth at
          which ``S`` first completes on a path (always >= ``len(S)``);
        - ``first_tree``: smallest tree index holding a path through ``S``.

        Rows are sorted by ``nested_gain`` descending, then ``paths``
        descending.

    Raises
    ------
    ParameterError
        For an invalid ``max_order``, ``trees`` or ``output``.
    ModelFormatError
        When ``ensemble`` is a model file or object that cannot be read.

    Notes
    -----
    A leaf's value is a function of the features in ``F(l)`` only, so the
    tree's prediction is a sum of indicator products over these sets: a set
    that never occurs on a path is an interaction the model cannot express
    ([1]_, eq. 34-35 for the rule form of a path). The counts are a reading of
    the fitted structure, not an effect size: a set can co-occur on a path
    while the fitted function stays additive in it, so confirm with the
    H-statistic, and remember that a model's interactions are not the
    world's.

    The walk is vectorised and reads every set from the split nodes alone:
    per chunk of trees, every node's ancestor feature set is propagated level
    by level as a uint64 bitmask and every subtree's leaf count and leaf
    weight bottom-up; each split node's other ancestor features are read off
    its mask and expanded once into the sets it closes, each set identified
    by one integer key. Sums per set are ``bincount`` tables indexed by the
    key when the key space is small, sorted runs otherwise; distinct trees
    per set come from one sort of (key, tree) packed into an integer. A node
    whose feature is not yet on its path is the unique place where each of
    its sets completes for the leaves below it, which gives ``paths`` and
    ``leaf_cover`` without expanding leaves. Memory stays bounded by walking
    ``_CHUNK_NODES`` nodes at a time.

    ``to_dict()`` returns ``{"schema": "treeprobe.structure/2", "limits":
    LIMITS (one-sentence caveat for readers), "model":
    summary dict, "max_order": int, "n_trees_walked": int, "tree_indices":
    [int], "total_leaf_cover": float or null, "cover_basis": str, "features":
    [row], "pairs": [row], "triples": [row], "sets": {"4": [row], ...}}``,
    each ``row`` a dict of the table's columns, NaN written as null.

    References
    ----------
    .. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
       ensembles", The Annals of Applied Statistics 2(3), 916-954, 2008.

    Examples
    --------
    One tree: the root splits on ``fuel_price``, its left child on
    ``shift_length``; leaves 2, 3 and 4 carry cover 30, 20 and 50.

    >>> from treeprobe.graph import ForestGraph
    >>> ens = ForestGraph.from_arrays(
    ...     feature=[0, 1, -1, -1, -1], threshold=[0.5, 2.0, 0, 0, 0],
    ...     left=[1, 2, -1, -1, -1], right=[4, 3, -1, -1, -1],
    ...     value=[0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 5],
    ...     gain=[10.0, 4.0, 0, 0, 0], cover=[100.0, 50.0, 30.0, 20.0, 50.0],
    ...     feature_names=["fuel_price", "shift_length"])
    >>> result = structure(ens, max_order=2)
    >>> result.pairs[["feature_a", "feature_b", "paths", "cover_share", "nested_gain", "first_level"]]
        feature_a     feature_b  paths  cover_share  nested_gain  first_level
    0  fuel_price  shift_length      2          0.5          4.0            2
    """
    ensemble = load_model(ensemble)
    max_order = _check_order(max_order, "max_order")
    walked = _selected_trees(ensemble, trees, output)
    used, rank, n_used = _prepare(ensemble, walked, max_order)
    total_cover, basis, _ = _total_leaf_cover(ensemble, walked)
    records, leaf_paths = _walk(ensemble, walked, np.zeros(walked.size, np.int64), max_order, rank, n_used)
    share_total = total_cover if basis != "unknown" else float("nan")
    records.setdefault(3, _SetRecords.concat([]))
    tables = {size: _set_frame(ensemble, records[size], used, size, walked, share_total) for size in records}
    return StructureResult(
        features=_feature_frame(ensemble, walked, leaf_paths, used),
        pairs=tables[2],
        triples=tables[3],
        sets={size: frame for size, frame in tables.items() if size > 3},
        ensemble_summary=ensemble.summary(),
        n_trees_walked=int(walked.size),
        tree_indices=walked,
        total_leaf_cover=share_total,
        cover_basis=basis,
        max_order=max_order,
    )


def _trees_per_round(ensemble: ForestGraph) -> int:
    per_class = ensemble.n_outputs > 1 and bool(np.all(ensemble.output_of_tree >= 0))
    parallel = ensemble.trees_per_round
    return (ensemble.n_outputs if per_class else 1) * max(parallel, 1)


def _cumulative_frame(
    rec: _SetRecords,
    size: int,
    max_order: int,
    used: np.ndarray,
    names: np.ndarray,
    checkpoint_round: np.ndarray,
    total_by_checkpoint: np.ndarray,
    round_of_position: np.ndarray,
) -> pd.DataFrame:
    """Rows (checkpoint, set present by then) of one order, sums accumulated over the checkpoints."""
    set_ids, set_of_row = np.unique(rec.key, return_inverse=True)
    dense = {}
    for name in ("paths", "trees", "leaf_cover", "nested_gain"):
        grid = np.zeros((set_ids.size, checkpoint_round.size))
        grid[set_of_row, rec.bucket] = getattr(rec, name)
        dense[name] = np.cumsum(grid, axis=1)
    # Every set has at least one record, so the minimum always replaces the start value.
    first_position = np.full(set_ids.size, round_of_position.size - 1, dtype=np.int64)
    np.minimum.at(first_position, set_of_row, rec.first_position)
    present_set, present_check = np.nonzero(dense["paths"] > 0)
    members = used[decode_sets(set_ids, max(used.size, 1), size)][present_set]
    frame = {"round": checkpoint_round[present_check], "order": np.full(present_set.size, size)}
    for i, column in enumerate(_MEMBER_COLUMNS[:max_order]):
        frame[column] = names[members[:, i]] if i < size else np.full(present_set.size, None, dtype=object)
    frame["paths"] = dense["paths"][present_set, present_check].astype(np.int64)
    frame["trees"] = dense["trees"][present_set, present_check].astype(np.int64)
    frame["leaf_cover"] = dense["leaf_cover"][present_set, present_check]
    with np.errstate(invalid="ignore", divide="ignore"):
        frame["cover_share"] = frame["leaf_cover"] / total_by_checkpoint[present_check]
    frame["nested_gain"] = dense["nested_gain"][present_set, present_check]
    frame["first_round"] = round_of_position[first_position[present_set]]
    return pd.DataFrame(frame)


def structure_by_round(
    ensemble: Any,
    *,
    step: int | None = None,
    max_order: int = 2,
    output: int | None = None,
) -> pd.DataFrame:
    """Set metrics accumulated over boosting rounds, to see when a set entered the model.

    Parameters
    ----------
    ensemble : ForestGraph or anything :func:`treeprobe.load_model` accepts
        The fitted model.
    step : int, optional
        Report every ``step`` rounds (and always the last round). Default: the
        smallest step giving at most 100 checkpoints.
    max_order : int, default 2
        Largest set order reported (2..``MAX_ORDER``); rows of every order
        2..``max_order`` are returned, told apart by the ``order`` column.
    output : int, optional
        Only the trees of this raw output (one class of a multiclass model).

    Returns
    -------
    DataFrame
        Long format, one row per (checkpoint, set present by then), sorted by
        ``round``, ``order`` and ``nested_gain`` descending. Columns:
        ``round`` (0-based index of the last round included), ``order``,
        ``feature_a`` .. (members; None beyond the row's order), ``paths``,
        ``trees``, ``leaf_cover``, ``nested_gain`` (sums over the trees of
        rounds ``0..round``), ``cover_share`` (``leaf_cover`` over the total
        leaf cover of those same trees) and ``first_round`` (round in which
        the set first occurs). At the last round these equal the columns of
        :func:`structure` with the same ``output``.

    Notes
    -----
    A round is one boosting iteration: ``n_outputs`` trees for models that
    grow one tree per class, times ``num_parallel_tree`` when the loader
    records it (``ForestGraph.trees_per_round``); tree ``t`` belongs to round
    ``t // trees_per_round``. The trees are walked once; each (set, round)
    partial sum is then accumulated with a cumulative sum over rounds.

    Examples
    --------
    >>> from treeprobe.graph import ForestGraph
    >>> ens = ForestGraph.from_arrays(
    ...     feature=[0, -1, -1, 0, 1, -1, -1, -1], threshold=[0.5, 0, 0, 0.5, 2.0, 0, 0, 0],
    ...     left=[1, -1, -1, 1, 2, -1, -1, -1], right=[2, -1, -1, 4, 3, -1, -1, -1],
    ...     value=[0, 1.0, 2.0, 0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 3, 8], local_children=True,
    ...     gain=[5.0, 0, 0, 10.0, 4.0, 0, 0, 0], cover=[100.0, 60, 40, 100.0, 50.0, 30.0, 20.0, 50.0],
    ...     feature_names=["fuel_price", "shift_length"])
    >>> structure_by_round(ens, step=1)[["round", "feature_a", "feature_b", "paths", "first_round"]]
       round   feature_a     feature_b  paths  first_round
    0      1  fuel_price  shift_length      2            1
    """
    ensemble = load_model(ensemble)
    max_order = _check_order(max_order, "max_order")
    walked = _selected_trees(ensemble, None, output)
    tree_round = walked // _trees_per_round(ensemble)
    rounds, round_of_position = np.unique(tree_round, return_inverse=True)
    n_rounds = rounds.size
    step = max(1, -(-n_rounds // 100)) if step is None else check_int("step", step, low=1)
    checkpoints = np.unique(np.append(np.arange(step - 1, n_rounds, step), n_rounds - 1))
    checkpoint_of_round = np.searchsorted(checkpoints, np.arange(n_rounds))
    used, rank, n_used = _prepare(ensemble, walked, max_order)
    _, basis, cover_per_position = _total_leaf_cover(ensemble, walked)
    bucket = checkpoint_of_round[round_of_position]
    records, _ = _walk(ensemble, walked, bucket, max_order, rank, n_used)
    total_by_checkpoint = np.cumsum(np.bincount(bucket, weights=cover_per_position, minlength=checkpoints.size))
    names = np.asarray(ensemble.feature_names, dtype=object)
    share_total = total_by_checkpoint if basis != "unknown" else np.full(checkpoints.size, np.nan)
    frames = [
        _cumulative_frame(rec, size, max_order, used, names, rounds[checkpoints], share_total, tree_round)
        for size, rec in records.items() if rec.key.size
    ]
    columns = ["round", "order", *_MEMBER_COLUMNS[:max_order], "paths", "trees", "leaf_cover", "cover_share",
               "nested_gain", "first_round"]
    if not frames:
        return pd.DataFrame(columns=columns)
    out = pd.concat(frames, ignore_index=True)
    out = out.sort_values(["round", "order", "nested_gain", "paths"], ascending=[True, True, False, False], kind="stable")
    return out.reset_index(drop=True)[columns]
