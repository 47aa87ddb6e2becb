"""The verdict calibration study (``scripts/study_verdicts.py``): its statistics, generator, truth and a tiny run.

Outside references:

* Wilson's score interval (E. B. Wilson, "Probable inference, the law of
  succession, and statistical inference", JASA 22:209-212, 1927): a value worked
  by hand below, and scipy's ``binomtest(...).proportion_ci(method="wilson")``;
* Spearman's rank correlation from ``scipy.stats.spearmanr`` for the dependent pair;
* the closed form of Friedman and Popescu's H for a product of independent
  uniforms (Friedman & Popescu 2008, eq. 44), derived below;
* the libraries' own fits (XGBoost, LightGBM) in the end-to-end run, whose
  verdicts are checked against the truth the generator planted.
"""

from __future__ import annotations

import itertools
import json
import math
from argparse import Namespace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from script_module import loaded

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def study():
    yield from loaded("study_verdicts")


# --------------------------------------------------------------------- Wilson's interval
def test_wilson_interval_matches_the_worked_value(study):
    # 8 successes in 10 trials at 95% (z = 1.959964, z^2 = 3.841459), Wilson (1927):
    #   p = 0.8, 1 + z^2/n = 1.3841459
    #   centre = (p + z^2/2n) / (1 + z^2/n) = (0.8 + 0.1920729) / 1.3841459 = 0.7167402
    #   half   = z / (1 + z^2/n) * sqrt(p(1-p)/n + z^2/4n^2)
    #          = 1.4160010 * sqrt(0.016 + 0.0096036) = 1.4160010 * 0.1600114 = 0.2265777
    #   interval = [0.4901625, 0.9433178]
    low, high = study.wilson_interval(8, 10)
    assert low == pytest.approx(0.4901625, abs=2e-7)
    assert high == pytest.approx(0.9433178, abs=2e-7)


@pytest.mark.parametrize(("k", "n"), [(0, 7), (3, 7), (7, 7), (1, 200), (150, 400)])
def test_wilson_interval_agrees_with_scipy(study, k, n):
    from scipy.stats import binomtest

    expected = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    low, high = study.wilson_interval(k, n)
    assert low == pytest.approx(expected.low, abs=1e-12)
    assert high == pytest.approx(expected.high, abs=1e-12)


def test_wilson_interval_without_trials_is_nan(study):
    assert all(math.isnan(v) for v in study.wilson_interval(0, 0))


# --------------------------------------------------------------------- the generator
def test_scenarios_are_reproducible_and_differ_by_seed(study):
    first, again, other = study.make_scenario(4), study.make_scenario(4), study.make_scenario(5)
    assert np.array_equal(first.X, again.X) and np.array_equal(first.y, again.y)
    assert first.terms == again.terms and first.mains == again.mains and first.params == again.params
    assert first.X.shape != other.X.shape or not np.array_equal(first.X, other.X)


def test_scenario_mix_over_seeds(study):
    scenarios = [study.make_scenario(seed) for seed in range(15)]
    assert sum(s.task == "binary" for s in scenarios) >= 5
    assert sum(s.overfit for s in scenarios) == 3
    assert {s.library for s in scenarios[::2]} == {"xgboost"} and {s.library for s in scenarios[1::2]} == {"lightgbm"}
    for s in scenarios:
        n_rows, n_features = s.X.shape
        assert 8 <= n_features <= 14 and 2 <= len(s.noise) <= 4
        assert (2000 <= n_rows <= 2200) if s.overfit else (2000 <= n_rows <= 5000)
        assert 1 <= sum(not t.weak for t in s.terms) <= 3 and sum(t.weak for t in s.terms) <= 1
        in_terms = [j for t in s.terms for j in t.features]
        assert len(in_terms) == len(set(in_terms)), f"seed {s.seed}: terms share a feature"
        assert not set(in_terms) & set(s.dependent) and not set(in_terms) & set(s.noise)
        assert {m.feature for m in s.mains} >= set(s.dependent) and not {m.feature for m in s.mains} & set(s.noise)
    assert sum(any(t.weak for t in s.terms) for s in scenarios) >= 6


def test_dependent_pair_is_strongly_rank_correlated(study):
    from scipy.stats import spearmanr

    for seed in range(6):
        s = study.make_scenario(seed)
        rho = spearmanr(s.X[:, s.dependent[0]], s.X[:, s.dependent[1]]).statistic
        assert 0.8 < rho < 0.97, f"seed {seed}: Spearman {rho:.3f}"


def test_noise_features_carry_no_signal(study):
    s = study.make_scenario(7)
    base = s.signal(s.X)
    shuffle = np.random.default_rng(0)
    for j in s.noise:
        permuted = s.X.copy()
        permuted[:, j] = shuffle.permutation(permuted[:, j])
        assert np.array_equal(s.signal(permuted), base)
    # The same permutation of an interacting feature does move the signal.
    moved = s.X.copy()
    j = s.terms[0].features[0]
    moved[:, j] = shuffle.permutation(moved[:, j])
    assert not np.allclose(s.signal(moved), base)


def test_binary_labels_and_regression_noise(study):
    binary = study.make_scenario(3)
    assert binary.task == "binary" and set(np.unique(binary.y)) == {0.0, 1.0}
    logit_sd = float(np.std(binary.signal(binary.X)))
    assert 1.2 <= logit_sd <= 2.0
    regression = study.make_scenario(4)
    r2 = float(np.var(regression.signal(regression.X)) / np.var(regression.y))
    assert 0.5 < r2 < 0.95


# --------------------------------------------------------------------- the truth
def test_true_h_of_a_product_of_uniforms_matches_the_closed_form(study):
    # f = x0 x1 + 0.5 x0 + sin(3 x2), x0, x1, x2 independent U(0, 1). With the rows as background
    # (eq. 44 of Friedman & Popescu 2008) and A = a - mean(a), B = b - mean(b), the centred partial
    # dependences are F_01 = AB - mean(AB) + A mean(b) + mean(a) B + 0.5 A, F_0 = A mean(b) + 0.5 A,
    # F_1 = mean(a) B, so the interaction part is AB - mean(AB) and
    #   h^2 = mean(A^2 B^2) - mean(AB)^2  ->  Var(x0) Var(x1) = (1/12)^2,  h -> 1/12.
    # Pairs with x2 are additive: their interaction part is 0.
    rows = np.random.default_rng(11).random((800, 3))

    def signal(X):
        return X[:, 0] * X[:, 1] + 0.5 * X[:, 0] + np.sin(3.0 * X[:, 2])

    h = study.true_interaction(signal, rows, [(0, 1), (0, 2), (1, 2)])
    a, b = rows[:, 0] - rows[:, 0].mean(), rows[:, 1] - rows[:, 1].mean()
    assert h[(0, 1)] == pytest.approx(math.sqrt(np.mean(a**2 * b**2) - np.mean(a * b) ** 2), rel=1e-9)
    # Sampling spread of h at 800 rows is about 3% (Var(A^2 B^2) = 1/80^2 - 1/144^2 for centred uniforms).
    assert h[(0, 1)] == pytest.approx(1 / 12, rel=0.1)
    assert h[(0, 2)] < 1e-12 and h[(1, 2)] < 1e-12


def test_pairs_in_different_terms_have_no_true_interaction(study):
    s = study.make_scenario(6)  # a three-way, a maximum and a squared-product term
    assert {t.kind for t in s.terms} >= {"three_way", "maximum"}
    rows = s.X[:200]
    term_pairs = set(s.term_pairs())
    others = [p for p in itertools.combinations(range(s.X.shape[1]), 2) if p not in term_pairs]
    h = study.true_interaction(s.signal, rows, others)
    spread = float(np.std(s.signal(rows)))
    assert max(h.values()) < 1e-9 * spread
    sizes = study.true_sizes(s)
    assert set(sizes) == term_pairs and all(v > 0.01 for v in sizes.values())


def test_weak_terms_land_in_their_band(study):
    checked = 0
    for seed in range(8):
        s = study.make_scenario(seed)
        weak = [t for t in s.terms if t.weak]
        if weak:
            size = study.true_sizes(s)[tuple(sorted(weak[0].features))]
            assert study.band_of(size) == "5-10%", f"seed {seed}: weak size {size:.3f}"
            checked += 1
    assert checked >= 4


# --------------------------------------------------------------------- the report's counting
def test_measures_count_by_hand(study):
    table = pd.DataFrame({
        "task": ["regression", "regression", "binary", "binary", "binary"],
        "library": ["xgboost", "lightgbm", "xgboost", "lightgbm", "lightgbm"],
        "overfit": [False, False, True, False, False],
        "type": ["true", "noise", "true", "dependent", "true"],
        "true_size": [0.25, 0.0, 0.07, 0.0, 0.12],
        "band": [">20%", None, "5-10%", None, "10-20%"],
        "verdict": ["interaction", "interaction", "co-split", "dependent", "co-split"],
        "faint": [False, False, True, False, False],
        "p_value": [0.05, 0.05, 0.05, 1.0, 0.3],
    })
    counted = study.measures(table)
    assert counted["strong misses not beating their own refits (p > level)"] == (1, 1)
    assert counted["precision of interaction: all"] == (1, 2)
    assert counted["precision of interaction: binary"] == (0, 0)
    assert counted["recall: strong (size >= 10%)"] == (1, 2)
    assert counted["weak (5-10%) called interaction or faint"] == (1, 1)
    assert counted["false positives: noise pairs called interaction"] == (1, 1)
    assert counted["dependent pair called dependent"] == (1, 1)
    assert counted["faint flag on pairs without interaction"] == (0, 2)
    assert study.measures(table, faint_known=False)["faint flag on pairs without interaction"] is None
    assert "strong misses not beating their own refits (p > level)" not in study.measures(table.drop(columns="p_value"))


def test_resume_skips_recorded_scenarios_and_a_cut_line(study, tmp_path, monkeypatch):
    out = tmp_path / "study.jsonl"
    out.write_text(json.dumps({"scenario": 0, "size": "small"}) + "\n" + '{"scenario": 1, "si', encoding="utf-8")
    made = []

    def fake_record(seed, **_):
        made.append(seed)
        return {"scenario": seed, "size": "small", "task": "binary", "library": "xgboost", "overfit": False,
                "seconds": 1.0, "fit_seconds": 0.1, "pairs": [], "baseline": None}

    monkeypatch.setattr(study, "scenario_record", fake_record)
    args = Namespace(out=out, seed=0, scenarios=3, size="small", jobs=1, baseline_src=None, baseline_from=None,
                     level=0.05, null_refits=19)
    records = study.run_study(args)
    assert made == [1, 2]
    assert [r["scenario"] for r in records] == [0, 1, 2]
    assert len(out.read_text(encoding="utf-8").splitlines()) == 3


def test_resume_refuses_records_run_with_other_options(study, tmp_path):
    out = tmp_path / "study.jsonl"
    out.write_text(json.dumps({"scenario": 0, "size": "small", "options": {"level": 0.1, "null_refits": 9}}) + "\n",
                   encoding="utf-8")
    args = Namespace(out=out, seed=0, scenarios=2, size="small", jobs=1, baseline_src=None, baseline_from=None,
                     level=0.05, null_refits=19)
    with pytest.raises(SystemExit, match="other triage options"):
        study.run_study(args)


def test_options_reach_the_studied_side_only_and_earlier_baselines_are_checked(study, monkeypatch):
    calls = []

    def fake_worker(scenario, jobs, source, options=None):
        calls.append(options)
        return {"seconds": 1.0, "fit_seconds": 0.1, "code": {"path": str(source)}, "pairs": [],
                "fingerprint": study.fingerprint(scenario)}

    monkeypatch.setattr(study, "run_worker", fake_worker)
    monkeypatch.setattr(study, "true_sizes", lambda scenario: {})
    options = {"level": 0.1, "null_refits": 9}
    scenario = study.make_scenario(0, size="small")
    earlier = {"seconds": 2.0, "pairs": [], "fingerprint": study.fingerprint(scenario)}
    record = study.scenario_record(0, size="small", jobs=1, baseline=None, order=0, options=options, earlier=earlier)
    assert calls == [options]
    assert record["options"] == options and record["baseline"]["copied"] and record["baseline"]["seconds"] == 2.0
    with pytest.raises(SystemExit, match="other data"):
        study.scenario_record(0, size="small", jobs=1, baseline=None, order=0, options=options,
                              earlier={**earlier, "fingerprint": "0" * 16})
    # The 'did not beat its own refits' split reads each record's own level.
    table = study.pair_table([{**record, "pairs": [{"feature_a": "x0", "feature_b": "x1", "verdict": "co-split",
                                                     "faint": False, "p_value": 0.1, "type": "true",
                                                     "true_size": 0.3, "band": ">20%"}]}])
    assert study.measures(table)["strong misses not beating their own refits (p > level)"] == (0, 1)


def test_existing_output_needs_resume(study, tmp_path):
    out = tmp_path / "study.jsonl"
    out.write_text('{"scenario": 0}\n', encoding="utf-8")
    with pytest.raises(SystemExit):
        study.main(["--out", str(out), "--scenarios", "1"])


# --------------------------------------------------------------------- a tiny end-to-end run
# Seeds chosen by rule before any run: the first two seeds (0: binary XGBoost, 1: regression
# LightGBM) and the first seed that is both binary and overfit (12, XGBoost), at --size small.
E2E_SEEDS = (0, 1, 12)
# What the method promises on these seeds: no false call anywhere and the dependent pair flagged (the study's
# precision is 0.96 over 45 scenarios, so a false call on one of three seeds would be news). Strong recall is 0.93
# in the study, not a promise for every scenario: it is asserted on the regression seed only. Measured misses here:
# seed 0 (small binary), x6 x x11 (true size 0.19) reaches p_adjusted 0.15 once the clear x1 x x10 is kept in the
# second round's null; seed 12 (small overfit binary), whose margin spreads several times wider than the true
# logit, carries its strong pairs at effects of 0.03-0.06, within what its refits show without interaction.
RECALL_SEEDS = (1,)


@pytest.fixture(scope="module")
def e2e_records(study):
    return {seed: study.scenario_record(seed, size="small", jobs=1, baseline=None, order=0) for seed in E2E_SEEDS}


def _pairs(record, **where):
    return [p for p in record["pairs"] if all(p[k] == v for k, v in where.items())]


@pytest.mark.parametrize("seed", RECALL_SEEDS)
def test_every_strong_interaction_is_called_interaction(e2e_records, seed):
    strong = [p for p in _pairs(e2e_records[seed], type="true") if p["true_size"] >= 0.10]
    assert strong, "the scenario has no strong interaction to find"
    missed = [(p["feature_a"], p["feature_b"], round(p["true_size"], 3), p["verdict"]) for p in strong
              if p["verdict"] != "interaction"]
    assert not missed


@pytest.mark.parametrize("seed", E2E_SEEDS)
def test_no_pair_without_interaction_is_called_interaction(e2e_records, seed):
    noise = _pairs(e2e_records[seed], type="noise")
    assert noise
    wrong = [p for p in e2e_records[seed]["pairs"] if p["type"] != "true"]
    assert [(p["feature_a"], p["feature_b"], p["type"]) for p in wrong if p["verdict"] == "interaction"] == []


@pytest.mark.parametrize("seed", E2E_SEEDS)
def test_dependent_pair_is_called_dependent(e2e_records, seed):
    (pair,) = _pairs(e2e_records[seed], type="dependent")
    assert pair["verdict"] == "dependent"


def test_report_counts_every_pair(study, e2e_records):
    records = list(e2e_records.values())
    facts = study.summary(records)
    n_features = [r["n_features"] for r in records]
    n_noise = sum(len(_pairs(r, type="noise")) for r in records)
    assert facts["new"]["false positives: noise pairs called interaction"]["trials"] == n_noise
    assert sum(len(r["pairs"]) for r in records) == sum(n * (n - 1) // 2 for n in n_features)
    assert facts["new"]["dependent pair called dependent"]["trials"] == len(records)
    report = study.render_report(records)
    assert "| recall: strong (size >= 10%) |" in report and "Wilson" in report


def test_worker_process_reproduces_the_in_process_run(study, e2e_records):
    # The records come from worker processes that re-make the scenario from its seed; the same triage
    # run here, in this process, must give the same verdicts (and the worker proved the same data).
    s = study.make_scenario(1, size="small")
    here = study.run_triage(s, 1)
    assert here["fingerprint"] == study.fingerprint(s)
    assert e2e_records[1]["code"]["path"] == str(ROOT / "treeprobe")
    verdicts = {(p["feature_a"], p["feature_b"]): p["verdict"] for p in here["pairs"]}
    assert {(p["feature_a"], p["feature_b"]): p["verdict"] for p in e2e_records[1]["pairs"]} == verdicts


def test_worker_refuses_a_source_without_the_package(study, tmp_path):
    failed = study.run_worker(study.make_scenario(1, size="small"), 1, tmp_path)
    assert "imported from" in failed["error"]
