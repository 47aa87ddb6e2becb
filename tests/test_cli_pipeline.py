"""Tests of the pipeline gates on the command line: ``treeprobe check`` and ``treeprobe diff``.

The commands run in a subprocess, as a CI job runs them. Outside reference:
models trained by XGBoost and LightGBM under their own ``interaction_constraints``
(Chen & Guestrin 2016; Ke et al. 2017) pass a check against the same groups,
unconstrained ones fail; the JSON the commands print equals the Python API
(itself checked against the libraries' tree dumps in tests/test_policy.py and
tests/test_compare.py).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from cli_run import run

from treeprobe import check_constraints, compare_models
from treeprobe.cli import _FAIL_ON_CHOICES, EXIT_VIOLATION
from treeprobe.compare import FLAGS

xgb = pytest.importorskip("xgboost")
lgb = pytest.importorskip("lightgbm")

NAMES = ["kiln_temp", "clay_moisture", "glaze_coats", "firing_hours"]
GROUPS = [["kiln_temp", "clay_moisture"], ["glaze_coats", "firing_hours"]]


@pytest.fixture(scope="module")
def pottery(tmp_path_factory):
    """Saved models of an invented pottery's cracked-piece rate, the data file and a group file."""
    folder = tmp_path_factory.mktemp("pipeline")
    rng = np.random.default_rng(2)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(800, 4)), columns=NAMES)
    y = (3 * X.kiln_temp * X.clay_moisture + 2 * X.glaze_coats * X.firing_hours + 3 * X.kiln_temp * X.glaze_coats
         + X.kiln_temp + 0.05 * rng.normal(size=800))
    xgb_params = {"max_depth": 3, "eta": 0.3, "nthread": 1, "seed": 0}
    lgb_params = {"objective": "regression", "num_leaves": 7, "max_depth": 3, "verbosity": -1, "num_threads": 1,
                  "min_data_in_leaf": 10, "seed": 0}
    models = {
        "grouped.json": xgb.train({**xgb_params, "interaction_constraints": "[[0, 1], [2, 3]]"}, xgb.DMatrix(X, y), 20),
        "free.json": xgb.train(xgb_params, xgb.DMatrix(X, y), 20),
        "firing_alone.json": xgb.train({**xgb_params, "interaction_constraints": "[[0, 1, 2], [3]]"},
                                       xgb.DMatrix(X, y), 20),
        "free_lgb.txt": lgb.train(lgb_params, lgb.Dataset(X, y, params={"verbosity": -1}), 20),
        "grouped_lgb.txt": lgb.train({**lgb_params, "interaction_constraints": [[0, 1], [2, 3]]},
                                     lgb.Dataset(X, y, params={"verbosity": -1}), 20),
    }
    paths = {}
    for name, booster in models.items():
        paths[name] = folder / name
        booster.save_model(str(paths[name]))
    groups = folder / "groups.json"
    groups.write_text(json.dumps(GROUPS), encoding="utf-8")
    data = folder / "pottery.csv"
    X.assign(cracked_rate=y).to_csv(data, index=False)
    return paths, groups, data, folder


# --------------------------------------------------------------------- check
@pytest.mark.parametrize("name", ["grouped.json", "grouped_lgb.txt"])
def test_check_passes_models_trained_under_the_groups(pottery, name):
    paths, groups, _, _ = pottery
    out = run("check", paths[name], "--groups", groups).stdout
    assert "result     PASS" in out and "Breaches" not in out


@pytest.mark.parametrize("name", ["free.json", "free_lgb.txt"])
def test_check_fails_unconstrained_models_with_exit_code_3(pottery, name, tmp_path):
    paths, groups, _, _ = pottery
    proc = run("check", paths[name], "--groups", groups, check_code=EXIT_VIOLATION)
    assert EXIT_VIOLATION == 3
    assert "result     FAIL" in proc.stdout and "kiln_temp & glaze_coats" in proc.stdout
    out = tmp_path / "policy.json"
    run("check", paths[name], "--groups", groups, "--format", "json", "--out", out, check_code=3)
    payload = json.loads(out.read_text(encoding="utf-8"))
    expected = check_constraints(paths[name], groups)
    assert payload["schema"] == "treeprobe.policy/1" and payload["ok"] is False
    assert [(tuple(r["features"]), r["paths"], r["trees"], r["first_tree"]) for r in payload["violations"]] == [
        (tuple(r.features), r.paths, r.trees, r.first_tree) for r in expected.violations.itertuples(index=False)]


def test_check_forbidden_pairs_with_any_feature(pottery):
    paths, _, _, _ = pottery
    assert "PASS" in run("check", paths["firing_alone.json"], "--forbid", "firing_hours:*").stdout
    proc = run("check", paths["free.json"], "--forbid", "firing_hours:*,kiln_temp:clay_moisture", check_code=3)
    assert "forbidden firing_hours:*" in proc.stdout and "forbidden kiln_temp:clay_moisture" in proc.stdout


def test_check_against_what_constrain_wrote(pottery, tmp_path):
    """constrain's JSON is a policy: a model retrained with its parameter passes, and the check equals the API."""
    paths, _, data, _ = pottery
    written = tmp_path / "constrain.json"
    run("constrain", paths["free.json"], "--data", data, "--target", "cracked_rate", "--sample", "200",
        "--resamples", "2", "--null-refits", "0", "--format", "json", "--out", written)
    suggestion = json.loads(written.read_text(encoding="utf-8"))["suggestion"]
    frame = pd.read_csv(data)
    retrained = tmp_path / "retrained.json"
    xgb.train({"max_depth": 3, "nthread": 1, "interaction_constraints": suggestion["xgboost_param"]},
              xgb.DMatrix(frame[NAMES], frame["cracked_rate"]), 20).save_model(str(retrained))
    assert "PASS" in run("check", retrained, "--groups", written).stdout
    code = 0 if check_constraints(paths["free.json"], written).ok else 3
    payload = json.loads(run("check", paths["free.json"], "--groups", written, "--format", "json",
                             check_code=code).stdout)
    assert payload["groups"] == suggestion["groups"]


def test_check_bad_policy_is_one_line_and_bad_options_are_usage_errors(pottery, tmp_path):
    paths, _, _, _ = pottery
    typo = tmp_path / "typo.json"
    typo.write_text(json.dumps([["kiln_temp", "clay_moistur"]]), encoding="utf-8")
    proc = run("check", paths["free.json"], "--groups", typo, check_code=1)
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert "typo.json: group 0: the model has no feature 'clay_moistur'; did you mean 'clay_moisture'?" in proc.stderr
    proc = run("check", paths["free.json"], "--forbid", "firing_hour:*", check_code=1)
    assert "did you mean 'firing_hours'?" in proc.stderr
    assert "--forbid expects name:name" in run("check", paths["free.json"], "--forbid", "kiln_temp",
                                                check_code=2).stderr
    assert "needs --groups FILE, --forbid PAIRS" in run("check", paths["free.json"], check_code=2).stderr
    assert "cannot read the groups file" in run("check", paths["free.json"], "--groups", tmp_path / "none.json",
                                                check_code=1).stderr


# --------------------------------------------------------------------- diff
def test_diff_fail_on_new_pair(pottery):
    paths, _, _, _ = pottery
    proc = run("diff", paths["grouped.json"], paths["free.json"], "--fail-on", "new-pair", check_code=3)
    assert "--fail-on new-pair" in proc.stderr and "kiln_temp & glaze_coats" in proc.stdout
    run("diff", paths["free.json"], paths["free.json"], "--fail-on", "new-pair")
    # Grouped XGBoost, then grouped LightGBM: another library, same groups, nothing new.
    expected = compare_models(paths["grouped.json"], paths["grouped_lgb.txt"]).flagged("new-pair")
    assert expected.empty
    run("diff", paths["grouped.json"], paths["grouped_lgb.txt"], "--fail-on", "new-pair")


def test_diff_fail_on_new_interaction_needs_data(pottery):
    paths, _, data, _ = pottery
    proc = run("diff", paths["grouped.json"], paths["free.json"], "--fail-on", "new-interaction", check_code=2)
    assert "needs --data" in proc.stderr
    options = ("--data", data, "--sample", "200", "--resamples", "0")
    proc = run("diff", paths["grouped.json"], paths["free_lgb.txt"], *options, "--fail-on", "new-interaction",
               check_code=3)
    assert "--fail-on new-interaction" in proc.stderr and "verdict changed for" in proc.stdout
    frame = pd.read_csv(data)
    reverse = compare_models(paths["free_lgb.txt"], paths["grouped.json"], frame[NAMES],
                             triage_options={"sample": 200, "resamples": 0})
    code = 3 if len(reverse.flagged("new-interaction")) else 0
    run("diff", paths["free_lgb.txt"], paths["grouped.json"], *options, "--fail-on", "new-interaction",
        check_code=code)


def test_diff_json_and_csv_mirror_the_api(pottery, tmp_path):
    paths, _, data, _ = pottery
    payload = json.loads(run("diff", paths["grouped.json"], paths["free.json"], "--format", "json").stdout)
    expected = compare_models(paths["grouped.json"], paths["free.json"])
    assert payload["schema"] == "treeprobe.compare/1"
    assert [(r["feature_a"], r["feature_b"], r["status"]) for r in payload["pairs"]] == [
        tuple(r) for r in expected.pairs[["feature_a", "feature_b", "status"]].itertuples(index=False)]
    out = tmp_path / "features.csv"
    run("diff", paths["grouped.json"], paths["free.json"], "--data", data, "--sample", "150", "--resamples", "0",
        "--format", "csv", "--table", "features", "--out", out)
    assert list(pd.read_csv(out).columns) == list(expected.features.columns)
    run("diff", paths["grouped.json"], paths["free.json"], "--data", data, "--sample", "150", "--resamples", "0",
        "--format", "csv", "--out", tmp_path / "pairs.csv")
    pairs = pd.read_csv(tmp_path / "pairs.csv")
    assert {"verdict_old", "verdict_new", "verdict_changed", "h2_old", "h2_new"} <= set(pairs.columns)


def test_diff_options_are_checked_before_reading(tmp_path):
    absent = tmp_path / "absent.json"
    assert "--sample must be 0" in run("diff", absent, absent, "--data", "x.csv", "--sample", "1", check_code=2).stderr
    assert "give --data" in run("diff", absent, absent, "--resamples", "5", check_code=2).stderr
    assert "invalid choice" in run("diff", absent, absent, "--fail-on", "new-feature", check_code=2).stderr


def test_help_documents_the_exit_codes():
    flat = " ".join(run("check", "--help").stdout.split())
    assert "3 violation" in flat and "1 bad input" in flat and "2 usage error" in flat
    assert "3 violation" in " ".join(run("diff", "--help").stdout.split())
    assert "3 violation" in " ".join(run("--help").stdout.split())
    assert _FAIL_ON_CHOICES == FLAGS
