"""H-statistics of many row subsets from one exact pass (treeprobe.measure.subset_pair_h).

Each subset's H2 and h (Friedman and Popescu 2008, "Predictive learning via
rule ensembles", AOAS 2(3), eq. 44) must equal those of a separate
``h_statistic`` run on the subset's rows, which the exact-vs-brute tests of
``tests/test_measure.py`` tie to averaged predictions of the models; one subset
is also checked here against brute force (Friedman 2001, eq. 9, predictions
of modified rows averaged).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from fleet_data import fleet

from treeprobe import load_model
from treeprobe.errors import ParameterError
from treeprobe.floor import pair_h as _pair_h
from treeprobe.measure import h_statistic, subset_pair_h
from treeprobe.verdicts import _subsample_intervals

N_ROWS = 120
N_SUBSETS = 4


@pytest.fixture(scope="module")
def depot_frame():
    return fleet(5, N_ROWS)


@pytest.fixture(scope="module")
def subsets():
    rng = np.random.default_rng(3)
    out = np.zeros((N_SUBSETS, N_ROWS), dtype=bool)
    for b in range(N_SUBSETS):
        out[b, rng.choice(N_ROWS, size=N_ROWS // 2, replace=False)] = True
    return out


def _models(frame, cost, classes):
    xgb = pytest.importorskip("xgboost")
    lgb = pytest.importorskip("lightgbm")
    from sklearn.ensemble import RandomForestRegressor

    numeric = frame.assign(depot=frame.depot.cat.codes.astype(float)).fillna(1.5)
    return {
        # Categorical splits and missing values.
        "xgboost-regressor": (xgb.XGBRegressor(n_estimators=20, max_depth=4, enable_categorical=True,
                                               tree_method="hist", n_jobs=1, random_state=0).fit(frame, cost), frame),
        # Multi-output, categorical splits.
        "lightgbm-multiclass": (lgb.LGBMClassifier(n_estimators=6, num_leaves=8, min_child_samples=5, n_jobs=1,
                                                   verbose=-1).fit(frame, classes), frame),
        "sklearn-forest": (RandomForestRegressor(n_estimators=4, max_depth=5, random_state=0).fit(numeric, cost),
                           numeric),
    }


@pytest.fixture(scope="module")
def fitted(depot_frame):
    return _models(*depot_frame)


def _by_pair(table: pd.DataFrame) -> dict:
    """``{frozenset(pair): (h2, h)}`` of a pairs table."""
    keys = zip(table.feature_a, table.feature_b, strict=True)
    return {frozenset(k): (h2, h) for k, h2, h in zip(keys, table.h2, table.h, strict=True)}


def _separate(ensemble, data, pairs, subsets, output):
    """(k, 2, n_pairs) from one h_statistic run per subset (the per-subsample path the batch replaces)."""
    out = np.zeros((subsets.shape[0], 2, len(pairs)))
    for b, subset in enumerate(subsets):
        table = h_statistic(ensemble, data.iloc[np.flatnonzero(subset)], pairs=pairs, against_rest=False,
                            sample=None, output=output, progress=False).pairs
        found = _by_pair(table)
        out[b] = np.array([found[frozenset(pair)] for pair in pairs]).T
    return out


@pytest.mark.parametrize(("name", "output"), [("xgboost-regressor", None), ("lightgbm-multiclass", 1),
                                              ("lightgbm-multiclass", 2), ("sklearn-forest", None)])
def test_batched_subsets_equal_separate_runs(fitted, subsets, name, output):
    model, data = fitted[name]
    ensemble = load_model(model)
    names = list(ensemble.feature_names)
    # Every pair, so that pairs sharing no path (H = 0) are covered too; one pair given in reverse order.
    pairs = [(names[a], names[b]) for a in range(len(names)) for b in range(a + 1, len(names))]
    pairs[0] = pairs[0][::-1]
    batched = subset_pair_h(ensemble, data, pairs, subsets, output=output)
    separate = _separate(ensemble, data, pairs, subsets, output)
    assert batched.shape == (N_SUBSETS, 2, len(pairs))
    assert np.all(separate[:, 1] >= 0) and np.any(separate[:, 1] > 0)
    np.testing.assert_allclose(batched, separate, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize(("name", "output"), [("xgboost-regressor", None), ("lightgbm-multiclass", 1),
                                              ("sklearn-forest", None)])
def test_a_few_pairs_alone_equal_separate_runs(fitted, subsets, name, output):
    # Asked for a few pairs, the pass walks only the leaves splitting on their features; the others add constants.
    model, data = fitted[name]
    ensemble = load_model(model)
    names = list(ensemble.feature_names)
    # depot x load_kg: 40-80% of the leaves split on neither (measured on these fixtures); with a second pair.
    assert names[2:] == ["depot", "load_kg"]
    for pairs in ([(names[2], names[3])], [(names[1], names[3]), (names[3], names[2])]):
        batched = subset_pair_h(ensemble, data, pairs, subsets, output=output)
        separate = _separate(ensemble, data, pairs, subsets, output)
        np.testing.assert_allclose(batched, separate, rtol=1e-9, atol=1e-12)


def test_one_subset_matches_brute_force(fitted, subsets):
    model, data = fitted["xgboost-regressor"]
    ensemble = load_model(model)
    pairs = [("fuel_price", "shift_length"), ("depot", "load_kg")]
    rows = data.iloc[np.flatnonzero(subsets[0])]
    brute = h_statistic(ensemble, rows, pairs=pairs, against_rest=False, sample=None, method="brute", progress=False)
    batched = subset_pair_h(ensemble, data, pairs, subsets[:1])
    found = _by_pair(brute.pairs)
    np.testing.assert_allclose(batched[0], np.array([found[frozenset(pair)] for pair in pairs]).T, rtol=1e-9)


def test_subsample_intervals_use_the_same_subsamples(fitted):
    """The triage intervals: one batched pass gives what a loop of separate runs on the same draws gave."""
    model, data = fitted["xgboost-regressor"]
    ensemble = load_model(model)
    pairs = [("fuel_price", "shift_length"), ("depot", "load_kg"), ("fuel_price", "depot")]
    point = _pair_h(ensemble, data, pairs, None)
    low, high = _subsample_intervals(ensemble, data, point, pairs, resamples=5, confidence=0.9,
                                     rng=np.random.default_rng(8), output=None, progress=False)
    draw = np.random.default_rng(8)
    subs = np.array([_pair_h(ensemble, data.iloc[np.sort(draw.choice(N_ROWS, size=N_ROWS // 2, replace=False))],
                             pairs, None) for _ in range(5)])
    shrink = np.sqrt((N_ROWS // 2) / N_ROWS)
    spread = subs - point[None]
    np.testing.assert_allclose(low, np.maximum(point - shrink * np.quantile(spread, 0.95, axis=0), 0.0), rtol=1e-9)
    np.testing.assert_allclose(high, point - shrink * np.quantile(spread, 0.05, axis=0), rtol=1e-9)
    assert np.all(low <= high)


def test_bad_subsets_are_refused(fitted, subsets):
    model, data = fitted["sklearn-forest"]
    ensemble = load_model(model)
    pairs = [("fuel_price", "shift_length")]
    with pytest.raises(ParameterError, match="subsets"):
        subset_pair_h(ensemble, data, pairs, subsets[:, :10])
    lonely = np.zeros((1, N_ROWS), dtype=bool)
    lonely[0, 3] = True
    with pytest.raises(ParameterError, match="at least 2 rows"):
        subset_pair_h(ensemble, data, pairs, lonely)


@pytest.mark.parametrize("budget", [1, 4000])
def test_grid_batches_and_unequal_subsets_equal_separate_runs(fitted, monkeypatch, budget):
    """Pairs' grids in batches of one pair, and of several padded to one shape; subsets of different sizes."""
    import treeprobe.pdp as pdp

    monkeypatch.setattr(pdp, "SUBSET_GRID_BUDGET", budget)
    model, data = fitted["xgboost-regressor"]
    ensemble = load_model(model)
    names = list(ensemble.feature_names)
    pairs = [(names[a], names[b]) for a in range(len(names)) for b in range(a + 1, len(names))]
    rng = np.random.default_rng(5)
    subsets = np.zeros((3, N_ROWS), dtype=bool)
    for b, size in enumerate((N_ROWS // 3, N_ROWS // 2, N_ROWS - 7)):
        subsets[b, rng.choice(N_ROWS, size=size, replace=False)] = True
    batched = subset_pair_h(ensemble, data, pairs, subsets)
    np.testing.assert_allclose(batched, _separate(ensemble, data, pairs, subsets, None), rtol=1e-9, atol=1e-12)


def test_subset_counts_equal_direct_counts_of_the_rows():
    """Set bits inside each row set, one set at a time and all at once, against counting unpacked rows."""
    from treeprobe.pdp import _subset_counts, _subset_masks

    rng = np.random.default_rng(4)
    n_rows = 150
    rows = rng.random((40, n_rows)) < 0.1
    rows[::5] = False  # empty row sets count nothing
    subsets = rng.random((6, n_rows)) < 0.5
    words, masks = _subset_masks(rows, 3), _subset_masks(subsets, 3)
    direct = rows.astype(np.int64) @ subsets.T.astype(np.int64)
    np.testing.assert_array_equal(_subset_counts(words, masks), direct)
    np.testing.assert_array_equal(_subset_counts(words, masks[:1]), direct[:, :1])
