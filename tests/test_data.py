"""Tests for treeprobe.data (reading and fitting untrusted data) and the pickle refusal paths.

Outside references:

* XGBoost's own predictor, ``Booster.predict(DMatrix(clean), output_margin=True)``
  (Chen & Guestrin, 2016, eq. 1), on the clean frame: whatever column order,
  extra columns, text numbers or booleans the data arrive with, the prepared
  frame must score exactly as XGBoost scores the clean one;
* ``pandas.read_csv`` of the whole file, for the columns and rows a bounded
  read keeps;
* the inclusion probability ``n / N`` of every row under uniform sampling
  without replacement (Efraimidis & Spirakis, 2006, random keys with equal
  weights), checked by repetition within a binomial bound;
* ``pickle`` / ``joblib`` themselves, to build files whose unpickling would
  leave a trace on disk: the refusal must leave none.
"""

from __future__ import annotations

import pickle
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from treeprobe import load_model
from treeprobe.cli import main
from treeprobe.data import DataReport, UnseenCategoryWarning, load_data, model_matrix, prepare_data, read_table
from treeprobe.errors import DataError, DataWarning, ModelFormatError, UnsafeModelError

xgb = pytest.importorskip("xgboost")

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
FEATURES = ["fuel_price", "shift_length", "crew_size"]


def _trips(n_rows: int, seed: int) -> pd.DataFrame:
    """Invented delivery shifts: fuel price, shift length and crew size."""
    rng = np.random.default_rng(seed)
    return pd.DataFrame(
        {
            "fuel_price": rng.normal(1.7, 0.2, n_rows).round(3),
            "shift_length": rng.uniform(4, 12, n_rows).round(2),
            "crew_size": rng.integers(1, 5, n_rows).astype(float),
        }
    )


@pytest.fixture(scope="module")
def named_model():
    frame = _trips(300, 0)
    y = frame["fuel_price"] * frame["shift_length"] + frame["crew_size"]
    booster = xgb.train({"max_depth": 3, "eta": 0.3, "nthread": 1, "seed": 0},
                        xgb.DMatrix(frame, label=y), num_boost_round=15)
    return load_model(booster), booster


@pytest.fixture(scope="module")
def generic_model():
    frame = _trips(300, 1)
    y = frame["shift_length"] - frame["crew_size"]
    booster = xgb.train({"max_depth": 2, "nthread": 1, "seed": 0}, xgb.DMatrix(frame.to_numpy(), label=y),
                        num_boost_round=5)
    return load_model(booster), booster


def _xgb_margin(booster, frame: pd.DataFrame) -> np.ndarray:
    return booster.predict(xgb.DMatrix(frame), output_margin=True)


# ------------------------------------------------------------ matching columns
def test_shuffled_and_extra_columns_match_by_name_and_score_as_xgboost(named_model):
    ens, booster = named_model
    clean = _trips(40, 5)
    messy = clean[["crew_size", "fuel_price", "shift_length"]].assign(depot_code=7, driver_id="d1")
    with pytest.warns(DataWarning, match=r"2 column\(s\).*depot_code, driver_id"):
        prepared, report = prepare_data(ens, messy)
    assert list(prepared.columns) == FEATURES
    assert report.matched_by == "name" and report.extra_columns == ("depot_code", "driver_id")
    np.testing.assert_allclose(ens.predict_raw(prepared), _xgb_margin(booster, clean), rtol=1e-6)


def test_missing_columns_are_listed_with_close_matches(named_model):
    ens, _ = named_model
    typo = _trips(5, 0).rename(columns={"shift_length": "shift_lenght", "crew_size": "crew"})
    for call in (lambda: prepare_data(ens, typo), lambda: ens.check_X(typo)):
        with pytest.raises(DataError) as info:
            call()
        message = str(info.value)
        assert "lacks 2 of the model's 3 feature columns: shift_length, crew_size;" in message
        assert "'shift_length' -> 'shift_lenght'?" in message


def test_generic_names_match_by_position_and_say_so(generic_model):
    ens, booster = generic_model
    assert ens.generic_feature_names
    clean = _trips(30, 3)
    with pytest.warns(DataWarning, match="by position"):
        prepared, report = prepare_data(ens, clean)
    assert report.matched_by == "position" and "by position" in report.lines()[0]
    assert list(prepared.columns) == list(ens.feature_names)
    np.testing.assert_allclose(ens.predict_raw(prepared), _xgb_margin(booster, clean.to_numpy()), rtol=1e-6)


def test_generic_names_with_a_different_column_count_are_an_error(generic_model):
    ens, _ = generic_model
    with pytest.raises(DataError, match="lacks 3 of the model's 3"):
        prepare_data(ens, _trips(5, 0).assign(extra=1.0))


def test_target_is_kept_last_and_must_exist(named_model):
    ens, _ = named_model
    frame = _trips(10, 2).assign(fuel_used=np.arange(10.0))
    prepared, report = prepare_data(ens, frame, target="fuel_used")
    assert list(prepared.columns) == FEATURES + ["fuel_used"] and report.extra_columns == ()
    with pytest.raises(DataError, match="target column: fuel_usd; close matches in the data: 'fuel_usd' -> 'fuel_used'"):
        prepare_data(ens, frame, target="fuel_usd")


# ------------------------------------------------------------- coercing values
def test_text_numbers_and_booleans_are_coerced_and_reported(named_model):
    ens, booster = named_model
    clean = _trips(20, 4)
    clean["crew_size"] = (clean["crew_size"] > 2).astype(float)
    messy = clean.astype({"fuel_price": str})
    messy["crew_size"] = clean["crew_size"] > 0.5
    prepared, report = prepare_data(ens, messy)
    assert any("'fuel_price': 20 text value(s) read as numbers" in note for note in report.coerced)
    assert any("'crew_size': booleans read as 0/1" in note for note in report.coerced)
    np.testing.assert_allclose(ens.predict_raw(prepared), _xgb_margin(booster, clean), rtol=1e-6)
    np.testing.assert_allclose(ens.predict_raw(messy), _xgb_margin(booster, clean), rtol=1e-6)


def test_object_column_mixing_booleans_and_missing(named_model):
    ens, booster = named_model
    clean = _trips(6, 4)
    clean["crew_size"] = [1.0, 0.0, np.nan, 1.0, 0.0, np.nan]
    messy = clean.astype({"crew_size": object})
    messy["crew_size"] = [True, False, None, True, False, None]
    prepared, report = prepare_data(ens, messy)
    assert any("4 boolean(s) read as 0/1" in note for note in report.coerced)
    np.testing.assert_allclose(ens.predict_raw(prepared), _xgb_margin(booster, clean), rtol=1e-6)


@pytest.mark.parametrize(
    ("column", "values", "expected"),
    [
        ("shift_length", ["8.5", "9", "long", "n/a"], r"'shift_length'.*2 value\(s\) that are not numbers.*'long' at row 2"),
        ("fuel_price", [1.5, np.inf, 1.7, 1.8], r"'fuel_price' holds an infinite value at row 1"),
        ("fuel_price", ["1.5", "1.6", "-inf", "1.8"], r"'fuel_price' holds an infinite value at row 2"),
    ],
)
def test_bad_values_name_column_value_and_row_in_both_paths(named_model, column, values, expected):
    ens, _ = named_model
    frame = _trips(4, 0)
    frame[column] = values
    with pytest.raises(DataError, match=expected):
        prepare_data(ens, frame)
    with pytest.raises(DataError, match=expected):
        ens.check_X(frame)


def test_infinity_in_a_plain_array_is_refused(named_model):
    ens, _ = named_model
    rows = _trips(3, 0).to_numpy(copy=True)
    rows[2, 1] = -np.inf
    with pytest.raises(DataError, match=r"column 1 \('shift_length'\).*infinite value at row 2"):
        ens.predict_raw(rows)


def test_entirely_missing_column_is_an_error(named_model):
    ens, _ = named_model
    frame = _trips(5, 0)
    frame["crew_size"] = np.nan
    with pytest.raises(DataError, match=r"'crew_size' is entirely missing \(all 5 values"):
        prepare_data(ens, frame)


def test_repeated_column_names_are_an_error(named_model):
    ens, _ = named_model
    frame = pd.concat([_trips(3, 0), _trips(3, 1)[["crew_size"]]], axis=1)
    with pytest.raises(DataError, match="repeated column names: crew_size"):
        prepare_data(ens, frame)
    with pytest.raises(DataError, match="repeated column names: crew_size"):
        ens.check_X(frame)


def test_unseen_categories_warn_with_column_and_levels():
    ens = load_model(FIXTURES / "xgboost" / "3.2.0" / "categorical.json")
    levels = ens.category_levels["depot"]
    frame = pd.read_csv(FIXTURES / "xgboost" / "3.2.0" / "categorical.inputs.csv").head(6)
    frame["depot"] = [levels[0], "moon_base", levels[1], "moon_base", "sea_port", None]
    with pytest.warns(UnseenCategoryWarning, match=r"'depot' holds 2 categories the model never saw \(moon_base, sea_port\)"):
        prepared, report = prepare_data(ens, frame)
    assert len(report.unseen_categories) == 1 and "moon_base" in report.unseen_categories[0]
    # The prepared frame is the model matrix: level 0 is code 0, an unseen level the unlisted code -1.
    assert prepared["depot"].tolist()[:2] == [0.0, -1.0]


def test_parameters_are_checked_at_the_door(named_model):
    ens, _ = named_model
    with pytest.raises(TypeError, match="frame must be a pandas DataFrame"):
        prepare_data(ens, _trips(3, 0).to_numpy())
    with pytest.raises(TypeError, match="ensemble must be a ForestGraph"):
        prepare_data("model.json", _trips(3, 0))
    with pytest.raises(DataError, match="no rows"):
        prepare_data(ens, _trips(3, 0).iloc[:0])


# ---------------------------------------------------------------- reading files
def test_read_table_columns_and_sample_match_pandas(tmp_path):
    path = tmp_path / "shifts.csv"
    full = _trips(500, 9).assign(driver_id=[f"d{i}" for i in range(500)])
    full.to_csv(path, index=False)
    subset = read_table(path, columns=["crew_size", "fuel_price"])
    pd.testing.assert_frame_equal(subset, pd.read_csv(path)[["fuel_price", "crew_size"]])
    sample = read_table(path, sample=50, random_state=3)
    assert len(sample) == 50 and sample.index.is_unique and sample.index.is_monotonic_increasing
    pd.testing.assert_frame_equal(sample, pd.read_csv(path).loc[sample.index])
    assert not sample.index.equals(read_table(path, sample=50, random_state=4).index)
    assert sample.index.equals(read_table(path, sample=50, random_state=3).index)
    assert len(read_table(path, sample=10_000)) == 500
    with pytest.raises(DataError, match="'crew_sise' -> 'crew_size'"):
        read_table(path, columns=["crew_sise"])


def test_chunked_sample_is_uniform(tmp_path, monkeypatch):
    """Every row is kept with probability n / N (Efraimidis & Spirakis, 2006), also across chunks."""
    import treeprobe.data as data_module

    monkeypatch.setattr(data_module, "_CHUNK_ROWS", 7)
    path = tmp_path / "rows.csv"
    pd.DataFrame({"row": np.arange(50)}).to_csv(path, index=False)
    repeats, keep = 400, 10
    counts = np.zeros(50)
    for seed in range(repeats):
        rows = read_table(path, sample=keep, random_state=seed)["row"].to_numpy()
        assert rows.size == keep and np.unique(rows).size == keep
        counts[rows] += 1
    expected = repeats * keep / 50
    spread = np.sqrt(repeats * 0.2 * 0.8)
    # Six binomial standard deviations: a failure means a biased sampler, not bad luck.
    assert np.all(np.abs(counts - expected) < 6 * spread), counts
    # Late rows must be as likely as early ones (a broken reservoir favours one end).
    assert abs(counts[:25].mean() - counts[25:].mean()) < 2 * spread


def test_load_data_reads_only_needed_columns_and_reports_the_rest(named_model, tmp_path):
    ens, booster = named_model
    path = tmp_path / "shifts.csv"
    clean = _trips(200, 6)
    clean.assign(note="x", fuel_used=1.0)[["note", "crew_size", "fuel_used", "shift_length", "fuel_price"]].to_csv(
        path, index=False)
    with pytest.warns(DataWarning, match=r"1 column\(s\).*ignored: note"):
        prepared, report = load_data(ens, path, target="fuel_used", sample=50, random_state=1)
    assert isinstance(report, DataReport) and report.extra_columns == ("note",) and report.n_rows == 50
    assert list(prepared.columns) == FEATURES + ["fuel_used"]
    np.testing.assert_allclose(ens.predict_raw(prepared), _xgb_margin(booster, clean.loc[prepared.index]), rtol=1e-6)
    with pytest.raises(DataError, match=r"shifts.csv: data lacks 1 of the model's 3 feature columns: crew_size"):
        pd.read_csv(path).drop(columns="crew_size").to_csv(tmp_path / "shifts.csv", index=False)
        load_data(ens, path)


@pytest.mark.parametrize("text", ["", "a,b\n", "a,b\n1,\"2\n"])
def test_read_table_refuses_empty_or_broken_files(tmp_path, text):
    path = tmp_path / "broken.csv"
    path.write_text(text)
    with pytest.raises(DataError, match=r"broken\.csv"):
        read_table(path)


# ------------------------------------------------------------------- pickles
class _Trace:
    """Unpickling this object touches a file: the proof that a loader unpickled."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (self.marker,))


@pytest.fixture()
def pickle_files(tmp_path):
    import joblib

    marker = tmp_path / "UNPICKLED"
    files = {
        "plain.pkl": pickle.dumps(_Trace(marker)),
        "renamed.json": pickle.dumps(_Trace(marker)),
        "renamed.ubj": pickle.dumps(_Trace(marker)),
        "renamed.txt": pickle.dumps(_Trace(marker)),
        "protocol0.json": pickle.dumps(_Trace(marker), protocol=0),
    }
    paths = {}
    for name, payload in files.items():
        paths[name] = tmp_path / name
        paths[name].write_bytes(payload)
    for name, compress in (("compressed.joblib", 3), ("compressed_as.json", ("gzip", 3)), ("lzma.bin", ("xz", 3))):
        paths[name] = tmp_path / name
        joblib.dump(_Trace(marker), paths[name], compress=compress)
    return paths, marker


def test_pickles_are_refused_by_the_api_and_never_unpickled(pickle_files):
    paths, marker = pickle_files
    for name, path in paths.items():
        if name == "protocol0.json":
            # A text pickle does not look like one; the JSON parser must fail on it cleanly.
            with pytest.raises(ModelFormatError, match=r"unknown model format|invalid JSON"):
                load_model(path)
        else:
            with pytest.raises(UnsafeModelError, match=r"runs arbitrary code.*trust_pickle=True"):
                load_model(path)
        assert not marker.exists(), f"{name} was unpickled"


def test_json_parser_fails_cleanly_on_pickle_bytes(pickle_files):
    from treeprobe.io.lightgbm import load_lightgbm_text
    from treeprobe.io.xgboost import load_xgboost_json, load_xgboost_ubjson

    paths, marker = pickle_files
    for path in paths.values():
        data = path.read_bytes()
        for parse in (load_xgboost_json, load_xgboost_ubjson, load_lightgbm_text):
            with pytest.raises(ModelFormatError):
                parse(data, source=str(path))
    assert not marker.exists()


def test_trusted_pickle_loads_a_model_in_the_api_and_the_command_line(tmp_path):
    import joblib

    frame = _trips(100, 0)
    model = xgb.XGBRegressor(n_estimators=5, max_depth=2, n_jobs=1).fit(frame, frame["fuel_price"])
    path = tmp_path / "model.joblib"
    joblib.dump(model, path, compress=3)
    with pytest.raises(UnsafeModelError):
        load_model(path)
    ens = load_model(path, trust_pickle=True)
    np.testing.assert_allclose(ens.predict_raw(frame), model.predict(frame, output_margin=True), rtol=1e-6)
    proc = subprocess.run([sys.executable, "-m", "treeprobe.cli", "inspect", "--trust-pickle", str(path)],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert "trees      5" in proc.stdout


def test_pickles_are_refused_by_the_command_line(pickle_files):
    paths, marker = pickle_files
    for name in ("compressed.joblib", "renamed.json"):
        proc = subprocess.run([sys.executable, "-m", "treeprobe.cli", "inspect", str(paths[name])],
                              capture_output=True, text=True)
        assert proc.returncode == 1, proc.stderr
        assert proc.stderr.count("\n") == 1 and "--trust-pickle" in proc.stderr and "Traceback" not in proc.stderr
    assert not marker.exists()


def test_warnings_do_not_leak_from_clean_data(named_model):
    ens, _ = named_model
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        prepared, report = prepare_data(ens, _trips(5, 0))
    assert report.coerced == () and report.extra_columns == () and len(report.lines()) == 1


# ------------------------------------------------- one coercion path, folders, single warning
def test_model_matrix_and_prepare_data_share_one_path(named_model):
    ens, _ = named_model
    frame = _trips(6, 3)
    frame["shift_length"] = frame["shift_length"].astype(str)
    frame["crew_size"] = frame["crew_size"].astype(object)
    frame.loc[2, "crew_size"] = True
    shuffled = frame[["crew_size", "shift_length", "fuel_price"]]
    prepared, _ = prepare_data(ens, shuffled)
    matrix = model_matrix(ens, shuffled)
    np.testing.assert_array_equal(prepared.to_numpy(), matrix)
    np.testing.assert_array_equal(ens.check_X(shuffled), matrix)
    # Reference: pandas' own numeric parsing of the same text, and True read as 1.
    np.testing.assert_array_equal(matrix[:, 1], pd.to_numeric(frame["shift_length"]).to_numpy())
    assert matrix[2, 2] == 1.0


def test_strict_model_matrix_refuses_empty_columns(named_model):
    ens, _ = named_model
    frame = _trips(4, 0)
    frame["crew_size"] = np.nan
    assert np.isnan(model_matrix(ens, frame)[:, 2]).all()
    with pytest.raises(DataError, match="column 'crew_size' is entirely missing"):
        model_matrix(ens, frame, strict=True)
    with pytest.raises(DataError, match=r"data column 2 \('crew_size'\) is entirely missing"):
        model_matrix(ens, frame.to_numpy(), strict=True)
    with pytest.raises(DataError, match="no rows"):
        model_matrix(ens, frame.iloc[:0], strict=True)


def test_a_folder_given_as_data_is_named_as_a_folder(named_model, tmp_path):
    ens, _ = named_model
    for call in (lambda: read_table(tmp_path), lambda: load_data(ens, tmp_path)):
        with pytest.raises(DataError, match="is a folder"):
            call()
    with pytest.raises(DataError, match="data file not found"):
        read_table(tmp_path / "absent.csv")


def test_command_line_names_a_folder_given_as_data(tmp_path, capsys):
    model = FIXTURES / "xgboost" / "3.2.0" / "categorical.json"
    assert main(["measure", str(model), "--data", str(tmp_path), "--sample", "20", "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "is a folder" in err and "not found" not in err


def test_unseen_category_warning_is_printed_once_by_the_command_line(tmp_path):
    """The data are coded once (load_data); the stage receives the model matrix and must not warn again.

    Run as a separate process, so that Python's own warning display (not pytest's capture) is what is counted.
    """
    model = FIXTURES / "xgboost" / "3.2.0" / "categorical.json"
    levels = load_model(model).category_levels["depot"]
    frame = pd.read_csv(FIXTURES / "xgboost" / "3.2.0" / "categorical.inputs.csv").head(30)
    frame["depot"] = [levels[i % len(levels)] for i in range(29)] + ["moon_base"]
    path = tmp_path / "shifts.csv"
    frame.to_csv(path, index=False)
    proc = subprocess.run([sys.executable, "-m", "treeprobe.cli", "measure", str(model), "--data", str(path),
                           "--sample", "30", "--quiet"], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr.count("never saw (moon_base)") == 1, proc.stderr


def test_data_reports_compare_without_raising():
    first = DataReport(n_rows=3, matched_by="name", coerced=("column 'a': booleans read as 0/1",))
    same = DataReport(n_rows=3, matched_by="name", coerced=("column 'a': booleans read as 0/1",))
    assert first == same and first != DataReport(n_rows=4, matched_by="name") and first != "a report"
