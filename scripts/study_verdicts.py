"""Calibration study of ``treeprobe.triage``: how often are its verdicts right on data whose truth we know?

What it measures
----------------
Each scenario is a seeded synthetic data set of our own making (see
:func:`make_scenario`): independent features, one strongly dependent pair with
additive effects only, a few noise features without any effect, additive main
effects, one to three strong interaction terms and, in about two thirds of the
scenarios, a weak one. A gradient-boosted model (XGBoost or LightGBM,
regression or binary, sometimes deliberately overfit) is fitted to it and
``treeprobe.triage(model, X, y, random_state=seed, n_jobs=JOBS)`` runs with the
library's defaults. The truth of every pair is the H-statistic of the *true*
signal function on the same rows (Friedman and Popescu 2008, eq. 44: the root
mean square of the pair's interaction part, unnormalised), divided by the
standard deviation of the signal (binary tasks: of the true logit, since the
model's statistics are on the margin). The report gives, each with a 95% Wilson
score interval (E. B. Wilson, "Probable inference, the law of succession, and
statistical inference", JASA 22:209-212, 1927): precision of the
``interaction`` verdict (overall, by task, by library), recall of strong (true
size >= 10%) interactions and by size band, how weak (5-10%) interactions are
caught (``interaction`` or flagged ``faint``), false-positive rates by pair
type, how often the dependent pair is called ``dependent``, ``faint`` flags on
pairs without interaction, wall times, and with ``--baseline-src`` the same
for an older source tree run on the same scenarios in the same run (new/old
time ratio). It also lists every false positive. ``--level`` and
``--null-refits`` change the studied triage's options (the baseline keeps its
defaults); ``--baseline-from FILE`` takes the baseline runs from an earlier
study of the same scenarios (data fingerprints checked) instead of running
them, so that a variant's time ratio costs one side only.

How to run
----------
::

    PYTHONPATH=$PWD python scripts/study_verdicts.py --scenarios 45 --seed 0 --jobs 2 --out study.jsonl \\
        [--baseline-src /path/to/old/checkout] [--resume] [--summary-json summary.json]
    PYTHONPATH=$PWD python scripts/study_verdicts.py --report study.jsonl   # re-print the report

Records are appended to ``--out`` one JSON line per scenario and flushed, so an
interrupted run loses at most the scenario in progress; ``--resume`` skips the
scenarios already there. ``--size small`` shrinks rows and trees (for tests).

Cost
----
Each triage runs in a fresh Python process (the studied code and the baseline
alike, so both start equally cold). Measured on the 2-core development machine
under a load average of 2-3.5 (full size, ``--jobs 2``, 6 scenarios): 5-7 s of
triage per scenario, about 1 s of model fit and 2-3 s of process start and
truth, so about 8 s per scenario and side: the 45-scenario study takes roughly
6 minutes, twice that with a baseline of similar speed.
"""

from __future__ import annotations

import argparse
import hashlib
import importlib.util
import json
import math
import os
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from itertools import combinations
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

# --------------------------------------------------------------------- constants
TERM_KINDS = ("product", "sine_product", "thresholds", "maximum", "square_product", "three_way")
WEAK_KINDS = ("product", "sine_product")
MAIN_FORMS = ("linear", "sine", "step", "square")
# Rough inverse of each strong kind's interaction spread at unit coefficient on unit-spread features, so that
# a coefficient means about the same size whatever the kind. Only a scale: the measured truth decides the band.
_TERM_UNIT = {"product": 1.0, "sine_product": 1.5, "thresholds": 4.0, "maximum": 3.0, "square_product": 0.7,
              "three_way": 1.0}
BANDS = ((0.0, 0.05, "<5%"), (0.05, 0.10, "5-10%"), (0.10, 0.20, "10-20%"), (0.20, math.inf, ">20%"))
STRONG = 0.10
# The family-wise level triage runs at in the study (its default), and the triage options a study may change.
LEVEL = 0.05
DEFAULT_OPTIONS = {"level": LEVEL, "null_refits": 19}
PAIR_TYPES = ("true", "noise", "additive", "dependent")
WILSON_Z = 1.959963984540054  # the standard normal's 97.5% quantile
TRUTH_ROWS = 500
RESULT_PREFIX = "STUDY-RESULT "
RUN_FIELDS = ("verdict", "faint", "p_value", "p_adjusted", "effect", "h", "dependence", "listed")
# Kept for studying misses and false positives: the numbers the verdict rule read.
DIAGNOSTICS = ("h2", "h2_low", "h_low", "null_h")


@dataclass(frozen=True)
class SizeSpec:
    """Row and tree ranges of one size of study (both ends included)."""

    rows: tuple[int, int]
    overfit_rows: tuple[int, int]
    trees: tuple[int, int]
    overfit_trees: tuple[int, int]
    truth_rows: int


SIZES = {
    "full": SizeSpec(rows=(2000, 5000), overfit_rows=(2000, 2200), trees=(300, 500), overfit_trees=(400, 500),
                     truth_rows=TRUTH_ROWS),
    "small": SizeSpec(rows=(1800, 2200), overfit_rows=(1000, 1200), trees=(150, 250), overfit_trees=(150, 200),
                      truth_rows=300),
}


# --------------------------------------------------------------------- the signal
def _term_value(kind: str, columns: list[np.ndarray], cuts: tuple[float, ...]) -> np.ndarray:
    a, b = columns[0], columns[1]
    if kind == "product":
        return a * b
    if kind == "sine_product":
        return np.sin(a) * b
    if kind == "thresholds":
        return ((a > cuts[0]) & (b > cuts[1])).astype(float)
    if kind == "maximum":
        return np.maximum(a, b)
    if kind == "square_product":
        return a * b**2
    return a * b * columns[2]


@dataclass(frozen=True)
class Term:
    """One interaction term ``coefficient * form(features)``; ``cuts`` are the thresholds of the threshold form."""

    kind: str
    features: tuple[int, ...]
    coefficient: float
    cuts: tuple[float, ...] = ()
    weak: bool = False

    def value(self, X: np.ndarray) -> np.ndarray:
        return self.coefficient * _term_value(self.kind, [X[:, j] for j in self.features], self.cuts)


@dataclass(frozen=True)
class MainEffect:
    """One additive effect ``coefficient * form(x - centre)`` of one feature."""

    feature: int
    form: str
    coefficient: float
    centre: float

    def value(self, X: np.ndarray) -> np.ndarray:
        z = X[:, self.feature] - self.centre
        shape = {"linear": z, "sine": np.sin(1.5 * z), "step": (z > 0).astype(float), "square": z**2}[self.form]
        return self.coefficient * shape


@dataclass(frozen=True, eq=False)
class Scenario:
    """A known-truth data set: features, the signal function that made the target, the target, the model recipe.

    ``signal(X)`` is the regression function (regression) or the logit of
    P(y = 1) (binary), a fixed function of the feature columns. ``notes``
    holds drawn targets worth keeping (the R² aimed at, for regression).
    """

    seed: int
    task: str
    library: str
    overfit: bool
    names: tuple[str, ...]
    noise: tuple[int, ...]
    dependent: tuple[int, int]
    mains: tuple[MainEffect, ...]
    terms: tuple[Term, ...]
    gain: float
    offset: float
    noise_sd: float
    params: dict
    X: np.ndarray
    y: np.ndarray
    size: str = "full"
    notes: dict = field(default_factory=dict)

    def raw_signal(self, X: np.ndarray) -> np.ndarray:
        X = np.asarray(X, dtype=float)
        total = np.zeros(X.shape[0])
        for part in (*self.mains, *self.terms):
            total = total + part.value(X)
        return total

    def signal(self, X: np.ndarray) -> np.ndarray:
        return self.gain * self.raw_signal(X) + self.offset

    def frame(self) -> pd.DataFrame:
        return pd.DataFrame(self.X, columns=list(self.names))

    def term_pairs(self) -> list[tuple[int, int]]:
        """Pairs of features that share an interaction term, sorted."""
        return sorted({pair for term in self.terms for pair in combinations(sorted(term.features), 2)})

    def pair_type(self, a: int, b: int) -> str:
        if a in self.noise or b in self.noise:
            return "noise"
        if {a, b} == set(self.dependent):
            return "dependent"
        if tuple(sorted((a, b))) in self.term_pairs():
            return "true"
        return "additive"


# --------------------------------------------------------------------- the generator
def _design(seed: int, rng: np.random.Generator, spec: SizeSpec) -> dict:
    """Task, library, overfit flag (fixed by the seed so that every run has the same mix), rows and feature counts."""
    overfit = seed % 5 == 2
    n_noise = int(rng.integers(2, 5))
    low_rows, high_rows = spec.overfit_rows if overfit else spec.rows
    return {"task": "binary" if seed % 3 == 0 else "regression",
            "library": "xgboost" if seed % 2 == 0 else "lightgbm",
            "overfit": overfit,
            "n_rows": int(rng.integers(low_rows, high_rows + 1)),
            "n_noise": n_noise,
            # At least five features left for terms, so one strong and the weak term never share a feature.
            "n_features": int(rng.integers(max(8, n_noise + 7), 15))}


def _features(rng: np.random.Generator, n_rows: int, n_features: int, dependent: tuple[int, int]) -> np.ndarray:
    """Independent normal or uniform columns (unit spread, random location), and one dependent pair."""
    X = np.empty((n_rows, n_features))
    for j in range(n_features):
        location = rng.uniform(-1.0, 1.0)
        if rng.random() < 0.5 or j == dependent[0]:
            X[:, j] = location + rng.standard_normal(n_rows)
        else:
            X[:, j] = location + rng.uniform(-math.sqrt(3.0), math.sqrt(3.0), n_rows)
    # For a bivariate normal, Spearman's rho_s = (6 / pi) asin(rho / 2) (K. Pearson 1907; the formula is
    # quoted from memory, and the tests check the result with scipy's spearmanr): invert it for the noise
    # that gives the Spearman correlation drawn.
    spearman = rng.uniform(0.86, 0.94)
    pearson = 2.0 * math.sin(math.pi * spearman / 6.0)
    X[:, dependent[1]] = X[:, dependent[0]] + math.sqrt(1.0 / pearson**2 - 1.0) * rng.standard_normal(n_rows)
    return X


def _strong_terms(rng: np.random.Generator, pool: list[int], X: np.ndarray, reserve: int) -> list[Term]:
    """One to three strong terms on disjoint features of ``pool`` (at most one three-way), leaving ``reserve`` free."""
    wanted = int(rng.integers(1, 4))
    kinds = [str(k) for k in rng.choice(TERM_KINDS, size=wanted, replace=True)]
    kinds = [k for i, k in enumerate(kinds) if k != "three_way" or "three_way" not in kinds[:i]]
    terms: list[Term] = []
    free = list(pool)
    for kind in kinds:
        width = 3 if kind == "three_way" else 2
        if len(free) - width < reserve and terms:
            break
        chosen, free = tuple(free[:width]), free[width:]
        cuts = tuple(float(np.quantile(X[:, j], rng.uniform(0.3, 0.7))) for j in chosen[:2]) if kind == "thresholds" else ()
        magnitude = math.exp(rng.uniform(math.log(0.4), math.log(2.0)))
        terms.append(Term(kind, chosen, float(rng.choice([-1.0, 1.0]) * magnitude * _TERM_UNIT[kind]), cuts))
    return terms


def _main_effects(rng: np.random.Generator, X: np.ndarray, pool: list[int], in_terms: set[int],
                  dependent: tuple[int, int]) -> list[MainEffect]:
    """An additive effect for every feature of the pool outside the terms and both dependent features; half of
    the interacting features get one too."""
    mains = []
    for j in sorted([*pool, *dependent]):
        if j in in_terms and rng.random() < 0.5:
            continue
        form = str(rng.choice(MAIN_FORMS))
        centre = float(np.median(X[:, j]) + rng.uniform(-0.5, 0.5))
        magnitude = rng.uniform(0.5, 1.5)
        mains.append(MainEffect(j, form, float(rng.choice([-1.0, 1.0]) * magnitude), centre))
    return mains


def _weak_coefficient(share: float, rest: np.ndarray, factors: tuple[np.ndarray, np.ndarray]) -> float:
    """Coefficient c of the weak term c g(a) h(b) whose interaction spread is ``share`` of the signal's spread.

    For independent a, b the interaction part of g(a) h(b) is
    (g - E g)(h - E h), of spread sd(g) sd(h) = u. With w = g h and r = rest, solve
    c u = share * sd(r + c w), i.e. c^2 (u^2 - s^2 var w) - 2 s^2 cov(r, w) c - s^2 var r = 0.
    """
    g, h = factors
    w = g * h
    u2 = float(np.var(g) * np.var(h))
    s2 = share**2
    quadratic = u2 - s2 * float(np.var(w))
    linear = -2.0 * s2 * float(np.cov(rest, w, bias=True)[0, 1])
    constant = -s2 * float(np.var(rest))
    return (-linear + math.sqrt(linear**2 - 4.0 * quadratic * constant)) / (2.0 * quadratic)


def _weak_term(rng: np.random.Generator, free: list[int], X: np.ndarray, rest: np.ndarray) -> Term:
    kind = str(rng.choice(WEAK_KINDS))
    a, b = free[0], free[1]
    g = np.sin(X[:, a]) if kind == "sine_product" else X[:, a]
    # Inside the 5-10% band with a margin, since the truth is re-measured on a row sample.
    coefficient = _weak_coefficient(rng.uniform(0.06, 0.085), rest, (g, X[:, b]))
    return Term(kind, (a, b), float(rng.choice([-1.0, 1.0]) * coefficient), weak=True)


def _model_params(rng: np.random.Generator, design: dict, spec: SizeSpec) -> dict:
    """The boosting recipe: ordinary, or overfit (deep, fast, many rounds, no regularisation)."""
    if design["overfit"]:
        trees, depth, rate = int(rng.integers(spec.overfit_trees[0], spec.overfit_trees[1] + 1)), 6, rng.uniform(0.2, 0.3)
    else:
        trees, depth, rate = int(rng.integers(spec.trees[0], spec.trees[1] + 1)), int(rng.integers(4, 7)), rng.uniform(0.05, 0.1)
    params: dict[str, Any] = {"n_estimators": trees, "max_depth": depth, "learning_rate": round(float(rate), 4)}
    if design["library"] == "lightgbm":
        params["num_leaves"] = 2**depth if design["overfit"] else min(31, 2**depth)
        if design["overfit"]:
            # LightGBM's own floor on a leaf's hessian (1e-3) stays: at 0 a binary fit can stop with
            # "Check failed: (best_split_info.left_count) > (0)" (seen on scenario 27).
            params.update(reg_lambda=0.0, min_child_samples=2, min_child_weight=1e-3)
    elif design["overfit"]:
        params.update(reg_lambda=0.0, min_child_weight=0.0)
    return params


def make_scenario(seed: int, *, size: str = "full") -> Scenario:
    """The seeded known-truth scenario number ``seed`` (``size``: "full" or "small", see ``SIZES``).

    Binary when ``seed % 3 == 0``, XGBoost for even seeds, overfit when
    ``seed % 5 == 2``; everything else is drawn from ``numpy.random.default_rng(seed)``.
    """
    spec = SIZES[size]
    rng = np.random.default_rng(seed)
    design = _design(seed, rng, spec)
    roles = [int(j) for j in rng.permutation(design["n_features"])]
    dependent = (roles[0], roles[1])
    noise = tuple(sorted(roles[2:2 + design["n_noise"]]))
    pool = roles[2 + design["n_noise"]:]
    X = _features(rng, design["n_rows"], design["n_features"], dependent)
    has_weak = rng.random() < 2.0 / 3.0
    terms = _strong_terms(rng, pool, X, reserve=2 if has_weak else 0)
    in_terms = {j for t in terms for j in t.features}
    mains = _main_effects(rng, X, pool, in_terms, dependent)
    draft = Scenario(seed, design["task"], design["library"], design["overfit"], tuple(f"x{j}" for j in range(X.shape[1])),
                     noise, dependent, tuple(mains), tuple(terms), 1.0, 0.0, 0.0, {}, X, np.zeros(0), size)
    if has_weak:
        free = [j for j in pool if j not in in_terms]
        terms.append(_weak_term(rng, free, X, draft.raw_signal(X)))
        draft = replace(draft, terms=tuple(terms))
    raw = draft.raw_signal(X)
    spread = float(np.std(raw))
    notes: dict[str, Any] = {}
    if design["task"] == "binary":
        gain = rng.uniform(1.2, 2.0) / spread
        offset = -gain * float(np.mean(raw)) + rng.uniform(-0.5, 0.5)
        logit = gain * raw + offset
        y = (rng.random(X.shape[0]) < 1.0 / (1.0 + np.exp(-logit))).astype(float)
        noise_sd = 0.0
    else:
        gain, offset = 1.0, 0.0
        r2 = rng.uniform(0.6, 0.9)
        noise_sd = spread * math.sqrt((1.0 - r2) / r2)
        y = raw + noise_sd * rng.standard_normal(X.shape[0])
        notes["r2_target"] = r2
    params = _model_params(rng, design, spec)
    return replace(draft, gain=float(gain), offset=float(offset), noise_sd=float(noise_sd), params=params, y=y,
                   notes=notes)


# --------------------------------------------------------------------- the truth
def true_interaction(signal: Callable[[np.ndarray], np.ndarray], rows: np.ndarray,
                     pairs: Sequence[tuple[int, int]]) -> dict[tuple[int, int], float]:
    """Unnormalised H (root mean square of the pair's interaction part; Friedman & Popescu 2008, eq. 44 numerator)
    of the function ``signal`` on ``rows`` (background = evaluation rows), for each pair of column positions."""
    from treeprobe import h_statistic

    if not pairs:
        return {}
    result = h_statistic(signal, np.asarray(rows, dtype=float), pairs=[tuple(p) for p in pairs], against_rest=False,
                         method="brute", sample=None, progress=False)
    found = {}
    for a, b, h in zip(result.pairs["feature_a"], result.pairs["feature_b"], result.pairs["h"], strict=True):
        i, j = int(str(a)[1:]), int(str(b)[1:])
        found[(min(i, j), max(i, j))] = float(h)
    return {tuple(sorted(p)): found[tuple(sorted(p))] for p in pairs}


def truth_rows(scenario: Scenario) -> np.ndarray:
    """The seeded row sample the truth is computed on."""
    n = min(SIZES[scenario.size].truth_rows, scenario.X.shape[0])
    pick = np.random.default_rng([scenario.seed, 1]).choice(scenario.X.shape[0], size=n, replace=False)
    return scenario.X[np.sort(pick)]


def true_sizes(scenario: Scenario) -> dict[tuple[int, int], float]:
    """True interaction size h_true / sd(signal) of each pair sharing a term; other pairs are 0 by construction."""
    rows = truth_rows(scenario)
    spread = float(np.std(scenario.signal(rows)))
    return {pair: h / spread for pair, h in true_interaction(scenario.signal, rows, scenario.term_pairs()).items()}


def band_of(size: float) -> str:
    return next(label for low, high, label in BANDS if low <= size < high)


# --------------------------------------------------------------------- one run
def fit_model(scenario: Scenario) -> Any:
    """The scenario's model, fitted with one thread."""
    if scenario.library == "xgboost":
        import xgboost as xgb

        kind = xgb.XGBClassifier if scenario.task == "binary" else xgb.XGBRegressor
        model = kind(**scenario.params, n_jobs=1, random_state=scenario.seed)
    else:
        import lightgbm as lgb

        kind = lgb.LGBMClassifier if scenario.task == "binary" else lgb.LGBMRegressor
        model = kind(**scenario.params, n_jobs=1, random_state=scenario.seed, verbose=-1)
    y = scenario.y.astype(int) if scenario.task == "binary" else scenario.y
    return model.fit(scenario.frame(), y)


def _plain(value: Any) -> Any:
    """A JSON-ready scalar: numpy numbers to Python ones, NaN to None."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(float(value)) else None
    return value


def _flag(value: Any) -> bool:
    """A flag column's value as a bool; missing (None, NaN) counts as not flagged."""
    return bool(value) if value is not None and not (isinstance(value, float) and math.isnan(value)) else False


def verdict_rows(scenario: Scenario, pairs: pd.DataFrame) -> dict[tuple[int, int], dict]:
    """Verdict, faint flag, p-values, effect, h and dependence of every feature pair (unlisted pairs: absent).

    Works with triage tables that have no ``faint``/``p_value``/``p_adjusted``
    columns (then False and None).
    """
    index = {name: j for j, name in enumerate(scenario.names)}
    out = {}
    for record in pairs.to_dict(orient="records"):
        a, b = index[str(record["feature_a"])], index[str(record["feature_b"])]
        out[(min(a, b), max(a, b))] = {
            "verdict": str(record["verdict"]), "faint": _flag(record.get("faint")),
            "p_value": _plain(record.get("p_value")), "p_adjusted": _plain(record.get("p_adjusted")),
            "effect": _plain(record["effect"]), "h": _plain(record["h"]), "dependence": _plain(record["dependence"]),
            **{name: _plain(record.get(name)) for name in DIAGNOSTICS}, "listed": True}
    unlisted = {"verdict": "absent", "faint": False, "p_value": None, "p_adjusted": None, "effect": None, "h": None,
                "dependence": None, **dict.fromkeys(DIAGNOSTICS), "listed": False}
    return {pair: out.get(pair, dict(unlisted)) for pair in combinations(range(len(scenario.names)), 2)}


def fingerprint(scenario: Scenario) -> str:
    """A short digest of the scenario's data, so that a worker proves it re-made the same scenario."""
    digest = hashlib.sha256(np.ascontiguousarray(scenario.X).tobytes())
    digest.update(np.ascontiguousarray(scenario.y).tobytes())
    return digest.hexdigest()[:16]


def run_triage(scenario: Scenario, jobs: int, options: dict | None = None) -> dict:
    """Fit the model, triage it with the imported treeprobe's defaults (or ``options``, e.g. ``level`` and
    ``null_refits``); seconds, code facts and per-pair rows."""
    import treeprobe

    started = time.perf_counter()
    model = fit_model(scenario)
    fit_seconds = time.perf_counter() - started
    result = treeprobe.triage(model, scenario.frame(), scenario.y, random_state=scenario.seed, n_jobs=jobs,
                              progress=False, **(options or {}))
    rows = verdict_rows(scenario, result.pairs)
    return {"seconds": float(result.facts["seconds"]), "fit_seconds": fit_seconds, "fingerprint": fingerprint(scenario),
            "code": {"path": str(Path(treeprobe.__file__).resolve().parent),
                     "columns": sorted(set(result.pairs.columns) & {"faint", "p_value", "p_adjusted"})},
            "pairs": [{"feature_a": scenario.names[a], "feature_b": scenario.names[b], **row}
                      for (a, b), row in rows.items()]}


def studied_source() -> Path:
    """The folder holding the treeprobe package this process imports (the code under study)."""
    spec = importlib.util.find_spec("treeprobe")
    if spec is None or spec.origin is None:
        raise SystemExit("treeprobe is not importable: run with PYTHONPATH set to the source tree under study")
    return Path(spec.origin).resolve().parent.parent


def run_worker(scenario: Scenario, jobs: int, source: Path, options: dict | None = None) -> dict:
    """The scenario triaged by the package in ``source`` in a fresh process (re-made there from its seed).

    Both the studied code and the baseline run this way, so that each
    triage starts equally cold (imports, joblib workers) and their times compare.
    """
    env = {**os.environ, "PYTHONPATH": str(source)}
    command = [sys.executable, str(Path(__file__).resolve()), "--worker", str(scenario.seed), "--size", scenario.size,
               "--jobs", str(jobs), "--worker-source", str(source.resolve())]
    for name, value in (options or {}).items():
        command += [f"--{name.replace('_', '-')}", str(value)]
    done = subprocess.run(command, env=env, capture_output=True, text=True, check=False)
    lines = [line for line in done.stdout.splitlines() if line.startswith(RESULT_PREFIX)]
    if done.returncode != 0 or not lines:
        tail = " | ".join(done.stderr.strip().splitlines()[-3:])
        return {"error": f"triage with {source} exited with code {done.returncode}: {tail or 'no output'}"}
    result = json.loads(lines[-1][len(RESULT_PREFIX):])
    if not result["code"]["path"].startswith(str(source.resolve())):
        return {"error": f"the run meant for {source} imported treeprobe from {result['code']['path']}"}
    if result["fingerprint"] != fingerprint(scenario):
        return {"error": f"the run with {source} re-made different data for scenario {scenario.seed}"}
    return result


def scenario_record(seed: int, *, size: str, jobs: int, baseline: Path | None, order: int,
                    options: dict | None = None, earlier: dict | None = None) -> dict:
    """One scenario: the truth, the studied code's verdicts and (optionally) the baseline's, as one JSON record.

    ``options`` go to the studied code's triage only (the baseline runs its
    defaults); ``earlier`` is a baseline run of this scenario recorded by an
    earlier study (its data fingerprint must match), used instead of running one.
    """
    scenario = make_scenario(seed, size=size)
    truth = true_sizes(scenario)
    sides = [("new", studied_source())] + ([("baseline", baseline)] if baseline is not None else [])
    if order % 2 == 1:
        sides.reverse()  # alternate so that neither side always runs first
    runs = {name: run_worker(scenario, jobs, source, options if name == "new" else None) for name, source in sides}
    if earlier is not None:
        if earlier.get("fingerprint") != fingerprint(scenario):
            raise SystemExit(f"scenario {seed}: the earlier baseline run was made on other data")
        runs["baseline"] = {**earlier, "copied": True}
    new = runs["new"]
    if "error" in new:
        raise SystemExit(f"scenario {seed}: {new['error']}")
    pairs = []
    for row in new["pairs"]:
        a, b = scenario.names.index(row["feature_a"]), scenario.names.index(row["feature_b"])
        kind = scenario.pair_type(a, b)
        size_true = truth.get((a, b), 0.0)
        pairs.append({**row, "type": kind, "true_size": size_true, "band": band_of(size_true) if kind == "true" else None})
    return {"scenario": seed, "size": size, "task": scenario.task, "library": scenario.library,
            "overfit": scenario.overfit, "n_rows": int(scenario.X.shape[0]), "n_features": len(scenario.names),
            "model": scenario.params, "terms": [[t.kind, [scenario.names[j] for j in t.features], t.weak]
                                                for t in scenario.terms],
            "seconds": new["seconds"], "fit_seconds": new["fit_seconds"], "code": new["code"], "pairs": pairs,
            "baseline": runs.get("baseline"), "options": {**DEFAULT_OPTIONS, **(options or {})},
            "load": list(os.getloadavg()) if hasattr(os, "getloadavg") else None}


# --------------------------------------------------------------------- records
def read_records(path: Path) -> list[dict]:
    """Every complete record in a study file (a last line cut off by an interruption is skipped)."""
    if not path.exists():
        return []
    lines = path.read_text(encoding="utf-8").splitlines()
    records = []
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            records.append(json.loads(line))
        except json.JSONDecodeError as exc:
            if number == len(lines):
                break
            raise SystemExit(f"{path}: line {number} is not a JSON record ({exc.msg})") from None
    return records


def _drop_cut_line(path: Path) -> None:
    """Remove a trailing partial line so that appended records start on a line of their own."""
    text = path.read_text(encoding="utf-8")
    if text and not text.endswith("\n"):
        path.write_text(text[: text.rfind("\n") + 1], encoding="utf-8")


def append_record(path: Path, record: dict) -> None:
    with path.open("a", encoding="utf-8") as handle:
        handle.write(json.dumps(record, allow_nan=False) + "\n")
        handle.flush()
        os.fsync(handle.fileno())


# --------------------------------------------------------------------- statistics
def wilson_interval(successes: int, trials: int, z: float = WILSON_Z) -> tuple[float, float]:
    """Wilson's score interval for a binomial proportion (E. B. Wilson, JASA 22:209-212, 1927).

    centre = (p + z^2 / 2n) / (1 + z^2 / n), half-width =
    z / (1 + z^2 / n) * sqrt(p (1 - p) / n + z^2 / 4n^2), with p = k / n.
    NaN for no trials.
    """
    if trials <= 0:
        return float("nan"), float("nan")
    p = successes / trials
    scale = 1.0 + z**2 / trials
    centre = (p + z**2 / (2.0 * trials)) / scale
    half = z / scale * math.sqrt(p * (1.0 - p) / trials + z**2 / (4.0 * trials**2))
    return max(0.0, centre - half), min(1.0, centre + half)


def pair_table(records: list[dict], run: str = "new") -> pd.DataFrame:
    """All pairs of all records with their truth and the verdicts of ``run`` ("new" or "baseline")."""
    rows = []
    for record in records:
        meta = {k: record[k] for k in ("scenario", "task", "library", "overfit")}
        meta["level"] = (record.get("options") or DEFAULT_OPTIONS)["level"] if run == "new" else LEVEL
        other = {}
        if run == "baseline":
            if not record.get("baseline") or "pairs" not in record["baseline"]:
                continue
            other = {(p["feature_a"], p["feature_b"]): p for p in record["baseline"]["pairs"]}
        for pair in record["pairs"]:
            row = {**meta, **pair}
            if run == "baseline":
                row.update({k: other[(pair["feature_a"], pair["feature_b"])][k] for k in RUN_FIELDS})
            rows.append(row)
    return pd.DataFrame(rows)


def _count(mask: pd.Series, hit: pd.Series) -> tuple[int, int]:
    return int((mask & hit).sum()), int(mask.sum())


def measures(table: pd.DataFrame, *, faint_known: bool = True) -> dict[str, tuple[int, int] | None]:
    """(successes, trials) of every measure of the report, in report order; None where the code gave no flag."""
    if table.empty:
        return {}
    called = table["verdict"] == "interaction"
    true = table["type"] == "true"
    faint = table["faint"].astype(bool)
    size = table["true_size"].astype(float)
    out: dict[str, tuple[int, int] | None] = {"precision of interaction: all": _count(called, true)}
    for column, value in (("task", "regression"), ("task", "binary"), ("library", "xgboost"), ("library", "lightgbm"),
                          ("overfit", True)):
        label = "overfit" if column == "overfit" else value
        out[f"precision of interaction: {label}"] = _count(called & (table[column] == value), true)
    out["recall: strong (size >= 10%)"] = _count(true & (size >= STRONG), called)
    if "p_value" in table.columns and table["p_value"].notna().any():
        # A miss whose pair did not even beat the model's own refits is one the model did not learn beyond its noise:
        # no test of this model can call it. The rest beat their refits but not the family-wise floor.
        unlearned = ~(table["p_value"].astype(float) <= table.get("level", LEVEL))
        out["strong misses not beating their own refits (p > level)"] = _count(true & (size >= STRONG) & ~called,
                                                                              unlearned)
    for _, _, label in BANDS:
        out[f"recall: size {label}"] = _count(true & (table["band"] == label), called)
    out["weak (5-10%) called interaction or faint"] = _count(true & (table["band"] == "5-10%"), called | faint)
    for kind in ("noise", "additive", "dependent"):
        out[f"false positives: {kind} pairs called interaction"] = _count(table["type"] == kind, called)
    out["dependent pair called dependent"] = _count(table["type"] == "dependent", table["verdict"] == "dependent")
    out["faint flag on pairs without interaction"] = _count(~true, faint) if faint_known else None
    return out


def _times(records: list[dict]) -> dict:
    new = np.array([r["seconds"] for r in records], dtype=float)
    old = np.array([r["baseline"]["seconds"] if r.get("baseline") and "seconds" in r["baseline"] else np.nan
                    for r in records], dtype=float)
    out = {"median_seconds": float(np.median(new)), "max_seconds": float(np.max(new))}
    if np.isfinite(old).any():
        ratio = new / old
        out.update(baseline_median_seconds=float(np.nanmedian(old)), baseline_max_seconds=float(np.nanmax(old)),
                   median_ratio_new_over_old=float(np.nanmedian(ratio)), ratios=[_plain(r) for r in ratio])
    return out


def _run_code(record: dict, run: str) -> dict:
    """The code facts of one run of a record ({} when that run is missing or failed)."""
    if run == "new":
        return record["code"]
    return (record.get("baseline") or {}).get("code", {})


def _entry(count: tuple[int, int] | None) -> dict | None:
    if count is None:
        return None
    k, n = count
    low, high = wilson_interval(k, n)
    return {"successes": k, "trials": n, "share": k / n if n else None, "low": _plain(low), "high": _plain(high)}


def summary(records: list[dict]) -> dict:
    """Machine-readable summary: every measure with its Wilson interval, for the studied code and the baseline."""
    out: dict[str, Any] = {"scenarios": len(records)}
    for run in ("new", "baseline"):
        faint_known = any("faint" in _run_code(r, run).get("columns", []) for r in records)
        counted = measures(pair_table(records, run), faint_known=faint_known)
        out[run] = {name: _entry(count) for name, count in counted.items()}
        out[f"{run}_faint_column"] = faint_known
    out["times"] = _times(records)
    out["baseline_errors"] = [{"scenario": r["scenario"], "error": r["baseline"]["error"]} for r in records
                              if r.get("baseline") and "error" in r["baseline"]]
    return out


# --------------------------------------------------------------------- report
def _cell(entry: dict | None) -> str:
    if entry is None:
        return "n/a (no faint column) | -"
    if not entry["trials"]:
        return "- | -"
    return f"{entry['successes']}/{entry['trials']} = {entry['share']:.2f} | [{entry['low']:.2f}, {entry['high']:.2f}]"


def _pair_list(records: list[dict], which: str) -> list[str]:
    """Markdown rows of the false positives (``which="false"``) or of the missed strong interactions ("missed")."""
    table = pair_table(records)
    if table.empty:
        return ["none"]
    called = table["verdict"] == "interaction"
    if which == "false":
        chosen = table[called & (table["type"] != "true")]
    else:
        chosen = table[~called & (table["type"] == "true") & (table["true_size"].astype(float) >= STRONG)]
    lines = ["| scenario | pair | type | true size | verdict | effect | H² low | h low | floor | dependence | p | p adjusted |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for row in chosen.itertuples():
        numbers = " | ".join(_num(getattr(row, name, None)) for name in
                             ("true_size", "verdict", "effect", "h2_low", "h_low", "null_h", "dependence", "p_value",
                              "p_adjusted"))
        lines.append(f"| {row.scenario} ({row.task}, {row.library}{', overfit' if row.overfit else ''}) | "
                     f"{row.feature_a}-{row.feature_b} | {row.type} | {numbers} |")
    return lines if len(chosen) else ["none"]


def _num(value: Any) -> str:
    if isinstance(value, str):
        return value
    return "-" if value is None or (isinstance(value, float) and math.isnan(value)) else f"{float(value):.3g}"


def _options_text(records: list[dict]) -> str:
    found = {json.dumps(r.get("options") or DEFAULT_OPTIONS, sort_keys=True) for r in records}
    return " / ".join(", ".join(f"{k}={v}" for k, v in json.loads(text).items()) for text in sorted(found))


def _baseline_note(records: list[dict]) -> list[str]:
    copied = sum(bool((r.get("baseline") or {}).get("copied")) for r in records)
    if not copied:
        return []
    return [f"Baseline runs of {copied} scenario(s) copied from an earlier study on the same data (another run: "
            "their times compare less closely than runs made side by side)."]


def render_report(records: list[dict]) -> str:
    """The Markdown report of a list of study records."""
    facts = summary(records)
    with_baseline = any(r.get("baseline") for r in records)
    tasks = pd.Series([r["task"] for r in records]).value_counts().to_dict()
    lines = [f"## Verdict calibration: {len(records)} scenarios ({', '.join(f'{v} {k}' for k, v in tasks.items())}; "
             f"{sum(r['overfit'] for r in records)} overfit)", "",
             f"Studied code: {', '.join(sorted({r['code']['path'] for r in records}))}; triage options "
             f"{_options_text(records)}"
             + ("" if facts["new_faint_column"] else " (no `faint` column: flags counted as False, p-values absent)"), "",
             "| measure | studied code | 95% Wilson interval |" + (" baseline | 95% Wilson interval |" if with_baseline else ""),
             "|---|---|---|" + ("---|---|" if with_baseline else "")]
    for name, entry in facts["new"].items():
        row = f"| {name} | {_cell(entry)} |"
        if with_baseline:
            row += f" {_cell(facts['baseline'].get(name, {'trials': 0}))} |"
        lines.append(row)
    times = facts["times"]
    lines += ["", f"Triage wall time per scenario: median {times['median_seconds']:.1f} s, max {times['max_seconds']:.1f} s"]
    if "median_ratio_new_over_old" in times:
        lines.append(f"Baseline: median {times['baseline_median_seconds']:.1f} s, max {times['baseline_max_seconds']:.1f} s; "
                     f"median of per-scenario ratios new/old {times['median_ratio_new_over_old']:.2f}")
    lines += [f"Baseline failed on scenario {e['scenario']}: {e['error']}" for e in facts["baseline_errors"]]
    lines += _baseline_note(records)
    lines += ["", "### False positives (interaction verdict on a pair without true interaction)", "",
              *_pair_list(records, "false"),
              "", "### Missed strong interactions (true size >= 10%, verdict other than interaction)", "",
              *_pair_list(records, "missed")]
    return "\n".join(lines)


# --------------------------------------------------------------------- command line
def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0],
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--scenarios", type=int, default=45, help="number of scenarios (seeds seed..seed+N-1)")
    parser.add_argument("--seed", type=int, default=0, help="first scenario seed")
    parser.add_argument("--jobs", type=int, default=2, help="n_jobs passed to triage (noise-floor refits)")
    parser.add_argument("--out", type=Path, help="JSON-lines file the records are appended to")
    parser.add_argument("--resume", action="store_true", help="skip scenarios already in --out")
    parser.add_argument("--baseline-src", type=Path, help="source tree of an older treeprobe to time on the same scenarios")
    parser.add_argument("--baseline-from", type=Path, metavar="FILE",
                        help="take the baseline runs from an earlier study file of the same scenarios instead")
    parser.add_argument("--level", type=float, default=LEVEL, help=f"triage's family-wise level (default {LEVEL})")
    parser.add_argument("--null-refits", type=int, default=DEFAULT_OPTIONS["null_refits"],
                        help=f"triage's null refits (default {DEFAULT_OPTIONS['null_refits']})")
    parser.add_argument("--size", choices=sorted(SIZES), default="full", help="rows and trees per scenario")
    parser.add_argument("--report", type=Path, help="print the report of an existing study file and stop")
    parser.add_argument("--summary-json", type=Path, help="also write the summary as JSON here")
    parser.add_argument("--worker", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--worker-source", type=Path, help=argparse.SUPPRESS)
    return parser


def _check_run_options(args: argparse.Namespace, parser: argparse.ArgumentParser) -> None:
    """The triage options of a study and where its baseline comes from."""
    if args.baseline_src is not None and args.baseline_from is not None:
        parser.error("give --baseline-src or --baseline-from, not both")
    if args.baseline_from is not None and not args.baseline_from.is_file():
        parser.error(f"--baseline-from {args.baseline_from}: no such file")
    if not 0 < args.level < 1:
        parser.error(f"--level must lie in (0, 1), got {args.level}")
    if args.null_refits < 1:
        parser.error(f"--null-refits must be at least 1, got {args.null_refits}")


def _checked(args: argparse.Namespace, parser: argparse.ArgumentParser) -> argparse.Namespace:
    if args.report is None and args.worker is None and args.out is None:
        parser.error("give --out FILE to run a study, or --report FILE to print one")
    for name in ("scenarios", "jobs"):
        if getattr(args, name) < 1:
            parser.error(f"--{name} must be at least 1, got {getattr(args, name)}")
    if args.seed < 0:
        parser.error(f"--seed must be 0 or more, got {args.seed}")
    _check_run_options(args, parser)
    if args.baseline_src is not None and not (args.baseline_src / "treeprobe" / "__init__.py").is_file():
        parser.error(f"--baseline-src {args.baseline_src}: expected a source tree holding treeprobe/__init__.py")
    if args.out is not None and args.out.exists() and args.out.stat().st_size and not args.resume:
        parser.error(f"--out {args.out} already holds records; add --resume to continue it or choose another file")
    return args


def _write_summary(path: Path, records: list[dict]) -> None:
    from treeprobe.output import atomic_write, dumps_json

    atomic_write(path, lambda handle: handle.write(dumps_json(summary(records))))


def run_study(args: argparse.Namespace) -> list[dict]:
    """Run (or continue) a study, appending one record per scenario; returns every record of the file."""
    done = {}
    if args.out.exists():
        _drop_cut_line(args.out)
        done = {r["scenario"]: r for r in read_records(args.out)}
        sizes = {r["size"] for r in done.values()}
        if sizes - {args.size}:
            raise SystemExit(f"{args.out} holds records of size {', '.join(sorted(sizes))}, not --size {args.size}")
    options = _options(args)
    changed = [r["scenario"] for r in done.values() if (r.get("options") or DEFAULT_OPTIONS) != options]
    if changed:
        raise SystemExit(f"{args.out} holds scenarios run with other triage options ({changed[:3]}); "
                         "choose another file")
    earlier = _earlier_baselines(args.baseline_from) if args.baseline_from is not None else {}
    seeds = range(args.seed, args.seed + args.scenarios)
    for order, seed in enumerate(seeds, start=1):
        if seed in done:
            print(f"[{order}/{len(seeds)}] scenario {seed}: already recorded", file=sys.stderr)
            continue
        if args.baseline_from is not None and seed not in earlier:
            raise SystemExit(f"{args.baseline_from} holds no baseline run of scenario {seed}")
        record = scenario_record(seed, size=args.size, jobs=args.jobs, baseline=args.baseline_src, order=order,
                                 options=options if options != DEFAULT_OPTIONS else None, earlier=earlier.get(seed))
        append_record(args.out, record)
        print(_progress_line(order, len(seeds), record), file=sys.stderr, flush=True)
    return read_records(args.out)


def _options(args: argparse.Namespace) -> dict:
    return {"level": args.level, "null_refits": args.null_refits}


def _earlier_baselines(path: Path) -> dict[int, dict]:
    """Baseline runs of an earlier study file, by scenario (those that ran and recorded their data fingerprint)."""
    return {r["scenario"]: r["baseline"] for r in read_records(path)
            if r.get("baseline") and "seconds" in r["baseline"] and "fingerprint" in r["baseline"]}


def _progress_line(order: int, total: int, record: dict) -> str:
    calls = [p for p in record["pairs"] if p["verdict"] == "interaction"]
    right = sum(p["type"] == "true" for p in calls)
    old = record.get("baseline") or {}
    tail = f", baseline {old['seconds']:.1f} s" if "seconds" in old else (", baseline failed" if old else "")
    return (f"[{order}/{total}] scenario {record['scenario']} {record['task']} {record['library']}"
            f"{' overfit' if record['overfit'] else ''}: {len(calls)} interaction verdicts ({right} true), "
            f"triage {record['seconds']:.1f} s (fit {record['fit_seconds']:.1f} s){tail}")


def main(argv: Sequence[str] | None = None) -> int:
    parser = _parser()
    args = _checked(parser.parse_args(argv), parser)
    if args.worker is not None:
        if args.worker_source is not None and studied_source() != args.worker_source:
            raise SystemExit(f"treeprobe is imported from {studied_source()}, not from {args.worker_source}")
        options = _options(args)
        result = run_triage(make_scenario(args.worker, size=args.size), args.jobs,
                            options if options != DEFAULT_OPTIONS else None)
        print(RESULT_PREFIX + json.dumps(result, allow_nan=False), flush=True)
        return 0
    records = read_records(args.report) if args.report is not None else run_study(args)
    if not records:
        raise SystemExit(f"{args.report or args.out}: no records")
    if args.summary_json is not None:
        _write_summary(args.summary_json, records)
    print(render_report(records))
    return 0


if __name__ == "__main__":
    sys.exit(main())
