"""Speed and memory of the path walker (:func:`treeprobe.cooccurrence.structure`).

Two checks, each printed with its figures and PASS/FAIL:

1. All pairs and triples of a 1000-tree, depth-6 XGBoost model (50 features)
   in at most the time ``json.load`` takes to read the same saved model (1x),
   both measured in this run (best of interleaved repeats, load average shown).
2. All pairs and triples of a 10,000-tree, depth-8 model (about 2.5M nodes)
   in at most 15 s and 2 GB peak resident memory. Training 10,000 depth-8
   trees takes minutes, so the model is built by training ``--base-trees``
   depth-8 XGBoost trees on 20,000 rows and replicating them with every copy's
   split features relabelled by a random permutation (so copies use different
   feature sets) and its gains rescaled. The walk runs in a child process,
   whose peak RSS (``resource.getrusage``) is reported.

Run: ``.venv/bin/python scripts/bench_structure.py`` (about a minute on 2 cores).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
from bench_common import best_times, summary_table

N_FEATURES = 50


def _data(n_rows: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n_rows, N_FEATURES))
    y = X[:, 0] * X[:, 1] + np.sin(X[:, 2]) * X[:, 3] + X[:, 4:10].sum(axis=1) + rng.normal(size=n_rows)
    return X, y


def _train(n_trees: int, depth: int, n_rows: int, path: str) -> None:
    import xgboost as xgb

    X, y = _data(n_rows, seed=0)
    names = [f"sensor_{j:02d}" for j in range(N_FEATURES)]
    params = {"max_depth": depth, "eta": 0.05, "tree_method": "hist", "nthread": 2, "seed": 0,
              "subsample": 0.8, "colsample_bytree": 0.8}
    booster = xgb.train(params, xgb.DMatrix(X, label=y, feature_names=names), num_boost_round=n_trees)
    booster.save_model(path)


def bench_against_json(workdir: str, repeats: int) -> tuple[str, str, str, bool]:
    from treeprobe import load_model
    from treeprobe.cooccurrence import structure

    path = os.path.join(workdir, "depth6.json")
    _train(1000, 6, 5000, path)
    ensemble = load_model(path)

    def read_json() -> None:
        with open(path, encoding="utf-8") as handle:
            json.load(handle)

    times = best_times({"json": read_json, "walk": lambda: structure(ensemble, max_order=3),
                        "load": lambda: load_model(path)}, repeats)
    json_time, walk_time, load_time = times["json"], times["walk"], times["load"]
    result = structure(ensemble, max_order=3)
    ratio = walk_time / json_time
    print(f"[1] depth-6 model: {ensemble.n_trees} trees, {ensemble.n_nodes} nodes, "
          f"{os.path.getsize(path) / 1e6:.1f} MB JSON; {len(result.pairs)} pairs, {len(result.triples)} triples")
    print(f"    json.load {json_time:.3f} s, structure(max_order=3) {walk_time:.3f} s, "
          f"ratio {ratio:.2f}")
    print(f"    for information: load_model(path) {load_time:.3f} s, "
          f"load + walk {(load_time + walk_time) / json_time:.2f} x json.load")
    return ("structure, order 3 / json.load", f"{ratio:.2f}", "<= 1", ratio <= 1)


def _replicated(base_path: str, n_trees: int, seed: int):
    from treeprobe import load_model
    from treeprobe.graph import ForestGraph

    base = load_model(base_path)
    rng = np.random.default_rng(seed)
    copies = -(-n_trees // base.n_trees)
    sizes = np.diff(base.tree_offsets)
    features, lefts, rights, gains, covers, offsets = [], [], [], [], [], []
    shift = 0
    for _ in range(copies):
        relabel = rng.permutation(N_FEATURES)
        features.append(np.where(base.feature >= 0, relabel[np.maximum(base.feature, 0)], -1))
        lefts.append(np.where(base.left >= 0, base.left + shift, -1))
        rights.append(np.where(base.right >= 0, base.right + shift, -1))
        gains.append(base.gain * rng.uniform(0.5, 1.5))
        covers.append(base.cover)
        offsets.append(base.tree_offsets[:-1] + shift)
        shift += base.n_nodes
    keep_nodes = int(np.concatenate([[0], np.cumsum(np.tile(sizes, copies))])[n_trees])
    tree_offsets = np.append(np.concatenate(offsets)[:n_trees], keep_nodes)
    n = keep_nodes
    return ForestGraph.from_arrays(
        feature=np.concatenate(features)[:n], threshold=np.zeros(n), left=np.concatenate(lefts)[:n],
        right=np.concatenate(rights)[:n], value=np.zeros(n), tree_offsets=tree_offsets,
        gain=np.concatenate(gains)[:n], cover=np.concatenate(covers)[:n], feature_names=base.feature_names,
    )


def child_large(base_path: str, n_trees: int) -> None:
    """Run in a subprocess: build the replicated model, walk it, print JSON figures."""
    import resource

    from treeprobe.cooccurrence import structure

    ensemble = _replicated(base_path, n_trees, seed=1)
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    start = time.perf_counter()
    result = structure(ensemble, max_order=3)
    elapsed = time.perf_counter() - start
    rss_peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"n_trees": ensemble.n_trees, "n_nodes": ensemble.n_nodes, "seconds": elapsed,
                      "peak_rss_mb": rss_peak / 1024, "rss_before_walk_mb": rss_before / 1024,
                      "pairs": len(result.pairs), "triples": len(result.triples)}))


def bench_large(workdir: str, base_trees: int, n_trees: int) -> list[tuple[str, str, str, bool]]:
    base_path = os.path.join(workdir, "depth8.json")
    start = time.perf_counter()
    _train(base_trees, 8, 20_000, base_path)
    train_time = time.perf_counter() - start
    completed = subprocess.run(
        [sys.executable, __file__, "--child-large", base_path, "--trees", str(n_trees)],
        capture_output=True, text=True, check=True,
    )
    figures = json.loads(completed.stdout.strip().splitlines()[-1])
    ok_time = figures["seconds"] <= 15
    ok_memory = figures["peak_rss_mb"] <= 2048
    rows = [(f"structure, order 3, {figures['n_trees']} trees (s)", f"{figures['seconds']:.2f}", "<= 15", ok_time),
            ("peak memory of that walk (MB)", f"{figures['peak_rss_mb']:.0f}", "<= 2048", ok_memory)]
    print(f"[2] depth-8 model: {figures['n_trees']} trees ({base_trees} trained in {train_time:.1f} s, replicated "
          f"with relabelled features), {figures['n_nodes']} nodes; {figures['pairs']} pairs, {figures['triples']} triples")
    print(f"    peak RSS of the child before the walk {figures['rss_before_walk_mb']:.0f} MB")
    return rows


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--base-trees", type=int, default=250)
    parser.add_argument("--trees", type=int, default=10_000)
    parser.add_argument("--child-large", metavar="BASE_MODEL")
    args = parser.parse_args()
    if args.child_large:
        child_large(args.child_large, args.trees)
        return 0
    with tempfile.TemporaryDirectory() as workdir:
        rows = [bench_against_json(workdir, args.repeats)]
        rows += bench_large(workdir, args.base_trees, args.trees)
    print(summary_table("bench_structure", rows))
    return 0 if all(row[3] for row in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
