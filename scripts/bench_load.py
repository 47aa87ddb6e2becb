"""Benchmark the XGBoost loader against baselines measured in the same run.

Every figure is a ratio to a baseline timed on the same machine in the same
process, so the verdicts do not depend on how fast the machine is:

* loading a 1000-tree, depth-6 model (50 features) with ``treeprobe.load_model``
  from its JSON file vs ``json.load`` of the same file (target: at most 1.2x),
  and from its UBJSON file (at most 1.5x);
* the same load vs XGBoost's ``Booster.trees_to_dataframe()`` (target:
  treeprobe at least 5x faster);
* ``ForestGraph.predict_raw`` on 10,000 rows vs XGBoost's
  ``predict(output_margin=True)`` (target: at most 3x slower);
* peak memory of loading a 10,000-tree model (tracemalloc, in a fresh
  subprocess) vs the size of its JSON file (target: at most 4x).

The 10,000-tree model is the 1000-tree model's trees repeated ten times
(a valid XGBoost file: XGBoost itself loads it), which saves training time
without changing what the loader has to do per node.

Each time is the best of ``--repeats`` interleaved rounds (``trees_to_dataframe``,
which takes about half a second, of at most three); the load average is
printed with the summary table, since other jobs on a shared machine slow the
rounds unevenly.

Usage::

    .venv/bin/python scripts/bench_load.py [--repeats 5] [--workdir DIR]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
from bench_common import best_times, summary_table

N_FEATURES = 50
N_TREES = 1000
BIG_REPEAT = 10
N_PREDICT_ROWS = 10_000


def _train(workdir: Path):
    import xgboost as xgb

    rng = np.random.default_rng(0)
    X = rng.normal(size=(4000, N_FEATURES))
    X[rng.random(X.shape) < 0.05] = np.nan
    # A target with many small effects keeps every tree close to full depth.
    y = np.nansum(X[:, :20] * rng.normal(size=20), axis=1) + rng.normal(size=4000)
    booster = xgb.train({"max_depth": 6, "eta": 0.1, "min_child_weight": 0.1, "tree_method": "hist", "nthread": 2, "seed": 0},
                        xgb.DMatrix(X, label=y), num_boost_round=N_TREES)
    booster.save_model(str(workdir / "fleet.json"))
    booster.save_model(str(workdir / "fleet.ubj"))
    return booster


def repeat_trees(src: Path, dst: Path, times: int) -> None:
    """Write a copy of an XGBoost JSON model whose trees are repeated ``times`` times (still a valid model)."""
    doc = json.loads(src.read_bytes())
    model = doc["learner"]["gradient_booster"]["model"]
    trees = [dict(tree) for _ in range(times) for tree in model["trees"]]
    for i, tree in enumerate(trees):
        tree["id"] = i
    model["trees"] = trees
    model["tree_info"] = model["tree_info"] * times
    model["gbtree_model_param"]["num_trees"] = str(len(trees))
    if "iteration_indptr" in model:
        model["iteration_indptr"] = list(range(len(trees) + 1))
    dst.write_text(json.dumps(doc))


_PEAK_CODE = """
import sys, tracemalloc
from treeprobe import load_model
tracemalloc.start()
ens = load_model(sys.argv[1])
print(tracemalloc.get_traced_memory()[1], ens.n_nodes)
"""


def _peak_load_memory(path: Path) -> tuple[int, int]:
    """Peak traced bytes while loading ``path`` (file bytes included), in a fresh interpreter.

    The child runs in the directory holding the treeprobe package this process
    imported: ``python -c`` looks in its working directory first, so it then
    measures the same code as the timings.
    """
    import treeprobe

    root = Path(treeprobe.__file__).resolve().parents[1]
    out = subprocess.run([sys.executable, "-c", _PEAK_CODE, str(path.resolve())], capture_output=True, text=True, check=True,
                         cwd=root)
    peak, n_nodes = out.stdout.split()
    return int(peak), int(n_nodes)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5, help="timing rounds; the best is kept (default 5)")
    parser.add_argument("--workdir", type=Path, default=None, help="where to write the model files (default: a temp dir)")
    args = parser.parse_args(argv)
    if args.repeats < 1:
        parser.error(f"--repeats must be at least 1, got {args.repeats}")

    import xgboost as xgb

    from treeprobe import load_model

    with tempfile.TemporaryDirectory() as tmp:
        workdir = args.workdir or Path(tmp)
        workdir.mkdir(parents=True, exist_ok=True)
        booster = _train(workdir)
        json_path, ubj_path = workdir / "fleet.json", workdir / "fleet.ubj"
        json_bytes, ubj_bytes = json_path.read_bytes(), ubj_path.read_bytes()
        ensemble = load_model(json_path)
        print(f"model: {ensemble.n_trees} trees, {ensemble.n_nodes} nodes, {N_FEATURES} features; "
              f"JSON {len(json_bytes) / 1e6:.1f} MB, UBJSON {len(ubj_bytes) / 1e6:.1f} MB; xgboost {xgb.__version__}")

        def json_load():
            with open(json_path, "rb") as handle:
                json.load(handle)

        loads = best_times(
            {
                "json.load": json_load,
                "json": lambda: load_model(json_path),
                "ubjson": lambda: load_model(ubj_path),
            },
            args.repeats,
        )
        t_json, t_tp_json, t_tp_ubj = loads["json.load"], loads["json"], loads["ubjson"]
        t_frame = best_times({"frame": booster.trees_to_dataframe}, min(args.repeats, 3))["frame"]

        rows = np.random.default_rng(1).normal(size=(N_PREDICT_ROWS, N_FEATURES))
        rows[np.random.default_rng(2).random(rows.shape) < 0.05] = np.nan
        # A fresh DMatrix per call: XGBoost caches predictions per DMatrix, and
        # building it is part of XGBoost's cost as input checking is part of ours.
        predicts = best_times(
            {
                "native": lambda: booster.predict(xgb.DMatrix(rows), output_margin=True),
                "ours": lambda: ensemble.predict_raw(rows),
            },
            args.repeats,
        )
        t_native, t_ours = predicts["native"], predicts["ours"]
        matrix = xgb.DMatrix(rows)
        max_diff = float(np.max(np.abs(ensemble.predict_raw(rows) - booster.predict(matrix, output_margin=True))))

        big_json = workdir / "fleet10k.json"
        repeat_trees(json_path, big_json, BIG_REPEAT)
        big_ubj = workdir / "fleet10k.ubj"
        xgb.Booster(model_file=str(big_json)).save_model(str(big_ubj))
        big_size = big_json.stat().st_size
        peak_json, nodes_json = _peak_load_memory(big_json)
        peak_ubj, nodes_ubj = _peak_load_memory(big_ubj)

    rows_out = [
        ("load JSON / json.load", t_tp_json / t_json, "<= 1.2", t_tp_json / t_json <= 1.2),
        ("load UBJSON / json.load", t_tp_ubj / t_json, "<= 1.5", t_tp_ubj / t_json <= 1.5),
        ("trees_to_dataframe / load JSON", t_frame / t_tp_json, ">= 5", t_frame / t_tp_json >= 5),
        ("trees_to_dataframe / load UBJSON", t_frame / t_tp_ubj, ">= 5", t_frame / t_tp_ubj >= 5),
        (f"predict_raw / native predict ({N_PREDICT_ROWS} rows)", t_ours / t_native, "<= 3", t_ours / t_native <= 3),
        (f"peak memory, load 10k-tree JSON / file size ({nodes_json} nodes)", peak_json / big_size, "<= 4",
         peak_json / big_size <= 4),
        (f"peak memory, load 10k-tree UBJSON / JSON file size ({nodes_ubj} nodes)", peak_ubj / big_size, "<= 4",
         peak_ubj / big_size <= 4),
    ]
    print(f"seconds: json.load {t_json:.3f}, load JSON {t_tp_json:.3f}, load UBJSON {t_tp_ubj:.3f}, "
          f"trees_to_dataframe {t_frame:.3f}, native predict {t_native:.3f}, predict_raw {t_ours:.3f} "
          f"(max |difference| {max_diff:.2e}); 10k-tree JSON {big_size / 1e6:.1f} MB, peak JSON load "
          f"{peak_json / 1e6:.1f} MB, peak UBJSON load {peak_ubj / 1e6:.1f} MB")
    print(summary_table("bench_load (ratios)", [(label, f"{ratio:.2f}", target, ok)
                                               for label, ratio, target, ok in rows_out]))
    return 0 if all(r[3] for r in rows_out) else 1


if __name__ == "__main__":
    sys.exit(main())
