"""Peak memory and time of the command line on a 10,000-tree model and a 1,000,000-row CSV.

Runs the real ``treeprobe`` command in a subprocess under ``/usr/bin/time -v``
(its "Maximum resident set size" is the peak RSS of that one process):

* ``treeprobe inspect MODEL`` on a 10,000-tree XGBoost model;
* ``treeprobe measure MODEL --data BIG.csv --sample 1000`` with the same model
  and a 1,000,000-row CSV.

Target: every run under 2 GB peak RSS. The data path alone is also measured:
reading the whole CSV against :func:`treeprobe.data.load_data` with
``sample=1000`` (needed columns only, sample drawn while reading). As baselines measured in the same run,
the same commands on a 100-tree model and a 10,000-row CSV give the ratios
printed next to each figure, so the verdicts do not depend on the machine.

The scenario is invented: a delivery fleet's fuel use from eight trip
features. The 10,000-tree model is a 500-tree model's trees repeated twenty
times (a valid XGBoost file), which saves training time without changing what
the loader and the path walk do per node.

Usage::

    .venv/bin/python scripts/bench_large_inputs.py [--workdir DIR] [--rows 1000000]
"""

from __future__ import annotations

import argparse
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
from bench_load import repeat_trees  # scripts/ is first on sys.path when a script runs

FEATURES = ("fuel_price", "shift_length", "ambient_temp", "load_factor", "crew_size", "route_km",
            "idle_minutes", "cargo_tonnes")
BASE_TREES = 500
REPEAT = 20
LIMIT_BYTES = 2 * 1024**3


def _frame(n_rows: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({name: rng.normal(size=n_rows).round(4) for name in FEATURES})
    frame["fuel_used"] = (frame["route_km"] * (1 + 0.5 * frame["load_factor"]) + frame["idle_minutes"]
                          + 0.3 * frame["ambient_temp"] * frame["shift_length"] + rng.normal(size=n_rows)).round(4)
    return frame


def _train(workdir: Path, n_trees: int) -> Path:
    import xgboost as xgb

    frame = _frame(5000, 0)
    booster = xgb.train({"max_depth": 4, "eta": 0.05, "tree_method": "hist", "nthread": 2, "seed": 0},
                        xgb.DMatrix(frame[list(FEATURES)], label=frame["fuel_used"]), num_boost_round=n_trees)
    path = workdir / f"fleet_{n_trees}.json"
    booster.save_model(str(path))
    return path


_READ_CODE = """
import sys
from treeprobe import load_model
from treeprobe.data import load_data, read_table

if sys.argv[1] == "full":
    frame = read_table(sys.argv[3])
else:
    frame, _ = load_data(load_model(sys.argv[2]), sys.argv[3], sample=1000)
print(len(frame))
"""


def _run(args: list[str], *, module: bool = True) -> tuple[float, int]:
    """Wall seconds and peak RSS in bytes of one run; raises when the command fails."""
    command = ["/usr/bin/time", "-v", sys.executable, *(["-m", "treeprobe.cli"] if module else []), *args]
    start = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True)
    seconds = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(f"failed ({done.returncode}): {' '.join(args)}\n{done.stderr[-2000:]}")
    match = re.search(r"Maximum resident set size \(kbytes\): (\d+)", done.stderr)
    if match is None:
        raise SystemExit("could not read the peak RSS from /usr/bin/time -v")
    return seconds, int(match.group(1)) * 1024


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--workdir", type=Path, default=None)
    parser.add_argument("--rows", type=int, default=1_000_000)
    args = parser.parse_args(argv)
    if args.rows < 10_000:
        parser.error(f"--rows must be at least 10000, got {args.rows}")
    with tempfile.TemporaryDirectory(prefix="treeprobe-bench-") as tmp:
        workdir = args.workdir or Path(tmp)
        workdir.mkdir(parents=True, exist_ok=True)
        small_model = _train(workdir, 100)
        base_model = _train(workdir, BASE_TREES)
        big_model = workdir / "fleet_10000.json"
        repeat_trees(base_model, big_model, REPEAT)
        small_csv, big_csv = workdir / "trips_small.csv", workdir / "trips_big.csv"
        _frame(10_000, 1).to_csv(small_csv, index=False)
        _frame(args.rows, 2).to_csv(big_csv, index=False)
        print(f"model {big_model.stat().st_size / 1e6:.1f} MB ({BASE_TREES * REPEAT} trees), "
              f"CSV {big_csv.stat().st_size / 1e6:.1f} MB ({args.rows:,} rows)")
        runs = {
            "inspect": (["inspect", str(small_model)], ["inspect", str(big_model)]),
            "measure --sample 1000": (
                ["measure", str(small_model), "--data", str(small_csv), "--sample", "1000", "--quiet"],
                ["measure", str(big_model), "--data", str(big_csv), "--sample", "1000", "--quiet"],
            ),
        }
        failed = False
        for name, (baseline, large) in runs.items():
            base_seconds, base_rss = _run(baseline)
            seconds, rss = _run(large)
            verdict = "ok" if rss < LIMIT_BYTES else "OVER 2 GB"
            failed |= rss >= LIMIT_BYTES
            print(f"{name:<22} peak RSS {rss / 1024**2:7.0f} MB ({rss / base_rss:4.1f}x the small run's "
                  f"{base_rss / 1024**2:.0f} MB), {seconds:6.1f} s ({seconds / base_seconds:4.1f}x)  [{verdict}]")
        # The data path alone: reading the whole CSV (what a plain read does) against the bounded
        # read of treeprobe.data.load_data (needed columns only, sample drawn while reading).
        full_seconds, full_rss = _run(["-c", _READ_CODE, "full", str(big_model), str(big_csv)], module=False)
        bounded_seconds, bounded_rss = _run(["-c", _READ_CODE, "bounded", str(big_model), str(big_csv)], module=False)
        print(f"{'read CSV, all rows':<22} peak RSS {full_rss / 1024**2:7.0f} MB, {full_seconds:6.1f} s")
        print(f"{'load_data sample 1000':<22} peak RSS {bounded_rss / 1024**2:7.0f} MB "
              f"({bounded_rss / full_rss:4.2f}x the full read), {bounded_seconds:6.1f} s "
              f"({bounded_seconds / full_seconds:4.2f}x)")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
