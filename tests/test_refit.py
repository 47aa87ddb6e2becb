"""Tests of treeprobe.refit: the training recipe read back from a saved model.

Outside reference: the learning rate and L2 penalty each XGBoost model was
trained with (XGBoost's own ``learning_rate`` / ``reg_lambda``), recovered from
its saved JSON through the leaf-weight and gain formulas of Chen and Guestrin
(2016), equations 5 and 7.
"""

import json

import numpy as np
import pandas as pd
import pytest

import treeprobe
from treeprobe.errors import ParameterError
from treeprobe.refit import Recipe, recover_xgboost_step, training_recipe

xgb = pytest.importorskip("xgboost")


@pytest.fixture(scope="module")
def regression_data():
    rng = np.random.default_rng(3)
    X = pd.DataFrame(rng.normal(size=(600, 5)), columns=["kiln_temp", "clay_moisture", "glaze_mm", "room_rh", "shelf"])
    y = 2 * X["kiln_temp"] * X["clay_moisture"] + X["glaze_mm"] + 0.3 * rng.normal(size=600)
    return X, y


def _saved(model, X, y, tmp_path, name):
    path = tmp_path / f"{name}.json"
    model.fit(X, y).save_model(path)
    return treeprobe.load_model(path)


@pytest.mark.parametrize(("eta", "reg_lambda"), [(0.05, 1.0), (0.1, 3.0), (0.02, 10.0)])
def test_regressor_eta_and_lambda_recovered(regression_data, tmp_path, eta, reg_lambda):
    X, y = regression_data
    model = xgb.XGBRegressor(n_estimators=60, max_depth=3, learning_rate=eta, reg_lambda=reg_lambda, n_jobs=1)
    graph = _saved(model, X, y, tmp_path, "reg")
    found_eta, found_lambda, spread, n_splits = recover_xgboost_step(graph)
    assert found_eta == pytest.approx(eta, rel=1e-5)
    assert found_lambda == pytest.approx(reg_lambda, rel=1e-2)
    assert spread < 1e-5 and n_splits > 50
    recipe = training_recipe(graph)
    assert recipe.params["eta"] == pytest.approx(eta, rel=1e-5)
    assert recipe.origins["eta"] == recipe.origins["reg_lambda"] == "recovered"
    assert recipe.params["max_depth"] == 3 and recipe.origins["max_depth"] == "recovered"
    assert recipe.rounds == 60 and recipe.origins["rounds"] == "stored"


def test_binary_classifier_with_subsampling_recovered(regression_data, tmp_path):
    X, y = regression_data
    labels = (y > y.median()).astype(int)
    model = xgb.XGBClassifier(n_estimators=40, max_depth=4, learning_rate=0.3, subsample=0.8, random_state=0, n_jobs=1)
    graph = _saved(model, X, labels, tmp_path, "binary")
    eta, reg_lambda, spread, _ = recover_xgboost_step(graph)
    assert eta == pytest.approx(0.3, rel=1e-5) and reg_lambda == pytest.approx(1.0, rel=1e-2) and spread < 1e-5
    recipe = training_recipe(graph)
    assert recipe.params["objective"] == "binary:logistic" and recipe.origins["objective"] == "stored"


@pytest.mark.parametrize("extra", [{"reg_alpha": 5.0}, {"max_delta_step": 0.5}])
def test_l1_or_step_cap_falls_back_to_defaults_with_a_note(regression_data, tmp_path, extra):
    X, y = regression_data
    model = xgb.XGBRegressor(n_estimators=40, max_depth=3, learning_rate=0.05, n_jobs=1, **extra)
    graph = _saved(model, X, y * 20, tmp_path, "fails")
    _, _, spread, _ = recover_xgboost_step(graph)
    assert spread > 1e-3
    recipe = training_recipe(graph)
    assert recipe.params["eta"] == 0.3 and recipe.origins["eta"] == "default"
    assert any("could not be recovered" in note for note in recipe.notes)
    assert "eta 0.3 (library default)" in recipe.describe()


def test_given_params_override_and_replace_aliases(regression_data, tmp_path):
    X, y = regression_data
    graph = _saved(xgb.XGBRegressor(n_estimators=30, max_depth=3, learning_rate=0.05, n_jobs=1), X, y, tmp_path, "given")
    recipe = training_recipe(graph, params={"learning_rate": 0.2, "max_depth": 5})
    assert "eta" not in recipe.params and recipe.params["learning_rate"] == 0.2
    assert recipe.origins["learning_rate"] == recipe.origins["max_depth"] == "given"
    assert recipe.params["max_depth"] == 5 and recipe.origins["reg_lambda"] == "recovered"
    assert "learning_rate 0.2 (given)" in recipe.describe()
    assert recipe.to_dict()["params"]["max_depth"] == {"value": 5, "origin": "given"}
    json.dumps(recipe.to_dict())


def test_live_configuration_is_stored_origin(regression_data):
    X, y = regression_data
    model = xgb.XGBRegressor(n_estimators=20, max_depth=2, learning_rate=0.07, n_jobs=1).fit(X, y)
    recipe = training_recipe(treeprobe.load_model(model), live_model=model)
    assert float(recipe.params["eta"]) == pytest.approx(0.07) and recipe.origins["eta"] == "stored"


def test_recipe_from_a_parameter_dict():
    recipe = training_recipe({"eta": 0.1}, library="xgboost", num_boost_round=7, params={"max_depth": 2})
    assert recipe == Recipe("xgboost", {"eta": 0.1, "max_depth": 2}, 7,
                            {"eta": "given", "max_depth": "given", "rounds": "given"})
    assert recipe.feature_names is None and recipe.describe().startswith("refit recipe (xgboost): eta 0.1 (given)")
    with pytest.raises(ParameterError, match="num_boost_round"):
        training_recipe({"eta": 0.1}, library="xgboost")


def test_thread_counts_reach_the_library(regression_data, monkeypatch, xgboost_threads):
    """The thread count of a fit is what XGBoost's own train() receives: 1 in a worker, every free core alone."""
    import treeprobe.parallel
    from treeprobe.refit import fit

    X, y = regression_data
    seen = xgboost_threads
    monkeypatch.setattr(treeprobe.parallel, "free_cores", lambda: 3)
    recipe = Recipe("xgboost", {"max_depth": 2}, 3, {"max_depth": "given", "rounds": "given"}, tuple(X.columns))
    fit(recipe, X.to_numpy(), y.to_numpy(), threads=1)
    fit(recipe, X.to_numpy(), y.to_numpy(), threads=0)
    assert seen == [1, 3]


def test_lightgbm_text_parameters_are_stored_origin():
    # Reference: the parameters LightGBM itself wrote into the model text's parameters section.
    from pathlib import Path

    pytest.importorskip("lightgbm")
    graph = treeprobe.load_model(Path(__file__).resolve().parent.parent / "fixtures" / "lightgbm" / "binary_late.txt")
    recipe = training_recipe(graph, params={"num_leaves": 7})
    stored = graph.provenance.stored_params
    assert recipe.params["learning_rate"] == stored["learning_rate"] and recipe.origins["learning_rate"] == "stored"
    assert recipe.params["num_leaves"] == 7 and recipe.origins["num_leaves"] == "given"
    assert "num_leaves 7 (given)" in recipe.describe()


def test_text_class_labels_are_coded_in_sorted_order():
    """Text labels become 0, 1, ... in sorted order, as scikit-learn's LabelEncoder numbers classes."""
    from sklearn.preprocessing import LabelEncoder

    from treeprobe.errors import DataError
    from treeprobe.refit import target_values

    labels = np.array(["yes", "no", "no", "yes", "maybe"], dtype=object)
    np.testing.assert_array_equal(target_values(labels), LabelEncoder().fit_transform(labels).astype(float))
    np.testing.assert_array_equal(target_values([0, 1, 1]), [0.0, 1.0, 1.0])
    with pytest.raises(DataError, match=r"missing class label.*row 1"):
        target_values(np.array(["yes", None, "no"], dtype=object))


def test_triage_with_text_labels_runs_the_noise_floor(tmp_path):
    """A binary target given as yes/no reaches the refits instead of failing in a float conversion."""
    import xgboost as xgb

    rng = np.random.default_rng(3)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(400, 3)), columns=["dwell", "reach", "noise"])
    positive = (X["dwell"] * X["reach"] + 0.3 * X["dwell"] + rng.normal(0, 0.2, 400)) > 0
    model = xgb.XGBClassifier(n_estimators=30, max_depth=3, learning_rate=0.2, n_jobs=1).fit(X, positive.astype(int))
    result = treeprobe.triage(model, X, np.where(positive, "yes", "no"), null_refits=2, level=0.34, resamples=2, sample=200)
    assert result.facts["null_refits"] == 2
    assert result.pairs["null_h"].notna().any()


def test_unrefittable_model_fails_before_any_h_computation(monkeypatch):
    """A scikit-learn graph without its estimator cannot be refit: the triage stops at once and offers the fallback."""
    from sklearn.ensemble import RandomForestRegressor

    import treeprobe.verdicts as verdicts_module
    from treeprobe.errors import UnsupportedModelError

    rng = np.random.default_rng(0)
    X = pd.DataFrame(rng.uniform(size=(120, 3)), columns=["a", "b", "c"])
    y = X["a"] * X["b"]
    forest = RandomForestRegressor(n_estimators=5, max_depth=3, random_state=0).fit(X, y)

    def no_h(*args, **kwargs):
        raise AssertionError("H was computed before the retraining check")

    monkeypatch.setattr(verdicts_module, "h_statistic", no_h)
    with pytest.raises(UnsupportedModelError, match="needs the estimator object") as caught:
        treeprobe.triage(treeprobe.load_model(forest), X, y.to_numpy(), null_refits=2, level=0.34)
    assert "without them the triage still runs" in str(caught.value)


def test_eta_calibrated_on_the_data_when_the_trees_cannot_tell(regression_data, tmp_path):
    """With reg_alpha the leaf formula changes and recovery gives up; calibration finds the learning rate
    XGBoost was trained with (its own ``learning_rate``) by matching the saved model's training loss."""
    from treeprobe.refit import calibrate_step

    X, y = regression_data
    model = xgb.XGBRegressor(n_estimators=60, max_depth=3, learning_rate=0.05, reg_alpha=5, n_jobs=1)
    graph = _saved(model, X, y, tmp_path, "alpha")
    recipe = training_recipe(graph)
    assert recipe.origins["eta"] == "default"
    calibrated = calibrate_step(recipe, graph, X.to_numpy(), y.to_numpy())
    assert calibrated.params["eta"] == 0.05 and calibrated.origins["eta"] == "calibrated"
    assert "calibrated on the data" in calibrated.describe() and "comes closest" in calibrated.notes[-1]
    assert calibrate_step(calibrated, graph, X.to_numpy(), y.to_numpy()) is calibrated
