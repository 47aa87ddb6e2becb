"""Helpers shared by the benchmark scripts: best-of timing, the load average and the summary table.

Every benchmark reports ratios against a baseline timed in the same run. On a
shared machine absolute seconds are noisy, so each figure is the best of
several repeats (rounds interleave the timed functions, so load from other
processes hits all alike) and the 1-minute load average is printed beside it.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable


def best_times(funcs: dict[str, Callable[[], object]], repeats: int) -> dict[str, float]:
    """Best wall time of each function over ``repeats`` interleaved rounds."""
    best = dict.fromkeys(funcs, float("inf"))
    for _ in range(repeats):
        for name, func in funcs.items():
            start = time.perf_counter()
            func()
            best[name] = min(best[name], time.perf_counter() - start)
    return best


def load_average() -> str:
    """The 1, 5 and 15 minute load averages with the core count, e.g. ``"load 1.20 0.90 0.70 on 2 cores"``."""
    try:
        one, five, fifteen = os.getloadavg()
    except OSError:
        return "load average unavailable"
    return f"load {one:.2f} {five:.2f} {fifteen:.2f} on {os.cpu_count()} cores"


def summary_table(title: str, rows: list[tuple[str, str, str, bool]]) -> str:
    """A compact table: measure, figure, floor, PASS/FAIL; the title carries the load average."""
    width = max([len(r[0]) for r in rows] + [7])
    value_width = max([len(r[1]) for r in rows] + [6])
    floor_width = max([len(r[2]) for r in rows] + [5])
    lines = [f"{title} ({load_average()})",
             f"{'measure':<{width}}  {'figure':>{value_width}}  {'floor':>{floor_width}}  verdict"]
    lines += [f"{label:<{width}}  {value:>{value_width}}  {floor:>{floor_width}}  {'PASS' if ok else 'FAIL'}"
              for label, value, floor, ok in rows]
    return "\n".join(lines)
