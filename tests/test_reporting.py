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
from treeprobe.constraints import suggest_constraints, validate_constraints
from treeprobe.errors import MissingLibraryError, ParameterError
from treeprobe.reporting import SECTIONS, report
from treeprobe.reporting.figures import Canvas, arc_layout, draw_arc_diagram, pair_map_marks, pair_map_svg, pyplot
from treeprobe.reporting.page import _PAIR_COLUMNS
from treeprobe.verdicts import VERDICTS, triage

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


@pytest.fixture(scope="module")
def validated(fitted, triaged):
    model, X, y = fitted
    _, result = triaged
    suggestion = suggest_constraints(result)
    return suggestion, validate_constraints(model, X, y, suggestion.groups, folds=2)


def test_given_results_are_used_and_validation_shown(fitted, triaged, validated, tmp_path):
    model, X, y = fitted
    ens, result = triaged
    suggestion, validation = validated
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
    with pytest.raises(ParameterError, match=r"unknown option.*'samples'"):
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


# ------------------------------------------------------------------ faults fixed in the reshape
def _noise_pair_on_top(result):
    """The triage with its absent noise pair turned into the map's highest point: H² 0.9 of a tiny h."""
    pairs = result.pairs.copy()
    row = pairs.index[(pairs["feature_a"] == "idle_minutes") | (pairs["feature_b"] == "idle_minutes")][0]
    pairs.loc[row, ["verdict", "h2", "effect", "strength", "cover_share"]] = ["co-split", 0.9, 1e-4, 1e-4, 0.01]
    return replace(result, pairs=pairs), pairs.loc[row]


def test_pair_map_marks_a_high_pair_of_negligible_size(triaged):
    # The generating formula gives idle_minutes no effect at all, so a high H² for it is a share of nothing.
    _, result = triaged
    noisy, top = _noise_pair_on_top(result)
    marks = pair_map_marks(noisy.pairs, noisy.thresholds)
    highest = marks.loc[marks["h2"].idxmax()]
    assert (highest["feature_a"], highest["feature_b"]) == (top["feature_a"], top["feature_b"])
    assert highest["negligible"] and highest["labelled"]
    # The product pair is large in h (3 * fuel_price * shift_length): never marked negligible.
    lead = marks[(marks["feature_a"] == "fuel_price") & (marks["feature_b"] == "shift_length")].iloc[0]
    assert not lead["negligible"] and lead["labelled"]
    # Low points (below min_h2) need no warning, whatever their size.
    assert not marks.loc[marks["h2"] < noisy.thresholds["min_h2"], "negligible"].any()
    svg = pair_map_svg(Canvas(pyplot()), noisy.pairs, noisy.thresholds)
    assert f"{top['feature_a']} × {top['feature_b']} (h negligible)" in html.unescape(svg)


def test_pair_map_caption_does_not_call_high_points_interactions(rendered):
    _, page = rendered
    pair_map = html.unescape(_sections(page)["pair-map"])
    assert "Pairs high up interact" not in pair_map
    assert "h negligible" in pair_map and "min_effect" in pair_map


def test_summary_says_where_the_triage_came_from(fitted, triaged, tmp_path, capsys):
    model, X, y = fitted
    _, result = triaged
    given = report(model, X, y, out=tmp_path / "given.html", triage_result=result, top_pairs=1,
                   triage_origin="run by the fleet's nightly job", progress=True)
    summary = html.unescape(_sections(given.read_text(encoding="utf-8"))["summary"])
    assert "<th>Triage</th><td>run by the fleet's nightly job (it took" in summary
    assert "supplied by the caller" not in summary
    # Progress goes through treeprobe.progress (tqdm) on standard error.
    assert "report figures" in capsys.readouterr().err
    with pytest.raises(ParameterError, match="triage_origin"):
        report(model, X, y, out=tmp_path / "never.html", triage_origin="somewhere")
    assert not (tmp_path / "never.html").exists()


def test_computed_triage_is_said_to_be_run_here(rendered):
    _, page = rendered
    assert "<th>Triage</th><td>run by this report (it took" in _sections(page)["summary"]


def test_summary_says_which_pairs_get_intervals(rendered):
    _, page = rendered
    summary = " ".join(_sections(page)["summary"].split())
    assert ("3 half-size row subsamples, 90% subsampling interval, for the pairs whose effect reaches 0.05 of the "
            "prediction spread") in summary


def test_report_command_says_it_ran_the_triage(fitted, tmp_path):
    from treeprobe.cli import main

    model, X, y = fitted
    saved = tmp_path / "fleet.json"
    model.save_model(saved)
    data = tmp_path / "fleet.csv"
    X.assign(late_minutes=y).to_csv(data, index=False)
    page = tmp_path / "cli.html"
    assert main(["report", str(saved), "--data", str(data), "--target", "late_minutes", "--sample", "120",
                 "--resamples", "0", "--null-refits", "0", "--top-pairs", "1", "-o", str(page), "--quiet"]) == 0
    summary = _sections(page.read_text(encoding="utf-8"))["summary"]
    assert "run by the treeprobe report command" in summary and "supplied by the caller" not in summary


def test_fold_numbers_run_from_one_to_k(fitted, triaged, validated, tmp_path):
    model, X, y = fitted
    ens, result = triaged
    suggestion, validation = validated
    k = validation.summary["n_folds"]
    for shift in (0, 1):
        # The table reads 1..K whether the validation numbers its folds from 0 or from 1.
        folds = validation.folds.assign(fold=validation.folds["fold"] - validation.folds["fold"].min() + shift)
        path = report(ens, X, y, out=tmp_path / f"folds{shift}.html", triage_result=result, suggestion=suggestion,
                      validation=replace(validation, folds=folds), top_pairs=1)
        constraints = _sections(path.read_text(encoding="utf-8"))["constraints"]
        numbers = re.findall(r"<tr><td class=\"num\">(\d+)</td><td>rmse</td>", constraints)
        assert numbers == [str(i) for i in range(1, k + 1)], shift


def test_pair_table_shows_only_columns_the_triage_has(rendered, triaged):
    # Every column of the table is one the triage documents and returns: no dead column such as an unused floor.
    _, result = triaged
    _, page = rendered
    assert all(field in result.pairs.columns for field, _, _ in _PAIR_COLUMNS)
    headers = re.findall(r"<th>([^<]*)</th>", _sections(page)["pairs"])
    assert "H² floor" not in headers
    assert headers[4:] == [header for _, header, _ in _PAIR_COLUMNS]


def test_tally_and_rules_follow_the_one_verdict_order(rendered):
    _, page = rendered
    summary, pairs = _sections(page)["summary"], _sections(page)["pairs"]
    tally = re.findall(r'<span class="verdict verdict-([a-z-]+)">', summary)
    assert tally == list(VERDICTS)
    rules = re.findall(r'<dt class="verdict verdict-([a-z-]+)">', pairs)
    assert rules == list(VERDICTS)


def test_rule_texts_come_only_from_the_triage_result(triaged, fitted, tmp_path):
    model, X, y = fitted
    ens, result = triaged
    own = {verdict: f"Rule text number {i} of this triage." for i, verdict in enumerate(VERDICTS)}
    path = report(ens, X, y, out=tmp_path / "rules.html", triage_result=replace(result, rules=own), top_pairs=1)
    page = html.unescape(path.read_text(encoding="utf-8"))
    for text in own.values():
        assert page.count(text) == 1
    for text in result.rules.values():
        assert text not in page


def test_arc_layout_orders_by_groups_and_puts_dependent_below():
    pairs = pd.DataFrame({
        "feature_a": ["fuel_price", "crew_size", "fuel_price", "route_km", "crew_size"],
        "feature_b": ["shift_length", "route_km", "route_km", "idle_minutes", "idle_minutes"],
        "verdict": ["interaction", "interaction", "interaction", "dependent", "co-split"],
        "strength": [0.6, 0.3, 0.1, 0.2, 0.01]})
    used = ["crew_size", "fuel_price", "idle_minutes", "route_km", "shift_length", "depot_code"]
    # Overlapping groups (maximal cliques) and a group of one, as suggest_constraints can return them.
    layout = arc_layout(pairs, used, [["fuel_price", "shift_length"], ["crew_size", "route_km"],
                                      ["fuel_price", "route_km"], ["depot_code"]])
    assert layout.features["feature"].tolist() == ["fuel_price", "shift_length", "crew_size", "route_km",
                                                   "idle_minutes", "depot_code"]
    assert layout.features["group"].tolist() == [1, 1, 2, 2, 0, 0]
    # Group 3 (fuel_price, route_km) is not contiguous: one band per run of its members, none for the group of one.
    assert layout.bands.values.tolist() == [[1, 0, 1], [2, 2, 3], [3, 0, 0], [3, 3, 3]]
    arcs = layout.arcs.set_index(["feature_a", "feature_b"])
    assert len(arcs) == 4  # the co-split pair is not drawn
    assert arcs.loc[("route_km", "idle_minutes"), "side"] == -1
    assert (arcs.loc[arcs["verdict"] == "interaction", "side"] == 1).all()
    widths = arcs.loc[[("fuel_price", "shift_length"), ("crew_size", "route_km"), ("fuel_price", "route_km")],
                      "width"].to_numpy()
    assert widths[0] > widths[1] > widths[2]


@pytest.mark.parametrize("names", [NAMES, [f"depot_{i}_average_load_kg" for i in range(24)]])
def test_arc_diagram_names_do_not_touch_markers_or_each_other(names):
    n = len(names)
    pairs = pd.DataFrame({"feature_a": [names[0], names[1], names[2]], "feature_b": [names[1], names[n - 1], names[3]],
                          "verdict": ["interaction", "interaction", "dependent"], "strength": [0.5, 0.2, 0.3]})
    layout = arc_layout(pairs, names, [names[:2], names[2:4]])
    fig = draw_arc_diagram(Canvas(pyplot()), layout)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    ax = fig.axes[0]
    boxes = [t.get_window_extent(renderer) for t in ax.texts if t.get_text() in names]
    assert len(boxes) == n
    radius = 7.0 / 2 * fig.dpi / 72
    markers = [line for line in ax.lines if line.get_marker() == "o" and line.get_markersize() == 7.0]
    # No node sizing by importance: every feature marker has one size.
    assert sum(len(line.get_xdata()) for line in markers) == n
    centres = np.vstack([ax.transData.transform(np.column_stack([line.get_xdata(), line.get_ydata()]))
                         for line in markers if len(line.get_xdata())])
    for box in boxes:
        near_x = (centres[:, 0] + radius > box.x0) & (centres[:, 0] - radius < box.x1)
        near_y = (centres[:, 1] + radius > box.y0) & (centres[:, 1] - radius < box.y1)
        assert not (near_x & near_y).any()
    for i, first in enumerate(boxes):
        for second in boxes[i + 1:]:
            assert not first.overlaps(second)
    pyplot().close(fig)


def test_template_ships_with_the_package():
    import tomllib

    root = Path(__file__).resolve().parents[1]
    patterns = tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]["package-data"]["treeprobe"]
    shipped = {p.relative_to(root / "treeprobe").as_posix() for pattern in patterns
               for p in (root / "treeprobe").glob(pattern)}
    assert "reporting/templates/page.html.j2" in shipped


def test_report_loads_the_model_once(fitted, monkeypatch, tmp_path):
    import treeprobe.reporting as reporting

    model, X, y = fitted
    calls = []

    def counting(source, *args, **kwargs):
        calls.append(source)
        return load_model(source, *args, **kwargs)

    monkeypatch.setattr(reporting, "load_model", counting)
    report(model, X, y, out=tmp_path / "once.html", top_pairs=1,
           triage_options={"sample": 100, "resamples": 0, "null_refits": 0})
    assert calls == [model]


def test_search_curve_table_and_chosen_groups_appear(fitted, triaged, tmp_path, monkeypatch):
    """A constraint search (one thread per fit) passed to the report: its curve, steps and chosen groups.

    Reference: the generating formula, whose one interaction is fuel_price x shift_length.
    """
    from treeprobe import search as search_module

    monkeypatch.setattr(search_module, "threads_per_fit", lambda n_jobs: 1)
    model, X, y = fitted
    ens, result = triaged
    searched = search_module.search_constraints(model, X, y, triage_result=result, folds=2, max_steps=2,
                                                max_candidates=2, progress=False)
    path = report(ens, X, y, out=tmp_path / "searched.html", triage_result=result, search=searched, top_pairs=1)
    page = path.read_text(encoding="utf-8")
    constraints = _sections(page)["constraints"]
    assert constraints.count("<svg") == 1
    assert "Groups chosen by held-out loss" in constraints and "one standard error" in constraints
    steps = re.findall(r'<tr><td class="num">(\d+)</td><td>(start: every feature alone|join [^<]+|add [^<]+)</td>',
                       constraints)
    assert [int(step) for step, _ in steps] == searched.steps["step"].tolist()
    assert steps[1][1] == "join fuel_price, shift_length"
    assert searched.chosen_groups[0] == ["fuel_price", "shift_length"]
    assert f"Chosen groups (step {searched.chosen_step}):" in constraints
    assert f"num_boost_round = {searched.recommended_rounds}" in constraints
    assert html.escape(searched.suggestion.xgboost_param) in constraints
    ids = Counter(re.findall(r'\sid="([^"]+)"', page))
    assert max(ids.values()) == 1
    with pytest.raises(ParameterError, match="search must be a SearchResult"):
        report(ens, X, y, out=tmp_path / "never.html", triage_result=result, search="steps")
    assert not (tmp_path / "never.html").exists()


def test_faint_pair_is_marked_in_the_pair_table(fitted, triaged, tmp_path):
    """A pair whose h clears the noise floor while under min_effect carries the 'faint' note in its verdict cell."""
    model, X, y = fitted
    _, result = triaged
    pairs = result.pairs.copy()
    pairs["faint"] = False
    row = pairs.index[pairs["verdict"] == "co-split"][0]
    pairs.loc[row, "faint"] = True
    path = tmp_path / "faint.html"
    report(model, X.assign(late_minutes=y), "late_minutes", out=path, triage_result=replace(result, pairs=pairs),
           top_pairs=TOP_PAIRS)
    table = _sections(path.read_text(encoding="utf-8"))["pairs"]
    assert table.count("faint: clears the floor, small") == 1
    marked = re.search(r"<tr>(?:(?!</tr>).)*faint: clears the floor(?:(?!</tr>).)*</tr>", table, re.S).group(0)
    assert f"<td>{escape(pairs.loc[row, 'feature_a'])}</td><td>{escape(pairs.loc[row, 'feature_b'])}</td>" in marked
