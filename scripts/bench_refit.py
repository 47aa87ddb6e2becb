"""Retraining checks with figures: the planted-diabetes case, a known-answer validation, and triage beside a busy process.

Three measurements, printed as one table with the issue's floors:

1. Planted diabetes (scikit-learn's ``load_diabetes``, Efron, Hastie, Johnstone and
   Tibshirani 2004) with target + 25 z(bmi) z(bp) + 12 z(age) z(s6), an
   ``XGBRegressor(n_estimators=200, max_depth=4, learning_rate=0.05)`` saved as JSON;
   the command line with no training parameters: both planted pairs must be
   ``interaction``, ``constrain`` must keep both, and the suggested groups must
   cost at most 3% CV RMSE against no constraints.
2. Known-answer data of our own (y = 3 x0 x1 + 2 sin(x2) x3 + x4 + x5 + noise),
   a live ``XGBRegressor`` at learning rate 0.05: ``validate_constraints`` with
   the true groups must report that they help.
3. ``triage --target`` on the planted case alone, then beside one busy process
   (a pure-Python loop on one core): the ratio must stay at most 2.5.
4. How often the planted pairs are called over ``--null-seeds`` seeds of the
   noise floor's random draws (``--seed``), at the default level 0.05 and at
   0.2: one run's verdict on 442 rows depends on the draw, and this shows by
   how much.

Run on a quiet machine: ``python scripts/bench_refit.py [--folds 5] [--repeats 2] [--null-seeds 8]``.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd


def _spin() -> None:
    while True:
        pass


def planted(folder: Path) -> tuple[Path, Path]:
    import xgboost as xgb
    from sklearn.datasets import load_diabetes

    bunch = load_diabetes(as_frame=True, scaled=False)
    X = bunch.data

    def z(column: str) -> pd.Series:
        return (X[column] - X[column].mean()) / X[column].std()

    target = bunch.target + 25 * z("bmi") * z("bp") + 12 * z("age") * z("s6")
    model = folder / "planted.json"
    xgb.XGBRegressor(n_estimators=200, max_depth=4, learning_rate=0.05, n_jobs=1, random_state=0).fit(
        X, target).save_model(model)
    data = folder / "planted.csv"
    X.assign(target=target).to_csv(data, index=False)
    return model, data


def cli(*args: str) -> tuple[dict, float]:
    started = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "treeprobe.cli", *args, "--format", "json", "--quiet"],
                          capture_output=True, text=True, check=True)
    return json.loads(proc.stdout), time.perf_counter() - started


def check_planted(model: Path, data: Path, folds: int) -> list[tuple[str, str, str, bool]]:
    payload, seconds = cli("constrain", str(model), "--data", str(data), "--target", "target", "--validate",
                           "--folds", str(folds), "--jobs", "2")
    pairs = pd.DataFrame(payload["triage"]["pairs"])
    rows = []
    for a, b in (("bmi", "bp"), ("age", "s6")):
        row = pairs[((pairs.feature_a == a) & (pairs.feature_b == b)) | ((pairs.feature_a == b) & (pairs.feature_b == a))].iloc[0]
        rows.append((f"planted {a} x {b}: verdict", "interaction",
                     f"{row.verdict} (h {row.h:.2f}, floor {row.null_h:.2f}, p {row.p_value:.2f}, adjusted {row.p_adjusted:.2f})", row.verdict == "interaction"))
    groups = payload["suggestion"]["groups"]
    kept = all(any({a, b} <= set(g) for g in groups) for a, b in (("bmi", "bp"), ("age", "s6")))
    rows.append(("planted pairs kept in the groups", "both", str(groups), kept))
    rmse = payload["validation"]["summary"]["rmse"]
    rows.append(("suggested groups vs no constraints, CV RMSE", "<= +3%",
                 f"{rmse['relative_change']:+.1%} (interval {rmse['difference_low']:+.2f} to {rmse['difference_high']:+.2f}; "
                 f"{seconds:.0f} s)", rmse["relative_change"] <= 0.03))
    return rows


def check_known_answer(folds: int) -> tuple[str, str, str, bool]:
    import xgboost as xgb

    import treeprobe

    rng = np.random.default_rng(7)
    X = pd.DataFrame(rng.uniform(-1, 1, size=(2000, 8)), columns=[f"x{j}" for j in range(8)])
    y = (3 * X.x0 * X.x1 + 2 * np.sin(2 * X.x2) * X.x3 + X.x4 + X.x5 + 0.3 * rng.normal(size=2000)).to_numpy()
    model = xgb.XGBRegressor(n_estimators=250, learning_rate=0.05, max_depth=5, n_jobs=1).fit(X, y)
    checked = treeprobe.validate_constraints(model, X, y, [["x0", "x1"], ["x2", "x3"]], folds=folds, n_jobs=2)
    first = checked.summary["notes"][0]
    return ("known answer, true groups (live model, lr 0.05)", "groups help",
            f"{first.split(':')[0]} ({checked.summary['rmse']['relative_change']:+.1%})", first.startswith("The groups help"))


def check_busy(model: Path, data: Path, repeats: int) -> tuple[str, str, str, bool]:
    args = ("triage", str(model), "--data", str(data), "--target", "target")
    idle = min(cli(*args)[1] for _ in range(repeats))
    spinner = multiprocessing.Process(target=_spin, daemon=True)
    spinner.start()
    try:
        time.sleep(2)
        busy = min(cli(*args)[1] for _ in range(repeats))
    finally:
        spinner.terminate()
    ratio = busy / idle
    return ("triage --target beside one busy process / alone", "<= 2.5x",
            f"{ratio:.2f}x ({busy:.1f} s vs {idle:.1f} s; load {os.getloadavg()[0]:.1f})", ratio <= 2.5)


def check_seeds(model: Path, data: Path, seeds: int) -> list[tuple[str, str, str, bool]]:
    rows = []
    for level in ("0.05", "0.2"):
        called = {("bmi", "bp"): 0, ("age", "s6"): 0}
        for seed in range(seeds):
            payload, _ = cli("triage", str(model), "--data", str(data), "--target", "target", "--level", level,
                             "--seed", str(seed), "--jobs", "2")
            verdicts = {frozenset((p["feature_a"], p["feature_b"])): p["verdict"] for p in payload["pairs"]}
            for pair in called:
                called[pair] += verdicts.get(frozenset(pair)) == "interaction"
        rows.append((f"planted pairs called over {seeds} null seeds, level {level}", f"{seeds}/{seeds} each",
                     ", ".join(f"{a} x {b} {n}/{seeds}" for (a, b), n in called.items()),
                     all(n == seeds for n in called.values())))
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--folds", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument("--null-seeds", type=int, default=8, help="seeds of the floor's draws in check 4 (0: skip)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        model, data = planted(Path(folder))
        rows = [*check_planted(model, data, args.folds), check_known_answer(args.folds),
                check_busy(model, data, args.repeats), *check_seeds(model, data, args.null_seeds)]
    width = max(len(r[0]) for r in rows)
    print(f"{'check':<{width}}  {'floor':<14} {'result':<6} measured")
    for name, floor, measured, ok in rows:
        print(f"{name:<{width}}  {floor:<14} {'PASS' if ok else 'FAIL':<6} {measured}")


if __name__ == "__main__":
    main()
