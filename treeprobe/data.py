"""Reading user data files (CSV; Parquet when pyarrow is installed) into DataFrames."""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd

from .errors import DataError

__all__ = ["read_table"]


def read_table(path: str | os.PathLike) -> pd.DataFrame:
    """Read a CSV or Parquet file into a DataFrame.

    Parameters
    ----------
    path : str or path
        ``.parquet``/``.pq`` files are read with pyarrow (optional extra
        ``treeprobe[parquet]``); anything else is read as CSV.

    Raises
    ------
    DataError
        When the file is missing, unreadable, empty or not a table.
    """
    p = Path(path)
    if not p.is_file():
        raise DataError(f"{p}: data file not found")
    if p.suffix.lower() in (".parquet", ".pq"):
        try:
            import pyarrow  # noqa: F401
        except ImportError:
            raise DataError(f"{p}: reading Parquet needs pyarrow (pip install 'treeprobe[parquet]')") from None
        try:
            frame = pd.read_parquet(p)
        except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
            raise DataError(f"{p}: cannot read Parquet: {type(exc).__name__}: {exc}") from None
    else:
        try:
            frame = pd.read_csv(p, low_memory=False)
        except pd.errors.EmptyDataError:
            raise DataError(f"{p}: the CSV file is empty") from None
        except (pd.errors.ParserError, UnicodeDecodeError, OSError) as exc:
            raise DataError(f"{p}: cannot read CSV: {exc}") from None
    if frame.shape[0] == 0:
        raise DataError(f"{p}: the table has no rows")
    return frame
