"""One self-contained HTML page with the whole picture of a model's feature interactions.

:func:`report` runs (or takes) the triage of :mod:`treeprobe.verdicts` and the
constraint suggestion of :mod:`treeprobe.constraints`, draws the figures
(:mod:`treeprobe.reporting.figures`) and fills the page template
(:mod:`treeprobe.reporting.page`): a single HTML file with inline CSS, figures
as inline SVG, no scripts and no link to anything outside the file, so it opens
from disk, can be mailed as it is, and prints.

Sections of the page, each an HTML ``<section>`` whose ``id`` is listed in
:data:`SECTIONS`:

``summary``
    Model, data, what was computed and where the triage came from, how long
    each step took, tally of verdicts.
``pairs``
    Ranked pair table with verdicts (text label and a marker glyph), the rule
    of each verdict (from the triage result), and the numbers behind them.
``pair-map``
    Path structure (``cover_share``) against H² for every pair, one marker
    shape and fill per verdict; pairs of negligible size h ringed.
``links``
    "Groups and links": the used features on a baseline ordered by the
    suggested groups, interaction arcs above, dependent arcs below.
``dependence``
    For the leading pairs: partial dependence of one feature at fixed values
    of the other (Friedman 2001 [1]_, eq. 9), and the two-way surface.
``rounds``
    When the leading pairs entered the model: cumulative nested gain over
    boosting rounds.
``constraints``
    Suggested interaction-constraint groups, the parameters and snippets to
    copy, the cross-validated cost when a validation is given, and the curve,
    table and chosen groups of a constraint search when one is given.
``changes`` (only with ``compare_with``)
    Changes since the previous version: pairs and features new, gone or
    changed (:func:`treeprobe.compare.compare_models`), placed before the
    cautions.
``cautions``
    What the numbers cannot say, and the thresholds used.

References
----------
.. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", Annals of Statistics 29(5), 1189-1232, 2001.
.. [2] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 916-954, 2008.
"""

from __future__ import annotations

import inspect
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..checks import check_int, check_progress
from ..compare import TRIAGE_OPTIONS, ModelComparison, compare_models
from ..constraints import ConstraintSuggestion, ValidationResult, suggest_constraints
from ..data import model_matrix
from ..errors import DataError, ParameterError
from ..graph import ForestGraph
from ..io import load_model
from ..output import atomic_write
from ..progress import progress_bar
from ..search import SearchResult
from ..verdicts import TriageResult, triage
from .figures import (
    Canvas,
    arc_layout,
    dependence_svg,
    draw_arc_diagram,
    pair_map_svg,
    pyplot,
    rounds_svg,
    search_curve_svg,
)
from .page import CHANGES_SECTION, SECTIONS, render_page
from .style import VERDICT_STYLES

__all__ = ["report", "SECTIONS", "CHANGES_SECTION", "VERDICT_STYLES"]

_MAX_LINKED_FEATURES = 60


class _Steps:
    """Runs the report's steps and keeps how long each took, for the summary."""

    def __init__(self) -> None:
        self.times: list[tuple[str, float]] = []

    def run(self, name: str, work: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
        started = time.perf_counter()
        value = work(*args, **kwargs)
        self.times.append((name, time.perf_counter() - started))
        return value


def _check_optional(name: str, value: Any, kind: type) -> None:
    if value is not None and not isinstance(value, kind):
        raise ParameterError(f"{name} must be a {kind.__name__} or None, got {type(value).__name__}")


def _check_options(out: Any, *, top_pairs: Any, title: Any, triage_result: Any, triage_origin: Any,
                   suggestion: Any, validation: Any, search: Any, triage_options: Any, progress: Any) -> Path:
    """Every option checked before any work; returns the output path."""
    if not isinstance(out, (str, os.PathLike)) or not str(out):
        raise ParameterError(f"out must be a file path, got {out!r}")
    check_int("top_pairs", top_pairs, low=1)
    check_progress(progress)
    _check_optional("title", title, str)
    _check_optional("triage_origin", triage_origin, str)
    _check_optional("triage_options", triage_options, dict)
    _check_optional("triage_result", triage_result, TriageResult)
    _check_optional("suggestion", suggestion, ConstraintSuggestion)
    _check_optional("validation", validation, ValidationResult)
    _check_optional("search", search, SearchResult)
    if triage_result is not None and triage_options:
        raise ParameterError("triage_options has no effect when triage_result is given; pass one or the other")
    if triage_result is None and triage_origin is not None:
        raise ParameterError("triage_origin says where a given triage_result came from; it needs triage_result")
    if triage_origin is not None and not triage_origin.strip():
        raise ParameterError("triage_origin must say where the triage came from, got an empty string")
    known = [name for name, p in inspect.signature(triage).parameters.items() if p.kind == p.KEYWORD_ONLY]
    unknown = sorted(set(triage_options or {}) - set(known))
    if unknown:
        raise ParameterError(f"triage_options: unknown option(s) {', '.join(map(repr, unknown))}; "
                             f"triage accepts {', '.join(known)}")
    target = Path(out)
    if target.is_dir():
        raise ParameterError(f"out={str(out)!r} is a folder; give a file name such as {str(target / 'report.html')!r}")
    if not target.parent.is_dir() and str(target.parent):
        raise ParameterError(f"out={str(out)!r}: the folder {target.parent} does not exist")
    return target


def _features_of(X: Any, y: Any) -> Any:
    """``X`` without the target column when ``y`` names one."""
    if isinstance(y, str):
        if not isinstance(X, pd.DataFrame):
            raise DataError(f"y={y!r} names a column, but X is not a DataFrame")
        if y not in X.columns:
            raise DataError(f"target column {y!r} is not in the data; columns are {', '.join(map(str, X.columns))}")
        return X.drop(columns=[y])
    return X


def _target_text(y: Any) -> str:
    if isinstance(y, str):
        return f"column {y}"
    return "given as an array" if y is not None else "none (no noise-floor refits possible)"


def _check_same_features(triage_result: TriageResult, graph: ForestGraph) -> None:
    if tuple(triage_result.ensemble.feature_names) != tuple(graph.feature_names):
        raise DataError("triage_result was computed on a model with other features "
                        f"({', '.join(triage_result.ensemble.feature_names[:6])} ...) than this model "
                        f"({', '.join(graph.feature_names[:6])} ...)")


def _figure_rows(matrix: np.ndarray, n_rows: int, random_state: int) -> np.ndarray:
    """A seeded sample of the triage's size, so the figures' cost is bounded the same way."""
    if n_rows >= matrix.shape[0]:
        return matrix
    return matrix[np.sort(np.random.default_rng(random_state).choice(matrix.shape[0], size=n_rows, replace=False))]


def _check_same_new_version(comparison: ModelComparison, graph: ForestGraph) -> None:
    """A given comparison must have this model as its new version: same library, trees and splits per feature."""
    new = comparison.facts.get("new", {})
    same = (new.get("library"), new.get("n_trees"), new.get("n_features")) == (graph.library, graph.n_trees,
                                                                              graph.n_features)
    if same and comparison.facts.get("output") is None:
        splits = dict(zip(graph.feature_names, graph.feature_totals()["splits"], strict=True))
        same = all(splits.get(f) == n for f, n in zip(comparison.features["feature"], comparison.features["splits_new"],
                                                        strict=True))
    if not same:
        raise DataError(f"compare_with compares another new version ({new.get('source')}: {new.get('library')}, "
                        f"{new.get('n_trees')} trees) than this model ({graph.source}: {graph.library}, "
                        f"{graph.n_trees} trees)")


def _comparison(steps: _Steps, compare_with: Any, graph: ForestGraph, X: Any, triage_options: dict | None,
                progress: bool | None) -> ModelComparison | None:
    """The comparison with the previous version: given, or computed on the report's data with its triage options."""
    if compare_with is None:
        return None
    if isinstance(compare_with, ModelComparison):
        _check_same_new_version(compare_with, graph)
        return compare_with
    options = {key: value for key, value in (triage_options or {}).items() if key in TRIAGE_OPTIONS}
    return steps.run("comparison with the previous version", compare_models, compare_with, graph, X,
                     output=(triage_options or {}).get("output"), triage_options=options, progress=progress)


def _leading_pairs(pairs: pd.DataFrame, count: int) -> pd.DataFrame:
    """Interaction and dependent pairs by strength, then the other pairs sharing paths in triage order."""
    strong = pairs[pairs["verdict"].isin(["interaction", "dependent"])].sort_values("strength", ascending=False,
                                                                                   kind="stable")
    rest = pairs[~pairs["verdict"].isin(["interaction", "dependent", "absent"])]
    return pd.concat([strong, rest]).head(count)


def _links_svg(canvas: Canvas, result: TriageResult, suggestion: ConstraintSuggestion) -> tuple[str | None, str]:
    features = result.features
    used = features.loc[features["used"].astype(bool), "feature"].astype(str).tolist()
    if not used:
        return None, ""
    note = ""
    if len(used) > _MAX_LINKED_FEATURES:
        in_pairs = set(result.pairs.loc[result.pairs["verdict"].isin(["interaction", "dependent"]),
                                        ["feature_a", "feature_b"]].astype(str).to_numpy().ravel())
        grouped = {str(n) for group in suggestion.groups for n in group}
        kept = [n for n in used if n in in_pairs or n in grouped]
        note = f" {len(used) - len(kept)} used features without a drawn pair or group are left out."
        used = kept or used[:_MAX_LINKED_FEATURES]
    layout = arc_layout(result.pairs, used, suggestion.groups)
    return canvas.svg(draw_arc_diagram(canvas, layout)), note


def _draw_figures(canvas: Canvas, steps: _Steps, graph: ForestGraph, matrix: np.ndarray, result: TriageResult,
                  suggestion: ConstraintSuggestion, leading: pd.DataFrame, progress: bool | None) -> dict:
    output = int(result.facts.get("output", 0) or 0) if graph.n_outputs > 1 else None
    figures: dict[str, Any] = {"dependence": [], "rounds": None,
                               "entries": pd.DataFrame(columns=["feature_a", "feature_b", "verdict", "first_round",
                                                                "half_round", "final_gain"])}
    with progress_bar(3 + len(leading), "report figures", enabled=progress) as bar:
        figures["pair_map"] = steps.run("figure: pair map", pair_map_svg, canvas, result.pairs, result.thresholds)
        bar.update(1)
        figures["links"], figures["links_note"] = steps.run("figure: groups and links", _links_svg, canvas, result,
                                                            suggestion)
        bar.update(1)
        started = time.perf_counter()
        for row in leading.itertuples(index=False):
            svg = dependence_svg(canvas, graph, matrix, str(row.feature_a), str(row.feature_b), output)
            figures["dependence"].append((row, svg))
            bar.update(1)
        steps.times.append(("figures: partial dependence of the leading pairs", time.perf_counter() - started))
        if not leading.empty:
            figures["rounds"], figures["entries"] = steps.run("figure: pairs over boosting rounds", rounds_svg,
                                                              canvas, graph, leading, output)
        bar.update(1)
    return figures


def report(
    model: Any,
    X: Any,
    y: Any = None,
    *,
    out: str | os.PathLike = "treeprobe-report.html",
    triage_result: TriageResult | None = None,
    triage_origin: str | None = None,
    suggestion: ConstraintSuggestion | None = None,
    validation: ValidationResult | None = None,
    search: SearchResult | None = None,
    top_pairs: int = 4,
    title: str | None = None,
    triage_options: dict | None = None,
    compare_with: Any = None,
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
        ``triage(graph, X, y, **triage_options)`` is run.
    triage_origin : str, optional
        Where a given ``triage_result`` came from, shown in the summary
        (e.g. "run by the treeprobe report command"); default "supplied by
        the caller". Only with ``triage_result``.
    suggestion : ConstraintSuggestion, optional
        By default ``suggest_constraints(triage_result)``.
    validation : ValidationResult, optional
        Shown when given; computing it retrains the model, so the caller decides.
    search : SearchResult, optional
        A constraint search (:func:`treeprobe.search.search_constraints`):
        its loss curve is drawn and its steps, chosen groups and parameters
        are shown in the constraints section. Computed by the caller (it
        retrains many times).
    top_pairs : int, default 4
        Number of leading pairs drawn in the dependence and rounds sections.
    title : str, optional
        Page title; default names the model source.
    triage_options : dict, optional
        Keyword arguments for :func:`treeprobe.verdicts.triage` (``sample``,
        ``resamples``, ``null_refits``, ...).
    compare_with : model or ModelComparison, optional
        The previous version of the model (anything
        :func:`treeprobe.load_model` accepts) or a comparison from
        :func:`treeprobe.compare_models` with this model as the new version.
        Adds the section "Changes since the previous version". A model is
        compared on ``X`` (both versions triaged without a target, with the
        ``triage_options`` that need none).
    progress : bool, optional
        Progress bars on standard error; default only on a terminal.

    Returns
    -------
    pathlib.Path
        The written file.

    Raises
    ------
    ParameterError
        For an invalid option.
    DataError
        For data that do not fit the model.
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
    target = _check_options(out, top_pairs=top_pairs, title=title, triage_result=triage_result,
                            triage_origin=triage_origin, suggestion=suggestion, validation=validation,
                            search=search, triage_options=triage_options, progress=progress)
    canvas = Canvas(pyplot())
    steps = _Steps()
    graph = steps.run("load the model", load_model, model)
    matrix = model_matrix(graph, _features_of(X, y))
    # First of the data steps: a previous version the data do not fit stops the report before the long triage.
    comparison = _comparison(steps, compare_with, graph, _features_of(X, y), triage_options, progress)
    if triage_result is None:
        options = {"progress": progress, **(triage_options or {})}
        triage_result = steps.run("triage: structure, H-statistics, interval, noise floor, dependence", triage,
                                  graph, X, y, **options)
    else:
        _check_same_features(triage_result, graph)
        triage_origin = triage_origin or "supplied by the caller"
    if suggestion is None:
        suggestion = steps.run("constraint suggestion", suggest_constraints, triage_result)
    n_rows = int(triage_result.facts.get("n_rows", matrix.shape[0]) or matrix.shape[0])
    figure_rows = _figure_rows(matrix, n_rows, int((triage_options or {}).get("random_state", 0)))
    leading = _leading_pairs(triage_result.pairs, top_pairs)
    figures = _draw_figures(canvas, steps, graph, figure_rows, triage_result, suggestion, leading, progress)
    if search is not None:
        figures["search"] = steps.run("figure: constraint search curve", search_curve_svg, canvas, search.steps,
                                      search.unconstrained, search.chosen_step, search.facts["threshold"],
                                      search.facts["metric"])
    text = render_page(graph=graph, result=triage_result, suggestion=suggestion, validation=validation,
                       search=search, figures=figures, steps=steps.times,
                       triage_origin=triage_origin, target_text=_target_text(y),
                       rows_available=matrix.shape[0], n_figure_rows=figure_rows.shape[0], title=title,
                       comparison=comparison)
    return atomic_write(target, lambda handle: handle.write(text))
