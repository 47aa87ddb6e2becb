"""The noise floor of triage: null refits and the family-wise test of every pair.

Friedman and Popescu ([1]_, section 8.3) judge an H-statistic against its
values on models refitted to targets without interaction. This module builds
those targets (an additive fit plus permuted residuals, or labels drawn from
its probabilities), refits the model on them as it was trained, computes
``h`` of every pair on each refit, and tests all pairs at once so that the
chance of any false call holds at a stated level (:func:`max_ratio_test`).
When some pairs clear the floor by a wide margin, a second round draws its
targets from a null that keeps those interactions (interaction constraints
allowing exactly them), so that their spill-over onto other pairs is in the
floor too. :func:`treeprobe.triage` turns the results into verdicts.

References
----------
.. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 916-954, 2008.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import partial
from typing import Any

import numpy as np
import pandas as pd

from .errors import ParameterError
from .graph import ForestGraph
from .io import load_model
from .measure import h_statistic
from .parallel import run_tasks, threads_per_fit
from .refit import BINARY, REGRESSION, Recipe, constrained_substitute, fit, fit_early_stopped, predict_response

__all__ = ["max_ratio_test", "check_refit_level", "label_change_share", "floor_test", "pair_h", "SharedFirstRound"]

# Expected share of changed labels under which the classification null is called separable (our convention).
_SEPARABLE_SHARE = 0.01
# Share of the prediction spread added to every pair's scale in the floor test (our convention): without it, pairs
# the refits barely use (null h mostly near 0, now and then larger) have heavy-tailed ratios that set the yardstick
# for all. Measured on three models (planted diabetes, two synthetic): 0.005 left the planted bmi x bp pair at
# p_adjusted 0.70, 0.02 at 0.15, with the maxima spread over many pairs.
_SCALE_OFFSET = 0.02
# A pair whose h is at least this multiple of its first-round floor counts as a clear interaction, kept in the
# second round's null (our convention). In a first study (seeds 0-31) the pairs without true interaction that
# cleared the first round reached 1.02-1.32 times their floor; most strong true pairs, 1.5-5.6 times.
_DECISIVE = 1.5


def pair_h(graph: ForestGraph, rows: pd.DataFrame | np.ndarray, names: list[tuple[str, str]],
           output: int | None) -> np.ndarray:
    """H² and h of the given pairs on ``rows`` (background = evaluation rows), shape (2, n_pairs).

    One exact pass of :func:`treeprobe.h_statistic` (eq. 44 of [1]_ and its
    square root); pairs that share no path get 0.
    """
    out = np.zeros((2, len(names)))
    if not names:
        return out
    result = h_statistic(graph, rows, pairs=names, against_rest=False, sample=None, output=output, progress=False)
    pairs = result.pairs
    found = {frozenset(key): (h2, h) for key, h2, h in zip(
        zip(pairs["feature_a"], pairs["feature_b"], strict=True), pairs["h2"], pairs["h"], strict=True)}
    for i, pair in enumerate(names):
        out[:, i] = found.get(frozenset(pair), (0.0, 0.0))
    return out


def _synthetic_target(task: str, target: np.ndarray, fitted: np.ndarray, seed: int) -> np.ndarray:
    """A target without interaction: the additive fit plus permuted residuals, or labels drawn from its probabilities."""
    draw = np.random.default_rng(seed)
    if task == REGRESSION:
        return fitted + draw.permutation(target - fitted)
    if task == BINARY:
        return (draw.random(target.size) < np.clip(fitted.ravel(), 0.0, 1.0)).astype(np.float64)
    probability = fitted.reshape(target.size, -1)
    cumulative = probability.cumsum(axis=1)
    return (draw.random((target.size, 1)) > cumulative[:, :-1]).sum(axis=1).astype(np.float64)


def label_change_share(task: str, target: np.ndarray, fitted: np.ndarray) -> float:
    """Expected share of rows whose label drawn from the additive probabilities differs from the real one.

    Binary: mean of ``y (1 - p) + (1 - y) p``; multiclass: mean of
    ``1 - p[y]``; NaN for regression. Near 0 the null refits see the real
    labels again (the additive fit separates the classes).
    """
    if task == REGRESSION:
        return float("nan")
    if task == BINARY:
        p = np.clip(fitted.ravel(), 0.0, 1.0)
        return float(np.mean(target * (1.0 - p) + (1.0 - target) * p))
    probability = fitted.reshape(target.size, -1)
    return float(np.mean(1.0 - probability[np.arange(target.size), target.astype(int)]))


def _separable_note(share: float) -> str:
    return (f"The additive fit separates the classes almost perfectly: a label drawn from it differs from the real one "
            f"on {share:.2%} of rows (expected), so every null refit sees nearly the real labels and reproduces the "
            "model. The floor then asks whether the labels need any interaction at all, and an additive model already "
            "explains them: a pair below the floor may still be used by this model, but the data give no evidence "
            "that it is needed. A pair above it is used far beyond what the labels require.")


# What one null round scores on every refit: pairs of one output (None: a single-output model).
Wanted = list[tuple[list[tuple[str, str]], int | None]]


@dataclass(frozen=True)
class _NullSetup:
    """What every refit of one null round shares: the recipe, the coded data, the null fit's predictions, and
    the pairs to score, per output."""

    recipe: Recipe
    matrix: np.ndarray
    target: np.ndarray
    fitted: np.ndarray
    rows: np.ndarray
    wanted: Wanted
    threads: int


def _one_null(setup: _NullSetup, seed: int) -> list[np.ndarray]:
    """H² and h of the round's pairs on the model refitted, as it was trained, to one synthetic target: one
    (2, n_pairs) array per entry of ``setup.wanted``."""
    synthetic = _synthetic_target(setup.recipe.task, setup.target, setup.fitted, seed)
    model = fit(setup.recipe, setup.matrix, synthetic, threads=setup.threads, seed=seed)
    refit = load_model(model, feature_names=setup.recipe.feature_names)
    return [pair_h(refit, setup.rows, names, output) for names, output in setup.wanted]


def _null_fit(recipe: Recipe, matrix: np.ndarray, target: np.ndarray, allowed: list[list[int]],
              seed: int) -> tuple[np.ndarray, int, Recipe]:
    """Predictions of the model's null version (main effects plus the ``allowed`` pairs), its rounds, its recipe.

    Interaction constraints with one group per feature and one per allowed
    pair, early-stopped on an inner split and refitted on all rows at the best
    count. A family without interaction constraints takes it from the nearest
    family that has them (:func:`treeprobe.refit.constrained_substitute`).
    """
    base = constrained_substitute(recipe)
    groups = [[j] for j in range(matrix.shape[1])] + [list(pair) for pair in allowed]
    _, rounds = fit_early_stopped(base, matrix, target, groups=groups, threads=0, seed=seed)
    null = fit(base, matrix, target, groups=groups, rounds=rounds, threads=0, seed=seed)
    return np.asarray(predict_response(base, null, matrix), dtype=np.float64), rounds, base


@dataclass(frozen=True)
class _NullRound:
    """One null round: per entry of its ``wanted``, H² and h on every refit (refits, 2, n_pairs); the null fit's
    predictions, its early-stopped rounds and its recipe."""

    values: list[np.ndarray]
    fitted: np.ndarray
    rounds: int
    base: Recipe


def _null_round(recipe: Recipe, matrix: np.ndarray, target: np.ndarray, rows: np.ndarray, wanted: Wanted,
                allowed: list[list[int]], *, refits: int, seed: int, n_jobs: int, label: str,
                progress: bool | None) -> _NullRound:
    """H² and h of the pairs of ``wanted`` on ``refits`` refits to targets drawn from one null fit."""
    fitted, fit_rounds, base = _null_fit(recipe, matrix, target, allowed, seed)
    setup = _NullSetup(recipe, matrix, target, fitted, rows, wanted, threads_per_fit(n_jobs))
    seeds = [int(s) for s in np.random.default_rng(seed).integers(0, 2**31 - 1, size=refits)]
    values = run_tasks(partial(_one_null, setup), seeds, n_jobs=n_jobs, label=label, progress=progress)
    return _NullRound([np.stack([refit[i] for refit in values]) for i in range(len(wanted))], fitted, fit_rounds, base)


class SharedFirstRound:
    """The first null round of several outputs (classes) of one model, from one set of refits.

    The first round's targets and refits do not depend on the output
    analysed: a triage of each class draws the same synthetic labels from the
    same additive fit, with the same seeds, and refits the same multiclass
    model. This object lets the triages of all classes share them: the first
    call runs the round once, scoring on every refit the pairs of every
    output given here, and each call takes its own output's values. Results
    equal separate triages per class (up to the last digit of ``h``, summed
    among more pairs); the fits are done once instead of once per class.
    Second rounds stay per class (they keep each class's clear pairs in the
    null).

    Parameters
    ----------
    pairs : dict of int to list of (str, str)
        Per output, the pairs its triage tests (those sharing a path).
    """

    def __init__(self, pairs: dict[int, list[tuple[str, str]]]) -> None:
        self._pairs = {output: list(names) for output, names in pairs.items()}
        self._round: _NullRound | None = None
        self._inputs: tuple | None = None
        self._by_output: dict[int, np.ndarray] = {}

    def values(self, output: int, names: list[tuple[str, str]], run: Callable[[Wanted], _NullRound],
               inputs: tuple) -> _NullRound:
        """The round for ``output``, its values in the order of ``names``; ``run(wanted)`` runs the round the
        first time. ``inputs`` (recipe, rows, seed, refits) must be the same at every call."""
        if self._round is None:
            if output not in self._pairs:
                raise ParameterError(f"output {output} was not prepared for a shared first round")
            order = sorted(self._pairs)
            self._round = run([(self._pairs[k], k) for k in order])
            self._inputs = inputs
            self._by_output = dict(zip(order, self._round.values, strict=True))
        elif not _same_inputs(self._inputs, inputs):
            raise ParameterError("a shared first round serves triages of one model on the same rows and options")
        column = {frozenset(pair): i for i, pair in enumerate(self._pairs[output])}
        missing = [pair for pair in names if frozenset(pair) not in column]
        if missing:
            raise ParameterError(f"output {output}: pairs {missing[:3]} were not prepared for the shared first round")
        take = [column[frozenset(pair)] for pair in names]
        return _NullRound([self._by_output[output][:, :, take]], self._round.fitted, self._round.rounds,
                          self._round.base)


def _same_inputs(left: tuple | None, right: tuple) -> bool:
    if left is None or len(left) != len(right):
        return False
    return all(a is b or (np.array_equal(a, b) if isinstance(a, np.ndarray) else a == b)
               for a, b in zip(left, right, strict=True))


def max_ratio_test(observed: Any, null: Any, *, level: float = 0.05, offset: float = 0.0,
                   family: Any = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Test many pairs at once against shared null refits: per-pair and family-wise adjusted p-values.

    Each pair's values are scaled by their own size, so that pairs the model
    uses a lot and pairs it barely uses compete on one footing, and the largest
    scaled null value of each refit is the yardstick for every pair
    (single-step max-statistic adjustment, Westfall and Young [1]_, section 2.6).

    Parameters
    ----------
    observed : array-like of shape (n_pairs,)
        The statistic (here ``h``) of each pair on the model.
    null : array-like of shape (n_refits, n_pairs)
        The same statistic on each null refit, computed on the same rows.
    level : float, default 0.05
        Family-wise level: the floor each pair must clear.
    offset : float, default 0.0
        Added to every pair's scale, so that a pair that neither the model nor
        the refits use (scale near 0) cannot turn a negligible value into a
        large ratio.
    family : array-like of bool of shape (n_pairs,), optional
        The pairs whose scaled null values make the yardstick (default all).
        Choose it without looking at the statistic (here: the pairs that are
        not strongly dependent in the data); every pair is then judged
        against it.

    Returns
    -------
    p_value, p_adjusted, floor : ndarray of shape (n_pairs,)
        Per-pair empirical p-value, the family-wise adjusted one, and the value
        of the statistic a pair must exceed to reach ``p_adjusted <= level``.

    Notes
    -----
    With ``v_0p`` the observed value of pair ``p``, ``v_rp`` its value on refit
    ``r = 1..R``, scale ``s_p = mean_{r=0..R}(v_rp) + offset``, ratios
    ``t_rp = v_rp / s_p`` and refit maxima ``T_r = max_p t_rp``::

        p_value_p    = (1 + #{r >= 1 : v_rp >= v_0p}) / (R + 1)
        p_adjusted_p = (1 + #{r >= 1 : T_r  >= t_0p}) / (R + 1)
        floor_p      = s_p * T_(k+1),   k = floor(level (R + 1)) - 1,

    ``T_(1) >= T_(2) >= ...`` the sorted maxima: ``p_adjusted_p <= level``
    exactly when ``v_0p > floor_p``. The ``(1 + b) / (R + 1)`` form counts the
    model as one of the draws, so no p-value is 0 ([2]_). The scale pools the
    model with its refits (a symmetric function of the ``R + 1`` values), so
    when no pair interacts and the model is exchangeable with its refits, the
    chance that any pair reaches ``p_adjusted <= level`` is at most ``level``,
    whatever the number of pairs ([1]_).

    Why a max statistic rather than a false-discovery-rate procedure: with
    ``R`` refits the smallest empirical p-value is ``1 / (R + 1)``, while
    Benjamini and Hochberg's step-up procedure ([3]_) needs ``level / m`` to
    call anything among ``m`` pairs: 999 refits for 50 pairs at 5%. The max
    statistic needs ``R >= 1 / level - 1`` (19 at 5%), and it uses the
    dependence between pairs, which come from the same refits.

    References
    ----------
    .. [1] P. H. Westfall and S. S. Young, "Resampling-Based Multiple Testing:
       Examples and Methods for p-Value Adjustment", Wiley, 1993 (single-step
       maxT adjustment; section number from memory).
    .. [2] B. Phipson and G. K. Smyth, "Permutation p-values should never be
       zero", Statistical Applications in Genetics and Molecular Biology 9(1),
       article 39, 2010.
    .. [3] Y. Benjamini and Y. Hochberg, "Controlling the false discovery rate",
       Journal of the Royal Statistical Society B 57(1), 289-300, 1995.

    Examples
    --------
    Three pairs, 19 refits with null values between 0.5 and 1.5: the second
    pair beats all of its own refits (p_value 1/20), but not the largest
    scaled value over the three pairs.

    >>> import numpy as np
    >>> null = np.random.default_rng(0).uniform(0.5, 1.5, size=(19, 3))
    >>> p_value, p_adjusted, floor = max_ratio_test([3.0, 1.4, 1.0], null)
    >>> p_value.round(2).tolist(), p_adjusted.round(2).tolist(), floor.round(2).tolist()
    ([0.05, 0.05, 0.55], [0.05, 0.3, 0.8], [1.69, 1.63, 1.5])
    """
    observed = np.asarray(observed, dtype=float)
    null = np.asarray(null, dtype=float)
    refits = null.shape[0]
    scale = (observed + null.sum(axis=0)) / (refits + 1) + offset
    safe = np.where(scale > 0, scale, np.inf)
    ratio_observed = observed / safe
    members = np.ones(observed.size, dtype=bool) if family is None else np.asarray(family, dtype=bool)
    maxima = (null[:, members] / safe[members]).max(axis=1) if members.any() else np.zeros(refits)
    p_value = (1 + (null >= observed[None, :]).sum(axis=0)) / (refits + 1)
    p_adjusted = (1 + (maxima[:, None] >= ratio_observed[None, :]).sum(axis=0)) / (refits + 1)
    k = int(np.floor(level * (refits + 1) + 1e-9)) - 1
    critical = np.sort(maxima)[::-1][k] if 0 <= k < refits else np.inf
    floor = np.where(np.isfinite(safe), scale * critical, np.inf) if np.isfinite(critical) else np.full(observed.size, np.inf)
    return p_value, p_adjusted, floor


def floor_test(recipe: Recipe, matrix: np.ndarray, target: np.ndarray, rows: np.ndarray,
               names: list[tuple[str, str]], observed: np.ndarray, family: np.ndarray, *,
               feature_names: tuple[str, ...], refits: int, level: float, spread: float, output: int | None,
               random_state: int, n_jobs: int, progress: bool | None,
               shared: SharedFirstRound | None = None) -> tuple[dict[str, np.ndarray], list[str], dict]:
    """The noise-floor test of every pair sharing a path ([1]_, section 8.3, made family-wise).

    The rule and its two rounds are stated in the Notes of
    :func:`treeprobe.triage`. ``spread`` is the standard deviation of the
    model's predictions (its ``_SCALE_OFFSET`` share offsets every pair's scale).

    ``family`` marks the pairs that are not strongly dependent: they make the
    yardstick and only they can be found. Returns the columns ``null_h2``,
    ``null_h``, ``p_value``, ``p_adjusted`` (one value per pair of
    ``names``), notes for the reader and facts. With ``shared``, the first
    round comes from the refits shared by the triages of all classes
    (:class:`SharedFirstRound`).
    """
    offset = _SCALE_OFFSET * spread
    index = {name: j for j, name in enumerate(feature_names)}

    def first(wanted: Wanted) -> _NullRound:
        return _null_round(recipe, matrix, target, rows, wanted, [], refits=refits, seed=random_state, n_jobs=n_jobs,
                           label="null refits", progress=progress)

    if shared is None:
        round_one = first([(names, output)])
    else:
        round_one = shared.values(output, names, first, (recipe, rows, random_state, refits))
    values, fitted, additive_rounds, base = round_one.values[0], round_one.fitted, round_one.rounds, round_one.base
    p_value, p_adjusted, floor = max_ratio_test(observed, values[:, 1], level=level, offset=offset, family=family)
    columns = {"null_h2": np.quantile(values[:, 0], 1.0 - level, axis=0)}
    decisive = family & (p_adjusted <= level) & (observed >= _DECISIVE * floor)
    rest = ~decisive
    second = bool(decisive.any() and (rest & family).any())
    if second:
        kept = [[index[names[i][0]], index[names[i][1]]] for i in np.flatnonzero(decisive)]
        more = _null_round(recipe, matrix, target, rows, [([names[i] for i in np.flatnonzero(rest)], output)], kept,
                           refits=refits, seed=random_state + 1, n_jobs=n_jobs, label="null refits, round 2",
                           progress=progress).values[0]
        tested = max_ratio_test(observed[rest], more[:, 1], level=level, offset=offset, family=family[rest])
        for column, update in zip((p_value, p_adjusted, floor), tested, strict=True):
            column[rest] = update
    columns.update(null_h=floor, p_value=p_value, p_adjusted=p_adjusted)
    notes, facts = _floor_account(recipe, base, target, fitted, additive_rounds, refits=refits, level=level,
                                  cleared=int(((p_adjusted <= level) & family).sum()),
                                  kept=[list(names[i]) for i in np.flatnonzero(decisive)] if second else [])
    return columns, notes, facts


def _floor_account(recipe: Recipe, base: Recipe, target: np.ndarray, fitted: np.ndarray, additive_rounds: int, *,
                   refits: int, level: float, cleared: int, kept: list[list[str]]) -> tuple[list[str], dict]:
    """Notes for the reader and facts of the floor test."""
    task = recipe.task
    share = label_change_share(task, target, fitted)
    draw = "additive fit plus permuted residuals" if task == REGRESSION else "labels drawn from the additive fit"
    trained = (f"each trained as the model was, {recipe.rounds} rounds" if recipe.boosted
               else f"each with the estimator's own {recipe.rounds} rounds (trees, not boosted rounds)")
    notes = [*recipe.notes, *(base.notes if base is not recipe else []),
             f"Noise floor from {refits} refits of the {recipe.family} model on synthetic targets without interaction "
             f"({draw}; additive fit early-stopped at {additive_rounds} rounds), {trained}. The pairs that are not "
             f"strongly dependent are tested together (largest scaled h over pairs, family-wise level {level:g})."]
    if kept:
        shown = ", ".join(f"{a} × {b}" for a, b in kept[:6]) + (f" and {len(kept) - 6} more" if len(kept) > 6 else "")
        notes.append(f"{len(kept)} pair(s) cleared the first round by a wide margin ({shown}); every other pair was "
                     f"tested again, against {refits} refits of a null that keeps those interactions (interaction "
                     "constraints allowing them), so that their spill-over onto other pairs is in the floor too.")
    notes.append(f"{cleared} pair(s) cleared the floor.")
    separable = task != REGRESSION and share < _SEPARABLE_SHARE
    if separable:
        notes.append(_separable_note(share))
    facts = {"null_rounds": recipe.rounds if recipe.boosted else None, "additive_rounds": additive_rounds,
             "additive_family": base.family, "label_change_share": None if task == REGRESSION else share,
             "null_separable": separable, "floor_rounds": 2 if kept else 1, "kept_in_null": kept,
             "refits_total": refits * (2 if kept else 1)}
    return notes, facts


def check_refit_level(refits: int, level: float, *, names: tuple[str, str] = ("null_refits", "level")) -> None:
    """Refuse a refit count whose smallest p-value, ``1 / (refits + 1)``, cannot reach ``level``.

    ``names`` are how the two options are called where they were given (API
    parameters or command-line flags).

    Examples
    --------
    >>> check_refit_level(19, 0.05)
    >>> check_refit_level(10, 0.05)
    Traceback (most recent call last):
    ...
    treeprobe.errors.ParameterError: null_refits=10 cannot reach level 0.05: the smallest p-value of 10 refits is 1/11 = 0.0909; give null_refits >= 19 or level >= 0.0909
    """
    if not level > 0:
        raise ParameterError(f"{names[1]} must be above 0, got {level:g}")
    if np.floor(level * (refits + 1) + 1e-9) < 1:
        smallest = 1.0 / (refits + 1)
        need = int(np.ceil(1.0 / level - 1.0 - 1e-9))
        raise ParameterError(
            f"{names[0]}={refits} cannot reach {names[1]} {level:g}: the smallest p-value of {refits} refits is "
            f"1/{refits + 1} = {smallest:.3g}; give {names[0]} >= {need} or {names[1]} >= {smallest:.3g}")


