"""Tests of :mod:`treeprobe.constraints`, interaction groups and their validation by retraining.

Outside references: the libraries' own enforcement of ``interaction_constraints``
(XGBoost, Chen & Guestrin 2016; LightGBM, Ke et al. 2017), read back by walking
the retrained trees; Friedman's benchmark #1 (Friedman 1991,
``sklearn.datasets.make_friedman1``), whose only interaction is ``x0 * x1``;
``networkx.find_cliques`` (Bron & Kerbosch 1973) and ``networkx.read_graphml``;
scikit-learn's ``mean_squared_error``, ``log_loss`` and ``roc_auc_score``.
"""

from __future__ import annotations

import json
import math
import sys
from types import SimpleNamespace

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import make_friedman1

from treeprobe import constraints as constraints_module
from treeprobe.constraints import (
    ConstraintSuggestion,
    interaction_graph,
    suggest_constraints,
    validate_constraints,
    write_graphml,
)
from treeprobe.cooccurrence import structure
from treeprobe.errors import DataError, MissingLibraryError, ParameterError, TreeprobeError
from treeprobe.io import load_model
from treeprobe.refit import _held_out_split

xgb = pytest.importorskip("xgboost")
lgb = pytest.importorskip("lightgbm")

NAMES = ["fuel_price", "shift_length", "crew_size", "route_km"]


def _pair_sets(ensemble) -> set[frozenset[str]]:
    pairs = structure(ensemble, max_order=2).pairs
    return {frozenset(p) for p in zip(pairs["feature_a"], pairs["feature_b"], strict=True)}


def _triple_sets(ensemble) -> set[frozenset[str]]:
    triples = structure(ensemble, max_order=3).triples
    return {frozenset(t) for t in zip(triples["feature_a"], triples["feature_b"], triples["feature_c"], strict=True)}


def _used(ensemble) -> set[str]:
    totals = ensemble.feature_totals()
    return set(totals.loc[totals["splits"] > 0, "feature"])


def _train(library: str, X, y, groups, *, names=None, rounds=25, depth=5):
    if library == "xgboost":
        params = {"max_depth": depth, "eta": 0.3, "nthread": 1, "interaction_constraints": groups}
        return load_model(xgb.train(params, xgb.DMatrix(X, y, feature_names=names), rounds))
    params = {"objective": "regression", "num_leaves": 2**depth - 1, "verbosity": -1, "num_threads": 1,
              "interaction_constraints": groups, "min_data_in_leaf": 10}
    frame = pd.DataFrame(X, columns=names) if names else X
    return load_model(lgb.train(params, lgb.Dataset(frame, y, params={"verbosity": -1}), rounds))


def _as_text(library: str, groups: list[list[int]]):
    return str(groups) if library == "xgboost" else groups


@pytest.fixture(scope="module")
def three_way_data():
    """x0 * x2 dominates; x0 * x1, x1 * x2 and x0 * x1 * x2 also matter; x3 additive."""
    rng = np.random.default_rng(7)
    X = rng.uniform(-1, 1, size=(1500, 4))
    y = 3 * X[:, 0] * X[:, 2] + X[:, 0] * X[:, 1] + X[:, 1] * X[:, 2] + 4 * X[:, 0] * X[:, 1] * X[:, 2] \
        + X[:, 0] + X[:, 1] + X[:, 2] + X[:, 3]
    return X, y


def _stand_in(ensemble, pairs: list[tuple[str, str, str, float]], *, triples=(), used=None) -> SimpleNamespace:
    """A triage-like result with the documented columns, built by hand."""
    names = list(ensemble.feature_names)
    used = [True] * len(names) if used is None else used
    features = pd.DataFrame({"feature": names, "gain": np.linspace(4.0, 1.0, len(names)),
                             "splits": np.arange(len(names), 0, -1), "h2_rest": [0.3] + [np.nan] * (len(names) - 1),
                             "used": used})
    pair_frame = pd.DataFrame(pairs, columns=["feature_a", "feature_b", "verdict", "strength"])
    pair_frame["h2"] = np.where(pair_frame["verdict"] == "interaction", 0.25, np.nan)
    pair_frame["h"] = pair_frame["h2"] ** 0.5
    pair_frame["paths"] = np.arange(len(pair_frame), dtype=np.int64) + 3
    pair_frame["cover_share"] = 0.5
    pair_frame["nested_gain"] = 2.0
    pair_frame["note"] = [None] + ["checked"] * (len(pair_frame) - 1) if len(pair_frame) else []
    triple_frame = pd.DataFrame(list(triples), columns=["feature_a", "feature_b", "feature_c", "verdict", "strength"])
    return SimpleNamespace(ensemble=ensemble, features=features, pairs=pair_frame, triples=triple_frame)


@pytest.fixture
def one_openmp_thread():
    """One OpenMP thread for scikit-learn's estimators: on busy cores their thread pool spun ~30 s on 1500 rows."""
    from threadpoolctl import threadpool_limits  # installed with scikit-learn

    with threadpool_limits(limits=1):
        yield


@pytest.fixture(scope="module")
def small_ensemble():
    rng = np.random.default_rng(3)
    X = rng.uniform(-1, 1, size=(300, 4))
    y = X[:, 0] * X[:, 1] + X[:, 2] + X[:, 3]
    return load_model(xgb.train({"max_depth": 3, "nthread": 1}, xgb.DMatrix(X, y, feature_names=NAMES), 5))


# --------------------------------------------------------------------- library facts
@pytest.mark.parametrize("library", ["xgboost", "lightgbm"])
def test_overlapping_groups_keep_each_path_in_one_group(library, three_way_data):
    """Enforcement fact (xgboost-cpu 3.2.0, lightgbm 4.7.0), recorded in the module docstring.

    Reference: the libraries' own enforcement (XGBoost, Chen & Guestrin 2016;
    LightGBM, Ke et al. 2017). Groups [[0, 1], [1, 2]] on a target driven by
    x0 * x2: both allowed pairs appear on paths, {0, 2} never does. The three
    pairwise groups allow each pair but never the triple.
    """
    X, y = three_way_data
    chained = _train(library, X, y, _as_text(library, [[0, 1], [1, 2], [3]]), names=NAMES)
    pairs = _pair_sets(chained)
    assert frozenset(("fuel_price", "shift_length")) in pairs
    assert frozenset(("shift_length", "crew_size")) in pairs
    assert frozenset(("fuel_price", "crew_size")) not in pairs
    triangle = _train(library, X, y, _as_text(library, [[0, 1], [1, 2], [0, 2], [3]]), names=NAMES)
    assert {frozenset(p) for p in (NAMES[:2], NAMES[1:3], [NAMES[0], NAMES[2]])} <= _pair_sets(triangle)
    assert frozenset(NAMES[:3]) not in _triple_sets(triangle)
    free = _train(library, X, y, _as_text(library, [[0, 1, 2, 3]]), names=NAMES)
    assert frozenset(NAMES[:3]) in _triple_sets(free), "control: unconstrained, the triple does appear"


def test_unlisted_features_xgboost_alone_lightgbm_never(three_way_data):
    """Enforcement fact: features in no group are used alone by XGBoost 3.2.0, not at all by LightGBM 4.7.0.

    Reference: the libraries' own enforcement, read back with treeprobe.structure.
    """
    X, y = three_way_data
    booster = _train("xgboost", X, y, "[[0, 1]]", names=NAMES)
    assert {"crew_size", "route_km"} <= _used(booster)
    assert _pair_sets(booster) == {frozenset(NAMES[:2])}
    model = _train("lightgbm", X, y, [[0, 1]], names=NAMES)
    assert _used(model) == set(NAMES[:2])


def test_accepted_parameter_forms(three_way_data):
    """Accepted forms (xgboost-cpu 3.2.0, lightgbm 4.7.0), recorded in the module docstring.

    XGBoost's Python API reads lists as names (integer lists refused), takes the
    index string; LightGBM takes integer lists and misreads names as feature 0.
    """
    X, y = three_way_data
    with pytest.raises(ValueError, match="not a subset"):
        xgb.train({"interaction_constraints": [[0, 1], [2], [3]], "nthread": 1}, xgb.DMatrix(X, y), 2)
    by_name = _train("xgboost", X, y, [NAMES[:2], [NAMES[2]], [NAMES[3]]], names=NAMES)
    assert _pair_sets(by_name) == {frozenset(NAMES[:2])}
    misread = _train("lightgbm", X, y, [NAMES[:2], [NAMES[2]], [NAMES[3]]], names=NAMES)
    assert _used(misread) == {"fuel_price"}


# --------------------------------------------------------------------- suggestion
def test_friedman1_suggestion_and_validation():
    """Friedman #1 (Friedman 1991; sklearn.datasets.make_friedman1): only x0 * x1 interacts.

    y = 10 sin(pi x0 x1) + 20 (x2 - 0.5)^2 + 10 x3 + 5 x4 + noise. A triage
    whose only interaction is (x0, x1) gives {x0, x1} plus singletons; the
    constrained XGBoost refit's cross-validated RMSE is within 2% of the
    unconstrained one (in fact lower), and XGBoost builds no cross-group path.
    Control: all singletons (no interaction allowed) costs far more than 2%.
    """
    X, y = make_friedman1(n_samples=600, n_features=6, noise=0.5, random_state=0)
    names = [f"x{j}" for j in range(6)]
    booster = xgb.train({"max_depth": 4, "eta": 0.3, "nthread": 1}, xgb.DMatrix(X, y, feature_names=names), 100)
    result = _stand_in(load_model(booster), [("x0", "x1", "interaction", 0.6), ("x0", "x2", "co-split", 0.1),
                                             ("x3", "x4", "absent", 0.0), ("x2", "x3", "dependent", 0.2)])
    suggestion = suggest_constraints(result)
    assert suggestion.groups == [["x0", "x1"], ["x2"], ["x3"], ["x4"], ["x5"]]
    assert suggestion.group_indices == [[0, 1], [2], [3], [4], [5]]
    assert not suggestion.overlapping and suggestion.alternative is None
    frame = pd.DataFrame(X, columns=names)
    checked = validate_constraints(booster, frame, y, suggestion, folds=3)
    rmse = checked.summary["rmse"]
    assert checked.summary["num_boost_round"] == 100
    assert checked.summary["params"]["max_depth"] == "4"
    assert rmse["relative_change"] <= 0.02
    assert checked.cross_group_pairs == [] and checked.stray_paths == []
    assert list(checked.folds.columns) == ["fold", "metric", "unconstrained", "constrained", "difference",
                                           "unconstrained_rounds", "constrained_rounds"]
    assert np.allclose(checked.folds["difference"], checked.folds["constrained"] - checked.folds["unconstrained"])
    assert rmse["difference_low"] <= rmse["difference_mean"] <= rmse["difference_high"]
    additive = validate_constraints(booster, frame, y, [[j] for j in range(6)], folds=3)
    assert additive.summary["rmse"]["relative_change"] > 0.1


def test_friedman1_end_to_end_with_real_triage():
    """Friedman #1 (Friedman 1991) through the real triage stage: (x0, x1) must end up in one group.

    Skipped while ``treeprobe.triage`` does not exist; the call assumes
    ``triage(model, X)``.
    """
    triage_module = pytest.importorskip("treeprobe.verdicts")
    X, y = make_friedman1(n_samples=600, n_features=6, noise=0.5, random_state=0)
    names = [f"x{j}" for j in range(6)]
    frame = pd.DataFrame(X, columns=names)
    booster = xgb.train({"max_depth": 4, "eta": 0.3, "nthread": 1}, xgb.DMatrix(frame, y), 100)
    suggestion = suggest_constraints(triage_module.triage(booster, frame))
    assert any({"x0", "x1"} <= set(group) for group in suggestion.groups)
    assert not any({"x3", "x4"} <= set(group) for group in suggestion.groups)
    checked = validate_constraints(booster, frame, y, suggestion, folds=3)
    assert checked.summary["rmse"]["relative_change"] <= 0.02


def test_cliques_triples_and_alternative(small_ensemble):
    """Groups are the maximal cliques (Bron & Kerbosch 1973, networkx.find_cliques) of the supported pairs.

    Pairs (fuel_price, shift_length) and (shift_length, crew_size) give two
    overlapping groups; the alternative is their connected component, which
    allows the unsupported (fuel_price, crew_size), named in the notes. A
    supported triple adds its missing pair and becomes one group.
    """
    pairs = [("fuel_price", "shift_length", "interaction", 0.5), ("crew_size", "shift_length", "interaction", 0.3)]
    suggestion = suggest_constraints(_stand_in(small_ensemble, pairs))
    assert suggestion.groups == [["fuel_price", "shift_length"], ["shift_length", "crew_size"], ["route_km"]]
    assert suggestion.overlapping
    assert suggestion.alternative == [["fuel_price", "shift_length", "crew_size"], ["route_km"]]
    assert any("(fuel_price, crew_size)" in note for note in suggestion.notes)
    expected = [sorted(c) for c in nx.find_cliques(nx.Graph([(0, 1), (1, 2)]))]
    assert sorted(suggestion.group_indices[:2]) == sorted(expected)

    triple = [("fuel_price", "shift_length", "crew_size", "interaction", 0.4)]
    merged = suggest_constraints(_stand_in(small_ensemble, pairs, triples=triple))
    assert merged.groups == [["fuel_price", "shift_length", "crew_size"], ["route_km"]]
    assert any("(fuel_price, crew_size) were added" in note for note in merged.notes)

    weak = suggest_constraints(_stand_in(small_ensemble, pairs), min_strength=0.4)
    assert weak.groups == [["fuel_price", "shift_length"], ["crew_size"], ["route_km"]]
    assert any("1 pair(s)" in note for note in weak.notes)
    wider = suggest_constraints(_stand_in(small_ensemble, pairs + [("route_km", "crew_size", "co-split", 0.1)]),
                                include=("interaction", "co-split"))
    assert ["crew_size", "route_km"] in wider.groups


def test_unused_features_exported_as_singletons(small_ensemble):
    """Unused features are listed apart and exported alone, so LightGBM (which drops unlisted features) keeps them."""
    result = _stand_in(small_ensemble, [("fuel_price", "shift_length", "interaction", 0.5)],
                       used=[True, True, True, False])
    suggestion = suggest_constraints(result)
    assert suggestion.unused == ["route_km"]
    assert suggestion.groups == [["fuel_price", "shift_length"], ["crew_size"]]
    assert suggestion.lightgbm_param == [[0, 1], [2], [3]]
    assert suggestion.xgboost_param == "[[0, 1], [2], [3]]"
    assert suggestion.xgboost_param_by_name == [["fuel_price", "shift_length"], ["crew_size"], ["route_km"]]


@pytest.mark.parametrize("form", ["xgboost", "xgboost_by_name", "lightgbm"])
def test_exported_parameters_are_enforced(form, small_ensemble, three_way_data):
    """The exported values are accepted by xgboost.train / lightgbm.train and no path crosses the groups.

    Reference: the libraries' own enforcement, read back with treeprobe.structure.
    """
    X, y = three_way_data
    pairs = [("fuel_price", "shift_length", "interaction", 0.5), ("crew_size", "shift_length", "interaction", 0.3)]
    suggestion = suggest_constraints(_stand_in(small_ensemble, pairs))
    value = {"xgboost": suggestion.xgboost_param, "xgboost_by_name": suggestion.xgboost_param_by_name,
             "lightgbm": suggestion.lightgbm_param}[form]
    model = _train("lightgbm" if form == "lightgbm" else "xgboost", X, y, value, names=NAMES)
    allowed = {frozenset((a, b)) for group in suggestion.groups for a in group for b in group if a != b}
    found = _pair_sets(model)
    assert found and found <= allowed
    assert frozenset(NAMES[:3]) not in _triple_sets(model)
    assert _used(model) == set(NAMES)


def test_to_dict_json_and_snippet(small_ensemble):
    """The JSON carries the parameters; the pasted snippet sets exactly the exported value."""
    suggestion = suggest_constraints(_stand_in(small_ensemble, [("fuel_price", "crew_size", "interaction", 0.5)]))
    assert isinstance(suggestion, ConstraintSuggestion)
    loaded = json.loads(suggestion.to_json())
    assert loaded["schema"] == "treeprobe.constraints/2"
    assert loaded["lightgbm_param"] == suggestion.lightgbm_param
    assert loaded["groups"] == [["fuel_price", "crew_size"], ["route_km"], ["shift_length"]]
    for library, expected in (("xgboost", suggestion.xgboost_param), ("lightgbm", suggestion.lightgbm_param)):
        namespace = {"params": {}}
        exec(suggestion.python_snippet(library), namespace)  # noqa: S102 - the snippet is our own output
        assert namespace["params"]["interaction_constraints"] == expected
    with pytest.raises(ParameterError, match="library"):
        suggestion.python_snippet("catboost")


def test_no_interaction_gives_singletons(small_ensemble):
    suggestion = suggest_constraints(_stand_in(small_ensemble, [("fuel_price", "crew_size", "absent", 0.0)]))
    assert suggestion.groups == [[name] for name in sorted(NAMES)]
    assert any("additive" in note for note in suggestion.notes)


# --------------------------------------------------------------------- graph
def test_graphml_round_trip(small_ensemble, tmp_path):
    """networkx.read_graphml reads back every node and edge attribute with its type (NaN kept)."""
    result = _stand_in(small_ensemble, [("fuel_price", "shift_length", "interaction", 0.5),
                                        ("crew_size", "route_km", "co-split", 0.2)])
    graph = interaction_graph(result, include=("interaction",))
    assert graph.edges["fuel_price", "shift_length"]["allowed"] is True
    assert graph.edges["crew_size", "route_km"]["allowed"] is False
    assert graph.edges["fuel_price", "shift_length"]["note"] == ""
    path = write_graphml(graph, tmp_path / "pairs.graphml")
    back = nx.read_graphml(path)

    def same(a, b):
        return type(a) is type(b) and (a == b or (isinstance(a, float) and math.isnan(a) and math.isnan(b)))

    assert set(back.nodes) == set(graph.nodes)
    for node, data in graph.nodes(data=True):
        assert data.keys() == back.nodes[node].keys()
        assert all(same(value, back.nodes[node][key]) for key, value in data.items()), node
    assert {frozenset(e) for e in back.edges} == {frozenset(e) for e in graph.edges}
    for u, v, data in graph.edges(data=True):
        assert data.keys() == back.edges[u, v].keys()
        assert all(same(value, back.edges[u, v][key]) for key, value in data.items()), (u, v)
    assert back.graph["limits"] == graph.graph["limits"]


def test_write_graphml_refuses_none_and_writes_nothing(tmp_path):
    graph = nx.Graph()
    graph.add_edge("fuel_price", "crew_size", weight=None)
    target = tmp_path / "bad.graphml"
    with pytest.raises(DataError, match="weight"):
        write_graphml(graph, target)
    assert not target.exists() and list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------- bad input
def test_bad_triage_results(small_ensemble):
    good = _stand_in(small_ensemble, [("fuel_price", "shift_length", "interaction", 0.5)])
    no_strength = SimpleNamespace(**{**vars(good), "pairs": good.pairs.drop(columns="strength")})
    with pytest.raises(DataError, match=r"pairs lacks the column.*strength"):
        suggest_constraints(no_strength)
    no_features = SimpleNamespace(**{**vars(good), "features": None})
    with pytest.raises(DataError, match="features must be a pandas DataFrame"):
        interaction_graph(no_features)
    stranger = _stand_in(small_ensemble, [("fuel_price", "tyre_wear", "interaction", 0.5)])
    with pytest.raises(DataError, match="row 0: feature_b = 'tyre_wear'"):
        suggest_constraints(stranger)
    negative = _stand_in(small_ensemble, [("fuel_price", "shift_length", "interaction", -1.0)])
    with pytest.raises(DataError, match="strength must be a number >= 0"):
        suggest_constraints(negative)
    with pytest.raises(ParameterError, match="include holds 'strong'"):
        suggest_constraints(good, include=("interaction", "strong"))
    with pytest.raises(ParameterError, match="min_strength"):
        suggest_constraints(good, min_strength=float("nan"))
    with pytest.raises(DataError, match="ensemble must be a ForestGraph"):
        suggest_constraints(SimpleNamespace(**{**vars(good), "ensemble": "model.json"}))


def test_bad_groups_and_data(three_way_data):
    X, y = three_way_data
    frame = pd.DataFrame(X, columns=NAMES)
    params = {"max_depth": 2}
    options = {"library": "xgboost", "num_boost_round": 2, "folds": 2}
    with pytest.raises(DataError, match=r"groups: group 1: the model has no feature 'tyre_wear'"):
        validate_constraints(params, frame, y, [["fuel_price"], ["tyre_wear"]], **options)
    with pytest.raises(DataError, match=r"no feature 'fuel_prise'; did you mean 'fuel_price'\?"):
        validate_constraints(params, frame, y, [["fuel_prise", "shift_length"]], **options)
    with pytest.raises(DataError, match=r"groups: group 0 must be a non-empty list"):
        validate_constraints(params, frame, y, [[]], **options)
    with pytest.raises(DataError, match="groups must be a non-empty list"):
        validate_constraints(params, frame, y, [], **options)
    with pytest.raises(DataError, match=r"groups: group 0 holds index 9; the features are 0\.\.3"):
        validate_constraints(params, frame, y, [[0, 9]], **options)
    with pytest.raises(DataError, match="lists a feature twice"):
        validate_constraints(params, frame, y, [[0, 0]], **options)
    with pytest.raises(ParameterError, match="params must not hold interaction constraints"):
        validate_constraints(params, frame, y, [[0, 1]], params={"interaction_constraints": "[[0]]"}, **options)
    with pytest.raises(ParameterError, match="folds must be an integer >= 2"):
        validate_constraints(params, frame, y, [[0, 1]], library="xgboost", num_boost_round=2, folds=1)
    with pytest.raises(ParameterError, match="num_boost_round is required"):
        validate_constraints(params, frame, y, [[0, 1]], library="xgboost")
    y_bad = y.copy()
    y_bad[5] = np.nan
    with pytest.raises(DataError, match="first at row 5"):
        validate_constraints(params, frame, y_bad, [[0, 1]], **options)
    model = xgb.train({"max_depth": 2, "nthread": 1}, xgb.DMatrix(frame, y), 2)
    with pytest.raises(DataError, match=r"data lacks 1 of the model's 4 feature columns: route_km"):
        validate_constraints(model, frame.drop(columns="route_km"), y, [[0, 1]], folds=2)


def test_missing_library_is_a_clear_error(three_way_data, monkeypatch):
    """Without lightgbm installed the retraining stops with a MissingLibraryError naming the package."""
    X, y = three_way_data
    monkeypatch.setitem(sys.modules, "lightgbm", None)
    with pytest.raises(MissingLibraryError, match="needs the lightgbm package") as caught:
        validate_constraints({"objective": "regression"}, X, y, [[0, 1]], library="lightgbm", num_boost_round=2)
    assert isinstance(caught.value, TreeprobeError)


# --------------------------------------------------------------------- validation details
def test_lightgbm_binary_reads_parameters_and_scores(tmp_path):
    """A saved LightGBM binary model: its stored parameters and rounds are reused; log-loss and AUC per fold.

    Reference: scikit-learn's log_loss and roc_auc_score recomputed on the same
    fold from a LightGBM model trained by hand with the same parameters and
    LightGBM's own ``early_stopping`` callback (patience 50, budget
    max(8 * 12, 200) = 200) on the same inner split. (Before early stopping
    the hand fit ran the model's fixed 12 rounds.)
    """
    rng = np.random.default_rng(11)
    X = rng.normal(size=(500, 4))
    y = (X[:, 0] * X[:, 1] + X[:, 2] + 0.5 * rng.normal(size=500) > 0).astype(float)
    params = {"objective": "binary", "num_leaves": 7, "learning_rate": 0.2, "min_data_in_leaf": 15,
              "verbosity": -1, "num_threads": 1, "extra_trees": False}
    path = tmp_path / "shift_risk.txt"
    lgb.train(params, lgb.Dataset(X, y), 12).save_model(path)
    checked = validate_constraints(str(path), X, y, [[0, 1]], folds=3)
    assert checked.summary["num_boost_round"] == 12
    assert checked.summary["params"]["num_leaves"] == "7"
    assert checked.summary["groups"] == [["Column_0", "Column_1"], ["Column_2"], ["Column_3"]]
    assert set(checked.folds["metric"]) == {"log_loss", "auc"}
    assert checked.cross_group_pairs == [] and checked.stray_paths == []

    from sklearn.metrics import log_loss, roc_auc_score
    from sklearn.model_selection import StratifiedKFold

    train, test = next(StratifiedKFold(3, shuffle=True, random_state=0).split(X, y.astype(int)))
    fit, stop = _held_out_split(len(train), 0.8, 1, y[train].astype(int))
    fit_set = lgb.Dataset(X[train][fit], y[train][fit])
    booster = lgb.train({**params, "seed": 0}, fit_set, 200, valid_sets=[lgb.Dataset(X[train][stop], y[train][stop],
                                                                                      reference=fit_set)],
                        callbacks=[lgb.early_stopping(50, verbose=False)])
    by_hand = booster.predict(X[test])
    first = checked.folds[checked.folds["fold"] == 1].set_index("metric")["unconstrained"]
    assert checked.folds["unconstrained_rounds"].iloc[0] == booster.best_iteration
    assert first["log_loss"] == pytest.approx(log_loss(y[test], by_hand), rel=1e-9)
    assert first["auc"] == pytest.approx(roc_auc_score(y[test], by_hand), rel=1e-9)


def test_saved_xgboost_file_notes_missing_parameters(tmp_path, three_way_data):
    """A saved XGBoost JSON keeps no training parameters: the note says so and max_depth comes from the trees."""
    X, y = three_way_data
    path = tmp_path / "crew_model.json"
    xgb.train({"max_depth": 3, "nthread": 1}, xgb.DMatrix(X, y, feature_names=NAMES), 8).save_model(path)
    checked = validate_constraints(str(path), pd.DataFrame(X, columns=NAMES), y, [NAMES[:2]], folds=2)
    assert checked.summary["params"]["max_depth"] == 3
    assert checked.summary["num_boost_round"] == 8
    assert any("does not store its training parameters" in note for note in checked.summary["notes"])
    assert json.loads(json.dumps(checked.to_dict()))["schema"] == "treeprobe.constraints.validation/4"


def test_cross_group_check_finds_crossing_paths(three_way_data):
    """The refit check has power: an unconstrained model checked against groups shows the pairs and path sets it crosses.

    Reference: treeprobe.structure on a model XGBoost trained without constraints.
    """
    X, y = three_way_data
    free = _train("xgboost", X, y, "[[0, 1, 2, 3]]", names=NAMES)
    groups = [[0, 1], [1, 2], [0, 2], [3]]
    crossing, stray = constraints_module._cross_group(free, groups, tuple(NAMES))
    assert ("fuel_price", "route_km") in crossing
    assert ("fuel_price", "shift_length") not in crossing
    assert ["fuel_price", "shift_length", "crew_size"] in stray


def test_xgboost_multiclass_wrapper(three_way_data):
    """A live XGBClassifier (three classes): rounds = trees / classes, its configuration is reused, log-loss per fold.

    Reference: scikit-learn's log_loss on the probabilities of an XGBClassifier
    refitted by hand on the first fold with the same parameters and XGBoost's
    own ``early_stopping_rounds`` (50, budget max(8 * 6, 200) = 200) on the
    same inner split. (Before early stopping the hand fit ran 6 fixed rounds.)
    """
    X, y_numeric = three_way_data
    y = np.digitize(y_numeric, np.quantile(y_numeric, [1 / 3, 2 / 3])).astype(float)
    model = xgb.XGBClassifier(n_estimators=6, max_depth=3, learning_rate=0.4, n_jobs=1).fit(X, y)
    checked = validate_constraints(model, X, y, [[0, 1], [2, 3]], folds=2)
    assert checked.summary["num_boost_round"] == 6
    assert checked.summary["params"]["eta"].startswith("0.4")
    assert set(checked.folds["metric"]) == {"log_loss"}
    assert checked.cross_group_pairs == []

    from sklearn.metrics import log_loss
    from sklearn.model_selection import StratifiedKFold

    train, test = next(StratifiedKFold(2, shuffle=True, random_state=0).split(X, y.astype(int)))
    fit, stop = _held_out_split(len(train), 0.8, 1, y[train].astype(int))
    by_hand = xgb.XGBClassifier(n_estimators=200, max_depth=3, learning_rate=0.4, n_jobs=1, random_state=0,
                                early_stopping_rounds=50)
    by_hand.fit(X[train][fit], y[train][fit], eval_set=[(X[train][stop], y[train][stop])], verbose=False)
    probability = by_hand.predict_proba(X[test])
    first = checked.folds.loc[checked.folds["fold"] == 1, "unconstrained"].iloc[0]
    assert checked.folds["unconstrained_rounds"].iloc[0] == by_hand.best_iteration + 1
    assert first == pytest.approx(log_loss(y[test], probability), rel=1e-5)


def test_used_column_must_be_boolean(small_ensemble):
    result = _stand_in(small_ensemble, [("fuel_price", "shift_length", "interaction", 0.5)])
    result.features["used"] = [True, "yes", True, True]
    with pytest.raises(DataError, match="row 1: used must be True or False"):
        suggest_constraints(result)


# --------------------------------------------------------------------- faults fixed in the reshape
def test_folds_are_numbered_one_to_k_and_results_compare(three_way_data):
    X, y = three_way_data
    params = {"max_depth": 3, "eta": 0.3, "nthread": 1}
    checked = validate_constraints(params, X, y, [[0, 1]], library="xgboost", num_boost_round=5, folds=3)
    assert sorted(set(checked.folds["fold"])) == [1, 2, 3]
    assert sorted({row["fold"] for row in checked.to_dict()["folds"]}) == [1, 2, 3]
    again = validate_constraints(params, X, y, [[0, 1]], library="xgboost", num_boost_round=5, folds=3)
    other = validate_constraints(params, X, y, [[0, 2]], library="xgboost", num_boost_round=5, folds=3)
    assert checked == again and checked != other and (checked == "folds") is False


@pytest.mark.parametrize(("kind", "expected"), [
    ("xgboost-binary", "xgboost.XGBClassifier"), ("xgboost-regression", "xgboost.XGBRegressor"),
    ("lightgbm-binary", "lightgbm.LGBMClassifier"), ("lightgbm-regression", "lightgbm.LGBMRegressor"),
])
def test_snippet_estimator_class_follows_the_objective(kind, expected, three_way_data):
    """The snippet names the estimator class the model's objective needs, and its value trains that class."""
    X, y = three_way_data
    library, task = kind.split("-")
    target = (y > np.median(y)).astype(int) if task == "binary" else y
    if library == "xgboost":
        wrapper = (xgb.XGBClassifier if task == "binary" else xgb.XGBRegressor)(n_estimators=5, max_depth=3, n_jobs=1)
    else:
        wrapper = (lgb.LGBMClassifier if task == "binary" else lgb.LGBMRegressor)(n_estimators=5, verbose=-1,
                                                                                   n_jobs=1)
    graph = load_model(wrapper.fit(X, target))
    names = list(graph.feature_names)
    suggestion = suggest_constraints(_stand_in(graph, [(names[0], names[2], "interaction", 0.5)]))
    snippet = suggestion.python_snippet()
    assert f"{expected}(" in snippet
    # The opposite class: a binary model must not get a regressor, nor a regression model a classifier.
    wrong = expected.replace("Classifier", "@").replace("Regressor", "Classifier").replace("@", "Regressor")
    assert f"{wrong}(" not in snippet
    namespace = {"params": {}}
    exec(snippet, namespace)  # noqa: S102 - the snippet is our own output
    module = xgb if library == "xgboost" else lgb
    estimator = getattr(module, expected.split(".")[1])
    refit = estimator(n_estimators=10, max_depth=3, n_jobs=1, interaction_constraints=namespace["interaction_constraints"],
                      **({} if library == "xgboost" else {"verbose": -1})).fit(X, target)
    assert frozenset((names[0], names[1])) not in _pair_sets(load_model(refit))


@pytest.mark.parametrize("task", ["regression", "binary"])
def test_histgradientboosting_snippet_sets_interaction_cst(task, three_way_data, one_openmp_thread):
    """scikit-learn's own enforcement of ``interaction_cst``: fit the estimator the snippet builds, walk its trees."""
    from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor

    X, y = three_way_data
    target = (y > np.median(y)).astype(int) if task == "binary" else y
    estimator = HistGradientBoostingClassifier if task == "binary" else HistGradientBoostingRegressor
    graph = load_model(estimator(max_iter=10, random_state=0).fit(X, target))
    names = list(graph.feature_names)
    # Overlapping groups [0, 1] and [1, 2] (x0 * x2 dominates the target), x3 alone.
    suggestion = suggest_constraints(_stand_in(graph, [(names[0], names[1], "interaction", 0.5),
                                                       (names[1], names[2], "interaction", 0.4)]))
    assert suggestion.overlapping
    snippet = suggestion.python_snippet()
    assert f"model = {estimator.__name__}(interaction_cst=interaction_cst)" in snippet
    assert suggestion.python_snippet("sklearn") == snippet
    namespace: dict = {}
    exec(snippet, namespace)  # noqa: S102 - the snippet is our own output
    model = namespace["model"]
    assert isinstance(model, estimator) and model.interaction_cst == suggestion.lightgbm_param
    refit = load_model(model.set_params(max_iter=40, random_state=0).fit(X, target))
    pairs = _pair_sets(refit)
    assert frozenset((names[0], names[1])) in pairs and frozenset((names[1], names[2])) in pairs
    assert pairs == {frozenset((names[0], names[1])), frozenset((names[1], names[2]))}
    assert not _triple_sets(refit)


def test_suggestions_compare_by_value(small_ensemble):
    result = _stand_in(small_ensemble, [("fuel_price", "crew_size", "interaction", 0.5)])
    assert suggest_constraints(result) == suggest_constraints(result)
    assert suggest_constraints(result) != suggest_constraints(result, include=("interaction", "co-split"),
                                                              min_strength=0.9)
    with pytest.raises(ParameterError, match="library"):
        suggest_constraints(result).python_snippet("catboost")


# --------------------------------------------------------------------- validation at each variant's best rounds
def _delivery_times(n_rows: int, seed: int = 5):
    """Invented scenario: minutes late of a parcel round, 8 recorded conditions (uniform in -1..1, standardised).

    Known answer: y = 3 x0 x1 + 2 sin(x2) x3 + x4 + 0.5 x5^2 + |x6| + noise
    (sd 0.3); x7 is unused. True groups: {x0, x1}, {x2, x3}, the rest alone.
    """
    rng = np.random.default_rng(seed)
    X = rng.uniform(-1, 1, size=(n_rows, 8))
    y = 3 * X[:, 0] * X[:, 1] + 2 * np.sin(X[:, 2]) * X[:, 3] + X[:, 4] + 0.5 * X[:, 5] ** 2 + np.abs(X[:, 6]) \
        + rng.normal(0, 0.3, n_rows)
    return pd.DataFrame(X, columns=[f"x{j}" for j in range(8)]), y


@pytest.fixture(scope="module")
def delivery_model():
    frame, y = _delivery_times(2000)
    model = xgb.XGBRegressor(n_estimators=250, learning_rate=0.05, max_depth=5, n_jobs=1, random_state=0)
    return model.fit(frame, y), frame, y


def test_true_groups_help_at_each_variants_best_rounds(delivery_model):
    """Known answer: the true groups help once each variant trains to its own early-stopped round count.

    At the model's fixed 250 rounds (learning rate 0.05) the constrained
    model, which needs more rounds, looked worse. With early stopping the
    constrained held-out RMSE is lower and the corrected interval (Nadeau and
    Bengio 2003) lies below zero. XGBoost's enforcement of the groups is read
    back from the refit (no crossing path).
    """
    model, frame, y = delivery_model
    checked = validate_constraints(model, frame, y, [["x0", "x1"], ["x2", "x3"]], folds=4)
    rmse = checked.summary["rmse"]
    assert rmse["constrained_mean"] < rmse["unconstrained_mean"]
    assert rmse["difference_high"] < 0
    assert checked.summary["notes"][0].startswith("The groups help")
    assert checked.summary["num_boost_round"] == 250 and checked.summary["max_rounds"] == 2000
    free, bound = checked.folds["unconstrained_rounds"], checked.folds["constrained_rounds"]
    assert ((free >= 1) & (free <= 2000) & (bound >= 1) & (bound <= 2000)).all()
    assert (free != bound).any()
    assert bound.median() > free.median()  # the constrained model needs more rounds
    assert checked.recommended_rounds == int(round(bound.median()))
    assert checked.summary["recommended_rounds"] == checked.recommended_rounds
    assert checked.cross_group_pairs == [] and checked.stray_paths == []
    rows = json.loads(json.dumps(checked.to_dict()))
    assert [row["constrained_rounds"] for row in rows["folds"]] == bound.tolist()
    assert rows["recommended_rounds"] == checked.recommended_rounds


def test_groups_that_forbid_real_pairs_hurt_and_name_them(delivery_model):
    """All singletons forbid x0 * x1 and sin(x2) x3: the first note says the groups hurt and names those pairs first.

    The pair ranking follows a triage-like result whose strengths are set by hand.
    """
    model, frame, y = delivery_model
    names = [f"x{j}" for j in range(8)]
    triage_like = SimpleNamespace(pairs=pd.DataFrame({
        "feature_a": ["x4", "x0", "x2"], "feature_b": ["x5", "x1", "x3"], "verdict": ["absent", "interaction",
                                                                                   "interaction"],
        "strength": [0.01, 0.6, 0.4]}))
    checked = validate_constraints(model, frame.iloc[:1000], y[:1000], [[name] for name in names], folds=3,
                                   triage_result=triage_like)
    assert checked.summary["rmse"]["difference_low"] > 0
    first = checked.summary["notes"][0]
    assert first.startswith("The groups measurably hurt")
    assert "forbid 28 pair(s), strongest by triage strength: (x0, x1), (x2, x3), (x4, x5)" in first


def test_corrected_interval_is_wider_than_the_naive_one():
    """Closed form of the corrected resampled t-test (Nadeau and Bengio 2003, Machine Learning 52:239-281).

    Differences d = (-0.10, -0.05, -0.20, 0.02), K = 4, n_test/n_train = 1/3:
    mean -0.0825, sample variance 0.0085583, t(0.975, 3) = 3.18245 (scipy);
    corrected half-width 3.18245 * sqrt((1/4 + 1/3) * 0.0085583) = 0.22486,
    naive 3.18245 * sqrt(0.0085583 / 4) = 0.14721, ratio sqrt(1 + 4/3).
    """
    from scipy.stats import t as student_t

    differences = np.array([-0.10, -0.05, -0.20, 0.02])
    low, high = constraints_module._corrected_interval(differences, 1 / 3)
    assert (low, high) == pytest.approx((-0.0825 - 0.22486, -0.0825 + 0.22486), abs=1e-5)
    naive_half = student_t.ppf(0.975, 3) * differences.std(ddof=1) / math.sqrt(4)
    assert naive_half == pytest.approx(0.14721, abs=1e-5)
    assert (high - low) / 2 > naive_half
    assert (high - low) / 2 / naive_half == pytest.approx(math.sqrt(1 + 4 / 3), rel=1e-12)
    assert constraints_module._corrected_interval(np.array([0.1, 0.1, 0.1]), 0.5) == (pytest.approx(0.1),
                                                                                        pytest.approx(0.1))


@pytest.mark.parametrize(("low", "high", "opening"), [
    (-0.3, 0.1, "No clear difference"),
    (-0.3, -0.1, "The groups help"),
    (0.05, 0.2, "The groups measurably hurt"),
])
def test_outcome_wording_follows_the_interval(low, high, opening):
    """An interval spanning zero reads "no clear difference", never "the groups help"."""
    summary = {"rmse": {"difference_mean": (low + high) / 2, "difference_low": low, "difference_high": high,
                        "relative_change": 0.01}}
    note = constraints_module._outcome_note(summary, [[0, 1], [2]], ("x0", "x1", "x2"), None)
    assert note.startswith(opening)
    assert ("help" in note) == (opening == "The groups help")
    if opening.endswith("hurt"):
        assert "forbid 2 pair(s), in feature order: (x0, x2), (x1, x2)" in note


def test_snippet_prints_the_recommended_rounds(small_ensemble):
    suggestion = suggest_constraints(_stand_in(small_ensemble, [("fuel_price", "shift_length", "interaction", 0.5)]))
    assert "num_boost_round = 640  # median best round count" in suggestion.python_snippet("xgboost", num_boost_round=640)
    assert "max_iter = 640" in suggestion.python_snippet("sklearn", num_boost_round=640)
    assert "num_boost_round" not in suggestion.python_snippet("lightgbm")
    with pytest.raises(ParameterError, match="num_boost_round must be an integer >= 1"):
        suggestion.python_snippet("xgboost", num_boost_round=0)
