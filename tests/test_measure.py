"""H-statistics (treeprobe.measure) against closed forms, brute force, benchmarks and constrained models.

References used below: Friedman and Popescu (2008), "Predictive learning via
rule ensembles", AOAS 2(3), eqs. 44-46 (the statistics); Friedman (1991),
"Multivariate adaptive regression splines", the benchmark function behind
``sklearn.datasets.make_friedman1``; the libraries' own predictors and their
``interaction_constraints`` training option.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from fleet_data import fleet
from sklearn.datasets import make_friedman1

from treeprobe import DataError, load_model
from treeprobe.errors import ParameterError
from treeprobe.measure import MeasureResult, h_statistic


# --------------------------------------------------------------------------- closed forms
def _uniform(n, low, high, seed):
    return np.random.default_rng(seed).uniform(low, high, size=(n, 2))


def _pair_h2(result: MeasureResult) -> float:
    return float(result.pairs["h2"].iloc[0])


def test_closed_form_additive_plus_product():
    """f = x1 + x2 + x1*x2, x ~ U(-1,1)^2 independent (Friedman & Popescu 2008, eq. 44).

    E x = 0 and E x^2 = 1/3, so the centred F_1 = x1, F_2 = x2 and F_12 = f.
    Numerator: E[(x1 x2)^2] = 1/9. Denominator: E[f^2] = 1/3 + 1/3 + 1/9 = 7/9
    (cross terms vanish). H^2 = 1/7.
    """
    X = _uniform(600, -1, 1, 0)
    result = h_statistic(lambda A: A[:, 0] + A[:, 1] + A[:, 0] * A[:, 1], X, against_rest=False)
    assert result.method == "brute"
    assert abs(_pair_h2(result) - 1 / 7) < 0.03


def test_closed_form_pure_product():
    """f = x1*x2 on U(-1,1)^2: both main effects are 0 (E x = 0), so F_12 is all interaction and H^2 = 1."""
    X = _uniform(500, -1, 1, 1)
    result = h_statistic(lambda A: A[:, 0] * A[:, 1], X, against_rest=True)
    assert abs(_pair_h2(result) - 1.0) < 0.02
    # eq. 45: F_notj = 0 as well, so one-vs-rest H^2_j = 1 too.
    assert np.all(np.abs(result.against_rest["h2"] - 1.0) < 0.02)


def test_closed_form_separable_log():
    """f = log(x1 x2) = log x1 + log x2 on positive inputs is additive: H^2 = 0 (up to rounding)."""
    X = _uniform(400, 0.5, 3.0, 2)
    result = h_statistic(lambda A: np.log(A[:, 0] * A[:, 1]), X)
    assert _pair_h2(result) < 1e-20
    assert np.all(result.against_rest["h2"] < 1e-20)


def test_closed_form_three_way():
    """f = x1 x2 x3 on U(-1,1)^3: every lower-order partial dependence is 0, so eq. 46 gives H^2_123 = 1
    while the pairwise statistics are near 0. The lower-order functions are 0 only in expectation; their
    cross terms with F_123 leave an O(n^-1/2) sampling error, hence the loose tolerance."""
    X = np.random.default_rng(4).uniform(-1, 1, size=(600, 3))
    result = h_statistic(lambda A: A[:, 0] * A[:, 1] * A[:, 2], X, triples=[("x0", "x1", "x2")], against_rest=False)
    assert abs(float(result.triples["h2"].iloc[0]) - 1.0) < 0.12
    assert result.pairs["h"].max() < 0.05


# --------------------------------------------------------------------------- exact == brute
@pytest.fixture(scope="module")
def fleet_frame():
    return fleet(11, 500)


def _compare(exact: MeasureResult, brute: MeasureResult, rtol: float) -> None:
    """h2 agree to rtol; pairs whose exact numerator is exactly 0 may carry rounding noise in brute force."""
    for table, keys in (("pairs", ["feature_a", "feature_b"]), ("against_rest", ["feature"]),
                        ("triples", ["feature_a", "feature_b", "feature_c"])):
        left, right = getattr(exact, table), getattr(brute, table)
        if "output" in left:
            keys = keys + ["output"]
        merged = left.merge(right, on=keys, suffixes=("_exact", "_brute"))
        assert len(merged) == len(left) == len(right)
        if merged.empty:
            continue
        scale = max(float(merged.h_brute.max()), 1e-12)
        np.testing.assert_allclose(merged.h_exact, merged.h_brute, rtol=rtol, atol=rtol * scale)
        strong = merged.h_brute > 1e-6 * scale
        np.testing.assert_allclose(merged.h2_exact[strong], merged.h2_brute[strong], rtol=rtol)


@pytest.fixture(scope="module")
def fitted_models(fleet_frame):
    return _models(*fleet_frame)


def _models(frame, cost, classes):
    xgb = pytest.importorskip("xgboost")
    lgb = pytest.importorskip("lightgbm")
    from sklearn.ensemble import HistGradientBoostingClassifier, RandomForestRegressor

    numeric = frame.assign(depot=frame.depot.cat.codes.astype(float))
    return {
        "xgboost-regressor": (xgb.XGBRegressor(n_estimators=25, max_depth=4, enable_categorical=True,
                                               tree_method="hist", n_jobs=1).fit(frame, cost), frame),
        "xgboost-multiclass": (xgb.XGBClassifier(n_estimators=8, max_depth=3, enable_categorical=True,
                                                 tree_method="hist", n_jobs=1).fit(frame, classes), frame),
        "lightgbm-regressor": (lgb.LGBMRegressor(n_estimators=25, num_leaves=12, min_child_samples=5,
                                                 verbose=-1).fit(frame, cost), frame),
        "lightgbm-multiclass": (lgb.LGBMClassifier(n_estimators=8, num_leaves=8, min_child_samples=5,
                                                   verbose=-1).fit(frame, classes), frame),
        "sklearn-hist-multiclass": (HistGradientBoostingClassifier(max_iter=8, max_depth=3, categorical_features=[2],
                                                                   random_state=0).fit(numeric, classes), numeric),
        "sklearn-forest": (RandomForestRegressor(n_estimators=5, max_depth=5, random_state=0)
                           .fit(numeric.fillna(1.5), cost), numeric.fillna(1.5)),
    }


@pytest.mark.parametrize("name", ["xgboost-regressor", "xgboost-multiclass", "lightgbm-regressor",
                                  "lightgbm-multiclass", "sklearn-hist-multiclass", "sklearn-forest"])
def test_exact_equals_brute_on_common_graph(fitted_models, name):
    """Exact H-statistics equal brute-force ones (eqs. 44-46) computed by predicting the common graph in float64."""
    model, data = fitted_models[name]
    ensemble = load_model(model)
    options = dict(sample=60, random_state=1, triples="auto")
    exact = h_statistic(ensemble, data, **options)
    brute = h_statistic(ensemble, data, method="brute", **options)
    assert (exact.method, brute.method) == ("exact", "brute")
    assert len(exact.pairs) > 0
    _compare(exact, brute, rtol=1e-9)


def test_exact_equals_brute_through_native_xgboost(fleet_frame):
    """Against XGBoost's own predictor (float32 margins, ``output_margin=True``): agreement to ~1e-6 relative."""
    xgb = pytest.importorskip("xgboost")
    frame, cost, _ = fleet_frame
    model = xgb.XGBRegressor(n_estimators=25, max_depth=4, enable_categorical=True, tree_method="hist",
                             n_jobs=1).fit(frame, cost)
    exact = h_statistic(model, frame, sample=80)
    native = h_statistic(lambda rows: model.predict(rows, output_margin=True), frame, sample=80,
                         pairs=exact.pairs[["feature_a", "feature_b"]].to_numpy().tolist())
    native_rest = native.against_rest[native.against_rest.feature.isin(exact.against_rest.feature)]
    _compare(exact, MeasureResult(native.pairs, native_rest, native.triples, "brute", 80, "margin", None, 0.0),
             rtol=2e-5)


def test_probability_scale_matches_native_predict_proba(fleet_frame):
    """scale="probability" goes through the link; XGBoost's predict_proba (float32) is the reference."""
    xgb = pytest.importorskip("xgboost")
    frame, cost, _ = fleet_frame
    label = (cost > np.median(cost)).astype(int)
    model = xgb.XGBClassifier(n_estimators=15, max_depth=3, enable_categorical=True, tree_method="hist",
                              n_jobs=1).fit(frame, label)
    ours = h_statistic(model, frame, sample=60, scale="probability", against_rest=False)
    native = h_statistic(lambda rows: model.predict_proba(rows)[:, 1], frame, sample=60, against_rest=False,
                         pairs=ours.pairs[["feature_a", "feature_b"]].to_numpy().tolist())
    assert ours.method == "brute" and ours.scale == "probability"
    merged = ours.pairs.merge(native.pairs, on=["feature_a", "feature_b"])
    np.testing.assert_allclose(merged.h_x, merged.h_y, rtol=1e-4, atol=1e-6)


# --------------------------------------------------------------------------- benchmarks
def test_friedman1_ranks_the_true_interaction_first():
    """Friedman (1991) #1: y = 10 sin(pi x0 x1) + 20 (x2 - 0.5)^2 + 10 x3 + 5 x4 + noise; only x0 and x1
    interact, so an XGBoost fit must rank (x0, x1) first, and by a wide margin in h: pure-noise features
    (x5..x7) can show a sizeable h2 on a tiny partial dependence, which is why h is reported beside it."""
    xgb = pytest.importorskip("xgboost")
    X, y = make_friedman1(n_samples=1500, n_features=8, noise=0.5, random_state=0)
    model = xgb.XGBRegressor(n_estimators=200, max_depth=4, learning_rate=0.1, n_jobs=1, random_state=0).fit(X, y)
    result = h_statistic(model, X, sample=400, against_rest=False)
    top = result.pairs.iloc[0]
    assert {top.feature_a, top.feature_b} == {"f0", "f1"}
    assert top.h2 > result.pairs.h2.iloc[1]
    assert top.h > 4 * result.pairs.h.iloc[1:].max()


@pytest.mark.parametrize("library", ["xgboost", "lightgbm"])
def test_interaction_constraints_give_exact_zero(library):
    """Models trained with the library's own ``interaction_constraints`` never split on features of two groups
    along one path, so the exact H between groups is 0.0 exactly and nonzero within a group."""
    rng = np.random.default_rng(5)
    X = pd.DataFrame(rng.normal(size=(600, 4)), columns=["fuel_price", "shift_length", "load_kg", "wind_speed"])
    y = X.fuel_price * X.shift_length + X.load_kg * X.wind_speed + X.fuel_price * X.load_kg
    if library == "xgboost":
        xgb = pytest.importorskip("xgboost")
        groups = [["fuel_price", "shift_length"], ["load_kg", "wind_speed"]]
        model = xgb.XGBRegressor(n_estimators=40, max_depth=4, interaction_constraints=groups, n_jobs=1).fit(X, y)
    else:
        lgb = pytest.importorskip("lightgbm")
        model = lgb.LGBMRegressor(n_estimators=40, num_leaves=12, interaction_constraints=[[0, 1], [2, 3]],
                                  verbose=-1).fit(X, y)
    ensemble = load_model(model)
    names = ensemble.feature_names
    everything = [(names[a], names[b]) for a in range(4) for b in range(a + 1, 4)]
    result = h_statistic(ensemble, X, pairs=everything, sample=200, against_rest=False)
    within = result.pairs.apply(lambda r: {r.feature_a, r.feature_b} in ({names[0], names[1]}, {names[2], names[3]}),
                                axis=1)
    assert (result.pairs.h2[~within] == 0.0).all() and (result.pairs.h[~within] == 0.0).all()
    assert not result.pairs.shares_path[~within].any()
    assert (result.pairs.h2[within] > 0.05).all()


# --------------------------------------------------------------------------- result and options
def test_result_facts_sampling_and_json(fleet_frame):
    xgb = pytest.importorskip("xgboost")
    frame, _, classes = fleet_frame
    model = xgb.XGBClassifier(n_estimators=6, max_depth=3, enable_categorical=True, n_jobs=1).fit(frame, classes)
    everything = h_statistic(model, frame, sample=70, triples=True)
    assert everything.n_rows == 70 and everything.output is None
    assert set(everything.pairs.output) == {0, 1, 2}
    one = h_statistic(model, frame, sample=70, triples=True, output=1)
    assert list(one.pairs.columns) == list(everything.pairs.columns) and (one.pairs.output == 1).all()
    subset = everything.pairs[everything.pairs.output == 1].reset_index(drop=True)
    pd.testing.assert_frame_equal(subset, one.pairs, check_exact=False, rtol=1e-12)
    for _, group in everything.pairs.groupby("output"):
        assert group.h.is_monotonic_decreasing
    payload = json.loads(json.dumps(one.to_dict()))
    assert payload["method"] == "exact" and payload["n_rows"] == 70 and "limits" in payload
    assert len(payload["pairs"]) == len(one.pairs)


def test_parallel_matches_serial(fleet_frame):
    """joblib over tree chunks (exact) and over functions (brute) changes nothing but the schedule."""
    xgb = pytest.importorskip("xgboost")
    frame, cost, _ = fleet_frame
    model = xgb.XGBRegressor(n_estimators=10, max_depth=3, enable_categorical=True, n_jobs=1).fit(frame, cost)
    ensemble = load_model(model)
    serial = h_statistic(ensemble, frame, sample=50, method="brute")
    parallel = h_statistic(ensemble, frame, sample=50, method="brute", n_jobs=2)
    pd.testing.assert_frame_equal(serial.pairs, parallel.pairs)
    from treeprobe import pdp

    small_budget = pdp.CELL_BUDGET
    try:
        pdp.CELL_BUDGET = 2000  # many chunks, so the parallel sum really combines parts
        chunked = h_statistic(ensemble, frame, sample=50, n_jobs=2)
    finally:
        pdp.CELL_BUDGET = small_budget
    _compare(chunked, serial, rtol=1e-9)


def test_dask_backend():
    """The brute path runs on an in-process dask.distributed cluster through joblib's Dask backend."""
    distributed = pytest.importorskip("distributed")
    import joblib

    X = _uniform(60, -1, 1, 9)
    with distributed.Client(processes=False, n_workers=1, threads_per_worker=2), joblib.parallel_backend("dask"):
        result = h_statistic(lambda A: A[:, 0] * A[:, 1], X, n_jobs=-1)
    assert abs(_pair_h2(result) - 1.0) < 0.05


# --------------------------------------------------------------------------- bad input
@pytest.fixture(scope="module")
def small_tree_model():
    xgb = pytest.importorskip("xgboost")
    rng = np.random.default_rng(0)
    frame = pd.DataFrame(rng.normal(size=(100, 3)), columns=["fuel_price", "shift_length", "load_kg"])
    model = xgb.XGBRegressor(n_estimators=5, max_depth=2, n_jobs=1).fit(frame, frame.fuel_price * frame.load_kg)
    return load_model(model), frame


def test_wrong_columns(small_tree_model):
    ensemble, frame = small_tree_model
    with pytest.raises(DataError, match="shift_length"):
        h_statistic(ensemble, frame.drop(columns="shift_length"))
    with pytest.raises(DataError, match=r"2 columns.*3 features"):
        h_statistic(ensemble, frame.to_numpy()[:, :2])


def test_too_few_rows_and_missing_columns(small_tree_model):
    ensemble, frame = small_tree_model
    with pytest.raises(DataError, match="1 rows; at least 2"):
        h_statistic(ensemble, frame.iloc[:1])
    with pytest.raises(DataError, match="'load_kg' is missing"):
        h_statistic(ensemble, frame.assign(load_kg=np.nan))
    with pytest.warns(UserWarning, match="constant column.*'shift_length'"):
        result = h_statistic(ensemble, frame.assign(shift_length=3.0))
    assert (result.pairs.h[result.pairs.feature_b == "shift_length"] == 0).all()


def test_bad_callable_and_options(small_tree_model):
    ensemble, frame = small_tree_model
    X = frame.to_numpy()
    with pytest.raises(DataError, match=r"shape \(50,\) for 100 rows"):
        h_statistic(lambda A: A[:50, 0], X)
    with pytest.raises(DataError, match="non-finite"):
        h_statistic(lambda A: np.full(len(A), np.inf), X)
    with pytest.raises(ParameterError, match="method='exact' needs a tree ensemble"):
        h_statistic(lambda A: A[:, 0], X, method="exact")
    for option, value, word in (("method", "fast", "method"), ("sample", 1, "sample"), ("scale", "odds", "scale"),
                                ("n_jobs", 0, "n_jobs"), ("output", 3, "output"), ("progress", "yes", "progress")):
        with pytest.raises(ParameterError, match=word):
            h_statistic(ensemble, frame, **{option: value})
    with pytest.raises(ParameterError, match="unknown feature 'wind_speed'; the model's features are fuel_price"):
        h_statistic(ensemble, frame, pairs=[("fuel_price", "wind_speed")])
    with pytest.raises(ParameterError, match="unknown feature 'fuel_prise'; did you mean 'fuel_price'"):
        h_statistic(ensemble, frame, pairs=[("fuel_prise", "wind_speed")])
    with pytest.raises(ParameterError, match="triples must be"):
        h_statistic(ensemble, frame, triples="all")
    with pytest.raises(ParameterError, match="repeats a feature"):
        h_statistic(ensemble, frame, pairs=[("fuel_price", "fuel_price")])


def test_callable_receives_frames_with_their_dtypes():
    """A callable gets DataFrames, text columns included. Reference: the closed form for
    f = c * s with c = 1[crew == "night"]: on the rows, F_cs - F_c - F_s = (c - mean c)(s - mean s) up to a
    constant (empirical partial dependence, Friedman 2001 eq. 9), so h is that product's standard deviation
    (Friedman & Popescu 2008, eq. 44 numerator)."""
    rng = np.random.default_rng(8)
    frame = pd.DataFrame({"crew": rng.choice(["day", "night"], 300), "shift_length": rng.uniform(4, 12, 300)})

    def model(rows):
        assert isinstance(rows, pd.DataFrame) and rows.crew.dtype == frame.crew.dtype
        return (rows.crew == "night").to_numpy() * rows.shift_length.to_numpy()

    result = h_statistic(model, frame, against_rest=False)
    night = (frame.crew == "night").to_numpy(dtype=float)
    expected = np.std((night - night.mean()) * (frame.shift_length - frame.shift_length.mean()))
    assert abs(float(result.pairs.h.iloc[0]) - expected) < 1e-9


def test_progress_only_when_asked_or_on_a_terminal(capsys):
    """The progress line goes to stderr; with progress=None it is shown only on a terminal (pytest's is not)."""
    X = _uniform(40, -1, 1, 12)
    h_statistic(lambda A: A[:, 0] * A[:, 1], X)
    assert capsys.readouterr().err == ""
    h_statistic(lambda A: A[:, 0] * A[:, 1], X, progress=True)
    err = capsys.readouterr().err
    assert "H-statistics (brute)" in err and "/5" in err  # the tqdm bar of treeprobe.progress, 5 functions


# --------------------------------------------------------------------------- ranking, negligible h, fixed columns
def _noise_and_signal(A):
    """10 (x0 + x1) + 12 x0 x1 + 0.03 x2 x3: a real interaction on big main effects, and a tiny pure one."""
    return 10 * (A[:, 0] + A[:, 1]) + 12 * A[:, 0] * A[:, 1] + 0.03 * A[:, 2] * A[:, 3]


def test_pairs_rank_by_h_not_h2():
    """Closed forms (Friedman & Popescu 2008, eq. 44, x ~ U(-1,1)^4, E x^2 = 1/3): pair (x0, x1) has
    H2 = (144/9) / (200/3 + 144/9) = 0.19 and h = 12/3 = 4; pair (x2, x3) is all interaction, H2 = 1, but
    h = 0.03/3 = 0.01. Ranked by h2 the tiny pair would come first; ranked by h the real one does."""
    X = np.random.default_rng(21).uniform(-1, 1, size=(800, 4))
    result = h_statistic(_noise_and_signal, X, pairs=[("x0", "x1"), ("x2", "x3")], against_rest=False)
    first, second = result.pairs.iloc[0], result.pairs.iloc[1]
    assert (first.feature_a, first.feature_b) == ("x0", "x1")
    assert abs(first.h - 4.0) < 0.4 and abs(first.h2 - 0.19) < 0.04
    assert abs(second.h2 - 1.0) < 0.05 and second.h < 0.012 and second.h2 > first.h2


def test_h_negligible_marks_h_below_one_percent_of_the_prediction_sd():
    """The convention NEGLIGIBLE_H_SHARE = 0.01: h <= 1% of the prediction's standard deviation on the rows.
    Here sd(f) = sqrt(200/3 + 16) = 9.1 (closed form), so the cut is about 0.09: (x2, x3) with h = 0.01 is
    negligible, (x0, x1) with h = 4 is not."""
    from treeprobe.measure import NEGLIGIBLE_H_SHARE

    X = np.random.default_rng(22).uniform(-1, 1, size=(600, 4))
    result = h_statistic(_noise_and_signal, X, pairs=[("x0", "x1"), ("x2", "x3")], against_rest=True)
    flags = dict(zip(zip(result.pairs.feature_a, result.pairs.feature_b, strict=True), result.pairs.h_negligible, strict=True))
    assert flags == {("x0", "x1"): False, ("x2", "x3"): True}
    cut = NEGLIGIBLE_H_SHARE * np.std(_noise_and_signal(X))
    np.testing.assert_array_equal(result.against_rest.h_negligible, result.against_rest.h <= cut)
    assert result.to_dict()["negligible_h_share"] == NEGLIGIBLE_H_SHARE


def test_tables_keep_their_columns_whatever_the_options(small_tree_model):
    ensemble, frame = small_tree_model
    full = h_statistic(ensemble, frame, triples=[("fuel_price", "shift_length", "load_kg")], sample=50)
    bare = h_statistic(ensemble, frame, triples=None, against_rest=False, sample=50, output=0)
    called = h_statistic(lambda A: A[:, 0] * A[:, 2], frame.to_numpy(), triples=None, sample=50)
    for name in ("pairs", "against_rest", "triples"):
        columns = list(getattr(full, name).columns)
        assert list(getattr(bare, name).columns) == columns
        assert list(getattr(called, name).columns) == columns
        assert list(getattr(bare, name).dtypes) == list(getattr(full, name).dtypes)
    assert bare.triples.empty and bare.against_rest.empty and len(full.triples) > 0
    assert list(full.pairs.columns) == ["feature_a", "feature_b", "output", "h2", "h", "pd_variance",
                                        "h_negligible", "shares_path"]


def test_results_compare_without_raising(small_tree_model):
    ensemble, frame = small_tree_model
    first = h_statistic(ensemble, frame, sample=40)
    again = h_statistic(ensemble, frame, sample=40)
    other = h_statistic(ensemble, frame, sample=40, random_state=5)
    assert first == again and first != other and first != "a result"
    assert first.seconds >= 0  # wall time differs between runs and is not compared


def test_probability_scale_refused_on_identity_link(small_tree_model):
    """A regression model's link is the identity: its probability scale is its margin, which the exact
    engine handles. Asking for it used to run brute force silently; now it is one ParameterError."""
    ensemble, frame = small_tree_model
    assert ensemble.link == "identity"
    with pytest.raises(ParameterError, match=r"scale='probability'.*link is 'identity'.*scale='margin'"):
        h_statistic(ensemble, frame, scale="probability")
    from treeprobe.pdp import partial_dependence

    with pytest.raises(ParameterError, match="link is 'identity'"):
        partial_dependence(ensemble, frame, ["fuel_price"], [[0.0]], scale="probability")


def test_long_brute_force_states_its_estimate_before_starting(monkeypatch):
    """The warning comes before any partial dependence is computed and scales the time of one pass over the rows."""
    from treeprobe import pdp

    calls = []

    def predict(A):
        calls.append(len(A))
        return A[:, 0] * A[:, 1]

    monkeypatch.setattr(pdp, "BRUTE_NOTICE_SECONDS", 0.0)
    X = _uniform(30, -1, 1, 3)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the warning stops the run where it is issued
        with pytest.raises(UserWarning, match=r"3 functions of 30² predictions each, estimated \d+ s"):
            h_statistic(predict, X, against_rest=False)
    assert calls == [30]  # only the rows themselves were predicted before the estimate
    monkeypatch.setattr(pdp, "BRUTE_NOTICE_SECONDS", 3600.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        h_statistic(predict, X, against_rest=False)
