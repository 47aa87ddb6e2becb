"""The command line of the retraining half: classes, a Dask scheduler, a feature named as the target, the recipe.

Run in a subprocess as a user would; the Dask test starts an in-process
``distributed.LocalCluster`` in the test and points ``--scheduler`` at it.
"""

import json

import numpy as np
import pandas as pd
import pytest
from cli_run import run

xgb = pytest.importorskip("xgboost")


@pytest.fixture(scope="module")
def three_class(tmp_path_factory):
    """A three-class XGBoost model of invented kiln data saved as JSON, and its CSV with a text label column."""
    folder = tmp_path_factory.mktemp("classes")
    rng = np.random.default_rng(4)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(450, 3)), columns=["kiln_c", "glaze_mm", "clay_pct"])
    score = 2 * X["kiln_c"] * X["glaze_mm"] + X["clay_pct"]
    codes = np.digitize(score, np.quantile(score, [1 / 3, 2 / 3]))
    model = folder / "kiln.json"
    xgb.XGBClassifier(n_estimators=15, max_depth=3, n_jobs=1).fit(X, codes).save_model(model)
    data = folder / "kiln.csv"
    X.assign(grade=np.array(["a_first", "b_second", "c_reject"])[codes]).to_csv(data, index=False)
    return model, data


def test_triage_of_every_class_names_each_one(three_class):
    model, data = three_class
    common = ("--data", data, "--target", "grade", "--sample", "150", "--resamples", "0", "--null-refits", "1", "--level", "0.5")
    payload = json.loads(run("triage", model, *common, "--class", "all", "--format", "json", "--quiet").stdout)
    assert payload["schema"] == "treeprobe.triage_by_class/1"
    assert [c["facts"]["class_analysed"] for c in payload["classes"]] == [
        f"class {i} (output {i} of 3)" for i in range(3)]
    table = run("triage", model, *common, "--class", "2", "--quiet").stdout
    assert "class      class 2 (output 2 of 3)" in table
    proc = run("measure", model, "--data", data, "--class", "all", check_code=2)
    assert "--class all is for triage" in proc.stderr


def test_feature_named_as_target_gets_its_own_message(three_class):
    model, data = three_class
    proc = run("triage", model, "--data", data, "--target", "glaze_mm", "--null-refits", "1", "--level", "0.5", check_code=1)
    assert "the target column 'glaze_mm' is one of the model's features" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_refits_on_a_dask_scheduler(three_class):
    distributed = pytest.importorskip("distributed")
    model, data = three_class
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, protocol="tcp",
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        payload = json.loads(run("triage", model, "--data", data, "--target", "grade", "--sample", "150",
                                 "--resamples", "0", "--null-refits", "2", "--level", "0.34", "--scheduler", cluster.scheduler_address,
                                 "--format", "json", "--quiet").stdout)
    assert payload["facts"]["refit_threads_per_fit"] == 1 and payload["facts"]["refits_total"] == 2 * payload["facts"]["floor_rounds"]
    proc = run("triage", model, "--data", data, "--target", "grade", "--null-refits", "1", "--level", "0.5",
               "--scheduler", "tcp://127.0.0.1:9", check_code=1)
    assert "no Dask scheduler answered at 'tcp://127.0.0.1:9'" in proc.stderr
