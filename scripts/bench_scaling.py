"""How the cost of load, structure, exact H and triage grows with trees, rows and features.

Each dimension is grown on its own from a base case (XGBoost, depth 6,
``make_friedman1`` data; Friedman 1991), every size timed in this process
(best of ``--repeats``), and the growth order is the least-squares slope of
log(seconds) on log(size) over the sizes measured. Models with more trees than
``--train-trees`` are the trained model's trees repeated in its JSON file (a
valid XGBoost model; the loader and walks do the same work per node), which
keeps the script to a few minutes.

* trees 100 to 10,000 (50 features): load, structure (order 3), exact H and
  triage without target at default settings (``sample=1000``);
* rows 100 to 100,000 (100 trees, 50 features): exact H and triage on every
  row (``sample=None``): at default settings both sample 1000 rows, so their
  cost stops growing at 1000 rows; load and structure do not read rows;
* features 10 to 500 (200 trees, each trained on its own data, so node
  counts differ and are shown): all four steps at default settings.

A size whose time, extrapolated at the order measured so far, would exceed
``--budget`` seconds (default 90) is skipped and shown as such. Prints a Markdown table
per dimension (the README's scaling table) and the load average.

Usage::

    .venv/bin/python scripts/bench_scaling.py [--repeats 1] [--budget 60] [--train-trees 1000]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from bench_common import best_times, load_average
from bench_load import repeat_trees

STEPS = ("load", "structure", "exact H", "triage")


def _train(n_trees: int, n_features: int, path: Path) -> np.ndarray:
    import xgboost as xgb
    from sklearn.datasets import make_friedman1

    X, y = make_friedman1(n_samples=5000, n_features=n_features, noise=1.0, random_state=0)
    xgb.XGBRegressor(n_estimators=n_trees, max_depth=6, learning_rate=0.05, subsample=0.8, colsample_bytree=0.5,
                     tree_method="hist", n_jobs=2, random_state=0).fit(X, y).get_booster().save_model(str(path))
    return X


def _model_file(workdir: Path, n_trees: int, n_features: int, train_trees: int) -> tuple[Path, np.ndarray]:
    """A saved model of ``n_trees`` trees: trained, or a trained model's trees repeated."""
    base = workdir / f"base_{min(n_trees, train_trees)}_{n_features}.json"
    X = _train(min(n_trees, train_trees), n_features, base) if not base.exists() else np.load(base.with_suffix(".npy"))
    np.save(base.with_suffix(".npy"), X)
    if n_trees <= train_trees:
        return base, X
    path = workdir / f"model_{n_trees}_{n_features}.json"
    repeat_trees(base, path, -(-n_trees // train_trees))
    document = json.loads(path.read_bytes())
    model = document["learner"]["gradient_booster"]["model"]
    model["trees"], model["tree_info"] = model["trees"][:n_trees], model["tree_info"][:n_trees]
    model["gbtree_model_param"]["num_trees"] = str(n_trees)
    if "iteration_indptr" in model:
        model["iteration_indptr"] = list(range(n_trees + 1))
    path.write_text(json.dumps(document))
    return path, X


def _rows(n_rows: int, n_features: int) -> np.ndarray:
    from sklearn.datasets import make_friedman1

    return make_friedman1(n_samples=n_rows, n_features=n_features, random_state=1)[0]


def _steps(path: Path, X: np.ndarray, sample: int | None) -> tuple[int, dict[str, Callable[[], object]]]:
    from treeprobe import load_model
    from treeprobe.cooccurrence import structure
    from treeprobe.measure import h_statistic
    from treeprobe.verdicts import triage

    ensemble = load_model(path)
    return ensemble.n_nodes, {
        "load": lambda: load_model(path),
        "structure": lambda: structure(ensemble, max_order=3),
        "exact H": lambda: h_statistic(ensemble, X, sample=sample, progress=False),
        "triage": lambda: triage(ensemble, X, sample=sample, progress=False),
    }


def _too_long(sizes: list[int], times: list[float], size: int, budget: float) -> bool:
    """Whether ``size`` would take over ``budget`` seconds, extrapolating the last two measured sizes."""
    if not times:
        return False
    order = _slope(sizes[-2:], times[-2:]) if len(times) >= 2 else 1.0
    return times[-1] * (size / sizes[-1]) ** max(order, 1.0) > budget


def _slope(sizes: list[int], times: list[float]) -> float:
    """Least-squares slope of log(time) on log(size): the growth order."""
    return float(np.polyfit(np.log(sizes), np.log(times), 1)[0])


def _order(sizes: list[int], times: list[float]) -> str:
    return f"{_slope(sizes, times):.2f}" if len(times) >= 2 else "—"


def _grow(name: str, sizes: list[int], make: Callable[[int], tuple[Path, np.ndarray, int | None]],
          steps: tuple[str, ...], args: argparse.Namespace) -> None:
    measured: dict[str, tuple[list[int], list[float]]] = {step: ([], []) for step in steps}
    cells: dict[str, list[str]] = {step: [] for step in steps}
    nodes = []
    for size in sizes:
        path, X, sample = make(size)
        n_nodes, funcs = _steps(path, X, sample)
        nodes.append(f"{n_nodes:,}")
        for step in steps:
            done_sizes, done_times = measured[step]
            if _too_long(done_sizes, done_times, size, args.budget):
                cells[step].append("skipped")
                continue
            seconds = best_times({step: funcs[step]}, args.repeats)[step]
            done_sizes.append(size)
            done_times.append(seconds)
            cells[step].append(f"{seconds:.3g} s")
            print(f"  {name} {size:,}: {step} {seconds:.3g} s", file=sys.stderr)
    print(f"\n| step | {' | '.join(f'{size:,} {name}' for size in sizes)} | growth order |")
    print("|" + "---|" * (len(sizes) + 2))
    print(f"| (model nodes) | {' | '.join(nodes)} | |")
    for step in steps:
        print(f"| {step} | {' | '.join(cells[step])} | {_order(*measured[step])} |")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=1, help="timing rounds per cell; the best is kept (default 1)")
    parser.add_argument("--budget", type=float, default=90.0, help="skip a cell expected to take longer (s, default 90)")
    parser.add_argument("--train-trees", type=int, default=1000, help="trees actually trained (default 1000)")
    args = parser.parse_args()
    print(f"bench_scaling: {load_average()}")
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        workdir = Path(tmp)

        def by_trees(n_trees: int):
            path, X = _model_file(workdir, n_trees, 50, args.train_trees)
            return path, X, 1000

        def by_rows(n_rows: int):
            path, _ = _model_file(workdir, 100, 50, args.train_trees)
            return path, _rows(n_rows, 50), None

        def by_features(n_features: int):
            path, X = _model_file(workdir, 200, n_features, args.train_trees)
            return path, X, 1000

        _grow("trees", [100, 300, 1000, 3000, 10_000], by_trees, STEPS, args)
        _grow("rows", [100, 1000, 10_000, 100_000], by_rows, ("exact H", "triage"), args)
        _grow("features", [10, 50, 150, 500], by_features, STEPS, args)
    print(f"\n{time.perf_counter() - started:.0f} s in all; {load_average()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
