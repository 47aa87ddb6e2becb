"""Validation of options at the door: one helper per kind of value.

Every public function checks its keyword options with these helpers before
any work starts, in the manner of scikit-learn's parameter validation: the
message names the parameter, what it accepts and the value it got, and the
error is a :class:`~treeprobe.errors.ParameterError` (not a
:class:`~treeprobe.errors.DataError`, which means "data do not fit the
model").

Examples
--------
>>> check_int("folds", 5, low=2)
5
>>> check_int("folds", 1, low=2)
Traceback (most recent call last):
...
treeprobe.errors.ParameterError: folds must be an integer >= 2, got 1
>>> check_choice("scale", "margin", ("margin", "probability"))
'margin'
"""

from __future__ import annotations

import difflib
import math
import numbers
from collections.abc import Collection, Sequence
from typing import Any

from .errors import ParameterError

__all__ = ["check_int", "check_float", "check_choice", "check_bool", "check_progress", "check_n_jobs", "check_seed",
           "close_name"]


# Similarity (difflib's ratio, 0 to 1) from which a known name is offered for a misspelt one: our convention,
# between difflib's default 0.6 and exact; 'fuel_prise' -> 'fuel_price' is 0.9, 'depot' -> 'load_kg' 0.17.
CLOSE_NAME_CUTOFF = 0.7


def close_name(name: str, names: Sequence[str]) -> str | None:
    """The one name of ``names`` most like ``name`` (a likely typo), or None when none is close enough.

    Examples
    --------
    >>> close_name("fuel_prise", ["fuel_price", "depot"]), close_name("shift", ["fuel_price", "depot"])
    ('fuel_price', None)
    """
    close = difflib.get_close_matches(str(name), [str(n) for n in names], n=1, cutoff=CLOSE_NAME_CUTOFF)
    return close[0] if close else None


def _range_text(low: float | None, high: float | None, low_open: bool = False) -> str:
    if low is not None and high is not None:
        return f" in ({low}, {high}]" if low_open else f" in {low}..{high}"
    if low is not None:
        return f" > {low}" if low_open else f" >= {low}"
    if high is not None:
        return f" <= {high}"
    return ""


def _refused(name: str, accepted: str, allow_none: bool, value: Any) -> ParameterError:
    return ParameterError(f"{name} must be {accepted}{' or None' if allow_none else ''}, got {value!r}")


def check_int(name: str, value: Any, *, low: int | None = None, high: int | None = None,
              allow_none: bool = False) -> int | None:
    """Return ``value`` as an ``int`` when it is a whole number within ``[low, high]``.

    Booleans are refused (``True`` is not a count). ``None`` passes when
    ``allow_none``.

    Raises
    ------
    ParameterError
        Naming ``name``, the accepted range and the value.
    """
    if value is None and allow_none:
        return None
    ok = isinstance(value, numbers.Integral) and not isinstance(value, bool)
    if ok and (low is None or value >= low) and (high is None or value <= high):
        return int(value)
    raise _refused(name, "an integer" + _range_text(low, high), allow_none, value)


def check_float(name: str, value: Any, *, low: float | None = None, high: float | None = None,
                low_open: bool = False, allow_none: bool = False) -> float | None:
    """Return ``value`` as a finite ``float`` within ``[low, high]`` (``(low, high]`` when ``low_open``).

    Infinities and NaN are refused, as are booleans; ``None`` passes when ``allow_none``.
    """
    if value is None and allow_none:
        return None
    ok = isinstance(value, numbers.Real) and not isinstance(value, bool) and math.isfinite(value)
    above = ok and (low is None or (value > low if low_open else value >= low))
    if above and (high is None or value <= high):
        return float(value)
    raise _refused(name, "a finite number" + _range_text(low, high, low_open), allow_none, value)


def check_choice(name: str, value: Any, choices: Collection[Any]) -> Any:
    """Return ``value`` when it is one of ``choices``.

    Raises
    ------
    ParameterError
        Listing the choices.
    """
    if isinstance(value, (str, int, type(None))) and value in choices:
        return value
    listed = ", ".join(repr(c) for c in choices)
    raise ParameterError(f"{name} must be one of {listed}, got {value!r}")


def check_bool(name: str, value: Any) -> bool:
    """Return ``value`` when it is ``True`` or ``False``.

    Raises
    ------
    ParameterError
    """
    if isinstance(value, bool):
        return value
    raise ParameterError(f"{name} must be True or False, got {value!r}")


def check_progress(value: Any) -> bool | None:
    """The ``progress`` option: None (a bar on a terminal only), True or False."""
    if value is None or isinstance(value, bool):
        return value
    raise ParameterError(f"progress must be None (a bar on a terminal only), True or False, got {value!r}")


def check_n_jobs(value: Any, *, name: str = "n_jobs") -> int:
    """The ``n_jobs`` option (or the flag ``name``): a non-zero integer, -1 for all cores (joblib's convention)."""
    if isinstance(value, numbers.Integral) and not isinstance(value, bool) and value != 0:
        return int(value)
    raise ParameterError(f"{name} must be a non-zero integer (-1 for all cores), got {value!r}")


def check_seed(name: str, value: Any, *, allow_none: bool = True) -> int | None:
    """A random seed: a non-negative integer (or None when ``allow_none``)."""
    return check_int(name, value, low=0, allow_none=allow_none)
