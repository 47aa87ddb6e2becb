"""Tests of :mod:`treeprobe.policy`, the check of a model's paths against feature groups and forbidden pairs.

Outside references: the libraries' own enforcement of ``interaction_constraints``
(XGBoost, Chen & Guestrin 2016; LightGBM, Ke et al. 2017): a model trained under
groups must pass a check against the same groups; and the libraries' own tree
dumps (``Booster.trees_to_dataframe`` of XGBoost and of LightGBM), walked here
leaf by leaf, for every count the check reports. Friedman & Popescu (2008,
section 8): features that never share a path cannot interact, so a model of
stumps passes a policy forbidding every pair.
"""

from __future__ import annotations

import json
import subprocess
import sys
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from library_paths import library_leaves

from treeprobe import load_model
from treeprobe.constraints import suggest_constraints
from treeprobe.errors import DataError, ParameterError
from treeprobe.policy import VIOLATION_COLUMNS, check_constraints, parse_forbidden, read_groups

xgb = pytest.importorskip("xgboost")
lgb = pytest.importorskip("lightgbm")

NAMES = ["fuel_price", "shift_length", "crew_size", "route_km"]
GROUPS = [["fuel_price", "shift_length"], ["crew_size", "route_km"]]
TRIANGLE = [[0, 1], [1, 2], [0, 2], [3]]


@pytest.fixture(scope="module")
def fleet():
    """Depot running costs with pairwise interactions inside and across the two groups."""
    rng = np.random.default_rng(11)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(1200, 4)), columns=NAMES)
    y = (3 * X.fuel_price * X.shift_length + 2 * X.crew_size * X.route_km + 2 * X.fuel_price * X.crew_size
         + X.fuel_price * X.shift_length * X.crew_size + X.fuel_price + X.route_km + 0.05 * rng.normal(size=1200))
    return X, y.to_numpy()


def _train(library: str, X, y, groups=None, *, depth=4, rounds=30):
    """A booster trained by the library itself, with ``groups`` as its interaction_constraints (indices)."""
    if library == "xgboost":
        params = {"max_depth": depth, "eta": 0.3, "nthread": 1, "seed": 0}
        if groups is not None:
            params["interaction_constraints"] = str(groups)
        return xgb.train(params, xgb.DMatrix(X, y), rounds)
    params = {"objective": "regression", "num_leaves": 2**depth - 1, "max_depth": depth, "verbosity": -1,
              "num_threads": 1, "min_data_in_leaf": 10, "seed": 0}
    if groups is not None:
        params["interaction_constraints"] = groups
    return lgb.train(params, lgb.Dataset(X, y, params={"verbosity": -1}), rounds)


def _save(booster, folder, name):
    path = folder / (name + (".json" if isinstance(booster, xgb.Booster) else ".txt"))
    booster.save_model(str(path))
    return path


@pytest.fixture(scope="module")
def models(fleet, tmp_path_factory):
    """Saved files: (booster, path) per name."""
    X, y = fleet
    folder = tmp_path_factory.mktemp("policy")
    built = {
        "xgb_grouped": _train("xgboost", X, y, [[0, 1], [2, 3]]),
        "xgb_free": _train("xgboost", X, y),
        "lgb_grouped": _train("lightgbm", X, y, [[0, 1], [2, 3]]),
        "lgb_free": _train("lightgbm", X, y),
        "xgb_triangle": _train("xgboost", X, y, TRIANGLE),
        "lgb_triangle": _train("lightgbm", X, y, TRIANGLE),
        "xgb_route_alone": _train("xgboost", X, y, [[0, 1, 2], [3]]),
    }
    return {name: (booster, _save(booster, folder, name)) for name, booster in built.items()}


@pytest.fixture(scope="module")
def group_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("groups") / "depot_groups.json"
    path.write_text(json.dumps(GROUPS), encoding="utf-8")
    return path


def _expected_pairs(leaves, allowed) -> dict[tuple[str, str], tuple[int, int, int]]:
    """Per pair sharing a path and failing ``allowed``: (leaves, trees, first tree), counted from the dump."""
    found: dict[tuple[str, str], list] = {}
    for tree, features in leaves:
        for a in features:
            for b in features:
                if NAMES.index(a) < NAMES.index(b) and not allowed(a, b):
                    n, trees = found.get((a, b), [0, set()])
                    found[(a, b)] = [n + 1, trees | {tree}]
    return {pair: (n, len(trees), min(trees)) for pair, (n, trees) in found.items()}


def _in_groups(groups):
    return lambda a, b: any(a in g and b in g for g in groups)


def _pair_rows(result) -> dict[tuple[str, str], tuple[int, int, int]]:
    rows = result.violations[result.violations["kind"] == "pair"]
    return {tuple(r.features): (r.paths, r.trees, r.first_tree) for r in rows.itertuples(index=False)}


# --------------------------------------------------------------------- groups
@pytest.mark.parametrize("name", ["xgb_grouped", "lgb_grouped"])
def test_models_trained_under_the_groups_pass(models, group_file, name):
    booster, path = models[name]
    result = check_constraints(path, group_file)
    assert result.ok and result.violations.empty
    assert list(result.violations.columns) == list(VIOLATION_COLUMNS)
    leaves = library_leaves(booster)
    assert result.facts["n_paths"] == len(leaves) and result.facts["n_paths_breaking"] == 0
    assert result.facts["n_pairs_on_paths"] >= 2, "control: the model does combine features within its groups"


@pytest.mark.parametrize("name", ["xgb_free", "lgb_free"])
def test_unconstrained_models_fail_with_the_pairs_their_dumps_show(models, group_file, name):
    booster, path = models[name]
    result = check_constraints(path, group_file)
    assert not result.ok
    leaves = library_leaves(booster)
    expected = _expected_pairs(leaves, _in_groups(GROUPS))
    assert ("fuel_price", "crew_size") in expected
    assert _pair_rows(result) == expected
    assert set(result.violations["rule"]) == {"no group holds both"}
    crossing = [features for _, features in leaves if not any(features <= set(g) for g in GROUPS)]
    assert result.facts["n_paths_breaking"] == len(crossing) > 0
    assert result.violations["paths"].is_monotonic_decreasing


@pytest.mark.parametrize("name", ["xgb_triangle", "lgb_triangle"])
def test_overlapping_groups_pass_when_trained_under_them(models, name):
    # Both libraries keep each path inside one group (measured in tests/test_constraints.py).
    _, path = models[name]
    groups = [[NAMES[j] for j in g] for g in TRIANGLE]
    assert check_constraints(path, groups).ok


def test_a_path_through_three_pairwise_groups_is_a_path_row(models):
    booster, path = models["xgb_free"]
    groups = [[NAMES[j] for j in g] for g in TRIANGLE]
    result = check_constraints(path, groups)
    triple = frozenset(NAMES[:3])
    holding = [tree for tree, features in library_leaves(booster) if features == triple]
    assert holding, "control: the unconstrained model has paths on exactly the three features"
    rows = result.violations[result.violations["kind"] == "path"]
    assert [tuple(f) for f in rows["features"]] == [tuple(NAMES[:3])]
    assert (rows["paths"].item(), rows["trees"].item(), rows["first_tree"].item()) == (
        len(holding), len(set(holding)), min(holding))
    assert rows["rule"].item() == "no single group holds the whole set"
    # Each pair of the triple shares a group, so no pair row names two of the three.
    assert all(not set(f) <= triple for f in result.violations.loc[result.violations["kind"] == "pair", "features"])


def test_unlisted_features_may_be_used_alone_only(models):
    booster, path = models["xgb_free"]
    result = check_constraints(path, [["fuel_price", "shift_length"]])
    assert set(result.facts["features_alone"]) == {"crew_size", "route_km"}
    expected = _expected_pairs(library_leaves(booster), _in_groups([["fuel_price", "shift_length"]]))
    assert _pair_rows(result) == expected


# --------------------------------------------------------------------- forbidden pairs
def test_forbidden_with_any_feature(models):
    _, alone_path = models["xgb_route_alone"]
    assert check_constraints(alone_path, forbid="route_km:*").ok
    booster, path = models["xgb_free"]
    result = check_constraints(path, forbid="route_km:*")
    expected = _expected_pairs(library_leaves(booster), lambda a, b: "route_km" not in (a, b))
    assert expected and _pair_rows(result) == expected
    assert set(result.violations["rule"]) == {"forbidden route_km:*"}
    mirrored = check_constraints(path, forbid="*:route_km").violations
    assert mirrored.drop(columns="rule").equals(result.violations.drop(columns="rule"))


def test_forbidden_pair_and_groups_together(models, group_file):
    booster, path = models["xgb_grouped"]
    result = check_constraints(path, group_file, forbid=[("fuel_price", "shift_length")])
    expected = _expected_pairs(library_leaves(booster), lambda a, b: {a, b} != {"fuel_price", "shift_length"})
    assert _pair_rows(result) == expected
    assert result.violations["rule"].tolist() == ["forbidden fuel_price:shift_length"]
    _, free = models["xgb_free"]
    both = check_constraints(free, group_file, forbid="fuel_price:crew_size")
    rule = both.violations.set_index(both.violations["features"].map(tuple))["rule"]
    assert rule[("fuel_price", "crew_size")] == "no group holds both; forbidden fuel_price:crew_size"


def test_stumps_pass_a_policy_forbidding_every_pair(fleet, tmp_path):
    # Depth-1 trees put one feature on each path: an additive model (Friedman & Popescu 2008, section 8).
    X, y = fleet
    path = _save(_train("xgboost", X, y, depth=1, rounds=20), tmp_path, "stumps")
    result = check_constraints(path, forbid="*:*")
    assert result.ok and result.facts["n_pairs_on_paths"] == 0
    assert check_constraints(path, []).ok, "an empty group list: every feature alone"


# --------------------------------------------------------------------- policy input
def test_group_sources_agree(models, group_file, tmp_path):
    """A plain list, constrain's JSON, a suggestion's JSON and the suggestion object give one result."""
    _, path = models["xgb_free"]
    graph = load_model(path)
    stand_in = SimpleNamespace(
        ensemble=graph,
        features=pd.DataFrame({"feature": NAMES, "used": [True] * 4}),
        pairs=pd.DataFrame({"feature_a": ["fuel_price", "crew_size"], "feature_b": ["shift_length", "route_km"],
                            "verdict": ["interaction"] * 2, "strength": [0.5, 0.4]}),
    )
    suggestion = suggest_constraints(stand_in)
    constrain_file = tmp_path / "constrain.json"
    constrain_file.write_text(json.dumps({"schema": "treeprobe.constrain/1", "suggestion": suggestion.to_dict()}),
                              encoding="utf-8")
    suggestion_file = tmp_path / "suggestion.json"
    suggestion_file.write_text(suggestion.to_json(), encoding="utf-8")
    reference = check_constraints(path, group_file)
    for source in (constrain_file, str(suggestion_file), suggestion, GROUPS):
        assert check_constraints(path, source).violations.equals(reference.violations), source
    assert sorted(read_groups(constrain_file)) == sorted(GROUPS)


def test_a_search_in_constrain_json_gives_its_chosen_groups():
    """constrain --search prints the search's chosen groups; its JSON must hand those on, not the verdict suggestion."""
    verdict_groups = [["fuel_price", "shift_length"]]
    chosen = [["fuel_price", "shift_length", "crew_size"]]
    written = {"schema": "treeprobe.constrain/2", "suggestion": {"groups": verdict_groups},
               "search": {"chosen": {"step": 2, "groups": chosen}}}
    assert read_groups(written) == chosen
    assert read_groups({**written, "search": None}) == verdict_groups, "without --search the suggestion is used"
    assert read_groups({"schema": "treeprobe.search/1", "search": {"chosen": {"groups": chosen}}}) == chosen
    assert read_groups(SimpleNamespace(chosen_groups=chosen, groups=verdict_groups)) == chosen


@pytest.mark.parametrize(
    "groups, forbid, message",
    [
        ([["fuel_prise", "shift_length"]], None, "group 0: the model has no feature 'fuel_prise'; did you mean 'fuel_price'?"),
        (None, "crew_sise:*", "forbid crew_sise:*: the model has no feature 'crew_sise'; did you mean 'crew_size'?"),
        ([[0, 1]], None, "group 0 holds 0; give feature names"),
        ([["fuel_price", "fuel_price"]], None, "group 0 lists a feature twice"),
        ([[]], None, "group 0 must be a non-empty list"),
        ({"pairs": []}, None, "the JSON of treeprobe constrain"),
    ],
)
def test_policy_naming_what_the_model_lacks_is_one_clear_error(models, groups, forbid, message):
    _, path = models["xgb_grouped"]
    with pytest.raises(DataError) as caught:
        check_constraints(path, groups, forbid=forbid)
    assert message in str(caught.value) and "\n" not in str(caught.value)


def test_bad_files_and_options(models, tmp_path):
    _, path = models["xgb_grouped"]
    broken = tmp_path / "broken.json"
    broken.write_text("[[\"fuel_price\",", encoding="utf-8")
    with pytest.raises(DataError, match=r"broken\.json: not valid JSON"):
        check_constraints(path, broken)
    typo = tmp_path / "typo.json"
    typo.write_text(json.dumps([["fuel_price", "shift_lenght"]]), encoding="utf-8")
    with pytest.raises(DataError, match=r"typo\.json: group 0: the model has no feature 'shift_lenght'"):
        check_constraints(path, typo)
    with pytest.raises(ParameterError, match="needs groups, forbidden pairs"):
        check_constraints(path)
    for bad in ("fuel_price-crew_size", "fuel_price:", "a:b:c", ","):
        with pytest.raises(ParameterError, match="forbid"):
            parse_forbidden(bad)
    with pytest.raises(ParameterError, match="with itself"):
        parse_forbidden("route_km:route_km")


def test_json_has_a_schema_and_the_rows(models, group_file):
    _, path = models["lgb_free"]
    result = check_constraints(path, group_file, forbid="route_km:*")
    payload = json.loads(result.to_json())
    assert payload["schema"] == "treeprobe.policy/1" and payload["ok"] is False
    assert list(payload) == ["schema", "ok", "limits", "groups", "forbidden", "facts", "violations"]
    assert payload["forbidden"] == [["route_km", "*"]] and payload["groups"] == GROUPS
    first = payload["violations"][0]
    assert list(first) == list(VIOLATION_COLUMNS) and isinstance(first["features"], list)
    assert len(payload["violations"]) == len(result.violations)


def test_the_check_reads_the_file_without_the_training_libraries(models, group_file):
    _, path = models["lgb_free"]
    _, xgb_path = models["xgb_grouped"]
    script = (
        "import sys\nfrom treeprobe import check_constraints\n"
        f"a = check_constraints({str(path)!r}, {str(group_file)!r})\n"
        f"b = check_constraints({str(xgb_path)!r}, {str(group_file)!r})\n"
        "print(a.ok, b.ok, sorted(m for m in ('xgboost', 'lightgbm', 'sklearn') if m in sys.modules))\n"
    )
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)
    assert proc.stdout.split("\n")[0] == "False True []", proc.stderr
