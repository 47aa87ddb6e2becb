"""Tests of :mod:`treeprobe.compare`, two versions of a model side by side.

Outside references: models trained by XGBoost and LightGBM under their own
``interaction_constraints`` (XGBoost, Chen & Guestrin 2016; LightGBM, Ke et al.
2017) against the same models trained without; the libraries' own tree dumps
(``Booster.trees_to_dataframe``) for which pairs share a path in each
version; their own gain importances (XGBoost ``get_score(importance_type=
"total_gain")``, LightGBM ``feature_importance("gain")``) for the gain shares;
and Friedman & Popescu (2008, section 8): a pair that shares no path has H = 0
exactly.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest
from library_paths import library_leaves

from treeprobe import compare_models, structure
from treeprobe.compare import FEATURE_COLUMNS, PAIR_COLUMNS, VERDICT_COLUMNS
from treeprobe.errors import DataError, ParameterError

xgb = pytest.importorskip("xgboost")
lgb = pytest.importorskip("lightgbm")

NAMES = ["fuel_price", "shift_length", "crew_size", "route_km"]
QUICK = {"sample": 300, "resamples": 0}


@pytest.fixture(scope="module")
def depot():
    """Depot running costs: a strong fuel_price x crew_size interaction that a grouped model may not use."""
    rng = np.random.default_rng(5)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(1000, 4)), columns=NAMES)
    y = (3 * X.fuel_price * X.shift_length + 2 * X.crew_size * X.route_km + 4 * X.fuel_price * X.crew_size
         + X.fuel_price + 0.05 * rng.normal(size=1000))
    return X, y.to_numpy()


def _xgboost(X, y, groups=None):
    params = {"max_depth": 3, "eta": 0.3, "nthread": 1, "seed": 0}
    if groups is not None:
        params["interaction_constraints"] = str(groups)
    return xgb.train(params, xgb.DMatrix(X, y), 25)


def _lightgbm(X, y):
    params = {"objective": "regression", "num_leaves": 7, "max_depth": 3, "verbosity": -1, "num_threads": 1,
              "min_data_in_leaf": 10, "seed": 0}
    return lgb.train(params, lgb.Dataset(X, y, params={"verbosity": -1}), 25)


@pytest.fixture(scope="module")
def versions(depot, tmp_path_factory):
    """Saved files: an XGBoost model grouped {fuel_price, shift_length} / {crew_size, route_km}, the same without
    groups, and LightGBM without groups trained on the columns in reverse order."""
    X, y = depot
    folder = tmp_path_factory.mktemp("versions")
    boosters = {"grouped": _xgboost(X, y, [[0, 1], [2, 3]]), "free": _xgboost(X, y),
                "lightgbm": _lightgbm(X[NAMES[::-1]], y)}
    paths = {}
    for name, booster in boosters.items():
        paths[name] = folder / (f"{name}.json" if name != "lightgbm" else "lightgbm.txt")
        booster.save_model(str(paths[name]))
    return boosters, paths


def _dump_pairs(booster) -> set[frozenset[str]]:
    """Pairs of features on one root-to-leaf path, from the library's own ``trees_to_dataframe``."""
    return {frozenset((a, b)) for _, above in library_leaves(booster) for a in above for b in above if a != b}


def _by_status(diff, status) -> set[frozenset[str]]:
    rows = diff.pairs[diff.pairs["status"] == status]
    return {frozenset(p) for p in zip(rows["feature_a"], rows["feature_b"], strict=True)}


def test_grouped_then_free_shows_the_crossing_pairs_as_new(versions):
    boosters, paths = versions
    diff = compare_models(paths["grouped"], paths["free"])
    before, after = _dump_pairs(boosters["grouped"]), _dump_pairs(boosters["free"])
    assert _by_status(diff, "new") == after - before
    assert frozenset(("fuel_price", "crew_size")) in after - before
    assert _by_status(diff, "gone") == before - after
    both = _by_status(diff, "changed") | _by_status(diff, "same")
    assert both == before & after and not both & _by_status(diff, "new")
    assert frozenset(("fuel_price", "shift_length")) in both, "a pair of the old groups is not new"
    assert list(diff.pairs.columns) == list(PAIR_COLUMNS) and list(diff.features.columns) == list(FEATURE_COLUMNS)
    assert diff.pairs["status"].map(["new", "gone", "changed", "same"].index).is_monotonic_increasing
    new_rows = diff.pairs[diff.pairs["status"] == "new"]
    assert (new_rows["paths_old"] == 0).all() and (new_rows["paths_new"] > 0).all()
    assert diff.flagged("new-pair").equals(new_rows.reset_index(drop=True))


def test_measures_are_each_versions_structure(versions):
    boosters, paths = versions
    diff = compare_models(paths["grouped"], paths["free"])
    for side, name in (("old", "grouped"), ("new", "free")):
        walked = structure(paths[name], max_order=2).pairs
        expected = {frozenset(k): (p, c) for *k, p, c in walked[["feature_a", "feature_b", "paths", "cover_share"]]
                    .itertuples(index=False)}
        rows = diff.pairs[diff.pairs[f"paths_{side}"] > 0]
        got = {frozenset((a, b)): (p, c) for a, b, p, c in rows[["feature_a", "feature_b", f"paths_{side}",
                                                                 f"cover_share_{side}"]].itertuples(index=False)}
        assert got == expected
        # Gain shares against XGBoost's own total_gain importance, normalised.
        scores = boosters[name].get_score(importance_type="total_gain")
        share = diff.features.set_index("feature")[f"gain_share_{side}"]
        for feature, gain in scores.items():
            assert share[feature] == pytest.approx(gain / sum(scores.values()), rel=1e-6)
    np.testing.assert_allclose(diff.pairs["paths_change"], diff.pairs["paths_new"] - diff.pairs["paths_old"])


def test_versions_from_different_libraries_are_matched_by_name(versions):
    boosters, paths = versions
    diff = compare_models(paths["grouped"], paths["lightgbm"])
    lightgbm_pairs = _dump_pairs(boosters["lightgbm"])
    assert _by_status(diff, "new") == lightgbm_pairs - _dump_pairs(boosters["grouped"])
    assert "different libraries (xgboost, lightgbm)" in " ".join(diff.facts["notes"])
    assert diff.facts["inputs_added"] == [] and diff.facts["inputs_removed"] == []
    gains = dict(zip(boosters["lightgbm"].feature_name(), boosters["lightgbm"].feature_importance("gain"),
                     strict=True))
    share = diff.features.set_index("feature")["gain_share_new"]
    for feature, gain in gains.items():
        assert share[feature] == pytest.approx(gain / sum(gains.values()), rel=1e-6)


def test_a_version_against_itself_has_nothing_new(versions):
    boosters, paths = versions
    diff = compare_models(paths["free"], boosters["free"])
    assert set(diff.pairs["status"]) == {"same"} and set(diff.features["status"]) == {"same"}
    assert (diff.pairs["paths_change"] == 0).all() and diff.flagged("new-pair").empty
    assert diff.facts["counts"]["pairs"]["same"] == len(_dump_pairs(boosters["free"]))


def test_verdicts_of_both_versions_with_data(versions, depot):
    _, paths = versions
    X, _ = depot
    diff = compare_models(paths["grouped"], paths["free"], X, triage_options=QUICK)
    assert list(diff.pairs.columns) == [*PAIR_COLUMNS, *VERDICT_COLUMNS]
    pair = diff.pairs.set_index(["feature_a", "feature_b"]).loc[("fuel_price", "crew_size")]
    # No path through both in the grouped version: H is exactly 0 there (Friedman & Popescu 2008, section 8).
    assert pair["status"] == "new" and pair["h2_old"] == 0 and pair["h_old"] == 0 and pair["verdict_old"] == "absent"
    assert pair["verdict_new"] == "interaction" and pair["verdict_changed"]
    flagged = diff.flagged("new-interaction")
    assert ("fuel_price", "crew_size") in set(zip(flagged["feature_a"], flagged["feature_b"], strict=True))
    assert (flagged["verdict_old"] != "interaction").all() and (flagged["verdict_new"] == "interaction").all()
    kept = diff.pairs.set_index(["feature_a", "feature_b"]).loc[("fuel_price", "shift_length")]
    assert kept["verdict_old"] == "interaction" and kept["status"] != "new"
    assert diff.facts["verdict_changes"] == int(diff.pairs["verdict_changed"].sum()) >= 1
    assert diff.facts["n_rows"] == 300


def test_a_new_input_column(depot, tmp_path):
    X, y = depot
    wider = X.assign(toll_cost=np.random.default_rng(1).uniform(size=len(X)))
    booster = _xgboost(wider, y + 2 * wider.toll_cost * wider.route_km)
    diff = compare_models(_xgboost(X, y), booster)
    assert diff.facts["inputs_added"] == ["toll_cost"]
    toll = diff.features.set_index("feature").loc["toll_cost"]
    assert toll["status"] == "new" and not toll["input_old"] and toll["input_new"] and toll["splits_old"] == 0
    with pytest.raises(DataError, match="toll_cost"):
        compare_models(_xgboost(X, y), booster, X, triage_options=QUICK)


def test_json_and_bad_options(versions):
    _, paths = versions
    diff = compare_models(paths["grouped"], paths["free"])
    payload = json.loads(diff.to_json())
    assert payload["schema"] == "treeprobe.compare/1" and list(payload) == ["schema", "limits", "facts", "features",
                                                                           "pairs"]
    assert list(payload["pairs"][0]) == list(PAIR_COLUMNS)
    with pytest.raises(ParameterError, match="needs verdicts"):
        diff.flagged("new-interaction")
    with pytest.raises(ParameterError, match="flag must be one of"):
        diff.flagged("new-feature")
    with pytest.raises(ParameterError, match="they need X"):
        compare_models(paths["grouped"], paths["free"], triage_options=QUICK)
    with pytest.raises(ParameterError, match="'null_refits' not accepted"):
        compare_models(paths["grouped"], paths["free"], pd.DataFrame(), triage_options={"null_refits": 3})


# --------------------------------------------------------------------- the report's section
def _sections(page: str) -> dict[str, str]:
    return dict(re.findall(r'<section id="([^"]+)">(.*?)</section>', page, flags=re.S))


def test_report_section_on_changes_since_the_previous_version(versions, depot, tmp_path):
    pytest.importorskip("matplotlib")
    from treeprobe import report
    from treeprobe.reporting import CHANGES_SECTION, SECTIONS

    _, paths = versions
    X, _ = depot
    path = report(paths["free"], X, out=tmp_path / "depot.html", triage_options=QUICK, top_pairs=1,
                  compare_with=paths["grouped"], progress=False)
    sections = _sections(path.read_text(encoding="utf-8"))
    expected = list(SECTIONS)
    expected.insert(expected.index("cautions"), CHANGES_SECTION)
    assert list(sections) == expected
    changes = sections[CHANGES_SECTION]
    diff = compare_models(paths["grouped"], paths["free"], X, triage_options=QUICK)
    assert f"{diff.facts['counts']['pairs']['new']} pair(s) new" in changes
    new = diff.pairs[diff.pairs["status"] == "new"]
    assert changes.count("<td>new</td>") == len(new) > 0
    assert "Verdict, new" in changes and "<td>interaction</td>" in changes and "<td>yes</td>" in changes
    # A comparison made for another new version is refused before any work.
    with pytest.raises(DataError, match="compare_with compares another new version"):
        report(paths["lightgbm"], X, out=tmp_path / "other.html", triage_options=QUICK, compare_with=diff)
    assert not (tmp_path / "other.html").exists()
