"""A short, seeded run of the loader fuzzer (``scripts/fuzz_loaders.py``) plus its building blocks.

Outside references:

* the committed fixtures written by XGBoost 2.1.4 / 3.2.0 and LightGBM
  (``fixtures/``), as seeds and, unmutated, as files that must load;
* the UBJSON specification (Draft 12, ubjson.org) through the project's own
  decoder, for the fuzzer's encoder: a decoded fixture re-encoded must decode
  to the same document;
* the contract of :mod:`treeprobe.errors`: every refusal is a
  ``TreeprobeError``; no other exception, no case over a second.

The full run (10,000 cases) is ``scripts/fuzz_loaders.py``; here a few
hundred cases keep the suite fast.
"""

from __future__ import annotations

import json
import random
import re

import numpy as np
import pytest
from script_module import loaded

from treeprobe import load_model
from treeprobe.errors import ModelFormatError
from treeprobe.io.ubjson import decode_ubjson


@pytest.fixture(scope="module")
def fuzzer():
    yield from loaded("fuzz_loaders")


def _same(a, b) -> bool:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        return np.array_equal(np.asarray(a, dtype=float), np.asarray(b, dtype=float), equal_nan=True)
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return isinstance(b, list) and len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    return a == b


def test_seeds_cover_every_format_and_load(fuzzer, tmp_path):
    seeds = fuzzer.load_seeds()
    assert {s.kind for s in seeds} == {"xgb-json", "xgb-ubj", "lgb-text"}
    for seed in seeds:
        outcome = fuzzer.run_case(seed, "none", seed.data, tmp_path)
        assert outcome.result == "loaded", (seed.name, outcome.message)


def test_ubjson_encoder_round_trips_every_ubj_fixture(fuzzer):
    for seed in (s for s in fuzzer.load_seeds() if s.kind == "xgb-ubj"):
        document = decode_ubjson(seed.data)
        assert _same(decode_ubjson(fuzzer.encode_ubjson(document)), document), seed.name


def test_structural_mutations_are_caught_with_a_location(fuzzer, tmp_path):
    """A cycle back to the root must be refused naming the tree and node, in every format."""
    seeds = {s.kind: s for s in fuzzer.load_seeds()}
    doc = json.loads(seeds["xgb-json"].data)
    tree = doc["learner"]["gradient_booster"]["model"]["trees"][0]
    tree["left_children"][tree["left_children"].index(next(c for c in tree["left_children"] if c > 0))] = 0
    path = tmp_path / "cycle.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(ModelFormatError, match=r"tree 0, node \d+"):
        load_model(path)
    # The root's left child pointing at the root itself.
    text = re.sub(r"left_child=\S+", "left_child=0", seeds["lgb-text"].data.decode(), count=1)
    path = tmp_path / "cycle.txt"
    path.write_text(text)
    with pytest.raises(ModelFormatError, match=r"tree 0, node 0 .*cycle"):
        load_model(path)


def test_seeded_fuzz_run_has_no_failures_and_no_slow_case(fuzzer):
    outcomes = fuzzer.fuzz(450, seed=20240, guard_seconds=5.0)
    failures = [o for o in outcomes if o.result.startswith("FAIL")]
    assert not failures, fuzzer.summarise(outcomes)
    assert max(o.seconds for o in outcomes) < 1.0, fuzzer.summarise(outcomes)
    results = {o.result for o in outcomes}
    # Both outcomes must occur, or the mutators have stopped reaching the loaders' checks.
    assert results == {"loaded", "refused"}
    assert {o.mutation for o in outcomes} >= set(fuzzer.BYTE_MUTATORS) | set(fuzzer.LGB_MUTATORS) | set(fuzzer.XGB_MUTATORS)


def test_mutators_change_the_bytes(fuzzer):
    rng = random.Random(0)
    seeds = fuzzer.load_seeds()
    changed = sum(fuzzer.mutate(seeds[i % len(seeds)], rng)[1] != seeds[i % len(seeds)].data for i in range(200))
    assert changed >= 190
