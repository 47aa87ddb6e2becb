"""Tests of the common graph on hand-built trees.

The references here are hand calculations written beside each case, and, for
the float32 comparison rule, scikit-learn's own ``DecisionTreeRegressor``
(which compares ``float32(x) <= threshold``).
"""

import dataclasses

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from treeprobe import DataError, ForestGraph, ModelFormatError
from treeprobe.graph import Provenance


def _two_trees(**overrides):
    # tree 0: x0 <= 0.5 ? 1.0 : (x1 <= 2 ? 2.0 : 3.0), NaN in x0 goes left
    # tree 1: x1 in {1, 3} ? 10 : 20 (categorical), NaN goes right
    spec = dict(
        feature=[0, -1, 1, -1, -1, 1, -1, -1],
        threshold=[0.5, np.nan, 2.0, np.nan, np.nan, np.nan, np.nan, np.nan],
        left=[1, -1, 3, -1, -1, 1, -1, -1],
        right=[2, -1, 4, -1, -1, 2, -1, -1],
        local_children=True,
        value=[0, 1.0, 0, 2.0, 3.0, 0, 10.0, 20.0],
        tree_offsets=[0, 5, 8],
        is_categorical=[0, 0, 0, 0, 0, 1, 0, 0],
        categories=[[], [], [], [], [], [3, 1], [], []],
        missing_left=[1, 0, 0, 0, 0, 0, 0, 0],
        gain=[5.0, 0, 2.0, 0, 0, 7.0, 0, 0],
        cover=[100.0, 40, 60, 30, 30, 100, 50, 50],
        base_score=0.5,
        feature_names=["speed", "zone"],
    )
    spec.update(overrides)
    return ForestGraph.from_arrays(**spec)


def test_predict_raw_hand_counted():
    ens = _two_trees()
    X = np.array([[0.2, 1], [0.7, 1], [0.7, 3], [np.nan, 2], [0.9, np.nan], [0.7, -1], [0.7, 3.7]])
    # row: tree0 + tree1 + base
    expected = [1 + 10, 2 + 10, 3 + 10, 1 + 20, 3 + 20, 2 + 20, 3 + 10]
    np.testing.assert_allclose(ens.predict_raw(X), np.array(expected) + 0.5)


def test_category_direction_flag_reverses_listed_set():
    ens = _two_trees(category_left=[True] * 5 + [False] + [True] * 2)
    X = np.array([[0.2, 1], [0.2, 2], [0.2, np.nan]])
    # listed {1,3} now go right (20); unlisted 2 goes left (10); NaN right (20)
    np.testing.assert_allclose(ens.predict_raw(X), [0.5 + 1 + 20, 0.5 + 1 + 10, 0.5 + 1 + 20])


def test_threshold_rule_strict_and_float32_cast():
    # A value equal to the threshold goes right under "<" and left under "<=".
    ens_lt = _two_trees(threshold_rule="<")
    ens_le = _two_trees(threshold_rule="<=")
    X = np.array([[0.5, 5.0]])
    assert ens_lt.predict_raw(X)[0] == pytest.approx(0.5 + 3 + 20)
    assert ens_le.predict_raw(X)[0] == pytest.approx(0.5 + 1 + 20)
    # float32 input: a float64 value just above a float32 threshold rounds onto it
    t = float(np.float32(0.1))
    x = np.nextafter(t, 1.0)
    ens32 = _two_trees(threshold=[t] + [np.nan, 2.0] + [np.nan] * 5, split_dtype="float32")
    ens64 = _two_trees(threshold=[t] + [np.nan, 2.0] + [np.nan] * 5, split_dtype="float64")
    X = np.array([[x, 5.0]])
    assert ens32.predict_raw(X)[0] == pytest.approx(0.5 + 1 + 20)
    assert ens64.predict_raw(X)[0] == pytest.approx(0.5 + 3 + 20)


def test_float32_rule_matches_scikit_learn_tree():
    # Reference: scikit-learn DecisionTreeRegressor routes float32(x) <= threshold.
    from sklearn.tree import DecisionTreeRegressor

    rng = np.random.default_rng(0)
    X = rng.normal(size=(200, 1))
    y = (X[:, 0] > 0.1).astype(float)
    model = DecisionTreeRegressor(max_depth=1).fit(X, y)
    t = model.tree_.threshold[0]
    probe = np.array([[t], [np.nextafter(t, np.inf)], [np.nextafter(t, -np.inf)], [float(np.float32(t)) + 1e-9]])
    ens = ForestGraph.from_arrays(
        feature=[0, -1, -1], threshold=[t, np.nan, np.nan], left=[1, -1, -1], right=[2, -1, -1],
        value=model.tree_.value[:, 0, 0], tree_offsets=[0, 3], split_dtype="float32",
    )
    np.testing.assert_allclose(ens.predict_raw(probe), model.predict(probe))


def test_zero_as_missing():
    ens = _two_trees(zero_as_missing=[1, 0, 0, 0, 0, 0, 0, 0], missing_left=[0] * 8)
    X = np.array([[0.0, 5.0], [1e-40, 5.0], [0.2, 5.0]])
    # 0 and |x| <= 1e-35 count as missing -> right subtree (x1=5 -> 3.0); 0.2 -> left (1.0)
    np.testing.assert_allclose(ens.predict_raw(X), [0.5 + 3 + 20, 0.5 + 3 + 20, 0.5 + 1 + 20])


def test_multiclass_tree_per_output_and_vector_leaves():
    stump = dict(feature=[0, -1, -1], threshold=[0.0, np.nan, np.nan], left=[1, -1, -1], right=[2, -1, -1])
    ens = ForestGraph.from_arrays(
        feature=stump["feature"] * 2, threshold=stump["threshold"] * 2, left=stump["left"] * 2,
        right=stump["right"] * 2, local_children=True, value=[0, 1, 2, 0, 3, 4], tree_offsets=[0, 3, 6],
        output_of_tree=[0, 1], tree_weight=[0.5, 2.0], base_score=[0.1, 0.2], n_outputs=2, link="softmax",
    )
    out = ens.predict_raw(np.array([[-1.0], [1.0]]))
    np.testing.assert_allclose(out, [[0.1 + 0.5, 0.2 + 6.0], [0.1 + 1.0, 0.2 + 8.0]])
    proba = ens.predict(np.array([[-1.0]]))
    np.testing.assert_allclose(proba.sum(axis=1), 1.0)
    vec = ForestGraph.from_arrays(
        feature=stump["feature"], threshold=stump["threshold"], left=stump["left"], right=stump["right"],
        value=[[0, 0], [0.25, 0.75], [0.9, 0.1]], tree_offsets=[0, 3], link="proba",
    )
    np.testing.assert_allclose(vec.predict_raw(np.array([[-1.0], [1.0]])), [[0.25, 0.75], [0.9, 0.1]])


@pytest.mark.parametrize(
    "change, message",
    [
        (dict(left=[1, -1, 7, -1, -1, 1, -1, -1]), "out of range"),
        (dict(left=[1, -1, 0, -1, -1, 1, -1, -1]), "root"),
        (dict(left=[1, -1, 3, -1, -1, 1, -1, -1], right=[2, -1, 3, -1, -1, 2, -1, -1]), "parents"),
        (dict(feature=[0, -1, 9, -1, -1, 1, -1, -1]), "feature 9"),
        (dict(tree_offsets=[0, 5, 9]), "tree_offsets"),
        (dict(value=[0, np.inf, 0, 2, 3, 0, 10, 20]), "non-finite"),
        (dict(link="probit"), "link"),
        (dict(categories=[[], [], [], [], [], [-3, 1], [], []]), "category -3"),
        (dict(categories=[[], [], [], [], [], [2**40], [], []]), "codes must lie"),
    ],
)
def test_invalid_graphs_raise_model_format_error(change, message):
    with pytest.raises(ModelFormatError, match=message):
        _two_trees(**change)


def test_cycle_between_inner_nodes_is_reported():
    # node 2's right child points back to node 2's parent chain: 2 -> 4 -> 2
    with pytest.raises(ModelFormatError):
        ForestGraph.from_arrays(
            feature=[0, -1, 1, -1, 1], threshold=[0, 0, 0, 0, 0], left=[1, -1, 3, -1, 2], right=[2, -1, 4, -1, 3],
            value=np.zeros(5), tree_offsets=[0, 5],
        )


def test_select_trees_is_a_partial_sum():
    ens = _two_trees()
    X = np.array([[0.2, 1], [0.7, 3], [np.nan, 2]])
    part0 = ens.select_trees([0]).predict_raw(X)
    part1 = ens.select_trees(slice(1, 2)).predict_raw(X)
    np.testing.assert_allclose(part0 + part1 - 0.5, ens.predict_raw(X))
    assert ens.select_trees([1]).n_nodes == 3


def test_check_x_by_name_and_errors():
    ens = _two_trees()
    frame = pd.DataFrame({"zone": [1.0, 3.0], "extra": [0, 0], "speed": [0.2, 0.7]})
    np.testing.assert_allclose(ens.predict_raw(frame), ens.predict_raw(np.array([[0.2, 1.0], [0.7, 3.0]])))
    with pytest.raises(DataError, match="speed"):
        ens.predict_raw(pd.DataFrame({"zone": [1.0]}))
    with pytest.raises(DataError, match="3 columns"):
        ens.predict_raw(np.zeros((2, 3)))
    cat = pd.DataFrame({"speed": [0.2, 0.2], "zone": pd.Categorical(["a", None], categories=["z", "a"])})
    # "a" has code 1 (listed -> 10), missing -> NaN -> right (20)
    np.testing.assert_allclose(ens.predict_raw(cat), [0.5 + 1 + 10, 0.5 + 1 + 20])


def test_feature_totals_summary_and_networkx():
    ens = _two_trees()
    totals = ens.feature_totals().set_index("feature")
    assert totals.loc["speed", "splits"] == 1 and totals.loc["zone", "splits"] == 2
    assert totals.loc["zone", "gain"] == pytest.approx(9.0)
    assert totals.loc["zone", "cover"] == pytest.approx(160.0)
    s = ens.summary()
    assert (s["n_trees"], s["n_leaves"], s["max_depth"]) == (2, 5, 2)
    g = ens.to_networkx(0)
    assert isinstance(g, nx.DiGraph) and g.number_of_nodes() == 5 and g.number_of_edges() == 4
    assert nx.is_arborescence(g)
    assert g.nodes[0]["feature"] == "speed" and g.nodes[3]["value"] == (2.0,)
    assert g.edges[0, 1]["branch"] == "left"


# ------------------------------------------------- read-only arrays and typed facts
_ARRAY_FIELDS = [f.name for f in dataclasses.fields(ForestGraph) if f.type in ("np.ndarray", np.ndarray)]


def test_every_array_is_read_only_after_validation():
    ens = _two_trees()
    assert len(_ARRAY_FIELDS) == 19
    for name in _ARRAY_FIELDS:
        arr = getattr(ens, name)
        with pytest.raises(ValueError, match="read-only"):
            arr[..., 0] = arr[..., 0]
    with pytest.raises(ValueError, match="read-only"):
        ens.depth[0] = 7
    for name in ("left", "feature", "value"):
        with pytest.raises(ValueError, match="read-only"):
            getattr(ens.select_trees([1]), name)[0] = 0


def test_a_view_passed_in_is_copied_so_its_base_cannot_change_the_graph():
    base = np.array([0.5, np.nan, 2.0, np.nan, np.nan, np.nan, np.nan, np.nan, 99.0])
    ens = _two_trees(threshold=base[:8])
    base[0] = 10.0
    assert ens.threshold[0] == 0.5
    # Hand count: speed 0.7 > 0.5 goes right, zone 1 <= 2 -> 2.0; zone 1 is listed -> 10.0.
    assert ens.predict_raw(np.array([[0.7, 1.0]]))[0] == pytest.approx(0.5 + 2 + 10)


def test_cached_depths_follow_replace_and_cannot_go_stale():
    # Inner nodes 0 and 1; node 1's leaves 2 and 3 sit at depth 2.
    ens = ForestGraph.from_arrays(
        feature=[0, 0, -1, -1, -1], threshold=[1.0, 0.0, np.nan, np.nan, np.nan], left=[1, 2, -1, -1, -1],
        right=[4, 3, -1, -1, -1], value=[0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 5])
    assert ens.depth.tolist() == [0, 1, 2, 2, 1]
    # Rewired: node 2 is now the inner node, its leaves 3 and 4 at depth 2; a stale cache would keep [0, 1, 2, 2, 1].
    rewired = dataclasses.replace(ens, feature=np.array([0, -1, 0, -1, -1], np.int32),
                                  threshold=np.array([1.0, np.nan, 0.0, np.nan, np.nan]),
                                  left=np.array([1, -1, 3, -1, -1], np.int32), right=np.array([2, -1, 4, -1, -1], np.int32))
    assert rewired.depth.tolist() == [0, 1, 1, 2, 2]
    assert ens.depth.tolist() == [0, 1, 2, 2, 1]
    assert rewired.select_trees([0]).depth.tolist() == [0, 1, 1, 2, 2]
    # Hand count: x = 2 > 1 goes right to node 2, 2 > 0 goes right to leaf 4 (3.0).
    assert rewired.predict_raw(np.array([[2.0]]))[0] == 3.0


@pytest.mark.parametrize("change, message", [
    (dict(left=np.array([1, -1, 3, -1, -1, 1, -1, -1], np.int32)), "another tree"),
    (dict(link="probit"), "unknown link"),
    (dict(unseen_category="ignore"), "unseen_category"),
    (dict(negative_category="floor"), "negative_category"),
    (dict(trees_per_round=0), "trees_per_round"),
    (dict(link_scale=float("nan")), "link_scale"),
    (dict(category_levels={"colour": ("red",)}), "colour"),
])
def test_replace_validates_again(change, message):
    with pytest.raises(ModelFormatError, match=message):
        dataclasses.replace(_two_trees(), **change)


def test_negative_category_rule():
    # Tree 1 lists zone categories {1, 3} (left, 10) against the rest (20); a category-0 split is added
    # by listing {0}: "truncate" (LightGBM's cast to int) reads -0.5 as 0, "none" reads it as no category.
    none = _two_trees(categories=[[], [], [], [], [], [0], [], []])
    truncate = _two_trees(categories=[[], [], [], [], [], [0], [], []], negative_category="truncate")
    X = np.array([[0.2, -0.5], [0.2, 0.0], [0.2, -1.0]])
    np.testing.assert_allclose(none.predict_raw(X), 0.5 + 1 + np.array([20, 10, 20]))
    np.testing.assert_allclose(truncate.predict_raw(X), 0.5 + 1 + np.array([10, 10, 20]))


def test_typed_facts_and_provenance():
    ens = _two_trees(library="xgboost", objective="reg:squarederror", source="hand.json")
    assert ens.provenance == Provenance(library="xgboost", objective="reg:squarederror", source="hand.json")
    assert (ens.library, ens.objective, ens.source) == ("xgboost", "reg:squarederror", "hand.json")
    assert ens.generic_feature_names is False and _two_trees(feature_names=None).generic_feature_names is True
    assert (ens.link_scale, ens.unseen_category, ens.negative_category, ens.trees_per_round) == (1.0, "missing", "none", 1)
    levelled = _two_trees(category_levels={"zone": ["north", "south"]})
    assert levelled.category_levels["zone"] == ("north", "south")
    with pytest.raises(TypeError):
        levelled.category_levels["zone"] = ("east",)
    with pytest.raises(TypeError):
        Provenance(stored_params={"eta": 0.3}).stored_params["eta"] = 1.0
    with pytest.raises(dataclasses.FrozenInstanceError):
        ens.link_scale = 2.0
    # Graphs compare by identity and never raise.
    assert ens == ens and ens != _two_trees()


def test_logit_link_scale_is_applied_inside_the_sigmoid():
    ens = _two_trees(link="logit", link_scale=2.0)
    raw = ens.predict_raw(np.array([[0.2, 1.0]]))
    # p = 1 / (1 + exp(-2 raw)), the binary objective of LightGBM with sigmoid=2 (LightGBM docs, "sigmoid").
    np.testing.assert_allclose(ens.predict(np.array([[0.2, 1.0]])), 1 / (1 + np.exp(-2 * raw)))


def _random_forest_graph(rng, *, n_trees, n_features, rule, split_dtype, zero_as_missing):
    """Random full trees of depth 1..4 whose thresholds are values the rows also take (ties on purpose)."""
    grid = np.array([-1.5, -1e-40, 0.0, 1e-36, 0.25, 0.5, 2.0], dtype=np.float32).astype(np.float64)
    spec = {key: [] for key in ("feature", "threshold", "left", "right", "value", "missing_left", "zero_as_missing")}
    offsets = [0]
    for _ in range(n_trees):
        depth = int(rng.integers(1, 5))
        n_inner, n_nodes = 2**depth - 1, 2 ** (depth + 1) - 1
        for node in range(n_nodes):
            inner = node < n_inner
            spec["feature"].append(int(rng.integers(n_features)) if inner else -1)
            spec["threshold"].append(float(rng.choice(grid)) if inner else np.nan)
            spec["left"].append(2 * node + 1 if inner else -1)
            spec["right"].append(2 * node + 2 if inner else -1)
            spec["value"].append(float(rng.normal()) if not inner else 0.0)
            spec["missing_left"].append(bool(rng.integers(2)))
            spec["zero_as_missing"].append(bool(zero_as_missing and rng.integers(2)))
        offsets.append(offsets[-1] + n_nodes)
    return ForestGraph.from_arrays(**spec, local_children=True, tree_offsets=offsets, threshold_rule=rule,
                                   split_dtype=split_dtype, n_features=n_features)


@pytest.mark.parametrize("rule, split_dtype, zero_as_missing",
                         [("<", "float32", False), ("<=", "float64", True), ("<", "float64", True)])
def test_fast_walk_routes_like_the_node_rule(rule, split_dtype, zero_as_missing):
    # Reference: the per-node routing rule of the module docstring (ForestGraph._goes_left), walked
    # level by level; the fast walk replaces missing values by infinities and must agree on every row.
    rng = np.random.default_rng(5)
    graph = _random_forest_graph(rng, n_trees=40, n_features=3, rule=rule, split_dtype=split_dtype,
                                 zero_as_missing=zero_as_missing)
    values = np.array([-np.inf, -1.5, -1e-40, -0.0, 0.0, 1e-36, 0.25, 0.5, 0.7, 2.0, np.inf, np.nan])
    X = rng.choice(values, size=(500, 3))
    arr = X.astype(graph.split_dtype)
    expected = graph._walk_generic(arr, np.arange(graph.n_trees))
    assert graph._routing().generic_trees.size == 0
    # checked=True: the walk itself must cope with infinities, which model_matrix would refuse.
    np.testing.assert_array_equal(graph.apply(X, checked=True), expected)
    by_hand = graph.base_score[0] + graph.value[expected, 0].sum(axis=1)
    np.testing.assert_allclose(graph.predict_raw(X, checked=True), by_hand, rtol=0, atol=1e-12)
