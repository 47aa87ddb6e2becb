"""Tests of :mod:`treeprobe.search`, the forward search for interaction constraints by held-out loss.

Outside references: a known-answer data set invented here (ferry crossings,
below) whose interactions are planted; XGBoost trained directly with the
exported ``interaction_constraints`` (Chen & Guestrin 2016) and scored with
scikit-learn's ``mean_squared_error``; the trees of that model walked for
paths crossing the groups (the library's own enforcement); the closed form of
the one-standard-error rule (Breiman, Friedman, Olshen & Stone 1984, CART,
section 3.4.3) and of the corrected standard error (Nadeau & Bengio 2003).
Logic tests replace the fits by a scorer with known losses, so they run in
milliseconds.
"""

from __future__ import annotations

import json
import math
import time
from itertools import combinations
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from treeprobe import search as search_module
from treeprobe.constraints import cross_validated_scores, fold_splits
from treeprobe.cooccurrence import structure
from treeprobe.errors import DataError, ParameterError
from treeprobe.io import load_model
from treeprobe.search import SearchResult, search_constraints
from treeprobe.verdicts import triage

xgb = pytest.importorskip("xgboost")

FERRY = ["wave_height", "headwind", "cargo_t", "speed", "water_temp", "hull_days", "air_temp", "deck_temp",
         "passengers"]
TRUE_PAIRS = [("wave_height", "headwind"), ("cargo_t", "speed"), ("water_temp", "hull_days")]


def _ferry_crossings(n_rows: int, seed: int = 3):
    """Invented scenario: fuel burned on a ferry crossing (standardised), nine recorded conditions in -1..1.

    Known answer: fuel = 2 wave_height headwind + 1.5 sin(2 cargo_t) speed (two strong interactions)
    + 0.4 water_temp hull_days (weak but real: fouling grows faster in warm water; 5-10% of the signal's sd)
    + air_temp + 0.7 deck_temp (deck_temp = 0.95 air_temp + small noise: a strongly dependent additive pair)
    + 0.8 passengers + 0.5 wave_height + 0.5 speed + noise (sd 0.2).
    Returns the frame, the target and the weak part's share of the signal's standard deviation.
    """
    rng = np.random.default_rng(seed)
    X = rng.uniform(-1, 1, size=(n_rows, 9))
    X[:, 7] = 0.95 * X[:, 6] + 0.05 * rng.uniform(-1, 1, n_rows)
    weak = 0.4 * X[:, 4] * X[:, 5]
    signal = (2.0 * X[:, 0] * X[:, 1] + 1.5 * np.sin(2 * X[:, 2]) * X[:, 3] + weak + X[:, 6] + 0.7 * X[:, 7]
              + 0.8 * X[:, 8] + 0.5 * X[:, 0] + 0.5 * X[:, 3])
    return pd.DataFrame(X, columns=FERRY), signal + rng.normal(0, 0.2, n_rows), float(weak.std() / signal.std())


@pytest.fixture
def one_thread_per_fit(monkeypatch):
    """Every fit of the search on one thread: the test machine's cores are shared."""
    monkeypatch.setattr(search_module, "threads_per_fit", lambda n_jobs: 1)


def _together(groups, a, b) -> bool:
    return any(a in group and b in group for group in groups)


# --------------------------------------------------------------------- the known answer
def test_search_keeps_the_true_interactions_and_beats_no_constraints(one_thread_per_fit, monkeypatch):
    """Done-when of the search: two strong, one weak (5-10%) true interaction, a dependent additive pair.

    The chosen groups hold all three true pairs and never the dependent pair;
    their cross-validated RMSE is within 2% of the true structure's (scored
    on the same folds, each variant early-stopped at its own best rounds) and
    below the unconstrained model's. Outside check: XGBoost trained directly
    with the exported parameters and the recommended rounds beats the
    unconstrained XGBoost at its own recommended rounds on held-out rows
    (scikit-learn's mean_squared_error), and its trees never cross the groups.
    """
    from sklearn.metrics import mean_squared_error

    X, y, weak_share = _ferry_crossings(1200)
    assert 0.05 <= weak_share <= 0.10
    model = xgb.XGBRegressor(n_estimators=150, learning_rate=0.2, max_depth=4, n_jobs=1, random_state=0).fit(X, y)
    triaged = triage(model, X, triples=True, null_refits=0, resamples=0, sample=500, progress=False)
    verdicts = {frozenset(pair): v for *pair, v in triaged.pairs[["feature_a", "feature_b", "verdict"]].to_numpy()}
    assert verdicts[frozenset(("air_temp", "deck_temp"))] == "dependent"
    contexts = []
    spy = search_module.cross_validated_scores

    def remember(context, tasks, **options):
        contexts.append(context)
        return spy(context, tasks, **options)

    monkeypatch.setattr(search_module, "cross_validated_scores", remember)
    started = time.perf_counter()
    result = search_constraints(model, X, y, triage_result=triaged, folds=3, max_steps=4, max_candidates=3,
                                progress=False)
    seconds = time.perf_counter() - started

    chosen = result.chosen_groups
    assert all(_together(chosen, a, b) for a, b in TRUE_PAIRS), chosen
    for groups in result.steps["groups"]:
        assert not _together(groups, "air_temp", "deck_temp")
    assert not _together(result.suggestion.xgboost_param_by_name, "air_temp", "deck_temp")

    context = contexts[0]
    assert context.threads == 1 and result.facts["threads_per_fit"] == 1
    truth = [[0, 1], [2, 3], [4, 5], [6], [7], [8]]
    scored = cross_validated_scores(context, [(truth, split) for split in fold_splits(context, 3)], n_jobs=1,
                                    progress=False)
    true_loss = float(np.mean([scores["rmse"] for scores, _ in scored]))
    chosen_loss = float(result.steps.loc[result.steps["step"] == result.chosen_step, "loss"].iloc[0])
    assert chosen_loss <= 1.02 * true_loss
    assert chosen_loss < result.unconstrained["loss"]
    free = result.unconstrained
    assert free["chosen_minus_unconstrained"] + free["chosen_minus_unconstrained_se"] < 0
    # Each variant at its own best rounds: the rounds differ between the structures.
    chosen_rounds = result.folds.loc[result.folds["step"] == result.chosen_step, "rounds"].to_numpy()
    assert result.recommended_rounds == int(round(float(np.median(chosen_rounds))))
    assert len({int(np.median(chosen_rounds)), free["rounds"], int(result.steps["rounds"].iloc[0])}) == 3
    assert result.facts["fits"] == 3 * (2 + len(result.candidates))
    assert result.facts["fits"] <= result.facts["estimated_fits"]

    train, test = slice(0, 900), slice(900, None)
    own = {"learning_rate": 0.2, "max_depth": 4, "n_jobs": 1, "random_state": 0}
    bound = xgb.XGBRegressor(n_estimators=result.recommended_rounds,
                             interaction_constraints=result.suggestion.xgboost_param, **own).fit(X[train], y[train])
    free = xgb.XGBRegressor(n_estimators=result.unconstrained["rounds"], **own).fit(X[train], y[train])
    assert mean_squared_error(y[test], bound.predict(X[test])) < mean_squared_error(y[test], free.predict(X[test]))
    walked = structure(load_model(bound), max_order=2).pairs
    for a, b in zip(walked["feature_a"], walked["feature_b"], strict=True):
        assert _together(result.suggestion.groups, a, b), (a, b)
    print(f"\nferry search: {result.facts['fits']} fits in {seconds:.1f} s; chosen rmse {chosen_loss:.4f}, "
          f"true {true_loss:.4f}, unconstrained {result.unconstrained['loss']:.4f}")


# --------------------------------------------------------------------- logic with known losses
NAMES = ["kiln_temp", "glaze_mix", "clay_batch", "humidity", "firing_hours", "shelf"]
# Known answer of the stand-in scorer: allowing a pair lowers the loss by its value.
PAIR_VALUES = {frozenset((0, 1)): 0.30, frozenset((2, 3)): 0.20, frozenset((3, 4)): 0.04}


def _known_loss(groups, fold: int) -> float:
    """Loss of a set of groups on a fold: 1 minus the values of the allowed true pairs, 0.003 per other pair."""
    if groups is None:
        return 0.62 + 0.01 * fold
    allowed = {frozenset(pair) for group in groups for pair in combinations(group, 2)}
    value = sum(v for pair, v in PAIR_VALUES.items() if pair in allowed)
    needless = len(allowed - PAIR_VALUES.keys())
    return 1.0 - value + 0.003 * needless + 0.01 * fold + 0.002 * ((fold * len(allowed)) % 3)


@pytest.fixture
def known_losses(monkeypatch):
    """Replace the fits by ``_known_loss``; the calls (labels and task counts) are recorded."""
    calls = []

    def scorer(context, tasks, *, n_jobs, progress, label):
        calls.append((label, len(tasks)))
        return [({"rmse": _known_loss(groups, fold)}, 10 + 5 * fold) for groups, (fold, _, _) in tasks]

    monkeypatch.setattr(search_module, "cross_validated_scores", scorer)
    return calls


@pytest.fixture(scope="module")
def pottery():
    rng = np.random.default_rng(1)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(120, 6)), columns=NAMES)
    y = X["kiln_temp"] * X["glaze_mix"] + X["clay_batch"] * X["humidity"] + X["shelf"]
    model = xgb.XGBRegressor(n_estimators=5, max_depth=3, n_jobs=1).fit(X, y)
    return model, X, y.to_numpy()


def _stand_in(model, pairs, triples=()):
    """A triage-like result: pairs (feature_a, feature_b, verdict, strength, paths), triples, features."""
    graph = load_model(model)
    pair_frame = pd.DataFrame(pairs, columns=["feature_a", "feature_b", "verdict", "strength", "paths"])
    triple_frame = pd.DataFrame(list(triples), columns=["feature_a", "feature_b", "feature_c", "verdict", "strength"])
    features = pd.DataFrame({"feature": NAMES, "used": [True] * 5 + [False]})
    return SimpleNamespace(ensemble=graph, pairs=pair_frame, triples=triple_frame, features=features)


PAIRS = [
    ("kiln_temp", "glaze_mix", "interaction", 0.5, 40),
    ("clay_batch", "humidity", "interaction", 0.4, 30),
    ("glaze_mix", "clay_batch", "co-split", 0.2, 10),
    ("kiln_temp", "firing_hours", "dependent", 0.15, 8),
    ("humidity", "firing_hours", "co-split", 0.1, 6),
    ("kiln_temp", "humidity", "absent", 0.0, 0),
]


def test_forward_search_follows_the_known_losses(pottery, known_losses, capsys):
    model, X, y = pottery
    result = search_constraints(model, X, y, triage_result=_stand_in(model, PAIRS), folds=3, max_candidates=4,
                                progress=True)
    steps = result.steps
    assert list(steps.columns) == list(search_module.STEP_COLUMNS)
    assert steps["added"].tolist() == ["start: every feature alone", "join kiln_temp, glaze_mix",
                                       "join clay_batch, humidity", "join humidity, firing_hours"]
    assert steps["allowed_pairs"].tolist() == [0, 1, 2, 3]
    # The weak pair humidity x firing_hours is worth 0.04; "add firing_hours to {clay_batch, humidity}" gains as
    # much but allows a needless pair (+0.003): within one SE of the best, the fewer pairs win.
    assert steps["loss"].iloc[3] == pytest.approx(steps["loss"].iloc[2] - 0.04, abs=3e-3)
    step_three = result.candidates[result.candidates["step"] == 3].set_index("added")
    assert step_three.loc["join humidity, firing_hours", "kept"]
    assert step_three.loc["join humidity, firing_hours", "allowed_pairs"] == 3
    assert result.facts["stop_reason"] == "no_gain"
    assert (steps["gain"].iloc[1:] > steps["gain_se"].iloc[1:]).all()
    # Never tried: the dependent pair (kiln_temp, firing_hours) and the absent one.
    tried = " ".join(result.candidates["source"])
    assert "firing_hours × kiln_temp" not in tried and "kiln_temp × firing_hours" not in tried
    assert "kiln_temp × humidity" not in tried
    assert result.candidates.groupby("step").size().tolist() == [4, 4, 4, 3]
    # Start and unconstrained once per fold (one fold timed first), then one fit per candidate and fold.
    assert known_losses[0] == ("search: timing one fit", 1)
    assert known_losses[1] == ("search: start and unconstrained", 5)
    assert result.facts["fits"] == 3 * (2 + len(result.candidates))
    assert result.facts["estimated_fits"] == 3 * (2 + 4 * 4)
    err = capsys.readouterr().err
    assert "search: at most 54 early-stopped fits (3 folds" in err and "one unconstrained fit took" in err
    # The unused feature shelf stays alone in the export; unused features are listed for both libraries.
    assert result.suggestion.unused == ["shelf"]
    assert result.suggestion.xgboost_param == "[[2, 3], [3, 4], [0, 1], [5]]"
    assert result.suggestion.lightgbm_param == [[2, 3], [3, 4], [0, 1], [5]]
    assert result.suggestion.overlapping and "Groups overlap" in result.suggestion.notes[1]


def test_one_standard_error_rule_picks_the_simplest_step_near_the_lowest():
    """Closed form of the rule (Breiman et al. 1984, sec. 3.4.3): lowest loss 0.41 + SE 0.02 = 0.43; step 2 (0.42)."""
    steps = pd.DataFrame({"step": [0, 1, 2, 3], "loss": [1.0, 0.5, 0.42, 0.41], "loss_se": [0.1, 0.05, 0.03, 0.02]})
    assert search_module._one_standard_error(steps) == (2, 3, pytest.approx(0.43))
    steps.loc[2, "loss"] = 0.44
    assert search_module._one_standard_error(steps) == (3, 3, pytest.approx(0.43))


def test_corrected_standard_error_closed_form():
    """Nadeau & Bengio (2003): sqrt((1/K + n_test/n_train) s^2); K = 3, ratio 1/2, s^2 of (1, 2, 4) = 7/3."""
    run = search_module._Run(context=None, splits=[(1, np.arange(8), np.arange(4))] * 3, metric="rmse", n_jobs=1,
                             progress=False)
    assert run.se(np.array([1.0, 2.0, 4.0])) == pytest.approx(math.sqrt((1 / 3 + 1 / 2) * 7 / 3))


def test_moves_join_add_and_never_bring_in_a_dependent_pair():
    names = ("a", "b", "c", "d")
    source = search_module._Source
    state = (frozenset({0, 1}),)
    moves = search_module._moves(state, source(frozenset({1, 2}), 0.3, "b × c"), names)
    assert [text for text, _ in moves] == ["join b, c", "add c to {a, b}"]
    assert moves[1][1] == (frozenset({0, 1, 2}),)
    assert moves[0][1] == (frozenset({0, 1}), frozenset({1, 2}))  # overlapping groups
    assert search_module._moves(state, source(frozenset({0, 1}), 0.5, "a × b"), names) == []
    triple = search_module._moves(state, source(frozenset({0, 1, 3}), 0.2, "a × b × d"), names)
    assert [text for text, _ in triple] == ["add d to {a, b}"]
    space = search_module._Space([source(frozenset({1, 2}), 0.3, "b × c"), source(frozenset({2, 3}), 0.2, "c × d")],
                                 names, {frozenset({0, 2})}, 5)
    found = search_module._candidates(state, space)
    # "add c to {a, b}" would put the dependent pair (a, c) in one group: skipped.
    assert [text for _, text, _ in found] == ["join b, c", "join c, d"]
    assert search_module._candidates(state, search_module._Space(space.sources, names, set(), 1))[0][1] == "join b, c"


def test_faint_pairs_are_the_first_candidates_after_the_interactions():
    """A weak interaction (h clears the noise floor, effect under min_effect: 'faint') is tried before a stronger
    co-split without evidence; a triage without the column ranks by strength alone."""
    names = ("a", "b", "c", "d")
    pairs = pd.DataFrame({"feature_a": ["a", "b", "a", "c"], "feature_b": ["b", "c", "c", "d"],
                          "verdict": ["interaction", "co-split", "co-split", "absent"],
                          "strength": [0.30, 0.04, 0.09, 0.0], "paths": [5, 3, 4, 0],
                          "faint": [False, True, False, False]})
    result = SimpleNamespace(pairs=pairs, triples=pd.DataFrame())
    space = search_module._space(result, names, 5)
    assert [source.label for source in space.sources] == ["a × b", "b × c", "a × c"]
    plain = search_module._space(SimpleNamespace(pairs=pairs.drop(columns="faint"), triples=pd.DataFrame()), names, 5)
    assert [source.label for source in plain.sources] == ["a × b", "a × c", "b × c"]


def test_ctrl_c_keeps_the_finished_steps(pottery, known_losses, monkeypatch):
    model, X, y = pottery
    scorer = search_module.cross_validated_scores

    def interrupted_at_step_two(context, tasks, *, n_jobs, progress, label):
        if label == "search step 2":
            raise KeyboardInterrupt
        return scorer(context, tasks, n_jobs=n_jobs, progress=progress, label=label)

    monkeypatch.setattr(search_module, "cross_validated_scores", interrupted_at_step_two)
    result = search_constraints(model, X, y, triage_result=_stand_in(model, PAIRS), folds=3, progress=False)
    assert result.steps["step"].tolist() == [0, 1]
    assert result.facts["stop_reason"] == "interrupted" and result.facts["interrupted"]
    assert "interrupted (Ctrl-C)" in " ".join(result.notes)
    assert result.chosen_groups == [["kiln_temp", "glaze_mix"]]
    payload = json.loads(result.to_json())
    assert payload["search"]["facts"]["interrupted"] is True


def test_ctrl_c_before_the_first_step_is_not_swallowed(pottery, monkeypatch):
    model, X, y = pottery

    def stop(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(search_module, "cross_validated_scores", stop)
    with pytest.raises(KeyboardInterrupt):
        search_constraints(model, X, y, triage_result=_stand_in(model, PAIRS), folds=3, progress=False)


def test_json_has_the_curve_and_the_chosen_groups(pottery, known_losses):
    model, X, y = pottery
    result = search_constraints(model, X, y, triage_result=_stand_in(model, PAIRS), folds=3, max_steps=2,
                                progress=False)
    assert isinstance(result, SearchResult) and result.facts["stop_reason"] == "max_steps"
    payload = json.loads(result.to_json())
    assert payload["schema"] == "treeprobe.search/1"
    search = payload["search"]
    assert [row["step"] for row in search["steps"]] == [0, 1, 2]
    assert search["steps"][2]["groups"] == [["kiln_temp", "glaze_mix"], ["clay_batch", "humidity"]]
    assert search["chosen"]["groups"] == result.chosen_groups
    assert result.chosen_groups == [["kiln_temp", "glaze_mix"], ["clay_batch", "humidity"]]
    assert search["chosen"]["num_boost_round"] == result.recommended_rounds == 20  # median of 15, 20, 25
    assert search["chosen"]["xgboost_param"] == result.suggestion.xgboost_param
    assert "num_boost_round = 20" in search["chosen"]["snippets"]["xgboost"]
    assert "interaction_constraints = [[2, 3], [0, 1], [4], [5]]" in search["chosen"]["snippets"]["lightgbm"]
    assert set(search["unconstrained"]) >= {"loss", "loss_se", "rounds", "chosen_minus_unconstrained"}
    assert search["notes"][0].startswith("Chosen by the one-standard-error rule: step 2")


def test_triples_are_tried_when_their_pairs_share_paths(pottery, known_losses):
    model, X, y = pottery
    triples = [("clay_batch", "humidity", "firing_hours", "co-split", 0.45),
               ("kiln_temp", "glaze_mix", "humidity", "co-split", 0.44)]  # (glaze_mix, humidity) shares no path
    pairs = [*PAIRS, ("clay_batch", "firing_hours", "co-split", 0.05, 4)]
    result = search_constraints(model, X, y, triage_result=_stand_in(model, pairs, triples), folds=3,
                                max_candidates=3, max_steps=1, progress=False)
    # Sources with evidence (interaction) come first, then the rest by strength: the co-split triple follows.
    assert result.candidates["source"].tolist()[:3] == [
        "kiln_temp × glaze_mix", "clay_batch × humidity", "clay_batch × humidity × firing_hours"]


# --------------------------------------------------------------------- families and bad input
def test_family_without_constraints_searches_histgradientboosting(one_thread_per_fit):
    """A random forest has no interaction constraints: the search says so and runs on HistGradientBoosting."""
    from sklearn.ensemble import RandomForestRegressor
    from threadpoolctl import threadpool_limits

    rng = np.random.default_rng(2)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(300, 3)), columns=["sun_hours", "rain_mm", "slope"])
    y = 2 * X["sun_hours"] * X["rain_mm"] + X["slope"] + 0.1 * rng.normal(size=300)
    forest = RandomForestRegressor(n_estimators=10, max_depth=4, random_state=0, n_jobs=1).fit(X, y)
    stand_in = SimpleNamespace(ensemble=load_model(forest), triples=pd.DataFrame(), features=pd.DataFrame(
        {"feature": list(X.columns), "used": [True] * 3}), pairs=pd.DataFrame(
        [("sun_hours", "rain_mm", "interaction", 0.6, 20)], columns=["feature_a", "feature_b", "verdict", "strength",
                                                                     "paths"]))
    with threadpool_limits(limits=1):
        result = search_constraints(forest, X, y.to_numpy(), triage_result=stand_in, folds=2, progress=False)
    assert result.facts["family"] == "HistGradientBoostingRegressor"
    assert result.notes[1].startswith("RandomForestRegressor has no interaction constraints: the search ran on "
                                      "HistGradientBoostingRegressor")
    assert result.chosen_groups == [["sun_hours", "rain_mm"]]
    snippet = result.python_snippet()
    assert "HistGradientBoostingRegressor(interaction_cst=interaction_cst)" in snippet
    assert f"max_iter = {result.recommended_rounds}" in snippet


def test_bad_options_and_data(pottery):
    model, X, y = pottery
    stand_in = _stand_in(model, PAIRS)
    for options, message in [({"folds": 1}, "folds must be an integer >= 2"),
                             ({"max_steps": 0}, "max_steps must be an integer >= 1"),
                             ({"max_candidates": 0}, "max_candidates must be an integer >= 1"),
                             ({"params": {"interaction_constraints": "[[0, 1]]"}}, "must not hold interaction"),
                             ({"n_jobs": 0}, "n_jobs must be a non-zero integer")]:
        with pytest.raises(ParameterError, match=message):
            search_constraints(model, X, y, triage_result=stand_in, **options)
    with pytest.raises(ParameterError, match="needs a fitted model"):
        search_constraints({"eta": 0.1}, X, y)
    with pytest.raises(DataError, match="y has 119 values for 120 rows"):
        search_constraints(model, X, y[:-1], triage_result=stand_in)
    other = SimpleNamespace(**{**vars(stand_in), "ensemble": SimpleNamespace(feature_names=("a", "b"))})
    with pytest.raises(DataError, match="triage_result was computed on a model with other features"):
        search_constraints(model, X, y, triage_result=other)
    broken = SimpleNamespace(**{**vars(stand_in), "pairs": stand_in.pairs.assign(feature_b="kiln_tmp")})
    with pytest.raises(DataError, match="kiln_tmp"):
        search_constraints(model, X, y, triage_result=broken)


def test_search_fits_run_on_a_dask_cluster(pottery):
    """With joblib's Dask backend active every fit of the search goes to the cluster, one thread each."""
    distributed = pytest.importorskip("distributed")
    import joblib

    model, X, y = pottery
    with distributed.LocalCluster(processes=False, n_workers=1, threads_per_worker=2) as cluster, \
            distributed.Client(cluster) as client, joblib.parallel_config(backend="dask"), \
            distributed.get_task_stream(client) as stream:
        result = search_constraints(model, X, y, triage_result=_stand_in(model, PAIRS), folds=2, max_steps=1,
                                    max_candidates=1, progress=False)
    assert result.facts["threads_per_fit"] == 1
    assert result.facts["fits"] == 2 * (2 + len(result.candidates)) == 6
    assert len(stream.data) > 0  # tasks ran on the cluster (joblib may batch several fits into one task)
