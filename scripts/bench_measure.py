"""Speed of exact H-statistics against brute force and triage, on one large XGBoost model.

Model: 1000 XGBoost trees of depth 6 fitted to ``make_friedman1`` with 50
features (5 informative; Friedman 1991) on 5000 rows, as in issue 14. All
figures come from one process, so each is a ratio to a baseline of this run
(seconds are printed for information, with the load average):

* exact H, every pair meeting on a path plus one-vs-rest, at default settings
  (``sample=1000``): at most 10 s;
* exact versus brute force per pair (brute force evaluates the same formula
  by predicting modified rows of the common graph; its cost per partial
  dependence function is measured on ``--brute-pairs`` pairs and scaled to all
  functions): at least 5,000x;
* ``triage`` without a target, ``sample=1000``: at most 2x the exact H time;
* peak resident memory of the process (training included): under 2 GB.

For information it also times the two stages a triage without target adds
to the exact H on the same rows: the H of 20 half-size row subsets from one
batched exact pass (``subset_pair_h``), for the pairs triage takes them for
(sharing a path, ``effect`` at least ``min_effect``), and the dependence of
every pair (``pair_dependence``).

Usage::

    .venv/bin/python scripts/bench_measure.py [--repeats 3] [--brute-pairs 1]
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import warnings

import numpy as np
from bench_common import best_times, load_average, summary_table


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _model(n_trees: int, depth: int, n_features: int):
    import xgboost as xgb
    from sklearn.datasets import make_friedman1

    X, y = make_friedman1(n_samples=5000, n_features=n_features, noise=1.0, random_state=0)
    booster = xgb.XGBRegressor(n_estimators=n_trees, max_depth=depth, learning_rate=0.05, subsample=0.8,
                               colsample_bytree=0.5, tree_method="hist", n_jobs=2, random_state=0).fit(X, y)
    return booster, X


def _triage_parts(ensemble, X, triaged, n_rows: int, repeats: int) -> dict[str, float]:
    """Best times of the subset pass and the pair dependence of a triage without target, on its rows and pairs
    (drawn as ``triage`` draws them with its default seed: the row sample, then the half-size subsets)."""
    from treeprobe.dependence import pair_dependence
    from treeprobe.measure import subset_pair_h

    rng = np.random.default_rng(0)
    rows = X[np.sort(rng.choice(X.shape[0], size=min(n_rows, X.shape[0]), replace=False))]
    subsets = np.zeros((20, rows.shape[0]), dtype=bool)
    for subset in subsets:
        subset[rng.choice(rows.shape[0], size=rows.shape[0] // 2, replace=False)] = True
    pairs = triaged.pairs
    deciding = pairs[(pairs["paths"] > 0) & (pairs["effect"] >= triaged.thresholds["min_effect"])]
    names = list(zip(deciding["feature_a"], deciding["feature_b"], strict=True))
    index = {name: j for j, name in enumerate(ensemble.feature_names)}
    columns = [(index[a], index[b]) for a, b in zip(triaged.pairs["feature_a"], triaged.pairs["feature_b"], strict=True)]
    return best_times({"subsets": lambda: subset_pair_h(ensemble, rows, names, subsets, progress=False),
                       "dependence": lambda: pair_dependence(rows, columns)}, repeats)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trees", type=int, default=1000)
    parser.add_argument("--depth", type=int, default=6)
    parser.add_argument("--features", type=int, default=50)
    parser.add_argument("--rows", type=int, default=1000, help="rows sampled for H and triage (default 1000)")
    parser.add_argument("--brute-pairs", type=int, default=1, help="pairs scored by brute force (default 1)")
    parser.add_argument("--repeats", type=int, default=3, help="timing rounds; the best is kept (default 3)")
    args = parser.parse_args()

    from treeprobe import load_model
    from treeprobe.measure import h_statistic
    from treeprobe.verdicts import triage

    started = time.perf_counter()
    booster, X = _model(args.trees, args.depth, args.features)
    ensemble = load_model(booster)
    print(f"model: {ensemble.n_trees} trees, {ensemble.n_nodes} nodes, depth {args.depth}, {args.features} features "
          f"(trained and loaded in {time.perf_counter() - started:.1f} s); {load_average()}")

    results = {}

    def exact():
        results["exact"] = h_statistic(ensemble, X, sample=args.rows, against_rest=True, progress=False)

    def triage_run():
        results["triage"] = triage(ensemble, X, sample=args.rows, progress=False)

    times = best_times({"exact": exact, "triage": triage_run}, args.repeats)
    t_exact, t_triage = times["exact"], times["triage"]
    result = results["exact"]
    n_pairs = len(result.pairs)
    print(f"exact : {n_pairs} pairs + {len(result.against_rest)} one-vs-rest on {result.n_rows} rows in "
          f"{t_exact:.2f} s (best of {args.repeats}); triage without target {t_triage:.2f} s")
    parts = _triage_parts(ensemble, X, results["triage"], args.rows, args.repeats)
    n_deciding = int(results["triage"].pairs["h_low"].notna().sum())
    print(f"triage: of which {parts['subsets']:.2f} s the H of 20 row subsets for the {n_deciding} pair(s) whose "
          f"effect reaches min_effect and {parts['dependence']:.2f} s the dependence of "
          f"{len(results['triage'].pairs)} pairs (best of {args.repeats})")

    rows = X[np.sort(np.random.default_rng(0).choice(X.shape[0], size=args.rows, replace=False))]
    chosen = [tuple(p) for p in result.pairs[["feature_a", "feature_b"]].head(args.brute_pairs).to_numpy()]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # the estimate warning; we time the run ourselves
        brute = h_statistic(ensemble, rows, sample=None, pairs=chosen, against_rest=False, method="brute",
                            progress=False)
    exact_same_rows = h_statistic(ensemble, rows, sample=None, pairs=chosen, against_rest=False, progress=False)
    # Per pair brute force computes F_jk; F_j and F_k are shared between pairs, so count functions, not pairs.
    functions = len(chosen) + len({f for p in chosen for f in p})
    per_function = brute.seconds / functions
    all_functions = n_pairs + len({f for p in result.pairs[["feature_a", "feature_b"]].to_numpy() for f in p})
    speedup = per_function * all_functions / t_exact
    merged = exact_same_rows.pairs.merge(brute.pairs, on=["feature_a", "feature_b"], suffixes=("_exact", "_brute"))
    worst = float(np.max(np.abs(merged.h2_exact - merged.h2_brute) / merged.h2_brute))
    print(f"brute : {len(chosen)} pair(s), {functions} partial dependence functions in {brute.seconds:.1f} s "
          f"({per_function:.1f} s each); all {all_functions} functions would take about "
          f"{per_function * all_functions / 3600:.1f} h; max relative difference of h2 exact vs brute {worst:.1e}")
    peak = _peak_mib()
    table = [
        ("exact H, all pairs + one-vs-rest (s)", f"{t_exact:.2f}", "<= 10", t_exact <= 10),
        ("exact vs brute force per pair (x)", f"{speedup:,.0f}", ">= 5,000", speedup >= 5000),
        ("triage without target / exact H", f"{t_triage / t_exact:.2f}", "<= 2", t_triage <= 2 * t_exact),
        ("peak memory (MiB)", f"{peak:.0f}", "< 2048", peak < 2048),
        ("exact = brute (max rel. diff of h2)", f"{worst:.1e}", "<= 1e-9", worst <= 1e-9),
    ]
    print(summary_table("bench_measure", table))
    return 0 if all(r[3] for r in table) else 1


if __name__ == "__main__":
    sys.exit(main())
