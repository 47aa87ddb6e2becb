"""Tests of the common graph on hand-built trees.

The references here are hand calculations written beside each case, and, for
the float32 comparison rule, scikit-learn's own ``DecisionTreeRegressor``
(which compares ``float32(x) <= threshold``).
"""

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from treeprobe import DataError, ForestGraph, ModelFormatError


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
