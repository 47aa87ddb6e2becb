"""Root-to-leaf paths of a forest graph: parents, ancestor feature sets and set keys.

Every stage that reads a tree's paths starts from the same three facts: the
parent of each node, the set of features split on above it (its *ancestor
feature set*, kept as a bitmask propagated from the root level by level), and
the climb from a leaf to its root. This module computes them once, on the
columnar arrays of :class:`~treeprobe.graph.ForestGraph`, with vectorised
numpy and no per-node Python loop; the structure walk
(:mod:`treeprobe.cooccurrence`), the exact partial-dependence engine
(:mod:`treeprobe.pdp`), the H-statistics (:mod:`treeprobe.measure`) and the
policy check (:mod:`treeprobe.policy`, which also checks constrained refits) all use it.

A leaf's value depends on the features of its root-to-leaf path only, so the
feature sets found here bound which interactions a tree can express ([1]_,
section 5; [2]_, section 8). Feature sets of one size are identified by one
integer key (:func:`encode_sets`), members in ascending order.

References
----------
.. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", The Annals of Applied Statistics 2(3), 916-954, 2008.
.. [2] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", The Annals of Statistics 29(5), 1189-1232, 2001.

Examples
--------
One tree: the root splits on feature 0, its left child on feature 1.

>>> from treeprobe.graph import ForestGraph
>>> graph = ForestGraph.from_arrays(
...     feature=[0, 1, -1, -1, -1], threshold=[0.5, 2.0, 0, 0, 0],
...     left=[1, 2, -1, -1, -1], right=[4, 3, -1, -1, -1],
...     value=[0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 5])
>>> leaf_feature_sets(graph).astype(int)
array([[1, 0],
       [1, 1]])
>>> sets_on_paths(graph, 2)
array([1])
"""

from __future__ import annotations

from collections.abc import Iterator
from functools import lru_cache
from itertools import combinations
from weakref import WeakKeyDictionary

import numpy as np

from .graph import ForestGraph

__all__ = [
    "parent_links",
    "tree_nodes",
    "depth_levels",
    "ancestor_masks",
    "mask_members",
    "mask_member_lists",
    "member_subsets",
    "list_subsets",
    "encode_sets",
    "encode_sets_with",
    "decode_sets",
    "leaf_feature_sets",
    "path_set_counts",
    "sets_on_paths",
    "leaf_steps",
]

# Nodes per chunk of :func:`leaf_feature_sets`: bounds the (nodes x words) masks.
_CHUNK_NODES = 1 << 16
# Path feature sets of live graphs, by tree selection (see leaf_feature_sets).
_FEATURE_SETS: WeakKeyDictionary = WeakKeyDictionary()


def parent_links(graph: ForestGraph) -> tuple[np.ndarray, np.ndarray]:
    """Parent of every node (-1 at roots) and whether the node is its parent's left child.

    Examples
    --------
    >>> from treeprobe.graph import ForestGraph
    >>> graph = ForestGraph.from_arrays(feature=[0, -1, -1], threshold=[0.5, 0, 0], left=[1, -1, -1],
    ...                                 right=[2, -1, -1], value=[0, 1.0, 2.0], tree_offsets=[0, 3])
    >>> parent, is_left = parent_links(graph)
    >>> parent.tolist(), is_left.tolist()
    ([-1, 0, 0], [False, True, False])
    """
    parent = np.full(graph.n_nodes, -1, dtype=np.int64)
    is_left = np.zeros(graph.n_nodes, dtype=bool)
    inner = np.flatnonzero(graph.feature >= 0)
    parent[graph.left[inner]] = inner
    parent[graph.right[inner]] = inner
    is_left[graph.left[inner]] = True
    return parent, is_left


def tree_nodes(graph: ForestGraph, trees: np.ndarray) -> np.ndarray:
    """Node indices of the trees ``trees`` (in the given order), concatenated without a Python loop.

    Examples
    --------
    >>> from treeprobe.graph import ForestGraph
    >>> graph = ForestGraph.from_arrays(feature=[-1, 0, -1, -1], threshold=[0, 0.5, 0, 0], left=[-1, 2, -1, -1],
    ...                                 right=[-1, 3, -1, -1], value=[1.0, 0, 1.0, 2.0], tree_offsets=[0, 1, 4])
    >>> tree_nodes(graph, np.array([1])).tolist()
    [1, 2, 3]
    """
    trees = np.asarray(trees, dtype=np.int64)
    starts = graph.tree_offsets[trees].astype(np.int64)
    sizes = (graph.tree_offsets[trees + 1] - graph.tree_offsets[trees]).astype(np.int64)
    ends = np.cumsum(sizes)
    return np.repeat(starts - (ends - sizes), sizes) + np.arange(ends[-1] if ends.size else 0)


def depth_levels(depth: np.ndarray) -> list[np.ndarray]:
    """Positions of ``depth`` grouped by value 0, 1, ..., max: the order of a level-by-level walk.

    Examples
    --------
    >>> [level.tolist() for level in depth_levels(np.array([0, 1, 1, 2]))]
    [[0], [1, 2], [3]]
    """
    depth = np.asarray(depth, dtype=np.int64)
    if depth.size == 0:
        return []
    by_depth = np.argsort(depth, kind="stable")
    start = np.searchsorted(depth[by_depth], np.arange(int(depth.max()) + 2))
    return [by_depth[start[d]:start[d + 1]] for d in range(int(depth.max()) + 1)]


def ancestor_masks(local_parent: np.ndarray, code: np.ndarray, levels: list[np.ndarray], n_codes: int) -> np.ndarray:
    """Bitmask of the codes of every node's strict ancestors, propagated top-down.

    Parameters
    ----------
    local_parent : ndarray of int
        Position of each node's parent in the same arrays (ignored at level 0).
    code : ndarray of int
        Code of each node's split (a feature index or rank); leaves may hold -1.
    levels : list of ndarray
        Node positions by depth, from :func:`depth_levels`.
    n_codes : int
        Number of distinct codes; bit ``b`` of word ``w`` stands for code ``64 w + b``.

    Returns
    -------
    ndarray of uint64, shape (n_nodes, ceil(n_codes / 64))
        A node's mask is its parent's mask plus its parent's code.

    Examples
    --------
    >>> masks = ancestor_masks(np.array([-1, 0, 0, 1]), np.array([0, 1, -1, -1]),
    ...                        depth_levels(np.array([0, 1, 1, 2])), 2)
    >>> masks[:, 0].tolist()
    [0, 1, 1, 3]
    """
    n_words = max(1, -(-int(n_codes) // 64))
    masks = np.zeros((np.asarray(code).size, n_words), dtype=np.uint64)
    one = np.uint64(1)
    for members in levels[1:]:
        up = local_parent[members]
        up_code = code[up]
        masks[members] = masks[up]
        masks[members, up_code >> 6] |= one << (up_code & 63).astype(np.uint64)
    return masks


def mask_members(masks: np.ndarray, n_bits: int) -> np.ndarray:
    """Boolean (rows x n_bits) matrix of the bits set in uint64 masks, bit b of word w = item 64 w + b.

    Examples
    --------
    >>> mask_members(np.array([[5]], dtype=np.uint64), 3).astype(int)
    array([[1, 0, 1]])
    """
    as_bytes = np.ascontiguousarray(masks.astype("<u8", copy=False)).view(np.uint8)
    return np.unpackbits(as_bytes, axis=1, bitorder="little")[:, :n_bits].astype(bool)


@lru_cache(maxsize=256)
def _combination_table(n_items: int, size: int) -> np.ndarray:
    table = np.array(list(combinations(range(n_items), size)), dtype=np.int64)
    return table.reshape(-1, size)


def mask_member_lists(masks: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The items set in every row of uint64 masks, ascending and left-aligned, and how many there are.

    Bit ``b`` of word ``w`` stands for item ``64 w + b``. The lowest set bit is
    taken off every row at once, so the work grows with the largest count
    (a path's depth), not with the number of items.

    Returns
    -------
    members : ndarray of int64, shape (n_rows, largest count)
        Row ``i`` holds its items in ``members[i, :counts[i]]``, then -1.
    counts : ndarray of int64, shape (n_rows,)

    Examples
    --------
    >>> members, counts = mask_member_lists(np.array([[5], [0], [8]], dtype=np.uint64))
    >>> members.tolist(), counts.tolist()
    ([[0, 2], [-1, -1], [3, -1]], [2, 0, 1])
    """
    masks = np.asarray(masks, dtype=np.uint64)
    one = np.uint64(1)
    rounds = []
    counts = np.zeros(len(masks), dtype=np.int64)
    for word in range(masks.shape[1]):
        rows = np.flatnonzero(masks[:, word])
        rest = masks[rows, word]
        while rows.size:
            lowest = rest & (~rest + one)
            # A power of two converts to float64 exactly; frexp gives its exponent.
            rounds.append((rows, np.frexp(lowest.astype(np.float64))[1].astype(np.int64) + (64 * word - 1)))
            counts[rows] += 1
            rest = rest ^ lowest
            more = rest != 0
            rows, rest = rows[more], rest[more]
    members = np.full((len(masks), int(counts.max(initial=0))), -1, dtype=np.int64)
    # Rounds meet every row's items in ascending order.
    filled = np.zeros(len(masks), dtype=np.int64)
    for rows, items in rounds:
        members[rows, filled[rows]] = items
        filled[rows] += 1
    return members, counts


def list_subsets(members: np.ndarray, counts: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Every ``size``-subset of the items of every row (``members[i, :counts[i]]``, ascending).

    Returns the owning row of each subset and its members (ascending), shape (n, size).
    Rows are grouped by their item count so that each group is one fancy-indexing
    step through a table of index combinations.

    Examples
    --------
    >>> owner, subsets = list_subsets(np.array([[0, 1, 2], [0, 2, -1]]), np.array([3, 2]), 2)
    >>> owner.tolist(), subsets.tolist()
    ([1, 0, 0, 0], [[0, 2], [0, 1], [0, 2], [1, 2]])
    """
    if size == 1:
        # Row-major order lists every row's items in turn, ascending.
        return np.repeat(np.arange(counts.size), counts), members[members >= 0].reshape(-1, 1)
    owner_parts, member_parts = [np.zeros(0, np.int64)], [np.zeros((0, size), np.int64)]
    for n_items in np.unique(counts[counts >= size]):
        owners = np.flatnonzero(counts == n_items)
        table = _combination_table(int(n_items), size)
        owner_parts.append(np.repeat(owners, table.shape[0]))
        member_parts.append(members[owners][:, table].reshape(-1, size))
    return np.concatenate(owner_parts), np.concatenate(member_parts).astype(np.int64)


def member_subsets(bits: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Every ``size``-subset of the set items of every row of a boolean matrix (see :func:`list_subsets`).

    Examples
    --------
    >>> owner, members = member_subsets(np.array([[True, True, True], [True, False, True]]), 2)
    >>> owner.tolist(), members.tolist()
    ([1, 0, 0, 0], [[0, 2], [0, 1], [0, 2], [1, 2]])
    """
    counts = bits.sum(axis=1).astype(np.int64)
    rows, items = np.nonzero(bits)
    members = np.full((len(bits), int(counts.max(initial=0))), -1, dtype=np.int64)
    members[rows, np.arange(rows.size) - (np.cumsum(counts) - counts)[rows]] = items
    return list_subsets(members, counts, size)


def encode_sets(members: np.ndarray, radix: int) -> np.ndarray:
    """One int64 key per row of ``members`` (each in ``0..radix-1``): ``sum_i members[i] * radix**(size-1-i)``.

    Keys of sets given in ascending member order sort like the member tuples.
    The caller keeps ``radix**size`` below ``2**63``.

    Examples
    --------
    >>> encode_sets(np.array([[0, 2], [1, 2]]), 3).tolist()
    [2, 5]
    >>> decode_sets(np.array([2, 5]), 3, 2).tolist()
    [[0, 2], [1, 2]]
    """
    members = np.asarray(members, dtype=np.int64)
    key = np.zeros(members.shape[0], dtype=np.int64)
    for column in members.T:
        key = key * radix + column
    return key


def encode_sets_with(members: np.ndarray, extra: np.ndarray, radix: int) -> np.ndarray:
    """:func:`encode_sets` keys of the sets ``members[i] + {extra[i]}``, without sorting the rows.

    ``members`` rows are ascending and do not hold ``extra[i]``; each member
    takes the weight of the slot it has once ``extra[i]`` is inserted.

    Examples
    --------
    >>> encode_sets_with(np.array([[0, 2], [0, 2]]), np.array([1, 3]), 4).tolist()
    [6, 11]
    >>> encode_sets(np.array([[0, 1, 2], [0, 2, 3]]), 4).tolist()
    [6, 11]
    """
    members = np.asarray(members, dtype=np.int64)
    extra = np.asarray(extra, dtype=np.int64)
    width = members.shape[1]
    weight = np.int64(radix) ** np.arange(width, -1, -1, dtype=np.int64)
    slot = np.zeros(extra.size, dtype=np.int64)
    key = np.zeros(extra.size, dtype=np.int64)
    for column in range(width):
        # Members below ``extra`` keep their slot; the others move one slot down.
        below = members[:, column] < extra
        slot += below
        key += members[:, column] * np.where(below, weight[column], weight[column + 1])
    return key + extra * weight[slot]


def decode_sets(keys: np.ndarray, radix: int, size: int) -> np.ndarray:
    """Members (rows, ascending) of the sets behind :func:`encode_sets` keys."""
    rest = np.asarray(keys, dtype=np.int64).copy()
    members = np.empty((rest.size, size), dtype=np.int64)
    for position in range(size - 1, -1, -1):
        members[:, position] = rest % radix
        rest //= radix
    return members


def _leaf_masks(graph: ForestGraph, trees: np.ndarray | None) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Per chunk of whole trees: the tree index of every leaf and the uint64 mask of its path's features."""
    trees = np.arange(graph.n_trees) if trees is None else np.asarray(trees, dtype=np.int64)
    parent, _ = parent_links(graph)
    sizes = (graph.tree_offsets[trees + 1] - graph.tree_offsets[trees]).astype(np.int64)
    chunk_of_tree = np.cumsum(sizes) // _CHUNK_NODES
    for chunk in np.split(trees, np.flatnonzero(np.diff(chunk_of_tree)) + 1):
        if not chunk.size:
            continue
        nodes = tree_nodes(graph, chunk)
        local_parent = np.searchsorted(nodes, parent[nodes])
        masks = ancestor_masks(local_parent, graph.feature[nodes].astype(np.int64),
                               depth_levels(graph.depth[nodes]), graph.n_features)
        tree_of_node = np.repeat(chunk, graph.tree_offsets[chunk + 1] - graph.tree_offsets[chunk])
        leaf = graph.feature[nodes] < 0
        yield tree_of_node[leaf], masks[leaf]


def _no_masks(graph: ForestGraph) -> np.ndarray:
    return np.zeros((0, max(1, -(-graph.n_features // 64))), dtype=np.uint64)


def leaf_feature_sets(graph: ForestGraph, trees: np.ndarray | None = None) -> np.ndarray:
    """Distinct feature sets of the root-to-leaf paths, as a boolean (sets x features) matrix.

    ``trees`` restricts the walk to those tree indices (default: every tree).
    A single-leaf tree contributes the empty set. Graphs are immutable, so the
    result is kept (read-only) for as long as the graph lives: repeated
    H-statistics on one model, as triage's resamples do, walk it once.
    """
    trees = np.arange(graph.n_trees) if trees is None else np.asarray(trees, dtype=np.int64)
    known = _FEATURE_SETS.setdefault(graph, {})
    key = trees.tobytes()
    if key not in known:
        found = [_no_masks(graph)] + [np.unique(masks, axis=0) for _, masks in _leaf_masks(graph, trees)]
        sets = mask_members(np.unique(np.concatenate(found), axis=0), graph.n_features)
        sets.setflags(write=False)
        known[key] = sets
    return known[key]


def path_set_counts(graph: ForestGraph) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Distinct feature sets of the root-to-leaf paths, with how many leaves and trees hold each.

    Returns
    -------
    sets : ndarray of bool, shape (n_sets, n_features)
        As :func:`leaf_feature_sets` (same rows, same order).
    leaves : ndarray of int64
        Leaves whose path splits on exactly the features of the set.
    trees : ndarray of int64
        Trees holding such a leaf.
    first_tree : ndarray of int64
        Smallest index of such a tree.

    Examples
    --------
    Two trees: a stump on feature 0, and a tree splitting on 0 then 1 on the left.

    >>> from treeprobe.graph import ForestGraph
    >>> graph = ForestGraph.from_arrays(
    ...     feature=[0, -1, -1, 0, 1, -1, -1, -1], threshold=[0.5, 0, 0, 0.5, 2.0, 0, 0, 0],
    ...     left=[1, -1, -1, 1, 2, -1, -1, -1], right=[2, -1, -1, 4, 3, -1, -1, -1],
    ...     value=[0, 1.0, 2.0, 0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 3, 8], local_children=True)
    >>> sets, leaves, trees, first_tree = path_set_counts(graph)
    >>> sets.astype(int).tolist(), leaves.tolist(), trees.tolist(), first_tree.tolist()
    ([[1, 0], [1, 1]], [3, 2], [2, 1], [0, 1])
    """
    tree_parts, mask_parts, leaf_parts = [np.zeros(0, np.int64)], [_no_masks(graph)], [np.zeros(0, np.int64)]
    for leaf_tree, masks in _leaf_masks(graph, None):
        # One row per (tree, set): chunks hold disjoint trees, so rows per set count its trees.
        rows, counts = np.unique(np.column_stack([leaf_tree.astype(np.uint64), masks]), axis=0, return_counts=True)
        tree_parts.append(rows[:, 0].astype(np.int64))
        mask_parts.append(rows[:, 1:])
        leaf_parts.append(counts.astype(np.int64))
    masks, set_of_row = np.unique(np.concatenate(mask_parts), axis=0, return_inverse=True)
    set_of_row = set_of_row.ravel()
    leaves = np.bincount(set_of_row, weights=np.concatenate(leaf_parts), minlength=len(masks)).astype(np.int64)
    trees = np.bincount(set_of_row, minlength=len(masks)).astype(np.int64)
    first_tree = np.full(len(masks), graph.n_trees, dtype=np.int64)
    np.minimum.at(first_tree, set_of_row, np.concatenate(tree_parts))
    return mask_members(masks, graph.n_features), leaves, trees, first_tree


def sets_on_paths(graph: ForestGraph, size: int, trees: np.ndarray | None = None) -> np.ndarray:
    """Sorted :func:`encode_sets` keys (radix ``n_features``) of the ``size``-sets meeting on some path."""
    _, members = member_subsets(leaf_feature_sets(graph, trees), size)
    return np.unique(encode_sets(members, graph.n_features))


def leaf_steps(
    parent: np.ndarray, is_left: np.ndarray, leaves: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every ancestor split of every leaf, by climbing all leaves one level per step.

    Returns, one entry per (leaf, ancestor): the leaf's position in ``leaves``,
    the ancestor node, and whether the path goes left there.

    Examples
    --------
    >>> owner, node, left = leaf_steps(np.array([-1, 0, 0, 1, 1]), np.array([False, True, False, True, False]),
    ...                                np.array([3, 2]))
    >>> owner.tolist(), node.tolist(), left.tolist()
    ([0, 1, 0], [1, 0, 0], [True, False, True])
    """
    owners, nodes, lefts = [np.zeros(0, np.int64)], [np.zeros(0, np.int64)], [np.zeros(0, bool)]
    current, owner = np.asarray(leaves, dtype=np.int64), np.arange(len(leaves))
    while current.size:
        up = parent[current]
        keep = up >= 0
        owner, current, up = owner[keep], current[keep], up[keep]
        owners.append(owner)
        nodes.append(up)
        lefts.append(is_left[current])
        current = up
    return np.concatenate(owners), np.concatenate(nodes), np.concatenate(lefts)
