"""Dependence between feature pairs in the data: rank correlation and information correlation.

Partial dependence, and so the H-statistic, holds one feature fixed while the
others keep their observed values; when two features are strongly dependent
this reads the model where there are no data. Triage (:mod:`treeprobe.verdicts`)
therefore measures, on the same rows, for every pair:

* Spearman's rank correlation ``rho`` [1]_: Pearson's correlation of the
  average ranks, for pairs of numeric features;
* the information correlation ``sqrt(1 - exp(-2 I))`` [2]_ of the mutual
  information ``I`` (nats), which equals ``|rho|`` for a Gaussian pair and also
  sees dependence that is not monotone. ``I`` is the nearest-neighbour estimate
  of Kraskov, Stögbauer and Grassberger [3]_ (their first estimator, ``k = 3``
  neighbours in the max-norm), computed as scikit-learn's
  ``mutual_info_regression`` computes it [4]_: each column scaled to unit
  standard deviation, with noise of relative size 1e-10 to break ties.

All pairs are done in one pass: ranks, scaling, tie-breaking noise and sort
orders are computed once per column; the distances ``eps_i`` of all pairs
sharing a first column come from one sweep along its sorted order (exact: the
same neighbours a k-d tree finds; above 10,000 rows one k-d tree per pair, scipy's
``cKDTree``, is faster), and the two one-dimensional counts are
binary searches in the shared sorted columns, all pairs holding a column at
once. Pairs with a missing value in either column use
the rows where both are present; pairs with a categorical feature go to
scikit-learn's own estimators (``mutual_info_classif`` for a categorical
second feature), which treat categories as discrete.

Limits: both measures are estimates on the rows given; a dependence of 0.7 is
strong by common practice, and neither measure says which feature drives the other.

References
----------
.. [1] C. Spearman, "The proof and measurement of association between two
   things", American Journal of Psychology 15(1), 72-101, 1904.
.. [2] E. H. Linfoot, "An informational measure of correlation", Information
   and Control 1(1), 85-89, 1957.
.. [3] A. Kraskov, H. Stögbauer and P. Grassberger, "Estimating mutual
   information", Physical Review E 69, 066138, 2004, eq. 8.
.. [4] scikit-learn, ``sklearn.feature_selection.mutual_info_regression``
   (B. C. Ross, "Mutual information between discrete and continuous data
   sets", PLoS ONE 9(2), 2014, for the discrete cases).

Examples
--------
>>> import numpy as np
>>> rng = np.random.default_rng(0)
>>> x = rng.normal(size=400)
>>> matrix = np.column_stack([x, x + 0.1 * rng.normal(size=400), rng.normal(size=400)])
>>> rank, info = pair_dependence(matrix, [(0, 1), (0, 2)])
>>> bool(rank[0] > 0.9 and info[0] > 0.9), bool(abs(rank[1]) < 0.2 and info[1] < 0.3)
(True, True)
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree
from scipy.special import digamma
from scipy.stats import rankdata
from sklearn.feature_selection import mutual_info_classif, mutual_info_regression

from .checks import check_int, check_seed
from .errors import ParameterError

__all__ = ["pair_dependence", "information_correlation"]

# Fewer rows than this, or a constant column, and a pair gets no dependence value (NaN).
_MIN_ROWS = 5
# The neighbour sweep compares about 1.4 sqrt(n) places for every row at once (most rows are done by then; the
# expected neighbours within reach of a row grow as sqrt(n)), then 4 places between checks for the rows that go
# on, for as many second columns at once as keep each working array near 2**16 floats (in cache). From 10,000
# rows on, one k-d tree per pair is faster (the sweep grows as n sqrt(n)). Measured on Friedman benchmark
# columns: on 1,000 rows and 1,225 pairs the sweep takes 0.3 s (0.5 s with columns laid out row-contiguous),
# the k-d trees 0.8 s; 49 pairs of one first column on 8,000 rows 0.22 s against 0.29 s; crossover near 12,000
# rows.
_SWEEP_PER_ROOT = 1.4
_SWEEP_CHECK = 4
_SWEEP_FLOATS = 2**16
_SWEEP_MAX_ROWS = 10_000


def information_correlation(mutual_information: np.ndarray) -> np.ndarray:
    """Linfoot's information correlation ``sqrt(1 - exp(-2 I))`` of mutual information ``I`` in nats.

    Examples
    --------
    >>> information_correlation(np.array([0.0, -np.log(1 - 0.6**2) / 2])).round(12).tolist()
    [0.0, 0.6]
    """
    return np.sqrt(1.0 - np.exp(-2.0 * np.maximum(mutual_information, 0.0)))


@dataclass(frozen=True)
class _Column:
    """One column on a set of rows, prepared once: scaled and jittered values, their order and sorted values."""

    values: np.ndarray
    order: np.ndarray
    sorted_values: np.ndarray


def _prepare(values: np.ndarray, rng: np.random.Generator) -> _Column:
    """Scale to unit standard deviation and add noise of relative size 1e-10 (as scikit-learn does)."""
    spread = np.std(values)
    scaled = values / spread if spread > 0 else values.astype(np.float64)
    scaled = scaled + 1e-10 * max(1.0, float(np.mean(np.abs(scaled)))) * rng.standard_normal(scaled.size)
    order = np.argsort(scaled, kind="stable")
    return _Column(scaled, order, scaled[order])


def _keep_smallest(smallest: np.ndarray, candidate: np.ndarray) -> None:
    """Insert ``candidate`` into the ascending running minima ``smallest`` (k, ...), in place."""
    for level in range(smallest.shape[0] - 1, 0, -1):
        np.minimum(smallest[level], np.maximum(smallest[level - 1], candidate), out=smallest[level])
    np.minimum(smallest[0], candidate, out=smallest[0])


def _gap_beyond(sorted_values: np.ndarray, position: np.ndarray, offset: int) -> np.ndarray:
    """Distance in the sorted column from each ``position`` to the nearest row more than ``offset`` places away."""
    last = sorted_values.size - 1
    value = sorted_values[position]
    above = np.where(position + offset < last, sorted_values[np.minimum(position + offset + 1, last)] - value, np.inf)
    below = np.where(position - offset > 0, value - sorted_values[np.maximum(position - offset - 1, 0)], np.inf)
    return np.minimum(above, below)


def _kth_distance(first: _Column, second: _Column, k: int) -> np.ndarray:
    """Max-norm distance of every row to its k-th nearest other row in the plane of the two columns (k-d tree)."""
    points = np.column_stack([first.values, second.values])
    # An unbalanced tree with plain node boxes builds faster here and finds the same (exact) neighbours.
    tree = cKDTree(points, balanced_tree=False, compact_nodes=False)
    return tree.query(points, k=[k + 1], p=np.inf)[0][:, 0]


def _kth_distances(first: _Column, seconds: list[_Column], k: int) -> np.ndarray:
    """(len(seconds), n_rows): max-norm distance of every row to its k-th nearest other row in the plane of
    ``first`` and each of ``seconds``, exactly.

    A sweep in the sorted order of ``first`` compares the rows ``d`` places
    apart, ``d = 1, 2, ...``, for every row and every second column at once,
    keeping each row's k smallest distances. A row is done once the gap in
    ``first`` to the rows not yet compared is at least its k-th distance: they
    are at least that far in ``first`` alone. Most rows are done within the
    first ``1.4 sqrt(n)`` places; the others go on (compacted) until done.
    The distances are the same numbers a k-d tree query gives
    (:func:`_kth_distance`), so the estimate does not change.
    """
    values, order = first.sorted_values, first.order
    n = values.size
    # Rows along the first axis, second columns along the second: the rows ``offset`` places apart are then two
    # contiguous blocks, and each step runs over one block (about 30% faster than row-contiguous columns).
    other = np.array([second.values[order] for second in seconds]).T.copy()
    smallest = np.full((k,) + other.shape, np.inf)
    reach = min(max(k, int(_SWEEP_PER_ROOT * np.sqrt(n))), n - 1)
    value_column = values[:, None]
    for offset in range(1, reach + 1):
        distance = np.maximum(np.abs(other[offset:] - other[:-offset]),
                              value_column[offset:] - value_column[:-offset])
        _keep_smallest(smallest[:, :-offset], distance)
        _keep_smallest(smallest[:, offset:], distance)
    # Back to one row of distances per second column for the rows that go on.
    other, smallest = other.T, smallest.transpose(0, 2, 1)
    kth = smallest[-1].copy()
    column, position = np.nonzero(kth > _gap_beyond(values, np.arange(n), reach)[None, :])
    smallest = smallest[:, column, position]
    while position.size:
        for _ in range(_SWEEP_CHECK):
            reach += 1
            for near in (position + reach, position - reach):
                inside = (near >= 0) & (near < n)
                near = np.clip(near, 0, n - 1)
                distance = np.maximum(np.abs(other[column, near] - other[column, position]),
                                      np.abs(values[near] - values[position]))
                _keep_smallest(smallest, np.where(inside, distance, np.inf))
        done = smallest[-1] <= _gap_beyond(values, position, reach)
        kth[column[done], position[done]] = smallest[-1, done]
        column, position, smallest = column[~done], position[~done], smallest[:, ~done]
    out = np.empty_like(kth)
    out[:, order] = kth
    return out


def _sorted_search(sorted_values: np.ndarray, keys: np.ndarray, side: str) -> np.ndarray:
    """``np.searchsorted(sorted_values, keys, side)`` for keys (m, n), the keys of each row searched in
    ascending order (a third faster than in row order: each search starts where the last one ended)."""
    order = np.argsort(keys, axis=1)
    found = np.searchsorted(sorted_values, np.take_along_axis(keys, order, axis=1), side=side)
    out = np.empty_like(found)
    np.put_along_axis(out, order, found, axis=1)
    return out


def _count_within(column: _Column, radius: np.ndarray) -> np.ndarray:
    """Other rows whose value lies within ``radius`` of each row's (closed ball, as a k-d tree query counts).

    ``radius`` is (m, n_rows): one radius per row for each of ``m`` pairs, counted in one pass.
    """
    values, sorted_values = column.values, column.sorted_values
    last = sorted_values.size
    low = _sorted_search(sorted_values, values - radius, "left")
    high = _sorted_search(sorted_values, values + radius, "right")
    # The sums above round; settle the edge rows by the distance itself, as the tree query does.
    low += (low < last) & (np.abs(sorted_values[np.minimum(low, last - 1)] - values) > radius)
    low -= (low > 0) & (np.abs(sorted_values[np.maximum(low - 1, 0)] - values) <= radius)
    high -= (high > 0) & (np.abs(sorted_values[np.maximum(high - 1, 0)] - values) > radius)
    high += (high < last) & (np.abs(sorted_values[np.minimum(high, last - 1)] - values) <= radius)
    return high - low - 1


def _ksg(columns: dict[int, _Column], members: np.ndarray, k: int) -> np.ndarray:
    """Kraskov et al.'s first estimator of the mutual information of each pair of ``columns`` (rows of
    ``members``; nats, negative estimates set to 0).

    The neighbour distances come from one sweep per first column for all its
    pairs (:func:`_kth_distances`; one k-d tree per pair on many rows); the
    one-dimensional counts are then done column by column, for every pair
    holding the column at once.
    """
    n = next(iter(columns.values())).values.size
    radius = np.empty((members.shape[0], n))
    block = max(1, _SWEEP_FLOATS // n)
    for a in np.unique(members[:, 0]):
        rows = np.flatnonzero(members[:, 0] == a)
        seconds = [columns[int(b)] for b in members[rows, 1]]
        if n > _SWEEP_MAX_ROWS:
            radius[rows] = [_kth_distance(columns[int(a)], second, k) for second in seconds]
            continue
        for start in range(0, rows.size, block):
            radius[rows[start:start + block]] = _kth_distances(columns[int(a)], seconds[start:start + block], k)
    radius = np.nextafter(radius, 0)
    # Counts are whole numbers in 0..n - 1: digamma is read from a table (the same values, computed once).
    digamma_of_count = digamma(np.arange(1, n + 1, dtype=np.float64))
    marginal = np.zeros(members.shape[0])
    for j in np.unique(members):
        for side in (0, 1):
            rows = np.flatnonzero(members[:, side] == j)
            if rows.size:
                marginal[rows] += np.mean(digamma_of_count[_count_within(columns[int(j)], radius[rows])], axis=1)
    return np.maximum(digamma(n) + digamma(k) - marginal, 0.0)


def _spearman(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.corrcoef(rankdata(a), rankdata(b))[0, 1])


def _discrete_mi(a: np.ndarray, b: np.ndarray, a_discrete: bool, b_discrete: bool, k: int, seed: int) -> float:
    """scikit-learn's estimate for a pair with a categorical feature (classification when ``b`` is one)."""
    if b_discrete:
        return float(mutual_info_classif(a[:, None], b.astype(np.int64), discrete_features=[a_discrete],
                                         n_neighbors=k, random_state=seed)[0])
    return float(mutual_info_regression(a[:, None], b, discrete_features=[a_discrete], n_neighbors=k,
                                        random_state=seed)[0])


def _checked_pairs(pairs: Sequence[tuple[int, int]], n_columns: int) -> np.ndarray:
    members = np.asarray(pairs, dtype=np.int64).reshape(-1, 2) if len(pairs) else np.zeros((0, 2), np.int64)
    if members.size and (members.min() < 0 or members.max() >= n_columns):
        raise ParameterError(f"pairs: column positions must lie in 0..{n_columns - 1}, got {members.tolist()[:3]}...")
    return members


def pair_dependence(
    matrix: np.ndarray,
    pairs: Sequence[tuple[int, int]],
    *,
    categorical: Sequence[bool] | np.ndarray | None = None,
    random_state: int = 0,
    n_neighbors: int = 3,
) -> tuple[np.ndarray, np.ndarray]:
    """Spearman's rank correlation and the information correlation of column pairs.

    Parameters
    ----------
    matrix : ndarray of shape (n_rows, n_columns)
        Numeric data; NaN marks a missing value.
    pairs : sequence of (int, int)
        Column positions of the pairs to measure.
    categorical : sequence of bool, optional
        Columns holding category codes (default: none).
    random_state : int, default 0
        Seed of the tie-breaking noise.
    n_neighbors : int, default 3
        ``k`` of the nearest-neighbour estimator (scikit-learn's default).

    Returns
    -------
    rank_correlation : ndarray of shape (n_pairs,)
        Spearman's ``rho`` on the rows where both are present; NaN for pairs
        with a categorical feature.
    information_correlation : ndarray of shape (n_pairs,)
        ``sqrt(1 - exp(-2 I))``, ``I`` the estimated mutual information in nats.
        Both are NaN when fewer than 5 rows (or ``n_neighbors + 1``) hold both values or a column is
        constant there.

    Raises
    ------
    ParameterError
        A pair outside the matrix's columns, a non-integer seed or ``n_neighbors < 1``.

    Notes
    -----
    ``rho = corr(rank(a), rank(b))`` with average ranks for ties ([1]_), and
    ``I = psi(n) + psi(k) - <psi(n_a + 1)> - <psi(n_b + 1)>`` ([3]_, eq. 8):
    ``eps_i`` is the max-norm distance from row ``i`` to its k-th nearest
    neighbour and ``n_a``, ``n_b`` count the other rows closer than ``eps_i``
    in each coordinate. Negative estimates are set to 0.

    References
    ----------
    See the module docstring.
    """
    matrix = np.asarray(matrix, dtype=np.float64)
    n_columns = matrix.shape[1]
    members = _checked_pairs(pairs, n_columns)
    random_state = check_seed("random_state", random_state, allow_none=False)
    k = check_int("n_neighbors", n_neighbors, low=1)
    categorical = np.zeros(n_columns, bool) if categorical is None else np.asarray(categorical, dtype=bool)
    if categorical.shape != (n_columns,):
        raise ParameterError(f"categorical must hold one flag per column ({n_columns}), got {categorical.shape}")
    rng = np.random.default_rng(random_state)
    complete = ~np.isnan(matrix).any(axis=0)
    prepared = {j: _prepare(matrix[:, j], rng) for j in np.unique(members)
                if complete[j] and not categorical[j] and np.ptp(matrix[:, j]) > 0}
    ranked = sorted(prepared)
    rank_matrix = np.corrcoef(np.array([rankdata(matrix[:, j]) for j in ranked]).reshape(len(ranked), -1))
    slot = {j: position for position, j in enumerate(ranked)}
    rank = np.full(len(members), np.nan)
    info = np.full(len(members), np.nan)
    shared: list[int] = []
    for i, (a, b) in enumerate(members):
        both = ~np.isnan(matrix[:, a]) & ~np.isnan(matrix[:, b])
        xa, xb = matrix[both, a], matrix[both, b]
        if xa.size < max(_MIN_ROWS, k + 1) or np.ptp(xa) == 0 or np.ptp(xb) == 0:
            continue
        if categorical[a] or categorical[b]:
            info[i] = information_correlation(_discrete_mi(xa, xb, bool(categorical[a]), bool(categorical[b]), k,
                                                           random_state))
        elif a in prepared and b in prepared:
            rank[i] = float(np.atleast_2d(rank_matrix)[slot[a], slot[b]])
            shared.append(i)
        else:
            rank[i] = _spearman(xa, xb)
            info[i] = information_correlation(_ksg({0: _prepare(xa, rng), 1: _prepare(xb, rng)},
                                                   np.array([[0, 1]]), k)[0])
    if shared:
        info[shared] = information_correlation(_ksg(prepared, members[shared], k))
    return rank, info
