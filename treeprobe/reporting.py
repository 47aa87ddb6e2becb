"""One self-contained HTML page with the whole picture of a model's feature interactions.

:func:`report` runs (or takes) the triage of :mod:`treeprobe.verdicts` and the
constraint suggestion of :mod:`treeprobe.constraints`, draws the figures with
matplotlib, and writes a single HTML file: inline CSS, figures as inline SVG,
no scripts and no link to anything outside the file, so it opens from disk,
can be mailed as it is, and prints.

Sections of the page, each an HTML ``<section>`` whose ``id`` is listed in
:data:`SECTIONS`:

``summary``
    Model, data, what was computed, how long each step took, tally of verdicts.
``pairs``
    Ranked pair table with verdicts (text label and a marker glyph), the rule
    of each verdict, and the numbers behind them.
``pair-map``
    Path structure (``cover_share``) against H² for every pair, one marker
    shape and fill per verdict.
``graph``
    Features as nodes (area by gain), pairs as edges (line style by verdict).
``dependence``
    For the leading pairs: partial dependence of one feature at fixed values
    of the other (Friedman 2001 [1]_, eq. 9), and the two-way surface.
``rounds``
    When the leading pairs entered the model: cumulative nested gain over
    boosting rounds.
``constraints``
    Suggested interaction-constraint groups, the parameters and snippets to
    copy, and the cross-validated cost when a validation is given.
``cautions``
    What the numbers cannot say, and the thresholds used.

Colours come from the palette of Okabe and Ito [3]_, which colour-blind
readers can tell apart, and every colour is doubled by a marker shape, a fill
or a line style, so the page also reads in greyscale. Surfaces use the
'cividis' colour map, designed to read the same with colour-vision
deficiency and in greyscale [4]_.

References
----------
.. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", Annals of Statistics 29(5), 1189-1232, 2001.
.. [2] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 916-954, 2008.
.. [3] M. Okabe and K. Ito, "Color universal design (CUD): how to make
   figures and presentations that are friendly to colorblind people", 2008.
.. [4] J. R. Nuñez, C. R. Anderton and R. S. Renslow, "Optimizing colormaps
   with consideration for color vision deficiency to enable accurate
   interpretation of scientific data", PLOS ONE 13(7), e0199239, 2018.
"""

from __future__ import annotations

import datetime as _datetime
import html
import inspect
import io
import math
import os
import re
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError, MissingLibraryError
from .graph import ForestGraph
from .output import atomic_write
from .progress import progress_bar

__all__ = ["report", "SECTIONS", "VERDICT_STYLES"]

SECTIONS = ("summary", "pairs", "pair-map", "graph", "dependence", "rounds", "constraints", "cautions")

# Okabe & Ito (2008) colours, each doubled by a marker shape and fill (figures), a glyph (tables) and a
# line style (graph edges), so a verdict never rests on colour alone.
VERDICT_STYLES = {
    "interaction": {"colour": "#D55E00", "marker": "o", "filled": True, "glyph": "\u25cf", "line": "solid"},
    "dependent": {"colour": "#E69F00", "marker": "^", "filled": True, "glyph": "\u25b2", "line": "dashed"},
    "co-split": {"colour": "#0072B2", "marker": "s", "filled": False, "glyph": "\u25a1", "line": "dotted"},
    "absent": {"colour": "#7F7F7F", "marker": "x", "filled": True, "glyph": "\u00d7", "line": "none"},
}
_LINE_STYLES = ["solid", "dashed", "dashdot", "dotted", (0, (5, 1, 1, 1, 1, 1)), (0, (8, 2))]
_LINE_MARKERS = ["o", "s", "^", "D", "v", "P"]
_SERIES_COLOURS = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9"]
_MAX_TABLE_PAIRS = 40
_MAX_DOTTED_EDGES = 30
_MAP_LABELS = 6
_LINE_QUANTILES = (0.1, 0.3, 0.5, 0.7, 0.9)
_CURVE_POINTS = 30
_SURFACE_POINTS = 24
_MAX_CATEGORIES = 20
_MAX_CATEGORY_LINES = 6

_CSS = """
:root { --ink: #1a1a1a; --muted: #555; --rule: #c8c8c8; --band: #f3f3f3; }
* { box-sizing: border-box; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif;
       color: var(--ink); background: #fff; margin: 0; line-height: 1.45; font-size: 15px; }
main { max-width: 1200px; margin: 0 auto; padding: 24px 20px 48px; }
h1 { font-size: 1.7em; margin: 0.2em 0 0.1em; }
h2 { font-size: 1.3em; border-bottom: 2px solid var(--ink); padding-bottom: 2px; margin-top: 1.8em; }
h3 { font-size: 1.05em; margin: 1.2em 0 0.3em; }
p.lede { color: var(--muted); margin-top: 0; }
nav ol { columns: 2; padding-left: 1.6em; margin: 0.6em 0; max-width: 52em; }
nav a { color: var(--ink); }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.8em; }
.wide { overflow-x: auto; max-width: 100%; }
th, td { border-bottom: 1px solid var(--rule); padding: 3px 7px; text-align: left; vertical-align: top; }
.interval { color: var(--muted); font-size: 0.9em; }
th { background: var(--band); font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.facts th { background: none; width: 16em; }
.verdict { white-space: nowrap; font-weight: 600; padding-left: 6px; }
.verdict-interaction { border-left: 5px solid #D55E00; }
.verdict-dependent { border-left: 5px dashed #E69F00; }
.verdict-co-split { border-left: 5px dotted #0072B2; }
.verdict-absent { border-left: 5px double #7F7F7F; }
.glyph { display: inline-block; width: 1.1em; text-align: center; }
dl.rules dt { font-weight: 600; margin-top: 0.4em; }
dl.rules dd { margin-left: 1.6em; }
figure { margin: 0.8em 0 1.4em; page-break-inside: avoid; break-inside: avoid; }
figure svg { max-width: 100%; height: auto; display: block; }
figcaption { color: var(--muted); font-size: 0.9em; max-width: 70em; }
pre { background: var(--band); border: 1px solid var(--rule); padding: 8px 10px; overflow-x: auto;
      font-size: 0.85em; white-space: pre-wrap; }
.tally { font-size: 1.05em; }
.note { color: var(--muted); }
footer { color: var(--muted); font-size: 0.85em; margin-top: 3em; border-top: 1px solid var(--rule); padding-top: 6px; }
@media print {
  body { font-size: 11pt; }
  main { max-width: none; padding: 0; }
  nav { display: none; }
  h2 { page-break-after: avoid; break-after: avoid; }
  table, pre { page-break-inside: avoid; break-inside: avoid; }
}
"""


# ------------------------------------------------------------------ formatting
def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _num(value: Any, digits: int = 3) -> str:
    """Number with ``digits`` significant digits; '-' for missing."""
    if value is None:
        return "-"
    try:
        number = float(value)
    except (TypeError, ValueError):
        return _e(value)
    if math.isnan(number):
        return "-"
    if number == 0:
        return "0"
    if float(number).is_integer() and abs(number) < 1e6:
        return f"{int(number):,}"
    if abs(number) >= 1e6 or abs(number) < 10 ** (-digits):
        return f"{number:.{digits - 1}e}"
    return f"{number:.{digits}g}" if abs(number) < 10 ** digits else f"{number:,.0f}"


def _seconds(value: float) -> str:
    return f"{value:.2f} s" if value < 10 else f"{value:.1f} s"


def _verdict_cell(verdict: str) -> str:
    style = VERDICT_STYLES.get(verdict, VERDICT_STYLES["absent"])
    return (f'<td class="verdict verdict-{_e(verdict)}"><span class="glyph" aria-hidden="true">{style["glyph"]}</span>'
            f"{_e(verdict)}</td>")


def _table(headers: list[str], rows: list[list[str]], *, numeric: set[int] | None = None, css: str = "") -> str:
    """An HTML table from pre-escaped cells; cells already starting with ``<td`` are kept as they are."""
    numeric = numeric or set()
    head = "".join(f"<th>{h}</th>" for h in headers)
    body = []
    for row in rows:
        cells = []
        for i, cell in enumerate(row):
            if cell.startswith("<td"):
                cells.append(cell)
            else:
                cells.append(f'<td class="num">{cell}</td>' if i in numeric else f"<td>{cell}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    css_attr = f' class="{css}"' if css else ""
    return f"<table{css_attr}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _figure(svg: str, caption: str) -> str:
    return f"<figure>{svg}<figcaption>{caption}</figcaption></figure>"


# ------------------------------------------------------------------ matplotlib
def _pyplot() -> Any:
    try:
        import matplotlib
    except ImportError:
        raise MissingLibraryError(
            "the HTML report draws its figures with matplotlib, which is not installed; "
            "install it with: pip install 'treeprobe[plot]'"
        ) from None
    # The report draws off-screen; selecting Agg here (not at package import) leaves a user's backend alone elsewhere.
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


class _Canvas:
    """Turns matplotlib figures into inline SVG with ids unique within the page and no external references."""

    _HEADER = re.compile(r"^.*?(?=<svg)", re.S)
    _METADATA = re.compile(r"<metadata>.*?</metadata>\s*", re.S)
    # An id, or a reference to one, inside a tag (the lookahead reaches the tag's '>' without meeting a '<').
    _ID = re.compile(r'(?<=\s)id="([^"]*)"(?=[^<>]*>)')
    _HREF = re.compile(r'(?<=\s)((?:xlink:)?href)="#([^"]*)"(?=[^<>]*>)')
    _URL = re.compile(r"url\(#([^)]*)\)(?=[^<>]*>)")

    def __init__(self, plt: Any) -> None:
        self.plt = plt
        self.count = 0
        self.style = {
            "svg.fonttype": "none",
            "font.size": 10,
            "axes.spines.top": False,
            "axes.spines.right": False,
            "axes.grid": True,
            "grid.color": "#dddddd",
            "grid.linewidth": 0.6,
            "axes.axisbelow": True,
            "savefig.bbox": "tight",
            "savefig.pad_inches": 0.05,
        }
        if "text.parse_math" in plt.rcParams:
            # Feature names are data: a '$' in a name must print as a dollar sign, not start math mode.
            self.style["text.parse_math"] = False

    def figure(self, *args: Any, **kwargs: Any) -> Any:
        with self.plt.rc_context(self.style):
            return self.plt.subplots(*args, **kwargs)

    def svg(self, fig: Any) -> str:
        self.count += 1
        buffer = io.StringIO()
        # Several SVGs share one HTML document: a per-figure salt keeps their element ids distinct and stable.
        with self.plt.rc_context({**self.style, "svg.hashsalt": f"treeprobe-figure-{self.count}"}):
            fig.savefig(buffer, format="svg", metadata={"Date": None}, bbox_inches="tight")
        self.plt.close(fig)
        text = self._METADATA.sub("", self._HEADER.sub("", buffer.getvalue(), count=1))
        # matplotlib numbers its element ids per figure (figure_1, axes_1, ...); one page holds many figures and
        # ids must be unique in an HTML document, so each figure's ids and references get their own prefix.
        prefix = f"tp{self.count}-"
        text = self._ID.sub(lambda m: f'id="{prefix}{m.group(1)}"', text)
        text = self._HREF.sub(lambda m: f'{m.group(1)}="#{prefix}{m.group(2)}"', text)
        text = self._URL.sub(lambda m: f"url(#{prefix}{m.group(1)})", text)
        return text.strip()


def _verdict_legend_handles(verdicts: list[str]) -> list[Any]:
    from matplotlib.lines import Line2D

    handles = []
    for verdict in verdicts:
        style = VERDICT_STYLES[verdict]
        handles.append(Line2D([], [], linestyle="none", marker=style["marker"], markersize=8,
                              markeredgecolor=style["colour"], markeredgewidth=1.6,
                              markerfacecolor=style["colour"] if style["filled"] else "white", label=verdict))
    return handles


# ------------------------------------------------------------------ checks
def _check_out(out: Any) -> Path:
    if not isinstance(out, (str, os.PathLike)) or not str(out):
        raise DataError(f"out must be a file path, got {out!r}")
    return Path(out)


def _check_instance(value: Any, kind: type, name: str) -> Any:
    if value is not None and not isinstance(value, kind):
        raise DataError(f"{name} must be a {kind.__name__} or None, got {type(value).__name__}")
    return value


def _features_of(X: Any, y: Any) -> Any:
    """``X`` without the target column when ``y`` names one."""
    if isinstance(y, str):
        if not isinstance(X, pd.DataFrame):
            raise DataError(f"y={y!r} names a column, but X is not a DataFrame")
        if y not in X.columns:
            raise DataError(f"target column {y!r} is not in the data; columns are {', '.join(map(str, X.columns))}")
        return X.drop(columns=[y])
    return X


# ------------------------------------------------------------------ data for the figures
def _category_labels(ens: ForestGraph, feature: int) -> list[str] | None:
    levels = (ens.metadata.get("category_levels") or {}).get(ens.feature_names[feature])
    return [str(level) for level in levels] if levels is not None else None


def _axis_values(ens: ForestGraph, matrix: np.ndarray, feature: int, points: int) -> tuple[np.ndarray, bool]:
    """Grid values of one feature: its most frequent categories, or quantiles of its observed values."""
    column = matrix[:, feature]
    column = column[~np.isnan(column)]
    if column.size == 0:
        raise DataError(f"column {ens.feature_names[feature]!r} is missing (NaN) in every sampled row")
    if ens.feature_types[feature] == "categorical":
        values, counts = np.unique(column.astype(np.int64), return_counts=True)
        keep = np.sort(values[np.argsort(-counts, kind="stable")[:_MAX_CATEGORIES]])
        return keep.astype(np.float64), True
    return np.unique(np.quantile(column, np.linspace(0.02, 0.98, points))), False


def _fixed_values(ens: ForestGraph, matrix: np.ndarray, feature: int) -> tuple[np.ndarray, list[str]]:
    """Values at which the second feature is held: quantiles (numeric) or the most frequent categories."""
    column = matrix[:, feature]
    column = column[~np.isnan(column)]
    if ens.feature_types[feature] == "categorical":
        values, counts = np.unique(column.astype(np.int64), return_counts=True)
        keep = np.sort(values[np.argsort(-counts, kind="stable")[:_MAX_CATEGORY_LINES]])
        labels = _category_labels(ens, feature)
        names = [labels[v] if labels is not None and 0 <= v < len(labels) else str(v) for v in keep]
        return keep.astype(np.float64), names
    values = np.quantile(column, _LINE_QUANTILES)
    _, first = np.unique(values, return_index=True)
    first = np.sort(first)
    return values[first], [f"{q:.0%} quantile = {_num(v)}" for q, v in zip(np.asarray(_LINE_QUANTILES)[first], values[first])]


def _pair_key(a: Any, b: Any) -> frozenset:
    return frozenset((str(a), str(b)))


def _leading_pairs(pairs: pd.DataFrame, count: int) -> pd.DataFrame:
    """Interaction and dependent pairs by strength, then the other pairs sharing paths in triage order."""
    strong = pairs[pairs["verdict"].isin(["interaction", "dependent"])].sort_values("strength", ascending=False,
                                                                                   kind="stable")
    rest = pairs[~pairs["verdict"].isin(["interaction", "dependent", "absent"])]
    return pd.concat([strong, rest]).head(count)


# ------------------------------------------------------------------ sections
def _summary_section(ens: ForestGraph, result: Any, X_rows: int, target_text: str, steps: list[tuple[str, float]],
                     computed_here: bool) -> str:
    facts = result.facts
    info = ens.summary()
    model_rows = [
        ("Source", _e(info["source"])),
        ("Library / objective", f"{_e(info['library'])} / {_e(info['objective'] or '-')} (link: {_e(info['link'])})"),
        ("Trees", f"{info['n_trees']:,} ({_num(info['mean_leaves'])} leaves on average, at most {info['max_leaves']:,})"),
        ("Outputs", f"{info['n_outputs']}" + (f" (this report: output {facts.get('output', 0)})" if info["n_outputs"] > 1 else "")),
        ("Depth", f"at most {info['max_depth']}, {_num(info['mean_tree_depth'])} on average"),
        ("Features", f"{info['n_features_used']} used of {info['n_features']}"
                     + (f" ({info['n_categorical_features']} categorical)" if info["n_categorical_features"] else "")),
    ]
    n_rows = facts.get("n_rows")
    available = facts.get("n_rows_available", X_rows)
    resamples = int(facts.get("resamples", 0) or 0)
    refits = int(facts.get("null_refits", 0) or 0)
    data_rows = [
        ("Rows", f"{_num(n_rows)} used for H-statistics and dependence, of {_num(available)} available"),
        ("Target", target_text),
    ]
    computed_rows = [
        ("Path structure", "every root-to-leaf path of every tree (no data needed)"),
        ("H-statistics", f"Friedman &amp; Popescu (2008) H² of every pair sharing a path, exact for trees, on "
                         f"{_num(n_rows)} rows"),
        ("Interval", f"{resamples} half-size row subsamples, {result.thresholds.get('confidence', 0.9):.0%} subsampling interval"
         if resamples else "none (no resamples): point values only"),
        ("Noise floor", f"{refits} refits on targets without interaction" if refits
         else "no refits: the floor is the convention min_h2 only"),
    ]
    if not computed_here:
        computed_rows.append(("Triage", f"supplied by the caller (it took {_seconds(float(facts.get('seconds', 0.0)))})"))
    tally = result.pairs["verdict"].value_counts()
    tally_text = " · ".join(
        f'<span class="verdict-{v}" style="padding-left:4px">{VERDICT_STYLES[v]["glyph"]} {int(tally.get(v, 0))} {v}</span>'
        for v in ("interaction", "dependent", "co-split", "absent"))

    def facts_table(rows: list[tuple[str, str]]) -> str:
        return '<table class="facts"><tbody>' + "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in rows) + \
            "</tbody></table>"

    timing = _table(["Step", "Time"], [[_e(name), _seconds(seconds)] for name, seconds in steps]
                    + [["<strong>total</strong>", _seconds(sum(s for _, s in steps))]], numeric={1})
    return (
        f'<p class="tally"><strong>{len(result.pairs):,} feature pairs:</strong> {tally_text}</p>'
        f"<h3>Model</h3>{facts_table(model_rows)}"
        f"<h3>Data</h3>{facts_table(data_rows)}"
        f"<h3>What was computed</h3>{facts_table(computed_rows)}"
        f"<h3>Time per step</h3>{timing}"
    )


def _interval(low: Any, high: Any) -> str:
    return "-" if pd.isna(low) or pd.isna(high) else f"[{_num(low)}, {_num(high)}]"


def _with_interval(row: dict, point: str) -> str:
    low, high = row.get(f"{point}_low"), row.get(f"{point}_high")
    if low is None or high is None or pd.isna(low) or pd.isna(high):
        return _num(row[point])
    return f'{_num(row[point])}<br><span class="interval">{_interval(low, high)}</span>'


# Columns of the pair table: the fields a column needs, its header and how to show a row. A column is shown when
# the triage provides its fields, so the table follows the triage's columns as they are documented there.
_PAIR_COLUMNS = (
    (("strength",), "Strength (h / sd)", lambda r: _num(r["strength"])),
    (("h2",), "H² [interval]", lambda r: _with_interval(r, "h2")),
    (("floor",), "H² floor", lambda r: _num(r["floor"])),
    (("null_h2",), "Null H²", lambda r: _num(r["null_h2"])),
    (("h",), "h [interval]", lambda r: _with_interval(r, "h")),
    (("null_h",), "Noise floor of h", lambda r: _num(r["null_h"])),
    (("dependence",), "Dependence", lambda r: _num(r["dependence"])),
    (("paths",), "Paths", lambda r: _num(r["paths"])),
    (("cover_share",), "Cover share", lambda r: _num(r["cover_share"])),
    (("nested_gain",), "Nested gain", lambda r: _num(r["nested_gain"])),
)


def _pairs_section(result: Any) -> str:
    pairs = result.pairs
    shown = pairs[pairs["verdict"] != "absent"].head(_MAX_TABLE_PAIRS)
    columns = [(header, show) for fields, header, show in _PAIR_COLUMNS if all(f in pairs.columns for f in fields)]
    headers = ["#", "Feature a", "Feature b", "Verdict"] + [header for header, _ in columns]
    rows = []
    for rank, row in enumerate(shown.to_dict(orient="records"), start=1):
        verdict = str(row["verdict"])
        verdict_cell = _verdict_cell(verdict)
        if verdict == "dependent" and "leans" in row:
            verdict_cell = verdict_cell[: -len("</td>")] + f'<br><span class="note">leans {_e(row["leans"])}</span></td>'
        rows.append([str(rank), _e(row["feature_a"]), _e(row["feature_b"]), verdict_cell]
                    + [show(row) for _, show in columns])
    absent = int((pairs["verdict"] == "absent").sum())
    more = int((pairs["verdict"] != "absent").sum()) - len(shown)
    notes = []
    if more > 0:
        notes.append(f"{more} further pair(s) sharing paths are not shown (the table stops at {_MAX_TABLE_PAIRS}).")
    if absent:
        notes.append(f"{absent} pair(s) never share a path (verdict absent, H² = 0 exactly) and are left out.")
    rules = "".join(
        f'<dt class="verdict verdict-{_e(v)}"><span class="glyph" aria-hidden="true">{VERDICT_STYLES.get(v, VERDICT_STYLES["absent"])["glyph"]}'
        f"</span>{_e(v)}</dt><dd>{_e(text)}</dd>" for v, text in result.rules.items())
    table = f'<div class="wide">{_table(headers, rows, numeric=set(range(4, len(headers))) | {0})}</div>' if rows \
        else '<p class="note">No pair of features shares a root-to-leaf path: the model is additive.</p>'
    return (
        "<p>Pairs ranked by verdict, then by strength: the interaction effect h as a share of the spread (standard "
        "deviation) of the model's raw predictions.</p>"
        f"{table}"
        + "".join(f'<p class="note">{_e(n)}</p>' for n in notes)
        + f'<h3>How each verdict is given</h3><dl class="rules">{rules}</dl>'
        "<p class=\"note\">Columns: H² is Friedman &amp; Popescu's (2008, eq. 44) share of the pair's joint partial "
        "dependence variance not explained by the two single-feature effects; h is its unnormalised square root "
        "(in raw prediction units); intervals are subsampling intervals over half-size row subsamples; floors "
        "and null values are the largest values expected from refits on targets without interaction; dependence is the larger of |Spearman's rank correlation| and the "
        "information correlation; paths, cover share and nested gain describe how often, for how much of the "
        "training cover and with how much gain the trees split on both features on one path.</p>"
    )


def _pair_map_figure(canvas: _Canvas, result: Any) -> str:
    pairs = result.pairs
    fig, ax = canvas.figure(figsize=(8.4, 5.2))
    present = [v for v in VERDICT_STYLES if (pairs["verdict"] == v).any()]
    for verdict in present:
        style = VERDICT_STYLES[verdict]
        part = pairs[pairs["verdict"] == verdict]
        # A line marker such as 'x' has no face: matplotlib takes its colour from the face colour alone.
        colours = ({"c": style["colour"]} if style["marker"] in ("x", "+") else
                   {"facecolors": style["colour"] if style["filled"] else "white", "edgecolors": style["colour"]})
        ax.scatter(part["cover_share"].fillna(0.0), part["h2"].fillna(0.0), s=46, marker=style["marker"],
                   linewidths=1.6, zorder=3, **colours)
    min_h2 = float(result.thresholds.get("min_h2", 0.05))
    ax.axhline(min_h2, color="#444444", linestyle=(0, (4, 3)), linewidth=0.9, zorder=2)
    # Label the leading pairs; alternating offsets keep labels of neighbouring points apart.
    labelled = pairs[pairs["verdict"] != "absent"].head(_MAP_LABELS)
    for i, row in enumerate(labelled.itertuples(index=False)):
        ax.annotate(f"{row.feature_a} × {row.feature_b}", xy=(float(np.nan_to_num(row.cover_share)), float(row.h2)),
                    xytext=(6, 5 + 9 * (i % 3)), textcoords="offset points", fontsize=8,
                    arrowprops={"arrowstyle": "-", "color": "#888888", "linewidth": 0.6})
    ax.set_xlabel("structure: cover share of the paths splitting on both features")
    ax.set_ylabel("H² (share of joint effect that is interaction)")
    ax.set_xlim(left=-0.02)
    ax.set_ylim(bottom=-0.02)
    from matplotlib.lines import Line2D

    convention = Line2D([], [], color="#444444", linestyle=(0, (4, 3)), linewidth=0.9, label=f"min_h2 = {min_h2:g}")
    ax.legend(handles=_verdict_legend_handles(present) + [convention], loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=5, frameon=False)
    return canvas.svg(fig)


def _graph_figure(canvas: _Canvas, result: Any) -> tuple[str, str]:
    import networkx as nx

    from .constraints import interaction_graph

    graph = interaction_graph(result, include=("interaction", "dependent"))
    used = [n for n, data in graph.nodes(data=True) if data.get("used")]
    graph = graph.subgraph(used).copy()
    edges = {v: [(a, b) for a, b, d in graph.edges(data=True) if d.get("verdict") == v]
             for v in ("interaction", "dependent", "co-split")}
    omit_dotted = len(edges["co-split"]) > _MAX_DOTTED_EDGES
    drawn = nx.Graph()
    drawn.add_nodes_from(graph.nodes)
    drawn.add_edges_from(edges["interaction"] + edges["dependent"] + ([] if omit_dotted else edges["co-split"]))
    # Features on a circle, each group of connected features side by side: a force layout pulls
    # interacting features on top of each other and hides the very edges the figure is for.
    components = sorted(nx.connected_components(drawn), key=lambda c: (-len(c), sorted(c)))
    order = [n for component in components for n in sorted(component)]
    position = nx.circular_layout(order)
    gain = np.array([max(float(graph.nodes[n].get("gain", 0.0)), 0.0) for n in drawn.nodes])
    size = 120 + 900 * (gain / gain.max() if gain.size and gain.max() > 0 else np.zeros_like(gain))
    fig, ax = canvas.figure(figsize=(8.4, 6.0))
    widths = {"interaction": 3.2, "dependent": 2.2, "co-split": 1.0}
    for verdict in ("co-split", "dependent", "interaction"):
        if verdict == "co-split" and omit_dotted:
            continue
        style = VERDICT_STYLES[verdict]
        nx.draw_networkx_edges(drawn, position, edgelist=edges[verdict], ax=ax, width=widths[verdict],
                               style=style["line"], edge_color=style["colour"])
    nx.draw_networkx_nodes(drawn, position, ax=ax, node_size=size, node_color="#F2F2F2", edgecolors="#333333",
                           linewidths=1.2)
    nx.draw_networkx_labels(drawn, position, ax=ax, font_size=9,
                            bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.75, "pad": 1.0})
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color=VERDICT_STYLES[v]["colour"], linestyle=VERDICT_STYLES[v]["line"],
                      linewidth=widths[v], label=v) for v in ("interaction", "dependent", "co-split")
               if not (v == "co-split" and omit_dotted)]
    ax.legend(handles=handles, loc="lower left", frameon=False, fontsize=8)
    ax.set_axis_off()
    ax.margins(0.12)
    note = (f" {len(edges['co-split'])} co-split pairs are not drawn (more than {_MAX_DOTTED_EDGES})." if omit_dotted
            else "")
    return canvas.svg(fig), note


def _dependence_figure(canvas: _Canvas, ens: ForestGraph, matrix: np.ndarray, row: Any, output: int | None) -> str:
    from .pdp import partial_dependence

    names = list(ens.feature_names)
    a, b = names.index(str(row.feature_a)), names.index(str(row.feature_b))
    # The surface grids come first: they raise the clear error for a column missing in every sampled row.
    surface_a, a_categorical = _axis_values(ens, matrix, a, _SURFACE_POINTS)
    surface_b, b_categorical = _axis_values(ens, matrix, b, _SURFACE_POINTS)
    curve_x, _ = _axis_values(ens, matrix, a, _CURVE_POINTS)
    held, held_labels = _fixed_values(ens, matrix, b)
    line_grid = np.column_stack([np.tile(curve_x, held.size), np.repeat(held, curve_x.size)])
    mesh_a, mesh_b = np.meshgrid(surface_a, surface_b)
    surface_grid = np.column_stack([mesh_a.ravel(), mesh_b.ravel()])
    values = partial_dependence(ens, matrix, [a, b], np.vstack([line_grid, surface_grid]), output=output)
    lines = values[: line_grid.shape[0]].reshape(held.size, curve_x.size)
    surface = values[line_grid.shape[0]:].reshape(surface_b.size, surface_a.size)

    fig, (left, right) = canvas.figure(1, 2, figsize=(11.0, 4.2), gridspec_kw={"width_ratios": [1.15, 1.0]})
    a_labels = _category_labels(ens, a)
    x_positions = np.arange(curve_x.size) if a_categorical else curve_x
    for i, (curve, label) in enumerate(zip(lines, held_labels)):
        left.plot(x_positions, curve, color=_SERIES_COLOURS[i % len(_SERIES_COLOURS)],
                  linestyle=_LINE_STYLES[i % len(_LINE_STYLES)], marker=_LINE_MARKERS[i % len(_LINE_MARKERS)],
                  markevery=max(1, curve.size // 6), markersize=5, linewidth=1.6, label=f"{row.feature_b}: {label}")
    if a_categorical:
        left.set_xticks(x_positions, [a_labels[int(v)] if a_labels and 0 <= int(v) < len(a_labels) else str(int(v))
                                      for v in curve_x], rotation=30, ha="right")
    left.set_xlabel(str(row.feature_a))
    left.set_ylabel("partial dependence (raw prediction)")
    left.set_title(f"{row.feature_a} with {row.feature_b} held fixed", fontsize=10)
    left.legend(fontsize=7.5, frameon=False, loc="best")

    b_labels = _category_labels(ens, b)
    xs = np.arange(surface_a.size) if a_categorical else surface_a
    ys = np.arange(surface_b.size) if b_categorical else surface_b
    image = right.pcolormesh(xs, ys, surface, cmap="cividis", shading="nearest", rasterized=True)
    right.grid(False)
    fig.colorbar(image, ax=right, label="partial dependence (raw prediction)")
    if a_categorical:
        right.set_xticks(xs, [a_labels[int(v)] if a_labels and 0 <= int(v) < len(a_labels) else str(int(v))
                              for v in surface_a], rotation=30, ha="right")
    if b_categorical:
        right.set_yticks(ys, [b_labels[int(v)] if b_labels and 0 <= int(v) < len(b_labels) else str(int(v))
                              for v in surface_b])
    from matplotlib.ticker import MaxNLocator

    if not a_categorical:
        right.xaxis.set_major_locator(MaxNLocator(5))
    if not b_categorical:
        right.yaxis.set_major_locator(MaxNLocator(6))
    right.set_xlabel(str(row.feature_a))
    right.set_ylabel(str(row.feature_b))
    right.set_title("two-way partial dependence", fontsize=10)
    fig.tight_layout()
    return canvas.svg(fig)


def _dependence_section(canvas: _Canvas, ens: ForestGraph, matrix: np.ndarray, leading: pd.DataFrame,
                        output: int | None, max_dependence: float) -> str:
    if leading.empty:
        return '<p class="note">No pair shares a path, so there is no joint effect to draw.</p>'
    parts = [
        "<p>Partial dependence (Friedman 2001, eq. 9) of the first feature of each leading pair, with the second "
        "held at fixed values (lines), and the two-way surface (right). <strong>Parallel curves mean the two act "
        "additively; curves that change shape or spread apart mean they interact.</strong> Values are on the raw "
        f"prediction scale, averaged over the {matrix.shape[0]:,} sampled rows and computed exactly from the "
        "trees.</p>"
    ]
    for row in leading.itertuples(index=False):
        svg = _dependence_figure(canvas, ens, matrix, row, output)
        warning = ""
        if not pd.isna(row.dependence) and float(row.dependence) >= max_dependence:
            warning = (f" <strong>Dependence {_num(row.dependence)}:</strong> many grid points combine values that do "
                       "not occur together in the data, so these curves show the model extrapolating.")
        caption = (f"{_e(row.feature_a)} × {_e(row.feature_b)}: verdict {_e(row.verdict)}, H² = {_num(row.h2)}, "
                   f"strength {_num(row.strength)}. Left: one line per fixed value of {_e(row.feature_b)} (distinct "
                   "line styles and markers). Right: 'cividis' colour scale, readable in greyscale; lighter is "
                   f"higher.{warning}")
        parts.append(f"<h3>{_e(row.feature_a)} × {_e(row.feature_b)}</h3>" + _figure(svg, caption))
    return "".join(parts)


def _rounds_section(canvas: _Canvas, ens: ForestGraph, leading: pd.DataFrame, output: int | None) -> str:
    from .cooccurrence import structure_by_round

    if leading.empty:
        return '<p class="note">No pair shares a path, so no pair ever entered the model.</p>'
    by_round = structure_by_round(ens, max_order=2, output=output)
    by_round = by_round[by_round["order"] == 2]
    keys = by_round.apply(lambda r: _pair_key(r["feature_a"], r["feature_b"]), axis=1) if len(by_round) else pd.Series([], dtype=object)
    last_round = int(by_round["round"].max()) if len(by_round) else 0
    fig, ax = canvas.figure(figsize=(8.4, 4.6))
    rows = []
    for i, row in enumerate(leading.itertuples(index=False)):
        part = by_round[keys == _pair_key(row.feature_a, row.feature_b)].sort_values("round")
        if part.empty:
            continue
        rounds = np.append(part["round"].to_numpy(), last_round)
        gain = np.append(part["nested_gain"].to_numpy(), part["nested_gain"].to_numpy()[-1])
        ax.step(rounds + 1, gain, where="post", color=_SERIES_COLOURS[i % len(_SERIES_COLOURS)],
                linestyle=_LINE_STYLES[i % len(_LINE_STYLES)], linewidth=1.8,
                label=f"{row.feature_a} × {row.feature_b} ({row.verdict})")
        ax.plot(rounds[:-1] + 1, gain[:-1], linestyle="none", marker=_LINE_MARKERS[i % len(_LINE_MARKERS)],
                markersize=4, color=_SERIES_COLOURS[i % len(_SERIES_COLOURS)],
                markevery=max(1, (rounds.size - 1) // 8))
        half = part[part["nested_gain"] >= 0.5 * part["nested_gain"].iloc[-1]]["round"]
        rows.append([_e(row.feature_a), _e(row.feature_b), _e(row.verdict), _num(int(part["first_round"].iloc[0]) + 1),
                     _num(int(half.iloc[0]) + 1 if len(half) else math.nan), _num(part["nested_gain"].iloc[-1])])
    ax.set_xlabel("boosting round")
    ax.set_ylabel("cumulative nested gain of the pair")
    ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(0.0, -0.14), ncol=2)
    svg = canvas.svg(fig)
    table = _table(["Feature a", "Feature b", "Verdict", "First round", "Round reaching half its final gain",
                    "Final nested gain"], rows, numeric={3, 4, 5})
    return (_figure(svg, "Cumulative nested gain (gain of splits on one feature below a split on the other) of the "
                         "leading pairs over boosting rounds, one line style and marker per pair. A pair that enters "
                         "late and grows slowly is refined detail; one that rises in the first rounds is structural.")
            + table)


def _validation_html(validation: Any) -> str:
    summary = validation.summary
    sentences = []
    rows = []
    for metric, values in summary.items():
        if not isinstance(values, dict) or "difference_mean" not in values:
            continue
        better = "lower" if metric in ("rmse", "log_loss") else "higher"
        sentences.append(
            f"{metric}: constrained {_num(values['constrained_mean'], 4)} against unconstrained "
            f"{_num(values['unconstrained_mean'], 4)}, a mean paired difference of {_num(values['difference_mean'], 3)} "
            f"(95% interval {_num(values['difference_low'], 3)} to {_num(values['difference_high'], 3)}; "
            f"{_num(100 * values['relative_change'], 3)}% relative; {better} is better)")
    for record in validation.folds.itertuples(index=False):
        rows.append([_num(int(record.fold) + 1), _e(record.metric), _num(record.unconstrained, 4),
                     _num(record.constrained, 4), _num(record.difference, 3)])
    n_folds = summary.get("n_folds", "?")
    crossing = validation.cross_group_pairs
    enforcement = ("The constrained refit on all rows keeps every path inside one group." if not crossing and not
                   validation.stray_paths else
                   f"The constrained refit has {len(validation.stray_paths)} path feature set(s) outside every group; "
                   f"pairs crossing groups: {', '.join(f'{a} × {b}' for a, b in crossing) or 'none'}.")
    text = (f"Over {_e(n_folds)} cross-validation folds ({_e(summary.get('library', ''))}, "
            f"{_e(summary.get('num_boost_round', '?'))} rounds): " + "; ".join(_e(s) for s in sentences) + ". "
            + _e(enforcement))
    notes = "".join(f'<p class="note">{_e(n)}</p>' for n in summary.get("notes", []))
    return (f"<h3>Cost of the constraints, measured by retraining</h3><p>{text}</p>"
            + _table(["Fold", "Metric", "Unconstrained", "Constrained", "Difference"], rows, numeric={0, 2, 3, 4})
            + notes)


def _constraints_section(suggestion: Any, validation: Any) -> str:
    groups = "".join(f"<li>{', '.join(_e(n) for n in group)}</li>" for group in suggestion.groups)
    unused = (f"<p>Never split on (exported as groups of one): {', '.join(_e(n) for n in suggestion.unused)}</p>"
              if suggestion.unused else "")
    alternative = ""
    if suggestion.alternative:
        alternative = ("<p>Non-overlapping alternative: "
                       + "; ".join("{" + ", ".join(_e(n) for n in g) + "}" for g in suggestion.alternative) + "</p>")
    notes = "".join(f"<li>{_e(n)}</li>" for n in suggestion.notes)
    parts = [
        "<p>Groups of features allowed to interact, from the pairs with verdict interaction: each group is a maximal "
        "clique of supported pairs (Bron &amp; Kerbosch 1973). Retraining with these interaction constraints keeps "
        "the joint effects the model uses and forbids the rest.</p>",
        f"<h3>Groups</h3><ol>{groups}</ol>{unused}{alternative}",
        f"<h3>XGBoost</h3><p><code>interaction_constraints</code> (indices of the training columns):</p>"
        f"<pre>{_e(suggestion.xgboost_param)}</pre><pre>{_e(suggestion.python_snippet('xgboost'))}</pre>",
        f"<h3>LightGBM</h3><p><code>interaction_constraints</code> (indices; LightGBM misreads names):</p>"
        f"<pre>{_e(suggestion.lightgbm_param)}</pre><pre>{_e(suggestion.python_snippet('lightgbm'))}</pre>",
    ]
    if notes:
        parts.append(f"<h3>Notes</h3><ul>{notes}</ul>")
    if validation is not None:
        parts.append(_validation_html(validation))
    else:
        parts.append('<p class="note">Not validated here: retraining under the groups and comparing held-out loss is '
                     "a separate, slower step (treeprobe.constraints.validate_constraints).</p>")
    return "".join(parts)


def _cautions_section(result: Any) -> str:
    thresholds = "".join(f"<li><code>{_e(k)}</code> = {_num(v)}</li>" for k, v in result.thresholds.items())
    return (
        "<ul>"
        "<li><strong>H-statistics extrapolate when features are dependent.</strong> Partial dependence combines "
        "values of one feature with rows of the others; where features are correlated, many such combinations never "
        "occur, and the model's answer there is a guess (Friedman &amp; Popescu 2008, section 8.1). Pairs with high "
        "dependence are marked dependent for this reason.</li>"
        "<li><strong>Structure is not causation.</strong> These are the interactions this model uses, found in its "
        "trees and its predictions; they are not claims about how the world works. Another model fitted to the same "
        "data may use different ones, and dependent features can stand in for each other.</li>"
        "<li><strong>Thresholds are conventions, not laws.</strong> The verdicts depend on these settings: "
        f"<ul>{thresholds}</ul></li>"
        "<li><strong>Decisions about people.</strong> Where the model decides about people (credit, health, hiring), "
        "this report supports, and does not replace, the model-risk review that local rules require.</li>"
        "</ul>"
        f'<p class="note">{_e(result.limits)}</p>'
    )


# ------------------------------------------------------------------ public
def report(
    model: Any,
    X: Any,
    y: Any = None,
    *,
    out: str | os.PathLike = "treeprobe-report.html",
    triage_result: Any = None,
    suggestion: Any = None,
    validation: Any = None,
    top_pairs: int = 4,
    title: str | None = None,
    triage_options: dict | None = None,
    progress: bool | None = None,
) -> Path:
    """Write one self-contained HTML page on the feature interactions of a fitted tree ensemble.

    Parameters
    ----------
    model : ForestGraph or anything :func:`treeprobe.load_model` accepts
        The fitted model.
    X : DataFrame or ndarray of shape (n_rows, n_features)
        Data with the model's feature columns, as for :func:`treeprobe.verdicts.triage`.
    y : array-like of shape (n_rows,) or str, optional
        Target, or the name of its column in ``X`` (enables the noise floor).
    out : str or path, default "treeprobe-report.html"
        File to write. Written atomically: an interrupted run leaves the old
        file or none.
    triage_result : TriageResult, optional
        A triage already run on this model; by default
        ``triage(model, X, y, **triage_options)`` is run.
    suggestion : ConstraintSuggestion, optional
        By default ``suggest_constraints(triage_result)``.
    validation : ValidationResult, optional
        Shown when given; computing it retrains the model, so the caller decides.
    top_pairs : int, default 4
        Number of leading pairs drawn in the dependence and rounds sections.
    title : str, optional
        Page title; default names the model source.
    triage_options : dict, optional
        Keyword arguments for :func:`treeprobe.verdicts.triage` (``sample``,
        ``resamples``, ``null_refits``, ...).
    progress : bool, optional
        Progress bars on standard error; default only on a terminal.

    Returns
    -------
    pathlib.Path
        The written file.

    Raises
    ------
    DataError
        For an invalid option or data that does not fit the model.
    MissingLibraryError
        When matplotlib (the ``treeprobe[plot]`` extra) is not installed.

    Notes
    -----
    The leading pairs are the pairs with verdict interaction or dependent,
    by ``strength``, then the other pairs sharing a path in triage order, up
    to ``top_pairs``. The dependence plots show Friedman's partial dependence
    ([1]_, eq. 9) ``F_ab(z_a, z_b) = (1/n) sum_i f(z_a, z_b, x_i,rest)`` on
    the triage's number of rows; for an additive pair ``F_ab = F_a + F_b``,
    so the curves at fixed ``z_b`` are vertical shifts of one another. H²
    ([2]_, eq. 44) measures how far they are from that.

    Warnings
    --------
    Partial dependence and H extrapolate when the two features are dependent;
    the page says so beside every figure where it applies. The page describes
    the model, not the world.

    References
    ----------
    .. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
       machine", Annals of Statistics 29(5), 2001.
    .. [2] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
       ensembles", Annals of Applied Statistics 2(3), 2008.

    Examples
    --------
    One tree that pays 1 only when both fuel_price and shift_length exceed 0.5
    (a pure interaction):

    >>> import tempfile
    >>> from pathlib import Path
    >>> import numpy as np, pandas as pd
    >>> from treeprobe.graph import ForestGraph
    >>> ens = ForestGraph.from_arrays(
    ...     feature=[0, -1, 1, -1, -1], threshold=[0.5, 0, 0.5, 0, 0], left=[1, -1, 3, -1, -1],
    ...     right=[2, -1, 4, -1, -1], value=[0, 0.0, 0, 0.0, 1.0], tree_offsets=[0, 5], local_children=True,
    ...     gain=[4.0, 0, 2.0, 0, 0], cover=[100.0, 50, 50, 25, 25], feature_names=["fuel_price", "shift_length"])
    >>> X = pd.DataFrame(np.random.default_rng(0).uniform(size=(200, 2)), columns=["fuel_price", "shift_length"])
    >>> path = report(ens, X, out=Path(tempfile.mkdtemp()) / "fleet.html", triage_options={"resamples": 0})
    >>> path.name, '<section id="dependence">' in path.read_text(encoding="utf-8")
    ('fleet.html', True)
    """
    from . import __version__
    from .constraints import ConstraintSuggestion, ValidationResult, suggest_constraints
    from .io import load_model
    from .verdicts import TriageResult, triage

    target = _check_out(out)
    if isinstance(top_pairs, (bool, np.bool_)) or not isinstance(top_pairs, (int, np.integer)) or top_pairs < 1:
        raise DataError(f"top_pairs must be a whole number >= 1, got {top_pairs!r}")
    if title is not None and not isinstance(title, str):
        raise DataError(f"title must be a string or None, got {type(title).__name__}")
    if triage_options is not None and not isinstance(triage_options, dict):
        raise DataError(f"triage_options must be a dict or None, got {type(triage_options).__name__}")
    if progress is not None and not isinstance(progress, (bool, np.bool_)):
        raise DataError(f"progress must be True, False or None, got {progress!r}")
    _check_instance(triage_result, TriageResult, "triage_result")
    _check_instance(suggestion, ConstraintSuggestion, "suggestion")
    _check_instance(validation, ValidationResult, "validation")
    if triage_result is not None and triage_options:
        raise DataError("triage_options has no effect when triage_result is given; pass one or the other")
    known_options = [name for name, p in inspect.signature(triage).parameters.items() if p.kind == p.KEYWORD_ONLY]
    unknown = sorted(set(triage_options or {}) - set(known_options))
    if unknown:
        raise DataError(f"triage_options: unknown option(s) {', '.join(map(repr, unknown))}; "
                        f"triage accepts {', '.join(known_options)}")
    if target.is_dir():
        raise DataError(f"out={str(out)!r} is a folder; give a file name such as {str(target / 'report.html')!r}")
    if not target.parent.is_dir() and str(target.parent):
        raise DataError(f"out={str(out)!r}: the folder {target.parent} does not exist")
    plt = _pyplot()

    steps: list[tuple[str, float]] = []

    def timed(name: str, work: Callable[[], Any]) -> Any:
        started = time.perf_counter()
        value = work()
        steps.append((name, time.perf_counter() - started))
        return value

    ens = model if isinstance(model, ForestGraph) else timed("load the model", lambda: load_model(model))
    features_X = _features_of(X, y)
    matrix_all = ens.check_X(features_X)
    computed_here = triage_result is None
    if computed_here:
        options = dict(triage_options or {})
        options.setdefault("progress", progress)
        # The original model, not the loaded graph: a live booster tells the noise-floor refits its full training
        # configuration, which a saved file may not store.
        triage_result = timed("triage: structure, H-statistics, interval, noise floor, dependence",
                              lambda: triage(model, X, y, **options))
    elif tuple(triage_result.ensemble.feature_names) != tuple(ens.feature_names):
        raise DataError("triage_result was computed on a model with other features "
                        f"({', '.join(triage_result.ensemble.feature_names[:6])} ...) than this model "
                        f"({', '.join(ens.feature_names[:6])} ...)")
    if suggestion is None:
        suggestion = timed("constraint suggestion", lambda: suggest_constraints(triage_result))

    facts = triage_result.facts
    output = int(facts.get("output", 0) or 0) if ens.n_outputs > 1 else None
    n_rows = int(facts.get("n_rows", matrix_all.shape[0]) or matrix_all.shape[0])
    random_state = int((triage_options or {}).get("random_state", 0))
    # The figures use a seeded sample of the same size as the triage's, so their cost is bounded the same way.
    if n_rows < matrix_all.shape[0]:
        chosen = np.sort(np.random.default_rng(random_state).choice(matrix_all.shape[0], size=n_rows, replace=False))
        matrix = matrix_all[chosen]
    else:
        matrix = matrix_all
    pairs = triage_result.pairs
    leading = _leading_pairs(pairs, int(top_pairs))
    max_dependence = float(triage_result.thresholds.get("max_dependence", 0.7))
    canvas = _Canvas(plt)
    with progress_bar(4, "report figures", enabled=progress) as bar:
        pair_map = timed("figure: pair map", lambda: _pair_map_figure(canvas, triage_result))
        bar.update()
        graph_svg, graph_note = timed("figure: interaction graph", lambda: _graph_figure(canvas, triage_result))
        bar.update()
        dependence = timed("figures: partial dependence of the leading pairs",
                           lambda: _dependence_section(canvas, ens, matrix, leading, output, max_dependence))
        bar.update()
        rounds = timed("figure: pairs over boosting rounds", lambda: _rounds_section(canvas, ens, leading, output))
        bar.update()

    if isinstance(y, str):
        target_text = f"column {_e(y)}"
    elif y is not None:
        target_text = "given as an array"
    else:
        target_text = "none (no noise-floor refits possible)"
    source = ens.summary()["source"]
    page_title = title if title is not None else f"Feature interactions of {source}"
    headings = {
        "summary": "Summary",
        "pairs": "Feature pairs and verdicts",
        "pair-map": "Structure against H",
        "graph": "Interaction graph",
        "dependence": "How the leading pairs act together",
        "rounds": "When the pairs entered the model",
        "constraints": "Suggested interaction constraints",
        "cautions": "Cautions",
    }

    def page() -> str:
        bodies = {
            "summary": _summary_section(ens, triage_result, matrix_all.shape[0], target_text, steps, computed_here),
            "pairs": _pairs_section(triage_result),
            "pair-map": _figure(pair_map, "Every feature pair: structural co-occurrence (x) against H² (y), one marker "
                                          "shape and fill per verdict. Pairs far right but low are co-splits: the trees "
                                          "split on both without a joint effect. Pairs high up interact. The leading "
                                          "pairs are labelled; the dashed line is the convention min_h2."),
            "graph": _figure(graph_svg, "Used features (area by total gain) joined by their pairs: interaction as thick "
                                        "solid lines, dependent as dashed lines, co-split as thin dotted lines. "
                                        "Features sit on a circle, connected groups side by side." + _e(graph_note)),
            "dependence": dependence,
            "rounds": rounds,
            "constraints": _constraints_section(suggestion, validation),
            "cautions": _cautions_section(triage_result),
        }
        contents = "".join(f'<li><a href="#{key}">{headings[key]}</a></li>' for key in SECTIONS)
        sections = "".join(f'<section id="{key}"><h2>{headings[key]}</h2>{bodies[key]}</section>' for key in SECTIONS)
        stamp = _datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z")
        return (
            '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{_e(page_title)}</title><style>{_CSS}</style></head><body><main>"
            f"<h1>{_e(page_title)}</h1>"
            f'<p class="lede">Which feature interactions this model really uses: path structure, H-statistics and '
            f"verdicts, with the figures behind them. Written by treeprobe {_e(__version__)} on {_e(stamp)}.</p>"
            f'<nav aria-label="Contents"><ol>{contents}</ol></nav>{sections}'
            "<footer>Self-contained page: no scripts, no external resources. Structure is not causation; "
            "a model's interactions are not the world's.</footer></main></body></html>\n"
        )

    text = page()
    return atomic_write(target, lambda handle: handle.write(text))
