"""Writing results: aligned terminal tables, JSON and CSV, and atomic file output.

Files are written to a temporary file in the target's folder and renamed over
the target only when complete, so an interrupted run leaves the old file or
none, never half a file.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any, TextIO

import numpy as np
import pandas as pd

from .errors import TreeprobeError

__all__ = ["atomic_write", "format_table", "to_jsonable", "dumps_json"]


def atomic_write(path: str | os.PathLike, write: Callable[[TextIO], None], *, encoding: str = "utf-8") -> Path:
    """Write a text file atomically: ``write(handle)`` fills a temporary file that then replaces ``path``.

    Raises
    ------
    TreeprobeError
        When the folder does not exist or is not writable.
    """
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise TreeprobeError(f"{target}: the folder {folder} does not exist")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=folder)
    except OSError as exc:
        raise TreeprobeError(f"{target}: cannot write in {folder}: {exc.strerror or exc}") from None
    # mkstemp creates the file private (0600); give it the permissions a plain open() would.
    umask = os.umask(0)
    os.umask(umask)
    try:
        os.chmod(tmp, 0o666 & ~umask)
        with os.fdopen(fd, "w", encoding=encoding, newline="") as handle:
            write(handle)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    return target


def to_jsonable(value: Any) -> Any:
    """Convert numpy/pandas values (recursively) to plain JSON types; NaN and inf become None."""
    if isinstance(value, pd.DataFrame):
        return [to_jsonable(r) for r in value.to_dict(orient="records")]
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        f = float(value)
        return f if math.isfinite(f) else None
    if value is None or isinstance(value, (str, int)):
        return value
    if value is pd.NA or value is pd.NaT:
        return None
    return str(value)


def dumps_json(value: Any) -> str:
    """JSON text of ``value`` (see :func:`to_jsonable`), indented, ending with a newline."""
    return json.dumps(to_jsonable(value), indent=2, allow_nan=False) + "\n"


def _format_cell(value: Any, precision: int) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    if isinstance(value, (float, np.floating)):
        f = float(value)
        if f == 0:
            return "0"
        if abs(f) >= 10 ** (precision + 2) or abs(f) < 10 ** (-precision):
            return f"{f:.{precision - 1}e}"
        if float(f).is_integer() and abs(f) < 1e9:
            return f"{int(f):,}"
        digits = max(0, precision - 1 - int(math.floor(math.log10(abs(f)))))
        return f"{f:,.{min(digits, precision + 2)}f}"
    return str(value)


def format_table(frame: pd.DataFrame, *, precision: int = 4, max_rows: int | None = None, title: str | None = None) -> str:
    """An aligned plain-text table: text columns left-aligned, numbers right-aligned.

    Numbers show ``precision`` significant digits; missing values show as ``-``.
    """
    shown = frame if max_rows is None else frame.head(max_rows)
    headers = [str(c) for c in shown.columns]
    cells = [[_format_cell(v, precision) for v in row] for row in shown.itertuples(index=False, name=None)]
    numeric = [pd.api.types.is_numeric_dtype(shown[c]) and not pd.api.types.is_bool_dtype(shown[c]) for c in shown.columns]
    widths = [max([len(h)] + [len(r[i]) for r in cells]) for i, h in enumerate(headers)]

    def line(values: list[str]) -> str:
        return "  ".join(v.rjust(w) if num else v.ljust(w) for v, w, num in zip(values, widths, numeric, strict=False)).rstrip()

    out = []
    if title:
        out.append(title)
    out.append(line(headers))
    out.append("  ".join("-" * w for w in widths))
    out.extend(line(r) for r in cells)
    if max_rows is not None and len(frame) > max_rows:
        out.append(f"... {len(frame) - max_rows:,} more rows")
    if not cells:
        out.append("(none)")
    return "\n".join(out)

