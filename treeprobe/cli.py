"""The ``treeprobe`` command line: a thin shell over the public API.

Exit codes: 0 success, 1 bad input (model file, data; one line on standard
error, the traceback only with ``--debug``), 2 usage error (an option value
out of range is refused before any work starts), 3 the model breaks the
policy (``check``) or the comparison holds a change named by ``--fail-on``
(``diff``).
"""

from __future__ import annotations

import argparse
import sys
import textwrap
import traceback
import warnings
from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import TYPE_CHECKING, Any

from .cautions import CAUTIONS
from .checks import check_float, check_int, check_n_jobs, check_seed
from .errors import ParameterError, TreeprobeError

# The stages (and pandas, scipy, scikit-learn behind them) are imported inside the command handlers, not here:
# `treeprobe --version`, `--help` and usage errors then answer at once instead of after a second of imports.
if TYPE_CHECKING:
    import pandas as pd

__all__ = ["main", "build_parser"]

_STRUCTURE_NOTE = (
    "Co-occurrence on a path shows what the trees combine, not that the features interact: an additive effect "
    "split in sequence, or two correlated features standing in for each other, also share paths. Measure on data "
    "(treeprobe measure) before drawing conclusions."
)
_MEASURE_NOTE = (
    "Read H² beside h: H² (column h2) is a share of the joint effect and can be large when the interaction itself "
    "is tiny; h is its size in output units, and ranks the tables by default (--sort h)."
)


class _UsageError(Exception):
    """Raised for option values argparse cannot check itself; exits with code 2."""


# ------------------------------------------------------------- door checks
def _check_sample(value: Any) -> int:
    value = check_int("--sample", value, low=0)
    if value == 1:
        raise ParameterError("--sample must be 0 (all rows) or at least 2, got 1")
    return value


def _parse_param_pairs(pairs: Sequence[str] | None) -> dict[str, Any]:
    """``--param key=value`` options as a dict; values read as JSON when they parse (0.05, true, [1, 2]), else text."""
    import json

    params: dict[str, Any] = {}
    for pair in pairs or ():
        key, sep, text = pair.partition("=")
        if not sep or not key.strip() or not text.strip():
            raise ParameterError(f"--param takes key=value (for example --param eta=0.05), got {pair!r}")
        try:
            params[key.strip()] = json.loads(text)
        except ValueError:
            params[key.strip()] = text.strip()
    return params


def _read_params_file(path: str | None) -> dict[str, Any]:
    """A --params file: a JSON object of training parameters, or the JSON of XGBoost's Booster.save_config()."""
    import json

    from .refit import params_from_xgboost_config

    if path is None:
        return {}
    try:
        with open(path, encoding="utf-8") as handle:
            content = json.load(handle)
    except OSError as exc:
        raise TreeprobeError(f"--params {path}: cannot read the file ({exc.strerror})") from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise TreeprobeError(f"--params {path}: not valid JSON ({exc})") from None
    if not isinstance(content, dict):
        raise TreeprobeError(f"--params {path}: expected a JSON object of training parameters, found a "
                             f"{type(content).__name__}")
    if isinstance(content.get("learner"), dict):
        params = params_from_xgboost_config(content)
        if not params:
            raise TreeprobeError(f"--params {path}: an XGBoost configuration without tree_train_param")
        return params
    return content


def _training_params(args: argparse.Namespace) -> dict[str, Any] | None:
    """Training parameters of the refits: the --params file, then --param options over it; None when neither."""
    params = {**_read_params_file(getattr(args, "params_file", None)), **_parse_param_pairs(getattr(args, "param", None))}
    return params or None


# Option (argparse dest) -> its check; run on every option a command has, before any file is read.
_OPTION_CHECKS: dict[str, Callable[[Any], Any]] = {
    "top": lambda v: check_int("--top", v, low=1),
    "order": lambda v: check_int("--order", v, low=1),
    "class_index": lambda v: v if v == "all" else check_int("--class", v, low=0, allow_none=True),
    "sample": _check_sample,
    "seed": lambda v: check_seed("--seed", v, allow_none=False),
    "jobs": lambda v: check_n_jobs(v, name="--jobs"),
    "resamples": lambda v: v if v is None else check_int("--resamples", v, low=0),
    "null_refits": lambda v: check_int("--null-refits", v, low=0),
    "level": lambda v: check_float("--level", v, low=0, high=0.5),
    "min_h2": lambda v: check_float("--min-h2", v, low=0, high=1),
    "min_effect": lambda v: check_float("--min-effect", v, low=0),
    "max_dependence": lambda v: check_float("--max-dependence", v, low=0, high=1),
    "min_strength": lambda v: check_float("--min-strength", v, low=0),
    "folds": lambda v: check_int("--folds", v, low=2),
    "max_steps": lambda v: check_int("--max-steps", v, low=1),
    "max_candidates": lambda v: check_int("--max-candidates", v, low=1),
    "top_pairs": lambda v: check_int("--top-pairs", v, low=0),
    "param": _parse_param_pairs,
}


def _class_choice(text: str) -> int | str:
    """--class: a 0-based class index, or "all"."""
    if text.strip().lower() == "all":
        return "all"
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a class index (0, 1, ...) or 'all', got {text!r}") from None


def _check_options(args: argparse.Namespace) -> None:
    for dest, check in _OPTION_CHECKS.items():
        if hasattr(args, dest):
            check(getattr(args, dest))
    if getattr(args, "target", None) is not None and getattr(args, "null_refits", 0) and hasattr(args, "level"):
        from .floor import check_refit_level

        check_refit_level(args.null_refits, args.level, names=("--null-refits", "--level"))
    if getattr(args, "class_index", None) == "all" and args.command != "triage":
        raise ParameterError(f"--class all is for triage; {args.command} takes one class index (0, 1, ...)")


def _parse_tree_range(text: str | None) -> slice | None:
    if text is None:
        return None
    parts = text.split(":")
    if len(parts) != 2:
        raise _UsageError(f"--trees expects A:B (e.g. 0:100, :50, 200:), got {text!r}")
    try:
        start = int(parts[0]) if parts[0] else None
        stop = int(parts[1]) if parts[1] else None
    except ValueError:
        raise _UsageError(f"--trees expects whole numbers around ':', got {text!r}") from None
    return slice(start, stop)


def _parse_pairs(text: str | None) -> list[tuple[str, str]] | None:
    if text is None:
        return None
    pairs = []
    for item in text.split(","):
        stripped = item.strip()
        if not stripped:
            continue
        parts = stripped.split(":")
        if len(parts) != 2 or not all(parts):
            raise _UsageError(f"--pairs expects name:name[,name:name...], got {stripped!r}")
        pairs.append((parts[0], parts[1]))
    if not pairs:
        raise _UsageError("--pairs is empty")
    return pairs


def _check_table(args: argparse.Namespace, available: Sequence[str], hint: str) -> None:
    """Refuse a --table the options leave out (e.g. triples without --triples) before any work."""
    if args.format == "csv" and args.table not in available:
        raise _UsageError(f"--table {args.table} is not produced with these options ({hint})")


# ------------------------------------------------------------------ output
def _emit(text: str, out: str | None) -> None:
    from .output import atomic_write

    text = text if text.endswith("\n") else text + "\n"
    if out is None:
        sys.stdout.write(text)
    else:
        atomic_write(out, lambda handle: handle.write(text))
        print(f"wrote {out}", file=sys.stderr)


def _csv_text(frame: pd.DataFrame) -> str:
    return frame.to_csv(index=False, lineterminator="\n")


def _emit_csv(tables: dict[str, pd.DataFrame], args: argparse.Namespace) -> int:
    if args.table not in tables:
        raise _UsageError(f"--table {args.table!r} is not available here; choose from {', '.join(tables)}")
    _emit(_csv_text(tables[args.table]), args.out)
    return 0


def _emit_json(payload: Any, args: argparse.Namespace) -> int:
    from .output import dumps_json

    _emit(dumps_json(payload), args.out)
    return 0


def _table(frame: pd.DataFrame, title: str, top: int | None = None) -> str:
    from .output import format_table

    return format_table(frame, max_rows=top, title=title)


def _wrap(text: str, width: int = 100) -> str:
    return "\n".join(textwrap.wrap("Note: " + text, width=width))


def _cautions() -> list[str]:
    lines = ["Cautions:"]
    for text in CAUTIONS:
        lines += textwrap.wrap(text, width=100, initial_indent="  - ", subsequent_indent="    ")
    return lines


def _sorted_by(frame: pd.DataFrame, column: str) -> pd.DataFrame:
    return frame.sort_values(column, ascending=False, kind="stable").reset_index(drop=True)


def _model_line(ens: Any) -> str:
    return f"model      {ens.source} ({ens.library}, {ens.n_trees:,} trees)"


# ------------------------------------------------------------------ loading
def _load(args: argparse.Namespace):
    from .graph import ForestGraph
    from .io import load_model, read_model_file

    loaded = read_model_file(args.model, trust_pickle=args.trust_pickle)
    # A trusted pickle keeps the live model object: it knows its full training set-up for refits.
    args.model_object = None if isinstance(loaded, ForestGraph) else loaded
    ens = loaded if isinstance(loaded, ForestGraph) else load_model(loaded)
    if ens.source == str(args.model):
        return ens
    return replace(ens, provenance=replace(ens.provenance, source=str(args.model)))


def _read_data(args: argparse.Namespace, ens: Any) -> pd.DataFrame:
    """The model's feature columns (and the target) of the data file, checked and coerced; notes to stderr."""
    from .data import load_data

    target = getattr(args, "target", None)
    if target is not None and target in ens.feature_names:
        raise TreeprobeError(f"--target {target}: the target column {target!r} is one of the model's features; name "
                             "the column the model was trained to predict")
    frame, report = load_data(ens, args.data, target=target)
    if not getattr(args, "quiet", False):
        for note in report.coerced:
            print(f"treeprobe: note: {note}", file=sys.stderr)
    return frame


# ------------------------------------------------------------------ inspect
def _model_lines(summary: dict[str, Any]) -> list[str]:
    return [
        f"model      {summary['source']}",
        f"library    {summary['library']}   objective {summary['objective'] or '-'}   link {summary['link']}",
        f"trees      {summary['n_trees']:,}   outputs {summary['n_outputs']}   nodes {summary['n_nodes']:,}   "
        f"leaves {summary['n_leaves']:,}",
        f"depth      max {summary['max_depth']}   mean {summary['mean_tree_depth']:.2f}   "
        f"leaves per tree mean {summary['mean_leaves']:.1f}   max {summary['max_leaves']}",
        f"features   {summary['n_features_used']} of {summary['n_features']} used"
        + (f" ({summary['n_categorical_features']} categorical)" if summary["n_categorical_features"] else ""),
    ]


def _inspect_table_names(order: int) -> list[str]:
    return ["features", "pairs", "triples"][: min(order, 3)] + [f"order{k}" for k in range(4, order + 1)]


def _inspect_tables(result: Any, args: argparse.Namespace) -> dict[str, pd.DataFrame]:
    tables = {"features": result.features, "pairs": result.pairs, "triples": result.triples}
    tables.update({f"order{k}": frame for k, frame in result.sets.items()})
    if args.sort:
        for name in ("pairs", "triples"):
            frame = tables[name]
            if args.sort not in frame.columns:
                raise _UsageError(
                    f"--sort {args.sort!r} is not a column of the {name} table; choose from "
                    + ", ".join(c for c in frame.columns if not c.startswith("feature_"))
                )
            tables[name] = _sorted_by(frame, args.sort)
    kept = _inspect_table_names(args.order)
    return {name: frame for name, frame in tables.items() if name in kept}


def _cmd_inspect(args: argparse.Namespace) -> int:
    from .cooccurrence import structure

    trees = _parse_tree_range(args.trees)
    _check_table(args, _inspect_table_names(args.order), f"--order {args.order}")
    ens = _load(args)
    result = structure(ens, max_order=max(args.order, 2), trees=trees, output=args.class_index)
    tables = _inspect_tables(result, args)
    if args.format == "json":
        payload = result.to_dict()
        for name in ("pairs", "triples"):
            payload.pop(name, None)
        return _emit_json({**payload, **tables}, args)
    if args.format == "csv":
        return _emit_csv(tables, args)
    lines = _model_lines(result.ensemble_summary)
    lines += ["", _table(_sorted_by(tables["features"], "gain"), "Features (by total gain)", args.top)]
    for name, title in (("pairs", "Pairs sharing a root-to-leaf path"), ("triples", "Triples sharing a root-to-leaf path")):
        if name in tables:
            lines += ["", _table(tables[name], title, args.top)]
    lines += ["", _wrap(_STRUCTURE_NOTE), *_cautions()]
    _emit("\n".join(lines), args.out)
    return 0


# ------------------------------------------------------------------ measure
def _cmd_measure(args: argparse.Namespace) -> int:
    from .measure import h_statistic

    pairs = _parse_pairs(args.pairs)
    _check_table(args, ["pairs", "against_rest", "triples"][: 3 if args.triples else 2], "add --triples")
    ens = _load(args)
    data = _read_data(args, ens)
    result = h_statistic(
        ens,
        data,
        pairs=pairs,
        triples=args.triples,
        method=args.method,
        sample=None if args.sample == 0 else args.sample,
        random_state=args.seed,
        output=args.class_index,
        scale=args.scale,
        n_jobs=args.jobs,
        progress=False if args.quiet else None,
    )
    tables = {"pairs": result.pairs, "against_rest": result.against_rest}
    if args.triples:
        tables["triples"] = result.triples
    tables = {name: _sorted_by(frame, args.sort) for name, frame in tables.items()}
    if args.format == "json":
        return _emit_json({**result.to_dict(), **tables}, args)
    if args.format == "csv":
        return _emit_csv(tables, args)
    ranked = f"ranked by {args.sort}"
    lines = [
        _model_line(ens),
        f"data       {args.data}: {result.n_rows:,} rows used, method {result.method}, scale {result.scale}, "
        f"{result.seconds:.2f} s",
        "",
        _table(tables["pairs"], f"Pairwise H-statistics, {ranked} (h2 = H², a share; h in output units)", args.top),
        "",
        _table(tables["against_rest"], f"Each feature against all others, {ranked}", args.top),
    ]
    if "triples" in tables:
        lines += ["", _table(tables["triples"], f"Three-way H-statistics, {ranked}", args.top)]
    lines += ["", _wrap(_MEASURE_NOTE), *_cautions()]
    _emit("\n".join(lines), args.out)
    return 0


# ------------------------------------------------------------------- triage
_TRIAGE_COLUMNS = ["feature_a", "feature_b", "verdict", "faint", "strength", "h2", "h2_low", "h", "h_low", "null_h",
                   "p_adjusted", "dependence", "paths", "cover_share"]
_TRIAGE_TRIPLE_COLUMNS = ["feature_a", "feature_b", "feature_c", "verdict", "strength", "h2", "h", "dependence",
                          "paths"]


def _verdict_legend(rules: dict[str, str], order: Sequence[str]) -> str:
    lines = ["Verdicts:"]
    for verdict in order:
        lines += textwrap.wrap(rules[verdict], width=100, initial_indent=f"  {verdict:<12} ", subsequent_indent=" " * 15)
    return "\n".join(lines)


def _triage_options(args: argparse.Namespace, data: pd.DataFrame) -> dict:
    """The keyword options of :func:`treeprobe.triage` (the output aside) from the command line."""
    if args.target is not None and args.target not in data.columns:
        raise TreeprobeError(f"{args.data}: no target column {args.target!r}; columns are {', '.join(map(str, data.columns))}")
    return {
        "triples": getattr(args, "triples", False),
        "sample": None if args.sample == 0 else args.sample,
        "resamples": args.resamples,
        "null_refits": args.null_refits,
        "level": args.level,
        "min_h2": args.min_h2,
        "min_effect": args.min_effect,
        "max_dependence": args.max_dependence,
        "params": _training_params(args),
        "random_state": args.seed,
        "n_jobs": args.jobs,
        "progress": False if args.quiet else None,
    }


def _run_triage(args: argparse.Namespace, ens: Any, data: pd.DataFrame):
    from .verdicts import triage

    options = _triage_options(args, data)
    return triage(getattr(args, "model_object", None) or ens, data, args.target, output=args.class_index, **options)


def _shown(pairs: pd.DataFrame, column: str, facts: dict) -> bool:
    """A triage column goes into the text table when it holds something: no all-NaN intervals, no floor columns without one."""
    if column not in pairs.columns:
        return False
    if column == "faint":
        return bool(facts["null_refits"])
    return not (pairs[column].dtype.kind == "f" and len(pairs) and pairs[column].isna().all())


def _triage_text(result: Any, args: argparse.Namespace) -> list[str]:
    from .verdicts import VERDICTS

    facts = result.facts
    counts = result.pairs["verdict"].value_counts()
    tally = ", ".join(f"{counts.get(v, 0)} {v}" for v in VERDICTS)
    retests = " (2 rounds)" if facts.get("floor_rounds") == 2 else ""
    floor = (f"noise floor from {facts['null_refits']} refits{retests} at level {result.thresholds['level']:g}"
             if facts["null_refits"] else "no noise-floor refits" + ("" if facts["has_target"] else " (give --target)"))
    lines = [
        _model_line(result.ensemble),
        f"data       {args.data}: {facts['n_rows']:,} of {facts['n_rows_available']:,} rows, "
        f"{facts['resamples']} resamples, {floor}, {facts['seconds']:.1f} s",
        f"pairs      {tally}",
        *([f"class      {facts['class_analysed']}"] if facts.get("class_analysed") else []),
        "",
        _table(result.pairs[[c for c in _TRIAGE_COLUMNS if _shown(result.pairs, c, facts)]],
               "Pairs, strongest evidence first", args.top),
    ]
    if _shown(result.pairs, "h2_low", facts):
        lines += ["", _wrap(f"h2_low, h_low: lower ends of {result.thresholds['confidence']:.0%} subsampling intervals "
                        f"({facts['resamples']} half-size subsamples), taken for the pairs whose strength reaches "
                        f"{result.thresholds['min_effect']:g}; '-' below it, where no interval makes an interaction.")]
    if len(result.triples):
        lines += ["", _table(result.triples[_TRIAGE_TRIPLE_COLUMNS], "Triples sharing a path", args.top)]
    lines += ["", _verdict_legend(result.rules, VERDICTS)]
    if facts.get("refit_recipe_text"):
        lines += [_wrap(facts["refit_recipe_text"])]
    lines += [_wrap(note) for note in facts.get("refit_notes", [])]
    lines += ["", _wrap(result.limits)]
    return lines


_TRIAGE_BY_CLASS_SCHEMA = "treeprobe.triage_by_class/1"


def _cmd_triage(args: argparse.Namespace) -> int:
    _check_table(args, ["pairs", "triples", "features"] if args.triples else ["pairs", "features"], "add --triples")
    ens = _load(args)
    data = _read_data(args, ens)
    if args.class_index == "all":
        return _triage_each_class(args, ens, data)
    result = _run_triage(args, ens, data)
    if args.format == "json":
        return _emit_json(result.to_dict(), args)
    if args.format == "csv":
        return _emit_csv({"pairs": result.pairs, "triples": result.triples, "features": result.features}, args)
    _emit("\n".join(_triage_text(result, args)), args.out)
    return 0


def _triage_each_class(args: argparse.Namespace, ens: Any, data: pd.DataFrame) -> int:
    """--class all: one triage per output (class) of the model, each with its own noise floor (the first round's
    refits shared, :func:`treeprobe.triage_classes`)."""
    import pandas as pd

    from .verdicts import triage_classes

    results = triage_classes(getattr(args, "model_object", None) or ens, data, args.target,
                             **_triage_options(args, data))
    if args.format == "json":
        return _emit_json({"schema": _TRIAGE_BY_CLASS_SCHEMA, "classes": [r.to_dict() for r in results]}, args)
    if args.format == "csv":
        tables = {name: pd.concat([getattr(r, name).assign(class_index=r.facts["output"]) for r in results],
                                  ignore_index=True) for name in ("pairs", "triples", "features")}
        return _emit_csv(tables, args)
    sections = ["\n".join(_triage_text(r, args)) for r in results]
    _emit(("\n\n" + "=" * 100 + "\n\n").join(sections), args.out)
    return 0


# ---------------------------------------------------------------- constrain
# /2: the key "search" (null without --search) holds the "search" object of treeprobe.search/1.
_CONSTRAIN_SCHEMA = "treeprobe.constrain/2"


def _validate(args: argparse.Namespace, ens: Any, data: pd.DataFrame, groups: Any):
    from .constraints import validate_constraints

    # A trusted pickle's live model knows its full training set-up; a file only what it stores.
    return validate_constraints(
        getattr(args, "model_object", None) or ens, data.drop(columns=[args.target]), data[args.target].to_numpy(),
        groups, folds=args.folds, params=_training_params(args), random_state=args.seed, n_jobs=args.jobs,
        progress=False if args.quiet else None,
    )


def _validation_lines(validation: Any, folds: int) -> list[str]:
    lines = ["", _table(validation.folds, f"Cross-validation, {folds} folds (held-out scores)")]
    for metric, values in validation.summary.items():
        if isinstance(values, dict) and "difference_mean" in values:
            lines.append(
                f"  {metric}: constrained - unconstrained = {values['difference_mean']:+.4g} "
                f"(95% interval {values['difference_low']:+.4g} to {values['difference_high']:+.4g}; "
                f"relative {values['relative_change']:+.2%})"
            )
    lines += [_wrap(n) for n in validation.summary.get("notes", [])]
    stray = validation.cross_group_pairs
    lines.append("  constrained refit: " + ("no path crosses the groups" if not stray else
                                             f"{len(stray)} pair(s) cross the groups: {stray[:5]}"))
    return lines


def _suggestion_lines(suggestion: Any, library: str) -> list[str]:
    lines = ["Suggested groups (features allowed to interact; every other used feature stands alone):"]
    lines += [f"  {i}: {', '.join(group)}" for i, group in enumerate(suggestion.groups)]
    if suggestion.unused:
        lines += [f"  unused (kept alone): {', '.join(suggestion.unused)}"]
    if suggestion.alternative is not None:
        lines += ["", "Non-overlapping alternative:"] + [f"  {i}: {', '.join(g)}" for i, g in enumerate(suggestion.alternative)]
    lines += ["", f"XGBoost   interaction_constraints = {suggestion.xgboost_param}",
              f"LightGBM  interaction_constraints = {suggestion.lightgbm_param}", "",
              "Python (" + library + "):", suggestion.python_snippet(library).rstrip()]
    lines += [_wrap(n) for n in suggestion.notes]
    return lines


def _search(args: argparse.Namespace, ens: Any, data: pd.DataFrame, triage_result: Any):
    from .search import search_constraints

    return search_constraints(
        getattr(args, "model_object", None) or ens, data.drop(columns=[args.target]), data[args.target].to_numpy(),
        triage_result=triage_result, folds=args.folds, max_steps=args.max_steps, max_candidates=args.max_candidates,
        params=_training_params(args), random_state=args.seed, n_jobs=args.jobs, progress=False if args.quiet else None,
    )


def _groups_text(groups: Sequence[Sequence[str]]) -> str:
    return "; ".join("{" + ", ".join(group) + "}" for group in groups) or "-"


def _search_curve(search: Any) -> pd.DataFrame:
    """The steps as printed and written as CSV: groups as text, the chosen step marked."""
    curve = search.steps.assign(groups=search.steps["groups"].map(_groups_text))
    return curve.assign(chosen=["<- chosen" if step == search.chosen_step else "" for step in curve["step"]])


def _search_lines(search: Any, library: str) -> list[str]:
    facts, free = search.facts, search.unconstrained
    title = (f"Constraint search by held-out {facts['metric']} ({facts['n_folds']} folds, {facts['family']}; "
             f"{facts['fits']} early-stopped fits in {facts['seconds']:.1f} s, estimated at most "
             f"{facts['estimated_fits']}); stopped: {facts['stop_text']}")
    lines = [_table(_search_curve(search).drop(columns=["groups"]), title), "",
             f"Unconstrained: {facts['metric']} {free['loss']:.4g} ± {free['loss_se']:.2g}, {free['rounds']} rounds; "
             f"the chosen step differs by {free['chosen_minus_unconstrained']:+.4g} ± "
             f"{free['chosen_minus_unconstrained_se']:.2g} (paired over folds; ± one corrected standard error)",
             "", f"Chosen groups (step {search.chosen_step}): {_groups_text(search.chosen_groups)}",
             f"XGBoost   interaction_constraints = {search.suggestion.xgboost_param}",
             f"LightGBM  interaction_constraints = {search.suggestion.lightgbm_param}",
             f"num_boost_round = {search.recommended_rounds} (median best round count of the chosen step's folds)",
             "", "Python (" + library + "):", search.python_snippet(library).rstrip()]
    return lines + [_wrap(note) for note in search.notes]


def _constrain_output(args: argparse.Namespace, ens: Any, result: Any, suggestion: Any, validation: Any,
                      search: Any) -> int:
    import pandas as pd

    library = args.library or ens.library
    if args.format == "json":
        return _emit_json({"schema": _CONSTRAIN_SCHEMA, "suggestion": suggestion.to_dict(), "triage": result.to_dict(),
                           "validation": None if validation is None else validation.to_dict(),
                           "search": None if search is None else search.to_dict()["search"]}, args)
    if args.format == "csv":
        if search is not None:
            _emit(_csv_text(_search_curve(search).drop(columns=["chosen"]).assign(
                chosen=lambda f: f["step"] == search.chosen_step)), args.out)
            return 0
        rows = [{"group": i, "feature": name} for i, group in enumerate(suggestion.groups) for name in group]
        _emit(_csv_text(pd.DataFrame(rows, columns=["group", "feature"])), args.out)
        return 0
    lines = [_model_line(ens), ""]
    lines += _search_lines(search, library) if search is not None else _suggestion_lines(suggestion, library)
    if validation is not None:
        lines += _validation_lines(validation, args.folds)
    lines += ["", _wrap(result.limits)]
    _emit("\n".join(lines), args.out)
    return 0


# ------------------------------------------------------------- check / diff
# A gate's own exit code, apart from bad input (1) and usage (2), so that a pipeline can tell them apart.
EXIT_VIOLATION = 3
_EXIT_CODES = ("Exit codes: 0 passed; 1 bad input (model, groups file or data; one line on standard error); "
               "2 usage error; 3 violation (check: a path breaks the policy; diff: a change named by --fail-on).")
# treeprobe.compare.FLAGS, written out so that --help does not import pandas; tests/test_cli_pipeline.py keeps them equal.
_FAIL_ON_CHOICES = ("new-pair", "new-interaction")


def _load_file(args: argparse.Namespace, path: str):
    """A model other than args.model (diff reads two), loaded as _load does."""
    return _load(argparse.Namespace(model=path, trust_pickle=args.trust_pickle))


def _policy_lines(result: Any, args: argparse.Namespace) -> list[str]:
    facts = result.facts
    policy = []
    if result.groups is not None:
        policy.append(f"{len(result.groups)} group(s) from {args.groups}")
        if facts["features_alone"]:
            policy.append(f"in no group, allowed alone: {', '.join(facts['features_alone'])}")
    if result.forbidden:
        policy.append("forbidden: " + ", ".join(f"{a}:{b}" for a, b in result.forbidden))
    lines = [
        f"model      {facts['source']} ({facts['library']}, {facts['n_trees']:,} trees)",
        f"policy     {'; '.join(policy)}",
        f"checked    {facts['n_paths']:,} root-to-leaf paths ({facts['n_path_sets']:,} distinct feature sets), "
        f"{facts['n_pairs_on_paths']:,} pairs sharing a path",
    ]
    if result.ok:
        return lines + ["result     PASS: every path keeps the policy", "", _wrap(result.limits)]
    kinds = result.violations["kind"].value_counts()
    table = result.violations.assign(features=result.violations["features"].map(" & ".join))
    return lines + [
        f"result     FAIL: {kinds.get('pair', 0)} pair(s) and {kinds.get('path', 0)} path set(s) break the policy, "
        f"on {facts['n_paths_breaking']:,} of {facts['n_paths']:,} paths (exit code {EXIT_VIOLATION})",
        "", _table(table, "Breaches of the policy, most paths first", args.top), "", _wrap(result.limits),
    ]


def _cmd_check(args: argparse.Namespace) -> int:
    from .policy import check_constraints, parse_forbidden

    if args.groups is None and args.forbid is None:
        raise _UsageError("check needs --groups FILE, --forbid PAIRS, or both")
    try:
        forbidden = parse_forbidden(args.forbid, name="--forbid")
    except ParameterError as exc:
        raise _UsageError(str(exc)) from None
    result = check_constraints(_load(args), args.groups, forbid=forbidden)
    if args.format == "json":
        _emit_json(result.to_dict(), args)
    else:
        _emit("\n".join(_policy_lines(result, args)), args.out)
    return 0 if result.ok else EXIT_VIOLATION


# The table for people; every column (changes, nested gain, h) is in --format json and csv.
_DIFF_PAIR_COLUMNS = ["feature_a", "feature_b", "status", "paths_old", "paths_new", "cover_share_old",
                      "cover_share_new", "h2_old", "h2_new", "verdict_old", "verdict_new"]
_DIFF_FEATURE_COLUMNS = ["feature", "status", "splits_old", "splits_new", "gain_share_old", "gain_share_new",
                         "gain_share_change"]


def _diff_data(args: argparse.Namespace, versions: Sequence[Any]) -> pd.DataFrame:
    """The input columns of both versions from the data file; notes on coerced columns once each."""
    import pandas as pd

    from .data import load_data
    from .errors import DataWarning

    frames, notes = [], []
    with warnings.catch_warnings():
        # Columns one version does not use are the other's inputs: not worth a warning.
        warnings.simplefilter("ignore", DataWarning)
        for ens in versions:
            frame, report = load_data(ens, args.data)
            frames.append(frame)
            notes += [note for note in report.coerced if note not in notes]
    if not args.quiet:
        for note in notes:
            print(f"treeprobe: note: {note}", file=sys.stderr)
    extra = frames[1].drop(columns=[c for c in frames[1].columns if c in frames[0].columns])
    return pd.concat([frames[0], extra], axis=1)


def _diff_lines(result: Any, args: argparse.Namespace, flagged: dict[str, pd.DataFrame]) -> list[str]:
    facts = result.facts
    counts = {name: ", ".join(f"{n} {status}" for status, n in tally.items()) for name, tally in facts["counts"].items()}
    changed = f"; verdict changed for {facts['verdict_changes']}" if facts["has_data"] else " (give --data for verdicts)"
    lines = [
        f"old        {facts['old']['source']} ({facts['old']['library']}, {facts['old']['n_trees']:,} trees)",
        f"new        {facts['new']['source']} ({facts['new']['library']}, {facts['new']['n_trees']:,} trees)",
        f"pairs      {counts['pairs']}{changed}",
        f"features   {counts['features']}",
    ]
    if facts["inputs_added"] or facts["inputs_removed"]:
        lines.append(f"inputs     added: {', '.join(facts['inputs_added']) or 'none'}; "
                     f"removed: {', '.join(facts['inputs_removed']) or 'none'}")
    pairs = result.pairs[[c for c in _DIFF_PAIR_COLUMNS if c in result.pairs.columns]]
    lines += ["", _table(pairs, "Pairs sharing a path in either version (new, gone, changed, same)", args.top), "",
              _table(result.features[_DIFF_FEATURE_COLUMNS], "Features split on in either version", args.top)]
    lines += [""] + [_wrap(note) for note in facts["notes"]] + [_wrap(result.limits)]
    for flag, rows in flagged.items():
        named = ", ".join(f"{a} & {b}" for a, b in zip(rows["feature_a"], rows["feature_b"], strict=True))
        lines.append(f"fail-on    {flag}: {len(rows)} pair(s){': ' + named if named else ''}")
    return lines


def _cmd_diff(args: argparse.Namespace) -> int:
    from .compare import compare_models

    fail_on = list(dict.fromkeys(args.fail_on or []))
    if "new-interaction" in fail_on and args.data is None:
        raise _UsageError("--fail-on new-interaction compares verdicts and needs --data")
    if args.data is None and (args.sample, args.resamples, args.seed) != (1000, 20, 0):
        raise _UsageError("--sample, --resamples and --seed set the triage on data; give --data")
    versions = (_load_file(args, args.old), _load_file(args, args.new))
    data = _diff_data(args, versions) if args.data is not None else None
    options = {"sample": None if args.sample == 0 else args.sample, "resamples": args.resamples,
               "random_state": args.seed} if data is not None else None
    result = compare_models(*versions, data, output=args.class_index, triage_options=options,
                            progress=False if args.quiet else None)
    flagged = {flag: result.flagged(flag) for flag in fail_on}
    if args.format == "json":
        _emit_json(result.to_dict(), args)
    elif args.format == "csv":
        _emit_csv({"pairs": result.pairs, "features": result.features}, args)
    else:
        _emit("\n".join(_diff_lines(result, args, flagged)), args.out)
    hits = {flag: len(rows) for flag, rows in flagged.items() if len(rows)}
    for flag, count in hits.items():
        print(f"treeprobe: diff: --fail-on {flag}: {count} pair(s); exit code {EXIT_VIOLATION}", file=sys.stderr)
    return EXIT_VIOLATION if hits else 0
def _cmd_constrain(args: argparse.Namespace) -> int:
    from .constraints import interaction_graph, suggest_constraints, write_graphml

    if args.target is None:
        raise _UsageError("constrain needs --target: its noise floor, --validate and --search retrain the model")
    if args.search and args.validate:
        raise _UsageError("--search already compares every step with the unconstrained model on held-out folds; "
                          "use --search or --validate, not both")
    ens = _load(args)
    data = _read_data(args, ens)
    result = _run_triage(args, ens, data)
    suggestion = suggest_constraints(result, min_strength=args.min_strength)
    validation = None
    if args.validate:
        groups = suggestion.alternative if (suggestion.overlapping and args.non_overlapping) else suggestion.groups
        validation = _validate(args, ens, data, groups)
    search = _search(args, ens, data, result) if args.search else None
    if args.graph:
        write_graphml(interaction_graph(result), args.graph)
        print(f"wrote {args.graph}", file=sys.stderr)
    code = _constrain_output(args, ens, result, suggestion, validation, search)
    if search is not None and search.facts["interrupted"]:
        print("treeprobe: interrupted; the finished steps of the search are shown", file=sys.stderr)
        return 130
    return code


# ------------------------------------------------------------------- report
def _cmd_report(args: argparse.Namespace) -> int:
    from .reporting import report

    if (args.validate or args.search) and args.target is None:
        raise _UsageError(f"{'--validate' if args.validate else '--search'} retrains the model and needs --target")
    ens = _load(args)
    data = _read_data(args, ens)
    triage_result = _run_triage(args, ens, data)
    from .constraints import suggest_constraints

    suggestion = suggest_constraints(triage_result)
    validation = _validate(args, ens, data, suggestion) if args.validate else None
    search = _search(args, ens, data, triage_result) if args.search else None
    path = report(ens, data, args.target, out=args.out_html, triage_result=triage_result,
                  triage_origin="run by the treeprobe report command", suggestion=suggestion, validation=validation,
                  search=search,
                  top_pairs=args.top_pairs, title=args.title, progress=False if args.quiet else None)
    print(f"wrote {path}", file=sys.stderr)
    return 0


# --------------------------------------------------------------------- demo
def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    result = run_demo(args.out, quiet=args.quiet)
    if args.quiet:
        # run_demo printed nothing: no bars, no step lines, no details; the summary is what is left.
        sys.stdout.write(result.summary)
    return 0


# ------------------------------------------------------------------- parser
def _add_trust_pickle(p: argparse.ArgumentParser) -> None:
    p.add_argument("--trust-pickle", action="store_true",
                   help="allow loading pickle/joblib files; unpickling runs code from the file, so only for files you trust")


def _add_model(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", metavar="MODEL", help="saved model: XGBoost .json/.ubj, LightGBM model text, or a pickle "
                   "(with --trust-pickle)")
    _add_trust_pickle(p)


def _add_common(p: argparse.ArgumentParser) -> None:
    _add_model(p)
    p.add_argument("--format", choices=("table", "json", "csv"), default="table",
                   help="output format (default: table); json and csv mirror the result tables' columns")
    p.add_argument("--out", metavar="FILE", help="write to FILE (atomically) instead of standard output")
    p.add_argument("--top", type=int, default=20, metavar="N", help="rows per table in table format (default: 20)")
    p.add_argument("--class", dest="class_index", type=_class_choice, default=None, metavar="I",
                   help="class I of a multiclass model (0-based class index; default 0); triage also takes "
                        "'all' (every class, sharing the first round of noise-floor refits)")


def _add_table(p: argparse.ArgumentParser, names: Sequence[str] | None, listed: str) -> None:
    p.add_argument("--table", default="pairs", choices=names,
                   help=f"table to write with --format csv ({listed}; default pairs)")


def _add_rows(p: argparse.ArgumentParser, *, use: str, seed_use: str, jobs_use: str) -> None:
    """The data file and the options of every command that evaluates the model on its rows."""
    p.add_argument("--data", required=True, metavar="FILE",
                   help="CSV (or Parquet with pyarrow installed) holding the model's feature columns")
    p.add_argument("--sample", type=int, default=1000, metavar="N",
                   help=f"rows drawn from the data for {use} (default 1000; 0 = all rows; cost grows with N)")
    p.add_argument("--seed", type=int, default=0, help=f"random seed of {seed_use} (default 0)")
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help=f"parallel workers for {jobs_use} (default 1; -1 = all cores)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _add_triage_options(p: argparse.ArgumentParser) -> None:
    _add_rows(p, use="H and dependence", seed_use="the row sample, subsamples and refits", jobs_use="refits")
    p.add_argument("--target", metavar="COL", help="target column in the data; enables the noise-floor refits")
    p.add_argument("--null-refits", type=int, default=19, metavar="R",
                   help="refits on targets without interaction for the noise floor (default 19, the fewest that can "
                        "reach --level 0.05; each costs about one training of the model, twice when a second round "
                        "runs)")
    p.add_argument("--level", type=float, default=0.05, metavar="A",
                   help="family-wise level of the noise-floor test: for a model without interaction, the chance that "
                        "any pair clears the floor (default 0.05; needs --null-refits >= 1/A - 1)")
    p.add_argument("--resamples", type=int, default=None, metavar="B",
                   help="half-size row subsamples for the intervals of H² and h, taken for the pairs whose effect "
                        "reaches --min-effect (default 20 without --target, 0 with it: the refits give the evidence)")
    p.add_argument("--min-h2", type=float, default=0.05,
                   help="smallest H² counted as interaction when there is no noise floor (default 0.05)")
    p.add_argument("--min-effect", type=float, default=0.05,
                   help="smallest interaction size h as a share of the prediction spread (default 0.05)")
    p.add_argument("--max-dependence", type=float, default=0.7,
                   help="dependence from which a pair is 'dependent' (default 0.7)")
    p.add_argument("--params", dest="params_file", metavar="FILE",
                   help="training parameters for the refits: a JSON object, or the JSON of XGBoost's "
                        "Booster.save_config(); they override what is read from the model")
    p.add_argument("--param", action="append", metavar="KEY=VALUE",
                   help="one training parameter for the refits (repeatable; value read as JSON when it parses, "
                        "e.g. --param eta=0.05); overrides --params")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the refits and validation folds on the Dask cluster whose scheduler is at ADDRESS "
                        "(e.g. tcp://scheduler-host:8786; one thread per fit; needs dask[distributed])")


def _inspect_options(p: argparse.ArgumentParser) -> None:
    _add_common(p)
    p.add_argument("--order", type=int, default=3, metavar="K",
                   help="largest feature-set size to count (1 = features only, 2 = pairs, 3 = triples; default 3)")
    p.add_argument("--sort", metavar="METRIC", help="sort pairs and triples by this column (default: nested_gain)")
    p.add_argument("--trees", metavar="A:B", help="walk only trees A to B-1 (Python slice; e.g. 0:100 or 500:)")
    _add_table(p, None, "features, pairs, triples, orderK for --order K > 3")


def _measure_options(p: argparse.ArgumentParser) -> None:
    _add_common(p)
    _add_rows(p, use="the H-statistics", seed_use="the row sample", jobs_use="the H-statistics")
    p.add_argument("--pairs", metavar="A:B,...", help="only these pairs (default: every pair sharing a path)")
    p.add_argument("--triples", action="store_true", help="also three-way statistics for features whose pairs all share paths")
    p.add_argument("--sort", choices=("h", "h2"), default="h",
                   help="rank by h, the interaction's size in output units (default), or by h2 = H², its share of "
                        "the joint effect; read H² beside h: a large H² on a tiny h is noise")
    p.add_argument("--method", choices=("auto", "exact", "brute"), default="auto",
                   help="exact tree algorithm or brute-force partial dependence (default: exact for trees)")
    p.add_argument("--scale", choices=("margin", "probability"), default="margin",
                   help="margin (default; the model's untransformed score, log-odds for classifiers) or the "
                        "probability scale (brute force, slower)")
    _add_table(p, ("pairs", "against_rest", "triples"), "pairs, against_rest, triples")


def _triage_command_options(p: argparse.ArgumentParser) -> None:
    _add_common(p)
    _add_triage_options(p)
    p.add_argument("--triples", action="store_true", help="also give verdicts to triples sharing a path")
    _add_table(p, ("pairs", "triples", "features"), "pairs, triples, features")


def _add_search_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--search", action="store_true",
                   help="choose the groups by held-out loss: forward search from every feature alone over the "
                        "triaged pairs and triples, one-standard-error rule (needs --target; retrains many times: "
                        "the number of fits and a time estimate are printed first)")
    p.add_argument("--max-steps", type=int, default=10, metavar="S",
                   help="most interactions --search adds (default 10)")
    p.add_argument("--max-candidates", type=int, default=5, metavar="C",
                   help="candidates --search scores per step, strongest first (default 5); fits = folds x C per step")


def _constrain_options(p: argparse.ArgumentParser) -> None:
    _add_common(p)
    _add_triage_options(p)
    p.add_argument("--library", choices=("xgboost", "lightgbm", "sklearn"),
                   help="library of the Python snippet (default: the model's; sklearn writes HistGradientBoosting "
                        "interaction_cst)")
    p.add_argument("--min-strength", type=float, default=0.0, help="weakest interaction strength to allow (default 0)")
    p.add_argument("--validate", action="store_true", help="cross-validate with and without the groups (needs --target)")
    p.add_argument("--non-overlapping", action="store_true",
                   help="validate the non-overlapping alternative when the groups overlap")
    p.add_argument("--folds", type=int, default=5, metavar="K", help="folds for --validate and --search (default 5)")
    _add_search_options(p)
    p.add_argument("--graph", metavar="FILE", help="write the interaction graph as GraphML")
    p.set_defaults(triples=True)


def _check_command_options(p: argparse.ArgumentParser) -> None:
    _add_model(p)
    p.add_argument("--groups", metavar="FILE",
                   help="feature groups allowed to interact: the JSON that 'treeprobe constrain --format json' writes "
                        "(its search's chosen groups when it ran with --search), or a JSON list of lists of "
                        "feature names; features in no group may only be used alone")
    p.add_argument("--forbid", metavar="A:B,...",
                   help="pairs that must never share a root-to-leaf path; '*' stands for any feature "
                        "(e.g. postcode:*,age:income)")
    p.add_argument("--format", choices=("table", "json"), default="table",
                   help="table for people (default) or json for machines (schema treeprobe.policy/1)")
    p.add_argument("--out", metavar="FILE", help="write to FILE (atomically) instead of standard output")
    p.add_argument("--top", type=int, default=20, metavar="N", help="rows of the table in table format (default: 20)")
    p.epilog = _EXIT_CODES


def _diff_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("old", metavar="OLD", help="the previous version of the model (any format inspect reads)")
    p.add_argument("new", metavar="NEW", help="the new version; it may come from another library")
    _add_trust_pickle(p)
    p.add_argument("--data", metavar="FILE",
                   help="CSV (or Parquet) with the input columns of both versions: adds H², h and the verdict of "
                        "each version (triage without target)")
    p.add_argument("--fail-on", action="append", choices=_FAIL_ON_CHOICES, metavar="CHANGE",
                   help="exit with code 3 when the comparison holds such a change: new-pair (a pair sharing a path "
                        "only in the new version) or new-interaction (verdict interaction only in the new version; "
                        "needs --data); repeatable")
    p.add_argument("--sample", type=int, default=1000, metavar="N",
                   help="rows drawn from the data for H and dependence (default 1000; 0 = all rows)")
    p.add_argument("--resamples", type=int, default=20, metavar="B",
                   help="half-size row subsamples for the intervals of H² and h (default 20)")
    p.add_argument("--seed", type=int, default=0, help="random seed of the row sample and subsamples (default 0)")
    p.add_argument("--class", dest="class_index", type=int, default=None, metavar="I",
                   help="compare class I of multiclass models (0-based class index)")
    p.add_argument("--format", choices=("table", "json", "csv"), default="table",
                   help="output format (default: table); json has schema treeprobe.compare/1")
    _add_table(p, ("pairs", "features"), "pairs, features")
    p.add_argument("--out", metavar="FILE", help="write to FILE (atomically) instead of standard output")
    p.add_argument("--top", type=int, default=20, metavar="N", help="rows per table in table format (default: 20)")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no notes on coerced columns")
    p.epilog = _EXIT_CODES


def _report_options(p: argparse.ArgumentParser) -> None:
    _add_model(p)
    p.add_argument("-o", "--out", dest="out_html", default="treeprobe-report.html", metavar="FILE",
                   help="HTML file to write (default: treeprobe-report.html)")
    p.add_argument("--class", dest="class_index", type=_class_choice, default=None, metavar="I",
                   help="class I of a multiclass model (0-based class index; default 0)")
    p.add_argument("--title", help="page title (default: from the model file name)")
    p.add_argument("--top-pairs", type=int, default=4, metavar="N", help="pairs drawn as partial dependence (default 4)")
    p.add_argument("--validate", action="store_true", help="also cross-validate the suggested constraints (needs --target)")
    p.add_argument("--folds", type=int, default=5, metavar="K", help="folds for --validate and --search (default 5)")
    _add_search_options(p)
    _add_triage_options(p)
    p.set_defaults(triples=True)


def _demo_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", default="treeprobe-demo", metavar="DIR",
                   help="folder for the models, data and results (default: ./treeprobe-demo)")
    p.add_argument("--quiet", action="store_true", help="print only the summary: no progress bars, step lines or details")


# Command, handler, its options, one-line summary (in `treeprobe --help`), description (in `COMMAND --help`).
_COMMANDS: tuple[tuple[str, Callable[[argparse.Namespace], int], Callable[[argparse.ArgumentParser], None], str,
                       str], ...] = (
    ("inspect", _cmd_inspect, _inspect_options,
     "model summary and the feature sets its trees combine on root-to-leaf paths",
     "Summarise a saved model and count how features co-occur on root-to-leaf paths, weighted by gain and cover. "
     "Needs no data."),
    ("measure", _cmd_measure, _measure_options, "Friedman-Popescu H-statistics of the model on data",
     "Measure how much of the model's variation is interaction, with Friedman & Popescu's H-statistics (2008) "
     "computed on rows of your data."),
    ("triage", _cmd_triage, _triage_command_options,
     "verdict per feature pair: interaction, dependent, co-split or absent",
     "Tell real interactions from structural co-splits and dependence artefacts: path structure, H-statistics with "
     "a resampling interval and a refit noise floor, and the dependence of each pair in the data."),
    ("constrain", _cmd_constrain, _constrain_options,
     "suggest interaction-constraint groups, export them, validate or search by retraining",
     "Suggest groups of features allowed to interact (from the triage), print them as XGBoost and LightGBM "
     "interaction_constraints, and optionally cross-validate the constrained model against the unconstrained one "
     "(--validate) or let held-out loss choose the groups (--search)."),
    ("check", _cmd_check, _check_command_options,
     "gate: does every root-to-leaf path keep the feature groups and forbidden pairs?",
     "Check every root-to-leaf path of a saved model against feature groups (the JSON that constrain writes, or a "
     "JSON list of lists of names) and pairs that must never share a path. Reads the model file only: no data, no "
     "training library, no network. Exits 3 when a path breaks the policy."),
    ("diff", _cmd_diff, _diff_options,
     "what changed in the interaction structure between two versions of a model",
     "Compare two versions of a model, matched by feature name (they may come from different libraries): per "
     "feature and pair, new, gone, changed or same, with the structure measures of both versions and their change; "
     "with --data also H², h and the verdicts. --fail-on makes it a pipeline gate (exit 3)."),
    ("report", _cmd_report, _report_options,
     "one self-contained HTML page: verdicts, maps, partial dependence, constraints",
     "Run the triage on data and write one self-contained HTML page (inline CSS and images; opens from disk) with "
     "the ranked pairs, the pair map, the groups-and-links diagram, partial dependence of the top pairs, when pairs "
     "entered the model, the suggested constraints and the cautions."),
    ("demo", _cmd_demo, _demo_options,
     "run every step on an invented warehouse-energy data set with a known answer",
     "Generate data with a known ground truth (refrigerated warehouse rooms' daily energy use), train XGBoost and "
     "LightGBM models, and run inspect, H-statistics, triage and constraints on them; writes the report, JSON and "
     "CSV into DIR."),
)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``treeprobe`` command."""
    from . import __version__

    parser = argparse.ArgumentParser(
        prog="treeprobe",
        description="Which feature interactions does a fitted tree ensemble really use?",
        epilog="Run 'treeprobe COMMAND --help' for the options of a command. Exit codes: 0 success, 1 bad input, "
               "2 usage error, 3 violation (check, diff --fail-on).",
    )
    parser.add_argument("--version", action="version", version=f"treeprobe {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, handler, add_options, summary, description in _COMMANDS:
        p = sub.add_parser(name, help=summary, description=description)
        add_options(p)
        p.set_defaults(handler=handler)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    # Warnings (unused columns, unseen categories) as one plain line each, not Python's file:line form.
    warnings.formatwarning = lambda message, category, *rest, **kw: f"treeprobe: warning: {message}\n"
    if not getattr(args, "command", None):
        parser.print_help(sys.stderr)
        return 2
    try:
        _check_options(args)
    except ParameterError as exc:
        parser.error(str(exc))
    try:
        from .parallel import dask_cluster

        with dask_cluster(getattr(args, "scheduler", None)):
            return int(args.handler(args))
    except _UsageError as exc:
        parser.error(str(exc))
    except TreeprobeError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"treeprobe: error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("treeprobe: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    return 0


if __name__ == "__main__":
    sys.exit(main())
