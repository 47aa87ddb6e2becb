"""Page assembly: the results and figures of a report turned into the values of the HTML template.

The page itself (markup and CSS) is the jinja2 template
``templates/page.html.j2``, rendered with autoescaping on, so every feature
name, title and note is escaped; only the SVG that matplotlib wrote (XML it
escaped itself) is inserted as markup. Functions here only choose and format
values: rule texts come from the triage result's ``rules`` and the verdict
order from :data:`treeprobe.verdicts.VERDICTS`.
"""

from __future__ import annotations

import datetime as _datetime
from collections.abc import Sequence
from typing import Any

import jinja2
import numpy as np
import pandas as pd
from markupsafe import Markup

from ..graph import ForestGraph
from .style import VERDICT_STYLES, number_text

__all__ = ["SECTIONS", "CHANGES_SECTION", "HEADINGS", "render_page"]

SECTIONS = ("summary", "pairs", "pair-map", "links", "dependence", "rounds", "constraints", "cautions")
# Shown, before the cautions, only when the report compares the model with a previous version.
CHANGES_SECTION = "changes"
HEADINGS = {
    "summary": "Summary",
    "pairs": "Feature pairs and verdicts",
    "pair-map": "Structure against H",
    "links": "Groups and links",
    "dependence": "How the leading pairs act together",
    "rounds": "When the pairs entered the model",
    "constraints": "Suggested interaction constraints",
    "changes": "Changes since the previous version",
    "cautions": "Cautions",
}
_MAX_TABLE_PAIRS = 40

# Columns of the pair table: the fields a column needs, its header and whether it has an interval. A column is
# shown when the triage provides its field, so the table follows the triage's documented columns.
_PAIR_COLUMNS = (
    ("strength", "Strength (h / sd)", False),
    ("h2", "H² [interval]", True),
    ("null_h2", "Null H²", False),
    ("h", "h [interval]", True),
    ("null_h", "Noise floor of h", False),
    ("p_adjusted", "p (family-wise)", False),
    ("dependence", "Dependence", False),
    ("paths", "Paths", False),
    ("cover_share", "Cover share", False),
    ("nested_gain", "Nested gain", False),
)

_ENVIRONMENT = jinja2.Environment(
    loader=jinja2.PackageLoader("treeprobe.reporting", "templates"),
    autoescape=True,
    undefined=jinja2.StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
)
_ENVIRONMENT.filters["num"] = number_text


def _seconds(value: float) -> str:
    return f"{value:.2f} s" if value < 10 else f"{value:.1f} s"


def _interval(row: dict, point: str) -> str | None:
    low, high = row.get(f"{point}_low"), row.get(f"{point}_high")
    if low is None or high is None or pd.isna(low) or pd.isna(high):
        return None
    return f"[{number_text(low)}, {number_text(high)}]"


def _verdict(verdict: str) -> dict:
    return {"name": verdict, "glyph": VERDICT_STYLES.get(verdict, VERDICT_STYLES["absent"])["glyph"]}


def _summary(graph: ForestGraph, result: Any, *, rows_available: int, target_text: str,
             steps: Sequence[tuple[str, float]], triage_origin: str | None) -> dict:
    facts = result.facts
    info = graph.summary()
    categorical = f" ({info['n_categorical_features']} categorical)" if info["n_categorical_features"] else ""
    outputs = f"{info['n_outputs']}" + (f" (this report: output {facts.get('output', 0)})" if info["n_outputs"] > 1
                                         else "")
    n_rows = facts.get("n_rows")
    resamples = int(facts.get("resamples", 0) or 0)
    refits = int(facts.get("null_refits", 0) or 0)
    confidence = result.thresholds.get("confidence", 0.9)
    took = _seconds(float(facts.get("seconds", 0.0)))
    tally = result.pairs["verdict"].value_counts()
    return {
        "n_pairs": f"{len(result.pairs):,}",
        "tally": [{**_verdict(v), "count": int(tally.get(v, 0))} for v in VERDICT_STYLES],
        "model": [
            ("Source", info["source"]),
            ("Library / objective", f"{info['library']} / {info['objective'] or '-'} (link: {info['link']})"),
            ("Trees", f"{info['n_trees']:,} ({number_text(info['mean_leaves'])} leaves on average, at most "
                      f"{info['max_leaves']:,})"),
            ("Outputs", outputs),
            ("Depth", f"at most {info['max_depth']}, {number_text(info['mean_tree_depth'])} on average"),
            ("Features", f"{info['n_features_used']} used of {info['n_features']}{categorical}"),
        ],
        "data": [
            ("Rows", f"{number_text(n_rows)} used for H-statistics and dependence, of "
                     f"{number_text(facts.get('n_rows_available', rows_available))} available"),
            ("Target", target_text),
            *([("Class analysed", facts["class_analysed"])] if facts.get("class_analysed") else []),
        ],
        "computed": [
            ("Path structure", "every root-to-leaf path of every tree (no data needed)"),
            ("H-statistics", f"Friedman & Popescu (2008) H² of every pair sharing a path, exact for trees, on "
                             f"{number_text(n_rows)} rows"),
            ("Interval", f"{resamples} half-size row subsamples, {confidence:.0%} subsampling interval, for the "
                         f"pairs whose effect reaches {result.thresholds.get('min_effect', 0.05):g} of the prediction "
                         "spread (below it no interval makes an interaction)"
             if resamples else "none (no resamples): point values only"),
            ("Noise floor", f"{refits} refits on targets without interaction, all pairs tested together at "
                            f"family-wise level {result.thresholds.get('level', 0.05):g}"
                            + (", second round with the clear interactions kept in the null"
                               if facts.get("floor_rounds") == 2 else "")
             if refits else "no refits: the floor is the convention min_h2 only"),
            *([("Refit recipe", facts["refit_recipe_text"])] if facts.get("refit_recipe_text") else []),
            ("Triage", f"run by this report (it took {took})" if triage_origin is None
             else f"{triage_origin} (it took {took})"),
        ],
        "steps": [(name, _seconds(seconds)) for name, seconds in steps],
        "total": _seconds(sum(seconds for _, seconds in steps)),
    }


def _pairs(result: Any) -> dict:
    pairs = result.pairs
    shown = pairs[pairs["verdict"] != "absent"].head(_MAX_TABLE_PAIRS)
    columns = [(field, header, interval) for field, header, interval in _PAIR_COLUMNS if field in pairs.columns]
    rows = []
    for rank, row in enumerate(shown.to_dict(orient="records"), start=1):
        verdict = str(row["verdict"])
        rows.append({
            "rank": rank, "feature_a": str(row["feature_a"]), "feature_b": str(row["feature_b"]),
            "verdict": _verdict(verdict),
            "leans": str(row["leans"]) if verdict == "dependent" and "leans" in row else None,
            "faint": bool(row.get("faint", False)) and not pd.isna(row.get("faint", False)),
            "cells": [(number_text(row[field]), _interval(row, field) if interval else None)
                      for field, _, interval in columns],
        })
    absent = int((pairs["verdict"] == "absent").sum())
    more = int((pairs["verdict"] != "absent").sum()) - len(shown)
    notes = []
    if more > 0:
        notes.append(f"{more} further pair(s) sharing paths are not shown (the table stops at {_MAX_TABLE_PAIRS}).")
    if absent:
        notes.append(f"{absent} pair(s) with verdict absent are left out.")
    known = [v for v in VERDICT_STYLES if v in result.rules] + [v for v in result.rules if v not in VERDICT_STYLES]
    return {
        "headers": [header for _, header, _ in columns],
        "rows": rows,
        "notes": notes,
        "rules": [{**_verdict(v), "text": result.rules[v]} for v in known],
    }


def _leading(result: Any, figures: dict) -> list[dict]:
    max_dependence = float(result.thresholds.get("max_dependence", 0.7))
    leading = []
    for row, svg in figures["dependence"]:
        dependence = float(row.dependence) if not pd.isna(row.dependence) else None
        leading.append({
            "feature_a": str(row.feature_a), "feature_b": str(row.feature_b), "verdict": str(row.verdict),
            "h2": row.h2, "strength": row.strength, "dependence": dependence,
            "extrapolates": dependence is not None and dependence >= max_dependence, "svg": Markup(svg),
        })
    return leading


def _validation(validation: Any) -> dict | None:
    if validation is None:
        return None
    summary = validation.summary
    metrics = []
    for metric, values in summary.items():
        if isinstance(values, dict) and "difference_mean" in values:
            metrics.append({"name": metric, "better": "lower" if metric in ("rmse", "log_loss") else "higher",
                            **{k: values[k] for k in ("constrained_mean", "unconstrained_mean", "difference_mean",
                                                      "difference_low", "difference_high")},
                            "relative_percent": 100 * values["relative_change"]})
    # Folds are numbered 1..K in the order the validation lists them, whatever numbering its table uses.
    number_of = {fold: k for k, fold in enumerate(sorted(validation.folds["fold"].unique()), start=1)}
    folds = [{"fold": number_of[record.fold], "metric": record.metric, "unconstrained": record.unconstrained,
              "constrained": record.constrained, "difference": record.difference}
             for record in validation.folds.itertuples(index=False)]
    return {
        "n_folds": summary.get("n_folds", len(number_of)),
        "library": summary.get("library", ""),
        "rounds": summary.get("num_boost_round", "?"),
        "metrics": metrics,
        "stray_paths": len(validation.stray_paths),
        "crossing": [f"{a} × {b}" for a, b in validation.cross_group_pairs],
        "folds": folds,
        "notes": list(summary.get("notes", [])),
    }


def _change_rows(frame: pd.DataFrame, columns: Sequence[tuple[str, str]]) -> list[list[tuple[str, bool]]]:
    """Cells (text, is a number) of the rows that changed: ``field`` is a column, or ``m:old-new`` both versions."""
    rows = []
    for row in frame[frame["status"] != "same"].head(_MAX_TABLE_PAIRS).to_dict(orient="records"):
        cells = []
        for field, _ in columns:
            if field.endswith(":old-new"):
                measure = field.split(":")[0]
                cells.append((f"{number_text(row[f'{measure}_old'])} → {number_text(row[f'{measure}_new'])}", True))
            elif isinstance(row[field], (bool, np.bool_)):
                cells.append(("yes" if row[field] else "no", False))
            elif isinstance(row[field], str):
                cells.append((row[field], False))
            else:
                cells.append((number_text(row[field]), True))
        rows.append(cells)
    return rows


def _changes(comparison: Any) -> dict | None:
    """The values of the section comparing this model with its previous version."""
    if comparison is None:
        return None
    facts = comparison.facts
    pair_columns = [("feature_a", "Feature a"), ("feature_b", "Feature b"), ("status", "Status"),
                    ("paths:old-new", "Paths, old → new"), ("cover_share:old-new", "Cover share, old → new"),
                    ("cover_share_change", "Change")]
    if facts.get("has_data"):
        pair_columns += [("h2:old-new", "H², old → new"), ("verdict_old", "Verdict, old"), ("verdict_new", "Verdict, new"),
                         ("verdict_changed", "Verdict changed")]
    feature_columns = [("feature", "Feature"), ("status", "Status"), ("splits:old-new", "Splits, old → new"),
                       ("gain_share:old-new", "Gain share, old → new"), ("gain_share_change", "Change")]
    same = facts["counts"]["pairs"]["same"]
    return {
        "previous": f"{facts['old']['source']} ({facts['old']['library']}, {facts['old']['n_trees']:,} trees)",
        "counts": facts["counts"],
        "pairs": {"headers": [h for _, h in pair_columns], "rows": _change_rows(comparison.pairs, pair_columns)},
        "features": {"headers": [h for _, h in feature_columns],
                     "rows": _change_rows(comparison.features, feature_columns)},
        "notes": ([f"{same} pair(s) with the same structure in both versions are left out."] if same else [])
                 + list(facts.get("notes", [])),
        "limits": comparison.limits,
    }


def _search(search: Any, figures: dict) -> dict | None:
    """The constraint search's curve, table rows, chosen groups, parameters and snippets."""
    if search is None:
        return None
    facts, free = search.facts, search.unconstrained
    rows = [{"step": row["step"], "added": row["added"],
             "groups": "; ".join("{" + ", ".join(group) + "}" for group in row["groups"]) or "-",
             "allowed_pairs": row["allowed_pairs"], "loss": row["loss"], "loss_se": row["loss_se"],
             "gain": row["gain"], "gain_se": row["gain_se"], "rounds": row["rounds"], "tried": row["tried"],
             "chosen": row["step"] == search.chosen_step} for row in search.steps.to_dict(orient="records")]
    return {
        "svg": Markup(figures["search"]), "metric": facts["metric"], "n_folds": facts["n_folds"],
        "family": facts["family"], "fits": facts["fits"], "seconds": _seconds(facts["seconds"]),
        "estimated_fits": facts["estimated_fits"], "stop_text": facts["stop_text"], "rows": rows,
        "chosen_step": search.chosen_step, "threshold": facts["threshold"],
        "chosen_groups": search.chosen_groups, "rounds": search.recommended_rounds,
        "free_loss": free["loss"], "free_se": free["loss_se"], "free_rounds": free["rounds"],
        "difference": free["chosen_minus_unconstrained"], "difference_se": free["chosen_minus_unconstrained_se"],
        "xgboost_param": search.suggestion.xgboost_param, "lightgbm_param": search.suggestion.lightgbm_param,
        "snippets": {library: search.python_snippet(library) for library in ("xgboost", "lightgbm")},
        "notes": list(search.notes),
    }


def render_page(*, graph: ForestGraph, result: Any, suggestion: Any, validation: Any, figures: dict,
                steps: Sequence[tuple[str, float]], triage_origin: str | None, target_text: str, rows_available: int,
                n_figure_rows: int, title: str | None, comparison: Any = None, search: Any = None) -> str:
    """The HTML text of the report.

    ``figures`` holds the SVG text drawn by :mod:`treeprobe.reporting.figures`:
    ``pair_map``, ``links``, ``links_note``, ``dependence`` (a list of
    (pair row, svg)), ``rounds`` (svg or None), ``entries`` (DataFrame) and,
    with a ``search``, its curve ``search``. ``comparison`` (a
    :class:`treeprobe.compare.ModelComparison`) adds the section
    ``CHANGES_SECTION`` before the cautions.
    """
    # Imported here: the package sets its version after importing this module.
    from .. import __version__

    source = graph.summary()["source"]
    rounds_svg = figures["rounds"]
    sections = list(SECTIONS)
    if comparison is not None:
        sections.insert(sections.index("cautions"), CHANGES_SECTION)
    context = {
        "title": title if title is not None else f"Feature interactions of {source}",
        "version": __version__,
        "stamp": _datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z"),
        "sections": [(key, HEADINGS[key]) for key in sections],
        "summary": _summary(graph, result, rows_available=rows_available, target_text=target_text, steps=steps,
                            triage_origin=triage_origin),
        "pairs": _pairs(result),
        "pair_map": Markup(figures["pair_map"]),
        "min_effect": result.thresholds.get("min_effect", 0.0),
        "links": Markup(figures["links"]) if figures["links"] else None,
        "links_note": figures["links_note"],
        "leading": _leading(result, figures),
        "n_figure_rows": f"{n_figure_rows:,}",
        "rounds": Markup(rounds_svg) if rounds_svg else None,
        "entries": figures["entries"].to_dict(orient="records"),
        "suggestion": suggestion,
        "snippets": {library: suggestion.python_snippet(library) for library in ("xgboost", "lightgbm")},
        "validation": _validation(validation),
        "changes": _changes(comparison),
        "search": _search(search, figures),
        "thresholds": list(result.thresholds.items()),
        "limits": result.limits,
    }
    return _ENVIRONMENT.get_template("page.html.j2").render(context)
