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
