"""Tests of :mod:`treeprobe.cooccurrence`, the path walker.

Outside references: hand counts on hand-built trees; a naive recursive walker
written here from the definitions; XGBoost's and LightGBM's own importances
(``Booster.get_score``, ``Booster.feature_importance``); models trained under
the libraries' own ``interaction_constraints``; XGBoost's SHAP interaction
values (Lundberg, Erion & Lee 2018); XGBoost's hessian sums for squared error
(Chen & Guestrin 2016).
"""

from __future__ import annotations

import json
from itertools import combinations
from unittest import mock

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import treeprobe
import treeprobe.cooccurrence as structure_module
from treeprobe.cooccurrence import structure, structure_by_round
from treeprobe.errors import ParameterError, TreeprobeError
from treeprobe.graph import ForestGraph

NAMES = ["fuel_price", "shift_length", "crew_size"]


# --------------------------------------------------------------------- hand-built trees
@pytest.fixture
def two_trees() -> ForestGraph:
    """Two hand-built trees over fuel_price (0), shift_length (1), crew_size (2).

    Tree 0                                   Tree 1
    n0 f0 gain 10 cover 100                  n0 f1 gain 6 cover 100
      n1 f1 gain 4 cover 60                    n1 f2 gain 5 cover 70
        n3 f0 gain 2 cover 35                    n3 f0 gain 1 cover 50
          n7 leaf 20, n8 leaf 15                   n5 leaf 30, n6 leaf 20
        n4 leaf 25                               n4 leaf 20
      n2 f2 gain 3 cover 40                    n2 leaf 30
        n5 leaf 15, n6 leaf 25
    """
    return ForestGraph.from_arrays(
        feature=[0, 1, 2, 0, -1, -1, -1, -1, -1, 1, 2, -1, 0, -1, -1, -1],
        threshold=[1, 1, 1, 2, 0, 0, 0, 0, 0, 1, 1, 0, 1, 0, 0, 0],
        left=[1, 3, 5, 7, -1, -1, -1, -1, -1, 1, 3, -1, 5, -1, -1, -1],
        right=[2, 4, 6, 8, -1, -1, -1, -1, -1, 2, 4, -1, 6, -1, -1, -1],
        value=[0, 0, 0, 0, 1, 2, 3, 4, 5, 0, 0, 1, 0, 2, 3, 4],
        tree_offsets=[0, 9, 16],
        local_children=True,
        gain=[10, 4, 3, 2, 0, 0, 0, 0, 0, 6, 5, 0, 1, 0, 0, 0],
        cover=[100, 60, 40, 35, 25, 15, 25, 20, 15, 100, 70, 30, 50, 20, 30, 20],
        feature_names=NAMES,
    )


def test_hand_counted_features(two_trees):
    """Hand counts (root split = depth 1) for every feature column."""
    features = structure(two_trees).features.set_index("feature")
    # fuel_price: splits t0n0 (gain 10, cover 100, depth 1), t0n3 (2, 35, depth 3), t1n3 (1, 50, depth 3);
    # every leaf of tree 0 (5) and leaves n5, n6 of tree 1 lie below one of them: 7 leaf paths.
    # shift_length: t0n1 (4, 60, depth 2), t1n0 (6, 100, depth 1); leaves t0 n4 n7 n8 + all 4 of tree 1 = 7.
    # crew_size: t0n2 (3, 40, depth 2), t1n1 (5, 70, depth 2); leaves t0 n5 n6 + t1 n4 n5 n6 = 5.
    expected = pd.DataFrame(
        {
            "splits": [3, 2, 2],
            "gain": [13.0, 10.0, 8.0],
            "cover": [185.0, 160.0, 110.0],
            "tree_openings": [1, 1, 0],
            "mean_level": [7 / 3, 1.5, 2.0],
            "leaf_paths": [7, 7, 5],
            "first_tree": [0, 0, 0],
        },
        index=pd.Index(NAMES, name="feature"),
    )
    pd.testing.assert_frame_equal(features, expected, check_dtype=False)


def test_hand_counted_pairs_and_triple(two_trees):
    """Hand counts for pairs and the one triple; total leaf cover 100 + 100 = 200."""
    result = structure(two_trees, max_order=3)
    assert result.total_leaf_cover == 200.0
    assert result.cover_basis == "cover"
    pairs = result.pairs.set_index(["feature_a", "feature_b"])
    # (fuel_price, shift_length): leaves t0 n4 n7 n8 (25+20+15) and t1 n5 n6 (30+20): 5 paths, cover 110.
    # nested: t0n1 (shift_length under fuel_price, 4) + t0n3 (fuel_price under shift_length, 2)
    # + t1n3 (fuel_price under shift_length, 1) = 7; first completes at t0n1, depth 2.
    # (shift_length, crew_size): t1 n4 n5 n6 (20+30+20): 3 paths, 1 tree, cover 70; nested t1n1 = 5, depth 2.
    # (fuel_price, crew_size): t0 n5 n6 (15+25) + t1 n5 n6 (30+20): 4 paths, cover 90;
    # nested t0n2 (3) + t1n3 (1) = 4, depth 2.
    expected = pd.DataFrame(
        {
            "paths": [5, 3, 4],
            "trees": [2, 1, 2],
            "leaf_cover": [110.0, 70.0, 90.0],
            "cover_share": [0.55, 0.35, 0.45],
            "nested_gain": [7.0, 5.0, 4.0],
            "first_level": [2, 2, 2],
            "first_tree": [0, 1, 0],
        },
        index=pd.MultiIndex.from_tuples(
            [("fuel_price", "shift_length"), ("shift_length", "crew_size"), ("fuel_price", "crew_size")],
            names=["feature_a", "feature_b"],
        ),
    )
    pd.testing.assert_frame_equal(pairs, expected, check_dtype=False)
    # The triple: only t1 n5 n6 (30 + 20); nested only t1n3 (fuel_price under shift_length and crew_size, 1).
    triple = result.triples.iloc[0].to_dict()
    assert len(result.triples) == 1
    assert triple == {
        "feature_a": "fuel_price", "feature_b": "shift_length", "feature_c": "crew_size", "paths": 2, "trees": 1,
        "leaf_cover": 50.0, "cover_share": 0.25, "nested_gain": 1.0, "first_level": 3, "first_tree": 1,
    }


def test_tree_subset_keeps_original_indices(two_trees):
    """Walking tree 1 only: hand counts over its 4 leaves (cover 100), first_tree reported as 1."""
    result = structure(two_trees, trees=[1])
    pairs = result.pairs.set_index(["feature_a", "feature_b"])
    assert result.n_trees_walked == 1 and result.total_leaf_cover == 100.0
    assert pairs.loc[("shift_length", "crew_size"), "cover_share"] == pytest.approx(0.70)
    assert pairs.loc[("fuel_price", "shift_length"), "nested_gain"] == pytest.approx(1.0)
    assert set(pairs["first_tree"]) == {1}
    assert result.features.set_index("feature").loc["fuel_price", "tree_openings"] == 0
    assert len(structure(two_trees, trees=slice(0, 1)).triples) == 0


def test_cover_falls_back_to_sample_counts(two_trees):
    """Without cover the shares use leaf n_samples; with neither they are NaN (documented)."""
    from dataclasses import replace

    samples = replace(two_trees, cover=np.full(two_trees.n_nodes, np.nan), n_samples=two_trees.cover * 2)
    result = structure(samples)
    assert result.cover_basis == "n_samples" and result.total_leaf_cover == 400.0
    assert result.pairs["cover_share"].iloc[0] == pytest.approx(0.55)
    unknown = structure(replace(two_trees, cover=np.full(two_trees.n_nodes, np.nan)))
    assert unknown.cover_basis == "unknown" and unknown.pairs["cover_share"].isna().all()
    assert (unknown.pairs["paths"] == result.pairs["paths"]).all()


def test_to_dict_is_json(two_trees):
    """to_dict round-trips through the standard json module with the documented keys."""
    payload = json.loads(json.dumps(structure(two_trees, max_order=4).to_dict()))
    assert payload["schema"] == "treeprobe.structure/2"
    assert set(payload) == {"schema", "limits", "model", "max_order", "n_trees_walked", "tree_indices", "total_leaf_cover",
                            "cover_basis", "features", "pairs", "triples", "sets"}
    assert payload["pairs"][0]["feature_a"] == "fuel_price" and payload["pairs"][0]["nested_gain"] == 7.0
    assert payload["sets"] == {"4": []}
    assert payload["features"][0]["mean_level"] == pytest.approx(7 / 3)


@pytest.mark.parametrize(
    ("kwargs", "fragment"),
    [
        ({"max_order": 1}, "max_order"),
        ({"max_order": 2.0}, "max_order"),
        ({"max_order": 99}, "max_order"),
        ({"trees": [0, 0]}, "more than once"),
        ({"trees": [5]}, "index 5"),
        ({"trees": ["a"]}, "trees"),
        ({"trees": slice(5, 9)}, "holds no tree"),
        ({"output": 3}, "output"),
        ({"output": True}, "output"),
    ],
)
def test_bad_parameters_name_themselves(two_trees, kwargs, fragment):
    """Every bad parameter raises one ParameterError naming the parameter or the problem."""
    with pytest.raises(ParameterError, match=fragment):
        structure(two_trees, **kwargs)


def test_bad_step_and_bad_source(two_trees, tmp_path):
    """structure_by_round validates step; a corrupt file is a TreeprobeError, not a traceback."""
    with pytest.raises(ParameterError, match="step"):
        structure_by_round(two_trees, step=0)
    bad = tmp_path / "broken.json"
    bad.write_text('{"learner": ')
    with pytest.raises(TreeprobeError):
        structure(bad)


# --------------------------------------------------------------------- naive reference walker
def _random_ensemble(seed: int, n_features: int, n_trees: int, max_depth: int, n_outputs: int = 1) -> ForestGraph:
    rng = np.random.default_rng(seed)
    feature, left, right, gain, cover, offsets = [], [], [], [], [], [0]
    for _ in range(n_trees):
        start = len(feature)

        def grow(depth: int, mass: float, start: int = start) -> int:
            node = len(feature) - start
            split = depth < max_depth and rng.random() < 0.75
            feature.append(int(rng.integers(n_features)) if split else -1)
            left.append(-1)
            right.append(-1)
            gain.append(float(rng.integers(1, 20)) if split else 0.0)
            cover.append(mass)
            if split:
                share = float(rng.integers(1, 4)) / 4
                left[start + node] = grow(depth + 1, mass * share)
                right[start + node] = grow(depth + 1, mass * (1 - share))
            return node

        grow(0, 64.0)
        offsets.append(len(feature))
    n = len(feature)
    return ForestGraph.from_arrays(
        feature=feature, threshold=np.zeros(n), left=left, right=right, value=np.zeros(n), tree_offsets=offsets,
        local_children=True, gain=gain, cover=cover, n_features=n_features,
        output_of_tree=np.arange(n_trees) % n_outputs, n_outputs=n_outputs,
    )


def _naive_sets(ens: ForestGraph, walked: list[int], size: int) -> pd.DataFrame:
    """Recursive walk straight from the definitions in structure()'s docstring."""
    rows: dict[tuple, dict] = {}
    total = 0.0

    def entry(members):
        return rows.setdefault(members, {"paths": 0, "trees": set(), "leaf_cover": 0.0, "nested_gain": 0.0,
                                         "first_level": 10**9})

    for t in walked:
        root = int(ens.tree_offsets[t])

        def visit(node: int, ancestors: frozenset, depth: int, t: int = t) -> None:
            nonlocal total
            j = int(ens.feature[node])
            if j < 0:
                total += ens.cover[node]
                for members in combinations(sorted(ancestors), size):
                    e = entry(members)
                    e["paths"] += 1
                    e["trees"].add(t)
                    e["leaf_cover"] += ens.cover[node]
                return
            for others in combinations(sorted(ancestors - {j}), size - 1):
                e = entry(tuple(sorted((*others, j))))
                e["nested_gain"] += ens.gain[node]
                e["first_level"] = min(e["first_level"], depth)
            visit(int(ens.left[node]), ancestors | {j}, depth + 1)
            visit(int(ens.right[node]), ancestors | {j}, depth + 1)

        visit(root, frozenset(), 1)
    out = []
    for members, e in rows.items():
        out.append({**{f"feature_{'abc'[i]}": ens.feature_names[m] for i, m in enumerate(members)},
                    "paths": e["paths"], "trees": len(e["trees"]), "leaf_cover": e["leaf_cover"],
                    "cover_share": e["leaf_cover"] / total, "nested_gain": e["nested_gain"],
                    "first_level": e["first_level"], "first_tree": min(e["trees"])})
    keys = [f"feature_{c}" for c in "abc"[:size]]
    if not out:
        return pd.DataFrame(columns=keys)
    return pd.DataFrame(out).sort_values(keys).reset_index(drop=True)


def _naive_leaf_paths(ens: ForestGraph, walked: list[int]) -> np.ndarray:
    counts = np.zeros(ens.n_features, dtype=np.int64)
    for t in walked:
        def visit(node: int, ancestors: frozenset) -> None:
            j = int(ens.feature[node])
            if j < 0:
                for a in ancestors:
                    counts[a] += 1
                return
            visit(int(ens.left[node]), ancestors | {j})
            visit(int(ens.right[node]), ancestors | {j})

        visit(int(ens.tree_offsets[t]), frozenset())
    return counts


def _sorted(frame: pd.DataFrame, size: int) -> pd.DataFrame:
    keys = [f"feature_{c}" for c in "abc"[:size]]
    return frame.sort_values(keys).reset_index(drop=True)


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**31 - 1),
    n_features=st.sampled_from([1, 3, 5, 70, 130]),
    n_trees=st.integers(1, 5),
    max_depth=st.integers(0, 6),
    chunk_nodes=st.sampled_from([5, 1 << 15]),
    dense_keys=st.sampled_from([0, 1 << 20]),
)
def test_vectorised_walk_equals_naive_walk(seed, n_features, n_trees, max_depth, chunk_nodes, dense_keys):
    """Property: every column equals a naive recursive walker (reference: the definitions, written
    independently in this file), including masks over more than 64 features, many small chunks, and
    sums taken by sorting records (dense_keys=0) or in tables indexed by the set key."""
    ens = _random_ensemble(seed, n_features, n_trees, max_depth)
    walked = list(range(n_trees))
    with mock.patch.object(structure_module, "_CHUNK_NODES", chunk_nodes), \
            mock.patch.object(structure_module, "_DENSE_KEYS", dense_keys):
        result = structure(ens, max_order=3)
    for size, table in ((2, result.pairs), (3, result.triples)):
        naive = _naive_sets(ens, walked, size)
        assert len(table) == len(naive)
        if len(naive):
            pd.testing.assert_frame_equal(_sorted(table, size), naive[table.columns], check_dtype=False)
        assert (np.diff(table["nested_gain"].to_numpy()) <= 1e-9).all()
    np.testing.assert_array_equal(result.features["leaf_paths"].to_numpy(), _naive_leaf_paths(ens, walked))
    pd.testing.assert_frame_equal(result.features[["feature", "splits", "gain", "cover"]], ens.feature_totals())

    # Invariants of the definitions.
    leaf_paths = result.features.set_index("feature")["leaf_paths"]
    pairs = result.pairs
    assert (pairs["paths"] <= np.minimum(leaf_paths[pairs["feature_a"]].to_numpy(),
                                        leaf_paths[pairs["feature_b"]].to_numpy())).all()
    assert pairs["cover_share"].between(0, 1).all() and result.triples["cover_share"].between(0, 1).all()
    assert (pairs["first_level"] >= 2).all() and (result.triples["first_level"] >= 3).all()
    pair_paths = {(a, b): p for a, b, p in pairs[["feature_a", "feature_b", "paths"]].itertuples(index=False)}
    for a, b, c, p in result.triples[["feature_a", "feature_b", "feature_c", "paths"]].itertuples(index=False):
        for sub in ((a, b), (a, c), (b, c)):
            assert pair_paths[sub] >= p


def test_tree_runs_sort_the_same_packed_or_not():
    """(set key, tree) runs found by sorting packed integers equal those of a lexicographic sort, used
    when packing could overflow (reference: numpy's np.unique over the (key, position) rows)."""
    rng = np.random.default_rng(2)
    key = rng.integers(0, 50, size=2000)
    position = rng.integers(3, 40, size=2000)
    expected = np.unique(np.column_stack([key, position]), axis=0)
    for n_keys in (50, 2**62):
        order, starts = structure_module._tree_runs(key, position, n_keys)
        got = np.column_stack([key[order][starts], position[order][starts]])
        np.testing.assert_array_equal(got, expected)


def test_order_four_matches_naive():
    """Order-4 sets against the naive walker on one deeper random model."""
    ens = _random_ensemble(7, 6, 4, 7)
    result = structure(ens, max_order=4)
    table = result.sets[4]
    naive_rows = _naive_sets_generic(ens, 4)
    got = {tuple(r[:4]): (r[4], r[6]) for r in table[["feature_a", "feature_b", "feature_c", "feature_d",
                                                          "paths", "trees", "nested_gain"]].itertuples(index=False)}
    assert got.keys() == naive_rows.keys() and len(got) > 0
    for key, (paths, gain) in got.items():
        assert paths == naive_rows[key][0] and gain == pytest.approx(naive_rows[key][1])


def _naive_sets_generic(ens: ForestGraph, size: int) -> dict:
    out: dict = {}
    for t in range(ens.n_trees):
        def visit(node: int, ancestors: frozenset) -> None:
            j = int(ens.feature[node])
            if j < 0:
                for m in combinations(sorted(ancestors), size):
                    key = tuple(ens.feature_names[i] for i in m)
                    out.setdefault(key, [0, 0.0])[0] += 1
                return
            for others in combinations(sorted(ancestors - {j}), size - 1):
                key = tuple(ens.feature_names[i] for i in sorted((*others, j)))
                out.setdefault(key, [0, 0.0])[1] += ens.gain[node]
            visit(int(ens.left[node]), ancestors | {j})
            visit(int(ens.right[node]), ancestors | {j})

        visit(int(ens.tree_offsets[t]), frozenset())
    return out


# --------------------------------------------------------------------- subsets and rounds
def _comparable(table: pd.DataFrame, mapping: np.ndarray | None = None) -> pd.DataFrame:
    out = table.copy()
    if mapping is not None:
        out["first_tree"] = mapping[out["first_tree"].to_numpy()]
    keys = [c for c in out.columns if c.startswith("feature_")]
    return out.sort_values(keys).reset_index(drop=True)


def test_subsets_equal_walking_a_selected_copy():
    """trees= and output= give the same tables as walking ForestGraph.select_trees copies
    (reference: select_trees, which builds a new ensemble of just those trees)."""
    ens = _random_ensemble(11, 5, 12, 4, n_outputs=3)
    chosen = [2, 5, 7, 8, 11]
    for kwargs, subset in (
        ({"trees": chosen}, np.array(chosen)),
        ({"trees": slice(6, None)}, np.arange(6, 12)),
        ({"output": 1}, ens.trees_of_output(1)),
        ({"trees": chosen, "output": 2}, np.intersect1d(chosen, ens.trees_of_output(2))),
    ):
        direct = structure(ens, **kwargs)
        copy = structure(ens.select_trees(subset))
        for name in ("pairs", "triples"):
            pd.testing.assert_frame_equal(_comparable(getattr(direct, name)),
                                          _comparable(getattr(copy, name), subset))
        pd.testing.assert_frame_equal(direct.features.drop(columns="first_tree"),
                                      copy.features.drop(columns="first_tree"))
        assert list(direct.tree_indices) == list(subset)


def test_rounds_accumulate_to_structure():
    """structure_by_round at round r equals structure() on the trees of rounds 0..r (tree-per-class
    model with 3 outputs: a round is 3 trees), at every checkpoint and at the last round."""
    ens = _random_ensemble(5, 6, 30, 4, n_outputs=3)
    by_round = structure_by_round(ens, step=3, max_order=3)
    assert sorted(by_round["round"].unique()) == [2, 5, 8, 9]
    for last_round in (2, 9):
        expected = structure(ens, max_order=3, trees=slice(0, 3 * (last_round + 1)))
        for size, table in ((2, expected.pairs), (3, expected.triples)):
            got = by_round[(by_round["round"] == last_round) & (by_round["order"] == size)]
            got = got.drop(columns=["round", "order", "first_round"]).dropna(axis=1, how="all")
            pd.testing.assert_frame_equal(_comparable(got), _comparable(table.drop(columns=["first_level", "first_tree"])),
                                          check_dtype=False)
            firsts = got.merge(table, on=[c for c in got.columns if c.startswith("feature_")])
            assert len(firsts) == len(table)
    last = structure(ens, max_order=2)
    merged = by_round[(by_round["round"] == 9) & (by_round["order"] == 2)].merge(last.pairs, on=["feature_a", "feature_b"])
    assert len(merged) == len(last.pairs)
    assert (merged["first_round"] == merged["first_tree"] // 3).all()
    per_output = structure_by_round(ens, step=1, output=1)
    expected = structure(ens, output=1).pairs
    got = per_output[per_output["round"] == 9].drop(columns=["round", "order", "first_round"])
    pd.testing.assert_frame_equal(_comparable(got), _comparable(expected.drop(columns=["first_level", "first_tree"])),
                                  check_dtype=False)


# --------------------------------------------------------------------- the libraries as ground truth
GROUPS = [[0, 1], [2, 3], [4], [5]]
LIB_NAMES = ["fuel_price", "shift_length", "crew_size", "route_km", "depot_age", "rain_mm"]


@pytest.fixture(scope="module")
def interaction_data():
    """Target with genuine fuel_price*shift_length and crew_size*route_km products plus additive terms."""
    rng = np.random.default_rng(0)
    X = rng.uniform(-1, 1, size=(1500, 6))
    y = 3 * X[:, 0] * X[:, 1] + 3 * X[:, 2] * X[:, 3] + X[:, 4] + np.sin(2 * X[:, 5]) + 0.05 * rng.normal(size=1500)
    return X, y


def _group_of(name: str) -> int:
    index = LIB_NAMES.index(name)
    return next(g for g, members in enumerate(GROUPS) if index in members)


def _assert_respects_groups(result) -> None:
    cross = [(a, b) for a, b in result.pairs[["feature_a", "feature_b"]].itertuples(index=False)
             if _group_of(a) != _group_of(b)]
    assert cross == []
    found = set(result.pairs[["feature_a", "feature_b"]].itertuples(index=False, name=None))
    assert {("fuel_price", "shift_length"), ("crew_size", "route_km")} <= found
    assert len(result.triples) == 0


def test_xgboost_interaction_constraints(interaction_data):
    """XGBoost trained with interaction_constraints=[[0,1],[2,3],[4],[5]] (XGBoost documentation,
    "Feature Interaction Constraints"): no pair crosses groups, the two product pairs appear; the same
    model without constraints does cross groups (so the check can fail)."""
    xgb = pytest.importorskip("xgboost")
    X, y = interaction_data
    dtrain = xgb.DMatrix(X, label=y, feature_names=LIB_NAMES)
    params = {"max_depth": 4, "eta": 0.3, "tree_method": "hist", "nthread": 1, "seed": 0}
    constrained = xgb.train({**params, "interaction_constraints": str(GROUPS)}, dtrain, num_boost_round=40)
    _assert_respects_groups(structure(treeprobe.load_model(constrained)))
    free = structure(treeprobe.load_model(xgb.train(params, dtrain, num_boost_round=40)))
    assert any(_group_of(a) != _group_of(b) for a, b in free.pairs[["feature_a", "feature_b"]].itertuples(index=False))


def test_lightgbm_interaction_constraints(interaction_data):
    """LightGBM trained with interaction_constraints (LightGBM parameter documentation): no pair
    crosses groups, the two product pairs appear."""
    lgb = pytest.importorskip("lightgbm")
    X, y = interaction_data
    params = {"objective": "regression", "num_leaves": 12, "learning_rate": 0.2, "min_data_in_leaf": 10,
              "interaction_constraints": GROUPS, "verbose": -1, "num_threads": 1, "seed": 0}
    booster = lgb.train(params, lgb.Dataset(X, label=y, feature_name=LIB_NAMES), num_boost_round=40)
    _assert_respects_groups(structure(treeprobe.load_model(booster)))


@pytest.fixture(scope="module")
def xgb_model(interaction_data):
    xgb = pytest.importorskip("xgboost")
    X, y = interaction_data
    dtrain = xgb.DMatrix(X, label=y, feature_names=LIB_NAMES)
    params = {"max_depth": 3, "eta": 0.3, "tree_method": "hist", "nthread": 1, "seed": 0}
    return xgb.train(params, dtrain, num_boost_round=30), X


def test_xgboost_feature_totals_equal_get_score(xgb_model):
    """features.splits/gain/cover equal XGBoost's Booster.get_score weight/total_gain/total_cover, and the
    total leaf cover is rows x trees (squared error has hessian 1 per row: Chen & Guestrin 2016, eq. 2-6)."""
    booster, X = xgb_model
    result = structure(treeprobe.load_model(booster))
    features = result.features.set_index("feature")
    for column, kind in (("splits", "weight"), ("gain", "total_gain"), ("cover", "total_cover")):
        native = booster.get_score(importance_type=kind)
        for name in LIB_NAMES:
            assert features.loc[name, column] == pytest.approx(native.get(name, 0.0), rel=1e-5)
    assert result.total_leaf_cover == pytest.approx(X.shape[0] * booster.num_boosted_rounds(), rel=1e-6)


def test_absent_pairs_have_zero_shap_interaction(xgb_model):
    """A pair on no common path has SHAP interaction value 0 for every row: each leaf term depends on its
    path features only (Lundberg, Erion & Lee 2018, SHAP interaction values, eq. 8-10), computed by
    XGBoost's predict(pred_interactions=True). Conversely every pair with a clearly non-zero
    interaction value is in the pairs table."""
    xgb = pytest.importorskip("xgboost")
    booster, X = xgb_model
    result = structure(treeprobe.load_model(booster), max_order=2)
    present = {frozenset(p) for p in result.pairs[["feature_a", "feature_b"]].itertuples(index=False, name=None)}
    values = booster.predict(xgb.DMatrix(X[:300], feature_names=LIB_NAMES), pred_interactions=True)
    strength = np.abs(values[:, :-1, :-1]).max(axis=0)
    for i, j in combinations(range(len(LIB_NAMES)), 2):
        if frozenset((LIB_NAMES[i], LIB_NAMES[j])) in present:
            continue
        assert strength[i, j] < 1e-5
    assert any(strength[i, j] > 1e-3 for i, j in combinations(range(6), 2))


def test_lightgbm_feature_totals_equal_feature_importance(interaction_data):
    """features.splits/gain equal LightGBM's Booster.feature_importance("split" / "gain")."""
    lgb = pytest.importorskip("lightgbm")
    X, y = interaction_data
    params = {"objective": "regression", "num_leaves": 8, "verbose": -1, "num_threads": 1, "seed": 0}
    booster = lgb.train(params, lgb.Dataset(X, label=y), num_boost_round=25)
    features = structure(treeprobe.load_model(booster)).features
    np.testing.assert_array_equal(features["splits"], booster.feature_importance("split"))
    np.testing.assert_allclose(features["gain"], booster.feature_importance("gain"), rtol=1e-6)


def test_rounds_match_xgboost_model_slices(interaction_data):
    """A round is one boosting iteration: for a 3-class XGBoost model, structure_by_round at round r equals
    structure() of XGBoost's own slice booster[0:r + 1] (xgboost Booster slicing by iteration), and the last
    round is num_boosted_rounds() - 1."""
    xgb = pytest.importorskip("xgboost")
    X, y = interaction_data
    label = np.digitize(y, np.quantile(y, [1 / 3, 2 / 3]))
    params = {"objective": "multi:softprob", "num_class": 3, "max_depth": 3, "nthread": 1, "seed": 0}
    booster = xgb.train(params, xgb.DMatrix(X, label=label, feature_names=LIB_NAMES), num_boost_round=8)
    by_round = structure_by_round(treeprobe.load_model(booster), step=4, output=2)
    assert sorted(by_round["round"].unique()) == [3, booster.num_boosted_rounds() - 1]
    for last_round in (3, 7):
        sliced = structure(treeprobe.load_model(booster[0:last_round + 1]), output=2).pairs
        got = by_round[by_round["round"] == last_round].drop(columns=["round", "order", "first_round"])
        pd.testing.assert_frame_equal(_comparable(got), _comparable(sliced.drop(columns=["first_level", "first_tree"])),
                                      check_dtype=False, rtol=1e-6)


def test_results_compare_and_keep_their_columns(two_trees):
    """StructureResult == compares tables and facts without raising; triples keeps its columns at max_order=2."""
    pairs_only, again, deeper = (structure(two_trees, max_order=2), structure(two_trees, max_order=2),
                                 structure(two_trees, max_order=3))
    assert pairs_only == again and pairs_only != deeper and pairs_only != "a result"
    assert pairs_only.triples.empty and len(deeper.triples) > 0
    assert list(pairs_only.triples.columns) == list(deeper.triples.columns)
    assert list(pairs_only.triples.dtypes) == list(deeper.triples.dtypes)
