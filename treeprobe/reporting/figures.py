"""The report's figures: matplotlib drawings turned into inline SVG that can share one HTML page.

Four drawings:

* the pair map, path structure (``cover_share``) against H² per pair, with
  pairs whose interaction size h is negligible against the spread of the
  predictions marked, because a large share of a tiny effect is still tiny;
* "groups and links", an arc diagram: the used features on one baseline in
  the order of the suggested constraint groups, a shaded band per group,
  interaction pairs as arcs above the line (width by strength) and dependent
  pairs as dashed arcs below it;
* per leading pair, partial dependence of one feature at fixed values of the
  other (Friedman 2001 [1]_, eq. 9) and the two-way surface, in the
  'cividis' colour map, which reads the same with colour-vision deficiency
  and in greyscale [2]_;
* cumulative nested gain of the leading pairs over boosting rounds;
* the curve of a constraint search: held-out loss against the step, with
  one standard error, the unconstrained model and the one-standard-error line.

matplotlib is optional (the ``treeprobe[plot]`` extra), so it is imported
only when a figure is drawn. Data for the figures (:func:`pair_map_marks`,
:func:`arc_layout`) are plain DataFrames computed apart from the drawing.

References
----------
.. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", Annals of Statistics 29(5), 1189-1232, 2001.
.. [2] J. R. Nuñez, C. R. Anderton and R. S. Renslow, "Optimizing colormaps
   with consideration for color vision deficiency to enable accurate
   interpretation of scientific data", PLOS ONE 13(7), e0199239, 2018.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..cooccurrence import structure_by_round
from ..errors import DataError, MissingLibraryError
from ..graph import ForestGraph
from ..pdp import partial_dependence
from .style import SERIES_COLOURS, SERIES_LINES, SERIES_MARKERS, VERDICT_STYLES, number_text

__all__ = [
    "pyplot",
    "Canvas",
    "pair_map_marks",
    "pair_map_svg",
    "ArcLayout",
    "arc_layout",
    "draw_arc_diagram",
    "dependence_svg",
    "rounds_svg",
    "search_curve_svg",
]

_MAP_LABELS = 6
_MAP_HIGHEST = 3
_LINE_QUANTILES = (0.1, 0.3, 0.5, 0.7, 0.9)
_CURVE_POINTS = 30
_SURFACE_POINTS = 24
_MAX_CATEGORIES = 20
_MAX_CATEGORY_LINES = 6
# Light tints of Okabe & Ito colours for the group bands; each band also carries its group number as text.
_BAND_TINTS = ("#56B4E9", "#009E73", "#CC79A7", "#F0E442", "#0072B2", "#E69F00")
_ARC_WIDTH = (1.2, 5.5)
_NAME_SIZE = 9
_NAME_GAP = 8.0  # points between a marker's centre and its name
_MARKER_SIZE = 7.0
_INK = "#333333"


def pyplot() -> Any:
    """matplotlib's pyplot on the off-screen Agg backend; a clear error when matplotlib is missing."""
    try:
        import matplotlib
    except ImportError:
        raise MissingLibraryError(
            "the HTML report draws its figures with matplotlib, which is not installed; "
            "install it with: pip install 'treeprobe[plot]'"
        ) from None
    # Selecting Agg here (not at package import) leaves a user's backend alone elsewhere.
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


class Canvas:
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
        # matplotlib numbers its element ids per figure (figure_1, axes_1, ...); ids must be unique in an HTML
        # document, so each figure's ids and the references to them get their own prefix.
        prefix = f"tp{self.count}-"
        text = self._ID.sub(lambda m: f'id="{prefix}{m.group(1)}"', text)
        text = self._HREF.sub(lambda m: f'{m.group(1)}="#{prefix}{m.group(2)}"', text)
        text = self._URL.sub(lambda m: f"url(#{prefix}{m.group(1)})", text)
        return text.strip()


def _verdict_handles(verdicts: Sequence[str]) -> list[Any]:
    from matplotlib.lines import Line2D

    handles = []
    for verdict in verdicts:
        style = VERDICT_STYLES[verdict]
        handles.append(Line2D([], [], linestyle="none", marker=style["marker"], markersize=8,
                              markeredgecolor=style["colour"], markeredgewidth=1.6,
                              markerfacecolor=style["colour"] if style["filled"] else "white", label=verdict))
    return handles


# ------------------------------------------------------------------ pair map
def pair_map_marks(pairs: pd.DataFrame, thresholds: dict, *, leading: int = _MAP_LABELS) -> pd.DataFrame:
    """Where each pair sits on the pair map, which pairs carry a label, and which have a negligible size h.

    A pair is ``negligible`` when its H² reaches ``thresholds['min_h2']``
    but its ``effect`` (h over the standard deviation of the predictions) is
    below ``thresholds['min_effect']``: it sits high on the map while its
    joint effect is too small to matter (low points need no such warning). Labelled:
    the first ``leading`` pairs sharing paths in table order, and the
    ``_MAP_HIGHEST`` highest by H², so the top of the map is never an
    anonymous point.

    Returns
    -------
    DataFrame
        ``feature_a``, ``feature_b``, ``verdict``, ``cover_share`` and ``h2``
        (NaN read as 0), ``negligible`` and ``labelled`` (bool), one row per
        pair in the order of ``pairs``.

    Examples
    --------
    >>> pairs = pd.DataFrame({"feature_a": ["fuel", "wind"], "feature_b": ["crew", "dust"],
    ...     "verdict": ["interaction", "co-split"], "cover_share": [0.6, 0.1], "h2": [0.3, 0.9],
    ...     "effect": [0.4, 0.001]})
    >>> pair_map_marks(pairs, {"min_effect": 0.05}, leading=1)[["negligible", "labelled"]].values.tolist()
    [[False, True], [True, True]]
    """
    marks = pairs[["feature_a", "feature_b", "verdict"]].copy()
    marks["cover_share"] = pairs["cover_share"].fillna(0.0).to_numpy()
    marks["h2"] = pairs["h2"].fillna(0.0).to_numpy()
    sharing = (pairs["verdict"] != "absent").to_numpy()
    min_effect = float(thresholds.get("min_effect", 0.0))
    effect = pairs["effect"].to_numpy(dtype=np.float64) if "effect" in pairs.columns else np.full(len(pairs), np.nan)
    high = marks["h2"].to_numpy() >= float(thresholds.get("min_h2", 0.0))
    marks["negligible"] = sharing & high & (np.nan_to_num(effect, nan=np.inf) < min_effect)
    labelled = np.zeros(len(pairs), dtype=bool)
    labelled[np.flatnonzero(sharing)[:leading]] = True
    highest = np.argsort(-np.where(sharing, marks["h2"].to_numpy(), -np.inf), kind="stable")[:_MAP_HIGHEST]
    labelled[highest[sharing[highest]]] = True
    marks["labelled"] = labelled
    return marks.reset_index(drop=True)


def pair_map_svg(canvas: Canvas, pairs: pd.DataFrame, thresholds: dict) -> str:
    """Structure (cover share) against H², one marker per verdict, negligible-size pairs ringed."""
    from matplotlib.lines import Line2D

    marks = pair_map_marks(pairs, thresholds)
    fig, ax = canvas.figure(figsize=(8.4, 5.2))
    present = [v for v in VERDICT_STYLES if (marks["verdict"] == v).any()]
    for verdict in present:
        style = VERDICT_STYLES[verdict]
        part = marks[marks["verdict"] == verdict]
        # A line marker such as 'x' has no face: matplotlib takes its colour from the face colour alone.
        colours = ({"c": style["colour"]} if style["marker"] in ("x", "+") else
                   {"facecolors": style["colour"] if style["filled"] else "white", "edgecolors": style["colour"]})
        ax.scatter(part["cover_share"], part["h2"], s=46, marker=style["marker"], linewidths=1.6, zorder=3, **colours)
    small = marks[marks["negligible"]]
    ring = {"marker": "o", "facecolors": "none", "edgecolors": "#444444", "linewidths": 1.0, "linestyle": (0, (2, 2))}
    ax.scatter(small["cover_share"], small["h2"], s=190, zorder=2, **ring)
    min_h2 = float(thresholds.get("min_h2", 0.05))
    ax.axhline(min_h2, color="#444444", linestyle=(0, (4, 3)), linewidth=0.9, zorder=1)
    # Alternating offsets keep the labels of neighbouring points apart.
    for i, row in enumerate(marks[marks["labelled"]].itertuples(index=False)):
        text = f"{row.feature_a} × {row.feature_b}" + (" (h negligible)" if row.negligible else "")
        ax.annotate(text, xy=(row.cover_share, row.h2), xytext=(8, 5 + 9 * (i % 3)), textcoords="offset points",
                    fontsize=8, arrowprops={"arrowstyle": "-", "color": "#888888", "linewidth": 0.6})
    ax.set_xlabel("structure: cover share of the paths splitting on both features")
    ax.set_ylabel("H² (share of joint effect that is interaction)")
    ax.set_xlim(left=-0.02)
    ax.set_ylim(bottom=-0.02)
    handles = _verdict_handles(present)
    if len(small):
        handles.append(Line2D([], [], linestyle="none", marker="o", markersize=12, markerfacecolor="none",
                              markeredgecolor="#444444", label="h negligible (below min_effect × prediction sd)"))
    handles.append(Line2D([], [], color="#444444", linestyle=(0, (4, 3)), linewidth=0.9, label=f"min_h2 = {min_h2:g}"))
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=3, frameon=False)
    return canvas.svg(fig)


# ------------------------------------------------------------------ groups and links
@dataclass(frozen=True, eq=False)
class ArcLayout:
    """Plain data of the groups-and-links diagram.

    Attributes
    ----------
    features : DataFrame
        ``feature``, ``position`` (0, 1, ... along the baseline), ``group``
        (number of the first suggested group of two or more holding it,
        1-based as in the suggestion's list; 0 = none).
    bands : DataFrame
        ``group`` (1-based), ``first``, ``last``: one row per run of
        neighbouring positions of a group's members.
    arcs : DataFrame
        ``feature_a``, ``feature_b``, ``verdict``, ``side`` (+1 above the
        baseline for interaction, -1 below for dependent), ``start``, ``end``
        (positions, ``start < end``), ``strength`` and ``width`` (points).
    """

    features: pd.DataFrame
    bands: pd.DataFrame
    arcs: pd.DataFrame


def _runs(positions: list[int]) -> list[tuple[int, int]]:
    """Runs of consecutive integers in sorted ``positions``, as (first, last)."""
    runs: list[tuple[int, int]] = []
    for p in sorted(positions):
        if runs and p == runs[-1][1] + 1:
            runs[-1] = (runs[-1][0], p)
        else:
            runs.append((p, p))
    return runs


def arc_layout(pairs: pd.DataFrame, used_features: Sequence[str], groups: Sequence[Sequence[str]]) -> ArcLayout:
    """Order the used features by constraint group and turn interaction and dependent pairs into arcs.

    Features of the first group come first, then the new members of each
    following group, then the used features in no group of two or more (in
    the order given; a group of one gets no band). Groups may overlap (maximal cliques); a group's band then covers
    each run of neighbouring positions of its members.

    Examples
    --------
    >>> pairs = pd.DataFrame({"feature_a": ["fuel", "crew", "fuel"], "feature_b": ["shift", "route", "route"],
    ...     "verdict": ["interaction", "interaction", "dependent"], "strength": [0.4, 0.2, 0.1]})
    >>> layout = arc_layout(pairs, ["fuel", "crew", "route", "shift", "idle"], [["fuel", "shift"], ["crew", "route"]])
    >>> layout.features["feature"].tolist(), layout.features["group"].tolist()
    (['fuel', 'shift', 'crew', 'route', 'idle'], [1, 1, 2, 2, 0])
    >>> layout.arcs[["start", "end", "side"]].values.tolist()
    [[0, 1, 1], [2, 3, 1], [0, 3, -1]]
    """
    used = [str(f) for f in used_features]
    order: list[str] = []
    group_of: dict[str, int] = {}
    for number, group in enumerate(groups, start=1):
        if len(group) < 2:
            continue
        for name in map(str, group):
            if name in used and name not in group_of:
                group_of[name] = number
                order.append(name)
    order += [name for name in used if name not in group_of]
    position = {name: i for i, name in enumerate(order)}
    features = pd.DataFrame({"feature": order, "position": range(len(order)),
                             "group": [group_of.get(name, 0) for name in order]})
    bands = [(number, first, last) for number, group in enumerate(groups, start=1) if len(group) >= 2
             for first, last in _runs([position[str(n)] for n in group if str(n) in position])]

    drawn = pairs[pairs["verdict"].isin(["interaction", "dependent"])
                  & pairs["feature_a"].astype(str).isin(position) & pairs["feature_b"].astype(str).isin(position)]
    ends = np.array([[position[str(a)], position[str(b)]] for a, b in zip(drawn["feature_a"], drawn["feature_b"], strict=True)],
                    dtype=np.int64).reshape(-1, 2)
    strength = np.nan_to_num(drawn["strength"].to_numpy(dtype=np.float64), nan=0.0) if len(drawn) else np.zeros(0)
    top = strength.max() if strength.size and strength.max() > 0 else 1.0
    arcs = pd.DataFrame({
        "feature_a": drawn["feature_a"].astype(str).to_numpy(),
        "feature_b": drawn["feature_b"].astype(str).to_numpy(),
        "verdict": drawn["verdict"].to_numpy(),
        "side": np.where(drawn["verdict"].to_numpy() == "interaction", 1, -1),
        "start": ends.min(axis=1),
        "end": ends.max(axis=1),
        "strength": strength,
        "width": _ARC_WIDTH[0] + (_ARC_WIDTH[1] - _ARC_WIDTH[0]) * np.clip(strength / top, 0.0, 1.0),
    })
    return ArcLayout(features=features, bands=pd.DataFrame(bands, columns=["group", "first", "last"]), arcs=arcs)


def _arc_points(start: float, end: float, side: int) -> tuple[np.ndarray, np.ndarray]:
    """A half ellipse over [start, end] whose height is half its span (so nested arcs never cross)."""
    t = np.linspace(0.0, math.pi, 60)
    radius = (end - start) / 2.0
    return (start + end) / 2.0 - radius * np.cos(t), side * radius * np.sin(t)


def _text_sizes(canvas: Canvas, texts: Sequence[str], fontsize: float) -> np.ndarray:
    """Width and height in inches of each of ``texts`` as matplotlib draws them, shape (len(texts), 2)."""
    fig = canvas.plt.figure()
    renderer = fig.canvas.get_renderer()
    sizes = np.zeros((len(texts), 2))
    with canvas.plt.rc_context(canvas.style):
        for i, text in enumerate(texts):
            extent = fig.text(0, 0, text, fontsize=fontsize).get_window_extent(renderer)
            sizes[i] = extent.width / fig.dpi, extent.height / fig.dpi
    canvas.plt.close(fig)
    return sizes


def draw_arc_diagram(canvas: Canvas, layout: ArcLayout) -> Any:
    """The matplotlib figure of the groups-and-links diagram (see :func:`arc_layout`).

    The names hang under the baseline a fixed distance in points from the
    markers, so no name runs into a marker; dependent arcs hang from a rail
    below the longest name, joined to their features by faint guides.
    """
    from matplotlib.lines import Line2D
    from matplotlib.patches import Rectangle

    n = len(layout.features)
    names = [str(f) for f in layout.features["feature"]]
    x = layout.features["position"].to_numpy(dtype=np.float64)
    arcs = layout.arcs
    up = arcs[arcs["side"] > 0]
    down = arcs[arcs["side"] < 0]
    unit = float(np.clip(11.0 / max(n, 1), 0.28, 0.8))  # inches between neighbouring features
    sizes = _text_sizes(canvas, names, _NAME_SIZE)
    upright = bool(sizes[:, 0].max(initial=0.0) > 0.9 * unit)
    gap_in = _NAME_GAP / 72.0
    # How far each name reaches below the baseline, in data units (one unit = the spacing of two features).
    name_ends = -(gap_in + (sizes[:, 0] if upright else sizes[:, 1])) / unit
    depth = gap_in / unit - name_ends.min(initial=0.0)
    reach_up = max([0.5] + [(e - s) / 2.0 for s, e in zip(up["start"], up["end"], strict=True)]) + 0.45
    reach_down = max([0.0] + [(e - s) / 2.0 for s, e in zip(down["start"], down["end"], strict=True)])
    rail = -depth if len(down) else 0.0
    bottom = rail - reach_down - 0.15
    left_edge, right_edge = -0.7, n - 0.3
    fig = canvas.plt.figure(figsize=((right_edge - left_edge) * unit, (reach_up - bottom) * unit))
    with canvas.plt.rc_context(canvas.style):
        ax = fig.add_axes((0.0, 0.0, 1.0, 1.0))
    ax.set_axis_off()
    ax.set_xlim(left_edge, right_edge)
    ax.set_ylim(bottom, reach_up)

    for band in layout.bands.itertuples(index=False):
        floor = rail - 0.1 if len(down) else -depth
        ax.add_patch(Rectangle((band.first - 0.44, floor), band.last - band.first + 0.88, reach_up - 0.05 - floor,
                               facecolor=_BAND_TINTS[(band.group - 1) % len(_BAND_TINTS)], alpha=0.2, linewidth=0,
                               zorder=0))
    named: set[int] = set()
    for band in layout.bands.itertuples(index=False):
        if band.group not in named:
            named.add(band.group)
            ax.text((band.first + band.last) / 2.0, reach_up - 0.1, f"group {band.group}", ha="center", va="top",
                    fontsize=8, color=_INK)
    ax.plot([0, n - 1], [0, 0], color="#9a9a9a", linewidth=0.8, zorder=1)
    for arc in arcs.itertuples(index=False):
        style = VERDICT_STYLES[arc.verdict]
        xs, ys = _arc_points(arc.start, arc.end, arc.side)
        ax.plot(xs, ys + (0.0 if arc.side > 0 else rail), color=style["colour"], linestyle=style["line"],
                linewidth=arc.width, solid_capstyle="butt", dash_capstyle="butt", zorder=2)
    if len(down):
        ends = np.unique(np.concatenate([down["start"].to_numpy(), down["end"].to_numpy()])).astype(np.float64)
        ax.plot([0, n - 1], [rail, rail], color="#c4c4c4", linewidth=0.6, zorder=1)
        for end in ends:
            top = name_ends[int(end)] - 0.5 * gap_in / unit
            ax.plot([end, end], [top, rail], color="#9a9a9a", linewidth=0.7, linestyle=(0, (1, 2)), zorder=1)
        ax.plot(ends, np.full(ends.size, rail), linestyle="none", marker="o", markersize=4, color="#9a9a9a", zorder=3)
    grouped = layout.features["group"].to_numpy() > 0
    ax.plot(x[grouped], np.zeros(grouped.sum()), linestyle="none", marker="o", markersize=_MARKER_SIZE, color=_INK,
            zorder=3)
    ax.plot(x[~grouped], np.zeros((~grouped).sum()), linestyle="none", marker="o", markersize=_MARKER_SIZE,
            markerfacecolor="white", markeredgecolor=_INK, markeredgewidth=1.4, zorder=3)
    for position, name in zip(x, names, strict=True):
        ax.annotate(name, xy=(position, 0.0), xytext=(0, -_NAME_GAP), textcoords="offset points", ha="center",
                    va="top", rotation=90 if upright else 0, fontsize=_NAME_SIZE, color=_INK, zorder=4)

    handles = [
        Line2D([], [], color=VERDICT_STYLES["interaction"]["colour"], linestyle="solid", linewidth=3.0,
               label="interaction (arc above; width: strength)"),
        Line2D([], [], color=VERDICT_STYLES["dependent"]["colour"], linestyle="dashed", linewidth=2.0,
               label="dependent (dashed arc below)"),
        Line2D([], [], linestyle="none", marker="o", markersize=_MARKER_SIZE, color=_INK, label="in a group"),
        Line2D([], [], linestyle="none", marker="o", markersize=_MARKER_SIZE, markerfacecolor="white",
               markeredgecolor=_INK, label="alone (a group of one)"),
    ]
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 0.0), ncol=2 if n < 8 else 4,
              frameon=False, fontsize=8)
    return fig


# ------------------------------------------------------------------ dependence
def _category_labels(graph: ForestGraph, feature: int) -> list[str] | None:
    levels = graph.category_levels.get(graph.feature_names[feature])
    return [str(level) for level in levels] if levels is not None else None


def _axis_values(graph: ForestGraph, matrix: np.ndarray, feature: int, points: int) -> tuple[np.ndarray, bool]:
    """Grid values of one feature: its most frequent categories, or quantiles of its observed values."""
    column = matrix[:, feature]
    column = column[~np.isnan(column)]
    if column.size == 0:
        raise DataError(f"column {graph.feature_names[feature]!r} is missing (NaN) in every sampled row")
    if graph.feature_types[feature] == "categorical":
        values, counts = np.unique(column.astype(np.int64), return_counts=True)
        keep = np.sort(values[np.argsort(-counts, kind="stable")[:_MAX_CATEGORIES]])
        return keep.astype(np.float64), True
    return np.unique(np.quantile(column, np.linspace(0.02, 0.98, points))), False


def _held_values(graph: ForestGraph, matrix: np.ndarray, feature: int) -> tuple[np.ndarray, list[str]]:
    """Values at which the second feature is held: quantiles (numeric) or the most frequent categories."""
    column = matrix[:, feature]
    column = column[~np.isnan(column)]
    if graph.feature_types[feature] == "categorical":
        values, counts = np.unique(column.astype(np.int64), return_counts=True)
        keep = np.sort(values[np.argsort(-counts, kind="stable")[:_MAX_CATEGORY_LINES]])
        return keep.astype(np.float64), _tick_labels(graph, feature, keep)
    values = np.quantile(column, _LINE_QUANTILES)
    _, first = np.unique(values, return_index=True)
    first = np.sort(first)
    quantiles = np.asarray(_LINE_QUANTILES)[first]
    return values[first], [f"{q:.0%} quantile = {number_text(v)}" for q, v in zip(quantiles, values[first], strict=True)]


def _tick_labels(graph: ForestGraph, feature: int, codes: np.ndarray) -> list[str]:
    labels = _category_labels(graph, feature)
    return [labels[int(c)] if labels is not None and 0 <= int(c) < len(labels) else str(int(c)) for c in codes]


def dependence_svg(canvas: Canvas, graph: ForestGraph, matrix: np.ndarray, feature_a: str, feature_b: str,
                   output: int | None) -> str:
    """Partial dependence of ``feature_a`` at fixed values of ``feature_b`` (left) and the two-way surface (right)."""
    names = list(graph.feature_names)
    a, b = names.index(feature_a), names.index(feature_b)
    # The surface grids come first: they raise the clear error for a column missing in every sampled row.
    surface_a, a_categorical = _axis_values(graph, matrix, a, _SURFACE_POINTS)
    surface_b, b_categorical = _axis_values(graph, matrix, b, _SURFACE_POINTS)
    curve_x, _ = _axis_values(graph, matrix, a, _CURVE_POINTS)
    held, held_labels = _held_values(graph, matrix, b)
    line_grid = np.column_stack([np.tile(curve_x, held.size), np.repeat(held, curve_x.size)])
    mesh_a, mesh_b = np.meshgrid(surface_a, surface_b)
    surface_grid = np.column_stack([mesh_a.ravel(), mesh_b.ravel()])
    values = partial_dependence(graph, matrix, [a, b], np.vstack([line_grid, surface_grid]), output=output)
    lines = values[: line_grid.shape[0]].reshape(held.size, curve_x.size)
    surface = values[line_grid.shape[0]:].reshape(surface_b.size, surface_a.size)

    from matplotlib.ticker import MaxNLocator

    fig, (left, right) = canvas.figure(1, 2, figsize=(11.0, 4.2), gridspec_kw={"width_ratios": [1.15, 1.0]})
    x_positions = np.arange(curve_x.size) if a_categorical else curve_x
    for i, (curve, label) in enumerate(zip(lines, held_labels, strict=True)):
        left.plot(x_positions, curve, color=SERIES_COLOURS[i % len(SERIES_COLOURS)],
                  linestyle=SERIES_LINES[i % len(SERIES_LINES)], marker=SERIES_MARKERS[i % len(SERIES_MARKERS)],
                  markevery=max(1, curve.size // 6), markersize=5, linewidth=1.6, label=f"{feature_b}: {label}")
    if a_categorical:
        left.set_xticks(x_positions, _tick_labels(graph, a, curve_x), rotation=30, ha="right")
    left.set_xlabel(feature_a)
    left.set_ylabel("partial dependence (raw prediction)")
    left.set_title(f"{feature_a} with {feature_b} held fixed", fontsize=10)
    left.legend(fontsize=7.5, frameon=False, loc="best")

    xs = np.arange(surface_a.size) if a_categorical else surface_a
    ys = np.arange(surface_b.size) if b_categorical else surface_b
    image = right.pcolormesh(xs, ys, surface, cmap="cividis", shading="nearest", rasterized=True)
    right.grid(False)
    fig.colorbar(image, ax=right, label="partial dependence (raw prediction)")
    if a_categorical:
        right.set_xticks(xs, _tick_labels(graph, a, surface_a), rotation=30, ha="right")
    else:
        right.xaxis.set_major_locator(MaxNLocator(5))
    if b_categorical:
        right.set_yticks(ys, _tick_labels(graph, b, surface_b))
    else:
        right.yaxis.set_major_locator(MaxNLocator(6))
    right.set_xlabel(feature_a)
    right.set_ylabel(feature_b)
    right.set_title("two-way partial dependence", fontsize=10)
    fig.tight_layout()
    return canvas.svg(fig)


# ------------------------------------------------------------------ rounds
def rounds_svg(canvas: Canvas, graph: ForestGraph, leading: pd.DataFrame, output: int | None) -> tuple[str, pd.DataFrame]:
    """Cumulative nested gain of the leading pairs over boosting rounds, and when each entered.

    Returns
    -------
    svg : str
    entries : DataFrame
        ``feature_a``, ``feature_b``, ``verdict``, ``first_round`` and
        ``half_round`` (1-based: first round, and the round reaching half the
        final gain), ``final_gain``; pairs that never share a path are left out.
    """
    by_round = structure_by_round(graph, max_order=2, output=output)
    by_round = by_round[by_round["order"] == 2]
    keys = [frozenset((str(a), str(b))) for a, b in zip(by_round["feature_a"], by_round["feature_b"], strict=True)]
    keys = pd.Series(keys, index=by_round.index, dtype=object)
    last_round = int(by_round["round"].max()) if len(by_round) else 0
    fig, ax = canvas.figure(figsize=(8.4, 4.6))
    entries = []
    for i, row in enumerate(leading.itertuples(index=False)):
        part = by_round[keys == frozenset((str(row.feature_a), str(row.feature_b)))].sort_values("round")
        if part.empty:
            continue
        rounds = np.append(part["round"].to_numpy(), last_round)
        gain = np.append(part["nested_gain"].to_numpy(), part["nested_gain"].to_numpy()[-1])
        colour, line, marker = (SERIES_COLOURS[i % len(SERIES_COLOURS)], SERIES_LINES[i % len(SERIES_LINES)],
                                SERIES_MARKERS[i % len(SERIES_MARKERS)])
        ax.step(rounds + 1, gain, where="post", color=colour, linestyle=line, linewidth=1.8,
                label=f"{row.feature_a} × {row.feature_b} ({row.verdict})")
        ax.plot(rounds[:-1] + 1, gain[:-1], linestyle="none", marker=marker, markersize=4, color=colour,
                markevery=max(1, (rounds.size - 1) // 8))
        half = part[part["nested_gain"] >= 0.5 * part["nested_gain"].iloc[-1]]["round"]
        entries.append({"feature_a": str(row.feature_a), "feature_b": str(row.feature_b), "verdict": row.verdict,
                        "first_round": int(part["first_round"].iloc[0]) + 1,
                        "half_round": int(half.iloc[0]) + 1 if len(half) else math.nan,
                        "final_gain": float(part["nested_gain"].iloc[-1])})
    ax.set_xlabel("boosting round")
    ax.set_ylabel("cumulative nested gain of the pair")
    ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(0.0, -0.14), ncol=2)
    columns = ["feature_a", "feature_b", "verdict", "first_round", "half_round", "final_gain"]
    return canvas.svg(fig), pd.DataFrame(entries, columns=columns)


# ------------------------------------------------------------------ constraint search
def search_curve_svg(canvas: Canvas, steps: pd.DataFrame, unconstrained: dict, chosen_step: int, threshold: float,
                     metric: str) -> str:
    """Held-out loss of each kept step (± one standard error), the unconstrained model and the chosen step.

    ``steps`` has the columns ``step``, ``loss``, ``loss_se`` of
    :class:`treeprobe.search.SearchResult`; ``threshold`` is the lowest loss
    plus its standard error (the one-standard-error rule).
    """
    fig, ax = canvas.figure(figsize=(8.4, 4.4))
    x, loss, se = steps["step"].to_numpy(), steps["loss"].to_numpy(), steps["loss_se"].to_numpy()
    free, free_se = float(unconstrained["loss"]), float(unconstrained["loss_se"])
    ax.axhspan(free - free_se, free + free_se, color=SERIES_COLOURS[1], alpha=0.12, linewidth=0)
    ax.axhline(free, color=SERIES_COLOURS[1], linestyle="dashed", linewidth=1.4,
               label=f"unconstrained model ({free:.4g} ± {free_se:.2g})")
    ax.axhline(threshold, color=_INK, linestyle=(0, (1, 2)), linewidth=1.0,
               label=f"lowest loss + one standard error ({threshold:.4g})")
    ax.errorbar(x, loss, yerr=se, color=SERIES_COLOURS[0], marker="o", markersize=5, linewidth=1.8, capsize=3,
                label="groups of the step (± one standard error)")
    chosen = steps["step"] == chosen_step
    ax.scatter(x[chosen], loss[chosen], s=170, marker="D", facecolors="none", edgecolors=_INK, linewidths=1.6, zorder=4,
               label=f"chosen: step {chosen_step}")
    ax.set_xticks(x)
    ax.set_xlabel("step (0 = every feature alone; each step allows one more interaction)")
    ax.set_ylabel(f"held-out {metric} (mean over folds)")
    ax.legend(fontsize=8, frameon=False, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=2)
    return canvas.svg(fig)
