"""Tests for treeprobe.io.xgboost and treeprobe.io.ubjson.

Outside references:

* XGBoost's own predictor, ``Booster.predict(..., output_margin=True)``, for
  the raw output (Chen & Guestrin, 2016, eq. 1: the margin is the base score
  plus the sum of the trees' leaf values; DART weights trees by its dropout
  factor, Rashmi & Gilad-Bachrach, 2015);
* XGBoost's own importances, ``Booster.get_score(importance_type=...)`` with
  ``weight``, ``total_gain`` and ``total_cover``;
* XGBoost's own JSON serialisation of the same model, for the UBJSON decoder,
  and the UBJSON specification (Draft 12, ubjson.org) for hand-built bytes;
* files written by XGBoost 2.1.4 and 3.2.0 (``fixtures/xgboost/<version>``,
  made by ``scripts/make_fixtures.py``) with the margins and importances
  that version computed.
"""

from __future__ import annotations

import copy
import doctest
import json
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from treeprobe import load_model
from treeprobe.errors import ModelFormatError, TreeprobeError, UnsupportedModelError
from treeprobe.io import ubjson
from treeprobe.io.ubjson import decode_ubjson
from treeprobe.io.xgboost import from_xgboost, load_xgboost_json, load_xgboost_ubjson

xgb = pytest.importorskip("xgboost")

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "xgboost"
DEPOTS = ["harbour", "airport", "old_town", "ring_road", "north_yard"]
RTOL = 1e-5


# ----------------------------------------------------------------- data and models
def _routes(n_rows: int, seed: int) -> pd.DataFrame:
    """Invented delivery routes with missing readings and a categorical depot."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(
        {
            "route_km": rng.gamma(4.0, 8.0, n_rows),
            "stops": rng.integers(3, 40, n_rows).astype(float),
            "fuel_price": rng.normal(1.7, 0.15, n_rows),
            "shift_hours": rng.uniform(0.0, 10.0, n_rows),
            "depot": pd.Categorical(rng.choice(DEPOTS, n_rows), categories=DEPOTS),
        }
    )
    for column in ("route_km", "fuel_price", "shift_hours"):
        frame.loc[rng.random(n_rows) < 0.12, column] = np.nan
    frame.loc[rng.random(n_rows) < 0.08, "depot"] = np.nan
    return frame


def _minutes(frame: pd.DataFrame) -> np.ndarray:
    km = frame["route_km"].fillna(30.0).to_numpy()
    shift = frame["shift_hours"].fillna(5.0).to_numpy()
    slow = frame["depot"].isin(["old_town", "harbour"]).to_numpy()
    return 1.5 * km + 2.0 * frame["stops"].to_numpy() + 0.3 * km * (shift > 7) + 15.0 * slow


@pytest.fixture(scope="module")
def routes() -> pd.DataFrame:
    return _routes(300, seed=3)


@pytest.fixture(scope="module")
def check_routes() -> pd.DataFrame:
    return _routes(120, seed=4)


NUMERIC = ["route_km", "stops", "fuel_price", "shift_hours"]
SMALL = {"n_estimators": 5, "max_depth": 3, "n_jobs": 1, "random_state": 0}


def _train_models(routes: pd.DataFrame) -> dict:
    minutes = _minutes(routes)
    late = (minutes > np.median(minutes)).astype(int)
    outcome = np.digitize(minutes, np.quantile(minutes, [0.5, 0.85]))
    counts = np.random.default_rng(0).poisson(minutes / 20.0)
    num = routes[NUMERIC]
    models = {
        "regressor": xgb.XGBRegressor(**SMALL).fit(num, minutes),
        "binary": xgb.XGBClassifier(**SMALL).fit(num, late),
        "multiclass": xgb.XGBClassifier(**SMALL).fit(num, outcome),
        "categorical": xgb.XGBRegressor(**SMALL, enable_categorical=True, tree_method="hist",
                                        max_cat_to_onehot=1).fit(routes, minutes),
        "categorical_onehot": xgb.XGBRegressor(**SMALL, enable_categorical=True, tree_method="hist",
                                               max_cat_to_onehot=16).fit(routes, minutes),
        "base_score_binary": xgb.XGBClassifier(**SMALL, base_score=0.3).fit(num, late),
        "base_score_regressor": xgb.XGBRegressor(**SMALL, base_score=50.0).fit(num, minutes),
        "poisson": xgb.XGBRegressor(**SMALL, objective="count:poisson").fit(num, counts),
        "gamma": xgb.XGBRegressor(**SMALL, objective="reg:gamma").fit(num, minutes + 1.0),
        "logitraw": xgb.XGBClassifier(**SMALL, objective="binary:logitraw").fit(num, late),
    }
    dart = xgb.train({"booster": "dart", "rate_drop": 0.5, "skip_drop": 0.0, "max_depth": 3, "nthread": 1, "seed": 0},
                     xgb.DMatrix(num, label=minutes), num_boost_round=6)
    models["dart"] = dart
    # Exact greedy with a large gamma prunes splits and leaves deleted nodes in the arrays.
    models["pruned_exact"] = xgb.train({"tree_method": "exact", "gamma": 200.0, "max_depth": 5, "nthread": 1},
                                       xgb.DMatrix(num, label=minutes), num_boost_round=4)
    two_targets = np.c_[minutes, late]
    models["vector_leaf"] = xgb.train({"multi_strategy": "multi_output_tree", "tree_method": "hist", "max_depth": 3,
                                       "nthread": 1}, xgb.DMatrix(num, label=two_targets), num_boost_round=3)
    models["two_targets"] = xgb.train({"tree_method": "hist", "max_depth": 3, "nthread": 1},
                                      xgb.DMatrix(num, label=two_targets), num_boost_round=3)
    return models


@pytest.fixture(scope="module")
def models(routes: pd.DataFrame) -> dict:
    return _train_models(routes)


def _booster(model):
    return model.get_booster() if hasattr(model, "get_booster") else model


def _native_margin(model, frame: pd.DataFrame) -> np.ndarray:
    booster = _booster(model)
    columns = booster.feature_names
    categorical = any(t == "c" for t in booster.feature_types or [])
    return booster.predict(xgb.DMatrix(frame[columns], enable_categorical=categorical), output_margin=True)


def _assert_margin_close(got: np.ndarray, expected: np.ndarray) -> None:
    # float32 accumulation inside XGBoost: relative 1e-5 plus an absolute slack on the margin's scale.
    scale = max(1.0, float(np.max(np.abs(expected))))
    np.testing.assert_allclose(got, expected, rtol=RTOL, atol=1e-6 * scale)


MODEL_NAMES = ["regressor", "binary", "multiclass", "categorical", "categorical_onehot", "base_score_binary",
               "base_score_regressor", "poisson", "gamma", "logitraw", "dart", "pruned_exact", "vector_leaf",
               "two_targets"]


def _load(model, how: str, tmp_path: Path):
    if how == "object":
        return from_xgboost(model, source="<test object>")
    path = tmp_path / f"model.{how}"
    _booster(model).save_model(str(path))
    return load_model(path)


# ------------------------------------------------------------------- predictions
@pytest.mark.parametrize("how", ["object", "json", "ubj"])
@pytest.mark.parametrize("name", MODEL_NAMES)
def test_predict_raw_matches_xgboost_margin(models, check_routes, tmp_path, name, how):
    """predict_raw == Booster.predict(output_margin=True) (Chen & Guestrin 2016, eq. 1)."""
    model = models[name]
    ensemble = _load(model, how, tmp_path)
    expected = _native_margin(model, check_routes)
    columns = _booster(model).feature_names
    _assert_margin_close(ensemble.predict_raw(check_routes[columns]), expected)
    assert ensemble.library == "xgboost"
    assert ensemble.threshold_rule == "<" and ensemble.split_dtype == "float32"


@pytest.mark.parametrize("name", MODEL_NAMES)
def test_feature_totals_match_get_score(models, name):
    """Split counts, total gain, total cover == Booster.get_score(weight/total_gain/total_cover)."""
    booster = _booster(models[name])
    if name == "vector_leaf":
        pytest.skip("XGBoost's get_score does not support vector-leaf trees")
    totals = from_xgboost(booster, source="<test>").feature_totals().set_index("feature")
    for importance, column in (("weight", "splits"), ("total_gain", "gain"), ("total_cover", "cover")):
        reference = booster.get_score(importance_type=importance)
        used = totals.index[totals["splits"] > 0]
        assert set(reference) == set(used), importance
        got = totals.loc[list(reference), column].to_numpy(dtype=float)
        np.testing.assert_allclose(got, list(reference.values()), rtol=1e-6, err_msg=importance)


def test_link_and_outputs(models, check_routes):
    """Links follow XGBoost's objectives: sigmoid of the margin equals predict_proba (XGBoost's binary:logistic)."""
    binary = from_xgboost(models["binary"], source="<b>")
    assert binary.link == "logit" and binary.n_outputs == 1
    np.testing.assert_allclose(binary.predict(check_routes[NUMERIC]),
                               models["binary"].predict_proba(check_routes[NUMERIC])[:, 1], rtol=1e-5, atol=1e-6)
    multi = from_xgboost(models["multiclass"], source="<m>")
    assert multi.link == "softmax" and multi.n_outputs == 3
    np.testing.assert_allclose(multi.predict(check_routes[NUMERIC]),
                               models["multiclass"].predict_proba(check_routes[NUMERIC]), rtol=1e-5, atol=1e-6)
    poisson = from_xgboost(models["poisson"], source="<p>")
    assert poisson.link == "log"
    np.testing.assert_allclose(poisson.predict(check_routes[NUMERIC]), models["poisson"].predict(check_routes[NUMERIC]),
                               rtol=1e-5)
    assert from_xgboost(models["logitraw"], source="<r>").link == "identity"
    assert from_xgboost(models["dart"], source="<d>").provenance.stored_params["booster"] == "dart"
    assert from_xgboost(models["pruned_exact"], source="<x>").provenance.pruned_nodes_dropped > 0
    assert from_xgboost(models["vector_leaf"], source="<v>").output_of_tree.tolist() == [-1, -1, -1]


def test_categorical_split_direction():
    """Listed categories go right, every other code (unseen, negative) left, NaN by default_left.

    Checked against XGBoost's native predictor on codes it never saw in training.
    """
    rng = np.random.default_rng(7)
    codes = rng.integers(0, 5, 400).astype(float)
    load = rng.normal(size=400)
    label = np.isin(codes, [1, 3]) * 4.0 + load
    train = xgb.DMatrix(np.c_[codes, load], label=label, feature_types=["c", "q"], enable_categorical=True)
    booster = xgb.train({"tree_method": "hist", "max_depth": 2, "max_cat_to_onehot": 1, "nthread": 1}, train, 3)
    ensemble = from_xgboost(booster, source="<cat>")
    assert ensemble.is_categorical.any()
    assert not ensemble.category_left[ensemble.is_categorical].any()
    probe = np.array([[c, x] for c in (0, 1, 2, 3, 4, 7, 40, -1, np.nan, 2.0, 3.0) for x in (-1.0, 0.5)])
    dprobe = xgb.DMatrix(probe, feature_types=["c", "q"], enable_categorical=True)
    np.testing.assert_allclose(ensemble.predict_raw(probe), booster.predict(dprobe, output_margin=True), rtol=RTOL,
                               atol=1e-6)
    assert ensemble.feature_types == ("categorical", "numeric")


def test_feature_names_kept_or_generic(models, routes):
    """Names and types are those the Booster holds; without names, f0.. with the generic flag."""
    named = from_xgboost(models["categorical"], source="<c>")
    assert named.feature_names == tuple(routes.columns)
    assert named.feature_types == ("numeric",) * 4 + ("categorical",)
    assert named.generic_feature_names is False
    plain = xgb.XGBRegressor(**SMALL).fit(routes[NUMERIC].to_numpy(), _minutes(routes))
    generic = from_xgboost(plain, source="<p>")
    assert generic.feature_names == ("f0", "f1", "f2", "f3")
    assert generic.generic_feature_names is True
    assert generic.provenance.library_version == xgb.__version__


def test_unfitted_wrapper_is_a_model_format_error():
    with pytest.raises(ModelFormatError, match="fitted"):
        from_xgboost(xgb.XGBRegressor(), source="<unfitted>")


def test_linear_booster_is_unsupported(routes):
    booster = xgb.train({"booster": "gblinear"}, xgb.DMatrix(routes[NUMERIC].fillna(0), label=_minutes(routes)), 2)
    with pytest.raises(UnsupportedModelError, match="gblinear"):
        from_xgboost(booster, source="<linear>")


# ------------------------------------------------------------- committed fixtures
FIXTURE_FILES = sorted(FIXTURES.glob("*/*.json")) + sorted(FIXTURES.glob("*/*.ubj"))


def test_fixtures_cover_two_major_versions():
    majors = {p.parent.name.split(".")[0] for p in FIXTURE_FILES}
    assert {"2", "3"} <= majors, f"fixture versions found: {sorted(majors)}"


@pytest.mark.parametrize("path", FIXTURE_FILES, ids=lambda p: f"{p.parent.name}/{p.name}")
def test_committed_fixture_matches_writer(path):
    """Files written by XGBoost 2.x/3.x reproduce that version's stored margins and get_score totals."""
    stem = path.with_suffix("")
    ensemble = load_model(path)
    assert ensemble.provenance.library_version == path.parent.name
    inputs = pd.read_csv(f"{stem}.inputs.csv")
    assert list(inputs.columns) == list(ensemble.feature_names)
    _assert_margin_close(ensemble.predict_raw(inputs.to_numpy(dtype=float)), np.load(f"{stem}.margin.npy"))
    stored = pd.read_csv(f"{stem}.totals.csv").set_index("feature")
    totals = ensemble.feature_totals().set_index("feature")
    np.testing.assert_array_equal(totals["splits"].to_numpy(), stored["splits"].to_numpy())
    np.testing.assert_allclose(totals["gain"], stored["gain"], rtol=1e-6)
    np.testing.assert_allclose(totals["cover"], stored["cover"], rtol=1e-6)


def test_reading_files_does_not_import_xgboost():
    """With xgboost made unimportable, both file formats load and predict the stored margins."""
    json_path = FIXTURES / "3.2.0" / "categorical.json"
    ubj_path = FIXTURES / "2.1.4" / "multiclass.ubj"
    code = f"""
import sys
sys.modules["xgboost"] = None
import numpy as np, pandas as pd
import treeprobe
for path in ({str(json_path)!r}, {str(ubj_path)!r}):
    ens = treeprobe.load_model(path)
    stem = path.rsplit(".", 1)[0]
    got = ens.predict_raw(pd.read_csv(stem + ".inputs.csv").to_numpy(float))
    np.testing.assert_allclose(got, np.load(stem + ".margin.npy"), rtol=1e-5, atol=1e-4)
try:
    import xgboost
except ImportError:
    print("xgboost blocked")
"""
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert "xgboost blocked" in result.stdout


# ------------------------------------------------------------------------ UBJSON
def _assert_same_document(decoded, reference, path="$"):
    """UBJSON value == json.loads value; float32 typed arrays compare after rounding JSON to float32."""
    if isinstance(reference, dict):
        assert isinstance(decoded, dict) and decoded.keys() == reference.keys(), path
        for key in reference:
            _assert_same_document(decoded[key], reference[key], f"{path}.{key}")
    elif isinstance(decoded, np.ndarray):
        expected = np.asarray(reference, dtype=decoded.dtype) if len(reference) else np.zeros(0, decoded.dtype)
        np.testing.assert_array_equal(decoded, expected, err_msg=path)
    elif isinstance(reference, list):
        assert isinstance(decoded, list) and len(decoded) == len(reference), path
        for i, (a, b) in enumerate(zip(decoded, reference, strict=True)):
            _assert_same_document(a, b, f"{path}[{i}]")
    elif isinstance(reference, float):
        assert np.float32(decoded) == np.float32(reference), path
    else:
        assert decoded == reference and type(decoded) is type(reference), path


@pytest.mark.parametrize("name", ["multiclass", "categorical", "dart", "vector_leaf"])
def test_ubjson_equals_xgboost_json(models, name):
    """decode_ubjson(save_raw('ubj')) == json.loads(save_raw('json')) for the same model (XGBoost's own JSON)."""
    booster = _booster(models[name])
    decoded = decode_ubjson(bytes(booster.save_raw("ubj")))
    _assert_same_document(decoded, json.loads(bytes(booster.save_raw("json"))))
    trees = decoded["learner"]["gradient_booster"]
    trees = (trees.get("gbtree") or trees)["model"]["trees"]
    assert isinstance(trees[0]["split_conditions"], np.ndarray)
    assert trees[0]["split_conditions"].dtype == np.float32 and trees[0]["split_conditions"].dtype.isnative


def _be(fmt: str, value) -> bytes:
    return struct.pack(">" + fmt, value)


@pytest.mark.parametrize(
    ("encoded", "expected"),
    [
        (b"Z", None),
        (b"T", True),
        (b"F", False),
        (b"i" + _be("b", -7), -7),
        (b"U" + _be("B", 200), 200),
        (b"I" + _be("h", -30000), -30000),
        (b"l" + _be("i", 2**31 - 1), 2**31 - 1),
        (b"L" + _be("q", -(2**40)), -(2**40)),
        (b"d" + _be("f", 1.5), 1.5),
        (b"D" + _be("d", -2.25), -2.25),
        (b"Ca", "a"),
        (b"HU\x05" + b"12345", 12345),
        (b"HU\x05" + b"2.5e1", 25.0),
        (b"SU\x04" + "km²".encode(), "km²"),
        (b"[i\x01NU\x02]", [1, 2]),
        (b"[#U\x02Si\x01aT", ["a", True]),
        (b"{U\x03dayU\x05}", {"day": 5}),
        (b"{$U#U\x02U\x01a\x01U\x01b\x02", {"a": 1, "b": 2}),
        (b"[$T#U\x03", [True, True, True]),
    ],
)
def test_ubjson_scalars_and_containers(encoded, expected):
    """Hand-built values per the UBJSON Draft 12 type table (ubjson.org)."""
    assert decode_ubjson(encoded) == expected


@pytest.mark.parametrize(("marker", "dtype"), [(b"i", ">i1"), (b"U", ">u1"), (b"I", ">i2"), (b"l", ">i4"),
                                               (b"L", ">i8"), (b"d", ">f4"), (b"D", ">f8")])
def test_ubjson_typed_arrays_decode_to_native_numpy(marker, dtype):
    """Optimized typed arrays ([$type#count, UBJSON Draft 12) become native-endian numpy arrays."""
    values = np.array([0, 1, 2, 100, 3], dtype=dtype)
    encoded = b"[$" + marker + b"#U" + bytes([values.size]) + values.tobytes()
    decoded = decode_ubjson(encoded)
    assert isinstance(decoded, np.ndarray) and decoded.dtype.isnative
    np.testing.assert_array_equal(decoded, values.astype(np.dtype(dtype).newbyteorder("=")))


@pytest.mark.parametrize(
    ("encoded", "message"),
    [
        (b"[$d#L" + _be("q", -1), "negative"),
        (b"[$d#L" + _be("q", 10**12), "larger than"),
        (b"[$d#U\x05" + b"\x00" * 8, "needs 20 bytes"),
        (b"SL" + _be("q", 2**62), "larger than"),
        (b"S" + b"d" + _be("f", 3.0), "must be an integer"),
        (b"[" * 300, "nested deeper"),
        (b"X", "unknown type marker"),
        (b"[$d]", "lacks its '#' count"),
        (b"[$N#U\x01", "invalid element type"),
        (b"SU\x02\xff\xfe", "UTF-8"),
        (b"TT", "unexpected bytes"),
        (b"{U\x01a", "file ends"),
        (b"", "file ends"),
    ],
)
def test_ubjson_rejects_corrupt_bytes(encoded, message):
    with pytest.raises(ModelFormatError, match="byte offset") as info:
        decode_ubjson(encoded, source="bad.ubj")
    assert message in str(info.value) and "bad.ubj" in str(info.value)


def test_ubjson_truncations_and_byte_flips_only_raise_treeprobe_errors():
    """A few hundred seeded truncations and byte flips of a real XGBoost 3.x file.

    Truncation must always fail with ModelFormatError; a flip may load (the
    bytes can still form a valid model) but must never raise anything else.
    """
    data = (FIXTURES / "3.2.0" / "categorical.ubj").read_bytes()
    rng = np.random.default_rng(2024)
    for cut in np.unique(np.concatenate([rng.integers(0, len(data), 250), [0, 1, len(data) - 1]])):
        with pytest.raises(ModelFormatError):
            load_xgboost_ubjson(data[:cut], source="cut.ubj")
    outcomes = {"loaded": 0, "rejected": 0}
    for _ in range(300):
        flipped = bytearray(data)
        pos = int(rng.integers(0, len(data)))
        flipped[pos] = int(rng.integers(0, 256))
        try:
            load_xgboost_ubjson(bytes(flipped), source="flip.ubj")
            outcomes["loaded"] += 1
        except TreeprobeError:
            outcomes["rejected"] += 1
    assert outcomes["rejected"] > 0 and sum(outcomes.values()) == 300


def test_json_byte_flips_only_raise_treeprobe_errors():
    """Seeded single-character edits of a real XGBoost 2.x JSON file: load or a TreeprobeError, nothing else."""
    data = (FIXTURES / "2.1.4" / "categorical.json").read_bytes()
    rng = np.random.default_rng(99)
    alphabet = list(b'0123456789-.,[]{}":eE ')
    rejected = 0
    for _ in range(300):
        edited = bytearray(data)
        edited[int(rng.integers(0, len(data)))] = int(rng.choice(alphabet))
        try:
            load_xgboost_json(bytes(edited), source="edit.json")
        except TreeprobeError:
            rejected += 1
    assert rejected > 0


def test_ubjson_doctests():
    assert doctest.testmod(ubjson, raise_on_error=False).failed == 0


# -------------------------------------------------------------------- JSON shape
@pytest.fixture(scope="module")
def small_doc(models) -> dict:
    return json.loads(bytes(_booster(models["regressor"]).save_raw("json")))


def _trees(doc: dict) -> list:
    return doc["learner"]["gradient_booster"]["model"]["trees"]


def _broken(doc: dict, edit) -> bytes:
    doc = copy.deepcopy(doc)
    edit(doc)
    return json.dumps(doc).encode()


def _first_inner_node(tree: dict) -> int:
    return int(np.flatnonzero(np.asarray(tree["left_children"]) > 0)[1])


@pytest.mark.parametrize(
    ("edit", "pattern"),
    [
        (lambda d: _trees(d)[1].pop("left_children"), r"tree 1 lacks the key 'left_children'"),
        (lambda d: _trees(d)[2].pop("sum_hessian"), r"tree 2 lacks the key 'sum_hessian'"),
        (lambda d: d.pop("learner"), r"lacks the key 'learner'"),
        (lambda d: d["learner"].pop("learner_model_param"), r"learner lacks the key 'learner_model_param'"),
        (lambda d: _trees(d)[0]["left_children"].__setitem__(0, 999), r"tree 0, node 0: child index out of range"),
        (lambda d: _trees(d)[1]["right_children"].__setitem__(0, -5), r"tree 1, node 0: child index out of range"),
        (lambda d: _trees(d)[0]["left_children"].__setitem__(_first_inner_node(_trees(d)[0]), 0),
         r"tree 0, node 0 is a tree root but is another node's child \(cycle\)"),
        (lambda d: _trees(d)[0]["right_children"].__setitem__(0, _trees(d)[0]["left_children"][0]),
         r"tree 0, node \d+ has \d parents"),
        (lambda d: _trees(d)[3]["split_conditions"].__setitem__(1, "fast"),
         r"tree 3: 'split_conditions' must be a flat array of numbers"),
        (lambda d: _trees(d)[0]["split_indices"].__setitem__(0, 1.5), r"tree 0: 'split_indices' must be a flat array of integers"),
        (lambda d: _trees(d)[4].__setitem__("loss_changes", "none"), r"tree 4: 'loss_changes' must be an array"),
        (lambda d: _trees(d)[2]["default_left"].append(0), r"tree 2: 'default_left' has \d+ entries, 'left_children' has"),
        (lambda d: _trees(d).__setitem__(1, [1, 2]), r"tree 1 must be an object"),
        (lambda d: d["learner"]["gradient_booster"]["model"].__setitem__("trees", {}), r"trees must be list"),
        (lambda d: d["learner"]["learner_model_param"].__setitem__("num_feature", "many"),
         r"num_feature must be an integer, found 'many'"),
        (lambda d: d["learner"]["learner_model_param"].__setitem__("num_feature", "2"), r"split_indices out of range 0..1"),
        (lambda d: d["learner"]["learner_model_param"].__setitem__("num_feature", "9" * 12), r"more than the 10000000"),
        (lambda d: d["learner"]["learner_model_param"].__setitem__("base_score", "[abc]"), r"base_score is not a number"),
        (lambda d: d["learner"]["gradient_booster"]["model"]["tree_info"].pop(), r"tree_info must list one integer"),
        (lambda d: d["learner"].__setitem__("feature_names", ["a"]), r"feature_names has 1 entries"),
        (lambda d: _trees(d)[2]["tree_param"].__setitem__("num_nodes", "9999"), r"tree 2: tree_param.num_nodes is 9999"),
        (lambda d: _trees(d)[1].__setitem__("tree_param", [1]), r"tree 1.tree_param must be an object, found"),
        (lambda d: _trees(d)[3]["left_children"].__setitem__(0, 2**40), r"tree 3: 'left_children' holds values outside"),
        (lambda d: _trees(d)[3]["left_children"].__setitem__(0, 2**70), r"tree 3: 'left_children' must be a flat array"),
    ],
)
def test_corrupt_json_shape_names_the_problem(small_doc, edit, pattern):
    with pytest.raises(ModelFormatError, match=pattern) as info:
        load_xgboost_json(_broken(small_doc, edit), source="routes.json")
    assert str(info.value).startswith("routes.json: ")


def test_unknown_objective_and_booster_are_unsupported(small_doc):
    def objective(d):
        d["learner"]["objective"]["name"] = "reg:made_up"

    def booster(d):
        d["learner"]["gradient_booster"]["name"] = "gbmystery"

    for edit, word in ((objective, "reg:made_up"), (booster, "gbmystery")):
        with pytest.raises(UnsupportedModelError, match=word):
            load_xgboost_json(_broken(small_doc, edit), source="routes.json")


def test_invalid_json_text_and_logistic_base_score(small_doc, models):
    with pytest.raises(ModelFormatError, match=r"routes.json: invalid JSON at line 1"):
        load_xgboost_json(b'{"learner": [1, 2', source="routes.json")
    doc = json.loads(bytes(_booster(models["binary"]).save_raw("json")))
    doc["learner"]["learner_model_param"]["base_score"] = "[1.5E0]"
    with pytest.raises(ModelFormatError, match=r"must lie in \(0, 1\) for binary:logistic"):
        load_xgboost_json(json.dumps(doc), source="late.json")


_GRAPH_ARRAYS = ("feature", "threshold", "left", "right", "missing_left", "is_categorical", "value", "gain", "cover",
                 "tree_offsets", "cat_offsets", "cat_values")


def _with_every_tree(edit):
    def apply(doc: dict) -> None:
        for tree in _trees(doc):
            edit(tree)
    return apply


@pytest.mark.parametrize(
    "edit",
    [
        # JSON booleans are not packed (numpy keeps them as booleans), so these lists take numpy's inference.
        _with_every_tree(lambda t: t.__setitem__("default_left", [bool(v) for v in t["default_left"]])),
        lambda d: _trees(d)[2].__setitem__("default_left", [bool(v) for v in _trees(d)[2]["default_left"]]),
        # Integer literals in float arrays (XGBoost writes 0E0) pack as the same float32 numbers.
        _with_every_tree(lambda t: t.__setitem__("loss_changes", [int(v) if float(v).is_integer() else v
                                                                  for v in t["loss_changes"]])),
        # The root's left child (node 1) written as JSON true: numpy reads the list as integers.
        lambda d: _trees(d)[1].__setitem__("left_children", [True] + _trees(d)[1]["left_children"][1:]),
    ],
)
def test_node_lists_read_the_same_packed_or_not(small_doc, models, check_routes, edit):
    """The JSON hook packs node lists in one struct/bytes call; lists it does not pack go through numpy's
    type inference. Both must give the same graph (reference: XGBoost's own compact JSON of the model,
    and ``Booster.predict(output_margin=True)``)."""
    expected = load_xgboost_json(json.dumps(small_doc), source="routes.json")
    got = load_xgboost_json(_broken(small_doc, edit), source="routes.json")
    for name in _GRAPH_ARRAYS:
        np.testing.assert_array_equal(getattr(got, name), getattr(expected, name), err_msg=name)
    pretty = load_xgboost_json(json.dumps(small_doc, indent=2), source="routes.json")
    np.testing.assert_array_equal(pretty.threshold, expected.threshold)
    _assert_margin_close(got.predict_raw(check_routes[NUMERIC].to_numpy()),
                         _native_margin(models["regressor"], check_routes))


def test_declared_deleted_nodes_must_match(models):
    """Pruned nodes are dropped only when the count of unreachable nodes equals tree_param.num_deleted."""
    doc = json.loads(bytes(_booster(models["pruned_exact"]).save_raw("json")))
    tree = next(t for t in _trees(doc) if int(t["tree_param"]["num_deleted"]) > 0)
    tree["tree_param"]["num_deleted"] = str(int(tree["tree_param"]["num_deleted"]) + 1)
    with pytest.raises(ModelFormatError, match=r"unreachable nodes but declares num_deleted"):
        load_xgboost_json(json.dumps(doc), source="pruned.json")



@pytest.mark.parametrize(("key", "value"), [("num_class", "2147483648"), ("num_class", "99999999999999999999"),
                                            ("num_target", "4000000000"), ("num_class", "7")])
def test_absurd_output_count_is_refused_before_allocating(tmp_path, key, value):
    """Found by scripts/fuzz_loaders.py: a corrupt num_class made the loader size arrays by it (gigabytes).

    Reference: XGBoost 2.1.4's own file (fixture), whose 3-class model needs one tree per class and round.
    """
    # XGBoost 2.x stores one scalar base_score, so only the tree count can expose the bad output count.
    doc = json.loads((FIXTURES / "2.1.4" / "multiclass.json").read_bytes())
    n_trees = len(doc["learner"]["gradient_booster"]["model"]["trees"])
    doc["learner"]["learner_model_param"][key] = value
    if value == "7":
        # A plausible count that still exceeds the trees: keep only the first round's three trees.
        model = doc["learner"]["gradient_booster"]["model"]
        model["trees"], model["tree_info"] = model["trees"][:3], model["tree_info"][:3]
        n_trees = 3
    path = tmp_path / "model.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(ModelFormatError, match=rf"declares \d+ outputs .* only {n_trees} trees"):
        load_model(path)


def test_huge_unnamed_feature_count_is_refused(tmp_path):
    """Found by auditing with scripts/fuzz_loaders.py: 10 million unnamed features in a 5 kB file cost 3 s and 1 GB.

    Reference: XGBoost 2.1.4's own file (fixture) with its feature names removed, as a model trained on a bare
    array is saved.
    """
    doc = json.loads((FIXTURES / "2.1.4" / "binary.json").read_bytes())
    doc["learner"]["feature_names"], doc["learner"]["feature_types"] = [], []
    path = tmp_path / "model.json"
    doc["learner"]["learner_model_param"]["num_feature"] = "9999999"
    path.write_text(json.dumps(doc))
    with pytest.raises(ModelFormatError, match="num_feature is 9999999 but the file stores no feature names"):
        load_model(path)
    doc["learner"]["learner_model_param"]["num_feature"] = str(2**20)
    path.write_text(json.dumps(doc))
    assert load_model(path).n_features == 2**20


def test_integer_literal_beyond_python_digit_limit_is_a_format_error(tmp_path):
    """Found by scripts/fuzz_loaders.py (long_number): json.loads raised a bare ValueError on a 5000-digit integer.

    Reference: Python's documented integer string conversion limit (4300 digits, ``sys.get_int_max_str_digits``).
    """
    text = (FIXTURES / "2.1.4" / "binary.json").read_text()
    bad = text.replace('"num_feature":"5"', '"num_feature":' + "9" * 5000, 1)
    assert bad != text
    with pytest.raises(ModelFormatError, match=r"unreadable JSON.*4300 digits"):
        load_xgboost_json(bad, source="long.json")


def test_repeated_feature_names_are_refused(tmp_path):
    """XGBoost itself refuses repeated names (``DMatrix``: "feature_names must be unique"); so must a loaded file."""
    doc = json.loads((FIXTURES / "2.1.4" / "binary.json").read_bytes())
    doc["learner"]["feature_names"] = ["route_km"] * len(doc["learner"]["feature_names"])
    path = tmp_path / "model.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(ModelFormatError, match="feature_names repeats route_km"):
        load_model(path)
    with pytest.raises(ModelFormatError, match="feature_names repeats a"):
        load_model(FIXTURES / "2.1.4" / "binary.json", feature_names=["a"] * 5)
    with pytest.raises(TypeError, match="not a single string"):
        load_model(FIXTURES / "2.1.4" / "binary.json", feature_names="abcde")


def test_category_code_beyond_float32_integers_is_refused(tmp_path):
    """Found by scripts/fuzz_loaders.py (huge_number, seed 7): a 2**63-1 category overflowed at prediction.

    Reference: XGBoost compares category codes as float32, whose integers are exact only below 2**24
    (IEEE 754 binary32, 24-bit significand); XGBoost refuses larger codes in its data checks.
    """
    doc = json.loads((FIXTURES / "3.2.0" / "categorical.json").read_bytes())
    tree = next(t for t in doc["learner"]["gradient_booster"]["model"]["trees"] if t["categories"])
    tree["categories"][0] = 2**63 - 1
    path = tmp_path / "model.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(ModelFormatError, match="'categories' holds 9223372036854775807"):
        load_model(path)
