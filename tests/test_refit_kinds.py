"""Retraining every model kind: categorical boosters, scikit-learn estimators, text and multiclass labels, Dask.

Outside references:
- XGBoost's and LightGBM's own enforcement of ``interaction_constraints``
  (their trained trees, walked path by path) for the experiment on how
  categorical splits combine with constraints;
- scikit-learn's ``HistGradientBoosting*`` ``interaction_cst`` and
  ``sklearn.base.clone`` for the scikit-learn refits;
- scikit-learn's ``LabelEncoder`` order for text labels.
"""

from itertools import combinations

import numpy as np
import pandas as pd
import pytest

import treeprobe
from treeprobe.cooccurrence import structure
from treeprobe.errors import DataError
from treeprobe.refit import Recipe, constrained_substitute, fit, fit_early_stopped, training_recipe

xgb = pytest.importorskip("xgboost")
lgb = pytest.importorskip("lightgbm")

NAMES = ["dock", "shift", "pallets", "aisle_m", "humidity"]


@pytest.fixture(scope="module")
def dock_data():
    """Two categorical features (dock 0-5, shift 0-11), three numeric; dock x pallets and shift x aisle_m interact."""
    rng = np.random.default_rng(11)
    n = 1200
    dock, shift = rng.integers(0, 6, n), rng.integers(0, 12, n)
    numeric = rng.normal(size=(n, 3))
    y = (np.where(dock % 2 == 0, 2.0, -2.0) * numeric[:, 0] + (shift == 3) * 2.0 * numeric[:, 1] + numeric[:, 2]
         + 0.1 * rng.normal(size=n))
    frame = pd.DataFrame({"dock": pd.Categorical(dock), "shift": pd.Categorical(shift), "pallets": numeric[:, 0],
                          "aisle_m": numeric[:, 1], "humidity": numeric[:, 2]})
    return frame, y


def _crossing(graph, groups):
    allowed = {frozenset(p) for g in groups for p in combinations(g, 2)}
    pairs = structure(graph, max_order=2).pairs
    return [(a, b) for a, b in zip(pairs["feature_a"], pairs["feature_b"], strict=True) if frozenset((a, b)) not in allowed]


@pytest.mark.parametrize("library", ["xgboost", "lightgbm"])
def test_categorical_splits_obey_interaction_constraints(dock_data, library):
    """The experiment: each library keeps every path of a constrained categorical model inside one group.

    A categorical feature is one member of its group, for partition and one-hot splits alike; the
    unconstrained control crosses the groups, so the check can fail.
    """
    frame, y = dock_data
    matrix = frame.apply(lambda c: c.cat.codes if hasattr(c, "cat") else c).to_numpy(dtype=float)
    groups = [[0, 2], [1, 3], [4]]
    named = [[NAMES[j] for j in g] for g in groups]
    params = {"max_depth": 4, "eta": 0.2} if library == "xgboost" else {"max_depth": 4, "learning_rate": 0.2}
    recipe = Recipe(library, params, 60, {"rounds": "given"}, tuple(NAMES), categorical=(0, 1))
    for onehot in ((1, 64) if library == "xgboost" else (None,)):
        run = recipe if onehot is None else Recipe(library, {**params, "max_cat_to_onehot": onehot}, 60,
                                                   {"rounds": "given"}, tuple(NAMES), categorical=(0, 1))
        constrained = treeprobe.load_model(fit(run, matrix, y, groups=groups, threads=1), feature_names=NAMES)
        assert "categorical" in constrained.feature_types
        assert _crossing(constrained, named) == []
        free = treeprobe.load_model(fit(run, matrix, y, threads=1), feature_names=NAMES)
        assert len(_crossing(free, named)) >= 3


@pytest.mark.parametrize("library", ["xgboost", "lightgbm"])
def test_triage_and_validation_of_categorical_models(dock_data, library, tmp_path):
    frame, y = dock_data
    if library == "xgboost":
        model = xgb.XGBRegressor(n_estimators=25, max_depth=4, learning_rate=0.3, enable_categorical=True, n_jobs=1,
                                 tree_method="hist").fit(frame, y)
        path = tmp_path / "dock.json"
        model.save_model(path)
    else:
        model = lgb.LGBMRegressor(n_estimators=25, max_depth=4, learning_rate=0.3, n_jobs=1, verbose=-1).fit(frame, y)
        path = tmp_path / "dock.txt"
        model.booster_.save_model(path)
    result = treeprobe.triage(str(path), frame, y, sample=300, resamples=0, null_refits=2, level=0.34)
    assert result.facts["refit_recipe"]["categorical"] == [0, 1]
    assert result.pairs.loc[result.pairs["paths"] > 0, "null_h"].notna().all()
    top = result.pairs.iloc[0]
    assert {top["feature_a"], top["feature_b"]} in ({"dock", "pallets"}, {"shift", "aisle_m"})
    checked = treeprobe.validate_constraints(str(path), frame, y, [["dock", "pallets"], ["shift", "aisle_m"]], folds=2)
    assert checked.cross_group_pairs == [] and checked.stray_paths == []
    assert checked.summary["rmse"]["difference_mean"] < 0


@pytest.fixture(scope="module")
def sklearn_data():
    rng = np.random.default_rng(5)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(600, 4)), columns=["oven_c", "proof_min", "flour_pct", "salt_g"])
    y = 3 * X["oven_c"] * X["proof_min"] + X["flour_pct"] + 0.2 * rng.normal(size=600)
    return X, y.to_numpy()


def test_histgradientboosting_refits_and_validation_use_interaction_cst(sklearn_data):
    from sklearn.ensemble import HistGradientBoostingRegressor

    X, y = sklearn_data
    model = HistGradientBoostingRegressor(max_iter=30, learning_rate=0.2, random_state=0).fit(X, y)
    recipe = training_recipe(treeprobe.load_model(model), live_model=model)
    assert recipe.trainer == "hist" and recipe.rounds == 30 and recipe.origins["learning_rate"] == "stored"
    groups = [[0, 1], [2], [3]]
    refit, rounds = fit_early_stopped(recipe, X.to_numpy(), y, groups=groups, threads=1, seed=0)
    assert 1 <= rounds <= 240 and refit.n_iter_ == rounds
    assert _crossing(treeprobe.load_model(refit, feature_names=list(X.columns)),
                     [["oven_c", "proof_min"], ["flour_pct"], ["salt_g"]]) == []
    result = treeprobe.triage(model, X, y, sample=300, resamples=0, null_refits=2, level=0.34)
    assert result.facts["additive_family"] == "HistGradientBoostingRegressor"
    first = result.pairs.iloc[0]
    assert {first["feature_a"], first["feature_b"]} == {"oven_c", "proof_min"} and first["verdict"] == "interaction"
    checked = treeprobe.validate_constraints(model, X, y, [["oven_c", "proof_min"]], folds=2)
    assert checked.summary["family"] == "HistGradientBoostingRegressor" and checked.cross_group_pairs == []
    assert checked.summary["rmse"]["difference_mean"] < 0.05 * checked.summary["rmse"]["unconstrained_mean"]


def test_forest_refits_by_cloning_and_validates_on_the_nearest_constrained_family(sklearn_data):
    from sklearn.ensemble import RandomForestRegressor

    X, y = sklearn_data
    forest = RandomForestRegressor(n_estimators=15, max_depth=6, random_state=0, n_jobs=1).fit(X, y)
    recipe = training_recipe(treeprobe.load_model(forest), live_model=forest)
    assert recipe.trainer == "clone" and not recipe.supports_constraints and recipe.rounds == 15
    substitute = constrained_substitute(recipe)
    assert substitute.family == "HistGradientBoostingRegressor" and "has no interaction constraints" in substitute.notes[0]
    result = treeprobe.triage(forest, X, y, sample=250, resamples=0, null_refits=2, level=0.34)
    assert result.facts["additive_family"] == "HistGradientBoostingRegressor"
    assert any("own 15 rounds" in note for note in result.facts["refit_notes"])
    assert result.pairs.loc[result.pairs["paths"] > 0, "null_h"].notna().all()
    checked = treeprobe.validate_constraints(forest, X, y, [["oven_c", "proof_min"]], folds=2)
    assert checked.summary["family"] == "HistGradientBoostingRegressor"
    assert any("RandomForestRegressor has no interaction constraints" in note for note in checked.summary["notes"])


def test_text_labels_for_scikit_learn_classifiers(sklearn_data):
    from sklearn.ensemble import HistGradientBoostingClassifier, RandomForestClassifier

    X, y = sklearn_data
    labels = np.where(y > np.median(y), "late", "on_time")
    # A one-margin classifier describes its positive class (the second in sorted order); a forest's
    # probability outputs one class each, the first by default.
    for model, named in ((HistGradientBoostingClassifier(max_iter=20, random_state=0),
                          "class on_time (the positive class; log-odds margin)"),
                         (RandomForestClassifier(n_estimators=10, max_depth=5, random_state=0, n_jobs=1),
                          "class late (output 0 of 2)")):
        model.fit(X, labels)
        result = treeprobe.triage(model, X, labels, sample=200, resamples=0, null_refits=2, level=0.34)
        assert result.facts["null_refits"] == 2 and result.facts["class_analysed"] == named
        checked = treeprobe.validate_constraints(model, X, labels, [["oven_c", "proof_min"]], folds=2)
        assert set(checked.folds["metric"]) == {"log_loss", "auc"}


def test_separable_classification_null_is_detected():
    """An additive boundary the model separates perfectly: drawn labels equal the real ones, and the note says so."""
    rng = np.random.default_rng(2)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(600, 3)), columns=["grain", "roast", "grind"])
    labels = (X["grain"] + X["roast"] > 0).astype(int).to_numpy()
    X["grain"] += np.where(labels == 1, 0.5, -0.5)  # a wide margin: the classes are separable
    model = xgb.XGBClassifier(n_estimators=60, max_depth=3, learning_rate=0.3, n_jobs=1).fit(X, labels)
    result = treeprobe.triage(model, X, labels, sample=200, resamples=0, null_refits=2, level=0.34)
    assert result.facts["null_separable"] and result.facts["label_change_share"] < 0.01
    assert any("separates the classes almost perfectly" in note for note in result.facts["refit_notes"])
    noisy = np.where(rng.random(600) < 0.2, 1 - labels, labels)
    other = xgb.XGBClassifier(n_estimators=30, max_depth=3, n_jobs=1).fit(X, noisy)
    assert not treeprobe.triage(other, X, noisy, sample=200, resamples=0, null_refits=1, level=0.5).facts["null_separable"]


def test_multiclass_names_the_class(sklearn_data):
    X, y = sklearn_data
    classes = np.digitize(y, np.quantile(y, [1 / 3, 2 / 3]))
    model = xgb.XGBClassifier(n_estimators=20, max_depth=3, n_jobs=1).fit(X, classes)
    result = treeprobe.triage(model, X, classes, sample=200, resamples=0, null_refits=1, level=0.5, output=2)
    assert result.facts["class_analysed"] == "class 2 (output 2 of 3)"
    assert result.facts["refit_recipe"]["params"]["objective"]["value"] == "multi:softprob"
    checked = treeprobe.validate_constraints(model, X, classes, [["oven_c", "proof_min"]], folds=2)
    assert checked.summary["class_scored"] == "all classes (multiclass log-loss)"


def test_a_feature_named_as_target_gets_its_own_message(sklearn_data):
    X, y = sklearn_data
    model = xgb.XGBRegressor(n_estimators=5, max_depth=2, n_jobs=1).fit(X, y)
    with pytest.raises(DataError, match="target column 'salt_g' is one of the model's features"):
        treeprobe.triage(model, X.assign(y=y), "salt_g")


def test_refits_and_folds_run_on_a_dask_cluster(sklearn_data):
    """Null refits and validation folds go to an in-process dask.distributed LocalCluster through joblib."""
    distributed = pytest.importorskip("distributed")
    import joblib

    X, y = sklearn_data
    model = xgb.XGBRegressor(n_estimators=30, max_depth=3, n_jobs=1).fit(X, y)
    with distributed.LocalCluster(processes=False, n_workers=1, threads_per_worker=2) as cluster, \
            distributed.Client(cluster) as client, joblib.parallel_config(backend="dask"), \
            distributed.get_task_stream(client) as stream:
        result = treeprobe.triage(model, X, y, sample=200, resamples=0, null_refits=2, level=0.34)
        checked = treeprobe.validate_constraints(model, X, y, [["oven_c", "proof_min"]], folds=2)
    assert result.facts["refit_threads_per_fit"] == 1 and result.facts["refits_total"] == 2 * result.facts["floor_rounds"]
    assert checked.summary["threads_per_fit"] == 1 and len(checked.folds) == 2
    # The cluster's task stream saw the work: at least the 2 null refits and the 2 folds.
    assert len(stream.data) >= 4
