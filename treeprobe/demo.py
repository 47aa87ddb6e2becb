"""A worked example from data to verdicts, on invented data whose interactions are known.

The scenario is ours and the numbers are simulated: the daily energy use of
the rooms of a refrigerated warehouse (``energy_kwh``, one row per room and
day), recorded with the weather, the goods traffic, the state of the cooling
equipment and a few bookkeeping columns. The target is built from scaled
inputs (each mapped to roughly 0..1)::

    T = (outside_temp_c + 5) / 40        D = door_openings / 120
    H = (humidity_pct - 30) / 65         A = coil_age_years / 15
    I = (defrost_interval_h - 4) / 20    V = (room_volume_m3 - 200) / 1800
    S = (5 - setpoint_c) / 30            P = (pallets_moved - 20) / 380
    F = forklift_hours / 8               L = (lights_on_hours - 6) / 18

    energy_kwh = 100 + 150 T D + 150 H A I + 80 V + 80 S + 40 P + 40 F + 30 L + e,   e ~ Normal(0, 5)

so the ground truth is:

* a pairwise interaction ``outside_temp_c x door_openings`` (warm air comes in
  while the door is open);
* a three-way interaction ``humidity_pct x coil_age_years x defrost_interval_h``
  (frost builds up on old coils in humid air between defrosts);
* an additive pair with strong main effects, ``room_volume_m3`` and
  ``setpoint_c``, that the trees split on in sequence (a co-split);
* a strongly dependent pair, ``pallets_moved`` and ``forklift_hours``
  (``forklift_hours = pallets_moved / 50 + Normal(0, 0.6)``, floored at 0.1;
  rank correlation about 0.97), that enters additively;
* ``lights_on_hours``, additive; both models are trained with it in an
  interaction-constraint group of its own, so no path pairs it with another
  feature and its pairs show the verdict ``absent``;
* pure noise: ``staff_on_shift``, ``day_of_month``, ``manager_tenure_years``.

:func:`run_demo` trains an XGBoost and a LightGBM model, saves and reloads
them as a user would, and runs every stage of treeprobe on them: path
structure, H-statistics [1]_, triage with a noise floor from refits ([1]_,
section 8.3), interaction constraints ([2]_, [3]_) validated by
cross-validation, and the HTML report.

Limits
------
The data are simulated so that the answer is known; on real data nobody
knows it. H-statistics extrapolate when features are dependent (here the
pallets and forklift pair), the structure of a model is not causation, and a
model's interactions are not the world's.

References
----------
.. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 916-954, 2008.
.. [2] T. Chen and C. Guestrin, "XGBoost: a scalable tree boosting system",
   KDD 2016; XGBoost documentation, "Feature Interaction Constraints".
.. [3] G. Ke et al., "LightGBM: a highly efficient gradient boosting decision
   tree", NeurIPS 2017.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from itertools import combinations
from pathlib import Path
from typing import Any, TextIO

import numpy as np
import pandas as pd
from scipy.stats import spearmanr

from .checks import check_bool, check_int, check_seed
from .constraints import interaction_graph, suggest_constraints, validate_constraints, write_graphml
from .cooccurrence import structure
from .errors import MissingLibraryError, ParameterError, TreeprobeError
from .io import load_model
from .measure import h_statistic
from .output import atomic_write, dumps_json, format_table
from .verdicts import VERDICTS, triage

__all__ = ["DemoResult", "demo_data", "run_demo", "TARGET", "FEATURES", "PAIR_H2_CLOSED_FORM", "TRIPLE_H2_CLOSED_FORM"]

TARGET = "energy_kwh"
FEATURES = (
    "outside_temp_c", "door_openings", "humidity_pct", "coil_age_years", "defrost_interval_h", "room_volume_m3",
    "setpoint_c", "pallets_moved", "forklift_hours", "lights_on_hours", "staff_on_shift", "day_of_month",
    "manager_tenure_years",
)
_PAIRWISE = ("outside_temp_c", "door_openings")
_THREE_WAY = ("humidity_pct", "coil_age_years", "defrost_interval_h")
_ADDITIVE = ("room_volume_m3", "setpoint_c")
_CORRELATED = ("pallets_moved", "forklift_hours")
_ISOLATED = "lights_on_hours"
_NOISE = ("staff_on_shift", "day_of_month", "manager_tenure_years")
_NOISE_SD = 5.0
# H² of the formula's own partial dependence for independent uniform inputs (Friedman and Popescu 2008,
# eqs. 44 and 46): for f = x1 x2 the interaction part (x1 - 1/2)(x2 - 1/2) has variance 1/144 of the total
# 7/144; for f = x1 x2 x3 the three-way part has variance 1/1728 of the total 1/27 - 1/64.
PAIR_H2_CLOSED_FORM = 1.0 / 7.0
TRIPLE_H2_CLOSED_FORM = (1.0 / 1728.0) / (1.0 / 27.0 - 1.0 / 64.0)
_FORMULA = "energy_kwh = 100 + 150 T D + 150 H A I + 80 V + 80 S + 40 P + 40 F + 30 L + Normal(0, 5)"

# Sizes chosen so the whole demo stays within a minute on two shared cores;
# one thread per fit is faster than two when other work competes for the cores.
_ROWS = 3000
_ROUNDS = 150
_XGBOOST_PARAMS = {"objective": "reg:squarederror", "eta": 0.15, "max_depth": 4, "subsample": 0.8,
                   "tree_method": "hist", "nthread": 1, "seed": 0}
_LIGHTGBM_PARAMS = {"objective": "regression", "learning_rate": 0.15, "num_leaves": 15, "min_data_in_leaf": 20,
                    "num_threads": 1, "seed": 0, "verbosity": -1}
_TRIAGE_SAMPLE = 500
_NULL_REFITS = 19
_FOLDS = 3


@dataclass(frozen=True)
class DemoResult:
    """What :func:`run_demo` produced.

    Attributes
    ----------
    out_dir : Path
        The folder written to.
    files : dict of str to Path
        Every file written, by name (``data.csv``, ``model_xgboost.json``, ...).
    triage : TriageResult
        Triage of the XGBoost model.
    recovered : dict of str to bool
        Per ground-truth item (``pairwise``, ``three_way``, ``additive_pair``,
        ``correlated_pair``, ``isolated``, ``noise``): whether the XGBoost
        triage found it.
    seconds : float
        Wall time of the whole demo.
    summary : str
        The short summary, the only text ``quiet`` runs print (from the
        command line): items recovered, the verdict tally, the groups, the
        validation, the files and the time.
    lightgbm_recovered : dict of str to bool or None
        The same check on the LightGBM model; None when lightgbm is missing.
    timings : dict of str to float
        Seconds per stage.
    details : str
        The full account printed before the summary when not quiet: the
        ground truth, the pairs table and H² against its closed form.
    """

    out_dir: Path
    files: dict
    triage: Any
    recovered: dict
    seconds: float
    summary: str
    lightgbm_recovered: dict | None = None
    timings: dict = field(default_factory=dict)
    details: str = ""


def _scaled(values: np.ndarray, low: float, high: float) -> np.ndarray:
    return (values - low) / (high - low)


def _energy_without_noise(X: pd.DataFrame) -> np.ndarray:
    """The noise-free target of the module docstring's formula."""
    temperature = _scaled(X["outside_temp_c"].to_numpy(), -5.0, 35.0)
    doors = _scaled(X["door_openings"].to_numpy(), 0.0, 120.0)
    humidity = _scaled(X["humidity_pct"].to_numpy(), 30.0, 95.0)
    coil_age = _scaled(X["coil_age_years"].to_numpy(), 0.0, 15.0)
    interval = _scaled(X["defrost_interval_h"].to_numpy(), 4.0, 24.0)
    volume = _scaled(X["room_volume_m3"].to_numpy(), 200.0, 2000.0)
    coldness = _scaled(-X["setpoint_c"].to_numpy(), -5.0, 25.0)
    pallets = _scaled(X["pallets_moved"].to_numpy(), 20.0, 400.0)
    forklift = _scaled(X["forklift_hours"].to_numpy(), 0.0, 8.0)
    lights = _scaled(X["lights_on_hours"].to_numpy(), 6.0, 24.0)
    return (100.0 + 150.0 * temperature * doors + 150.0 * humidity * coil_age * interval + 80.0 * volume
            + 80.0 * coldness + 40.0 * pallets + 40.0 * forklift + 30.0 * lights)


def demo_data(n_rows: int = _ROWS, random_state: int = 0) -> tuple[pd.DataFrame, np.ndarray, dict]:
    """Simulated daily energy use of refrigerated warehouse rooms, with known interactions.

    Parameters
    ----------
    n_rows : int, default 3000
        Room-days to simulate (at least 100).
    random_state : int, default 0
        Seed; the same seed gives the same data.

    Returns
    -------
    X : DataFrame of shape (n_rows, 13)
        The columns of ``FEATURES``, in that order.
    y : ndarray of shape (n_rows,)
        ``energy_kwh``, the daily energy use in kWh.
    ground_truth : dict
        ``target``, ``formula``, ``pairwise`` (2 names), ``three_way`` (3),
        ``additive_pair`` (2), ``correlated_pair`` (2), ``isolated`` (1 name),
        ``noise`` (3 names) and ``noise_sd`` (kWh).

    Notes
    -----
    The formula is in the module docstring. Integer-valued columns
    (``door_openings``, ``pallets_moved``, ``staff_on_shift``, ``day_of_month``)
    are whole numbers; the others are rounded to two decimals before the target
    is computed, so ``y`` follows the formula exactly on the returned ``X``.

    Examples
    --------
    >>> X, y, truth = demo_data(200, random_state=1)
    >>> X.shape, truth["pairwise"]
    ((200, 13), ('outside_temp_c', 'door_openings'))
    """
    n = check_int("n_rows", n_rows, low=100)
    rng = np.random.default_rng(check_seed("random_state", random_state, allow_none=False))
    pallets = rng.integers(20, 401, n).astype(np.float64)
    columns = {
        "outside_temp_c": rng.uniform(-5.0, 35.0, n),
        "door_openings": rng.integers(0, 121, n).astype(np.float64),
        "humidity_pct": rng.uniform(30.0, 95.0, n),
        "coil_age_years": rng.uniform(0.0, 15.0, n),
        "defrost_interval_h": rng.uniform(4.0, 24.0, n),
        "room_volume_m3": rng.uniform(200.0, 2000.0, n),
        "setpoint_c": rng.uniform(-25.0, 5.0, n),
        "pallets_moved": pallets,
        "forklift_hours": np.maximum(pallets / 50.0 + rng.normal(0.0, 0.6, n), 0.1),
        "lights_on_hours": rng.uniform(6.0, 24.0, n),
        "staff_on_shift": rng.integers(2, 13, n).astype(np.float64),
        "day_of_month": rng.integers(1, 29, n).astype(np.float64),
        "manager_tenure_years": rng.uniform(0.0, 20.0, n),
    }
    X = pd.DataFrame({name: np.round(columns[name], 2) for name in FEATURES})
    y = _energy_without_noise(X) + rng.normal(0.0, _NOISE_SD, n)
    truth = {
        "target": TARGET, "formula": _FORMULA, "pairwise": _PAIRWISE, "three_way": _THREE_WAY,
        "additive_pair": _ADDITIVE, "correlated_pair": _CORRELATED, "isolated": _ISOLATED, "noise": _NOISE,
        "noise_sd": _NOISE_SD,
    }
    return X, y, truth


# --------------------------------------------------------------------- checking the verdicts
def _verdict_of(pairs: pd.DataFrame) -> dict[frozenset, str]:
    return {frozenset((a, b)): str(v) for a, b, v in pairs[["feature_a", "feature_b", "verdict"]].itertuples(index=False)}


def _recovered(triage_result: Any, walked: Any) -> dict[str, bool]:
    """Whether each ground-truth item shows in the triage (see :class:`DemoResult`)."""
    verdicts = _verdict_of(triage_result.pairs)
    triple_rows = walked.triples[["feature_a", "feature_b", "feature_c"]].itertuples(index=False, name=None)
    triple_shares_path = frozenset(_THREE_WAY) in {frozenset(row) for row in triple_rows}
    triples = triage_result.triples
    triple_verdict = {frozenset(row[:3]): str(row[3]) for row in
                      triples[["feature_a", "feature_b", "feature_c", "verdict"]].itertuples(index=False, name=None)}
    three_pairs = all(verdicts.get(frozenset(p)) == "interaction" for p in combinations(_THREE_WAY, 2))
    return {
        "pairwise": verdicts.get(frozenset(_PAIRWISE)) == "interaction",
        "three_way": triple_shares_path and (three_pairs or triple_verdict.get(frozenset(_THREE_WAY)) == "interaction"),
        "additive_pair": verdicts.get(frozenset(_ADDITIVE)) in ("co-split", "absent"),
        "correlated_pair": verdicts.get(frozenset(_CORRELATED), "absent") != "interaction",
        "isolated": all(v == "absent" for key, v in verdicts.items() if _ISOLATED in key),
        "noise": not any(v == "interaction" for key, v in verdicts.items() if key & set(_NOISE)),
    }


_ITEM_TEXT = {
    "pairwise": f"pairwise    {_PAIRWISE[0]} x {_PAIRWISE[1]}: warm air comes in while the door is open",
    "three_way": f"three-way   {' x '.join(_THREE_WAY)}: frost on old coils in humid air",
    "additive_pair": f"additive    {_ADDITIVE[0]} + {_ADDITIVE[1]}: strong separate effects, expected co-split",
    "correlated_pair": f"dependent   {_CORRELATED[0]} ~ {_CORRELATED[1]}: additive, expected dependent, never interaction",
    "isolated": f"isolated    {_ISOLATED}: additive, alone in its own constraint group, expected absent",
    "noise": f"noise       {', '.join(_NOISE)}: no effect, never interaction",
}


def _shown_pairs(pairs: pd.DataFrame) -> pd.DataFrame:
    """Interaction and dependent pairs, the ground truth's additive pair, the strongest other co-splits, two absent."""
    additive = pairs.apply(lambda row: {row["feature_a"], row["feature_b"]} == set(_ADDITIVE), axis=1)
    co_split = pairs["verdict"] == "co-split"
    parts = [pairs[pairs["verdict"] == "interaction"], pairs[pairs["verdict"] == "dependent"],
             pairs[co_split & additive], pairs[co_split & ~additive].head(2), pairs[pairs["verdict"] == "absent"].head(2)]
    shown = pd.concat(parts)[["feature_a", "feature_b", "verdict", "strength", "h2", "dependence"]]
    return shown.reset_index(drop=True)


def _validation_line(validation: Any) -> str:
    rmse = {key: float(value) for key, value in validation.summary.get("rmse", {}).items()}
    missing = float("nan")
    crossing = "no path crosses the groups" if not validation.stray_paths else \
        f"{len(validation.stray_paths)} path set(s) cross the groups"
    return (f"{validation.summary['n_folds']}-fold check: held-out RMSE {rmse.get('unconstrained_mean', missing):.2f} kWh "
            f"unconstrained vs {rmse.get('constrained_mean', missing):.2f} constrained (difference "
            f"{rmse.get('difference_mean', missing):+.2f}, 95% interval {rmse.get('difference_low', missing):+.2f} to "
            f"{rmse.get('difference_high', missing):+.2f}; negative means the groups help); {crossing}.")


# --------------------------------------------------------------------- steps
def _check_arguments(out_dir: Any, quiet: Any, stream: Any) -> Path:
    if not isinstance(out_dir, (str, os.PathLike)) or not str(out_dir):
        raise ParameterError(f"out_dir must be a folder path, got {out_dir!r}")
    check_bool("quiet", quiet)
    if stream is not None and not callable(getattr(stream, "write", None)):
        raise ParameterError(f"stream must be a writable text stream, got {type(stream).__name__}")
    folder = Path(out_dir)
    if folder.exists() and not folder.is_dir():
        raise TreeprobeError(f"out_dir {folder} exists and is not a folder")
    return folder


def _make_folder(folder: Path) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise TreeprobeError(f"out_dir {folder}: cannot create the folder: {exc.strerror or exc}") from None


def _write_text(path: Path, text: str) -> Path:
    return atomic_write(path, lambda handle: handle.write(text))


def _isolating_groups() -> list[list[int]]:
    return [[j for j, name in enumerate(FEATURES) if name != _ISOLATED], [FEATURES.index(_ISOLATED)]]


def _import_xgboost() -> Any:
    try:
        import xgboost
    except ImportError:
        raise MissingLibraryError("the demo trains an XGBoost model: pip install 'treeprobe[xgboost]'") from None
    return xgboost


def _train_xgboost(xgboost: Any, X: pd.DataFrame, y: np.ndarray, path: Path) -> Path:
    data = xgboost.DMatrix(X.to_numpy(), y, feature_names=list(FEATURES))
    # XGBoost reads a list as feature names; the string of index lists is its accepted index form.
    params = {**_XGBOOST_PARAMS, "interaction_constraints": str(_isolating_groups())}
    booster = xgboost.train(params, data, num_boost_round=_ROUNDS)
    return _write_text(path, bytes(booster.save_raw(raw_format="json")).decode("utf-8"))


def _train_lightgbm(X: pd.DataFrame, y: np.ndarray, path: Path) -> Path | None:
    try:
        import lightgbm
    except ImportError:
        return None
    data = lightgbm.Dataset(X.to_numpy(), y, feature_name=list(FEATURES), params={"verbosity": -1})
    params = {**_LIGHTGBM_PARAMS, "interaction_constraints": _isolating_groups()}
    booster = lightgbm.train(params, data, num_boost_round=_ROUNDS)
    return _write_text(path, booster.model_to_string())


def _report_function() -> Callable | None:
    try:
        from .reporting import report
    except ImportError:
        return None
    return report


def run_demo(out_dir: str | os.PathLike = "treeprobe-demo", *, quiet: bool = False,
             stream: TextIO | None = None) -> DemoResult:
    """Simulate data with known interactions, train models, run every stage and write the results.

    Parameters
    ----------
    out_dir : str or path, default "treeprobe-demo"
        Folder for the outputs (created if missing; files of the same names
        are replaced, each one atomically).
    quiet : bool, default False
        Print nothing and draw no progress bars; the summary and the details
        are still returned (the command line's ``--quiet`` prints the summary
        only). Otherwise one line per finished step goes to standard error,
        and the details, then the summary, to ``stream``.
    stream : text stream, optional
        Where the details and summary go; default standard output. Progress
        bars go to standard error, and only when it is a terminal.

    Returns
    -------
    DemoResult

    Raises
    ------
    MissingLibraryError
        When xgboost is not installed (``pip install 'treeprobe[xgboost]'``).
        A missing lightgbm only skips the LightGBM part, with a note.
    TreeprobeError
        When ``out_dir`` cannot be used.

    Notes
    -----
    Steps: :func:`demo_data` (3,000 rows, written to ``data.csv`` with the
    target); an XGBoost model (150 rounds, depth 4, ``lights_on_hours`` in
    its own interaction-constraint group) saved as ``model_xgboost.json`` and
    a LightGBM model (150 rounds, 15 leaves, the same group) saved as
    ``model_lightgbm.txt``; both reloaded from the files with
    :func:`treeprobe.load_model`. On the XGBoost model: path structure,
    H-statistics of the ground-truth sets (eqs. 44 and 46 of [1]_), triage
    with triples and 19 noise-floor refits (family-wise level 5%), suggested
    constraints and their 3-fold validation. On the LightGBM model: structure
    and a triage without refits (floor ``min_h2``). Written: ``triage.json``,
    ``pairs.csv``, ``constraints.json``, ``interaction_graph.graphml`` and
    ``report.html`` (skipped, with a note, when the report module is not
    available).

    References
    ----------
    .. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
       ensembles", Annals of Applied Statistics 2(3), 916-954, 2008.
    """
    folder = _check_arguments(out_dir, quiet, stream)
    xgboost = _import_xgboost()
    _make_folder(folder)
    progress = False if quiet else None
    started = time.perf_counter()
    timings: dict[str, float] = {}
    files: dict[str, Path] = {}
    notes: list[str] = []
    clock = started

    def step(stage: str, message: str) -> None:
        # The step-by-step account goes to standard error, beside the progress bars; quiet drops both.
        nonlocal clock
        now = time.perf_counter()
        timings[stage] = now - clock
        clock = now
        if not quiet:
            print(f"demo: {message} ({timings[stage]:.1f} s)", file=sys.stderr, flush=True)

    X, y, truth = demo_data()
    files["data.csv"] = atomic_write(folder / "data.csv", lambda handle: X.assign(**{TARGET: y}).to_csv(handle, index=False))
    step("data", f"simulated {len(X):,} room-days, written to data.csv")

    files["model_xgboost.json"] = _train_xgboost(xgboost, X, y, folder / "model_xgboost.json")
    lightgbm_path = _train_lightgbm(X, y, folder / "model_lightgbm.txt")
    if lightgbm_path is None:
        notes.append("lightgbm is not installed: the LightGBM part was skipped (pip install 'treeprobe[lightgbm]').")
    else:
        files["model_lightgbm.txt"] = lightgbm_path
    step("training", "trained and saved " + ("the XGBoost and LightGBM models" if lightgbm_path else "the XGBoost model"))

    model = load_model(files["model_xgboost.json"])
    walked = structure(model, max_order=3)
    step("structure", f"walked the paths of {walked.n_trees_walked} XGBoost trees")
    truth_h = h_statistic(model, X, pairs=[_PAIRWISE, _ADDITIVE], triples=[_THREE_WAY], against_rest=False,
                          sample=_TRIAGE_SAMPLE, progress=progress)
    step("H-statistics", "H-statistics of the ground-truth sets")
    # A saved XGBoost file keeps no training parameters; the refits need the ones used here.
    refit_params = {k: v for k, v in _XGBOOST_PARAMS.items() if k != "objective"}
    result = triage(model, X, y, triples=True, sample=_TRIAGE_SAMPLE, null_refits=_NULL_REFITS, params=refit_params,
                    progress=progress)
    recovered = _recovered(result, walked)
    step("triage", f"triage with {_NULL_REFITS} noise-floor refits")
    suggestion = suggest_constraints(result)
    validation = validate_constraints(files["model_xgboost.json"], X, y, suggestion, folds=_FOLDS, params=refit_params,
                                      progress=progress)
    step("constraints", f"suggested constraint groups and checked them over {_FOLDS} folds")

    lightgbm_recovered = None
    lightgbm_result = None
    if lightgbm_path is not None:
        lightgbm_model = load_model(lightgbm_path)
        lightgbm_result = triage(lightgbm_model, X, None, triples=True, sample=_TRIAGE_SAMPLE, resamples=0,
                                 progress=progress)
        lightgbm_recovered = _recovered(lightgbm_result, structure(lightgbm_model, max_order=3))
        step("LightGBM", "triage of the LightGBM model")

    files["triage.json"] = _write_text(folder / "triage.json", dumps_json(result.to_dict()))
    files["pairs.csv"] = atomic_write(folder / "pairs.csv", lambda handle: result.pairs.to_csv(handle, index=False))
    constraints_record = {"suggestion": suggestion.to_dict(), "validation": validation.to_dict()}
    files["constraints.json"] = _write_text(folder / "constraints.json", dumps_json(constraints_record))
    files["interaction_graph.graphml"] = write_graphml(interaction_graph(result), folder / "interaction_graph.graphml")
    report = _report_function()
    if report is None:
        notes.append("The HTML report was skipped: treeprobe.reporting is not available in this installation.")
    else:
        files["report.html"] = Path(report(model, X, y, out=folder / "report.html", triage_result=result,
                                           triage_origin="run by treeprobe demo",
                                           suggestion=suggestion, validation=validation,
                                           title="treeprobe demo: refrigerated warehouse energy use",
                                           progress=progress))
    step("writing", f"wrote {len(files)} files in {folder}")
    seconds = time.perf_counter() - started

    details = _details(X, truth, walked, truth_h, result, recovered)
    summary = _summary(folder, X, result, recovered, suggestion, validation, lightgbm_result, lightgbm_recovered,
                       files, notes, timings, seconds)
    if not quiet:
        (stream or sys.stdout).write(details + "\n" + summary)
    return DemoResult(out_dir=folder, files=files, triage=result, recovered=recovered, seconds=seconds,
                      summary=summary, lightgbm_recovered=lightgbm_recovered, timings=timings, details=details)


def _details(X: pd.DataFrame, truth: dict, walked: Any, truth_h: Any, result: Any, recovered: dict) -> str:
    """The full account: ground truth, the XGBoost triage table, H² against the closed form, items recovered."""
    rho = float(spearmanr(X[_CORRELATED[0]], X[_CORRELATED[1]]).statistic)
    pair_h2 = {frozenset((a, b)): h2 for a, b, h2 in truth_h.pairs[["feature_a", "feature_b", "h2"]].itertuples(index=False)}
    triple_h2 = truth_h.triples["h2"].iloc[0] if len(truth_h.triples) else float("nan")
    lines = [
        f"Ground truth ({truth['formula']}):",
        *(f"  {_ITEM_TEXT[key]}" for key in _ITEM_TEXT),
        f"  (rank correlation of {_CORRELATED[0]} and {_CORRELATED[1]}: {rho:.3f})",
        "",
        f"XGBoost model: {walked.n_trees_walked} trees, depth {_XGBOOST_PARAMS['max_depth']}, reloaded from model_xgboost.json. "
        f"Triage on {result.facts['n_rows']:,} rows, {result.facts['null_refits']} noise-floor refits "
        f"(family-wise level {result.thresholds['level']:g}).",
        format_table(_shown_pairs(result.pairs), precision=3),
        f"Why 'absent' appears: {_ISOLATED} was trained alone in an interaction-constraint group, so no path pairs it "
        "with another feature and H = 0 exactly.",
        f"H² on the model vs the formula's closed form: {_PAIRWISE[0]} x {_PAIRWISE[1]} "
        f"{pair_h2.get(frozenset(_PAIRWISE), float('nan')):.3f} vs {PAIR_H2_CLOSED_FORM:.3f} (eq. 44); the three-way set "
        f"{triple_h2:.3f} vs {TRIPLE_H2_CLOSED_FORM:.3f} (eq. 46).",
        "",
        "Ground-truth items:",
        *(f"  {'yes' if ok else 'no ':3}  {key}" for key, ok in recovered.items()),
    ]
    return "\n".join(lines) + "\n"


def _summary(out_dir: Path, X: pd.DataFrame, result: Any, recovered: dict, suggestion: Any, validation: Any,
             lightgbm_result: Any, lightgbm_recovered: dict | None, files: dict, notes: list[str], timings: dict,
             seconds: float) -> str:
    """The short account every run prints: what was recovered, the tally, the groups, the check, files and time."""
    counts = result.pairs["verdict"].value_counts()
    together = [group for group in suggestion.groups if len(group) > 1]
    alone = [group[0] for group in suggestion.groups if len(group) == 1] + list(suggestion.unused)
    lines = [
        f"treeprobe demo: daily energy use ({TARGET}) of refrigerated warehouse rooms, {len(X):,} simulated room-days "
        "(invented data with a known answer).",
        f"Recovered {sum(recovered.values())} of {len(recovered)} ground-truth items with the XGBoost model"
        + ("." if all(recovered.values()) else f"; missed: {', '.join(k for k, ok in recovered.items() if not ok)}."),
        "Pairs: " + ", ".join(f"{int(counts.get(v, 0))} {v}" for v in VERDICTS) + ".",
    ]
    if lightgbm_recovered is not None:
        agree = sum(lightgbm_recovered[key] == recovered[key] for key in recovered)
        lines.append(f"LightGBM ({lightgbm_result.ensemble.n_trees} trees, same constraint group, no noise-floor "
                     f"refits) recovers {sum(lightgbm_recovered.values())} of {len(lightgbm_recovered)} items and "
                     f"agrees with XGBoost on {agree}.")
    lines += [
        "Suggested groups: " + " | ".join(", ".join(group) for group in together) + " | each alone: " + ", ".join(alone),
        f"XGBoost parameter: interaction_constraints = {suggestion.xgboost_param!r}",
        _validation_line(validation),
        *notes,
        f"Files in {out_dir}: " + ", ".join(files),
        "Timings: " + ", ".join(f"{stage} {value:.1f} s" for stage, value in timings.items()) + f"; total {seconds:.1f} s.",
        "Limits: the answer is known only because the data are simulated; H-statistics extrapolate when features are "
        "dependent, and a model's interactions are not causal facts about the world.",
    ]
    return "\n".join(lines) + "\n"
