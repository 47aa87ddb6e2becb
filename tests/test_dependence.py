"""Pair dependence (treeprobe.dependence) against scipy, scikit-learn and a closed form.

References: Spearman (1904) through ``scipy.stats.spearmanr``; Kraskov, Stögbauer
and Grassberger (2004), eq. 8, through scikit-learn's ``mutual_info_regression``
and ``mutual_info_classif`` (same estimator, k = 3); Linfoot (1957): the
information correlation of a bivariate normal pair equals ``|rho|``, since
``I = -log(1 - rho^2) / 2``.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import spearmanr
from sklearn.feature_selection import mutual_info_classif, mutual_info_regression

from treeprobe.dependence import information_correlation, pair_dependence
from treeprobe.errors import ParameterError


@pytest.fixture(scope="module")
def columns():
    rng = np.random.default_rng(7)
    n = 400
    base = rng.normal(size=n)
    return np.column_stack([
        base,
        base + 0.5 * rng.normal(size=n),        # monotone dependence
        np.cos(2 * base) + 0.2 * rng.normal(size=n),  # dependence Spearman misses
        rng.exponential(size=n),                 # independent, skewed
        rng.normal(size=n),
    ])


def _sklearn_info(a: np.ndarray, b: np.ndarray) -> float:
    return float(information_correlation(mutual_info_regression(a[:, None], b, random_state=0)[0]))


def test_continuous_pairs_match_scipy_and_scikit_learn(columns):
    pairs = [(a, b) for a in range(5) for b in range(a + 1, 5)]
    rank, info = pair_dependence(columns, pairs, random_state=3)
    for i, (a, b) in enumerate(pairs):
        assert rank[i] == pytest.approx(spearmanr(columns[:, a], columns[:, b]).statistic, abs=1e-12)
        # Without ties the tie-breaking noise (1e-10) moves no neighbour, so the estimates agree exactly.
        assert info[i] == pytest.approx(_sklearn_info(columns[:, a], columns[:, b]), abs=1e-9)
    cosine = pairs.index((0, 2))
    assert abs(rank[cosine]) < 0.2 < info[cosine]


def test_missing_values_use_the_rows_where_both_are_present(columns):
    matrix = columns.copy()
    matrix[::7, 1] = np.nan
    rank, info = pair_dependence(matrix, [(0, 1), (1, 4)])
    for i, (a, b) in enumerate([(0, 1), (1, 4)]):
        both = ~np.isnan(matrix[:, a]) & ~np.isnan(matrix[:, b])
        assert rank[i] == pytest.approx(spearmanr(matrix[both, a], matrix[both, b]).statistic, abs=1e-12)
        assert info[i] == pytest.approx(_sklearn_info(matrix[both, a], matrix[both, b]), abs=1e-9)


def test_tied_values_agree_up_to_the_tie_breaking_noise(columns):
    """Rounded columns: the estimate depends on how noise breaks ties, in ours as in scikit-learn's."""
    matrix = np.column_stack([np.round(columns[:, 0] * 2), columns[:, 1]])
    _, info = pair_dependence(matrix, [(0, 1)])
    assert info[0] == pytest.approx(_sklearn_info(matrix[:, 0], matrix[:, 1]), abs=0.02)


def test_categorical_pairs_use_the_discrete_estimators():
    rng = np.random.default_rng(2)
    depot = rng.integers(0, 4, 300).astype(float)
    load = depot * 2.0 + rng.normal(size=300)
    matrix = np.column_stack([load, depot])
    rank, info = pair_dependence(matrix, [(0, 1), (1, 0)], categorical=[False, True], random_state=5)
    assert np.isnan(rank).all()
    expected_classif = mutual_info_classif(load[:, None], depot.astype(int), discrete_features=[False],
                                           random_state=5)[0]
    expected_regression = mutual_info_regression(depot[:, None], load, discrete_features=[True], random_state=5)[0]
    np.testing.assert_allclose(info, information_correlation(np.array([expected_classif, expected_regression])))


def test_gaussian_pair_information_correlation_is_abs_rho():
    rng = np.random.default_rng(11)
    rho = -0.8
    z = rng.multivariate_normal([0, 0], [[1, rho], [rho, 1]], size=3000)
    rank, info = pair_dependence(z, [(0, 1)])
    assert info[0] == pytest.approx(abs(rho), abs=0.03)
    # Spearman's rho of a normal pair is (6 / pi) asin(rho / 2) (Pearson, 1907).
    assert rank[0] == pytest.approx(6 / np.pi * np.arcsin(rho / 2), abs=0.03)


def test_too_few_rows_or_a_constant_column_give_nan():
    matrix = np.column_stack([np.arange(10.0), np.ones(10), np.r_[np.arange(4.0), [np.nan] * 6]])
    rank, info = pair_dependence(matrix, [(0, 1), (0, 2)])
    assert np.isnan(rank).all() and np.isnan(info).all()


def test_bad_arguments_name_the_parameter(columns):
    with pytest.raises(ParameterError, match="pairs"):
        pair_dependence(columns, [(0, 9)])
    with pytest.raises(ParameterError, match="categorical"):
        pair_dependence(columns, [(0, 1)], categorical=[True])
    with pytest.raises(ParameterError, match="n_neighbors"):
        pair_dependence(columns, [(0, 1)], n_neighbors=0)


@pytest.mark.parametrize("n", [12, 300])
def test_neighbour_sweep_finds_the_k_d_tree_distances(n):
    """The k-th neighbour distances of the sweep equal scipy's k-d tree query (max-norm), rows in the far tails
    (heavy tails send them past the first sweep) and columns shorter than the sweep included."""
    from scipy.spatial import cKDTree

    from treeprobe.dependence import _kth_distances, _prepare

    rng = np.random.default_rng(9)
    first = rng.standard_cauchy(n)
    seconds = [rng.standard_cauchy(n), first + 0.01 * rng.normal(size=n), np.round(rng.normal(size=n), 1)]
    draw = np.random.default_rng(1)
    prepared = [_prepare(column, draw) for column in [first, *seconds]]
    for k in (1, 3):
        swept = _kth_distances(prepared[0], prepared[1:], k)
        for i, second in enumerate(prepared[1:]):
            points = np.column_stack([prepared[0].values, second.values])
            expected = cKDTree(points).query(points, k=[k + 1], p=np.inf)[0][:, 0]
            np.testing.assert_array_equal(swept[i], expected)


def test_many_rows_use_k_d_trees_with_the_same_result(columns, monkeypatch):
    """Above the sweep's row limit each pair gets a k-d tree: the estimates do not change."""
    import treeprobe.dependence as dependence

    pairs = [(a, b) for a in range(5) for b in range(a + 1, 5)]
    swept = pair_dependence(columns, pairs, random_state=3)
    monkeypatch.setattr(dependence, "_SWEEP_MAX_ROWS", 10)
    np.testing.assert_array_equal(pair_dependence(columns, pairs, random_state=3)[1], swept[1])
