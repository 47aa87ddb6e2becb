"""The exceptions treeprobe raises on bad input.

Every error a user can cause derives from :class:`TreeprobeError`, itself a
``ValueError``, so callers can catch one type. Messages say what was expected,
what was found and where (file, tree, node, column).
"""

from __future__ import annotations

__all__ = [
    "TreeprobeError",
    "ModelFormatError",
    "UnsafeModelError",
    "DataError",
    "UnsupportedModelError",
    "MissingLibraryError",
]


class TreeprobeError(ValueError):
    """Base class of every error treeprobe raises on bad input."""


class ModelFormatError(TreeprobeError):
    """A model file or object is corrupt, truncated, of the wrong shape or unknown.

    The message names the source (file path or object type) and what is wrong.
    """


class UnsafeModelError(TreeprobeError):
    """Loading the source would run foreign code (a pickle) and the user did not opt in."""


class UnsupportedModelError(TreeprobeError):
    """The model is well formed but uses a feature treeprobe does not handle."""


class DataError(TreeprobeError):
    """Input data does not fit the model: wrong columns, too few rows, bad values."""


class MissingLibraryError(TreeprobeError):
    """An optional library needed for this step (xgboost or lightgbm, to retrain) is not installed."""
