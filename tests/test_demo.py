"""Tests of the demo: it must find the interactions it built into its own data.

Outside references: the closed-form H-statistics of the generating formula
(Friedman and Popescu 2008, "Predictive learning via rule ensembles", eqs. 44
and 46: for independent uniform inputs a product ``x1 x2`` has H² = 1/7 and a
product ``x1 x2 x3`` has three-way H² = (1/1728) / (1/27 - 1/64)); XGBoost's
own predictions from the saved model file; XGBoost's and LightGBM's own
enforcement of ``interaction_constraints`` (the ground truth for ``absent``);
scipy's Spearman rank correlation for the dependent pair; networkx's GraphML
reader.
"""

import contextlib
import io
import json
import sys
from itertools import combinations

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from scipy.stats import spearmanr

from treeprobe import TreeprobeError, load_model
from treeprobe.demo import (
    FEATURES,
    PAIR_H2_CLOSED_FORM,
    TARGET,
    TRIPLE_H2_CLOSED_FORM,
    demo_data,
    run_demo,
)
from treeprobe.verdicts import VERDICTS

xgb = pytest.importorskip("xgboost")


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out_dir = tmp_path_factory.mktemp("demo")
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        result = run_demo(out_dir, quiet=True)
    return result, printed.getvalue()


def _verdicts(pairs):
    return {frozenset((a, b)): v for a, b, v in pairs[["feature_a", "feature_b", "verdict"]].itertuples(index=False)}


def test_demo_recovers_its_ground_truth(demo):
    result, _ = demo
    _, _, truth = demo_data(100)
    pairs = result.triage.pairs
    verdicts = _verdicts(pairs)
    assert verdicts[frozenset(truth["pairwise"])] == "interaction"
    assert verdicts[frozenset(truth["additive_pair"])] in ("co-split", "absent")
    assert verdicts[frozenset(truth["correlated_pair"])] != "interaction"
    for key, verdict in verdicts.items():
        if key & set(truth["noise"]):
            assert verdict != "interaction", sorted(key)
        if truth["isolated"] in key:
            # XGBoost enforced the constraint group the demo trained with: no shared path, H = 0 exactly.
            assert verdict == "absent" and pairs.set_index(["feature_a", "feature_b"]).loc[tuple(
                f for f in FEATURES if f in key)]["h2"] == 0
    triples = result.triage.triples
    members = [frozenset(row) for row in triples[["feature_a", "feature_b", "feature_c"]].itertuples(index=False)]
    assert frozenset(truth["three_way"]) in members, "the three-way set never shares a path"
    triple_verdict = triples["verdict"].to_numpy()[members.index(frozenset(truth["three_way"]))]
    assert triple_verdict == "interaction" or all(
        verdicts[frozenset(pair)] == "interaction" for pair in combinations(truth["three_way"], 2))
    assert set(pairs["verdict"]) == set(VERDICTS)
    assert result.recovered == dict.fromkeys(result.recovered, True) and len(result.recovered) == 6


def test_lightgbm_agrees_on_the_ground_truth(demo):
    pytest.importorskip("lightgbm")
    result, _ = demo
    assert result.lightgbm_recovered == result.recovered


def test_h_statistics_match_the_closed_form_of_the_formula(demo):
    """Friedman and Popescu 2008, eqs. 44 and 46, for the products in the generating formula."""
    result, _ = demo
    assert pytest.approx(1 / 7) == PAIR_H2_CLOSED_FORM
    assert pytest.approx(0.02703, abs=1e-4) == TRIPLE_H2_CLOSED_FORM
    _, _, truth = demo_data(100)
    pairs = result.triage.pairs.set_index(["feature_a", "feature_b"])
    # Tolerances allow for a 150-tree fit and H on 500 sampled rows.
    assert pairs.loc[truth["pairwise"], "h2"] == pytest.approx(PAIR_H2_CLOSED_FORM, abs=0.04)
    for pair in combinations(truth["three_way"], 2):
        # F_jk of 150 H A I is 75 H A up to a constant: the same 1/7.
        assert pairs.loc[pair, "h2"] == pytest.approx(PAIR_H2_CLOSED_FORM, abs=0.07)
    triples = result.triage.triples.set_index(["feature_a", "feature_b", "feature_c"])
    assert 0 < triples.loc[truth["three_way"], "h2"] < 2.5 * TRIPLE_H2_CLOSED_FORM


def test_demo_files_are_complete_and_readable(demo):
    result, printed = demo
    assert printed == ""  # quiet: the summary is returned, not printed
    expected = {"data.csv", "model_xgboost.json", "triage.json", "pairs.csv", "constraints.json",
                "interaction_graph.graphml"}
    assert expected <= set(result.files)
    for name, path in result.files.items():
        assert path.parent == result.out_dir and path.is_file() and path.stat().st_size > 0, name
        assert name in result.summary
    assert not list(result.out_dir.glob(".*.part"))
    triage_record = json.loads(result.files["triage.json"].read_text())
    assert len(triage_record["pairs"]) == len(result.triage.pairs)
    constraints = json.loads(result.files["constraints.json"].read_text())
    groups = [set(group) for group in constraints["suggestion"]["groups"]]
    _, _, truth = demo_data(100)
    assert set(truth["pairwise"]) in groups and set(truth["three_way"]) in groups
    # The constrained refit is walked: XGBoost kept every path within one group.
    assert constraints["validation"]["cross_group_pairs"] == []
    graph = nx.read_graphml(result.files["interaction_graph.graphml"])
    assert set(graph.nodes) == set(FEATURES)
    assert graph.edges[truth["pairwise"]]["verdict"] == "interaction"
    assert len(pd.read_csv(result.files["pairs.csv"])) == len(result.triage.pairs)
    if "report.html" in result.files:
        assert "<html" in result.files["report.html"].read_text()[:2000].lower()
    else:
        assert "report was skipped" in result.summary
    for verdict in VERDICTS:
        assert verdict in result.summary


def test_saved_model_reproduces_xgboost_predictions(demo):
    """The reloaded file must give XGBoost's own predictions on the written data."""
    result, _ = demo
    data = pd.read_csv(result.files["data.csv"])
    X = data[list(FEATURES)]
    booster = xgb.Booster(model_file=str(result.files["model_xgboost.json"]))
    expected = booster.predict(xgb.DMatrix(X.to_numpy(), feature_names=list(FEATURES)))
    ours = load_model(result.files["model_xgboost.json"]).predict(X)
    np.testing.assert_allclose(ours, expected, rtol=1e-5, atol=1e-3)


def test_demo_data_is_deterministic_and_follows_its_formula():
    X, y, truth = demo_data(2000, random_state=3)
    X_again, y_again, _ = demo_data(2000, random_state=3)
    pd.testing.assert_frame_equal(X, X_again)
    np.testing.assert_array_equal(y, y_again)
    X_other, _, _ = demo_data(2000, random_state=4)
    assert not X.equals(X_other)
    assert list(X.columns) == list(FEATURES) and truth["target"] == TARGET

    # The formula of the module docstring, written out again independently.
    def scaled(column, low, high):
        return (X[column].to_numpy() - low) / (high - low)

    formula = (100 + 150 * scaled("outside_temp_c", -5, 35) * scaled("door_openings", 0, 120)
               + 150 * scaled("humidity_pct", 30, 95) * scaled("coil_age_years", 0, 15) * scaled("defrost_interval_h", 4, 24)
               + 80 * scaled("room_volume_m3", 200, 2000) + 80 * (5 - X["setpoint_c"].to_numpy()) / 30
               + 40 * scaled("pallets_moved", 20, 400) + 40 * X["forklift_hours"].to_numpy() / 8
               + 30 * scaled("lights_on_hours", 6, 24))
    residual = y - formula
    assert abs(residual.mean()) < 0.5
    assert residual.std() == pytest.approx(truth["noise_sd"], rel=0.06)

    assert spearmanr(X[truth["correlated_pair"][0]], X[truth["correlated_pair"][1]]).statistic > 0.9
    for a, b in combinations([*truth["pairwise"], *truth["three_way"], *truth["additive_pair"]], 2):
        assert abs(spearmanr(X[a], X[b]).statistic) < 0.1, (a, b)
    for column in ("door_openings", "pallets_moved", "staff_on_shift", "day_of_month"):
        assert (X[column] == X[column].round()).all()
    covered = {*truth["pairwise"], *truth["three_way"], *truth["additive_pair"], *truth["correlated_pair"],
               truth["isolated"], *truth["noise"]}
    assert covered == set(FEATURES)


@pytest.mark.parametrize("n_rows", [50, 2.5, True, "3000"])
def test_demo_data_rejects_bad_sizes(n_rows):
    with pytest.raises(TreeprobeError, match="n_rows"):
        demo_data(n_rows)


def test_run_demo_rejects_bad_arguments(tmp_path):
    a_file = tmp_path / "taken"
    a_file.write_text("x")
    with pytest.raises(TreeprobeError, match="out_dir"):
        run_demo(a_file)
    with pytest.raises(TreeprobeError, match="quiet"):
        run_demo(tmp_path, quiet="yes")
    with pytest.raises(TreeprobeError, match="stream"):
        run_demo(tmp_path, stream=object())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["taken"]


def test_run_demo_without_xgboost_says_what_to_install(tmp_path, monkeypatch):
    from treeprobe.errors import MissingLibraryError

    monkeypatch.setitem(sys.modules, "xgboost", None)
    with pytest.raises(MissingLibraryError, match=r"treeprobe\[xgboost\]"):
        run_demo(tmp_path / "out", quiet=True)
    assert not (tmp_path / "out").exists()


def test_missing_lightgbm_skips_its_part_without_writing(tmp_path, monkeypatch):
    from treeprobe.demo import _train_lightgbm

    monkeypatch.setitem(sys.modules, "lightgbm", None)
    X, y, _ = demo_data(100)
    assert _train_lightgbm(X, y, tmp_path / "model_lightgbm.txt") is None
    assert not list(tmp_path.iterdir())


def test_cli_quiet_prints_the_summary_only(tmp_path, capsys):
    """``treeprobe demo --quiet``: no progress, no step lines, no details on either stream; the summary on stdout."""
    from treeprobe.cli import main

    assert main(["demo", "--out", str(tmp_path / "quiet"), "--quiet"]) == 0
    printed = capsys.readouterr()
    assert printed.err == ""
    assert printed.out.startswith("treeprobe demo:") and "Recovered 6 of 6 ground-truth items" in printed.out
    assert "Ground truth (" not in printed.out
    assert not [line for line in printed.out.splitlines() if line.startswith("demo: ")]
    tally = next(line for line in printed.out.splitlines() if line.startswith("Pairs: "))
    assert [part.split(" ", 1)[1] for part in tally[len("Pairs: "):].rstrip(".").split(", ")] == list(VERDICTS)
    assert len(printed.out.splitlines()) < 15


def test_demo_without_quiet_tells_each_step_then_details_and_summary(tmp_path, capsys):
    shown = io.StringIO()
    result = run_demo(tmp_path / "loud", stream=shown)
    err = capsys.readouterr().err
    steps = [line for line in err.splitlines() if line.startswith("demo: ")]
    assert len(steps) == len(result.timings) and len(steps) >= 7
    text = shown.getvalue()
    assert text == result.details + "\n" + result.summary
    assert "Ground truth (" in result.details and "Ground truth (" not in result.summary
