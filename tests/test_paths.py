"""Tests of :mod:`treeprobe.paths`, the one parent builder and path walk.

Outside references: XGBoost's own tree dump (``Booster.trees_to_dataframe``:
``Node``, ``Feature``, ``Yes``, ``No`` per node), walked here recursively from
the root; hand-built trees; for the set helpers, the same sets held as
Python lists and expanded with ``itertools.combinations``.
"""

from __future__ import annotations

from itertools import combinations

import numpy as np
import pytest

from treeprobe import load_model
from treeprobe.graph import ForestGraph
from treeprobe.paths import (
    decode_sets,
    encode_sets,
    encode_sets_with,
    leaf_feature_sets,
    leaf_steps,
    list_subsets,
    mask_member_lists,
    mask_members,
    member_subsets,
    parent_links,
    path_set_counts,
    sets_on_paths,
    tree_nodes,
)


@pytest.fixture(scope="module")
def booster_and_graph():
    xgb = pytest.importorskip("xgboost")
    rng = np.random.default_rng(3)
    X = rng.normal(size=(400, 6))
    y = X[:, 0] * X[:, 1] + np.sin(X[:, 2]) * X[:, 3] + X[:, 4] + rng.normal(scale=0.2, size=400)
    model = xgb.XGBRegressor(n_estimators=12, max_depth=4, n_jobs=1, random_state=0).fit(X, y)
    return model.get_booster(), load_model(model)


def _dump_leaves(booster) -> list[tuple[int, frozenset[int]]]:
    """(tree, feature set of its path) of every leaf, walked from XGBoost's own dump."""
    frame = booster.trees_to_dataframe()
    out: list[tuple[int, frozenset[int]]] = []
    for tree_index, tree in frame.groupby("Tree"):
        rows = {row.ID: row for row in tree.itertuples()}

        def walk(node_id, above, rows=rows, tree_index=tree_index):
            row = rows[node_id]
            if row.Feature == "Leaf":
                out.append((int(tree_index), frozenset(above)))
                return
            feature = int(row.Feature[1:])
            walk(row.Yes, above | {feature})
            walk(row.No, above | {feature})

        walk(f"{int(tree_index)}-0", frozenset())
    return out


def _dump_leaf_sets(booster) -> set[frozenset[int]]:
    """Feature sets of every root-to-leaf path, walked from XGBoost's own dump."""
    return {features for _, features in _dump_leaves(booster)}


def test_leaf_feature_sets_match_the_xgboost_dump(booster_and_graph):
    booster, graph = booster_and_graph
    ours = {frozenset(np.flatnonzero(row).tolist()) for row in leaf_feature_sets(graph)}
    assert ours == _dump_leaf_sets(booster)


def test_sets_on_paths_are_the_subsets_of_the_dump_paths(booster_and_graph):
    booster, graph = booster_and_graph
    for size in (2, 3):
        expected = sorted({tuple(sorted(c)) for s in _dump_leaf_sets(booster) for c in combinations(s, size)})
        got = [tuple(m) for m in decode_sets(sets_on_paths(graph, size), graph.n_features, size).tolist()]
        assert got == expected


def test_path_set_counts_match_the_xgboost_dump(booster_and_graph, monkeypatch):
    """Leaves, trees and first tree of every distinct path set equal a count over XGBoost's dump, in any chunking."""
    booster, graph = booster_and_graph
    expected: dict[frozenset[int], list] = {}
    for tree, features in _dump_leaves(booster):
        leaves, trees, first = expected.get(features, [0, set(), tree])
        expected[features] = [leaves + 1, trees | {tree}, min(first, tree)]
    import treeprobe.paths as paths_module

    for chunk in (paths_module._CHUNK_NODES, 7):
        monkeypatch.setattr(paths_module, "_CHUNK_NODES", chunk)
        sets, leaves, trees, first_tree = path_set_counts(graph)
        np.testing.assert_array_equal(sets, leaf_feature_sets(graph))
        got = {frozenset(np.flatnonzero(row).tolist()): [int(n), int(t), int(f)]
               for row, n, t, f in zip(sets, leaves, trees, first_tree, strict=True)}
        assert got == {key: [n, len(t), f] for key, (n, t, f) in expected.items()}
        assert leaves.sum() == graph.summary()["n_leaves"] == len(_dump_leaves(booster))


def test_subset_of_trees_and_chunking(booster_and_graph, monkeypatch):
    """Walking trees 3..5 equals walking the graph of those trees alone; tiny chunks change nothing."""
    _, graph = booster_and_graph
    import treeprobe.paths as paths_module

    whole = leaf_feature_sets(graph)
    alone = leaf_feature_sets(graph.select_trees(np.arange(3, 6)))
    monkeypatch.setattr(paths_module, "_CHUNK_NODES", 7)
    np.testing.assert_array_equal(leaf_feature_sets(graph), whole)
    np.testing.assert_array_equal(leaf_feature_sets(graph, np.arange(3, 6)), alone)


def test_parents_and_leaf_climb_on_a_hand_built_tree():
    """n0 f0 -> (n1 f1 -> (n3, n4), n2): leaf n4's path is n1 (right), n0 (left)."""
    graph = ForestGraph.from_arrays(
        feature=[0, 1, -1, -1, -1], threshold=[0.5, 2.0, 0, 0, 0], left=[1, 3, -1, -1, -1],
        right=[2, 4, -1, -1, -1], value=[0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 5])
    parent, is_left = parent_links(graph)
    assert parent.tolist() == [-1, 0, 0, 1, 1]
    assert is_left.tolist() == [False, True, False, True, False]
    owner, node, left = leaf_steps(parent, is_left, np.array([4]))
    assert (owner.tolist(), node.tolist(), left.tolist()) == ([0, 0], [1, 0], [False, True])
    assert tree_nodes(graph, np.array([0])).tolist() == [0, 1, 2, 3, 4]


def test_set_keys_round_trip_and_sort_like_tuples():
    rng = np.random.default_rng(0)
    members = np.sort(rng.choice(40, size=(200, 3)), axis=1)
    keys = encode_sets(members, 40)
    np.testing.assert_array_equal(decode_sets(keys, 40, 3), members)
    order = np.lexsort(members.T[::-1])
    assert np.all(np.diff(keys[order]) >= 0)


def _random_masks(rng: np.random.Generator, n_rows: int, n_items: int) -> tuple[np.ndarray, list[list[int]]]:
    """uint64 masks (bit b of word w = item 64 w + b) of random item sets, and the sets as sorted lists."""
    sets = [sorted(rng.choice(n_items, size=rng.integers(0, min(n_items, 9) + 1), replace=False).tolist())
            for _ in range(n_rows)]
    masks = np.zeros((n_rows, -(-n_items // 64)), dtype=np.uint64)
    for row, items in enumerate(sets):
        for item in items:
            masks[row, item // 64] |= np.uint64(1) << np.uint64(item % 64)
    return masks, sets


@pytest.mark.parametrize("n_items", [1, 7, 64, 65, 150])
def test_mask_member_lists_and_subsets_match_python_sets(n_items):
    """mask_member_lists, list_subsets and member_subsets against Python lists and itertools.combinations,
    over masks of one to three words."""
    rng = np.random.default_rng(n_items)
    masks, sets = _random_masks(rng, 300, n_items)
    members, counts = mask_member_lists(masks)
    assert counts.tolist() == [len(items) for items in sets]
    assert [row[:c].tolist() for row, c in zip(members, counts, strict=True)] == sets
    assert np.all(members[np.arange(members.shape[1]) >= counts[:, None]] == -1)
    for size in (1, 2, 3):
        expected = sorted((row, combo) for row, items in enumerate(sets) for combo in combinations(items, size))
        for owner, subsets in (list_subsets(members, counts, size), member_subsets(mask_members(masks, n_items), size)):
            assert sorted(zip(owner.tolist(), map(tuple, subsets.tolist()), strict=True)) == expected


def test_encode_sets_with_equals_encoding_the_sorted_union():
    """encode_sets_with(T, j) == encode_sets(sorted(T + {j})) for j below, between and above T's members."""
    rng = np.random.default_rng(1)
    for width in (0, 1, 2, 4):
        rows = [rng.choice(30, size=width + 1, replace=False) for _ in range(400)]
        others = np.array([np.sort(r[1:]) for r in rows], dtype=np.int64).reshape(len(rows), width)
        extra = np.array([r[0] for r in rows], dtype=np.int64)
        union = np.sort(np.column_stack([others, extra]), axis=1)
        np.testing.assert_array_equal(encode_sets_with(others, extra, 30), encode_sets(union, 30))
