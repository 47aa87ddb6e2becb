"""Tests of treeprobe.io.lightgbm, the LightGBM model-text parser.

Outside references: LightGBM's own predictor (``Booster.predict(X,
raw_score=True)`` and ``predict``), its importances
(``Booster.feature_importance("split" | "gain")``), and the decision rules of
LightGBM's ``Tree::NumericalDecision`` / ``Tree::CategoricalDecision``
(``include/LightGBM/tree.h``; Ke et al., 2017, "LightGBM: A highly efficient
gradient boosting decision tree", NeurIPS 30), which the predictions exercise
with NaN, zeros, tiny values, negative, fractional and unseen categories.
Data are invented (a parcel courier and a warehouse shift scenario).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import treeprobe
from treeprobe.errors import ModelFormatError, UnsupportedModelError
from treeprobe.io.lightgbm import from_lightgbm, load_lightgbm_text

lightgbm = pytest.importorskip("lightgbm")

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "lightgbm"
FIXTURE_NAMES = [
    "regression_nan", "binary_late", "multiclass_slot", "categorical_pandas",
    "categorical_index", "zero_as_missing", "no_missing", "poisson_complaints",
]
FIXTURE_LINKS = {
    "regression_nan": "identity", "binary_late": "logit", "multiclass_slot": "softmax",
    "categorical_pandas": "identity", "categorical_index": "identity", "zero_as_missing": "identity",
    "no_missing": "identity", "poisson_complaints": "log",
}
SHIFT_FEATURES = ["shift_length", "pallets_moved", "aisle_zone", "overtime_hours"]
SMALL = {"verbose": -1, "num_leaves": 6, "min_data_in_leaf": 5, "min_data_per_group": 5, "cat_smooth": 1.0,
         "seed": 3, "deterministic": True, "num_threads": 1}


def assert_raw_close(ours: np.ndarray, theirs: np.ndarray) -> None:
    """rtol 1e-5 plus an atol of 1e-9 times the margin's scale."""
    theirs = np.asarray(theirs, dtype=np.float64)
    scale = max(float(np.max(np.abs(theirs))), 1.0)
    np.testing.assert_allclose(ours, theirs.reshape(np.shape(ours)), rtol=1e-5, atol=1e-9 * scale)


# ----------------------------------------------------------------- data
@pytest.fixture(scope="module")
def shift_data() -> tuple[np.ndarray, np.ndarray]:
    """Invented warehouse shifts: aisle_zone is a category code 0..7 with some missing."""
    rng = np.random.default_rng(2024)
    n_rows = 700
    x = np.column_stack([
        rng.uniform(4.0, 12.0, n_rows),
        np.where(rng.random(n_rows) < 0.3, 0.0, rng.gamma(2.0, 20.0, n_rows)),
        rng.integers(0, 8, n_rows).astype(float),
        rng.normal(0.0, 2.0, n_rows),
    ])
    x[rng.random(n_rows) < 0.1, 0] = np.nan
    x[rng.random(n_rows) < 0.08, 2] = np.nan
    zone_effect = np.isin(x[:, 2], [1.0, 4.0, 6.0]) * 3.0
    y = (np.nan_to_num(x[:, 0], nan=8.0) * (x[:, 1] > 10) + zone_effect * (2.0 + x[:, 3])
         + rng.normal(0.0, 0.3, n_rows))
    return x, y


@pytest.fixture(scope="module")
def probe_rows(shift_data) -> np.ndarray:
    """Rows hitting every routing rule: NaN, exact zeros, |x| < 1e-35, negative/fractional/unseen categories."""
    x, _ = shift_data
    rows = x[:120].copy()
    rows[::5, 0] = np.nan
    rows[1::6, 1] = 0.0
    rows[2::6, 1] = 1e-40
    rows[3::6, 1] = -1e-40
    rows[::4, 2] = np.nan
    rows[1::7, 2] = -1.0
    rows[2::7, 2] = 11.0
    rows[3::7, 2] = 4.7
    rows[4::7, 2] = -0.5
    rows[5::7, 2] = 2.0**31 + 7
    rows[::9, 3] = np.nan
    return rows


def train(x: np.ndarray, y: np.ndarray, rounds: int = 6, categorical=(2,), **params) -> lightgbm.Booster:
    dataset = lightgbm.Dataset(x, y, feature_name=SHIFT_FEATURES, categorical_feature=list(categorical))
    return lightgbm.train({**SMALL, **params}, dataset, num_boost_round=rounds)


def targets(y: np.ndarray) -> dict[str, np.ndarray]:
    return {
        "regression": y,
        "binary": (y > np.median(y)).astype(int),
        "multiclass": np.digitize(y, np.quantile(y, [1 / 3, 2 / 3])),
        "poisson": np.random.default_rng(5).poisson(np.exp(np.clip(y / 10.0, -2, 2))),
    }


CASES = {
    "regression": ({"objective": "regression"}, "regression"),
    "binary": ({"objective": "binary"}, "binary"),
    "multiclass": ({"objective": "multiclass", "num_class": 3}, "multiclass"),
    "poisson": ({"objective": "poisson"}, "poisson"),
    "missing_none": ({"objective": "regression", "use_missing": False}, "regression"),
    "missing_zero": ({"objective": "regression", "zero_as_missing": True}, "regression"),
    "one_hot_categories": ({"objective": "regression", "max_cat_to_onehot": 16}, "regression"),
    "dart": ({"objective": "regression", "boosting": "dart"}, "regression"),
    "binary_sigmoid_2": ({"objective": "binary", "sigmoid": 2.0}, "binary"),
}


@pytest.fixture(scope="module")
def boosters(shift_data) -> dict[str, lightgbm.Booster]:
    x, y = shift_data
    ys = targets(y)
    return {name: train(x, ys[target], **params) for name, (params, target) in CASES.items()}


# ------------------------------------------------- committed fixtures
@pytest.mark.parametrize("name", FIXTURE_NAMES)
def test_fixture_matches_stored_native_output(name: str) -> None:
    """Against LightGBM's predict(raw_score=True) and feature_importance, stored by scripts/make_lightgbm_fixtures.py."""
    expected = json.loads((FIXTURES / f"{name}.expected.json").read_text())
    rows = pd.read_csv(FIXTURES / "input.csv").to_numpy()
    model = treeprobe.load_model(FIXTURES / f"{name}.txt")
    assert model.library == "lightgbm" and model.threshold_rule == "<=" and model.split_dtype == "float64"
    assert model.link == FIXTURE_LINKS[name]
    assert_raw_close(model.predict_raw(rows), expected["raw_score"])
    totals = model.feature_totals()
    np.testing.assert_array_equal(totals["splits"].to_numpy(), expected["split"])
    # split_gain is written with 6 significant digits, LightGBM sums the exact doubles.
    np.testing.assert_allclose(totals["gain"].to_numpy(), expected["gain"], rtol=1e-5)


def test_fixtures_cover_every_decision_kind() -> None:
    """The committed models must contain the rules they are there to test (so the checks above can fail)."""
    loaded = {name: treeprobe.load_model(FIXTURES / f"{name}.txt") for name in FIXTURE_NAMES}
    for name in ("categorical_pandas", "categorical_index"):
        assert loaded[name].is_categorical.any(), name
        assert loaded[name].feature_types[4] == "categorical"
    assert loaded["zero_as_missing"].zero_as_missing.any()
    assert not loaded["regression_nan"].zero_as_missing.any()
    assert next(iter(loaded["categorical_pandas"].category_levels.values()))[0] == "cargo_bike"
    assert loaded["multiclass_slot"].n_outputs == 3
    assert loaded["regression_nan"].feature_names[0] == "parcel_weight_kg"
    assert loaded["regression_nan"].provenance.stored_params["num_leaves"] == "5"


# ------------------------------------------------- in-memory models
@pytest.mark.parametrize("case", list(CASES))
def test_raw_output_matches_lightgbm(case: str, boosters, probe_rows, tmp_path: Path) -> None:
    """predict_raw from the object and from a saved file equals LightGBM's predict(raw_score=True)."""
    booster = boosters[case]
    native = booster.predict(probe_rows, raw_score=True)
    from_object = from_lightgbm(booster, source=case)
    assert_raw_close(from_object.predict_raw(probe_rows), native)
    path = tmp_path / f"{case}.txt"
    booster.save_model(path)
    from_file = treeprobe.load_model(path)
    assert_raw_close(from_file.predict_raw(probe_rows), native)
    assert from_file.source == str(path)


@pytest.mark.parametrize("case", list(CASES))
def test_feature_totals_match_lightgbm_importance(case: str, boosters) -> None:
    """ForestGraph.feature_totals() against Booster.feature_importance("split") and ("gain")."""
    booster = boosters[case]
    totals = from_lightgbm(booster, source=case).feature_totals()
    np.testing.assert_array_equal(totals["splits"].to_numpy(), booster.feature_importance("split"))
    np.testing.assert_allclose(totals["gain"].to_numpy(), booster.feature_importance("gain"), rtol=1e-5)


def test_models_exercise_the_missing_and_category_rules(boosters) -> None:
    """Guards the comparisons above: each model really holds the split kind it is named for."""
    assert from_lightgbm(boosters["regression"], source="r").is_categorical.any()
    assert from_lightgbm(boosters["missing_zero"], source="z").zero_as_missing.any()
    none_text = boosters["missing_none"].model_to_string()
    decision_types = [int(v) for line in none_text.splitlines() if line.startswith("decision_type=")
                      for v in line.split("=")[1].split()]
    assert decision_types and all((d >> 2) & 3 == 0 for d in decision_types)


def test_prediction_scale_matches_lightgbm(boosters, probe_rows) -> None:
    """The link reproduces LightGBM's predict (probabilities, class probabilities, exp for poisson)."""
    for case in ("regression", "binary", "multiclass", "poisson"):
        model = from_lightgbm(boosters[case], source=case)
        np.testing.assert_allclose(model.predict(probe_rows), boosters[case].predict(probe_rows), rtol=1e-6)
    sigmoid_model = from_lightgbm(boosters["binary_sigmoid_2"], source="sigmoid")
    assert sigmoid_model.link_scale == 2.0
    raw = sigmoid_model.predict_raw(probe_rows)
    np.testing.assert_allclose(1.0 / (1.0 + np.exp(-2.0 * raw)), boosters["binary_sigmoid_2"].predict(probe_rows),
                               rtol=1e-6)


def test_categorical_nan_goes_right_whatever_the_missing_type(shift_data) -> None:
    """tree.h CategoricalDecision, measured on LightGBM 4.7: NaN routes right (not as category 0)."""
    x, y = shift_data
    x_no_nan = x.copy()
    x_no_nan[np.isnan(x_no_nan[:, 2]), 2] = 0.0
    booster = train(x_no_nan, y, rounds=3, max_cat_to_onehot=1)
    model = from_lightgbm(booster, source="categories")
    rows = np.tile(x_no_nan[:1], (3, 1))
    rows[:, 2] = [np.nan, 0.0, 11.0]
    native = booster.predict(rows, raw_score=True)
    assert_raw_close(model.predict_raw(rows), native)
    assert model.is_categorical.any()
    assert not model.missing_left[model.is_categorical].any()


def test_sklearn_wrappers_with_pandas_categories() -> None:
    """LGBMRegressor / LGBMClassifier fitted on a DataFrame with a pandas category column."""
    rng = np.random.default_rng(8)
    n_rows = 400
    frame = pd.DataFrame({
        "fuel_price": rng.uniform(1.2, 2.2, n_rows),
        "route_km": rng.uniform(1.0, 50.0, n_rows),
        "depot": pd.Categorical(rng.choice(["north", "harbour", "airport", "ring"], n_rows),
                                categories=["north", "harbour", "airport", "ring"]),
    })
    cost = frame["fuel_price"] * frame["route_km"] * np.where(frame["depot"].isin(["harbour", "ring"]), 2.0, 1.0)
    regressor = lightgbm.LGBMRegressor(n_estimators=5, num_leaves=6, min_child_samples=5, min_data_per_group=5,
                                       cat_smooth=1.0, verbose=-1).fit(frame, cost)
    classifier = lightgbm.LGBMClassifier(n_estimators=5, num_leaves=6, min_child_samples=5, min_data_per_group=5,
                                         cat_smooth=1.0, verbose=-1).fit(frame, cost > cost.median())
    scoring = frame.iloc[:50].copy()
    scoring.loc[scoring.index[::5], "depot"] = np.nan
    for fitted in (regressor, classifier):
        model = treeprobe.load_model(fitted)
        assert model.feature_types == ("numeric", "numeric", "categorical")
        assert model.is_categorical.any()
        assert_raw_close(model.predict_raw(scoring), fitted.predict(scoring, raw_score=True))


def test_random_forest_averages_trees(shift_data, probe_rows) -> None:
    """boosting="rf": LightGBM's predict averages trees, its raw_score is the unaveraged sum."""
    x, y = shift_data
    rounds = 4
    booster = train(x, y, rounds=rounds, boosting="rf", bagging_freq=1, bagging_fraction=0.7, objective="regression")
    model = from_lightgbm(booster, source="rf")
    assert model.provenance.stored_params["boosting"] == "rf"
    np.testing.assert_allclose(model.predict(probe_rows), booster.predict(probe_rows), rtol=1e-9)
    assert_raw_close(model.predict_raw(probe_rows) * rounds, booster.predict(probe_rows, raw_score=True))


def test_single_leaf_trees(shift_data, probe_rows) -> None:
    """Trees that never split (num_leaves=1) still add their constant; checked against LightGBM."""
    x, y = shift_data
    booster = train(x, y, rounds=3, min_gain_to_split=1e12, objective="regression")
    model = from_lightgbm(booster, source="stumps")
    assert model.n_nodes == model.n_trees
    assert_raw_close(model.predict_raw(probe_rows), booster.predict(probe_rows, raw_score=True))


def test_generic_feature_names_flagged() -> None:
    rng = np.random.default_rng(1)
    x = rng.normal(size=(200, 2))
    booster = lightgbm.train({**SMALL, "objective": "regression"}, lightgbm.Dataset(x, x[:, 0] * x[:, 1]), 2)
    model = from_lightgbm(booster, source="plain")
    assert model.feature_names == ("Column_0", "Column_1")
    assert model.generic_feature_names is True


def test_linear_trees_are_unsupported(shift_data) -> None:
    x, y = shift_data
    booster = train(x, y, rounds=2, categorical=(), linear_tree=True, objective="regression")
    with pytest.raises(UnsupportedModelError, match=r"Tree=0 is a linear tree"):
        from_lightgbm(booster, source="linear")


def test_unfitted_and_foreign_objects() -> None:
    with pytest.raises(ModelFormatError, match="not fitted"):
        from_lightgbm(lightgbm.LGBMRegressor(), source="unfitted")
    with pytest.raises(UnsupportedModelError, match=r"expected a lightgbm\.Booster"):
        from_lightgbm(object(), source="thing")
    with pytest.raises(ModelFormatError, match="data must be bytes or str"):
        load_lightgbm_text(12, source="number")


def test_loading_a_file_does_not_need_lightgbm() -> None:
    """The text parser runs with lightgbm made unimportable."""
    code = (
        "import sys, json; sys.modules['lightgbm'] = None\n"
        "import numpy as np, pandas as pd, treeprobe\n"
        f"root = {str(FIXTURES)!r}\n"
        "model = treeprobe.load_model(root + '/categorical_index.txt')\n"
        "expected = json.load(open(root + '/categorical_index.expected.json'))['raw_score']\n"
        "rows = pd.read_csv(root + '/input.csv').to_numpy()\n"
        "assert np.allclose(model.predict_raw(rows), expected, rtol=1e-9)\n"
        "assert 'lightgbm' not in [m for m in sys.modules if sys.modules[m] is not None]\n"
        "print('ok')\n"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "ok"


# ------------------------------------------------------ bad input
@pytest.fixture(scope="module")
def fixture_text() -> str:
    return (FIXTURES / "categorical_index.txt").read_text()


@pytest.fixture(scope="module")
def fixture_rows() -> np.ndarray:
    return pd.read_csv(FIXTURES / "input.csv").to_numpy()


def replace_line(text: str, prefix: str, new_line: str, occurrence: int = 0) -> str:
    lines = text.split("\n")
    hits = [i for i, line in enumerate(lines) if line.startswith(prefix)]
    lines[hits[occurrence]] = new_line
    return "\n".join(lines)


@pytest.mark.parametrize(
    ("prefix", "new_line", "message"),
    [
        ("left_child=", "left_child=1 7 -2 -3", r"Tree=0, node 1: key 'left_child' is 7"),
        ("right_child=", "right_child=-9 -4 -5 -6", r"Tree=0, node 0: key 'right_child' is -9"),
        ("leaf_value=", "leaf_value=1 2", r"Tree=0\): key 'leaf_value' has 2 values, expected 5"),
        ("split_gain=", "split_gain=1 2 x 4", r"Tree=0\): key 'split_gain' holds 'x'"),
        ("split_feature=", "split_feature=0 1 2 9", r"Tree=0, node 3: key 'split_feature' is 9"),
        ("cat_boundaries=", "cat_boundaries=0 5", r"Tree=0\): key 'cat_boundaries' must rise"),
        ("cat_threshold=", "cat_threshold=-3", r"Tree=0\): key 'cat_threshold' holds a value outside"),
        ("decision_type=", "decision_type=13 13 13 13", r"key 'decision_type' is 13"),
        ("num_leaves=", "num_leaves=five", r"Tree=0\): key 'num_leaves' is not an integer"),
        ("Tree=1", "Tree=7", r"found 'Tree=7' where 'Tree=1' was expected"),
        ("max_feature_idx=", "max_feature_idx=9", r"5 feature names for max_feature_idx=9"),
        ("tree_sizes=", "tree_sizes=1 2", r"'tree_sizes' lists 2 trees, the text holds 5"),
        ("end of trees", "", r"line \d+ \(Tree=4\): expected 'key=value', found 'feature_importances:'"),
        ("end of parameters", "", r"parameter line 'pandas_categorical:null' is not of the form"),
        ("num_leaves=", "num_leaves=99999999999999999999", r"Tree=0\): key 'num_leaves' is out of range"),
    ],
)
def test_corrupt_text_names_the_place(fixture_text: str, prefix: str, new_line: str, message: str) -> None:
    bad = replace_line(fixture_text, prefix, new_line)
    with pytest.raises(ModelFormatError, match=message) as info:
        load_lightgbm_text(bad, source="yard/model.txt")
    assert str(info.value).startswith("yard/model.txt: ")


@pytest.mark.parametrize(("marker", "message"), [("end of trees", "truncated: no 'end of trees' line after 5 trees"),
                                                 ("end of parameters", "truncated: no 'end of parameters' line")])
def test_truncation_is_reported(fixture_text: str, marker: str, message: str) -> None:
    with pytest.raises(ModelFormatError, match=message):
        load_lightgbm_text(fixture_text[:fixture_text.index(marker)], source="cut.txt")


@pytest.mark.parametrize("key", ["num_cat", "leaf_weight", "internal_count", "decision_type", "threshold"])
def test_missing_tree_key_is_named(fixture_text: str, key: str) -> None:
    lines = list(fixture_text.split("\n"))
    first = next(i for i, line in enumerate(lines) if line.startswith(key + "="))
    del lines[first]
    with pytest.raises(ModelFormatError, match=rf"Tree=0.*key '{key}' is missing"):
        load_lightgbm_text("\n".join(lines), source="m.txt")


def test_missing_header_key_is_named(fixture_text: str) -> None:
    lines = [line for line in fixture_text.split("\n") if not line.startswith("num_tree_per_iteration=")]
    with pytest.raises(ModelFormatError, match=r"lacks the key 'num_tree_per_iteration'"):
        load_lightgbm_text("\n".join(lines), source="m.txt")


def test_invalid_utf8_and_binary_garbage() -> None:
    with pytest.raises(ModelFormatError, match="invalid UTF-8"):
        load_lightgbm_text(b"tree\nversion=v4\n\xff\xfe\x00", source="blob.bin")


def loads_or_format_error(text: str, rows: np.ndarray, reference: np.ndarray | None) -> str:
    """Load ``text``: either a ModelFormatError, or a model whose raw output equals ``reference`` (when given)."""
    try:
        model = load_lightgbm_text(text, source="fuzzed.txt")
    except ModelFormatError as exc:
        assert str(exc).startswith("fuzzed.txt: ")
        return "error"
    if reference is not None:
        np.testing.assert_array_equal(model.predict_raw(rows), reference)
    return "loaded"


def test_truncated_texts(fixture_text: str, fixture_rows: np.ndarray) -> None:
    """150 seeded cut points: before 'end of trees' always an error; after it, an intact model or an error."""
    reference = load_lightgbm_text(fixture_text, source="fuzzed.txt").predict_raw(fixture_rows)
    end_of_trees = fixture_text.index("end of trees")
    cuts = np.random.default_rng(0).integers(0, len(fixture_text), 150)
    for cut in cuts.tolist():
        outcome = loads_or_format_error(fixture_text[:cut], fixture_rows, reference)
        if cut < end_of_trees + len("end of trees"):
            assert outcome == "error", cut


def test_deleted_lines(fixture_text: str, fixture_rows: np.ndarray) -> None:
    """Every single line deleted in turn (and 50 seeded multi-line deletions): an error or the same model."""
    reference = load_lightgbm_text(fixture_text, source="fuzzed.txt").predict_raw(fixture_rows)
    lines = fixture_text.split("\n")
    tree_section = lines.index("end of trees")
    outcomes = []
    for i in range(tree_section + 1):
        outcomes.append(loads_or_format_error("\n".join(lines[:i] + lines[i + 1:]), fixture_rows, reference))
    rng = np.random.default_rng(1)
    for _ in range(50):
        keep = rng.random(len(lines)) > 0.05
        loads_or_format_error("\n".join(np.asarray(lines, dtype=object)[keep]), fixture_rows, reference)
    assert outcomes.count("error") > tree_section // 2


def test_garbage_numbers(fixture_text: str, fixture_rows: np.ndarray) -> None:
    """200 seeded tokens in the header and trees replaced by junk: only ModelFormatError, never a crash or hang."""
    head = fixture_text[:fixture_text.index("end of trees")]
    rest = fixture_text[len(head):]
    lines = head.split("\n")
    junk = ["abc", "1e999", "", "nan", "--1", "99999999999999999999", "-7", "3.5", "0x1F", "inf"]
    rng = np.random.default_rng(2)
    numeric_lines = [i for i, line in enumerate(lines) if "=" in line and line.split("=", 1)[1].strip()]
    errors = 0
    for _ in range(200):
        i = int(rng.choice(numeric_lines))
        key, value = lines[i].split("=", 1)
        tokens = value.split()
        tokens[int(rng.integers(len(tokens)))] = str(rng.choice(junk))
        mutated = lines.copy()
        mutated[i] = f"{key}={' '.join(tokens)}"
        errors += loads_or_format_error("\n".join(mutated) + rest, fixture_rows, None) == "error"
    assert errors > 100


def test_declared_categorical_features_and_line_endings(fixture_rows: np.ndarray) -> None:
    """categorical_feature given by index or by "name:" marks a feature categorical even without a split on it."""
    text = (FIXTURES / "regression_nan.txt").read_text()
    plain = load_lightgbm_text(text, source="m.txt")
    assert plain.feature_types[3] == "numeric"
    by_index = load_lightgbm_text(text.replace("[categorical_feature: ]", "[categorical_feature: 3]"), source="m.txt")
    assert by_index.feature_types[3] == "categorical"
    by_name = load_lightgbm_text(
        text.replace("[categorical_feature: ]", "[categorical_feature: name:stairs_floor,route_km]"), source="m.txt"
    )
    assert by_name.feature_types[1] == by_name.feature_types[3] == "categorical"
    windows = load_lightgbm_text(text.replace("\n", "\r\n").encode(), source="m.txt")
    np.testing.assert_array_equal(windows.predict_raw(fixture_rows), plain.predict_raw(fixture_rows))


@pytest.mark.parametrize("payload", ["[" * 50_000, "[5]", "[null]", "[[1, [2]]]", '[[{"a": 1}]]'])
def test_malformed_pandas_categorical_line_is_a_format_error(payload):
    """Found by scripts/fuzz_loaders.py (categories): deep nesting raised RecursionError, odd shapes TypeError later.

    Reference: LightGBM's Python package writes ``pandas_categorical:`` followed by ``json.dumps`` of a list of
    category lists, or ``null`` (lightgbm/basic.py, _dump_pandas_categorical).
    """
    text = (FIXTURES / "categorical_pandas.txt").read_text()
    lines = [line for line in text.split("\n") if not line.startswith("pandas_categorical:")]
    bad = "\n".join(lines + ["pandas_categorical:" + payload])
    with pytest.raises(ModelFormatError, match="pandas_categorical"):
        load_lightgbm_text(bad, source="bad.txt")


def test_repeated_feature_name_is_a_format_error():
    """LightGBM itself refuses a feature name given twice (``Dataset``: "appears more than one time")."""
    text = (FIXTURES / "binary_late.txt").read_text()
    names = next(line for line in text.split("\n") if line.startswith("feature_names=")).split("=")[1].split()
    bad = text.replace("feature_names=" + " ".join(names), "feature_names=" + " ".join([names[0]] * len(names)), 1)
    with pytest.raises(ModelFormatError, match=rf"line \d+: feature name '{names[0]}' appears more than once"):
        load_lightgbm_text(bad, source="dup.txt")
