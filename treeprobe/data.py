"""Reading user data (CSV; Parquet when pyarrow is installed) and fitting it to a model's features.

Data handed to treeprobe are untrusted: columns may be missing, misspelt,
extra or out of order, numbers may arrive as text, booleans or infinities,
and a file may hold far more rows than a run needs. This module turns such
input into a frame whose columns are exactly the model's features, or fails
with one :class:`~treeprobe.errors.DataError` that names the column, the
first bad value and its row. What it changed on the way (columns matched by
position, text read as numbers, booleans read as 0/1) is returned as a
:class:`DataReport`, and what it ignored (extra columns) is also announced
with a :class:`~treeprobe.errors.DataWarning`.

Large files are read with bounded memory: only the needed columns are
parsed, and a row sample is drawn while reading, chunk by chunk, by giving
every row a uniform random key and keeping the ``sample`` smallest keys --
a uniform sample without replacement (Efraimidis & Spirakis, 2006, with
equal weights) that never holds more than one chunk plus the sample.

References
----------
.. [1] P. S. Efraimidis and P. G. Spirakis, "Weighted random sampling with a
   reservoir", Information Processing Letters 97(5), 181-185, 2006.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .checks import close_name
from .errors import DataError, DataWarning

if TYPE_CHECKING:
    from .graph import ForestGraph

__all__ = ["model_matrix", "read_table", "prepare_data", "load_data", "DataReport", "UnseenCategoryWarning"]

_PARQUET_SUFFIXES = (".parquet", ".pq")
_CHUNK_ROWS = 200_000


class UnseenCategoryWarning(UserWarning):
    """Data hold a category level the model never saw in training."""


@dataclass(frozen=True)
class DataReport:
    """What :func:`prepare_data` did to fit a frame to a model.

    Attributes
    ----------
    n_rows : int
        Rows in the prepared frame.
    matched_by : {"name", "position"}
        How data columns were paired with the model's features. "position"
        only when the model has generic names (``f0, f1, ...``) and the data
        have exactly as many feature columns.
    extra_columns : tuple of str
        Data columns no feature uses (ignored; the target is not counted).
    coerced : tuple of str
        One note per column whose type was changed (text read as numbers,
        booleans read as 0/1).
    unseen_categories : tuple of str
        One note per categorical column holding levels the model never saw.
    target : str or None
        The target column kept beside the features, if any.

    Reports compare field by field (``==``) and never raise.
    """

    n_rows: int
    matched_by: str
    extra_columns: tuple[str, ...] = ()
    coerced: tuple[str, ...] = ()
    unseen_categories: tuple[str, ...] = ()
    target: str | None = None

    def lines(self) -> list[str]:
        """The report as short lines of text, e.g. for standard error."""
        out = [f"data: {self.n_rows:,} rows, columns matched to the model's features by {self.matched_by}"]
        if self.extra_columns:
            shown = ", ".join(self.extra_columns[:10]) + (" ..." if len(self.extra_columns) > 10 else "")
            out.append(f"data: ignored {len(self.extra_columns)} column(s) the model does not use: {shown}")
        out += [f"data: {note}" for note in self.coerced]
        out += [f"data: {note}" for note in self.unseen_categories]
        return out


def _missing_columns_message(missing: list[str], available: list[str], wanted: str) -> str:
    """One message naming the columns the data lack (``wanted`` says which), with close matches (typos)."""
    shown = ", ".join(missing[:10]) + (" ..." if len(missing) > 10 else "")
    hints = []
    for name in missing[:10]:
        close = close_name(name, available)
        if close:
            hints.append(f"{name!r} -> {close!r}?")
    hint = f"; close matches in the data: {', '.join(hints)}" if hints else ""
    return f"data lacks {wanted}: {shown}{hint}"


def _numeric_values(series: pd.Series, col: str) -> tuple[np.ndarray, str | None]:
    """Float64 values of a column feeding a numeric feature, and a note when its type had to be coerced.

    Booleans become 0/1 and text that reads as a number becomes that number;
    empty cells and None are missing (NaN). Any other value, and infinity,
    raise a DataError naming the column, the first bad value and its row.
    """
    note = None
    kind = series.dtype.kind
    if kind == "b" or str(series.dtype) == "boolean":
        values = series.astype("float64").to_numpy(dtype=np.float64, na_value=np.nan)
        note = f"column {col!r}: booleans read as 0/1"
    elif kind in "iuf":
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        raw = series.astype(object)
        is_bool = np.fromiter((isinstance(v, (bool, np.bool_)) for v in raw), dtype=bool, count=len(raw))
        values = np.array(pd.to_numeric(raw.mask(is_bool), errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan))
        if is_bool.any():
            values[is_bool] = raw[is_bool].astype(float).to_numpy()
        bad = np.isnan(values) & raw.notna().to_numpy() & ~is_bool
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            raise DataError(
                f"column {col!r} feeds a numeric feature but holds {int(bad.sum())} value(s) that are not numbers; "
                f"the first is {raw.iloc[first]!r} at row {series.index[first]!r}"
            )
        parts = []
        n_text = int((~np.isnan(values) & ~is_bool).sum())
        if n_text:
            parts.append(f"{n_text} text value(s) read as numbers")
        if is_bool.any():
            parts.append(f"{int(is_bool.sum())} boolean(s) read as 0/1")
        note = f"column {col!r}: " + ", ".join(parts) if parts else None
    infinite = np.isinf(values)
    if infinite.any():
        first = int(np.flatnonzero(infinite)[0])
        raise DataError(
            f"column {col!r} holds an infinite value at row {series.index[first]!r}; "
            "use finite numbers, or NaN / an empty cell for missing"
        )
    return values, note


def _require_graph(graph: Any, name: str) -> None:
    # Imported here because graph.py imports this module for its own entry points.
    from .graph import ForestGraph

    if not isinstance(graph, ForestGraph):
        raise TypeError(f"{name} must be a ForestGraph, got {type(graph).__name__}")


def _check_data_file(path: Path) -> None:
    if path.is_dir():
        raise DataError(f"{path}: is a folder; give the data file inside it (CSV, or Parquet with pyarrow)")
    if not path.is_file():
        raise DataError(f"{path}: data file not found")


def _is_parquet(path: Path) -> bool:
    return path.suffix.lower() in _PARQUET_SUFFIXES


def _header(path: Path) -> list[str]:
    """Column names of a CSV or Parquet file, without reading its rows."""
    if _is_parquet(path):
        pyarrow_parquet = _pyarrow_parquet(path)
        try:
            return [str(c) for c in pyarrow_parquet.read_schema(path).names]
        except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
            raise DataError(f"{path}: cannot read Parquet: {type(exc).__name__}: {exc}") from None
    try:
        return [str(c) for c in pd.read_csv(path, nrows=0).columns]
    except pd.errors.EmptyDataError:
        raise DataError(f"{path}: the CSV file is empty") from None
    except (pd.errors.ParserError, UnicodeDecodeError, OSError) as exc:
        raise DataError(f"{path}: cannot read CSV: {exc}") from None


def _pyarrow_parquet(path: Path):
    try:
        import pyarrow.parquet
    except ImportError:
        raise DataError(f"{path}: reading Parquet needs pyarrow (pip install 'treeprobe[parquet]')") from None
    return pyarrow.parquet


def _keep_smallest_keys(frame: pd.DataFrame, keys: np.ndarray, sample: int) -> tuple[pd.DataFrame, np.ndarray]:
    if len(frame) <= sample:
        return frame, keys
    chosen = np.sort(np.argpartition(keys, sample - 1)[:sample])
    return frame.iloc[chosen], keys[chosen]


def _sampled_csv(path: Path, columns: list[str] | None, sample: int, random_state: int) -> pd.DataFrame:
    """A uniform sample of ``sample`` rows drawn chunk by chunk; rows keep their 0-based position as index."""
    rng = np.random.default_rng(random_state)
    kept: pd.DataFrame | None = None
    kept_keys = np.zeros(0)
    start = 0
    with pd.read_csv(path, usecols=columns, chunksize=max(_CHUNK_ROWS, sample), low_memory=False) as reader:
        for chunk in reader:
            chunk.index = pd.RangeIndex(start, start + len(chunk))
            start += len(chunk)
            keys = rng.random(len(chunk))
            pool = chunk if kept is None else pd.concat([kept, chunk])
            kept, kept_keys = _keep_smallest_keys(pool, np.concatenate([kept_keys, keys]), sample)
    if kept is None:
        raise DataError(f"{path}: the table has no rows")
    return kept


def read_table(  # noqa: C901
    path: str | os.PathLike,
    *,
    columns: list[str] | None = None,
    sample: int | None = None,
    random_state: int = 0,
) -> pd.DataFrame:
    """Read a CSV or Parquet file into a DataFrame, optionally only some columns and a row sample.

    Parameters
    ----------
    path : str or path
        ``.parquet``/``.pq`` files are read with pyarrow (optional extra
        ``treeprobe[parquet]``); anything else is read as CSV.
    columns : list of str, optional
        Read only these columns (in the file's order). Every one must exist.
    sample : int, optional
        Keep a uniform random sample of this many rows (all rows when the
        file has fewer), drawn while reading so that memory stays bounded by
        one chunk of rows plus the sample. The index holds each row's 0-based
        position in the file.
    random_state : int, default 0
        Seed of the row sample.

    Returns
    -------
    DataFrame

    Raises
    ------
    DataError
        When the file is missing, unreadable, empty or not a table, or lacks
        a requested column (naming close matches).

    Notes
    -----
    The sample gives every row a key ``u ~ U(0, 1)`` and keeps the ``sample``
    rows with the smallest keys: each subset of that size is equally likely
    [1]_.

    References
    ----------
    .. [1] P. S. Efraimidis and P. G. Spirakis, "Weighted random sampling
       with a reservoir", Information Processing Letters 97(5), 2006.
    """
    p = Path(path)
    if columns is not None and (isinstance(columns, str) or not all(isinstance(c, str) for c in columns)):
        raise TypeError(f"columns must be a list of column names, got {columns!r}")
    if sample is not None and (isinstance(sample, bool) or not isinstance(sample, (int, np.integer)) or sample < 1):
        raise ValueError(f"sample must be a positive integer or None, got {sample!r}")
    _check_data_file(p)
    if columns is not None:
        header = _header(p)
        missing = [c for c in columns if c not in header]
        if missing:
            raise DataError(f"{p}: " + _missing_columns_message(
                missing, header, f"{len(missing)} of the {len(columns)} requested columns"))
    if _is_parquet(p):
        _pyarrow_parquet(p)
        try:
            frame = pd.read_parquet(p, columns=columns)
        except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
            raise DataError(f"{p}: cannot read Parquet: {type(exc).__name__}: {exc}") from None
        if sample is not None and len(frame) > sample:
            rows = np.sort(np.random.default_rng(random_state).choice(len(frame), size=sample, replace=False))
            frame = frame.iloc[rows]
    else:
        try:
            frame = (pd.read_csv(p, usecols=columns, low_memory=False) if sample is None
                     else _sampled_csv(p, columns, int(sample), random_state))
        except pd.errors.EmptyDataError:
            raise DataError(f"{p}: the CSV file is empty") from None
        except (pd.errors.ParserError, UnicodeDecodeError, OSError) as exc:
            raise DataError(f"{p}: cannot read CSV: {exc}") from None
    if frame.shape[0] == 0:
        raise DataError(f"{p}: the table has no rows")
    return frame


def _feature_columns(graph: ForestGraph, columns: list[str], target: str | None) -> tuple[list[str], str]:
    """Data columns feeding the model's features, in the model's order, and how they were matched."""
    candidates = [c for c in columns if c != target]
    if len(set(candidates)) != len(candidates):
        repeated = sorted({c for c in candidates if candidates.count(c) > 1})
        raise DataError(f"data has repeated column names: {', '.join(repeated[:10])}")
    names = list(graph.feature_names)
    missing = [n for n in names if n not in candidates]
    if not missing:
        return names, "name"
    if graph.generic_feature_names and len(candidates) == len(names):
        return candidates, "position"
    raise DataError(_missing_columns_message(missing, candidates, f"{len(missing)} of the model's {len(names)} feature columns"))


def _unseen_note(graph: ForestGraph, col: str, labels: list[str]) -> str:
    shown = ", ".join(labels[:5]) + (" ..." if len(labels) > 5 else "")
    routed = "like a category no split lists" if graph.unseen_category == "unlisted" else "like a missing value"
    return (f"column {col!r} holds {len(labels)} categor{'y' if len(labels) == 1 else 'ies'} the model "
            f"never saw ({shown}); routed as {graph.library} does: {routed}")


def _coded_by_levels(graph: ForestGraph, series: pd.Series, levels: tuple, col: str) -> tuple[np.ndarray, str | None]:
    """Codes of a categorical column by the model's fitted levels (NaN for missing), and a note on unseen levels.

    The model numbers categories by its own fitted levels, not by this frame's codes.
    """
    codes = pd.Index(list(levels)).get_indexer(series.astype(object).to_numpy()).astype(np.float64)
    unseen = (codes < 0) & series.notna().to_numpy()
    codes[codes < 0] = np.nan
    if not unseen.any():
        return codes, None
    if graph.unseen_category == "unlisted":
        codes[unseen] = -1.0
    return codes, _unseen_note(graph, col, sorted({str(v) for v in series[unseen]}))


def _column_values(graph: ForestGraph, series: pd.Series, j: int, col: str) -> tuple[np.ndarray, str | None, str | None]:
    """Float64 values of the column feeding feature ``j``, a note on coerced types and a note on unseen levels.

    Categorical features with known levels are coded by the model's own
    levels; every other column must hold numbers, booleans or text that reads
    as numbers.
    """
    levels = graph.category_levels.get(graph.feature_names[j])
    # pandas >= 3 reads text as the "str" dtype, older versions as object.
    is_text = series.dtype == object or pd.api.types.is_string_dtype(series.dtype)
    if levels is not None and (isinstance(series.dtype, pd.CategoricalDtype) or is_text):
        codes, unseen = _coded_by_levels(graph, series, levels, col)
        return codes, None, unseen
    if isinstance(series.dtype, pd.CategoricalDtype):
        codes = series.cat.codes.to_numpy().astype(np.float64)
        codes[codes < 0] = np.nan
        return codes, None, None
    if is_text and graph.feature_types[j] == "categorical" and series.notna().any():
        try:
            values, note = _numeric_values(series, col)
        except DataError:
            raise DataError(
                f"column {col!r} holds text labels for the categorical feature {graph.feature_names[j]!r}, but "
                "the model stores no category levels to code them with; give the integer category codes used "
                "in training, or a pandas categorical column with the training categories in training order"
            ) from None
        return values, note, None
    values, note = _numeric_values(series, col)
    return values, note, None


def _frame_matrix(graph: ForestGraph, frame: pd.DataFrame, source_columns: list[str], *,
                  strict: bool) -> tuple[np.ndarray, list[str], list[str]]:
    """The model matrix of a frame's feature columns, with the coercion notes and the unseen-level notes.

    Unseen category levels warn here, once per column; this is the only place data are coded.
    """
    position = {c: i for i, c in enumerate(str(c) for c in frame.columns)}
    out = np.empty((len(frame), len(source_columns)), dtype=np.float64)
    coerced: list[str] = []
    unseen: list[str] = []
    for j, column in enumerate(source_columns):
        series = frame.iloc[:, position[column]]
        if strict and series.isna().all():
            raise DataError(f"column {column!r} is entirely missing (all {len(series):,} values are empty or NaN)")
        out[:, j], note, unseen_note = _column_values(graph, series, j, column)
        if note:
            coerced.append(note)
        if unseen_note:
            unseen.append(unseen_note)
            warnings.warn(unseen_note, UnseenCategoryWarning, stacklevel=3)
    return out, coerced, unseen


def numeric_array(X: Any) -> np.ndarray:
    """``X`` as a 2-D float64 array (rows x columns), or one DataError saying why it is not one."""
    try:
        arr = np.asarray(X, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise DataError(f"data is not numeric: {exc}") from None
    if arr.ndim != 2:
        raise DataError(f"data must be 2-D (rows x features), got {arr.ndim}-D")
    return arr


def _array_matrix(graph: ForestGraph, X: Any, *, strict: bool) -> np.ndarray:
    arr = numeric_array(X)
    if arr.shape[1] != graph.n_features:
        raise DataError(f"data has {arr.shape[1]} columns, the model expects {graph.n_features} features")
    if np.isinf(arr).any():
        row, col = (int(i) for i in np.argwhere(np.isinf(arr))[0])
        raise DataError(f"data column {col} ({graph.feature_names[col]!r}) holds an infinite value at row {row}; "
                        "use finite numbers, or NaN for missing")
    if strict:
        empty = np.isnan(arr).all(axis=0) if arr.shape[0] else np.zeros(arr.shape[1], bool)
        if arr.shape[0] == 0:
            raise DataError("data have no rows")
        if empty.any():
            col = int(np.flatnonzero(empty)[0])
            raise DataError(f"data column {col} ({graph.feature_names[col]!r}) is entirely missing "
                            f"(all {arr.shape[0]:,} values are NaN)")
    return arr


def model_matrix(graph: ForestGraph, X: Any, *, strict: bool = False) -> np.ndarray:
    """Turn user data into the float64 matrix a model's trees read: one column per feature, in the model's order.

    Parameters
    ----------
    graph : ForestGraph
        The model whose features the data must provide.
    X : DataFrame or array-like of shape (n_rows, n_features)
        A DataFrame is matched by column name (order free; extra columns are
        ignored), or by position when the model has only generic names
        (``f0, f1, ...``) and the frame has as many columns. A plain array
        must have exactly ``n_features`` columns.
    strict : bool, default False
        Also refuse data without rows and a feature column that is entirely
        missing (the checks of :func:`prepare_data`).

    Returns
    -------
    ndarray of float64, shape (n_rows, n_features)
        Numeric features as numbers (booleans as 0/1, text that reads as a
        number as that number, empty cells as NaN); categorical features as
        the model's codes: text and pandas categorical columns are coded by
        ``graph.category_levels`` when the model stores levels, by the
        column's own categories otherwise (missing = NaN).

    Raises
    ------
    DataError
        Naming the missing columns (with close matches for typos), the
        column count found and expected, a column whose values are not
        numbers (first bad value and its row), or an infinite value
        (column and row).

    Warns
    -----
    UnseenCategoryWarning
        A categorical column holds levels the model never saw (column and
        levels); they are routed as the model's library routes them
        (``graph.unseen_category``).

    Examples
    --------
    >>> import pandas as pd
    >>> from treeprobe import ForestGraph
    >>> model = ForestGraph.from_arrays(
    ...     feature=[0, -1, -1], threshold=[1.5, 0, 0], left=[1, -1, -1], right=[2, -1, -1],
    ...     value=[0, 10, 20], tree_offsets=[0, 3], feature_names=["shift_length"])
    >>> model_matrix(model, pd.DataFrame({"crew": [3, 4], "shift_length": ["1.0", True]})).tolist()
    [[1.0], [1.0]]
    """
    _require_graph(graph, "graph")
    if not isinstance(X, pd.DataFrame):
        return _array_matrix(graph, X, strict=strict)
    if strict and X.shape[0] == 0:
        raise DataError("data have no rows")
    columns = [str(c) for c in X.columns]
    source_columns, _ = _feature_columns(graph, columns, None)
    return _frame_matrix(graph, X, source_columns, strict=strict)[0]


def prepare_data(
    ensemble: ForestGraph,
    frame: pd.DataFrame,
    *,
    target: str | None = None,
) -> tuple[pd.DataFrame, DataReport]:
    """Fit a data frame to a model's features: match columns, check and coerce values.

    Parameters
    ----------
    ensemble : ForestGraph
        The model whose features the data must provide.
    frame : DataFrame
        The data, as read by :func:`read_table` or built by hand.
    target : str, optional
        Name of a target column to keep (last) beside the features; it is not
        counted as an extra column and is not checked.

    Returns
    -------
    prepared : DataFrame
        The model matrix (see :func:`model_matrix`, the one path both
        share) as float64 columns named and ordered as the model's features,
        plus ``target`` last (as it came) when given: numeric features as
        numbers, categorical features as the model's codes (text labels
        coded by the model's own levels). The index is kept, so row labels
        in messages are the data's own.
    report : DataReport
        How columns were matched and what was coerced; ``report.lines()``
        gives it as text.

    Raises
    ------
    DataError
        A missing feature column (all are listed, with close matches for
        typos), a missing target column, repeated column names, a numeric
        feature's column holding a value that is not a number (the first one
        and its row are named), an infinite value (column and row), or a
        feature column that is entirely missing.

    Warns
    -----
    DataWarning
        Extra columns (listed), or columns matched by position.
    UnseenCategoryWarning
        Category levels the model never saw (column and levels).

    Notes
    -----
    Columns are matched by name, in any order. Only when the model stores no
    names (XGBoost ``f0, f1, ...``, LightGBM ``Column_0, ...``) and the data
    have exactly as many feature columns are they matched by position, and
    the report says so. Numeric features accept numbers, booleans (read as
    0/1) and text that reads as a number; empty cells are missing values,
    which the trees route by their default directions.

    Examples
    --------
    >>> import pandas as pd
    >>> from treeprobe import ForestGraph
    >>> model = ForestGraph.from_arrays(
    ...     feature=[0, -1, -1], threshold=[1.5, 0, 0], left=[1, -1, -1], right=[2, -1, -1],
    ...     value=[0, 10, 20], tree_offsets=[0, 3], feature_names=["shift_length"])
    >>> frame = pd.DataFrame({"crew": [3, 4], "shift_length": ["1.0", "2.5"]})
    >>> prepared, report = prepare_data(model, frame)
    >>> prepared["shift_length"].tolist()
    [1.0, 2.5]
    """
    _require_graph(ensemble, "ensemble")
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"frame must be a pandas DataFrame, got {type(frame).__name__}")
    if target is not None and not isinstance(target, str):
        raise TypeError(f"target must be a column name or None, got {target!r}")
    if frame.shape[0] == 0:
        raise DataError("data have no rows")
    columns = [str(c) for c in frame.columns]
    if target is not None and target not in columns:
        raise DataError(_missing_columns_message([target], columns, "the target column"))
    if target is not None and target in ensemble.feature_names:
        raise DataError(f"target {target!r} is also one of the model's features")
    source_columns, matched_by = _feature_columns(ensemble, columns, target)
    extra = tuple(c for c in columns if c not in source_columns and c != target)
    if matched_by == "position":
        pairs = ", ".join(f"{c} -> {n}" for c, n in zip(source_columns[:5], ensemble.feature_names[:5], strict=False))
        warnings.warn(f"the model has no feature names; data columns matched to features by position ({pairs}"
                      f"{' ...' if len(source_columns) > 5 else ''})", DataWarning, stacklevel=2)
    if extra:
        shown = ", ".join(extra[:10]) + (" ..." if len(extra) > 10 else "")
        warnings.warn(f"data hold {len(extra)} column(s) the model does not use, ignored: {shown}",
                      DataWarning, stacklevel=2)
    matrix, coerced, unseen = _frame_matrix(ensemble, frame, source_columns, strict=True)
    out = pd.DataFrame(matrix, index=frame.index, columns=list(ensemble.feature_names))
    if target is not None:
        out[target] = frame.iloc[:, columns.index(target)]
    report = DataReport(n_rows=len(out), matched_by=matched_by, extra_columns=extra, coerced=tuple(coerced),
                        unseen_categories=tuple(unseen), target=target)
    return out, report


def load_data(
    ensemble: ForestGraph,
    path: str | os.PathLike,
    *,
    target: str | None = None,
    sample: int | None = None,
    random_state: int = 0,
) -> tuple[pd.DataFrame, DataReport]:
    """Read a data file for a model with bounded memory and fit it to the model's features.

    Reads the header first, then only the columns the model needs (plus
    ``target``) and, with ``sample``, a uniform row sample drawn while
    reading (see :func:`read_table`); then :func:`prepare_data`.

    Parameters
    ----------
    ensemble : ForestGraph
        The model whose features the data must provide.
    path : str or path
        CSV, or Parquet with pyarrow installed.
    target : str, optional
        Target column to keep beside the features.
    sample : int, optional
        Rows to keep (all when None or when the file has fewer).
    random_state : int, default 0
        Seed of the row sample.

    Returns
    -------
    prepared : DataFrame
    report : DataReport
        As for :func:`prepare_data`; extra columns are those of the file's header.

    Raises
    ------
    DataError
        As :func:`read_table` and :func:`prepare_data`.
    """
    _require_graph(ensemble, "ensemble")
    p = Path(path)
    _check_data_file(p)
    header = _header(p)
    if target is not None and target not in header:
        raise DataError(f"{p}: " + _missing_columns_message([target], header, "the target column"))
    try:
        feature_columns, _ = _feature_columns(ensemble, header, target)
    except DataError as exc:
        raise DataError(f"{p}: {exc}") from None
    wanted = set(feature_columns) | ({target} if target else set())
    frame = read_table(p, columns=[c for c in header if c in wanted], sample=sample, random_state=random_state)
    with warnings.catch_warnings():
        # The ignored columns were never read; they are reported from the header below.
        warnings.simplefilter("ignore", DataWarning)
        prepared, report = prepare_data(ensemble, frame, target=target)
    extra = tuple(c for c in header if c not in wanted)
    if extra:
        shown = ", ".join(extra[:10]) + (" ..." if len(extra) > 10 else "")
        warnings.warn(f"{p}: {len(extra)} column(s) the model does not use, ignored: {shown}", DataWarning, stacklevel=2)
    if report.matched_by == "position":
        warnings.warn(f"{p}: the model has no feature names; data columns matched to features by position",
                      DataWarning, stacklevel=2)
    return prepared, DataReport(n_rows=report.n_rows, matched_by=report.matched_by, extra_columns=extra,
                                coerced=report.coerced, unseen_categories=report.unseen_categories, target=target)
