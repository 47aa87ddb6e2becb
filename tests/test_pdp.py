"""Partial dependence (treeprobe.pdp) against scikit-learn's inspection module and brute force.

References: Friedman (2001), "Greedy function approximation", eq. 9 (the
empirical partial dependence); scikit-learn's
``sklearn.inspection.partial_dependence(method="brute", kind="average")`` as the
outside implementation of the same estimate.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from sklearn.ensemble import GradientBoostingRegressor
from sklearn.inspection import partial_dependence as sklearn_partial_dependence

from treeprobe import DataError, load_model
from treeprobe.errors import ParameterError
from treeprobe.pdp import partial_dependence


@pytest.fixture(scope="module")
def delivery_data():
    rng = np.random.default_rng(7)
    n = 300
    X = np.column_stack([
        rng.uniform(0, 10, n),   # shift_length
        rng.normal(2.0, 0.5, n),  # fuel_price
        rng.integers(0, 5, n).astype(float),  # stops
    ])
    y = X[:, 0] * X[:, 1] + np.sin(X[:, 2]) + rng.normal(scale=0.2, size=n)
    return X, y


def _sklearn_average(estimator, X, features):
    result = sklearn_partial_dependence(estimator, X, features, method="brute", kind="average", grid_resolution=7)
    grids = result["grid_values"]
    points = np.array(list(itertools.product(*grids)))
    return points, result["average"][0].ravel()


@pytest.mark.parametrize("features", [[0], [1], [0, 1], [1, 2]])
def test_exact_matches_sklearn_on_gradient_boosting(delivery_data, features):
    """Exact tree partial dependence equals scikit-learn's brute-force average (Friedman 2001, eq. 9)."""
    X, y = delivery_data
    model = GradientBoostingRegressor(n_estimators=40, max_depth=3, random_state=0).fit(X, y)
    points, expected = _sklearn_average(model, X, features)
    got = partial_dependence(model, X, features, points, method="exact")
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("features", [[0], [0, 1], [0, 2]])
def test_exact_matches_sklearn_on_xgboost(delivery_data, features):
    """XGBoost predicts in float32, so scikit-learn's average of its predictions agrees to ~1e-6 relative."""
    xgb = pytest.importorskip("xgboost")
    X, y = delivery_data
    model = xgb.XGBRegressor(n_estimators=30, max_depth=3, learning_rate=0.3, random_state=0, n_jobs=1).fit(X, y)
    points, expected = _sklearn_average(model, X, features)
    got = partial_dependence(model, X, features, points)
    np.testing.assert_allclose(got, expected, rtol=2e-6, atol=1e-5)


def test_exact_equals_brute_with_missing_categories_and_classes():
    """Exact partial dependence equals brute force on the common graph (float64) for a multiclass LightGBM
    model with a categorical feature and NaNs, at grid points that include NaN and an unseen category."""
    lgb = pytest.importorskip("lightgbm")
    rng = np.random.default_rng(3)
    n = 400
    frame = pd.DataFrame({
        "route_km": rng.uniform(0, 50, n),
        "depot": pd.Categorical(rng.choice(["harbour", "airport", "market"], n)),
        "wind_speed": rng.normal(size=n),
    })
    frame.loc[rng.random(n) < 0.2, "wind_speed"] = np.nan
    signal = frame.route_km / 10 * (frame.depot.cat.codes == 1) + np.nan_to_num(frame.wind_speed)
    label = np.digitize(signal, np.quantile(signal, [0.33, 0.66]))
    model = lgb.LGBMClassifier(n_estimators=15, num_leaves=8, min_child_samples=5, verbose=-1).fit(frame, label)
    ensemble = load_model(model)
    grid = np.array([[5.0, 0], [25.0, 1], [45.0, 2], [10.0, 7], [np.nan, 1], [30.0, np.nan]])
    exact = partial_dependence(ensemble, frame, ["route_km", "depot"], grid, method="exact")
    brute = partial_dependence(ensemble, frame, ["route_km", "depot"], grid, method="brute")
    assert exact.shape == (6, 3)
    np.testing.assert_allclose(exact, brute, rtol=1e-9, atol=1e-12)
    one = partial_dependence(ensemble, frame, ["wind_speed"], [[np.nan], [0.0], [1.0]], output=2)
    np.testing.assert_allclose(one, partial_dependence(ensemble, frame, ["wind_speed"], [[np.nan], [0.0], [1.0]],
                                                       output=2, method="brute"), rtol=1e-9)


def test_callable_closed_form():
    """For f = x0 * x1, F_0(z) = z * mean(x1) (Friedman 2001, eq. 9, by hand)."""
    X = np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 9.0]])
    got = partial_dependence(lambda A: A[:, 0] * A[:, 1], X, [0], [[1.0], [2.0]])
    np.testing.assert_allclose(got, [5.0, 10.0])


def test_bad_arguments_name_the_parameter(delivery_data):
    X, y = delivery_data
    f = lambda A: A[:, 0]  # noqa: E731
    with pytest.raises(ParameterError, match="method"):
        partial_dependence(f, X, [0], [[1.0]], method="fast")
    with pytest.raises(ParameterError, match="exact"):
        partial_dependence(f, X, [0], [[1.0]], method="exact")
    with pytest.raises(ParameterError, match="grid"):
        partial_dependence(f, X, [0, 1], [[1.0]])
    with pytest.raises(ParameterError, match="unknown feature 'wind'"):
        partial_dependence(f, X, ["wind"], [[1.0]])
    with pytest.raises(DataError, match="shape"):
        partial_dependence(lambda A: A[:2, 0], X, [0], [[1.0]])


# --------------------------------------------------------------------------- the bit-set engine's cells
def _random_graph(rng, *, rule, zero_as_missing, n_trees=30):
    """Full trees of depth 1..3 on three features, feature 2 categorical; thresholds that rows also take."""
    from treeprobe.graph import ForestGraph

    grid = np.array([-1.5, 0.0, 1e-36, 0.25, 0.5, 2.0])
    spec = {key: [] for key in ("feature", "threshold", "left", "right", "value", "missing_left", "zero_as_missing",
                                "is_categorical", "categories")}
    offsets = [0]
    for _ in range(n_trees):
        depth = int(rng.integers(1, 4))
        n_inner = 2**depth - 1
        for node in range(2 ** (depth + 1) - 1):
            feature = int(rng.integers(3)) if node < n_inner else -1
            spec["feature"].append(feature)
            spec["threshold"].append(float(rng.choice(grid)) if feature in (0, 1) else np.nan)
            spec["left"].append(2 * node + 1 if feature >= 0 else -1)
            spec["right"].append(2 * node + 2 if feature >= 0 else -1)
            spec["value"].append(float(rng.normal()) if feature < 0 else 0.0)
            spec["missing_left"].append(bool(rng.integers(2)))
            spec["zero_as_missing"].append(bool(zero_as_missing and rng.integers(2)))
            spec["is_categorical"].append(feature == 2)
            spec["categories"].append(sorted(rng.choice(4, size=2, replace=False).tolist()) if feature == 2 else [])
        offsets.append(offsets[-1] + 2 ** (depth + 1) - 1)
    return ForestGraph.from_arrays(**spec, local_children=True, tree_offsets=offsets, threshold_rule=rule,
                                   n_features=3)


def _random_rows(rng, n):
    numeric = rng.choice([-1.5, -1e-40, 0.0, 1e-36, 0.25, 0.5, 0.7, 2.0, np.nan], size=(n, 2))
    return np.column_stack([numeric, rng.choice([0.0, 1.0, 2.0, 3.0, 5.0, np.nan], size=n)])


@pytest.mark.parametrize("rule, zero_as_missing", [("<", False), ("<=", True)])
def test_cells_route_like_the_node_rule(rule, zero_as_missing):
    """Rows passing each path condition, from cell intervals and bit sets, against ForestGraph's own routing
    (``failed_conditions`` applies ``_goes_left`` split by split): ties, zeros read as missing, NaN, categories."""
    from treeprobe import pdp

    rng = np.random.default_rng(3)
    graph = _random_graph(rng, rule=rule, zero_as_missing=zero_as_missing)
    rows = _random_rows(rng, 150)
    trees, node_value = pdp.leaf_value_column(graph, 0)
    table = pdp.path_table(graph, trees, node_value, pdp.parent_links(graph))
    cells = pdp.row_cells(graph, rows)
    passes = pdp._entry_rows(table, cells, pdp.entry_cells(graph, table, cells))
    fail, _ = pdp.failed_conditions(graph, table, rows)
    np.testing.assert_array_equal(pdp._unpack(passes, rows.shape[0]).astype(bool), ~fail)


def test_exact_equals_brute_on_random_graphs_with_every_routing_case():
    """Exact H (pairs, triples, one-vs-rest) equals brute force on the same graph (Friedman & Popescu 2008,
    eqs. 44-46, both ways), on rows full of ties, zeros read as missing, NaN and categories."""
    from treeprobe.measure import h_statistic

    rng = np.random.default_rng(8)
    graph = _random_graph(rng, rule="<=", zero_as_missing=True, n_trees=40)
    rows = _random_rows(rng, 90)
    options = dict(sample=None, triples=True)
    exact, brute = h_statistic(graph, rows, **options), h_statistic(graph, rows, method="brute", **options)
    for table, keys in (("pairs", ["feature_a", "feature_b"]), ("against_rest", ["feature"]),
                        ("triples", ["feature_a", "feature_b", "feature_c"])):
        merged = getattr(exact, table).merge(getattr(brute, table), on=keys, suffixes=("_exact", "_brute"))
        assert len(merged) == len(getattr(exact, table)) > 0
        np.testing.assert_allclose(merged.h_exact, merged.h_brute, rtol=1e-9, atol=1e-12)


def test_popcount_fallback_counts_like_bitwise_count():
    from treeprobe import pdp

    words = np.random.default_rng(1).integers(0, 2**63, size=(7, 5), dtype=np.int64).astype(np.uint64) * np.uint64(3)
    expected = np.array([[bin(int(w)).count("1") for w in row] for row in words]).sum(axis=1)
    np.testing.assert_array_equal(pdp._popcount_by_bytes(words), expected)
    np.testing.assert_array_equal(pdp._popcount(words), expected)


@pytest.mark.parametrize("n_sets", [40, 3000])  # few non-zero bytes (spread one by one), many (byte tables)
def test_weighted_row_sums_match_a_dense_product(n_sets):
    """The byte-wise sums of weighted row sets equal the plain product of unpacked bits and weights."""
    from treeprobe import pdp

    rng = np.random.default_rng(4)
    bits = rng.random((n_sets, 150)) < 0.3
    words = np.packbits(np.pad(bits, ((0, 0), (0, 192 - 150))), axis=1, bitorder="little").view("<u8")
    group, weight = rng.integers(0, 3, n_sets), rng.normal(size=n_sets)
    expected = np.array([(weight[group == g][:, None] * bits[group == g]).sum(axis=0) for g in range(3)])
    np.testing.assert_allclose(pdp._weighted_row_sums(words, group, weight, 3, 150), expected, rtol=1e-12, atol=1e-12)
