"""Tests of the triage verdicts against functions whose interactions are known.

References: the Friedman benchmark functions shipped in scikit-learn
(Friedman 1991, "Multivariate adaptive regression splines", Annals of
Statistics 19(1): ``make_friedman1``; Breiman 1996 / Friedman 1991
``make_friedman2`` and ``make_friedman3``), whose formulas say which inputs
interact; models trained under XGBoost's own ``interaction_constraints``
(the library's enforcement is the ground truth for "absent"); and the noise
floor of Friedman and Popescu (2008, section 8.3).
"""

import json
from itertools import combinations

import numpy as np
import pandas as pd
import pytest

from treeprobe import DataError
from treeprobe.errors import ParameterError
from treeprobe.verdicts import VERDICTS, triage

xgb = pytest.importorskip("xgboost")


def _frame(X):
    return pd.DataFrame(X, columns=[f"x{i}" for i in range(X.shape[1])])


def _fit(X, y, **params):
    settings = dict(n_estimators=120, max_depth=4, learning_rate=0.1, n_jobs=1, random_state=0)
    settings.update(params)
    return xgb.XGBRegressor(**settings).fit(X, y)


def _verdicts(result):
    return {frozenset((a, b)): v for a, b, v in result.pairs[["feature_a", "feature_b", "verdict"]].itertuples(index=False)}


@pytest.fixture(scope="module")
def friedman1():
    from sklearn.datasets import make_friedman1

    # y = 10 sin(pi x0 x1) + 20 (x2 - 0.5)^2 + 10 x3 + 5 x4 + noise; x5, x6 are pure noise.
    X, y = make_friedman1(n_samples=800, n_features=7, noise=0.5, random_state=0)
    X = _frame(X)
    model = _fit(X, y)
    return model, X, y, triage(model, X, y, sample=400, resamples=6)


def test_friedman1_only_x0_x1_interact(friedman1):
    _, _, _, result = friedman1
    verdicts = _verdicts(result)
    assert verdicts[frozenset(("x0", "x1"))] == "interaction"
    assert result.pairs.iloc[0][["feature_a", "feature_b"]].tolist() == ["x0", "x1"]
    # The additive terms x2, x3, x4 share paths but do not interact: co-split.
    for pair in combinations(("x2", "x3", "x4"), 2):
        row = result.pairs.set_index(["feature_a", "feature_b"]).loc[pair]
        assert row["paths"] > 0
        assert row["verdict"] == "co-split"
    # Pairs with the noise features are never interaction.
    for key, verdict in verdicts.items():
        if key & {"x5", "x6"}:
            assert verdict != "interaction"
    assert set(result.pairs["verdict"]) <= set(VERDICTS)


def test_friedman1_columns_and_floor(friedman1):
    _, _, _, result = friedman1
    pairs = result.pairs
    sharing = pairs["paths"] > 0
    level = result.thresholds["level"]
    # The noise floor (on h) and its p-values come from the refits when y is given; intervals are ordered.
    assert pairs.loc[sharing, ["null_h", "null_h2", "p_value", "p_adjusted"]].notna().all().all()
    assert pairs.loc[~sharing, ["p_value", "p_adjusted"]].isna().all().all()
    refits = result.facts["null_refits"]
    assert refits == 19 and result.facts["n_rows"] == 400
    tested = pairs[sharing]
    # Empirical p-values (1 + b) / (R + 1): multiples of 1/20, adjusted never below raw.
    assert np.allclose(tested["p_value"] * (refits + 1), np.round(tested["p_value"] * (refits + 1)))
    assert (tested["p_adjusted"] >= tested["p_value"] - 1e-12).all()
    # The floor is the h at which p_adjusted reaches the level: one decision, two ways to read it.
    assert ((tested["p_adjusted"] <= level) == (tested["h"] > tested["null_h"])).all()
    # Intervals exactly where one could decide (sharing a path, effect at least min_effect), and ordered.
    deciding = sharing & (pairs["effect"] >= result.thresholds["min_effect"])
    assert deciding.any() and (~deciding).any()
    interval = ["h2_low", "h2_high", "h_low", "h_high"]
    assert pairs.loc[deciding, interval].notna().all().all() and pairs.loc[~deciding, interval].isna().all().all()
    assert (pairs.loc[deciding, "h2_low"] <= pairs.loc[deciding, "h2_high"] + 1e-12).all()
    assert (pairs.loc[deciding, "h_low"] <= pairs.loc[deciding, "h_high"] + 1e-12).all()
    # Every interaction clears both parts of its rule; faint pairs clear the floor but not the size.
    inter = pairs[pairs["verdict"] == "interaction"]
    assert (inter["p_adjusted"] <= level).all() and (inter["h"] > inter["null_h"]).all()
    assert (inter["effect"] >= result.thresholds["min_effect"]).all()
    faint = pairs[pairs["faint"]]
    assert (faint["p_adjusted"] <= level).all() and (faint["effect"] < result.thresholds["min_effect"]).all()
    assert set(faint["verdict"]) <= {"co-split"}
    assert np.allclose(pairs["strength"], np.where(sharing, pairs["h"] / result.facts["prediction_sd"], 0.0))
    json.dumps(result.to_dict())
    assert set(result.rules) == set(VERDICTS)


@pytest.mark.parametrize("maker_name", ["make_friedman2", "make_friedman3"])
def test_friedman2_and_3_verdicts_follow_the_formulas(maker_name):
    # make_friedman2: y = sqrt(x0^2 + (x1 x2 - 1/(x1 x3))^2); make_friedman3:
    # y = arctan((x1 x2 - 1/(x1 x3)) / x0). On scikit-learn's ranges 1/(x1 x3) < 0.01,
    # so x3 is all but inert; the interactions are among x0, x1, x2. Two appended
    # uniform columns x4, x5 are pure noise.
    import sklearn.datasets

    X, y = getattr(sklearn.datasets, maker_name)(n_samples=700, noise=0.0, random_state=1)
    X = _frame(np.hstack([X, np.random.default_rng(1).uniform(size=(700, 2))]))
    result = triage(_fit(X, y), X, y, sample=350, resamples=5)
    found = [frozenset(k) for k, v in _verdicts(result).items() if v == "interaction"]
    assert found, "the formula's interaction among x0, x1, x2 was not found"
    assert all(k <= {"x0", "x1", "x2"} for k in found)
    top = result.pairs.iloc[0]
    assert {top["feature_a"], top["feature_b"]} <= {"x0", "x1", "x2"}
    if maker_name == "make_friedman2":
        # x1 x2 dominates the root: the pair is the interaction.
        assert frozenset(("x1", "x2")) in found


def test_correlated_additive_pair_is_never_interaction():
    # y = a + b + c with corr(a, b) ~ 0.97: a and b stand in for each other on paths.
    rng = np.random.default_rng(3)
    a = rng.normal(size=800)
    b = a + 0.25 * rng.normal(size=800)
    c = rng.normal(size=800)
    X = pd.DataFrame({"a": a, "b": b, "c": c})
    y = a + b + c + 0.1 * rng.normal(size=800)
    result = triage(_fit(X, y), X, y, sample=400, resamples=5)
    row = result.pairs.set_index(["feature_a", "feature_b"]).loc[("a", "b")]
    assert row["verdict"] in ("dependent", "co-split")
    assert row["verdict"] != "interaction"
    assert row["dependence"] > 0.9
    assert row["verdict"] == "dependent" and row["leans"] in ("interaction", "co-split")


def test_constrained_model_pairs_across_groups_are_absent():
    # Ground truth: XGBoost's own interaction_constraints enforcement.
    rng = np.random.default_rng(4)
    X = _frame(rng.uniform(-1, 1, size=(600, 4)))
    y = X["x0"] * X["x1"] + X["x2"] * X["x3"] + 0.05 * rng.normal(size=600)
    model = _fit(X, y, interaction_constraints="[[0, 1], [2, 3]]")
    result = triage(model, X, sample=300, resamples=0)
    verdicts = _verdicts(result)
    for a, b in [("x0", "x2"), ("x0", "x3"), ("x1", "x2"), ("x1", "x3")]:
        assert verdicts[frozenset((a, b))] == "absent"
        row = result.pairs.set_index(["feature_a", "feature_b"]).loc[(a, b)]
        assert row["h2"] == 0.0 and row["paths"] == 0
    assert verdicts[frozenset(("x0", "x1"))] == "interaction"
    assert verdicts[frozenset(("x2", "x3"))] == "interaction"
    # Without y there are no refits: no noise floor, and the rule says so.
    assert result.facts["null_refits"] == 0 and result.pairs["null_h"].isna().all()
    assert "no noise floor" in result.rules["interaction"]


def test_target_by_column_name_and_triples(friedman1):
    model, X, y, _ = friedman1
    frame = X.assign(target=y)
    result = triage(model, frame, "target", sample=200, resamples=0, null_refits=0, triples=True)
    assert "target" not in set(result.pairs["feature_a"]) | set(result.pairs["feature_b"])
    assert {"feature_a", "feature_b", "feature_c", "verdict", "h2"} <= set(result.triples.columns)
    assert len(result.triples) > 0
    assert set(result.triples["verdict"]) <= set(VERDICTS)


def test_bad_input_is_reported(friedman1):
    model, X, y, _ = friedman1
    with pytest.raises(DataError, match="target column 'nope'"):
        triage(model, X, "nope")
    with pytest.raises(DataError, match="one value per row"):
        triage(model, X, y[:10])
    # Bad options are parameter errors, not data errors (treeprobe.checks).
    with pytest.raises(ParameterError, match="min_h2"):
        triage(model, X, min_h2=2.0)
    with pytest.raises(ParameterError, match="resamples"):
        triage(model, X, resamples=-1)
    with pytest.raises(ParameterError, match="output"):
        triage(model, X, output=1)
    with pytest.raises(DataError, match="x3"):
        triage(model, X.drop(columns=["x3"]))


def test_a_bad_output_is_refused_before_the_data_are_read(friedman1, monkeypatch):
    import treeprobe.verdicts as verdicts

    model, X, y, _ = friedman1

    def no_work(*_, **__):
        raise AssertionError("the data were read before the options were checked")

    monkeypatch.setattr(verdicts, "model_matrix", no_work)
    with pytest.raises(ParameterError, match=r"output must be an integer in 0\.\.0, got 2"):
        triage(model, X, y, output=2)


def test_one_verdict_order_and_rules_from_the_thresholds(friedman1):
    """One tuple in table order; constraints uses the same object; rules follow it and quote the thresholds."""
    from treeprobe import constraints

    _, _, _, result = friedman1
    assert VERDICTS == ("interaction", "dependent", "co-split", "absent")
    assert constraints.VERDICTS is VERDICTS
    assert tuple(result.rules) == VERDICTS
    ranks = result.pairs["verdict"].map({v: i for i, v in enumerate(VERDICTS)}).to_numpy()
    assert (np.diff(ranks) >= 0).all()
    model, X, y, _ = friedman1
    other = triage(model, X, sample=200, resamples=0, min_h2=0.125, min_effect=0.25, max_dependence=0.625)
    assert "0.125" in other.rules["interaction"] and "25%" in other.rules["interaction"]
    assert "0.625" in other.rules["dependent"]


def test_verdict_is_a_function_of_the_numbers():
    """The rule of the triage docstring, on hand-made rows (no model): one row per branch of the rule."""
    from treeprobe.verdicts import _verdict

    thresholds = {"min_h2": 0.05, "min_effect": 0.05, "max_dependence": 0.7, "level": 0.05}
    # With a floor: clears, low H² (diluted: still interaction), within floor, small effect (faint), dependent,
    # no path, dependent and small (not faint: its H is not trusted); without a floor (p NaN): clears, low H²,
    # h interval touching 0.
    h2_low = np.array([0.2, 0.01, 0.2, 0.2, 0.2, 0.0, 0.2, 0.2, 0.04, 0.2])
    h_low = np.array([1.0, 1.0, 1.0, 1.0, 1.0, 0.0, 1.0, 1.0, 1.0, 0.0])
    p_adjusted = np.array([0.05, 0.05, 0.3, 0.05, 0.05, np.nan, 0.05, np.nan, np.nan, np.nan])
    effect = np.array([0.1, 0.1, 0.1, 0.01, 0.1, 0.0, 0.01, 0.1, 0.1, 0.1])
    dependence = np.array([0.1, 0.1, 0.1, 0.1, 0.9, 0.95, 0.9, np.nan, 0.1, 0.1])
    shares = np.array([True, True, True, True, True, False, True, True, True, True])
    verdict, leans, faint = _verdict(h2_low, h_low, p_adjusted, effect, dependence, shares, thresholds)
    assert verdict.tolist() == ["interaction", "interaction", "co-split", "co-split", "dependent", "absent",
                                "dependent", "interaction", "co-split", "co-split"]
    assert leans.tolist() == ["interaction", "interaction", "co-split", "co-split", "interaction", "absent",
                              "co-split", "interaction", "co-split", "co-split"]
    assert faint.tolist() == [False, False, False, True, False, False, False, False, False, False]


def test_tables_have_fixed_columns_and_results_compare(friedman1):
    from treeprobe.verdicts import FEATURE_COLUMNS, PAIR_COLUMNS, TRIPLE_COLUMNS

    model, X, y, _ = friedman1
    plain = triage(model, X, sample=150, resamples=0, null_refits=0)
    with_triples = triage(model, X, sample=150, resamples=0, null_refits=0, triples=True)
    assert tuple(plain.triples.columns) == tuple(with_triples.triples.columns) == TRIPLE_COLUMNS
    assert len(plain.triples) == 0 and len(with_triples.triples) > 0
    assert tuple(plain.pairs.columns) == tuple(with_triples.pairs.columns) == PAIR_COLUMNS
    assert tuple(plain.features.columns) == FEATURE_COLUMNS
    # Comparing never raises: equal to itself, unequal to another run or another type.
    assert plain == plain
    assert (plain == with_triples) is False
    assert (plain == "a result") is False
    same = triage(plain.ensemble, X, sample=150, resamples=0, null_refits=0)
    assert same.pairs.equals(plain.pairs) and same.rules == plain.rules


# ----------------------------------------------- refits with a recovered recipe
def test_planted_diabetes_pairs_pass_the_noise_floor_of_a_saved_json(planted_diabetes):
    # Refits at XGBoost's default eta 0.3 overfit and lift the floor above both planted pairs (measured: null h
    # 22.1 vs h_low 19.1 for bmi:bp with 10 refits and 20 resamples); the eta recovered from the trees (0.05) puts it
    # below. Both planted pairs beat every one of the 19 refits (the smallest p-value, 1/20). On 442 rows bmi x bp
    # (h 19.7) stays just under the family-wise floor (21.2; p_adjusted 0.15, measured): the refits of two strong
    # main effects reach h 8-18 on their own, and 60 pairs are tested at once.
    path, data, _ = planted_diabetes
    result = triage(path, data, "target", sample=None)
    verdicts = _verdicts(result)
    assert verdicts[frozenset(("age", "s6"))] == "interaction"
    pairs = result.pairs.set_index(["feature_a", "feature_b"])
    assert pairs.loc[("bmi", "bp"), "p_value"] == pairs.loc[("age", "s6"), "p_value"] == pytest.approx(1 / 20)
    assert pairs["effect"].idxmax() == ("bmi", "bp")
    # The output says so: bmi x bp is named as a near miss, with its family-wise p-value.
    near = [note for note in result.facts["refit_notes"] if note.startswith("Near the floor")]
    assert len(near) == 1 and "bmi × bp (effect 0.26, p_adjusted" in near[0]
    recipe = result.facts["refit_recipe"]
    assert recipe["params"]["eta"] == {"value": pytest.approx(0.05, rel=1e-5), "origin": "recovered"}
    assert recipe["params"]["max_depth"] == {"value": 4, "origin": "recovered"}
    assert recipe["rounds"] == 200
    assert "eta 0.05 (recovered from the trees)" in result.facts["refit_recipe_text"]
    assert json.loads(json.dumps(result.to_dict()))["facts"]["refit_recipe"]["params"]["reg_lambda"]["origin"] == "recovered"


def test_given_params_reach_the_refits(planted_diabetes):
    path, data, _ = planted_diabetes
    result = triage(path, data, "target", sample=200, null_refits=1, level=0.5, params={"eta": 0.3, "max_depth": 2})
    params = result.facts["refit_recipe"]["params"]
    assert params["eta"] == {"value": 0.3, "origin": "given"} and params["max_depth"] == {"value": 2, "origin": "given"}


def test_refits_in_parallel_workers_use_one_thread_each(planted_diabetes, monkeypatch, xgboost_threads):
    """XGBoost's own train() receives nthread=1 for every refit inside workers; the lone additive fits every free core."""
    import joblib

    import treeprobe.parallel

    seen = xgboost_threads
    monkeypatch.setattr(treeprobe.parallel, "free_cores", lambda: 5)
    path, data, _ = planted_diabetes
    # The threading backend runs the workers in this process, so the spy sees their fits.
    with joblib.parallel_backend("threading"):
        result = triage(path, data, "target", sample=150, null_refits=3, level=0.25, n_jobs=2)
    # Per round: two lone null fits (early-stopped, then all rows at the best rounds), then three refits in workers.
    assert seen == [5, 5, 1, 1, 1] * result.facts["floor_rounds"]
    assert result.facts["refit_threads_per_fit"] == 1
    seen.clear()
    result = triage(path, data, "target", sample=150, null_refits=2, level=0.34, n_jobs=1)
    assert seen == [5, 5, 5, 5] * result.facts["floor_rounds"]


# ------------------------------------------------------------- the floor test
def test_max_ratio_test_holds_its_family_wise_level_under_an_exchangeable_null():
    """Westfall and Young (1993), single-step maxT: with the model exchangeable with its refits and no pair
    interacting, P(any p_adjusted <= level) <= level whatever the number of pairs (here 40 correlated pairs of
    unequal scales). 4,000 simulated models; the count of false calls must stay under the level's binomial
    upper bound (mean 200, sd 13.8: 245 is more than three sd above)."""
    from treeprobe.floor import max_ratio_test

    rng = np.random.default_rng(11)
    refits, pairs, runs = 19, 40, 4000
    scales = rng.uniform(0.01, 2.0, size=pairs)
    false_calls = 0
    for _ in range(runs):
        shared = rng.normal(size=(refits + 1, 1))
        draws = scales * np.abs(0.6 * shared + 0.8 * rng.normal(size=(refits + 1, pairs)))
        _, adjusted, _ = max_ratio_test(draws[0], draws[1:], level=0.05)
        false_calls += bool((adjusted <= 0.05).any())
    assert 120 < false_calls < 245, false_calls


def test_max_ratio_test_formulas_on_a_small_case():
    """p-values by the (1 + b) / (R + 1) count (Phipson and Smyth 2010) and the floor equivalence, by hand."""
    from treeprobe.floor import max_ratio_test

    null = np.array([[1.0, 0.1], [2.0, 0.2], [3.0, 0.3]])
    observed = np.array([2.5, 0.35])
    p_value, p_adjusted, floor = max_ratio_test(observed, null, level=0.25)
    # Pair 0: one of three refits (3.0) reaches 2.5 -> (1 + 1) / 4; pair 1: none reaches 0.35 -> 1/4.
    assert p_value.tolist() == [0.5, 0.25]
    # Scales (2.5+6)/4 = 2.125 and (0.35+0.6)/4 = 0.2375; ratios observed 1.176, 1.474; refit maxima
    # max(1/2.125, 0.1/0.2375) = 0.471, max(0.941, 0.842) = 0.941, max(1.412, 1.263) = 1.412.
    assert p_adjusted.tolist() == [0.5, 0.25]
    # k = floor(0.25 * 4) - 1 = 0: the largest maximum, 1.412, times each scale.
    assert floor == pytest.approx([2.125 * 3.0 / 2.125, 0.2375 * 3.0 / 2.125])
    assert ((p_adjusted <= 0.25) == (observed > floor)).all()


def test_too_few_refits_for_the_level_are_refused_before_any_fit(friedman1):
    model, X, y, _ = friedman1
    with pytest.raises(ParameterError, match=r"null_refits=10 cannot reach level 0.05.*null_refits >= 19"):
        triage(model, X, y, null_refits=10)
    with pytest.raises(ParameterError, match="level"):
        triage(model, X, y, level=0.0)
    # Without a target no refits run, so any count is fine.
    assert triage(model, X, sample=100, null_refits=3).facts["null_refits"] == 0


def test_clear_interactions_are_kept_in_the_null_of_the_second_round():
    """y = 2 x0 x1 + 2 x1 x2: both pairs clear the first round by a wide margin, so every other pair is tested again
    against a null fitted under XGBoost's interaction constraints allowing exactly those two pairs. Both stay
    interactions; no pair with the noise feature x3, and not x0 x x2 (no term), is one."""
    rng = np.random.default_rng(21)
    X = _frame(rng.uniform(-1, 1, size=(900, 4)))
    y = 2 * X["x0"] * X["x1"] + 2 * X["x1"] * X["x2"] + 0.2 * rng.normal(size=900)
    result = triage(_fit(X, y), X, y, sample=300)
    verdicts = _verdicts(result)
    assert verdicts[frozenset(("x0", "x1"))] == verdicts[frozenset(("x1", "x2"))] == "interaction"
    assert result.facts["floor_rounds"] == 2 and result.facts["refits_total"] == 2 * 19
    assert sorted(map(sorted, result.facts["kept_in_null"])) == [["x0", "x1"], ["x1", "x2"]]
    assert any("wide margin" in note for note in result.facts["refit_notes"])
    assert all(v != "interaction" for k, v in verdicts.items() if "x3" in k)
    assert verdicts[frozenset(("x0", "x2"))] != "interaction"
    # The kept pairs keep their first-round floor; the others were tested again, each against its own floor.
    pairs = result.pairs.set_index(["feature_a", "feature_b"])
    assert (pairs.loc[[("x0", "x1"), ("x1", "x2")], "h"] >= 1.5 * pairs.loc[[("x0", "x1"), ("x1", "x2")], "null_h"]).all()


def test_classes_share_the_first_round_and_equal_separate_triages(monkeypatch):
    # Three classes from a product and a main effect; every class's triage draws the same first-round labels and
    # refits, so triage_classes runs them once and must give exactly the separate triages' results.
    import treeprobe.floor as floor
    from treeprobe.verdicts import triage_classes

    rng = np.random.default_rng(4)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(300, 3)), columns=["kiln_c", "glaze_mm", "clay_pct"])
    score = 2 * X["kiln_c"] * X["glaze_mm"] + X["clay_pct"]
    codes = np.digitize(score, np.quantile(score, [1 / 3, 2 / 3]))
    model = xgb.XGBClassifier(n_estimators=12, max_depth=3, n_jobs=1, random_state=0).fit(X, codes)
    fits = []
    real_fit = floor.fit
    monkeypatch.setattr(floor, "fit", lambda *a, **k: fits.append(k.get("groups")) or real_fit(*a, **k))
    options = dict(sample=150, null_refits=4, level=0.2, random_state=3)
    separate = [triage(model, X, codes, output=k, **options) for k in range(3)]
    separate_fits, fits[:] = list(fits), []
    shared = triage_classes(model, X, codes, **options)
    # Refits of the model (fits without constraint groups; null fits have them): the first round's 4 per class
    # separately, 4 in all when shared; second rounds, if any, the same in both.
    refits_alone = sum(1 for groups in separate_fits if groups is None)
    assert refits_alone >= 3 * 4 and sum(1 for groups in fits if groups is None) == refits_alone - 2 * 4
    for alone, together in zip(separate, shared, strict=True):
        assert alone.facts["output"] == together.facts["output"]
        # Scored among more pairs, h may differ in the last digit (summing order); decisions not at all.
        pd.testing.assert_frame_equal(alone.pairs, together.pairs, check_exact=False, rtol=1e-12, atol=1e-15)
        for column in ("verdict", "faint", "p_value", "p_adjusted"):
            assert alone.pairs[column].equals(together.pairs[column])
        assert {k: v for k, v in alone.facts.items() if k != "seconds"} == \
               {k: v for k, v in together.facts.items() if k != "seconds"}
    assert [r.facts["class_analysed"] for r in shared] == [f"class {k} (output {k} of 3)" for k in range(3)]
    for wrong in ({"output": 1}, {"null_refit": 4}):
        with pytest.raises(ParameterError, match="takes the options of triage but output; got"):
            triage_classes(model, X, codes, **wrong)
