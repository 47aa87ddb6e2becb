"""The exceptions treeprobe raises on bad input.

Every error a user can cause derives from :class:`TreeprobeError`, itself a
``ValueError``, so callers can catch one type. Messages say what was expected,
what was found and where (file, tree, node, column).

Hierarchy::

    ValueError
    └── TreeprobeError           any bad input; the command line exits 1 with its message
        ├── ModelFormatError     model file or object corrupt, truncated, inconsistent
        ├── UnsafeModelError     a pickle without trust_pickle=True / --trust-pickle
        ├── UnsupportedModelError  well formed, but a kind treeprobe does not read
        ├── ParameterError       an option has a value outside what it accepts
        ├── DataError            data do not fit the model (columns, types, values)
        └── MissingLibraryError  an optional library needed for this step is absent

    UserWarning
    └── DataWarning              data usable, but something was ignored or changed

(``treeprobe.data.UnseenCategoryWarning`` is the warning for category
levels the model never saw.)
"""

from __future__ import annotations

__all__ = [
    "TreeprobeError",
    "ModelFormatError",
    "UnsafeModelError",
    "ParameterError",
    "DataError",
    "UnsupportedModelError",
    "MissingLibraryError",
    "DataWarning",
]


class TreeprobeError(ValueError):
    """Base class of every error treeprobe raises on bad input."""


class ModelFormatError(TreeprobeError):
    """A model file or object is corrupt, truncated, of the wrong shape or unknown.

    Raised as well for absurd sizes (declared node, feature or output counts
    far beyond what the file holds). The message names the source (file path
    or object type), what is wrong and where (tree, node, key, line or byte
    offset).
    """


class UnsafeModelError(TreeprobeError):
    """Loading the source would run foreign code (a pickle) and the user did not opt in.

    Pickle and joblib files are recognised by suffix and by their first bytes,
    so a renamed pickle is refused too; pass ``trust_pickle=True``
    (``--trust-pickle``) only for files from a trusted origin.
    """


class UnsupportedModelError(TreeprobeError):
    """The model is well formed but uses a feature treeprobe does not handle."""


class ParameterError(TreeprobeError):
    """An option (keyword argument or command-line flag) has a value it does not accept.

    Distinct from :class:`DataError`, which means the data do not fit the
    model. The message names the parameter, what it accepts and the value
    it got. Raised by the helpers of :mod:`treeprobe.checks`.
    """


class DataError(TreeprobeError):
    """Input data do not fit the model: missing or repeated columns, too few rows, bad values.

    Bad values are text that is not a number in a numeric column, infinities,
    and columns that are entirely missing; the message names the column, the
    first bad value and its row.
    """


class MissingLibraryError(TreeprobeError):
    """An optional library needed for this step (xgboost or lightgbm, to retrain) is not installed."""


class DataWarning(UserWarning):
    """Data are usable but something was ignored or changed: extra columns, columns matched by position.

    Not an error: the run goes on. The message names the columns concerned.
    """
