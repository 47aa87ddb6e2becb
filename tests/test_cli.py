"""Tests of the ``treeprobe`` command line: output formats, exit codes, clean pipes.

The command is run in a subprocess, as a user would run it; the numbers it
prints are compared with the Python API on the same inputs (itself checked
against the libraries in the other test modules).
"""

import json
import pickle
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from cli_run import run

import treeprobe

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
LGB_MODEL = FIXTURES / "lightgbm" / "binary_late.txt"


@pytest.fixture(scope="module")
def saved_regressor(tmp_path_factory):
    xgb = pytest.importorskip("xgboost")
    folder = tmp_path_factory.mktemp("cli")
    rng = np.random.default_rng(0)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(400, 4)), columns=["oven_temp", "dough_age", "humidity", "noise"])
    y = 3 * X["oven_temp"] * X["dough_age"] + X["humidity"] + 0.05 * rng.normal(size=400)
    model = xgb.XGBRegressor(n_estimators=40, max_depth=3, n_jobs=1).fit(X, y)
    path = folder / "model.json"
    model.save_model(path)
    data = folder / "data.csv"
    X.assign(waste_kg=y).to_csv(data, index=False)
    return path, data, folder


def test_version_and_help():
    assert run("--version").stdout.strip() == f"treeprobe {treeprobe.__version__}"
    assert "inspect" in run("--help").stdout
    assert run(check_code=2).returncode == 2


def test_inspect_table_lists_model_facts_and_pairs():
    out = run("inspect", LGB_MODEL).stdout
    ens = treeprobe.load_model(LGB_MODEL)
    assert f"trees      {ens.n_trees}" in out
    assert "Pairs sharing a root-to-leaf path" in out
    top = treeprobe.structure(ens).pairs.iloc[0]
    assert top["feature_a"] in out and top["feature_b"] in out
    assert "not that the features interact" in out


def test_inspect_json_and_csv_mirror_the_api(tmp_path):
    ens = treeprobe.load_model(LGB_MODEL)
    expected = treeprobe.structure(ens)
    payload = json.loads(run("inspect", LGB_MODEL, "--format", "json").stdout)
    assert [(r["feature_a"], r["feature_b"], r["paths"]) for r in payload["pairs"]] == [
        tuple(r) for r in expected.pairs[["feature_a", "feature_b", "paths"]].itertuples(index=False)
    ]
    out = tmp_path / "pairs.csv"
    proc = run("inspect", LGB_MODEL, "--format", "csv", "--out", out)
    assert proc.stdout == ""
    frame = pd.read_csv(out)
    assert list(frame.columns) == list(expected.pairs.columns)
    np.testing.assert_allclose(frame["nested_gain"], expected.pairs["nested_gain"])


def test_inspect_options_trees_order_sort():
    payload = json.loads(run("inspect", LGB_MODEL, "--format", "json", "--trees", "0:2", "--order", "2").stdout)
    assert payload["n_trees_walked"] == 2 and "triples" not in payload
    sorted_paths = [r["paths"] for r in json.loads(run("inspect", LGB_MODEL, "--format", "json", "--sort", "paths").stdout)["pairs"]]
    assert sorted_paths == sorted(sorted_paths, reverse=True)


@pytest.mark.parametrize(
    "args, code, message",
    [
        (("inspect", "/nonexistent/model.json"), 1, "cannot read the model file"),
        (("inspect", LGB_MODEL, "--trees", "3"), 2, "--trees expects A:B"),
        (("inspect", LGB_MODEL, "--sort", "colour"), 2, "--sort 'colour'"),
        (("inspect", LGB_MODEL, "--format", "xml"), 2, "invalid choice"),
    ],
)
def test_errors_have_exit_codes_and_one_line(args, code, message):
    proc = run(*args, check_code=code)
    assert message in proc.stderr
    assert "Traceback" not in proc.stderr


def test_corrupt_file_is_one_line_and_debug_shows_traceback(tmp_path):
    bad = tmp_path / "model.json"
    bad.write_text('{"learner": {"gradient_booster": 5}}')
    proc = run("inspect", bad, check_code=1)
    assert proc.stderr.count("\n") == 1 and str(bad) in proc.stderr
    assert "Traceback" in run("--debug", "inspect", bad, check_code=1).stderr


def test_pickles_are_refused_without_opt_in(tmp_path):
    path = tmp_path / "model.pkl"
    path.write_bytes(pickle.dumps({"not": "a model"}))
    proc = run("inspect", path, check_code=1)
    assert "--trust-pickle" in proc.stderr and "runs arbitrary code" in proc.stderr


def test_measure_json_matches_api(saved_regressor):
    path, data, _ = saved_regressor
    payload = json.loads(run("measure", path, "--data", data, "--sample", "150", "--format", "json").stdout)
    frame = pd.read_csv(data)
    api = treeprobe.h_statistic(treeprobe.load_model(path), frame.drop(columns="waste_kg"), sample=150)
    got = {(r["feature_a"], r["feature_b"]): r["h2"] for r in payload["pairs"]}
    for row in api.pairs.itertuples(index=False):
        assert got[(row.feature_a, row.feature_b)] == pytest.approx(row.h2, rel=1e-9, abs=1e-12)
    assert payload["pairs"][0]["feature_a"] in ("oven_temp", "dough_age")


def test_measure_missing_column_is_reported(saved_regressor, tmp_path):
    path, data, _ = saved_regressor
    short = tmp_path / "short.csv"
    pd.read_csv(data).drop(columns="humidity").to_csv(short, index=False)
    proc = run("measure", path, "--data", short, check_code=1)
    assert "humidity" in proc.stderr


def test_triage_and_constrain(saved_regressor, tmp_path):
    path, data, _ = saved_regressor
    payload = json.loads(run("triage", path, "--data", data, "--target", "waste_kg", "--sample", "150",
                             "--format", "json").stdout)
    verdicts = {(r["feature_a"], r["feature_b"]): r["verdict"] for r in payload["pairs"]}
    assert verdicts[("oven_temp", "dough_age")] == "interaction"
    graph = tmp_path / "graph.graphml"
    groups = run("constrain", path, "--data", data, "--target", "waste_kg", "--sample", "150",
                 "--format", "csv", "--graph", graph).stdout
    frame = pd.read_csv(pd.io.common.StringIO(groups))
    groups_found = [set(g["feature"]) for _, g in frame.groupby("group")]
    assert any({"oven_temp", "dough_age"} <= g for g in groups_found)
    assert {"humidity"} in groups_found
    import networkx as nx

    assert set(nx.read_graphml(graph).nodes) >= {"oven_temp", "dough_age", "humidity"}
    proc = run("constrain", path, "--data", data, "--validate", check_code=2)
    assert "needs --target" in proc.stderr


def test_report_command_writes_one_page(saved_regressor, tmp_path):
    pytest.importorskip("matplotlib")
    path, data, _ = saved_regressor
    page = tmp_path / "page.html"
    proc = run("report", path, "--data", data, "--target", "waste_kg", "--sample", "120", "--resamples", "2",
               "--null-refits", "0", "-o", page, "--top-pairs", "1")
    assert proc.stdout == "" and f"wrote {page}" in proc.stderr
    text = page.read_text()
    for section in ("summary", "pairs", "constraints", "cautions"):
        assert f'id="{section}"' in text
    assert "oven_temp" in text and "http://" not in text.replace("http://www.w3.org", "")


def test_measure_probability_scale_matches_api():
    data = FIXTURES / "lightgbm" / "input.csv"
    payload = json.loads(run("measure", LGB_MODEL, "--data", data, "--scale", "probability", "--sample", "40",
                             "--format", "json").stdout)
    assert payload["scale"] == "probability" and payload["method"] == "brute"
    api = treeprobe.h_statistic(treeprobe.load_model(LGB_MODEL), treeprobe.load_data(
        treeprobe.load_model(LGB_MODEL), data)[0], sample=40, scale="probability")
    got = {(r["feature_a"], r["feature_b"]): r["h2"] for r in payload["pairs"]}
    for row in api.pairs.itertuples(index=False):
        assert got[(row.feature_a, row.feature_b)] == pytest.approx(row.h2, rel=1e-9, abs=1e-12)


def _flat(text):
    """Text with line wrapping undone, to find a sentence that argparse or the tables wrapped."""
    return " ".join(text.split())


@pytest.mark.parametrize("argv", [["--version"], ["--help"], ["measure", "--help"], ["inspect", "m.json", "--top", "0"]])
def test_startup_does_not_import_pandas_or_scipy(argv):
    # Reference: importlib.metadata (PEP 566) for the version; sys.modules for what was imported.
    script = textwrap.dedent(f"""
        import sys
        from treeprobe.cli import main
        try:
            main({argv!r})
        except SystemExit:
            pass
        heavy = sorted(m for m in ("pandas", "scipy", "sklearn", "numpy") if m in sys.modules)
        print("heavy:", ",".join(heavy))
    """)
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)
    assert proc.stdout.strip().splitlines()[-1] == "heavy:", proc.stdout + proc.stderr


def test_version_comes_from_package_metadata():
    from importlib.metadata import version

    assert run("--version").stdout.strip() == f"treeprobe {version('treeprobe')}"


def test_package_exports_its_errors_and_warning_lazily():
    proc = subprocess.run([sys.executable, "-c", "import sys, treeprobe; print('pandas' in sys.modules)"],
                          capture_output=True, text=True)
    assert proc.stdout.strip() == "False", proc.stderr
    from treeprobe import errors

    assert treeprobe.MissingLibraryError is errors.MissingLibraryError
    assert treeprobe.ParameterError is errors.ParameterError
    assert issubclass(treeprobe.UnseenCategoryWarning, UserWarning)
    assert set(treeprobe.__all__) <= set(dir(treeprobe))
    for name in treeprobe.__all__:
        assert getattr(treeprobe, name) is not None
    for retired in (RETIRED_NAMES[0], RETIRED_NAMES[5]):
        with pytest.raises(AttributeError, match=f"no attribute '{retired}'"):
            getattr(treeprobe, retired)


@pytest.mark.parametrize(
    "args, message",
    [
        (("constrain", "--target", "y", "--folds", "1"), "--folds must be an integer >= 2, got 1"),
        (("measure", "--jobs", "0"), "--jobs must be a non-zero integer"),
        (("triage", "--resamples", "-1"), "--resamples must be an integer >= 0, got -1"),
        (("triage", "--null-refits", "-2"), "--null-refits must be an integer >= 0, got -2"),
        (("triage", "--target", "y", "--null-refits", "10"),
         "--null-refits=10 cannot reach --level 0.05: the smallest p-value of 10 refits is 1/11 = 0.0909; "
         "give --null-refits >= 19 or --level >= 0.0909"),
        (("triage", "--level", "0.7"), "--level must be a finite number in 0..0.5, got 0.7"),
        (("measure", "--sample", "1"), "--sample must be 0 (all rows) or at least 2, got 1"),
        (("triage", "--min-h2", "1.5"), "--min-h2 must be a finite number in 0..1, got 1.5"),
        (("measure", "--top", "0"), "--top must be an integer >= 1, got 0"),
        (("measure", "--class", "-1"), "--class must be an integer >= 0 or None, got -1"),
        (("measure", "--format", "csv", "--table", "triples"), "--table triples is not produced"),
    ],
)
def test_options_are_checked_before_any_file_is_read(args, message, tmp_path):
    # The model and data do not exist: a usage error (2) naming the option proves nothing was read first.
    command, *options = args
    proc = run(command, tmp_path / "absent.json", "--data", tmp_path / "absent.csv", *options, check_code=2)
    assert message in proc.stderr and "Traceback" not in proc.stderr


def test_measure_sample_zero_means_all_rows(saved_regressor):
    path, data, _ = saved_regressor
    payload = json.loads(run("measure", path, "--data", data, "--sample", "0", "--format", "json").stdout)
    assert payload["n_rows"] == len(pd.read_csv(data)) == 400


def test_measure_ranks_by_h_and_says_to_read_h2_beside_h(saved_regressor):
    path, data, _ = saved_regressor
    payload = json.loads(run("measure", path, "--data", data, "--sample", "150", "--format", "json").stdout)
    by_h = [r["h"] for r in payload["pairs"]]
    assert by_h == sorted(by_h, reverse=True)
    by_h2 = [r["h2"] for r in json.loads(run("measure", path, "--data", data, "--sample", "150", "--format", "json",
                                              "--sort", "h2").stdout)["pairs"]]
    assert by_h2 == sorted(by_h2, reverse=True) and by_h2 != [r["h2"] for r in payload["pairs"]]
    table = run("measure", path, "--data", data, "--sample", "150").stdout
    assert "Read H² beside h" in _flat(table) and "ranked by h " in table
    assert "read H² beside h" in _flat(run("measure", "--help").stdout)


@pytest.mark.parametrize("command", ["inspect", "measure"])
def test_inspect_and_measure_tables_carry_the_cautions(command, saved_regressor):
    from treeprobe.cautions import CAUTIONS

    path, data, _ = saved_regressor
    extra = ("--data", data, "--sample", "100") if command == "measure" else ()
    out = _flat(run(command, path, *extra).stdout)
    for caution in CAUTIONS:
        assert _flat(caution) in out
    assert "credit, health, hiring" in out and "not causation" in out


def test_triage_tally_and_legend_follow_the_table_order(saved_regressor):
    path, data, _ = saved_regressor
    out = run("triage", path, "--data", data, "--target", "waste_kg", "--sample", "120", "--resamples", "2",
              "--null-refits", "0").stdout
    tally = next(line for line in out.splitlines() if line.startswith("pairs "))
    order = ("interaction", "dependent", "co-split", "absent")
    assert [part.split()[1] for part in tally[len("pairs"):].split(",")] == list(order)
    legend = out.split("Verdicts:")[1].splitlines()[1:]
    assert [line.split()[0] for line in legend if line.startswith("  ") and not line.startswith("   ")] == list(order)
    rows = out.split("Pairs, strongest evidence first\n")[1].split("\n\n")[0].splitlines()[2:]
    shown = [line.split()[2] for line in rows if not line.startswith("...")]
    assert shown and set(shown) <= set(order)
    assert [order.index(v) for v in shown] == sorted(order.index(v) for v in shown)
    # Intervals only where the strength can make an interaction; the note under the table says what '-' means.
    assert "'-' below it, where no interval makes an interaction" in " ".join(out.split())


def test_constrain_json_has_a_schema_and_fixed_keys(saved_regressor):
    path, data, _ = saved_regressor
    payload = json.loads(run("constrain", path, "--data", data, "--target", "waste_kg", "--sample", "120",
                             "--resamples", "2", "--null-refits", "0", "--format", "json").stdout)
    assert payload["schema"] == "treeprobe.constrain/2"
    assert list(payload) == ["schema", "suggestion", "triage", "validation", "search"]
    assert payload["validation"] is None and payload["search"] is None
    assert payload["suggestion"]["schema"].startswith("treeprobe.") and payload["triage"]["schema"].startswith("treeprobe.triage/")


# The names the interface issue retired, stored reversed so that a text search of the repository for
# them finds only real uses, never this list of what must not appear.
RETIRED_NAMES = tuple(name[::-1] for name in (
    "tatsh", "llarevo", "dednuofnoc", "elacs war", "tuptuo--", "elbmesnEeerT", "stilps_toor", "htped_naem",
    "htped_nim"))
OLD_NAMES = re.compile("|".join(re.escape(name) for name in RETIRED_NAMES))


def test_nothing_the_cli_prints_uses_retired_names(saved_regressor):
    path, data, _ = saved_regressor
    texts = [run("--help").stdout] + [run(c, "--help").stdout for c in ("inspect", "measure", "triage", "constrain",
                                                                       "report", "demo")]
    texts += [run("inspect", path).stdout, run("inspect", path, "--format", "json").stdout,
              run("measure", path, "--data", data, "--sample", "100").stdout,
              run("measure", path, "--data", data, "--sample", "100", "--format", "json").stdout]
    for text in texts:
        assert not OLD_NAMES.search(text), OLD_NAMES.search(text).group(0)


# ------------------------------------------------------- refit recipe options
def test_triage_planted_diabetes_with_no_parameters(planted_diabetes):
    # Reference: the two pairs planted in scikit-learn's diabetes data (see conftest); the saved JSON keeps no
    # learning rate, so the refits run on the recipe recovered from the trees.
    path, _, csv = planted_diabetes
    payload = json.loads(run("triage", path, "--data", csv, "--target", "target", "--sample", "0", "--format", "json",
                             "--quiet").stdout)
    pairs = {(r["feature_a"], r["feature_b"]): r for r in payload["pairs"]}
    # Both planted pairs beat all 19 refits; bmi x bp stays just under the family-wise floor on 442 rows
    # (tests/test_verdicts.py says why).
    assert pairs[("age", "s6")]["verdict"] == "interaction"
    assert pairs[("bmi", "bp")]["p_value"] == pairs[("age", "s6")]["p_value"] == pytest.approx(1 / 20)
    params = payload["facts"]["refit_recipe"]["params"]
    assert params["eta"]["origin"] == "recovered" and params["eta"]["value"] == pytest.approx(0.05, rel=1e-5)
    table = _flat(run("triage", path, "--data", csv, "--target", "target", "--sample", "150", "--null-refits", "1",
                      "--level", "0.5", "--quiet").stdout)
    assert "refit recipe (xgboost):" in table and "eta 0.05 (recovered from the trees)" in table
    assert "max_depth 4 (recovered from the trees)" in table and "200 rounds (from the tree count)" in table


def test_param_options_and_params_file_reach_the_recipe(planted_diabetes, tmp_path):
    path, _, csv = planted_diabetes
    xgb = pytest.importorskip("xgboost")
    booster = xgb.train({"eta": 0.15, "max_depth": 3, "lambda": 2.0}, xgb.DMatrix(np.ones((4, 2)), np.arange(4.0)), 1)
    config = tmp_path / "config.json"
    config.write_text(booster.save_config())
    common = ("--data", csv, "--target", "target", "--sample", "100", "--null-refits", "1", "--level", "0.5",
              "--format", "json", "--quiet")
    params = json.loads(run("triage", path, *common, "--params", config, "--param", "max_depth=2",
                            "--param", "grow_policy=lossguide").stdout)["facts"]["refit_recipe"]["params"]
    assert params["eta"] == {"value": "0.150000006", "origin": "given"}
    assert params["lambda"]["origin"] == "given" and "reg_lambda" not in params
    assert params["max_depth"] == {"value": 2, "origin": "given"}
    assert params["grow_policy"] == {"value": "lossguide", "origin": "given"}
    plain = tmp_path / "plain.json"
    plain.write_text(json.dumps({"learning_rate": 0.2}))
    params = json.loads(run("triage", path, *common, "--params", plain).stdout)["facts"]["refit_recipe"]["params"]
    assert params["learning_rate"] == {"value": 0.2, "origin": "given"} and "eta" not in params


@pytest.mark.parametrize(
    ("content", "message"),
    [("[1, 2]", "expected a JSON object of training parameters, found a list"),
     ("{oops", "not valid JSON"),
     ('{"learner": {"objective": {}}}', "an XGBoost configuration without tree_train_param"),
     (None, "cannot read the file")],
)
def test_bad_params_file_is_one_clear_error(planted_diabetes, tmp_path, content, message):
    path, _, csv = planted_diabetes
    file = tmp_path / "params.json"
    if content is not None:
        file.write_text(content)
    proc = run("triage", path, "--data", csv, "--target", "target", "--params", file, "--quiet", check_code=1)
    assert f"--params {file}" in proc.stderr and message in proc.stderr and "Traceback" not in proc.stderr


@pytest.mark.parametrize("value", ["eta", "=0.1", "eta="])
def test_bad_param_value_is_a_usage_error_before_reading(tmp_path, value):
    proc = run("triage", tmp_path / "absent.json", "--data", tmp_path / "absent.csv", "--param", value, check_code=2)
    assert "--param takes key=value" in proc.stderr and "Traceback" not in proc.stderr


def test_triage_and_validation_with_text_class_labels(tmp_path):
    """A yes/no target column reaches the refits and the validation: no float-conversion traceback."""
    xgb = pytest.importorskip("xgboost")
    rng = np.random.default_rng(3)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(400, 3)), columns=["dwell", "reach", "noise"])
    positive = (X["dwell"] * X["reach"] + 0.3 * X["dwell"] + rng.normal(0, 0.2, 400)) > 0
    model = tmp_path / "bought.json"
    xgb.XGBClassifier(n_estimators=30, max_depth=3, learning_rate=0.2, n_jobs=1).fit(X, positive.astype(int)).save_model(model)
    data = tmp_path / "bought.csv"
    X.assign(bought=np.where(positive, "yes", "no")).to_csv(data, index=False)
    payload = json.loads(run("constrain", model, "--data", data, "--target", "bought", "--null-refits", "2",
                             "--level", "0.34", "--resamples", "2", "--validate", "--folds", "3", "--format", "json").stdout)
    assert payload["triage"]["facts"]["null_refits"] == 2
    assert payload["validation"]["folds"]


# ------------------------------------------------------- constraint search
def run_on_one_core(*args, check_code=0):
    """``run`` with the process pinned to one core, so that each fit gets one thread (the machine is shared)."""
    import os

    core = min(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None
    pin = (lambda: os.sched_setaffinity(0, {core})) if core is not None else None
    proc = subprocess.run([sys.executable, "-m", "treeprobe.cli", *map(str, args)], capture_output=True, text=True,
                          preexec_fn=pin)
    assert proc.returncode == check_code, (proc.returncode, proc.stdout, proc.stderr)
    return proc


def test_constrain_search_prints_the_curve_json_and_csv(saved_regressor, tmp_path):
    # Reference: the planted oven_temp x dough_age interaction of saved_regressor (humidity is additive).
    path, data, _ = saved_regressor
    options = ["constrain", path, "--data", data, "--target", "waste_kg", "--sample", "120", "--resamples", "0",
               "--null-refits", "0", "--search", "--folds", "2", "--max-steps", "2", "--max-candidates", "2"]
    proc = run_on_one_core(*options)
    out = proc.stdout
    assert "Constraint search by held-out rmse (2 folds, xgboost;" in out
    assert "<- chosen" in out and "start: every feature alone" in out
    assert "Chosen groups (step 1): {oven_temp, dough_age}" in out
    assert "num_boost_round = " in out and "Unconstrained: rmse" in out
    assert "treeprobe: search: at most" in proc.stderr and "one unconstrained fit took" in proc.stderr
    payload = json.loads(run_on_one_core(*options, "--format", "json", "--quiet").stdout)
    assert payload["schema"] == "treeprobe.constrain/2"
    steps = payload["search"]["steps"]
    assert [row["step"] for row in steps][:2] == [0, 1] and steps[1]["groups"] == [["oven_temp", "dough_age"]]
    assert payload["search"]["chosen"]["groups"] == [["oven_temp", "dough_age"]]
    assert steps[1]["loss"] < steps[0]["loss"]
    csv_file = tmp_path / "curve.csv"
    run_on_one_core(*options, "--format", "csv", "--out", csv_file, "--quiet")
    curve = pd.read_csv(csv_file)
    assert list(curve.columns[:4]) == ["step", "added", "groups", "allowed_pairs"]
    assert curve["chosen"].tolist() == [row["step"] == payload["search"]["chosen"]["step"] for row in steps]
    refused = run(*options, "--validate", check_code=2)
    assert "use --search or --validate, not both" in refused.stderr
    assert "--max-steps must be an integer >= 1" in run(*options[:-3], "0", check_code=2).stderr
