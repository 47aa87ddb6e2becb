"""How the report looks: one style per verdict, series styles and the number format, shared by figures and page.

Colours come from the palette of Okabe and Ito [1]_, which colour-blind
readers can tell apart, and every colour is doubled by a marker shape and
fill (figures), a glyph (tables) and a line style (arcs and borders), so a
verdict never rests on colour alone and the page reads in greyscale.

References
----------
.. [1] M. Okabe and K. Ito, "Color universal design (CUD): how to make
   figures and presentations that are friendly to colorblind people", 2008.
"""

from __future__ import annotations

import math
from typing import Any

from ..verdicts import VERDICTS

__all__ = ["VERDICT_STYLES", "SERIES_COLOURS", "SERIES_LINES", "SERIES_MARKERS", "number_text"]

_STYLE_OF = {
    "interaction": {"colour": "#D55E00", "marker": "o", "filled": True, "glyph": "\u25cf", "line": "solid"},
    "dependent": {"colour": "#E69F00", "marker": "^", "filled": True, "glyph": "\u25b2", "line": "dashed"},
    "co-split": {"colour": "#0072B2", "marker": "s", "filled": False, "glyph": "\u25a1", "line": "dotted"},
    "absent": {"colour": "#7F7F7F", "marker": "x", "filled": True, "glyph": "\u00d7", "line": "none"},
}
# In the one verdict order of treeprobe.verdicts, so legends and tallies follow the tables.
VERDICT_STYLES = {verdict: _STYLE_OF[verdict] for verdict in VERDICTS}

SERIES_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9")
SERIES_LINES = ("solid", "dashed", "dashdot", "dotted", (0, (5, 1, 1, 1, 1, 1)), (0, (8, 2)))
SERIES_MARKERS = ("o", "s", "^", "D", "v", "P")


def number_text(value: Any, digits: int = 3) -> str:
    """A number with ``digits`` significant digits; '-' for missing.

    Examples
    --------
    >>> number_text(0.012345), number_text(1234.0), number_text(float("nan")), number_text(3e-7)
    ('0.0123', '1,234', '-', '3.00e-07')
    """
    if value is None:
        return "-"
    try:
        number = float(value)
    except (TypeError, ValueError):
        return str(value)
    if math.isnan(number):
        return "-"
    if number == 0:
        return "0"
    if number.is_integer() and abs(number) < 1e6:
        return f"{int(number):,}"
    if abs(number) >= 1e6 or abs(number) < 10 ** (-digits):
        return f"{number:.{digits - 1}e}"
    return f"{number:.{digits}g}" if abs(number) < 10 ** digits else f"{number:,.0f}"
