"""Speed of exact versus brute-force H-statistics on one large XGBoost model.

Scenario (invented): a fleet-maintenance cost model with 50 sensor and schedule
features, 1000 trees of depth 6. Both paths run in the same process on the same
1000 rows. The exact path scores every pair that meets on a root-to-leaf path;
the brute path (on the common graph, float64) scores a few pairs and its cost per
pair is scaled up. Targets: exact path within 60 s and at least 500x faster per
pair than brute force. Peak memory is read from the process's resource usage.

Usage::

    .venv/bin/python scripts/bench_measure.py [--trees 1000] [--rows 1000] [--brute-pairs 2]
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trees", type=int, default=1000)
    parser.add_argument("--depth", type=int, default=6)
    parser.add_argument("--features", type=int, default=50)
    parser.add_argument("--rows", type=int, default=1000)
    parser.add_argument("--brute-pairs", type=int, default=2)
    parser.add_argument("--n-jobs", type=int, default=1)
    args = parser.parse_args()

    import xgboost as xgb

    from treeprobe import load_model
    from treeprobe.measure import h_statistic

    rng = np.random.default_rng(0)
    n_train = 5000
    X = rng.normal(size=(n_train, args.features))
    y = (
        np.sin(X[:, 0] * X[:, 1])
        + X[:, 2] * (X[:, 3] > 0)
        + 0.5 * X[:, 4] * X[:, 5] * X[:, 6]
        + X[:, 7:].sum(axis=1) * 0.1
        + rng.normal(scale=0.5, size=n_train)
    )
    names = [f"sensor_{j:02d}" for j in range(args.features)]
    started = time.perf_counter()
    booster = xgb.XGBRegressor(
        n_estimators=args.trees, max_depth=args.depth, learning_rate=0.05, subsample=0.8,
        colsample_bytree=0.5, tree_method="hist", n_jobs=2, random_state=0,
    ).fit(X, y)
    ensemble = load_model(booster, feature_names=names)
    print(f"model: {ensemble.n_trees} trees, {ensemble.n_nodes} nodes, depth {args.depth}, "
          f"{args.features} features (trained and loaded in {time.perf_counter() - started:.1f} s)")

    rows = X[: args.rows]
    exact = h_statistic(ensemble, rows, sample=None, against_rest=True, n_jobs=args.n_jobs, progress=False)
    n_pairs = len(exact.pairs)
    print(f"exact : {n_pairs} co-occurring pairs + {len(exact.against_rest)} one-vs-rest on {args.rows} rows "
          f"in {exact.seconds:.2f} s ({exact.seconds / n_pairs * 1000:.2f} ms per pair incl. one-vs-rest), "
          f"peak RSS so far {_peak_mib():.0f} MiB")

    chosen = [tuple(p) for p in exact.pairs[["feature_a", "feature_b"]].head(args.brute_pairs).to_numpy()]
    brute = h_statistic(ensemble, rows, sample=None, pairs=chosen, against_rest=False, method="brute", progress=False)
    # Per pair, brute force computes F_jk; F_j and F_k are shared between pairs, so count sets, not pairs.
    sets_evaluated = len(chosen) + len({f for p in chosen for f in p})
    per_set = brute.seconds / sets_evaluated
    brute_all = per_set * (n_pairs + len({f for p in exact.pairs[["feature_a", "feature_b"]].to_numpy() for f in p}))
    print(f"brute : {len(chosen)} pairs ({sets_evaluated} partial dependence functions) in {brute.seconds:.2f} s, "
          f"{per_set:.2f} s per function; all {n_pairs} pairs would take about {brute_all:.0f} s")
    merged = exact.pairs.merge(brute.pairs, on=["feature_a", "feature_b"], suffixes=("_exact", "_brute"))
    worst = float(np.max(np.abs(merged.h2_exact - merged.h2_brute) / merged.h2_brute))
    print(f"agreement on the brute pairs: max relative difference of h2 {worst:.2e}")
    print(f"speed-up (brute / exact, all pairs): {brute_all / exact.seconds:.0f}x; "
          f"target >= 500x: {'met' if brute_all / exact.seconds >= 500 else 'NOT met'}; "
          f"exact within 60 s: {'yes' if exact.seconds <= 60 else 'NO'}; peak RSS {_peak_mib():.0f} MiB")


if __name__ == "__main__":
    main()
