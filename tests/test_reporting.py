"""Tests of the self-contained HTML report.

Outside references: the generating formula of the seeded data (a product term
``3 * fuel_price * shift_length`` and additive terms, so the product pair is
the one interaction; Friedman and Popescu 2008, section 8: H² of an additive
pair is zero, of a pure product is large), XGBoost's own tree dump (tree
count), the W3C rule that ``id`` values are unique in a document (HTML Living
Standard, "The id attribute"), and a real browser (headless Chromium) that
must render the page without console errors.
"""

from __future__ import annotations

import html
import importlib.util
import re
import sys
from collections import Counter
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from markupsafe import escape

from treeprobe import DataError, load_model
from treeprobe.errors import ParameterError
from treeprobe.constraints import suggest_constraints, validate_constraints
from treeprobe.errors import MissingLibraryError
from treeprobe.reporting import SECTIONS, report
from treeprobe.verdicts import triage

xgb = pytest.importorskip("xgboost")
pytest.importorskip("matplotlib")

NAMES = ["fuel_price", "shift_length", "crew_size", "route_km", "idle_minutes"]
# Figures each section must hold: the pair map, the groups-and-links arcs, one per leading pair, the rounds plot.
TOP_PAIRS = 3
FIGURES = {"summary": 0, "pairs": 0, "pair-map": 1, "links": 1, "dependence": TOP_PAIRS, "rounds": 1,
           "constraints": 0, "cautions": 0}


def _data(n: int = 500, seed: int = 0) -> tuple[pd.DataFrame, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(n, len(NAMES))), columns=NAMES)
    # idle_minutes is pure noise; crew_size and route_km are additive.
    y = 3 * X.fuel_price * X.shift_length + 2 * X.crew_size + X.route_km ** 2 + 0.1 * rng.normal(size=n)
    return X, y.to_numpy()


@pytest.fixture(scope="module")
def fitted():
    X, y = _data()
    model = xgb.XGBRegressor(n_estimators=60, max_depth=3, learning_rate=0.2, random_state=0, n_jobs=1).fit(X, y)
    return model, X, y


@pytest.fixture(scope="module")
def rendered(fitted, tmp_path_factory):
    """The report as a user calls it: triage run inside, on the data frame with the target as a column."""
    model, X, y = fitted
    frame = X.assign(late_minutes=y)
    path = tmp_path_factory.mktemp("report") / "fleet.html"
    written = report(model, frame, "late_minutes", out=path, top_pairs=TOP_PAIRS,
                     triage_options={"sample": 200, "resamples": 3, "null_refits": 0})
    return written, written.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def triaged(fitted):
    model, X, y = fitted
    ens = load_model(model)
    return ens, triage(ens, X, y, sample=200, resamples=3, null_refits=0)


def _sections(page: str) -> dict[str, str]:
    return dict(re.findall(r'<section id="([^"]+)">(.*?)</section>', page, flags=re.S))


def _load_screenshot_script():
    path = Path(__file__).resolve().parents[1] / "scripts" / "screenshot_report.py"
    spec = importlib.util.spec_from_file_location("screenshot_report", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_report_is_one_self_contained_page(rendered):
    path, page = rendered
    assert path.is_file() and path.name == "fleet.html"
    assert page.startswith("<!DOCTYPE html>")
    assert "<script" not in page.lower()
    # No resource from outside the file: every src/href is an in-page anchor or inline data.
    for link in re.findall(r'(?:src|href)\s*=\s*"([^"]*)"', page):
        assert link.startswith(("#", "data:")), link
    assert not re.search(r"url\(\s*['\"]?(?:https?:)?//", page)
    assert "@import" not in page and "<link" not in page.lower()
    assert "<?xml" not in page and "<!DOCTYPE svg" not in page


def test_every_section_and_figure_is_present(rendered):
    _, page = rendered
    sections = _sections(page)
    assert list(sections) == list(SECTIONS)
    for key, count in FIGURES.items():
        assert sections[key].count("<svg") == count, key


def test_svg_ids_are_unique_across_figures(rendered):
    # HTML Living Standard: an id must be unique in the document; clashing clip-path ids garble inline SVGs.
    _, page = rendered
    ids = Counter(re.findall(r'\sid="([^"]+)"', page))
    assert ids and max(ids.values()) == 1, [k for k, v in ids.items() if v > 1][:5]


def test_known_interaction_leads_and_facts_match_xgboost(rendered, fitted):
    model, _, _ = fitted
    _, page = rendered
    sections = _sections(page)
    first_row = re.search(r"<tbody><tr>(.*?)</tr>", sections["pairs"], flags=re.S).group(1)
    # The generating formula has one product term: fuel_price * shift_length.
    assert "fuel_price" in first_row and "shift_length" in first_row and ">interaction</td>" in first_row
    assert "<h3>fuel_price × shift_length</h3>" in sections["dependence"]
    n_trees = len(model.get_booster().get_dump())
    assert f"<th>Trees</th><td>{n_trees} (" in sections["summary"]
    assert "column late_minutes" in sections["summary"]
    assert "200 used for H-statistics and dependence, of 500 available" in sections["summary"]
    for step in ("triage", "figure: pair map", "figure: groups and links", "partial dependence"):
        assert step in sections["summary"]


def test_rules_snippets_and_cautions_appear(rendered, triaged):
    _, page = rendered
    _, result = triaged
    sections = {key: html.unescape(body) for key, body in _sections(page).items()}
    for verdict, rule in result.rules.items():
        assert rule in sections["pairs"], verdict
    suggestion = suggest_constraints(result)
    assert suggestion.groups[0] == ["fuel_price", "shift_length"]
    for library in ("xgboost", "lightgbm"):
        assert f"<pre>{suggestion.python_snippet(library)}</pre>" in sections["constraints"]
    assert suggestion.xgboost_param in sections["constraints"]
    cautions = sections["cautions"]
    for phrase in ("extrapolate", "not causation", "conventions", "model-risk review", "<code>min_h2</code>"):
        assert phrase in cautions


def test_feature_names_and_title_are_escaped(fitted, tmp_path):
    model, X, y = fitted
    # XGBoost refuses '<' in feature names, so the names are changed on the common graph.
    odd = ['fuel<price & "tax"', "shift>length", "crew_size", "route_km", "idle_minutes"]
    ens = replace(load_model(model), feature_names=tuple(odd))
    frame = X.set_axis(odd, axis=1)
    path = report(ens, frame, y, out=tmp_path / "odd.html", top_pairs=1, title="<b>Fleet</b> & co",
                  triage_options={"sample": 120, "resamples": 0, "null_refits": 0})
    page = path.read_text(encoding="utf-8")
    assert "fuel<price" not in page and "shift>length" not in page and "<b>Fleet" not in page
    assert str(escape(odd[0])) in page
    assert "shift&gt;length" in page
    assert "&lt;b&gt;Fleet&lt;/b&gt; &amp; co" in page
    # Escaped inside the figures too (SVG text is XML).
    assert "fuel&lt;price" in _sections(page)["dependence"]


def test_given_results_are_used_and_validation_shown(fitted, triaged, tmp_path):
    model, X, y = fitted
    ens, result = triaged
    suggestion = suggest_constraints(result)
    validation = validate_constraints(model, X, y, suggestion.groups, folds=2)
    path = report(ens, X, y, out=tmp_path / "checked.html", triage_result=result, suggestion=suggestion,
                  validation=validation, top_pairs=2)
    sections = _sections(path.read_text(encoding="utf-8"))
    assert sections["dependence"].count("<svg") == 2
    assert "supplied by the caller" in sections["summary"]
    constraints = sections["constraints"]
    assert "Over 2 cross-validation folds" in constraints and "rmse: constrained" in constraints
    fold_rows = re.findall(r"<tr><td class=\"num\">(\d+)</td><td>rmse</td>", constraints)
    assert fold_rows == ["1", "2"]


def test_categorical_feature_uses_its_categories(tmp_path):
    lgb = pytest.importorskip("lightgbm")
    rng = np.random.default_rng(1)
    n = 400
    depots = ["north", "south", "east", "west"]
    X = pd.DataFrame({"depot": pd.Categorical(rng.choice(depots, size=n), categories=depots),
                      "fuel_price": rng.uniform(0, 1, n), "crew_size": rng.uniform(0, 1, n)})
    lift = X["depot"].map({"north": 0.0, "south": 1.0, "east": 2.0, "west": 3.0}).astype(float)
    y = lift * X["fuel_price"] + X["crew_size"] + 0.05 * rng.normal(size=n)
    # One thread: LightGBM's default of all cores stalls for seconds on a busy shared machine.
    model = lgb.LGBMRegressor(n_estimators=30, num_leaves=8, min_child_samples=5, random_state=0, n_jobs=1,
                              verbose=-1).fit(X, y)
    path = report(model, X, y, out=tmp_path / "depots.html", top_pairs=1,
                  triage_options={"sample": 150, "resamples": 0, "null_refits": 0})
    dependence = _sections(path.read_text(encoding="utf-8"))["dependence"]
    # The formula's only product is depot x fuel_price, so that pair leads and is drawn.
    assert "<h3>depot × fuel_price</h3>" in dependence
    assert dependence.count("<svg") == 1
    for depot in depots:
        assert depot in dependence


def test_bad_options_raise_and_write_nothing(fitted, triaged, tmp_path):
    model, X, y = fitted
    _, result = triaged
    out = tmp_path / "never.html"
    with pytest.raises(ParameterError, match="top_pairs"):
        report(model, X, y, out=out, top_pairs=0)
    with pytest.raises(ParameterError, match="triage_result"):
        report(model, X, y, out=out, triage_result={"pairs": []})
    with pytest.raises(DataError, match="target column 'delay'"):
        report(model, X, "delay", out=out, triage_result=result)
    with pytest.raises(ParameterError, match="does not exist"):
        report(model, X, y, out=tmp_path / "missing" / "r.html", triage_result=result)
    with pytest.raises(DataError, match="lacks 1 of the model's 5 feature columns: idle_minutes"):
        report(model, X.drop(columns="idle_minutes"), y, out=out, triage_result=result)
    with pytest.raises(ParameterError, match="unknown option.*'samples'"):
        report(model, X, y, out=out, triage_options={"samples": 10})
    with pytest.raises(ParameterError, match="is a folder"):
        report(model, X, y, out=tmp_path, triage_result=result)
    assert list(tmp_path.iterdir()) == []


def test_additive_model_says_there_is_nothing_to_draw(tmp_path):
    # Depth-1 trees (stumps) cannot put two features on one path: every pair is absent, H = 0 exactly
    # (Friedman & Popescu 2008, section 8: H of an additive function is zero).
    X, _ = _data(n=200, seed=2)
    y = X.fuel_price + X.crew_size
    model = xgb.XGBRegressor(n_estimators=10, max_depth=1, n_jobs=1).fit(X, y)
    path = report(model, X, y, out=tmp_path / "additive.html",
                  triage_options={"sample": 100, "resamples": 0, "null_refits": 0})
    sections = _sections(path.read_text(encoding="utf-8"))
    assert list(sections) == list(SECTIONS)
    assert "0 interaction" in sections["summary"] and "1 absent" in sections["summary"]
    assert "the model is additive" in sections["pairs"]
    assert sections["dependence"].count("<svg") == 0 and "No pair shares a path" in sections["dependence"]
    assert sections["pair-map"].count("<svg") == 1


def test_missing_matplotlib_names_the_extra(fitted, triaged, tmp_path, monkeypatch):
    model, X, y = fitted
    _, result = triaged
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    with pytest.raises(MissingLibraryError, match=r"treeprobe\[plot\]"):
        report(model, X, y, out=tmp_path / "r.html", triage_result=result)
    assert not (tmp_path / "r.html").exists()


def test_page_renders_in_headless_chromium(rendered, tmp_path):
    chromium = _load_screenshot_script()
    if chromium.find_chromium() is None:
        pytest.skip("no chromium binary on PATH (Debian package 'chromium'); the browser check needs one")
    path, page = rendered
    dom, errors = chromium.dump_dom(path)
    assert errors == []
    for key in SECTIONS:
        assert f'<section id="{key}">' in dom
    assert dom.count("<svg") == page.count("<svg")
    png = tmp_path / "report.png"
    errors = chromium.screenshot(path, png, width=1280, height=4000)
    assert errors == []
    from matplotlib.image import imread

    pixels = imread(png)
    assert pixels.shape[:2] == (4000, 1280)
    # Not a blank page: a real share of the pixels is ink, not white background.
    ink = (pixels[..., :3] < 0.9).any(axis=-1).mean()
    assert ink > 0.02, ink
