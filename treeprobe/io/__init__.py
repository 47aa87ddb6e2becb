"""Loaders: every supported source becomes one :class:`~treeprobe.graph.ForestGraph`.

One module per source library: :mod:`.xgboost` (JSON and UBJSON files, Booster
and scikit-learn wrappers), :mod:`.lightgbm` (model text, Booster and wrappers),
:mod:`.sklearn` (scikit-learn tree estimators). Saved XGBoost and LightGBM
files are parsed directly, so reading them needs neither library installed.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

import joblib

from ..errors import ModelFormatError, UnsafeModelError, UnsupportedModelError
from ..graph import ForestGraph
from .lightgbm import from_lightgbm, load_lightgbm_text
from .sklearn import from_sklearn
from .xgboost import from_xgboost, load_xgboost_json, load_xgboost_ubjson

__all__ = ["load_model", "read_model_file", "MAX_FILE_BYTES"]

MAX_FILE_BYTES = 4 * 1024**3
_PICKLE_SUFFIXES = {".pkl", ".pickle", ".joblib", ".sav", ".pck"}


def _read_file(path: Path) -> bytes:
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise ModelFormatError(f"{path}: cannot read the model file: {exc.strerror or exc}") from None
    if path.is_dir():
        raise ModelFormatError(f"{path}: is a directory, expected a model file")
    if size > MAX_FILE_BYTES:
        raise ModelFormatError(f"{path}: file is {size / 1024**3:.1f} GiB, larger than the {MAX_FILE_BYTES // 1024**3} GiB limit")
    try:
        return path.read_bytes()
    except OSError as exc:
        raise ModelFormatError(f"{path}: cannot read the model file: {exc.strerror or exc}") from None


def _looks_pickled(path: Path, head: bytes) -> bool:
    # Protocol 2+ pickles start with PROTO (0x80); joblib's compressed files
    # start with a zlib/gzip/lzma/bz2 magic or joblib's own "ZF" header.
    magics = (b"\x80", b"ZF", b"\x1f\x8b", b"\x78\x9c", b"\x78\x01", b"\x78\xda", b"\xfd7zXZ", b"BZh")
    return path.suffix.lower() in _PICKLE_SUFFIXES or head.startswith(magics)


def _load_pickle(path: Path, data: bytes) -> Any:
    try:
        return joblib.load(path)
    except Exception as exc:  # noqa: BLE001 - any unpickling failure is a bad file
        raise ModelFormatError(f"{path}: cannot unpickle the file: {type(exc).__name__}: {exc}") from None


def read_model_file(path: Path, trust_pickle: bool = False) -> ForestGraph | Any:
    """Read a model file: a parsed :class:`ForestGraph`, or the unpickled object (only with ``trust_pickle``)."""
    path = Path(path)
    data = _read_file(path)
    if not data.strip():
        raise ModelFormatError(f"{path}: file is empty")
    head = data[:16]
    if _looks_pickled(path, head):
        if not trust_pickle:
            raise UnsafeModelError(
                f"{path}: looks like a pickle/joblib file; unpickling runs arbitrary code from the file. "
                "Load it only if you trust its origin, with trust_pickle=True (command line: --trust-pickle)."
            )
        return _load_pickle(path, data)
    stripped = data.lstrip()
    if stripped.startswith((b"tree\n", b"tree\r\n")) or b"\nversion=v" in data[:200]:
        return load_lightgbm_text(data, source=str(path))
    if stripped.startswith(b"{"):
        second = stripped[1:2]
        # "{}" is an empty JSON object unless the suffix says UBJSON.
        if path.suffix.lower() == ".ubj" or second in (b"L", b"U", b"i", b"I", b"l", b"$", b"#"):
            return load_xgboost_ubjson(data, source=str(path))
        return load_xgboost_json(data, source=str(path))
    raise ModelFormatError(
        f"{path}: unknown model format (expected XGBoost JSON/UBJSON, LightGBM model text, "
        f"or a pickle with trust_pickle=True); the file starts with {head[:8]!r}"
    )


def _from_object(obj: Any, source: str) -> ForestGraph:
    module = type(obj).__module__.split(".")[0]
    if module == "xgboost":
        return from_xgboost(obj, source=source)
    if module == "lightgbm":
        return from_lightgbm(obj, source=source)
    if module == "sklearn":
        return from_sklearn(obj, source=source)
    raise UnsupportedModelError(
        f"{source}: cannot read a {type(obj).__module__}.{type(obj).__name__}; expected an XGBoost, LightGBM or "
        "scikit-learn tree model, a saved model file, or a ForestGraph"
    )


def load_model(
    source: Any,
    feature_names: Sequence[str] | None = None,
    *,
    trust_pickle: bool = False,
) -> ForestGraph:
    """Load a fitted tree ensemble into the common graph.

    Parameters
    ----------
    source : str, path, model object or ForestGraph
        A saved XGBoost model (``.json`` or ``.ubj`` from ``save_model``), a
        LightGBM model text file, a pickle/joblib file of any supported model
        (only with ``trust_pickle=True``), an XGBoost ``Booster`` /
        ``XGBModel``, a LightGBM ``Booster`` / ``LGBMModel``, a scikit-learn
        tree estimator, or a :class:`ForestGraph` (returned as is).
    feature_names : sequence of str, optional
        Names for the model's input columns, overriding (or supplying) the
        ones the model stores. Its length must equal the model's feature count.
    trust_pickle : bool, default False
        Allow unpickling. Unpickling runs code stored in the file, so it is
        refused unless you trust the file's origin.

    Returns
    -------
    ForestGraph

    Raises
    ------
    ModelFormatError
        Truncated, corrupt or unknown file; arrays that do not form trees.
    UnsafeModelError
        A pickle without ``trust_pickle=True``.
    UnsupportedModelError
        A model object treeprobe does not read.
    """
    if isinstance(source, ForestGraph):
        ens = source
    elif isinstance(source, (str, os.PathLike)):
        path = Path(source)
        loaded = read_model_file(path, trust_pickle)
        ens = loaded if isinstance(loaded, ForestGraph) else _from_object(loaded, source=str(path))
    else:
        ens = _from_object(source, source=f"<{type(source).__name__} object>")
    if feature_names is not None:
        if isinstance(feature_names, (str, bytes)):
            raise TypeError(f"feature_names must be a sequence of names, not a single string: {feature_names!r}")
        names = tuple(str(n) for n in feature_names)
        if len(set(names)) != len(names):
            repeated = sorted({n for n in names if names.count(n) > 1})
            raise ModelFormatError(f"{ens.source}: feature_names repeats {', '.join(repeated[:5])}")
        if len(names) != ens.n_features:
            raise ModelFormatError(
                f"{ens.source}: {len(names)} feature names given, the model has {ens.n_features} features"
            )
        ens = replace(ens, feature_names=names, generic_feature_names=False)
    return ens
