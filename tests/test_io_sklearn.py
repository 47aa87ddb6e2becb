"""Tests for treeprobe.io.sklearn: scikit-learn estimators read into the common graph.

Outside references: scikit-learn's own ``predict``, ``predict_proba``,
``decision_function`` and ``feature_importances_`` (Breiman 2001 impurity
importance; Friedman 2001 gradient boosting with a constant init), the
estimator's own ``tree_`` arrays and the ``nodes`` arrays of its histogram
predictors. Models are small and seeded so the file runs in seconds.
"""

from __future__ import annotations

import importlib
import inspect
import json
import re

import networkx as nx
import numpy as np
import pandas as pd
import pytest
import sklearn
from sklearn.datasets import make_friedman1
from sklearn.dummy import DummyClassifier
from sklearn.ensemble import (
    ExtraTreesClassifier,
    ExtraTreesRegressor,
    GradientBoostingClassifier,
    GradientBoostingRegressor,
    HistGradientBoostingClassifier,
    HistGradientBoostingRegressor,
    RandomForestClassifier,
    RandomForestRegressor,
)
from sklearn.linear_model import LinearRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.tree import (
    DecisionTreeClassifier,
    DecisionTreeRegressor,
    ExtraTreeClassifier,
    ExtraTreeRegressor,
)

from treeprobe import load_model
from treeprobe.data import UnseenCategoryWarning
from treeprobe.errors import UnsupportedModelError
from treeprobe.io import sklearn as sklearn_io
from treeprobe.io.sklearn import PRIVATE_ATTRIBUTES, from_sklearn, sklearn_feature_importances

RTOL = 1e-5
FEATURES = ["fuel_price", "shift_length", "route_km", "driver_age", "load_tonnes"]


@pytest.fixture(scope="module")
def regression_data():
    """Friedman #1 benchmark (Friedman 1991; sklearn.datasets.make_friedman1): x0*x1 interact."""
    X, y = make_friedman1(n_samples=300, n_features=5, noise=0.1, random_state=0)
    return X, y


@pytest.fixture(scope="module")
def nan_data(regression_data):
    X, y = regression_data
    X_nan = X.copy()
    rng = np.random.default_rng(1)
    X_nan[rng.random(X.shape) < 0.1] = np.nan
    return X_nan, y


def _classes(y, n_classes):
    edges = np.quantile(y, np.linspace(0, 1, n_classes + 1)[1:-1])
    return np.digitize(y, edges)


def _check_raw(ens, X, expected):
    got = ens.predict_raw(X)
    expected = np.asarray(expected, dtype=np.float64)
    if expected.ndim == 2 and expected.shape[1] == 1:
        expected = expected[:, 0]
    np.testing.assert_allclose(got, expected, rtol=RTOL, atol=1e-9)


# ---------------------------------------------------------------- classic trees
@pytest.mark.parametrize("model_class", [DecisionTreeRegressor, ExtraTreeRegressor])
def test_single_tree_regressor_matches_predict(model_class, nan_data):
    """Reference: scikit-learn's own predict, with NaNs routed by tree_.missing_go_to_left."""
    X, y = nan_data
    model = model_class(max_depth=5, random_state=0).fit(X, y)
    ens = from_sklearn(model, source="test")
    _check_raw(ens, X, model.predict(X))
    assert ens.link == "identity" and ens.split_dtype == "float32" and ens.threshold_rule == "<="
    assert ens.generic_feature_names is True
    assert ens.feature_names == tuple(f"f{j}" for j in range(5))


@pytest.mark.parametrize("model_class", [DecisionTreeClassifier, ExtraTreeClassifier])
@pytest.mark.parametrize("n_classes", [2, 3])
def test_single_tree_classifier_matches_predict_proba(model_class, n_classes, nan_data):
    """Reference: scikit-learn's predict_proba (all columns, also both for a binary problem)."""
    X, y = nan_data
    labels = _classes(y, n_classes)
    model = model_class(max_depth=5, random_state=0).fit(X, labels)
    ens = from_sklearn(model, source="test")
    assert ens.link == "proba" and ens.n_outputs == n_classes
    _check_raw(ens, X, model.predict_proba(X))
    assert ens.provenance.class_labels == tuple(range(n_classes))


@pytest.mark.parametrize(
    "model_class", [RandomForestRegressor, ExtraTreesRegressor]
)
def test_forest_regressor_matches_predict(model_class, nan_data):
    """Reference: scikit-learn's forest predict = mean of the trees (Breiman 2001)."""
    X, y = nan_data
    model = model_class(n_estimators=6, max_depth=4, random_state=0).fit(X, y)
    ens = from_sklearn(model, source="test")
    np.testing.assert_allclose(ens.tree_weight, 1 / 6)
    _check_raw(ens, X, model.predict(X))


@pytest.mark.parametrize("model_class", [RandomForestClassifier, ExtraTreesClassifier])
@pytest.mark.parametrize("n_classes", [2, 4])
def test_forest_classifier_matches_predict_proba(model_class, n_classes, nan_data):
    """Reference: scikit-learn's forest predict_proba (mean of the trees' class fractions)."""
    X, y = nan_data
    labels = _classes(y, n_classes)
    model = model_class(n_estimators=5, max_depth=4, random_state=0).fit(X, labels)
    ens = from_sklearn(model, source="test")
    _check_raw(ens, X, model.predict_proba(X))
    assert ens.objective == "gini"


def test_multi_output_forest_regressor_uses_vector_leaves(regression_data):
    """Reference: scikit-learn's 2-D predict of a multi-output forest."""
    X, y = regression_data
    targets = np.c_[y, X[:, 0] * X[:, 1]]
    model = RandomForestRegressor(n_estimators=3, max_depth=4, random_state=0).fit(X, targets)
    ens = from_sklearn(model, source="test")
    assert ens.n_outputs == 2 and np.all(ens.output_of_tree == -1)
    _check_raw(ens, X, model.predict(X))


def test_float32_rounding_at_thresholds_matches_sklearn(regression_data):
    """Rows placed exactly at each threshold and one float64 ulp away: scikit-learn casts X to float32."""
    X, y = regression_data
    model = DecisionTreeRegressor(max_depth=4, random_state=0).fit(X, y)
    tree = model.tree_
    inner = tree.children_left >= 0
    probes = np.repeat(X[:1], 3 * inner.sum(), axis=0)
    thresholds = tree.threshold[inner]
    features = tree.feature[inner]
    for i, (feat, thr) in enumerate(zip(features, thresholds, strict=True)):
        probes[3 * i: 3 * i + 3, feat] = [thr, np.nextafter(thr, np.inf), np.nextafter(thr, -np.inf)]
    ens = from_sklearn(model, source="test")
    np.testing.assert_array_equal(ens.predict_raw(probes), model.predict(probes))


# ------------------------------------------------------------ importances
@pytest.mark.parametrize(
    "model",
    [
        DecisionTreeRegressor(max_depth=4, random_state=0),
        DecisionTreeClassifier(max_depth=4, random_state=0),
        ExtraTreeRegressor(max_depth=4, random_state=0),
        RandomForestRegressor(n_estimators=5, max_depth=4, random_state=0),
        RandomForestClassifier(n_estimators=5, max_depth=4, random_state=0),
        ExtraTreesRegressor(n_estimators=5, max_depth=4, random_state=0),
        ExtraTreesClassifier(n_estimators=5, max_depth=4, random_state=0),
        GradientBoostingRegressor(n_estimators=8, max_depth=3, subsample=0.7, random_state=0),
        GradientBoostingClassifier(n_estimators=5, max_depth=2, random_state=0),
    ],
    ids=lambda m: type(m).__name__,
)
def test_importances_match_feature_importances(model, regression_data):
    """Reference: scikit-learn's impurity feature_importances_ (Breiman 2001; per-tree pooling as sklearn does)."""
    X, y = regression_data
    target = _classes(y, 3) if hasattr(model, "predict_proba") else y
    model.fit(X, target)
    ens = from_sklearn(model, source="test")
    np.testing.assert_allclose(sklearn_feature_importances(ens), model.feature_importances_, rtol=1e-6, atol=1e-12)


def test_importances_with_single_leaf_trees(regression_data):
    """Reference: feature_importances_ when some boosting stages are single leaves (no split to credit)."""
    X, y = regression_data
    model = GradientBoostingRegressor(
        n_estimators=6, max_depth=2, learning_rate=0.5, min_impurity_decrease=2.0, random_state=0
    ).fit(X, y)
    sizes = [t.tree_.node_count for t in model.estimators_[:, 0]]
    assert min(sizes) == 1 < max(sizes), "the fixture must mix split trees and single leaves"
    ens = from_sklearn(model, source="test")
    np.testing.assert_allclose(sklearn_feature_importances(ens), model.feature_importances_, rtol=1e-6, atol=1e-12)


def test_importances_of_split_free_forest_are_zero(regression_data):
    """Reference: scikit-learn returns all zeros when no tree has a split."""
    X, y = regression_data
    model = RandomForestRegressor(n_estimators=3, min_impurity_decrease=100.0, random_state=0).fit(X, y)
    ens = from_sklearn(model, source="test")
    assert ens.n_nodes == 3
    np.testing.assert_array_equal(sklearn_feature_importances(ens), model.feature_importances_)


def test_importances_refused_for_hist_gradient_boosting(regression_data):
    X, y = regression_data
    ens = from_sklearn(HistGradientBoostingRegressor(max_iter=3).fit(X, y), source="hgb")
    with pytest.raises(UnsupportedModelError, match="no impurity importances"):
        sklearn_feature_importances(ens)


def test_gain_is_weighted_impurity_decrease(regression_data):
    """Closed form (Breiman et al. 1984): gain = (W_t I_t - W_l I_l - W_r I_r) / W_root, from tree_ arrays."""
    X, y = regression_data
    weights = np.random.default_rng(3).uniform(0.5, 2.0, size=len(y))
    model = DecisionTreeRegressor(max_depth=3, random_state=0).fit(X, y, sample_weight=weights)
    tree = model.tree_
    ens = from_sklearn(model, source="test")
    root = 0
    left, right = tree.children_left[root], tree.children_right[root]
    w, imp = tree.weighted_n_node_samples, tree.impurity
    expected = (w[root] * imp[root] - w[left] * imp[left] - w[right] * imp[right]) / w[root]
    assert ens.gain[root] == pytest.approx(expected, rel=1e-12)
    np.testing.assert_allclose(ens.cover, w)
    np.testing.assert_allclose(ens.n_samples, tree.n_node_samples)
    assert np.all(ens.gain[ens.is_leaf] == 0)


# -------------------------------------------------------- gradient boosting
def test_gradient_boosting_regressor_matches_predict(regression_data):
    """Reference: GradientBoostingRegressor.predict (Friedman 2001: init mean + lr * sum of trees)."""
    X, y = regression_data
    model = GradientBoostingRegressor(n_estimators=10, max_depth=3, learning_rate=0.2, random_state=0).fit(X, y)
    ens = from_sklearn(model, source="test")
    _check_raw(ens, X, model.predict(X))
    assert ens.base_score[0] == pytest.approx(np.mean(y), rel=1e-12)
    np.testing.assert_allclose(ens.tree_weight, 0.2)
    assert ens.objective == "squared_error"


@pytest.mark.parametrize("loss", ["absolute_error", "huber", "quantile"])
def test_gradient_boosting_robust_losses_match_predict(loss, regression_data):
    """Reference: GradientBoostingRegressor.predict; these losses start from a median/quantile init."""
    X, y = regression_data
    model = GradientBoostingRegressor(loss=loss, n_estimators=5, max_depth=2, random_state=0).fit(X, y)
    _check_raw(from_sklearn(model, source="test"), X, model.predict(X))


def test_gradient_boosting_binary_matches_decision_function(regression_data):
    """Reference: decision_function (raw log-odds) and predict_proba through the logit link."""
    X, y = regression_data
    labels = _classes(y, 2)
    model = GradientBoostingClassifier(n_estimators=8, max_depth=2, random_state=0).fit(X, labels)
    ens = from_sklearn(model, source="test")
    assert ens.link == "logit" and ens.n_outputs == 1
    _check_raw(ens, X, model.decision_function(X))
    np.testing.assert_allclose(ens.predict(X), model.predict_proba(X)[:, 1], rtol=RTOL)


def test_gradient_boosting_multiclass_matches_decision_function(regression_data):
    """Reference: decision_function (K raw scores) and predict_proba through softmax."""
    X, y = regression_data
    labels = _classes(y, 3)
    model = GradientBoostingClassifier(n_estimators=4, max_depth=2, random_state=0).fit(X, labels)
    ens = from_sklearn(model, source="test")
    assert ens.link == "softmax" and ens.n_outputs == 3
    np.testing.assert_array_equal(ens.output_of_tree, np.tile([0, 1, 2], 4))
    _check_raw(ens, X, model.decision_function(X))
    np.testing.assert_allclose(ens.predict(X), model.predict_proba(X), rtol=RTOL)


def test_gradient_boosting_exponential_loss_doubles_margin(regression_data):
    """Reference: sklearn's exponential loss gives predict_proba = expit(2 * decision_function)."""
    X, y = regression_data
    labels = _classes(y, 2)
    model = GradientBoostingClassifier(loss="exponential", n_estimators=5, max_depth=2, random_state=0)
    model.fit(X, labels)
    ens = from_sklearn(model, source="test")
    _check_raw(ens, X, 2.0 * model.decision_function(X))
    np.testing.assert_allclose(ens.predict(X), model.predict_proba(X)[:, 1], rtol=RTOL)


def test_gradient_boosting_zero_init_has_zero_base(regression_data):
    """Reference: decision_function of a model started from init='zero'."""
    X, y = regression_data
    model = GradientBoostingRegressor(init="zero", n_estimators=5, max_depth=2, random_state=0).fit(X, y)
    ens = from_sklearn(model, source="test")
    assert ens.base_score.tolist() == [0.0]
    _check_raw(ens, X, model.predict(X))


def test_gradient_boosting_constant_dummy_init_is_read(regression_data):
    """Reference: predict_proba with an explicit constant DummyClassifier(strategy='prior') start."""
    X, y = regression_data
    labels = _classes(y, 3)
    model = GradientBoostingClassifier(init=DummyClassifier(strategy="prior"), n_estimators=3, max_depth=2)
    model.fit(X, labels)
    ens = from_sklearn(model, source="test")
    np.testing.assert_allclose(ens.predict(X), model.predict_proba(X), rtol=RTOL)


def test_gradient_boosting_non_constant_init_is_refused(regression_data):
    X, y = regression_data
    model = GradientBoostingRegressor(init=LinearRegression(), n_estimators=3, max_depth=2).fit(X, y)
    with pytest.raises(UnsupportedModelError, match="init=LinearRegression"):
        from_sklearn(model, source="gb.pkl")


# ---------------------------------------------- histogram gradient boosting
@pytest.fixture(scope="module")
def categorical_data():
    """Integer-coded categorical column 0 (levels 0..5, level 6 never seen at fit) with NaNs in every column."""
    rng = np.random.default_rng(7)
    n = 400
    depot = rng.integers(0, 6, n).astype(float)
    numeric = rng.normal(size=(n, 3))
    effect = np.array([0.0, 2.0, -1.0, 0.5, 3.0, -2.0])
    y = effect[depot.astype(int)] * numeric[:, 0] + numeric[:, 1] + rng.normal(scale=0.1, size=n)
    X = np.c_[numeric[:, :1], depot, numeric[:, 1:]]
    X[rng.random(X.shape) < 0.08] = np.nan
    X_test = X.copy()
    X_test[:40, 1] = 6.0
    X_test[40:50, 1] = -3.0
    return X, y, X_test


def test_hist_regressor_matches_predict_with_categories(categorical_data):
    """Reference: HistGradientBoostingRegressor.predict; unseen (6), negative and NaN categories go the missing way."""
    X, y, X_test = categorical_data
    model = HistGradientBoostingRegressor(max_iter=15, max_leaf_nodes=8, categorical_features=[1], random_state=0)
    model.fit(X, y)
    ens = from_sklearn(model, source="test")
    assert ens.is_categorical.any(), "the fixture must produce categorical splits"
    assert ens.feature_types == ("numeric", "categorical", "numeric", "numeric")
    assert ens.split_dtype == "float64"
    _check_raw(ens, X_test, model.predict(X_test))
    assert ens.base_score[0] == pytest.approx(model._baseline_prediction.ravel()[0])


def test_hist_gain_and_count_come_from_nodes_array(categorical_data):
    """Reference: the predictors' own nodes arrays (gain and count of every split)."""
    X, y, _ = categorical_data
    model = HistGradientBoostingRegressor(max_iter=4, max_leaf_nodes=6, categorical_features=[1], random_state=0)
    model.fit(X, y)
    ens = from_sklearn(model, source="test")
    nodes = np.concatenate([p.nodes for it in model._predictors for p in it])
    inner = nodes["is_leaf"] == 0
    assert ens.gain[~ens.is_leaf].sum() == pytest.approx(nodes["gain"][inner].sum(), rel=1e-12)
    np.testing.assert_array_equal(ens.n_samples, nodes["count"])
    np.testing.assert_array_equal(ens.cover, nodes["count"])


@pytest.mark.parametrize("n_classes", [2, 3])
def test_hist_classifier_matches_decision_function(n_classes, categorical_data):
    """Reference: HistGradientBoostingClassifier.decision_function and predict_proba."""
    X, y, X_test = categorical_data
    labels = _classes(y, n_classes)
    model = HistGradientBoostingClassifier(max_iter=8, max_leaf_nodes=6, categorical_features=[1], random_state=0)
    model.fit(X, labels)
    ens = from_sklearn(model, source="test")
    assert ens.link == ("logit" if n_classes == 2 else "softmax")
    _check_raw(ens, X_test, model.decision_function(X_test))
    expected = model.predict_proba(X_test)
    np.testing.assert_allclose(ens.predict(X_test), expected[:, 1] if n_classes == 2 else expected, rtol=RTOL)


def test_hist_poisson_uses_log_link(regression_data):
    """Reference: predict of a poisson HistGB is exp(raw); raw from _raw_predict before the inverse link."""
    X, y = regression_data
    model = HistGradientBoostingRegressor(loss="poisson", max_iter=6, random_state=0).fit(X, y)
    ens = from_sklearn(model, source="test")
    assert ens.link == "log" and ens.objective == "poisson"
    _check_raw(ens, X, model._raw_predict(X))
    np.testing.assert_allclose(ens.predict(X), model.predict(X), rtol=RTOL)


def test_hist_pandas_categories_with_reordered_columns():
    """Reference: HistGB predict on a DataFrame whose category column comes last and whose levels are strings.

    scikit-learn moves categorical columns first and numbers levels in sorted order;
    the ensemble must map both back (levels kept in category_levels).
    """
    rng = np.random.default_rng(11)
    n = 300
    frame = pd.DataFrame(
        {
            "fuel_price": rng.normal(size=n),
            "shift_length": rng.normal(size=n),
            "depot": pd.Categorical(rng.choice(["north", "east", "south", "west"], n)),
        }
    )
    bump = frame["depot"].map({"north": 1.0, "east": -1.0, "south": 2.0, "west": 0.0}).astype(float)
    y = bump * frame["fuel_price"] + frame["shift_length"]
    model = HistGradientBoostingRegressor(max_iter=10, max_leaf_nodes=6, random_state=0).fit(frame, y)
    ens = from_sklearn(model, source="test")
    levels = list(ens.category_levels["depot"])
    assert levels == ["east", "north", "south", "west"]
    assert ens.feature_names == ("fuel_price", "shift_length", "depot")
    test = frame.copy()
    test.loc[:9, "depot"] = np.nan
    encoded = test.to_numpy(dtype=object)
    encoded[:, 2] = [levels.index(v) if isinstance(v, str) else np.nan for v in test["depot"]]
    _check_raw(ens, encoded.astype(float), model.predict(test))
    # When the frame's category order equals the fitted levels, its codes are the
    # level positions; a level appended after fitting is unseen and goes the missing way.
    test["depot"] = test["depot"].cat.add_categories("harbour")
    test.loc[10:19, "depot"] = "harbour"
    with pytest.warns(UnseenCategoryWarning, match="harbour"):
        _check_raw(ens, test, model.predict(test))
    json.dumps({name: list(levels) for name, levels in ens.category_levels.items()})


# --------------------------------------------------------------- structure
def test_to_networkx_matches_tree_arrays(regression_data):
    """Reference: the DecisionTree's own tree_.children_left / children_right arrays."""
    X, y = regression_data
    model = DecisionTreeRegressor(max_depth=4, random_state=0).fit(X, y)
    graph = from_sklearn(model, source="test").to_networkx(0)
    tree = model.tree_
    expected = nx.DiGraph()
    expected.add_nodes_from(range(tree.node_count))
    for parent in np.flatnonzero(tree.children_left >= 0):
        expected.add_edge(int(parent), int(tree.children_left[parent]))
        expected.add_edge(int(parent), int(tree.children_right[parent]))
    assert graph.number_of_nodes() == tree.node_count
    assert set(graph.edges) == set(expected.edges)
    for parent in np.flatnonzero(tree.children_left >= 0):
        assert graph.edges[int(parent), int(tree.children_left[parent])]["branch"] == "left"


def test_feature_names_and_provenance_from_dataframe(regression_data):
    """feature_names_in_ is used; params survive a JSON round trip for retraining."""
    X, y = regression_data
    frame = pd.DataFrame(X, columns=FEATURES)
    model = RandomForestRegressor(n_estimators=2, max_depth=3, random_state=0).fit(frame, y)
    ens = load_model(model)
    assert ens.feature_names == tuple(FEATURES)
    assert ens.generic_feature_names is False
    assert ens.provenance.estimator == "RandomForestRegressor"
    params = json.loads(json.dumps(dict(ens.provenance.stored_params)))
    assert RandomForestRegressor(**params).get_params()["max_depth"] == 3
    assert ens.library == "sklearn" and ens.objective == "squared_error"
    _check_raw(ens, frame[FEATURES[::-1]], model.predict(frame))


# ------------------------------------------------------------------ errors
@pytest.mark.parametrize(
    "model",
    [DecisionTreeRegressor(), RandomForestClassifier(), GradientBoostingRegressor(), HistGradientBoostingClassifier()],
    ids=lambda m: type(m).__name__,
)
def test_unfitted_estimator_is_refused(model):
    with pytest.raises(UnsupportedModelError, match="not fitted"):
        from_sklearn(model, source="mem")


def test_pipeline_is_refused_with_advice(regression_data):
    X, y = regression_data
    pipe = make_pipeline(StandardScaler(), DecisionTreeRegressor(max_depth=2)).fit(X, y)
    with pytest.raises(UnsupportedModelError, match=r"final step.*transform"):
        load_model(pipe)


def test_non_tree_estimator_is_refused(regression_data):
    X, y = regression_data
    with pytest.raises(UnsupportedModelError, match="LinearRegression"):
        from_sklearn(LinearRegression().fit(X, y), source="mem")


def test_multi_output_classifier_is_refused(regression_data):
    X, y = regression_data
    targets = np.c_[_classes(y, 2), _classes(X[:, 0], 3)]
    model = DecisionTreeClassifier(max_depth=2).fit(X, targets)
    with pytest.raises(UnsupportedModelError, match="multi-output classification"):
        from_sklearn(model, source="mem")


def test_non_integer_categories_are_refused():
    rng = np.random.default_rng(5)
    X = np.c_[rng.choice([0.5, 1.5, 2.5], 100), rng.normal(size=100)]
    model = HistGradientBoostingRegressor(max_iter=2, categorical_features=[0]).fit(X, rng.normal(size=100))
    with pytest.raises(UnsupportedModelError, match="non-integer levels"):
        from_sklearn(model, source="mem")


def test_source_must_be_a_string(regression_data):
    X, y = regression_data
    with pytest.raises(TypeError, match="source"):
        from_sklearn(DecisionTreeRegressor(max_depth=1).fit(X, y), source=3)


# ---------------------------------------------- scikit-learn internals, one table
@pytest.fixture(scope="module")
def private_owners(categorical_data):
    """One fitted object per owner named in PRIVATE_ATTRIBUTES (categorical splits, so bitsets are real)."""
    X, y, _ = categorical_data
    hist = HistGradientBoostingRegressor(max_iter=3, max_leaf_nodes=4, categorical_features=[1], random_state=0).fit(X, y)
    boosting = GradientBoostingRegressor(n_estimators=2, max_depth=2, random_state=0).fit(np.nan_to_num(X), y)
    return {"GradientBoosting*": boosting, "HistGradientBoosting*": hist, "TreePredictor": hist._predictors[0][0]}


@pytest.mark.parametrize("owner, attribute, meaning", PRIVATE_ATTRIBUTES, ids=[a for _, a, _ in PRIVATE_ATTRIBUTES])
def test_each_private_scikit_learn_attribute_still_exists(owner, attribute, meaning, private_owners):
    """Reference: the installed scikit-learn itself; a rename there must fail here, by name, before users see it."""
    if owner.startswith("sklearn."):
        module = importlib.import_module(owner)
        assert hasattr(module, attribute), (
            f"scikit-learn {sklearn.__version__} no longer has {owner}.{attribute} ({meaning}); "
            "treeprobe.io.sklearn must be updated")
        return
    obj = private_owners[owner]
    assert hasattr(obj, attribute), (
        f"scikit-learn {sklearn.__version__}: {type(obj).__name__} no longer has {attribute!r} ({meaning}); "
        "treeprobe.io.sklearn must be updated")


def test_every_private_access_in_the_converter_is_listed():
    """Each private name the module reads appears in PRIVATE_ATTRIBUTES, so the table is complete."""
    source = inspect.getsource(sklearn_io)
    used = set(re.findall(r"_private\([^,]+, \"(\w+)\"", source))
    used |= set(re.findall(r"_private_module_attribute\(\"[\w.]+\", \"(\w+)\"\)", source))
    used |= {name for name in ("ForestClassifier", "ForestRegressor") if f'"{name}"' in source}
    listed = {attribute for _, attribute, _ in PRIVATE_ATTRIBUTES}
    assert used == listed
    # No private attribute is read directly, around the guards.
    assert not re.search(r"(estimator|predictor)\._[a-z]", source)


@pytest.mark.parametrize("attribute", ["_baseline_prediction", "_predictors", "_bin_mapper"])
def test_a_changed_private_attribute_fails_with_its_name(attribute, categorical_data):
    X, y, _ = categorical_data
    model = HistGradientBoostingRegressor(max_iter=3, max_leaf_nodes=4, categorical_features=[1], random_state=0).fit(X, y)
    delattr(model, attribute)
    with pytest.raises(UnsupportedModelError, match=rf"no attribute '{attribute}'.*scikit-learn {sklearn.__version__}"):
        from_sklearn(model, source="hgb")


def test_a_changed_private_method_fails_with_its_name(monkeypatch, regression_data):
    X, y = regression_data
    model = GradientBoostingRegressor(n_estimators=2, max_depth=2, random_state=0).fit(X, y)
    owner = next(cls for cls in type(model).__mro__ if "_raw_predict_init" in vars(cls))
    monkeypatch.delattr(owner, "_raw_predict_init")
    with pytest.raises(UnsupportedModelError, match="no attribute '_raw_predict_init'"):
        from_sklearn(model, source="gb")


def test_a_changed_private_module_fails_with_its_name(monkeypatch, regression_data):
    X, y = regression_data
    model = RandomForestRegressor(n_estimators=2, max_depth=2, random_state=0).fit(X, y)
    monkeypatch.delattr(importlib.import_module("sklearn.ensemble._forest"), "ForestRegressor")
    with pytest.raises(UnsupportedModelError, match=r"no sklearn\.ensemble\._forest\.ForestRegressor"):
        from_sklearn(model, source="rf")
