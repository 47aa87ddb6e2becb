"""The ``treeprobe`` command line: a thin shell over the public API.

Exit codes: 0 success, 1 bad input (model file, data; one line on standard
error, the traceback only with ``--debug``), 2 usage error.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Sequence
from typing import Any

import pandas as pd

from . import __version__
from .errors import TreeprobeError
from .output import atomic_write, dumps_json, format_table

__all__ = ["main", "build_parser"]

_CAUTION_STRUCTURE = (
    "Co-occurrence on a path shows what the trees combine, not that the features interact: an additive effect "
    "split in sequence, or two correlated features standing in for each other, also share paths. Measure on data "
    "(treeprobe hstat) before drawing conclusions."
)
_CAUTION_H = (
    "H-statistics evaluate the model away from the data when features are dependent (partial dependence "
    "extrapolates), so treat them with care for correlated features. They describe this model's interactions, "
    "not causal claims about the world."
)


class _UsageError(Exception):
    """Raised for option values argparse cannot check itself; exits with code 2."""


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


def _emit(text: str, out: str | None) -> None:
    if out is None:
        sys.stdout.write(text if text.endswith("\n") else text + "\n")
    else:
        atomic_write(out, lambda handle: handle.write(text if text.endswith("\n") else text + "\n"))
        print(f"wrote {out}", file=sys.stderr)


def _csv_text(frame: pd.DataFrame) -> str:
    return frame.to_csv(index=False, lineterminator="\n")


def _load(args: argparse.Namespace):
    from .io import load_model

    return load_model(args.model, trust_pickle=args.trust_pickle)


def _model_lines(summary: dict[str, Any]) -> list[str]:
    return [
        f"model      {summary['source']}",
        f"library    {summary['library']}   objective {summary['objective'] or '-'}   link {summary['link']}",
        f"trees      {summary['n_trees']:,}   outputs {summary['n_outputs']}   nodes {summary['n_nodes']:,}   "
        f"leaves {summary['n_leaves']:,}",
        f"depth      max {summary['max_depth']}   mean {summary['mean_depth']:.2f}   "
        f"leaves per tree mean {summary['mean_leaves']:.1f}   max {summary['max_leaves']}",
        f"features   {summary['n_features_used']} of {summary['n_features']} used"
        + (f" ({summary['n_categorical_features']} categorical)" if summary["n_categorical_features"] else ""),
    ]


# ------------------------------------------------------------------ inspect
def _cmd_inspect(args: argparse.Namespace) -> int:
    from .structure import structure

    if args.order < 1:
        raise _UsageError(f"--order must be at least 1, got {args.order}")
    ens = _load(args)
    trees = _parse_tree_range(args.trees)
    result = structure(ens, max_order=max(args.order, 2), trees=trees, output=args.output)
    tables = {"features": result.features, "pairs": result.pairs, "triples": result.triples}
    for k, frame in getattr(result, "sets", {}).items():
        tables[f"order{k}"] = frame
    if args.sort:
        for name in ("pairs", "triples"):
            frame = tables[name]
            if args.sort not in frame.columns:
                raise _UsageError(
                    f"--sort {args.sort!r} is not a column of the {name} table; choose from "
                    + ", ".join(c for c in frame.columns if not c.startswith("feature_"))
                )
            tables[name] = frame.sort_values(args.sort, ascending=False, kind="stable").reset_index(drop=True)
    if args.order < 3:
        tables.pop("triples")
    if args.order < 2:
        tables.pop("pairs")
    if args.format == "json":
        payload = result.to_dict()
        for name, frame in tables.items():
            payload[name] = frame
        _emit(dumps_json(payload), args.out)
        return 0
    if args.format == "csv":
        if args.table not in tables:
            raise _UsageError(f"--table {args.table!r} is not available with --order {args.order}; choose from {list(tables)}")
        _emit(_csv_text(tables[args.table]), args.out)
        return 0
    lines = _model_lines(result.ensemble_summary)
    top = args.top
    lines += ["", format_table(tables["features"].sort_values("gain", ascending=False), max_rows=top,
                               title="Features (by total gain)")]
    for name, title in (("pairs", "Pairs sharing a root-to-leaf path"), ("triples", "Triples sharing a root-to-leaf path")):
        if name in tables:
            lines += ["", format_table(tables[name], max_rows=top, title=title)]
    lines += ["", _wrap(_CAUTION_STRUCTURE)]
    _emit("\n".join(lines), args.out)
    return 0


def _wrap(text: str, width: int = 100) -> str:
    import textwrap

    return "\n".join(textwrap.wrap("Note: " + text, width=width))


# -------------------------------------------------------------------- hstat
def _read_data(path: str):
    from .data import read_table

    return read_table(path)


def _parse_pairs(text: str | None) -> list[tuple[str, str]] | None:
    if text is None:
        return None
    pairs = []
    for item in text.split(","):
        item = item.strip()
        if not item:
            continue
        parts = item.split(":")
        if len(parts) != 2 or not all(parts):
            raise _UsageError(f"--pairs expects name:name[,name:name...], got {item!r}")
        pairs.append((parts[0], parts[1]))
    if not pairs:
        raise _UsageError("--pairs is empty")
    return pairs


def _cmd_hstat(args: argparse.Namespace) -> int:
    from .hstat import h_statistic

    if args.sample is not None and args.sample < 2:
        raise _UsageError(f"--sample must be at least 2, got {args.sample}")
    ens = _load(args)
    data = _read_data(args.data)
    result = h_statistic(
        ens,
        data,
        pairs=_parse_pairs(args.pairs),
        triples=args.triples,
        method=args.method,
        sample=None if args.sample == 0 else args.sample,
        random_state=args.seed,
        output=args.output,
        n_jobs=args.jobs,
        progress=None if not args.quiet else False,
    )
    tables = {"pairs": result.pairs, "overall": result.overall}
    if args.triples:
        tables["triples"] = result.triples
    if args.format == "json":
        _emit(dumps_json(result.to_dict()), args.out)
        return 0
    if args.format == "csv":
        if args.table not in tables:
            raise _UsageError(f"--table {args.table!r} is not available; choose from {list(tables)}")
        _emit(_csv_text(tables[args.table]), args.out)
        return 0
    facts = result.to_dict()
    lines = [
        f"model      {ens.source} ({ens.library}, {ens.n_trees:,} trees)",
        f"data       {args.data}: {facts.get('n_rows', '?')} rows used, method {facts.get('method', '?')}, "
        f"scale {facts.get('scale', 'raw')}, {facts.get('seconds', float('nan')):.2f} s",
        "",
        format_table(tables["pairs"], max_rows=args.top, title="Pairwise H-statistics (h2 normalised, h in output units)"),
        "",
        format_table(tables["overall"], max_rows=args.top, title="Each feature against all others"),
    ]
    if "triples" in tables:
        lines += ["", format_table(tables["triples"], max_rows=args.top, title="Three-way H-statistics")]
    lines += ["", _wrap(_CAUTION_H)]
    _emit("\n".join(lines), args.out)
    return 0


# ------------------------------------------------------------------- parser
def _add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", metavar="MODEL", help="saved model: XGBoost .json/.ubj, LightGBM model text, or a pickle "
                   "(with --trust-pickle)")
    p.add_argument("--trust-pickle", action="store_true",
                   help="allow loading pickle/joblib files; unpickling runs code from the file, so only for files you trust")
    p.add_argument("--format", choices=("table", "json", "csv"), default="table",
                   help="output format (default: table); json and csv mirror the result tables' columns")
    p.add_argument("--out", metavar="FILE", help="write to FILE (atomically) instead of standard output")
    p.add_argument("--top", type=int, default=20, metavar="N", help="rows per table in table format (default: 20)")
    p.add_argument("--output", type=int, default=None, metavar="I",
                   help="restrict to output I of a multiclass model (class index)")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``treeprobe`` command."""
    parser = argparse.ArgumentParser(
        prog="treeprobe",
        description="Which feature interactions does a fitted tree ensemble really use?",
        epilog="Run 'treeprobe COMMAND --help' for the options of a command.",
    )
    parser.add_argument("--version", action="version", version=f"treeprobe {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("inspect", help="model summary and the feature sets its trees combine on root-to-leaf paths",
                       description="Summarise a saved model and count how features co-occur on root-to-leaf paths, "
                                   "weighted by gain and cover. Needs no data.")
    _add_common(p)
    p.add_argument("--order", type=int, default=3, metavar="K",
                   help="largest feature-set size to count (1 = features only, 2 = pairs, 3 = triples; default 3)")
    p.add_argument("--sort", metavar="METRIC", help="sort pairs and triples by this column (default: nested_gain)")
    p.add_argument("--trees", metavar="A:B", help="walk only trees A to B-1 (Python slice; e.g. 0:100 or 500:)")
    p.add_argument("--table", default="pairs", help="table to write with --format csv (features, pairs, triples; default pairs)")
    p.set_defaults(handler=_cmd_inspect)

    p = sub.add_parser("hstat", help="Friedman-Popescu H-statistics of the model on data",
                       description="Measure how much of the model's variation is interaction, with Friedman & "
                                   "Popescu's H-statistics (2008) computed on rows of your data.")
    _add_common(p)
    p.add_argument("--data", required=True, metavar="FILE", help="CSV (or Parquet with pyarrow installed) holding the "
                   "model's feature columns")
    p.add_argument("--pairs", metavar="A:B,...", help="only these pairs (default: every pair sharing a path)")
    p.add_argument("--triples", action="store_true", help="also three-way statistics for features whose pairs all share paths")
    p.add_argument("--sample", type=int, default=1000, metavar="N",
                   help="rows drawn from the data (default 1000; 0 = all rows; cost grows with N)")
    p.add_argument("--seed", type=int, default=0, help="random seed of the row sample (default 0)")
    p.add_argument("--method", choices=("auto", "exact", "brute"), default="auto",
                   help="exact tree algorithm or brute-force partial dependence (default: exact for trees)")
    p.add_argument("--jobs", type=int, default=1, metavar="N", help="parallel workers (default 1; -1 = all cores)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--table", default="pairs", help="table to write with --format csv (pairs, overall, triples; default pairs)")
    p.set_defaults(handler=_cmd_hstat)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help(sys.stderr)
        return 2
    if getattr(args, "top", 1) is not None and getattr(args, "top", 1) < 1:
        parser.error(f"--top must be at least 1, got {args.top}")
    try:
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
