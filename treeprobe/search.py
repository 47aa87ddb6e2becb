"""Constraint search: let held-out loss choose which interactions a retrained model may use.

The triage of :mod:`treeprobe.verdicts` says which pairs a model combines; it
cannot say whether allowing a weak or borderline pair pays. This module
answers by retraining. A forward search starts from the additive model (every
feature in its own interaction-constraint group) and, step by step, tries the
interactions the triage ranks highest, keeping the one that most lowers the
cross-validated loss. Every fit is early-stopped, so each variant is scored at
its own best round count, with the recipe, thread and Dask rules of
:mod:`treeprobe.refit` and :mod:`treeprobe.parallel`; the folds are those of
:func:`treeprobe.constraints.validate_constraints` (shared machinery).

The set of groups reported is chosen from the curve of loss against step by
the one-standard-error rule of Breiman, Friedman, Olshen and Stone [1]_
(section 3.4.3; common practice in model selection, e.g. Hastie, Tibshirani
and Friedman [2]_, section 7.10): the simplest set whose loss is within one
standard error of the lowest. Standard errors over folds use the corrected
variance of Nadeau and Bengio [3]_, since the folds' training parts overlap.

Limits
------
The candidates come from the triage, so the search inherits its limits:
H-statistics extrapolate when features are dependent, and pairs the triage
calls dependent are not tried. Lower held-out loss shows that allowing an
interaction helps this model family predict these data; it does not show that
the interaction exists in the world (structure is not causation). The search
is greedy: it may miss a combination whose parts do not help alone.

References
----------
.. [1] L. Breiman, J. H. Friedman, R. A. Olshen and C. J. Stone,
   "Classification and Regression Trees", Wadsworth, 1984, section 3.4.3.
.. [2] T. Hastie, R. Tibshirani and J. Friedman, "The Elements of Statistical
   Learning", 2nd ed., Springer, 2009, section 7.10.
.. [3] C. Nadeau and Y. Bengio, "Inference for the generalization error",
   Machine Learning 52(3), 239-281, 2003.
"""

from __future__ import annotations

import math
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from itertools import combinations
from typing import Any

import numpy as np
import pandas as pd
from joblib import effective_n_jobs

from .checks import check_int, check_n_jobs, check_progress, check_seed
from .constraints import (
    _PAIR_COLUMNS,
    _TRIPLE_COLUMNS,
    LIMITS,
    ConstraintSuggestion,
    FoldContext,
    _check_members,
    _check_strength,
    _class_count,
    _frame_of,
    _group_order,
    _used_features,
    _validation_recipe,
    corrected_standard_error,
    cross_validated_scores,
    fold_size_ratio,
    fold_splits,
)
from .data import model_matrix
from .errors import DataError, ParameterError
from .graph import ForestGraph
from .output import dumps_json, to_jsonable
from .parallel import threads_per_fit
from .refit import PATIENCE, REGRESSION, Recipe, checked_target, round_budget, xgboost_constraint_text

__all__ = ["SearchResult", "search_constraints", "STEP_COLUMNS", "CANDIDATE_COLUMNS", "FOLD_COLUMNS",
           "SOURCE_VERDICTS"]

_SCHEMA = "treeprobe.search/1"
STEP_COLUMNS = ("step", "added", "groups", "allowed_pairs", "loss", "loss_se", "gain", "gain_se", "rounds", "tried")
CANDIDATE_COLUMNS = ("step", "rank", "source", "strength", "added", "allowed_pairs", "loss", "loss_se", "gain",
                     "gain_se", "rounds", "kept")
FOLD_COLUMNS = ("step", "fold", "loss", "rounds")
# Verdicts whose pairs and triples are tried; dependent pairs are not (their H extrapolates), absent ones cannot help.
SOURCE_VERDICTS = ("interaction", "co-split")
_STOP_TEXT = {
    "no_gain": "no candidate lowered the loss by more than its standard error",
    "max_steps": "max_steps reached",
    "no_candidates": "no candidate interaction left",
    "interrupted": "interrupted (Ctrl-C); the finished steps are kept",
}

Groups = tuple[frozenset[int], ...]


# --------------------------------------------------------------------- candidates
@dataclass(frozen=True)
class _Source:
    """A pair or triple the triage ranks: its members (indices), strength, label and tier.

    Tier 0: the triage found evidence (verdict ``interaction``, or a pair it
    marks ``faint``: its h clears the noise floor while small); tier 1: the rest.
    """

    members: frozenset[int]
    strength: float
    label: str
    tier: int = 1


def _pair_sources(triage_result: Any, known: dict[str, int]) -> tuple[list[_Source], set[frozenset[str]]]:
    """Pairs with a source verdict, and the set of pairs sharing paths (for the triples)."""
    pairs = _frame_of(triage_result, "pairs", _PAIR_COLUMNS)
    _check_members(pairs, ["feature_a", "feature_b"], known, "pairs")
    strength = _check_strength(pairs, "pairs")
    sharing_rows = pairs["paths"] > 0 if "paths" in pairs.columns else pairs["verdict"] != "absent"
    sharing = {frozenset((str(a), str(b))) for a, b in pairs.loc[sharing_rows, ["feature_a", "feature_b"]].to_numpy()}
    faint = pairs["faint"].fillna(False).astype(bool) if "faint" in pairs.columns else np.zeros(len(pairs), dtype=bool)
    sources = [_Source(frozenset((known[str(a)], known[str(b)])), float(s), f"{a} × {b}",
                       0 if verdict == "interaction" or weak else 1)
               for a, b, verdict, s, weak in zip(pairs["feature_a"], pairs["feature_b"], pairs["verdict"], strength,
                                                 faint, strict=True)
               if verdict in SOURCE_VERDICTS and a != b]
    return sources, sharing


def _triple_sources(triage_result: Any, known: dict[str, int], sharing: set[frozenset[str]]) -> list[_Source]:
    """Triples with a source verdict whose three pairs all share paths."""
    triples = _frame_of(triage_result, "triples", _TRIPLE_COLUMNS, allow_missing=True)
    if triples.empty:
        return []
    members = ["feature_a", "feature_b", "feature_c"]
    _check_members(triples, members, known, "triples")
    strength = _check_strength(triples, "triples")
    sources = []
    rows = zip(triples[members].astype(str).to_numpy(), triples["verdict"], strength, strict=True)
    for (a, b, c), verdict, s in rows:
        if verdict in SOURCE_VERDICTS and all(frozenset(p) in sharing for p in combinations((a, b, c), 2)):
            sources.append(_Source(frozenset((known[a], known[b], known[c])), float(s), f"{a} × {b} × {c}",
                                   0 if verdict == "interaction" else 1))
    return sources


@dataclass(frozen=True)
class _Space:
    """What the moves are drawn from: sources strongest first, names, pairs never joined, candidates per step."""

    sources: list[_Source]
    names: tuple[str, ...]
    dependent: set[frozenset[int]]
    limit: int


def _space(triage_result: Any, names: tuple[str, ...], limit: int) -> _Space:
    """Candidate pairs and triples, dependent pairs aside.

    Order: those with evidence first (``interaction`` or ``faint``: the weak
    interactions come before stronger co-splits), then strongest first, pairs
    before triples at equal strength.
    """
    known = {name: j for j, name in enumerate(names)}
    pairs, sharing = _pair_sources(triage_result, known)
    ranked = sorted(pairs + _triple_sources(triage_result, known, sharing),
                    key=lambda source: (source.tier, -source.strength))
    table = triage_result.pairs
    dependent = {frozenset((known[str(a)], known[str(b)]))
                 for a, b in table.loc[table["verdict"] == "dependent", ["feature_a", "feature_b"]].to_numpy()}
    return _Space(ranked, names, dependent, limit)


def _normalised(groups: Sequence[frozenset[int]]) -> Groups:
    """Groups without duplicates or groups inside others, in a canonical order."""
    unique = set(groups)
    kept = [g for g in unique if not any(g < other for other in unique)]
    return tuple(sorted(kept, key=lambda g: (-len(g), sorted(g))))


def _group_text(group: frozenset[int], names: Sequence[str]) -> str:
    return "{" + ", ".join(names[j] for j in sorted(group)) + "}"


def _moves(state: Groups, source: _Source, names: Sequence[str]) -> list[tuple[str, Groups]]:
    """What a source can add: join its members into a new group, or add its one outside member to a group."""
    members = source.members
    if any(members <= group for group in state):
        return []
    inside = [group for group in state if group < members]
    if inside:
        largest = max(inside, key=lambda g: (len(g), sorted(g)))
        text = f"add {', '.join(names[j] for j in sorted(members - largest))} to {_group_text(largest, names)}"
    else:
        text = f"join {', '.join(names[j] for j in sorted(members))}"
    moves = [(text, _normalised([*state, members]))]
    for group in state:
        outside = members - group
        if len(outside) == 1 and members & group:
            (extra,) = outside
            grown = [g for g in state if g != group] + [group | {extra}]
            moves.append((f"add {names[extra]} to {_group_text(group, names)}", _normalised(grown)))
    unique: dict[Groups, str] = {}
    for text, groups in moves:
        unique.setdefault(groups, text)
    return [(text, groups) for groups, text in unique.items()]


def _joins_any(groups: Groups, pairs: set[frozenset[int]]) -> bool:
    return any(pair <= group for group in groups for pair in pairs)


def _candidates(state: Groups, space: _Space) -> list[tuple[_Source, str, Groups]]:
    """Up to ``limit`` distinct moves from the current groups, in the order of their sources' strength.

    A move that would put a pair the triage calls dependent into one group is
    skipped: such pairs are no candidates, and a merge must not bring them in.
    """
    found: list[tuple[_Source, str, Groups]] = []
    seen = {state}
    for source in space.sources:
        for text, groups in _moves(state, source, space.names):
            if groups not in seen and not _joins_any(groups, space.dependent):
                seen.add(groups)
                found.append((source, text, groups))
                if len(found) == space.limit:
                    return found
    return found


def _fit_groups(state: Groups, n_features: int) -> list[list[int]]:
    """The groups as the libraries take them: every feature in no group listed alone."""
    listed = {j for group in state for j in group}
    return [sorted(group) for group in state] + [[j] for j in range(n_features) if j not in listed]


def _allowed_pairs(state: Groups) -> int:
    return len({pair for group in state for pair in combinations(sorted(group), 2)})


# --------------------------------------------------------------------- fold losses
@dataclass(frozen=True)
class _Scored:
    """Per-fold held-out losses and best round counts of one set of groups."""

    losses: np.ndarray
    rounds: np.ndarray


@dataclass
class _Run:
    """What the steps share: the folds, every fold loss fitted so far (never fitted twice) and the fit count."""

    context: FoldContext
    splits: list
    metric: str
    n_jobs: int
    progress: bool | None
    done: dict = field(default_factory=dict)
    fits: int = 0

    @property
    def ratio(self) -> float:
        return fold_size_ratio(self.splits)

    def score(self, variants: Sequence[Groups | None], label: str, splits: list | None = None,
              n_jobs: int | None = None) -> list[_Scored]:
        """Fold losses of each variant (None: unconstrained) on ``splits`` (default all folds)."""
        splits = self.splits if splits is None else splits
        n_features = self.context.matrix.shape[1]
        todo = [(variant, split) for variant in dict.fromkeys(variants) for split in splits
                if (variant, split[0]) not in self.done]
        tasks = [(None if variant is None else _fit_groups(variant, n_features), split) for variant, split in todo]
        results = cross_validated_scores(self.context, tasks, n_jobs=self.n_jobs if n_jobs is None else n_jobs,
                                         progress=self.progress, label=label)
        self.fits += len(todo)
        for (variant, split), (scores, rounds) in zip(todo, results, strict=True):
            self.done[(variant, split[0])] = (scores[self.metric], rounds)
        return [_Scored(np.array([self.done[(v, split[0])][0] for split in splits], dtype=float),
                        np.array([self.done[(v, split[0])][1] for split in splits], dtype=int)) for v in variants]

    def se(self, values: np.ndarray) -> float:
        """Corrected standard error of the mean of fold values (Nadeau and Bengio 2003)."""
        return corrected_standard_error(values, self.ratio)


def _say(text: str, progress: bool | None) -> None:
    """A line on standard error (the budget before the search starts) unless ``progress`` is False."""
    if progress is not False:
        print(f"treeprobe: {text}", file=sys.stderr, flush=True)


# --------------------------------------------------------------------- the steps
def _step_row(step: int, added: str, state: Groups, scored: _Scored, gain: np.ndarray | None, tried: int,
              run: _Run, names: Sequence[str]) -> dict:
    return {"step": step, "added": added, "groups": [[names[j] for j in sorted(g)] for g in state],
            "allowed_pairs": _allowed_pairs(state), "loss": float(scored.losses.mean()),
            "loss_se": run.se(scored.losses),
            "gain": math.nan if gain is None else float(gain.mean()),
            "gain_se": math.nan if gain is None else run.se(gain),
            "rounds": int(round(float(np.median(scored.rounds)))), "tried": tried}


def _try_step(run: _Run, step: int, state: Groups, current: _Scored,
              space: _Space) -> tuple[list[dict], tuple[str, Groups, _Scored, np.ndarray] | None]:
    """Score the candidates of one step; the rows for the candidate table and the kept move (None: none passes)."""
    candidates = _candidates(state, space)
    if not candidates:
        return [], None
    scored = run.score([groups for _, _, groups in candidates], f"search step {step}")
    rows, gains = [], []
    for rank, ((source, text, groups), result) in enumerate(zip(candidates, scored, strict=True), start=1):
        gain = current.losses - result.losses
        gains.append(gain)
        rows.append({"step": step, "rank": rank, "source": source.label, "strength": source.strength, "added": text,
                     "allowed_pairs": _allowed_pairs(groups),
                     "loss": float(result.losses.mean()), "loss_se": run.se(result.losses),
                     "gain": float(gain.mean()), "gain_se": run.se(gain),
                     "rounds": int(round(float(np.median(result.rounds)))), "kept": False})
    passing = [i for i, row in enumerate(rows) if row["gain"] > row["gain_se"]]
    if not passing:
        return rows, None
    top = max(passing, key=lambda i: rows[i]["gain"])
    # Within one standard error of the largest gain, the move allowing the fewest pairs (the rule of the choice).
    near = [i for i in passing if rows[i]["gain"] >= rows[top]["gain"] - rows[top]["gain_se"]]
    best = min(near, key=lambda i: (rows[i]["allowed_pairs"], -rows[i]["gain"]))
    rows[best]["kept"] = True
    _, text, groups = candidates[best]
    return rows, (text, groups, scored[best], gains[best])


def _forward(run: _Run, start: Groups, first: _Scored, space: _Space,
             max_steps: int) -> tuple[list[dict], list[dict], list[Groups], str]:
    """The forward search: rows of the kept steps and of all candidates, each step's groups, and why it stopped."""
    steps = [_step_row(0, "start: every feature alone", start, first, None, 0, run, space.names)]
    states, tried, state, current = [start], [], start, first
    reason = "max_steps"
    try:
        for step in range(1, max_steps + 1):
            rows, kept = _try_step(run, step, state, current, space)
            tried += rows
            if kept is None:
                reason = "no_candidates" if not rows else "no_gain"
                break
            text, state, current, gain = kept
            states.append(state)
            steps.append(_step_row(step, text, state, current, gain, len(rows), run, space.names))
    except KeyboardInterrupt:
        reason = "interrupted"
    return steps, tried, states, reason


def _one_standard_error(steps: pd.DataFrame) -> tuple[int, int, float]:
    """The simplest step whose loss is within one standard error of the lowest; the lowest step; the threshold."""
    best = int(steps["loss"].idxmin())
    threshold = float(steps.at[best, "loss"] + steps.at[best, "loss_se"])
    chosen = int(steps.index[steps["loss"] <= threshold][0])
    return int(steps.at[chosen, "step"]), int(steps.at[best, "step"]), threshold


def _fold_frame(run: _Run, states: list[Groups]) -> pd.DataFrame:
    rows = [{"step": step, "fold": split[0], "loss": run.done[(state, split[0])][0],
             "rounds": run.done[(state, split[0])][1]} for step, state in enumerate(states) for split in run.splits]
    return pd.DataFrame(rows, columns=list(FOLD_COLUMNS))


# --------------------------------------------------------------------- the result
def _suggestion(state: Groups, names: tuple[str, ...], used: set[int], graph: ForestGraph, recipe: Recipe,
                notes: list[str]) -> ConstraintSuggestion:
    """The chosen groups in the export form of :func:`treeprobe.constraints.suggest_constraints`."""
    grouped = {j for group in state for j in group}
    ordered = _group_order([sorted(g) for g in state] + [[j] for j in sorted(used - grouped)], names)
    unused = [j for j in range(len(names)) if j not in used and j not in grouped]
    export = ordered + [[j] for j in unused]
    counts = np.bincount([j for group in state for j in group], minlength=len(names))
    substituted = recipe.library == "sklearn" and recipe.family != graph.provenance.estimator
    return ConstraintSuggestion(
        groups=[[names[j] for j in group] for group in ordered], group_indices=ordered,
        unused=[names[j] for j in unused], overlapping=bool((counts > 1).any()), notes=notes,
        xgboost_param=xgboost_constraint_text(export), xgboost_param_by_name=[[names[j] for j in g] for g in export],
        lightgbm_param=[list(g) for g in export], alternative=None, feature_names=names, library=graph.library,
        objective=graph.objective, estimator=recipe.family if substituted else graph.provenance.estimator,
    )


@dataclass(frozen=True, eq=False)
class SearchResult:
    """The forward constraint search: the loss curve, the chosen groups and their export.

    Attributes
    ----------
    steps : DataFrame
        One row per kept step (``STEP_COLUMNS``): ``step`` (0 = every feature
        alone, the additive model), ``added`` (the move kept at this step),
        ``groups`` (the groups of two or more features, lists of names),
        ``allowed_pairs`` (feature pairs that may share a path), ``loss``
        (mean held-out loss over the folds: ``rmse`` for regression,
        ``log_loss`` for classifiers; ``facts["metric"]``), ``loss_se`` (its
        corrected standard error), ``gain`` (mean paired fold difference
        previous step - this step; NaN at step 0), ``gain_se`` (its corrected
        standard error), ``rounds`` (median best round count over the folds)
        and ``tried`` (candidates scored at this step).
    candidates : DataFrame
        Every candidate scored (``CANDIDATE_COLUMNS``): ``step``, ``rank``
        (order of its source's strength), ``source`` (the triaged pair or
        triple), ``strength``, ``added`` (the move), ``allowed_pairs``,
        ``loss``, ``loss_se``, ``gain``, ``gain_se``, ``rounds`` and ``kept``.
    folds : DataFrame
        Fold values of the kept steps (``FOLD_COLUMNS``): ``step``, ``fold``
        (1..K), ``loss``, ``rounds``.
    chosen_step : int
        The step the one-standard-error rule picks.
    chosen_groups : list of list of str
        Its groups of two or more features (every other feature stands alone).
    recommended_rounds : int
        Median best round count of the chosen step over the folds: the
        ``num_boost_round`` to train the constrained model with.
    unconstrained : dict
        The reference without constraints: ``loss``, ``loss_se``, ``rounds``,
        ``fold_losses``, ``fold_rounds``, and the chosen step's paired
        difference to it, ``chosen_minus_unconstrained`` and its ``_se``.
    suggestion : ConstraintSuggestion
        The chosen groups with the XGBoost and LightGBM parameters.
    facts : dict
        ``metric``, ``library``, ``family``, ``objective``, ``task``,
        ``n_folds``, ``n_rows``, ``max_steps``, ``max_candidates``,
        ``sources`` (candidate pairs and triples), ``stop_reason`` (one of
        ``no_gain``, ``max_steps``, ``no_candidates``, ``interrupted``),
        ``stop_text``, ``interrupted``, ``best_step``, ``threshold``
        (lowest loss + its standard error), ``variance_factor``
        (``1/K + n_test/n_train``), ``fits``, ``estimated_fits``,
        ``seconds_per_fit`` (the timed first fit, unconstrained), ``estimated_seconds``,
        ``seconds``, ``threads_per_fit``, ``max_rounds``, ``patience``,
        ``recipe`` and ``recipe_text``.
    notes : list of str
        Sentences for the reader; the first states the outcome.
    """

    steps: pd.DataFrame
    candidates: pd.DataFrame
    folds: pd.DataFrame
    chosen_step: int
    chosen_groups: list[list[str]]
    recommended_rounds: int
    unconstrained: dict
    suggestion: ConstraintSuggestion
    facts: dict
    notes: list[str]
    limits: str = LIMITS

    def python_snippet(self, library: str | None = None) -> str:
        """Lines to paste into a training script: the chosen groups and ``num_boost_round`` (see
        :meth:`ConstraintSuggestion.python_snippet`)."""
        return self.suggestion.python_snippet(library, num_boost_round=self.recommended_rounds)

    def to_dict(self) -> dict:
        """JSON-ready dict: ``schema``, ``limits`` and ``search`` (``metric``, ``steps``, ``chosen`` with its
        ``groups``, parameters and snippets, ``unconstrained``, ``candidates``, ``folds``, ``facts``, ``notes``)."""
        chosen = self.steps[self.steps["step"] == self.chosen_step].iloc[0]
        return to_jsonable({"schema": _SCHEMA, "limits": self.limits, "search": {
            "metric": self.facts["metric"], "steps": self.steps,
            "chosen": {"step": self.chosen_step, "groups": self.chosen_groups, "loss": chosen["loss"],
                       "loss_se": chosen["loss_se"], "num_boost_round": self.recommended_rounds,
                       "xgboost_param": self.suggestion.xgboost_param, "lightgbm_param": self.suggestion.lightgbm_param,
                       "export_groups": self.suggestion.groups,
                       "snippets": {library: self.python_snippet(library) for library in ("xgboost", "lightgbm")}},
            "unconstrained": self.unconstrained, "candidates": self.candidates, "folds": self.folds,
            "facts": self.facts, "notes": self.notes,
        }})

    def to_json(self) -> str:
        """:meth:`to_dict` as indented JSON text."""
        return dumps_json(self.to_dict())


def _outcome(steps: pd.DataFrame, chosen: int, free: dict, metric: str) -> str:
    row = steps[steps["step"] == chosen].iloc[0]
    groups = "; ".join("{" + ", ".join(g) + "}" for g in row["groups"]) or "none (every feature alone)"
    start = steps.iloc[0]
    compare = ("below" if free["chosen_minus_unconstrained"] + free["chosen_minus_unconstrained_se"] < 0 else
               "not clearly below" if free["chosen_minus_unconstrained"] < 0 else "not below")
    return (f"Chosen by the one-standard-error rule: step {chosen}, groups {groups}. Held-out {metric} "
            f"{row['loss']:.4g} ± {row['loss_se']:.2g}, {compare} the unconstrained model's {free['loss']:.4g} ± "
            f"{free['loss_se']:.2g} (paired difference {free['chosen_minus_unconstrained']:+.4g} ± "
            f"{free['chosen_minus_unconstrained_se']:.2g}); every feature alone: {start['loss']:.4g}.")


def _checked_triage(triage_result: Any, graph: ForestGraph, model_X: Any, *, random_state: int, n_jobs: int,
                    progress: bool | None) -> tuple[Any, list[str]]:
    """The given triage (same features as the model), or one run here: H and dependence, no noise-floor refits."""
    if triage_result is None:
        from .verdicts import triage

        result = triage(graph, model_X, None, triples=True, null_refits=0, random_state=random_state, n_jobs=n_jobs,
                        progress=progress)
        return result, ["The candidates come from a triage run by the search without noise-floor refits: it only "
                        "ranks pairs and triples by strength and sets dependent pairs aside; held-out loss decides."]
    ensemble = getattr(triage_result, "ensemble", None)
    names = getattr(ensemble, "feature_names", None)
    if names is None or tuple(names) != tuple(graph.feature_names):
        raise DataError("triage_result was computed on a model with other features than this one "
                        f"({', '.join(map(str, (names or ())[:6]))} against {', '.join(graph.feature_names[:6])})")
    return triage_result, []


def _dependent_note(triage_result: Any) -> list[str]:
    pairs = triage_result.pairs
    dependent = pairs[pairs["verdict"] == "dependent"]
    if dependent.empty:
        return []
    named = ", ".join(f"({a}, {b})" for a, b in dependent[["feature_a", "feature_b"]].astype(str).to_numpy()[:5])
    more = f" and {len(dependent) - 5} more" if len(dependent) > 5 else ""
    return [f"Pairs the triage calls dependent are not tried (their H extrapolates): {named}{more}."]


def _budget(run: _Run, n_sources: int, max_steps: int, max_candidates: int) -> dict:
    """Fits at most, and the time of one fit (the unconstrained model on the first fold, kept) scaled to them."""
    folds = len(run.splits)
    estimated = folds * (2 + min(max_steps, n_sources) * max_candidates)
    _say(f"search: at most {estimated} early-stopped fits ({folds} folds x (start + unconstrained + up to "
         f"{min(max_steps, n_sources)} steps x {max_candidates} candidates))", run.progress)
    started = time.perf_counter()
    # In this process (with the workers' thread count), so that starting the worker pool is not timed as a fit.
    run.score([None], "search: timing one fit", splits=run.splits[:1], n_jobs=1)
    per_fit = time.perf_counter() - started
    workers = max(1, effective_n_jobs(run.n_jobs))
    seconds = per_fit * estimated / workers
    _say(f"search: one unconstrained fit took {per_fit:.2f} s, so at most about {seconds:.0f} s on {workers} "
         "worker(s) (a rough guide: constrained fits often need more rounds; Ctrl-C stops and keeps the finished "
         "steps)", run.progress)
    return {"estimated_fits": estimated, "seconds_per_fit": per_fit, "estimated_seconds": seconds}


def _checked_options(folds: Any, max_steps: Any, max_candidates: Any, params: Any, random_state: Any, n_jobs: Any,
                     progress: Any) -> tuple:
    folds = check_int("folds", folds, low=2)
    max_steps = check_int("max_steps", max_steps, low=1)
    max_candidates = check_int("max_candidates", max_candidates, low=1)
    if params is not None and not isinstance(params, dict):
        raise ParameterError(f"params must be a dict of training parameters, got {type(params).__name__}")
    if params and ({"interaction_constraints", "interaction_cst"} & params.keys()):
        raise ParameterError("params must not hold interaction constraints; the search chooses them")
    return (folds, max_steps, max_candidates, check_seed("random_state", random_state, allow_none=False),
            check_n_jobs(n_jobs), check_progress(progress))


def search_constraints(
    model: Any,
    X: Any,
    y: Any,
    *,
    triage_result: Any = None,
    folds: int = 5,
    max_steps: int = 10,
    max_candidates: int = 5,
    params: dict | None = None,
    random_state: int = 0,
    n_jobs: int = 1,
    progress: bool | None = None,
) -> SearchResult:
    """Choose interaction-constraint groups by cross-validated loss: a forward search from the additive model.

    Parameters
    ----------
    model : model object, model file or ForestGraph
        A fitted XGBoost, LightGBM or scikit-learn model whose library,
        objective and hyperparameters every refit reuses
        (:func:`treeprobe.refit.training_recipe`).
    X : DataFrame or array of shape (n_rows, n_features)
        Training data with the model's columns (matched by name for a DataFrame).
    y : array of shape (n_rows,)
        Target: numbers for regression, class labels for classification.
    triage_result : TriageResult, optional
        The triage whose pairs and triples supply the candidates. By default
        a triage is run here (with triples, without noise-floor refits: the
        candidates need a ranking, not a verdict on the noise).
    folds : int, default 5
        Cross-validation folds (>= 2), shared by every variant.
    max_steps : int, default 10
        Most interactions added.
    max_candidates : int, default 5
        Candidates scored per step, strongest sources first.
    params : dict, optional
        Training parameters overriding those read from the model.
    random_state : int, default 0
        Seed of the folds, the inner early-stopping splits and the libraries.
    n_jobs : int, default 1
        Parallel workers for the fits (joblib; -1 = all cores; inside joblib's
        Dask backend the fits run on the cluster). One thread per fit in
        workers, every core for a lone fit.
    progress : bool, optional
        Progress bars on standard error: None (default) on a terminal only,
        True always, False never. The budget lines (fits and time estimate)
        are printed on standard error unless ``progress`` is False.

    Returns
    -------
    SearchResult

    Raises
    ------
    ParameterError
        An option outside what it accepts (the message names it).
    DataError
        X or y not matching the model, or a triage of another model.
    UnsupportedModelError
        A model treeprobe cannot retrain (ranking objectives, unknown libraries).

    Notes
    -----
    Candidates (sources): pairs with verdict interaction or co-split, and
    triples with such a verdict whose three pairs all share paths, ranked by
    the triage's ``strength``. From the current groups a source yields moves:
    join its members into a new group (groups may overlap; XGBoost, LightGBM
    and HistGradientBoosting keep each path inside one group), or add its one
    outside member to a group holding the others. A move that would put a
    pair the triage calls dependent into one group is skipped. A step scores
    the first ``max_candidates`` distinct moves.

    Each variant ``v`` is fitted on each outer fold ``k`` with early stopping
    on an inner split (:func:`treeprobe.refit.fit_early_stopped`, seed
    ``random_state + k`` for every variant) and scored on the fold's held-out
    rows: loss ``L_vk``. With ``s^2`` the sample variance over the K folds
    and ``r`` the mean ``n_test / n_train``, the corrected standard error of
    a mean over folds is ``SE = sqrt((1/K + r) s^2)`` (Nadeau and Bengio
    [3]_). A candidate ``c`` of the current step ``p`` gains
    ``g = mean_k(L_pk - L_ck)``, with ``SE(g)`` from the paired differences.
    Candidates with ``g > SE(g)`` lower the loss; among them, with ``c*``
    the one of largest gain, the step keeps the candidate allowing the fewest
    pairs among those with ``g >= g(c*) - SE(g(c*))`` (the one-standard-error
    rule below, applied within the step, so that a group with a needless
    extra member does not win on noise; on equal pairs, the larger gain). The
    search stops when no candidate lowers the loss, when none is left, at
    ``max_steps``, or on Ctrl-C (KeyboardInterrupt), keeping the finished
    steps.

    One-standard-error rule ([1]_, section 3.4.3; [2]_, section 7.10; common
    practice): with ``b`` the step of lowest mean loss, the chosen step is
    the first (simplest) step whose mean loss is at most
    ``L_b + SE(L_b)``.

    Before the search starts the number of fits (at most
    ``K * (2 + min(max_steps, sources) * max_candidates)``) and one timed
    fit (unconstrained, first fold), scaled to them, are printed (see
    ``progress``).

    References
    ----------
    .. [1] L. Breiman, J. H. Friedman, R. A. Olshen and C. J. Stone,
       "Classification and Regression Trees", Wadsworth, 1984, section 3.4.3.
    .. [2] T. Hastie, R. Tibshirani and J. Friedman, "The Elements of
       Statistical Learning", 2nd ed., Springer, 2009, section 7.10.
    .. [3] C. Nadeau and Y. Bengio, "Inference for the generalization error",
       Machine Learning 52(3), 239-281, 2003.
    """
    started = time.perf_counter()
    folds, max_steps, max_candidates, random_state, n_jobs, progress = _checked_options(
        folds, max_steps, max_candidates, params, random_state, n_jobs, progress)
    if isinstance(model, dict):
        raise ParameterError("search_constraints needs a fitted model (its triage supplies the candidates), "
                             "not a parameter dict")
    recipe, graph = _validation_recipe(model, library=None, params=params, num_boost_round=None)
    matrix = model_matrix(graph, X)
    target = checked_target(y, matrix.shape[0], recipe.task)
    if matrix.shape[0] < 2 * folds:
        raise DataError(f"X has {matrix.shape[0]} rows, too few for {folds} folds")
    triage_result, notes = _checked_triage(triage_result, graph, X, random_state=random_state, n_jobs=n_jobs,
                                           progress=progress)
    names = graph.feature_names
    space = _space(triage_result, names, max_candidates)
    used = _used_features(triage_result, {name: j for j, name in enumerate(names)})
    recipe, n_classes = _class_count(recipe, target)
    context = FoldContext(recipe, matrix, target, [], n_classes, random_state, threads_per_fit(n_jobs))
    run = _Run(context, fold_splits(context, folds), "rmse" if recipe.task == REGRESSION else "log_loss", n_jobs,
               progress)
    start: Groups = ()
    budget = _budget(run, len(space.sources), max_steps, max_candidates)
    first, free = run.score([start, None], "search: start and unconstrained")
    steps_rows, tried_rows, states, reason = _forward(run, start, first, space, max_steps)
    return _result(run, graph, recipe, triage_result, steps_rows, tried_rows, states, free, used, reason,
                   notes=notes, budget=budget, options={"max_steps": max_steps, "max_candidates": max_candidates,
                                                        "sources": len(space.sources)}, started=started)


def _result(run: _Run, graph: ForestGraph, recipe: Recipe, triage_result: Any, steps_rows: list[dict],
            tried_rows: list[dict], states: list[Groups], free: _Scored, used: set[int], reason: str, *,
            notes: list[str], budget: dict, options: dict, started: float) -> SearchResult:
    steps = pd.DataFrame(steps_rows, columns=list(STEP_COLUMNS))
    chosen, best, threshold = _one_standard_error(steps)
    folds = _fold_frame(run, states)
    chosen_rounds = folds.loc[folds["step"] == chosen, "rounds"].to_numpy()
    recommended = int(round(float(np.median(chosen_rounds))))
    chosen_losses = folds.loc[folds["step"] == chosen, "loss"].to_numpy()
    unconstrained = {"loss": float(free.losses.mean()), "loss_se": run.se(free.losses),
                     "rounds": int(round(float(np.median(free.rounds)))), "fold_losses": free.losses.tolist(),
                     "fold_rounds": free.rounds.tolist(),
                     "chosen_minus_unconstrained": float((chosen_losses - free.losses).mean()),
                     "chosen_minus_unconstrained_se": run.se(chosen_losses - free.losses)}
    substituted = recipe.library == "sklearn" and recipe.family != graph.provenance.estimator
    family_note = ([f"{graph.provenance.estimator} has no interaction constraints: the search ran on {recipe.family}, "
                    "the nearest family that has them, and its groups and round counts are for that family."]
                   if substituted else [])
    budget_limit = round_budget(recipe)
    capped = int((folds["rounds"] >= budget_limit).sum())
    all_notes = [_outcome(steps, chosen, unconstrained, run.metric), *family_note,
                 f"The search stopped: {_STOP_TEXT[reason]} (after step {int(steps['step'].max())}).",
                 *notes, *_dependent_note(triage_result), *recipe.notes, recipe.describe()]
    if capped:
        all_notes.append(f"{capped} fold fit(s) of the kept steps reached the round budget ({budget_limit}); their "
                         "loss may be overstated.")
    chosen_state = states[chosen]
    names = graph.feature_names
    facts = {"metric": run.metric, "library": recipe.library, "family": recipe.family, "objective": recipe.objective,
             "task": recipe.task, "n_folds": len(run.splits), "n_rows": int(run.context.matrix.shape[0]), **options,
             "stop_reason": reason, "stop_text": _STOP_TEXT[reason], "interrupted": reason == "interrupted",
             "best_step": best, "threshold": threshold, "variance_factor": 1.0 / len(run.splits) + run.ratio,
             "fits": run.fits, **budget, "seconds": time.perf_counter() - started,
             "threads_per_fit": run.context.threads, "max_rounds": budget_limit, "patience": PATIENCE,
             "recipe": recipe.to_dict(), "recipe_text": recipe.describe()}
    overlap = ([] if len({j for g in chosen_state for j in g}) == sum(len(g) for g in chosen_state) else
               ["Groups overlap. XGBoost 3.2.0, LightGBM 4.7.0 and scikit-learn's HistGradientBoosting keep each path "
                "inside one group, so they allow exactly the pairs within a group."])
    suggestion = _suggestion(chosen_state, names, used, graph, recipe,
                             [f"Chosen by held-out loss (treeprobe.search_constraints): step {chosen} of "
                              f"{int(steps['step'].max())}.", *overlap])
    return SearchResult(steps=steps, candidates=pd.DataFrame(tried_rows, columns=list(CANDIDATE_COLUMNS)), folds=folds,
                        chosen_step=chosen, chosen_groups=[[names[j] for j in sorted(g)] for g in chosen_state],
                        recommended_rounds=recommended, unconstrained=unconstrained, suggestion=suggestion, facts=facts,
                        notes=all_notes)
