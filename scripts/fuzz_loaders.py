"""Fuzz the model-file loaders with mutated copies of the committed fixtures.

Every case takes one seed file from ``fixtures/`` (XGBoost JSON and UBJSON,
LightGBM model text), applies one mutation, writes the result to a temporary
file with the seed's suffix and reads it through :func:`treeprobe.load_model`,
the path the command line takes. A case passes when the file either loads
into an ensemble whose ``predict_raw`` on a few rows raises nothing but
:class:`~treeprobe.errors.TreeprobeError`, or is refused with a
``TreeprobeError``. Anything else -- another exception type, a case running
longer than the guard (``signal.setitimer``), a ``MemoryError`` -- is a
failure and is printed with the seed, mutation and message.

Mutations: generic byte flips, truncations, deleted and duplicated byte
spans; structural edits of the decoded document (deleted and duplicated
keys, huge and negative numbers, cyclic, shared and out-of-range children,
non-finite thresholds, wrong types) written back as JSON, UBJSON or model
text. Mutation-based fuzzing in the sense of Miller, Fredriksen & So (1990),
"An empirical study of the reliability of UNIX utilities", CACM 33(12).

Usage::

    .venv/bin/python scripts/fuzz_loaders.py --cases 10000 --seed 0
"""

from __future__ import annotations

import argparse
import json
import random
import resource
import signal
import struct
import sys
import tempfile
import time
import warnings
from collections import Counter, defaultdict
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = ROOT / "fixtures"
HUGE_NUMBERS = (2**31, 2**31 - 1, 2**40, 2**63 - 1, 10**30, 1e308, -(2**31), -1, -2, -(10**12))


# ------------------------------------------------------------------ seeds
@dataclass(frozen=True)
class Seed:
    """One committed fixture: its format ("xgb-json", "xgb-ubj", "lgb-text"), name and bytes."""

    kind: str
    name: str
    data: bytes

    @property
    def suffix(self) -> str:
        return {"xgb-json": ".json", "xgb-ubj": ".ubj", "lgb-text": ".txt"}[self.kind]


def load_seeds(fixtures: Path = FIXTURES) -> list[Seed]:
    """Every XGBoost JSON/UBJSON and LightGBM text fixture under ``fixtures``."""
    seeds = []
    for path in sorted(fixtures.glob("xgboost/*/*.json")):
        seeds.append(Seed("xgb-json", f"{path.parent.name}/{path.name}", path.read_bytes()))
    for path in sorted(fixtures.glob("xgboost/*/*.ubj")):
        seeds.append(Seed("xgb-ubj", f"{path.parent.name}/{path.name}", path.read_bytes()))
    for path in sorted(fixtures.glob("lightgbm/*.txt")):
        seeds.append(Seed("lgb-text", path.name, path.read_bytes()))
    if not seeds:
        raise SystemExit(f"no fixtures found under {fixtures}")
    return seeds


# ------------------------------------------------------------- UBJSON writer
def encode_ubjson(value: Any) -> bytes:
    """Minimal UBJSON (Draft 12) encoder for mutated documents; numpy float/int arrays become typed arrays."""
    out = bytearray()
    _encode_into(value, out)
    return bytes(out)


def _encode_int(number: int, out: bytearray) -> None:
    for mark, fmt, low, high in ((b"i", ">b", -128, 127), (b"U", ">B", 0, 255), (b"I", ">h", -2**15, 2**15 - 1),
                                 (b"l", ">i", -2**31, 2**31 - 1), (b"L", ">q", -2**63, 2**63 - 1)):
        if low <= number <= high:
            out += mark + struct.pack(fmt, number)
            return
    text = str(number).encode()
    out += b"H"
    _encode_int(len(text), out)
    out += text


def _encode_into(value: Any, out: bytearray) -> None:  # noqa: C901
    if value is None:
        out += b"Z"
    elif value is True or value is False:
        out += b"T" if value else b"F"
    elif isinstance(value, (int, np.integer)):
        _encode_int(int(value), out)
    elif isinstance(value, (float, np.floating)):
        out += b"D" + struct.pack(">d", float(value))
    elif isinstance(value, str):
        raw = value.encode("utf-8")
        out += b"S"
        _encode_int(len(raw), out)
        out += raw
    elif isinstance(value, np.ndarray) and value.dtype.kind in "iuf" and value.ndim == 1:
        mark, dtype = {"f": (b"d", ">f4"), "i": (b"l", ">i4"), "u": (b"U", ">u1")}[value.dtype.kind]
        if value.dtype.kind == "f" and value.dtype.itemsize == 8:
            mark, dtype = b"D", ">f8"
        if value.dtype.kind == "i" and value.dtype.itemsize == 8:
            mark, dtype = b"L", ">i8"
        out += b"[$" + mark + b"#"
        _encode_int(value.size, out)
        out += value.astype(dtype).tobytes()
    elif isinstance(value, (list, tuple, np.ndarray)):
        out += b"["
        for item in value:
            _encode_into(item, out)
        out += b"]"
    elif isinstance(value, dict):
        out += b"{"
        for key, item in value.items():
            raw = str(key).encode("utf-8")
            _encode_int(len(raw), out)
            out += raw
            _encode_into(item, out)
        out += b"}"
    else:
        raise TypeError(f"cannot encode {type(value).__name__}")


def _decode_document(seed: Seed) -> Any:
    from treeprobe.io.ubjson import decode_ubjson

    return json.loads(seed.data) if seed.kind == "xgb-json" else decode_ubjson(seed.data)


def _to_jsonable(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, dict):
        return {k: _to_jsonable(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_to_jsonable(v) for v in value]
    return value


def _encode_document(doc: Any, kind: str) -> bytes:
    if kind == "xgb-json":
        # allow_nan: non-finite numbers must reach the loader as the bare tokens Python writes.
        return json.dumps(_to_jsonable(doc), allow_nan=True).encode()
    return encode_ubjson(doc)


# ------------------------------------------------------------ byte mutators
def byte_flip(data: bytes, rng: random.Random) -> bytes:
    out = bytearray(data)
    for _ in range(rng.randint(1, 8)):
        i = rng.randrange(len(out))
        out[i] ^= 1 << rng.randrange(8)
    return bytes(out)


def byte_random(data: bytes, rng: random.Random) -> bytes:
    out = bytearray(data)
    for _ in range(rng.randint(1, 4)):
        out[rng.randrange(len(out))] = rng.randrange(256)
    return bytes(out)


def truncate(data: bytes, rng: random.Random) -> bytes:
    return data[:rng.randrange(1, len(data))]


def delete_span(data: bytes, rng: random.Random) -> bytes:
    start = rng.randrange(len(data))
    return data[:start] + data[start + rng.randint(1, 64):]


def duplicate_span(data: bytes, rng: random.Random) -> bytes:
    start = rng.randrange(len(data))
    span = data[start:start + rng.randint(1, 200)]
    at = rng.randrange(len(data))
    return data[:at] + span + data[at:]


def long_number(data: bytes, rng: random.Random) -> bytes:
    """One digit run replaced by thousands of digits (beyond Python's 4300-digit integer conversion limit)."""
    starts = [i for i in range(1, len(data)) if data[i:i + 1].isdigit() and not data[i - 1:i].isdigit()]
    if not starts:
        return data + b"9" * 5000
    at = rng.choice(starts)
    end = at
    while end < len(data) and data[end:end + 1].isdigit():
        end += 1
    return data[:at] + b"9" * rng.choice((400, 5000, 20000)) + data[end:]


BYTE_MUTATORS: dict[str, Callable[[bytes, random.Random], bytes]] = {
    "long_number": long_number,
    "byte_flip": byte_flip,
    "byte_random": byte_random,
    "truncate": truncate,
    "delete_span": delete_span,
    "duplicate_span": duplicate_span,
}


# ---------------------------------------------------- XGBoost document mutators
def _walk(value: Any, path: tuple = ()) -> list[tuple[tuple, Any]]:
    """Every (path, value) below ``value``; numpy arrays count as leaves."""
    found = [(path, value)]
    if isinstance(value, dict):
        for key, item in value.items():
            found += _walk(item, path + (key,))
    elif isinstance(value, list):
        for i, item in enumerate(value):
            found += _walk(item, path + (i,))
    return found


def _parent(doc: Any, path: tuple) -> Any:
    for step in path[:-1]:
        doc = doc[step]
    return doc


def _trees(doc: Any) -> list:
    booster = doc["learner"]["gradient_booster"]
    return booster.get("gbtree", booster)["model"]["trees"]


def _node_array(tree: dict, key: str) -> np.ndarray:
    arr = np.array(tree[key])
    tree[key] = arr
    return arr


def xgb_delete_key(doc: Any, rng: random.Random) -> Any:
    dicts = [(path, v) for path, v in _walk(doc) if isinstance(v, dict) and v]
    _, target = rng.choice(dicts)
    del target[rng.choice(list(target))]
    return doc


def xgb_huge_number(doc: Any, rng: random.Random) -> Any:
    numbers = [(p, v) for p, v in _walk(doc) if p and (isinstance(v, (int, float, np.ndarray)) and not isinstance(v, bool)
                                                      or (isinstance(v, str) and v.lstrip("-[").strip()[:1].isdigit()))]
    path, value = rng.choice(numbers)
    huge = rng.choice(HUGE_NUMBERS)
    parent = _parent(doc, path)
    if isinstance(value, np.ndarray) and value.size:
        with np.errstate(invalid="ignore"):
            arr = value.astype(np.float64 if isinstance(huge, float) or abs(huge) > 2**62 else np.int64)
        arr[rng.randrange(arr.size)] = huge if abs(huge) < 2**63 else float(huge)
        parent[path[-1]] = arr.tolist() if abs(huge) >= 2**63 else arr
    elif isinstance(value, str):
        parent[path[-1]] = str(huge)
    else:
        parent[path[-1]] = huge
    return doc


def xgb_bad_child(doc: Any, rng: random.Random) -> Any:
    """A child pointing back to the root or an ancestor (cycle), to a sibling's child (shared) or out of range."""
    tree = rng.choice(_trees(doc))
    left = _node_array(tree, "left_children").astype(np.int64)
    right = _node_array(tree, "right_children").astype(np.int64)
    inner = np.flatnonzero(left >= 0)
    node = int(rng.choice(inner.tolist())) if inner.size else 0
    side = rng.choice((left, right))
    side[node] = rng.choice((0, node, len(left), len(left) + 7, -5, int(rng.choice((left, right))[0]), 2**31 - 1))
    tree["left_children"], tree["right_children"] = left.astype(np.int32), right.astype(np.int32)
    return doc


def xgb_bad_value(doc: Any, rng: random.Random) -> Any:
    """A non-finite threshold, a feature index out of range, or a node array of the wrong length or type."""
    tree = rng.choice(_trees(doc))
    key = rng.choice(("split_conditions", "split_indices", "loss_changes", "sum_hessian", "default_left",
                      "split_type", "categories", "categories_nodes", "categories_sizes", "base_weights"))
    if key not in tree:
        key = "split_conditions"
    arr = np.array(tree[key], dtype=np.float64)
    action = rng.choice(("nan", "inf", "feature", "shorter", "longer", "string"))
    if action in ("nan", "inf", "feature") and arr.size:
        arr[rng.randrange(arr.size)] = {"nan": np.nan, "inf": -np.inf, "feature": 10**6}[action]
        tree[key] = arr
    elif action == "shorter":
        tree[key] = arr[:-1]
    elif action == "longer":
        tree[key] = np.concatenate([arr, arr[:3]])
    else:
        tree[key] = [str(v) for v in arr.tolist()]
    return doc


def xgb_duplicate_tree(doc: Any, rng: random.Random) -> Any:
    """A tree copied (without its tree_info entry), or the tree list and tree_info emptied."""
    trees = _trees(doc)
    if rng.random() < 0.5:
        trees.append(trees[rng.randrange(len(trees))])
    else:
        trees.clear()
    return doc


def xgb_param(doc: Any, rng: random.Random) -> Any:
    """Learner parameters that contradict the trees: feature, class and node counts, base score, objective."""
    params = doc["learner"]["learner_model_param"]
    choice = rng.choice(("num_feature", "num_class", "num_target", "base_score", "objective", "num_nodes",
                         "num_deleted", "size_leaf_vector"))
    value = rng.choice(("0", "-1", "1", "3", "2097153", "9999999", "2147483648", "99999999999999999999", "abc", "nan",
                        "[1,2,3]", "1e400"))
    if choice == "objective":
        doc["learner"]["objective"]["name"] = rng.choice(("reg:unknown", "", "binary:logistic", "multi:softprob"))
    elif choice in ("num_nodes", "num_deleted", "size_leaf_vector"):
        rng.choice(_trees(doc)).setdefault("tree_param", {})[choice] = value
    else:
        params[choice] = value
    return doc


XGB_MUTATORS: dict[str, Callable[[Any, random.Random], Any]] = {
    "delete_key": xgb_delete_key,
    "huge_number": xgb_huge_number,
    "bad_child": xgb_bad_child,
    "bad_value": xgb_bad_value,
    "duplicate_tree": xgb_duplicate_tree,
    "param": xgb_param,
}


def xgb_duplicate_key(data: bytes, rng: random.Random) -> bytes:
    """JSON text with one ``"key": value`` member repeated (the last copy wins in ``json.loads``)."""
    text = data.decode()
    doc = json.loads(text)
    members = [(p, v) for p, v in _walk(doc) if len(p) and isinstance(p[-1], str)]
    path, _ = rng.choice(members)
    key = json.dumps(path[-1])
    at = text.find(key + ":")
    if at < 0:
        return data
    junk = json.dumps(rng.choice((0, -1, 2**40, "x", [], {}, None, [1, 2])))
    return (text[:at] + key + ":" + junk + "," + text[at:]).encode()


# ------------------------------------------------------- LightGBM text mutators
def _lines(data: bytes) -> list[str]:
    return data.decode().split("\n")


def lgb_delete_line(data: bytes, rng: random.Random) -> bytes:
    lines = _lines(data)
    del lines[rng.randrange(len(lines))]
    return "\n".join(lines).encode()


def lgb_duplicate_line(data: bytes, rng: random.Random) -> bytes:
    lines = _lines(data)
    i = rng.randrange(len(lines))
    lines.insert(rng.randrange(len(lines)), lines[i])
    return "\n".join(lines).encode()


def _keyed(lines: list[str], keys: tuple[str, ...] | None = None) -> list[int]:
    return [i for i, line in enumerate(lines) if "=" in line and (keys is None or line.split("=")[0] in keys)]


def lgb_huge_number(data: bytes, rng: random.Random) -> bytes:
    lines = _lines(data)
    i = rng.choice(_keyed(lines))
    key, _, value = lines[i].partition("=")
    tokens = value.split(" ")
    tokens[rng.randrange(len(tokens))] = str(rng.choice(HUGE_NUMBERS + (float("nan"), float("inf"), "1e999")))
    lines[i] = key + "=" + " ".join(tokens)
    return "\n".join(lines).encode()


def lgb_bad_child(data: bytes, rng: random.Random) -> bytes:
    """A child index forming a cycle (back to node 0 or itself), shared with a sibling, or out of range."""
    lines = _lines(data)
    rows = _keyed(lines, ("left_child", "right_child"))
    i = rng.choice(rows)
    key, _, value = lines[i].partition("=")
    tokens = value.split(" ")
    at = rng.randrange(len(tokens))
    tokens[at] = str(rng.choice((0, at, at + 1, len(tokens), -1, -len(tokens) - 2, 10**6, -(10**6))))
    lines[i] = key + "=" + " ".join(tokens)
    return "\n".join(lines).encode()


def lgb_count(data: bytes, rng: random.Random) -> bytes:
    """Header and per-tree counts that contradict the arrays (num_leaves, num_cat, max_feature_idx, ...)."""
    lines = _lines(data)
    keys = ("num_leaves", "num_cat", "max_feature_idx", "num_class", "num_tree_per_iteration", "decision_type",
            "split_feature", "cat_boundaries", "cat_threshold", "is_linear", "Tree")
    rows = _keyed(lines, keys)
    i = rng.choice(rows)
    key = lines[i].partition("=")[0]
    lines[i] = key + "=" + str(rng.choice((0, 1, 2, 3, 31, 64, 1000, 10**9, 2**40, -1, "x")))
    return "\n".join(lines).encode()


def lgb_categories(data: bytes, rng: random.Random) -> bytes:
    """The JSON ``pandas_categorical`` line replaced by JSON of the wrong shape, too deep, or not JSON."""
    junk = rng.choice(("[5]", "[null]", "null", "{}", '[[1, [2]]]', '[[{"a": 1}]]', "[" * 50_000, "[[" + "9" * 5000 + "]]",
                       '[["a", "a"]]', "[[]]", '[["x"], ["y"]]', "not json", '[[1e999]]'))
    lines = [line for line in _lines(data) if not line.startswith("pandas_categorical:")]
    lines.insert(rng.randrange(len(lines) + 1), "pandas_categorical:" + junk)
    return "\n".join(lines).encode()


LGB_MUTATORS: dict[str, Callable[[bytes, random.Random], bytes]] = {
    "categories": lgb_categories,
    "delete_line": lgb_delete_line,
    "duplicate_line": lgb_duplicate_line,
    "huge_number": lgb_huge_number,
    "bad_child": lgb_bad_child,
    "count": lgb_count,
}


def mutate(seed: Seed, rng: random.Random) -> tuple[str, bytes]:
    """One mutated copy of ``seed``: (mutation name, bytes). Half byte-level, half structural."""
    if rng.random() < 0.4:
        name = rng.choice(sorted(BYTE_MUTATORS))
        return name, BYTE_MUTATORS[name](seed.data, rng)
    if seed.kind == "lgb-text":
        name = rng.choice(sorted(LGB_MUTATORS))
        return name, LGB_MUTATORS[name](seed.data, rng)
    if seed.kind == "xgb-json" and rng.random() < 0.15:
        return "duplicate_key", xgb_duplicate_key(seed.data, rng)
    name = rng.choice(sorted(XGB_MUTATORS))
    doc = XGB_MUTATORS[name](_decode_document(seed), rng)
    return name, _encode_document(doc, seed.kind)


# ------------------------------------------------------------------- running
class CaseTimeout(Exception):
    """Raised by the alarm handler when one case runs past the guard."""


def _on_alarm(signum: int, frame: Any) -> None:
    raise CaseTimeout


@dataclass
class Outcome:
    seed: str
    kind: str
    mutation: str
    result: str  # "loaded", "refused", or "FAIL:<what>"
    seconds: float
    message: str = ""


def run_case(seed: Seed, mutation: str, data: bytes, workdir: Path, *, guard_seconds: float = 5.0) -> Outcome:
    """Load one mutated file through ``load_model`` and score it; see the module docstring."""
    from treeprobe import load_model
    from treeprobe.errors import TreeprobeError

    path = workdir / f"case{seed.suffix}"
    path.write_bytes(data)
    signal.signal(signal.SIGALRM, _on_alarm)
    signal.setitimer(signal.ITIMER_REAL, guard_seconds)
    start = time.perf_counter()
    result, message = "loaded", ""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model = load_model(path)
            rows = np.random.default_rng(0).normal(size=(4, model.n_features))
            rows[0, :] = np.nan
            try:
                model.predict_raw(rows)
            except TreeprobeError:
                pass
            except CaseTimeout:
                raise
            except BaseException as exc:  # noqa: BLE001 - the fuzzer records every escape
                result, message = f"FAIL:predict:{type(exc).__name__}", str(exc)[:300]
    except TreeprobeError as exc:
        result, message = "refused", str(exc)[:300]
    except CaseTimeout:
        result = "FAIL:timeout"
    except (Exception, MemoryError, RecursionError) as exc:  # noqa: BLE001 - the fuzzer records every escape
        result, message = f"FAIL:{type(exc).__name__}", str(exc)[:300]
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
    return Outcome(seed.name, seed.kind, mutation, result, time.perf_counter() - start, message)


def fuzz(n_cases: int, *, seed: int = 0, guard_seconds: float = 5.0) -> list[Outcome]:
    """Run ``n_cases`` seeded cases, cycling through the seeds; deterministic for a given ``seed``."""
    seeds = load_seeds()
    rng = random.Random(seed)
    outcomes = []
    with tempfile.TemporaryDirectory(prefix="treeprobe-fuzz-") as tmp:
        for case in range(n_cases):
            base = seeds[case % len(seeds)]
            mutation, data = mutate(base, rng)
            outcomes.append(run_case(base, mutation, data, Path(tmp), guard_seconds=guard_seconds))
    return outcomes


def summarise(outcomes: list[Outcome]) -> str:
    """Counts by outcome, by format and mutation, timing (max, p99) and every failure."""
    times = np.array([o.seconds for o in outcomes])
    lines = [f"cases {len(outcomes)}"]
    for result, count in sorted(Counter(o.result for o in outcomes).items()):
        lines.append(f"  {result:<28} {count}")
    table: dict[tuple[str, str], Counter] = defaultdict(Counter)
    for o in outcomes:
        table[(o.kind, o.mutation)][o.result if not o.result.startswith("FAIL") else "FAIL"] += 1
    lines.append(f"{'format':<10} {'mutation':<16} {'loaded':>7} {'refused':>8} {'FAIL':>5}")
    for (kind, mutation), counts in sorted(table.items()):
        lines.append(f"{kind:<10} {mutation:<16} {counts['loaded']:>7} {counts['refused']:>8} {counts['FAIL']:>5}")
    slowest = max(outcomes, key=lambda o: o.seconds)
    lines.append(f"time per case: median {np.median(times) * 1e3:.1f} ms, p99 {np.quantile(times, 0.99) * 1e3:.1f} ms, "
                 f"max {times.max() * 1e3:.1f} ms ({slowest.kind} {slowest.seed} {slowest.mutation}: {slowest.result})")
    over = int((times > 1.0).sum())
    lines.append(f"cases over 1 s: {over}")
    failures = [o for o in outcomes if o.result.startswith("FAIL")]
    for o in failures[:40]:
        lines.append(f"FAIL {o.kind} {o.seed} {o.mutation}: {o.result}: {o.message}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--cases", type=int, default=10_000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--guard", type=float, default=5.0, help="seconds before a case counts as a hang")
    parser.add_argument("--memory-gb", type=float, default=2.0,
                        help="address-space limit of this process, so a runaway allocation fails fast as a "
                             "MemoryError instead of swapping (default 2)")
    args = parser.parse_args(argv)
    if args.cases < 1:
        parser.error(f"--cases must be at least 1, got {args.cases}")
    if args.memory_gb > 0:
        limit = int(args.memory_gb * 1024**3)
        resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
    outcomes = fuzz(args.cases, seed=args.seed, guard_seconds=args.guard)
    print(summarise(outcomes))
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak RSS of the fuzzing process: {peak_mb:.0f} MB")
    bad = sum(o.result.startswith("FAIL") for o in outcomes) + sum(o.seconds > 1.0 for o in outcomes)
    return 1 if bad else 0


if __name__ == "__main__":
    sys.path.insert(0, str(ROOT))
    sys.exit(main())
