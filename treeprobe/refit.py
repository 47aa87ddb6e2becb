"""Retraining a model the way it was trained: same library, objective and hyperparameters.

Later stages refit a model to test a hypothesis about it: the constraint
validation of :mod:`treeprobe.constraints` refits with and without
interaction constraints, and the noise floor of :mod:`treeprobe.verdicts`
refits on synthetic targets with no interaction (Friedman and Popescu 2008,
section 8.3). Both need the same things, owned here:

- the training recipe (:class:`Recipe`, :func:`training_recipe`): read back
  from the model (LightGBM stores its parameters in the model text; a live
  XGBoost booster its configuration; a saved XGBoost JSON only the objective,
  so its learning rate and L2 penalty are recovered from the trees), given
  by the user, or a library default, each value with its origin;
- the fits, one per model family: XGBoost and LightGBM (native ``train``,
  categorical features passed as such, interaction constraints), scikit-learn
  ``HistGradientBoosting*`` (``interaction_cst``), and other scikit-learn
  estimators (forests, classic gradient boosting, single trees) by cloning,
  which have no interaction constraints (:func:`constrained_substitute`
  names the nearest family that has them);
- early stopping on an inner split (:func:`fit_early_stopped`), so every
  variant is compared at its own best round count.

Experiments behind the categorical support (xgboost 3.2.0, lightgbm 4.7.0,
kept as tests in ``tests/test_refit.py``): both libraries apply interaction
constraints to categorical features as to numeric ones, a categorical
feature being one member of its group, for partition splits and for one-hot
splits alike; no path of a constrained model crosses groups.

xgboost and lightgbm are optional; a missing one gives
:class:`~treeprobe.errors.MissingLibraryError`.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from . import parallel
from .errors import DataError, MissingLibraryError, ParameterError, UnsupportedModelError
from .graph import ForestGraph

__all__ = [
    "LIBRARIES",
    "SKLEARN",
    "REGRESSION",
    "BINARY",
    "MULTICLASS",
    "PATIENCE",
    "INNER_FRACTION",
    "import_library",
    "task_of",
    "rounds_of",
    "live_training_params",
    "live_model_of",
    "check_retrainable",
    "target_values",
    "checked_target",
    "params_from_xgboost_config",
    "Recipe",
    "recover_xgboost_step",
    "training_recipe",
    "constrained_substitute",
    "calibrate_step",
    "design_matrix",
    "round_budget",
    "fit",
    "fit_early_stopped",
    "predict_response",
    "loss_scores",
    "xgboost_constraint_text",
]

# Libraries whose boosters treeprobe trains natively; scikit-learn estimators are cloned.
LIBRARIES = ("xgboost", "lightgbm")
SKLEARN = "sklearn"
# scikit-learn settings shown in a recipe (the fit clones the estimator, which holds all of them).
_SKLEARN_SHOWN = ("loss", "criterion", "learning_rate", "max_iter", "n_estimators", "max_depth", "max_leaf_nodes",
                  "min_samples_leaf", "l2_regularization", "max_features", "subsample", "interaction_cst")
# LightGBM training parameters carried over from the model text: those that
# shape trees, the objective and sampling. Bookkeeping (files, threads, seeds,
# devices, metrics, iteration counts) is left to this run.
_LIGHTGBM_KEYS = (
    "boosting", "objective", "num_class", "learning_rate", "num_leaves", "max_depth", "min_data_in_leaf",
    "min_sum_hessian_in_leaf", "bagging_fraction", "pos_bagging_fraction", "neg_bagging_fraction", "bagging_freq",
    "feature_fraction", "feature_fraction_bynode", "extra_trees", "max_delta_step", "lambda_l1", "lambda_l2",
    "linear_lambda", "min_gain_to_split", "drop_rate", "max_drop", "skip_drop", "xgboost_dart_mode", "uniform_drop",
    "top_rate", "other_rate", "path_smooth", "max_bin", "min_data_in_bin", "use_missing", "zero_as_missing",
    "monotone_constraints", "monotone_constraints_method", "monotone_penalty", "is_unbalance", "scale_pos_weight",
    "sigmoid", "boost_from_average", "reg_sqrt", "alpha", "fair_c", "poisson_max_delta_step",
    "tweedie_variance_power", "linear_tree", "data_sample_strategy", "max_cat_to_onehot", "max_cat_threshold",
    "cat_smooth", "cat_l2", "min_data_per_group",
)
# LightGBM writes booleans as 0/1 in the model text but reads only true/false back.
_LIGHTGBM_BOOLEANS = frozenset({
    "extra_trees", "xgboost_dart_mode", "uniform_drop", "use_missing", "zero_as_missing", "is_unbalance",
    "boost_from_average", "reg_sqrt", "linear_tree",
})
# XGBoost training parameters read from a live booster's configuration.
_XGBOOST_TREE_KEYS = (
    "eta", "max_depth", "min_child_weight", "lambda", "alpha", "gamma", "subsample", "colsample_bytree",
    "colsample_bylevel", "colsample_bynode", "max_bin", "grow_policy", "max_leaves", "max_delta_step",
    "sampling_method", "monotone_constraints", "max_cat_to_onehot", "max_cat_threshold",
)
# XGBoost's documented defaults (eta 0.3, lambda 1; from memory of its parameter page) used when recovery fails.
_XGBOOST_DEFAULTS = {"eta": 0.3, "lambda": 1.0}
# Recovery gives up when the per-node step sizes spread more than this (median absolute deviation of log eta).
_MAX_LOG_SPREAD = 1e-3
_MIN_RECOVERY_NODES = 5
# Native XGBoost parameter aliases: a given alias replaces whatever the model gave under another name.
_XGBOOST_ALIASES = (frozenset({"eta", "learning_rate"}), frozenset({"lambda", "reg_lambda"}),
                    frozenset({"alpha", "reg_alpha"}), frozenset({"gamma", "min_split_loss"}))
ORIGINS = ("stored", "given", "recovered", "calibrated", "default")
_ORIGIN_TEXT = {"stored": "stored in the model", "given": "given", "recovered": "recovered from the trees",
                "calibrated": "calibrated on the data", "default": "library default"}
# Learning rates tried when eta can be neither read nor recovered (common values; our choice).
_CALIBRATION_ETAS = (0.01, 0.02, 0.05, 0.1, 0.2, 0.3)
_CALIBRATION_ROWS = 2000
REGRESSION = "regression"
BINARY = "binary"
MULTICLASS = "multiclass"


def xgboost_constraint_text(groups: list[list[int]]) -> str:
    """Groups of indices in the string form every XGBoost Python API accepts, e.g. ``"[[0, 1], [2]]"``."""
    return "[" + ", ".join("[" + ", ".join(str(j) for j in group) + "]" for group in groups) + "]"


def import_library(library: str) -> Any:
    try:
        if library == "xgboost":
            import xgboost as module
        else:
            import lightgbm as module
    except ImportError:
        raise MissingLibraryError(
            f"retraining a {library} model needs the {library} package "
            f"(pip install {'xgboost-cpu' if library == 'xgboost' else 'lightgbm'})"
        ) from None
    return module


def params_from_xgboost_config(config: dict) -> dict:
    """Training parameters in the JSON that XGBoost's ``Booster.save_config()`` writes (already parsed).

    Reads ``learner.gradient_booster.tree_train_param`` (the tree keys in
    ``_XGBOOST_TREE_KEYS``), its ``gbtree_train_param.tree_method`` and
    ``learner.learner_train_param.objective``; values stay the strings XGBoost wrote.
    """
    learner = config.get("learner", {}) if isinstance(config, dict) else {}
    booster = learner.get("gradient_booster", {}) if isinstance(learner, dict) else {}
    tree = booster.get("tree_train_param", {}) if isinstance(booster, dict) else {}
    params = {key: tree[key] for key in _XGBOOST_TREE_KEYS if key in tree and tree[key] not in ("", "()")}
    method = booster.get("gbtree_train_param", {}).get("tree_method") if isinstance(booster, dict) else None
    if method and method != "auto":
        params["tree_method"] = method
    objective = learner.get("learner_train_param", {}).get("objective") if isinstance(learner, dict) else None
    if objective:
        params["objective"] = objective
    return params


def live_training_params(model: Any) -> dict:
    """Training parameters a live XGBoost booster or wrapper reports in its configuration; ``{}`` for anything else.

    A saved XGBoost file keeps only the objective and a few learner facts,
    while a live booster knows its tree parameters (``save_config``). Entry
    points call this on the object the user passed, next to their one
    :func:`treeprobe.io.load_model` call.
    """
    if not type(model).__module__.startswith("xgboost"):
        return {}
    booster = model.get_booster() if hasattr(model, "get_booster") else model
    try:
        config = json.loads(booster.save_config())
    except Exception:  # noqa: BLE001 - a booster without a readable configuration gives no extra parameters
        return {}
    return params_from_xgboost_config(config)


def task_of(library: str, objective: str) -> str:
    if library == "xgboost":
        if objective.startswith("binary:"):
            return BINARY
        if objective.startswith("multi:"):
            return MULTICLASS
        if objective.startswith(("rank:", "survival:")):
            raise UnsupportedModelError(f"treeprobe does not retrain or score models with the {library} objective {objective!r}")
        return REGRESSION
    if objective in ("binary", "cross_entropy", "xentropy"):
        return BINARY
    if objective in ("multiclass", "softmax", "multiclassova", "multiclass_ova", "ova", "ovr"):
        return MULTICLASS
    if objective.startswith(("lambdarank", "rank_xendcg", "cross_entropy_lambda", "xentlambda")):
        raise UnsupportedModelError(f"treeprobe does not retrain or score models with the {library} objective {objective!r}")
    return REGRESSION


def rounds_of(ensemble: ForestGraph) -> int:
    """Boosting rounds of a model: trees / (outputs with a tree each) / parallel trees per round."""
    per_class = ensemble.n_outputs > 1 and bool(np.all(ensemble.output_of_tree >= 0))
    parallel = ensemble.trees_per_round
    return max(1, ensemble.n_trees // ((ensemble.n_outputs if per_class else 1) * parallel))


def _last_splits(ensemble: ForestGraph) -> tuple[np.ndarray, ...]:
    """Leaf values, hessian sums (cover) and gains of every split whose two children are leaves."""
    inner = np.flatnonzero(ensemble.feature >= 0)
    left, right = ensemble.left[inner], ensemble.right[inner]
    both = (ensemble.feature[left] < 0) & (ensemble.feature[right] < 0)
    node, left, right = inner[both], left[both], right[both]
    column = np.maximum(ensemble.output_of_tree[ensemble.tree[node]], 0) if ensemble.value.shape[1] > 1 else 0
    w_left, w_right = ensemble.value[left, column], ensemble.value[right, column]
    h_left, h_right, gain = ensemble.cover[left], ensemble.cover[right], ensemble.gain[node]
    usable = (gain > 0) & (h_left > 0) & (h_right > 0) & (w_left != w_right)
    return w_left[usable], w_right[usable], h_left[usable], h_right[usable], gain[usable]


def _log_steps(splits: tuple[np.ndarray, ...], lambdas: np.ndarray) -> np.ndarray:
    """log eta of every split (columns) for every candidate lambda (rows), from eta² gain = f(g, H, lambda)."""
    w_left, w_right, h_left, h_right, gain = (a[None, :] for a in splits)
    lam = lambdas[:, None]
    g_left, g_right = w_left * (h_left + lam), w_right * (h_right + lam)
    scaled = g_left**2 / (h_left + lam) + g_right**2 / (h_right + lam) - (g_left + g_right) ** 2 / (h_left + h_right + lam)
    with np.errstate(divide="ignore", invalid="ignore"):
        return 0.5 * np.log(np.abs(scaled) / gain)


def _spread(log_steps: np.ndarray) -> np.ndarray:
    centre = np.median(log_steps, axis=1, keepdims=True)
    spread = np.median(np.abs(log_steps - centre), axis=1)
    return np.where(np.isfinite(spread), spread, np.inf)


def recover_xgboost_step(ensemble: ForestGraph, *, max_nodes: int = 4000) -> tuple[float, float, float, int]:
    """Learning rate eta and L2 penalty lambda of an XGBoost model, read back from its trees.

    Parameters
    ----------
    ensemble : ForestGraph
        A loaded XGBoost model (leaf ``value`` with the learning rate applied,
        ``cover`` = hessian sums, ``gain`` = loss change of each split).
    max_nodes : int, default 4000
        Splits used at most (the first ones), to bound the cost.

    Returns
    -------
    eta, reg_lambda, spread, n_splits : float, float, float, int
        ``spread`` is the median absolute deviation of log eta over the splits
        at the chosen lambda; a large one (or few splits) means the recovery
        cannot be trusted. NaN eta and lambda when no split is usable.

    Notes
    -----
    For a split whose children are leaves, XGBoost's leaf weight is
    ``w = -eta G / (H + lambda)`` and its gain (Chen and Guestrin 2016, eq. 7,
    without the 1/2 and gamma) is
    ``G_L²/(H_L+lambda) + G_R²/(H_R+lambda) - (G_L+G_R)²/(H_L+H_R+lambda)``.
    With ``g = w (H + lambda) = -eta G`` the right side computed from ``g``
    equals ``eta² gain``, so each split gives eta for a candidate lambda. The
    lambda at which all splits agree (smallest spread of log eta over
    {0} and a log grid 1e-3 to 1e3, refined locally) is taken, and eta is the
    median. L1 (alpha) and max_delta_step change the leaf formula and show as
    a large spread.

    References
    ----------
    .. [1] T. Chen and C. Guestrin, "XGBoost: A scalable tree boosting
       system", KDD 2016, equations 5 and 7.
    """
    splits = tuple(a[:max_nodes] for a in _last_splits(ensemble))
    n_splits = int(splits[0].size)
    if n_splits == 0:
        return float("nan"), float("nan"), float("inf"), 0
    lambdas = np.concatenate([[0.0], np.geomspace(1e-3, 1e3, 1201)])
    for _ in range(2):
        spread = _spread(_log_steps(splits, lambdas))
        best = int(np.argmin(spread))
        low, high = lambdas[max(best - 1, 0)], lambdas[min(best + 1, lambdas.size - 1)]
        lambdas = np.unique(np.concatenate([[lambdas[best]], np.linspace(low, high, 201)]))
    spread = _spread(_log_steps(splits, lambdas))
    best = int(np.argmin(spread))
    reg_lambda = float(f"{lambdas[best]:.3g}")
    log_steps = _log_steps(splits, np.array([reg_lambda]))
    eta = float(f"{np.exp(np.median(log_steps)):.6g}")
    return eta, reg_lambda, float(_spread(log_steps)[0]), n_splits


@dataclass(frozen=True, eq=False)
class Recipe:
    """The training recipe of a refit and where each of its values came from.

    Attributes
    ----------
    library : str
        "xgboost", "lightgbm" or "sklearn".
    params : dict
        Native training parameters: those passed to ``xgboost.train`` /
        ``lightgbm.train``; for scikit-learn the estimator's main settings
        (for display: the fit clones ``estimator``, which holds them all).
    rounds : int
        Boosting rounds (trees for a forest, 1 for a single tree).
    origins : dict
        Parameter name (and "rounds") -> one of ``ORIGINS``: "stored" (in the
        model file or the live model's configuration), "given" (by the user),
        "recovered" (read back from the trees) or "default" (the library's).
    feature_names : tuple of str or None
        The model's feature names (None when built from a parameter dict).
    notes : list of str
        Sentences for the reader (recovery figures, fall-backs).
    estimator : scikit-learn estimator or None
        Unfitted clone of a scikit-learn model (None for the boosting libraries).
    categorical : tuple of int
        Indices of categorical features, passed to the library as such.
    n_classes : int
        Classes of a scikit-learn classifier (0 otherwise; the boosting
        libraries carry it in ``params``).
    """

    library: str
    params: dict
    rounds: int
    origins: dict
    feature_names: tuple[str, ...] | None = None
    notes: list[str] = field(default_factory=list)
    estimator: Any = None
    categorical: tuple[int, ...] = ()
    n_classes: int = 0

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Recipe):
            return NotImplemented
        return (self.library, self.params, self.rounds, self.origins, self.feature_names, self.categorical) == (
            other.library, other.params, other.rounds, other.origins, other.feature_names, other.categorical)

    __hash__ = None  # type: ignore[assignment]

    @property
    def family(self) -> str:
        """The model family refitted: the library, or the scikit-learn estimator class."""
        return type(self.estimator).__name__ if self.estimator is not None else self.library

    @property
    def trainer(self) -> str:
        """How fits run: "xgboost", "lightgbm", "hist" (scikit-learn HistGradientBoosting) or "clone"."""
        if self.library != SKLEARN:
            return self.library
        return "hist" if self.family.startswith("HistGradientBoosting") else "clone"

    @property
    def supports_constraints(self) -> bool:
        """Whether the family accepts interaction constraints (XGBoost, LightGBM, HistGradientBoosting)."""
        return self.trainer != "clone"

    @property
    def boosted(self) -> bool:
        """Whether rounds can be early-stopped (every family but forests, single trees and classic GB clones)."""
        return self.trainer != "clone"

    @property
    def objective(self) -> str:
        if self.library == SKLEARN:
            return str(self.params.get("loss", ""))
        return str(self.params.get("objective", "reg:squarederror" if self.library == "xgboost" else "regression"))

    @property
    def task(self) -> str:
        """"regression", "binary" or "multiclass"."""
        if self.library == SKLEARN:
            if not _sklearn_is_classifier(self.estimator):
                return REGRESSION
            return MULTICLASS if self.n_classes > 2 else BINARY
        return task_of(self.library, self.objective)

    def to_dict(self) -> dict:
        """Plain JSON data: library, family, rounds and, per parameter, its value and origin."""
        return {"library": self.library, "family": self.family, "rounds": self.rounds,
                "rounds_origin": self.origins.get("rounds", "given"),
                "categorical": list(self.categorical),
                "params": {key: {"value": value, "origin": self.origins.get(key, "given")}
                           for key, value in self.params.items()}}

    def describe(self) -> str:
        """One line naming every value and its origin, e.g. ``eta 0.05 (recovered from the trees)``."""
        parts = [f"{key} {value:.6g}" if isinstance(value, float) else f"{key} {value}" for key, value in self.params.items()]
        parts = [f"{text} ({_ORIGIN_TEXT[self.origins.get(key, 'given')]})" for text, key in zip(parts, self.params, strict=True)]
        rounds_from = {"stored": "from the tree count", "given": "given", "default": "library default"}.get(
            self.origins.get("rounds", "given"), "given")
        family = self.library if self.estimator is None else f"scikit-learn {self.family}"
        return f"refit recipe ({family}): " + ", ".join(parts) + f", {self.rounds} rounds ({rounds_from})"


def _sklearn_is_classifier(estimator: Any) -> bool:
    from sklearn.base import is_classifier

    return bool(is_classifier(estimator))


def _xgboost_base(ensemble: ForestGraph, live: dict) -> tuple[dict, dict, list[str]]:
    """Parameters of a saved or live XGBoost model, their origins and notes."""
    base: dict = {"objective": ensemble.objective}
    if ensemble.provenance.stored_params.get("num_class"):
        base["num_class"] = int(ensemble.provenance.stored_params["num_class"])
    if ensemble.trees_per_round > 1:
        base["num_parallel_tree"] = ensemble.trees_per_round
    origins = dict.fromkeys(base, "stored")
    base.update(live)
    origins.update(dict.fromkeys(live, "stored"))
    notes: list[str] = []
    if live:
        return base, origins, notes
    depth = int(ensemble.depth[ensemble.is_leaf].max()) if ensemble.n_nodes else 1
    base["max_depth"], origins["max_depth"] = max(depth, 1), "recovered"
    eta, reg_lambda, spread, n_splits = recover_xgboost_step(ensemble)
    if n_splits >= _MIN_RECOVERY_NODES and spread <= _MAX_LOG_SPREAD:
        base.update(eta=eta, reg_lambda=reg_lambda)
        origins.update(eta="recovered", reg_lambda="recovered")
        notes.append(f"A saved XGBoost model does not store its training parameters: eta {eta:.6g} and lambda "
                     f"{reg_lambda:.3g} were recovered from {n_splits} splits (spread of log eta {spread:.1e}), "
                     f"max_depth {base['max_depth']} from the deepest leaf; the rest are XGBoost's defaults.")
    else:
        base.update(eta=_XGBOOST_DEFAULTS["eta"], reg_lambda=_XGBOOST_DEFAULTS["lambda"])
        origins.update(eta="default", reg_lambda="default")
        notes.append(f"A saved XGBoost model does not store its training parameters, and eta and lambda could not "
                     f"be recovered from its trees ({n_splits} usable splits, spread of log eta {spread:.1e}; alpha "
                     "or max_delta_step change the leaf formula): lambda is XGBoost's default 1, and eta its default 0.3 "
                     "unless calibrated on the data. Give the real values with params (--param eta=...) for a "
                     "trustworthy noise floor.")
    return base, origins, notes


def live_model_of(model: Any) -> Any:
    """The library object behind ``model`` when the caller passed one (not a path, file text or graph), else None."""
    if model is None or isinstance(model, (str, bytes, os.PathLike, ForestGraph, dict)):
        return None
    return model


def check_retrainable(ensemble: ForestGraph, library: str | None = None, *, live_model: Any = None) -> None:
    """Refuse, before any work, a model treeprobe cannot retrain (raises UnsupportedModelError).

    Called at the entry points that retrain (triage with a target, constraint validation) so that a
    model of an unsupported kind fails at once instead of after the H computations. XGBoost and
    LightGBM models retrain from the file; a scikit-learn model needs its estimator object (a live
    estimator or a trusted pickle) to be cloned.
    """
    if ensemble.library not in (*LIBRARIES, SKLEARN):
        raise UnsupportedModelError(
            f"{ensemble.source}: treeprobe retrains XGBoost, LightGBM and scikit-learn models; this one is from "
            f"{ensemble.library}"
        )
    if library is not None and library != ensemble.library:
        raise ParameterError(f"library={library!r} contradicts the model, which is from {ensemble.library}")
    if ensemble.library == SKLEARN and live_model is None:
        raise UnsupportedModelError(
            f"{ensemble.source}: refitting a scikit-learn {ensemble.provenance.estimator or 'model'} needs the "
            "estimator object (pass the fitted estimator, or a trusted pickle with --trust-pickle), not a graph"
        )
    if ensemble.library in LIBRARIES:
        task_of(ensemble.library, ensemble.objective)  # refuses ranking and survival objectives


def _without_aliases(base: dict, given: dict) -> dict:
    """``base`` without the XGBoost parameters the user gave under another of their names (eta vs learning_rate)."""
    dropped = {name for names in _XGBOOST_ALIASES if names & given.keys() for name in names - given.keys()}
    return {key: value for key, value in base.items() if key not in dropped}


def _sklearn_rounds(estimator: Any) -> int:
    """Boosting iterations (HistGB ``n_iter_``, GB ``n_estimators_``), trees of a forest, or 1 for a single tree."""
    for attribute in ("n_iter_", "n_estimators_"):
        if hasattr(estimator, attribute):
            return int(getattr(estimator, attribute))
    members = getattr(estimator, "estimators_", None)
    return len(members) if members is not None else 1


def _sklearn_recipe(ensemble: ForestGraph, model: Any, given: dict, num_boost_round: int | None) -> Recipe:
    """The recipe of a scikit-learn estimator: its unfitted clone, main settings and given overrides."""
    from sklearn.base import clone

    template = clone(model)
    settings = template.get_params(deep=False)
    unknown = sorted(set(given) - set(settings))
    if unknown:
        raise ParameterError(f"params {', '.join(unknown)} are not settings of {type(model).__name__}; it has "
                             f"{', '.join(sorted(settings))}")
    template.set_params(**given)
    shown = {key: template.get_params(deep=False)[key] for key in _SKLEARN_SHOWN if key in settings}
    shown.update(given)
    origins = {**dict.fromkeys(shown, "stored"), **dict.fromkeys(given, "given")}
    rounds = num_boost_round if num_boost_round is not None else _sklearn_rounds(model)
    origins["rounds"] = "given" if num_boost_round is not None else "stored"
    categorical = tuple(j for j, kind in enumerate(ensemble.feature_types) if kind == "categorical")
    return Recipe(SKLEARN, shown, rounds, origins, ensemble.feature_names, [], template, categorical,
                  len(getattr(model, "classes_", ())))


def training_recipe(source: ForestGraph | dict, *, live_model: Any = None, params: dict | None = None,
                    library: str | None = None, num_boost_round: int | None = None) -> Recipe:
    """The recipe to retrain a model with: from the model, its live object and the user's params.

    Parameters
    ----------
    source : ForestGraph or dict
        The loaded model graph, or a dict of native XGBoost / LightGBM
        training parameters (then ``library`` and ``num_boost_round`` are required).
    live_model : model object, optional
        The object the user passed (a live XGBoost booster knows its full
        configuration; a scikit-learn estimator is cloned for refits).
    params : dict, optional
        Training parameters given by the user (origin "given").
    library : {"xgboost", "lightgbm"}, optional
        Needed with a parameter dict; checked against the model otherwise.
    num_boost_round : int, optional
        Rounds; default the model's (trees / outputs / parallel trees).

    Returns
    -------
    Recipe

    Notes
    -----
    Precedence: ``params`` ("given") over the live configuration and stored
    parameters ("stored") over values read back from the trees
    ("recovered") over library defaults ("default"). A saved XGBoost JSON
    keeps no learning rate or penalty; they are recovered with
    :func:`recover_xgboost_step`. ``multi:softmax`` is refitted as
    ``multi:softprob`` (same loss; the refits need class probabilities).
    """
    given = {str(k): v for k, v in (params or {}).items()}
    if isinstance(source, dict):
        if library not in LIBRARIES:
            raise ParameterError(f"library must be one of {LIBRARIES} when model_or_params is a parameter dict, got {library!r}")
        if num_boost_round is None:
            raise ParameterError("num_boost_round is required when model_or_params is a parameter dict")
        merged = {**{str(k): v for k, v in source.items()}, **given}
        return _softprob(Recipe(library, merged, num_boost_round, {**dict.fromkeys(merged, "given"), "rounds": "given"}))
    ensemble = source
    check_retrainable(ensemble, library, live_model=live_model)
    if ensemble.library == SKLEARN:
        return _sklearn_recipe(ensemble, live_model, given, num_boost_round)
    if ensemble.library == "lightgbm":
        stored = ensemble.provenance.stored_params
        base = {key: stored[key] for key in _LIGHTGBM_KEYS if stored.get(key, "") != ""}
        base.update({key: base[key] not in ("0", "false") for key in _LIGHTGBM_BOOLEANS & base.keys()})
        origins = dict.fromkeys(base, "stored")
        notes = [] if stored else ["The LightGBM model stores no training parameters; LightGBM's defaults were used."]
    else:
        base, origins, notes = _xgboost_base(ensemble, live_training_params(live_model) if live_model is not None else {})
        base = _without_aliases(base, given)
    origins.update(dict.fromkeys(given, "given"))
    rounds = num_boost_round if num_boost_round is not None else rounds_of(ensemble)
    origins["rounds"] = "given" if num_boost_round is not None else "stored"
    merged = {**base, **given}
    categorical = tuple(j for j, kind in enumerate(ensemble.feature_types) if kind == "categorical")
    return _softprob(Recipe(ensemble.library, merged, rounds, {k: origins[k] for k in [*merged, "rounds"]},
                            ensemble.feature_names, notes, None, categorical))


def _softprob(recipe: Recipe) -> Recipe:
    """XGBoost's ``multi:softmax`` refitted as ``multi:softprob``: the same loss, with probabilities to score."""
    if recipe.params.get("objective") != "multi:softmax":
        return recipe
    notes = [*recipe.notes, "multi:softmax is refitted as multi:softprob (same loss; the refits need probabilities)."]
    return replace(recipe, params={**recipe.params, "objective": "multi:softprob"}, notes=notes)


def constrained_substitute(recipe: Recipe) -> Recipe:
    """The nearest family with interaction constraints for a scikit-learn family without them.

    Forests, classic gradient boosting and single trees have no interaction
    constraints; scikit-learn's ``HistGradientBoosting{Regressor,Classifier}``
    has (``interaction_cst``). The substitute keeps the task, the categorical
    features and scikit-learn's defaults (learning rate 0.1, 31 leaves),
    with 100 rounds as the start of the early-stopping budget.
    """
    from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor

    if recipe.supports_constraints:
        return recipe
    classifier = _sklearn_is_classifier(recipe.estimator)
    template = (HistGradientBoostingClassifier if classifier else HistGradientBoostingRegressor)()
    shown = {key: template.get_params(deep=False)[key] for key in ("learning_rate", "max_leaf_nodes", "min_samples_leaf")}
    note = (f"{recipe.family} has no interaction constraints; the nearest family that has them, scikit-learn's "
            f"{type(template).__name__} (interaction_cst) with its default settings, stands in for it.")
    return Recipe(SKLEARN, shown, 100, {**dict.fromkeys(shown, "default"), "rounds": "default"},
                  recipe.feature_names, [note], template, recipe.categorical, recipe.n_classes)


def target_values(y: Any) -> np.ndarray:
    """The target as float64: numbers as they are; text class labels coded 0, 1, ... in sorted label order.

    Sorted order is how scikit-learn's ``LabelEncoder`` (and so ``XGBClassifier`` / ``LGBMClassifier``
    fitted on encoded labels) numbers classes, so "no"/"yes" become 0/1. Missing labels are refused.

    Raises
    ------
    DataError
        Naming the first missing label and its row.
    """
    values = np.asarray(y).ravel()
    try:
        return values.astype(np.float64)
    except (TypeError, ValueError):
        pass
    labels = pd.Series(values, dtype=object)
    missing = labels.isna().to_numpy()
    if missing.any():
        raise DataError(f"the target holds {int(missing.sum())} missing class label(s); the first at row "
                        f"{int(np.flatnonzero(missing)[0])}")
    text = labels.astype(str)
    classes = sorted(text.unique())
    return pd.Index(classes).get_indexer(text).astype(np.float64)


def checked_target(y: Any, n_rows: int, task: str) -> np.ndarray:
    """The target as float64 (:func:`target_values`), one finite value per row; class codes 0, 1, ... for classifiers.

    Raises
    ------
    DataError
        Wrong length, NaN or infinite values (naming the first row), or a
        classification target that is not class codes.
    """
    target = target_values(y)
    if target.size != n_rows:
        raise DataError(f"y has {target.size} values for {n_rows} rows of X")
    if not np.all(np.isfinite(target)):
        bad = ~np.isfinite(target)
        raise DataError(f"y holds {int(bad.sum())} NaN or infinite value(s); the first at row {int(np.flatnonzero(bad)[0])}")
    if task != REGRESSION and (not np.all(target == np.round(target)) or target.min() < 0):
        raise DataError("y must hold class labels (text, or codes 0, 1, ...) for a classification model")
    return target


def design_matrix(X: Any, y: Any, names: tuple[str, ...] | None) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    """Numeric X (columns in the model's order when ``names`` is given), the target as float64, and column names.

    Used when only a parameter dict is known; with a model, entry points code X with
    :func:`treeprobe.data.model_matrix` (categorical columns as the model's codes).
    """
    if isinstance(X, pd.DataFrame):
        columns = tuple(str(c) for c in X.columns)
        if names is not None:
            missing = [n for n in names if n not in columns]
            if missing:
                raise DataError(f"X lacks the model's column(s) {', '.join(missing)}; it has {', '.join(columns)}")
            X = X.set_axis(list(columns), axis=1)[list(names)]
            columns = names
        try:
            matrix = X.to_numpy(dtype=np.float64)
        except (TypeError, ValueError):
            bad = next(c for c in X.columns if not pd.api.types.is_numeric_dtype(X[c]))
            raise DataError(f"X column {bad!r} is not numeric") from None
    else:
        matrix = np.asarray(X, dtype=np.float64) if not isinstance(X, np.ndarray) else X.astype(np.float64)
        if matrix.ndim != 2:
            raise DataError(f"X must be 2-D (rows x features), got shape {matrix.shape}")
        columns = names if names is not None else tuple(f"x{j}" for j in range(matrix.shape[1]))
    if names is not None and matrix.shape[1] != len(names):
        raise DataError(f"X has {matrix.shape[1]} columns; the model has {len(names)} features")
    target = checked_target(y, matrix.shape[0], REGRESSION)
    if np.isinf(matrix).any():
        row, column = np.argwhere(np.isinf(matrix))[0]
        raise DataError(f"X holds an infinite value at row {row}, column {columns[column]!r}")
    return matrix, target, columns


# ------------------------------------------------------------------ fits
# Early stopping: patience and inner split are common practice; the budget lets a constrained model, which
# needs more rounds, grow well past the original count.
PATIENCE = 50
INNER_FRACTION = 0.8
_ROUND_BUDGET_FACTOR = 8
_MIN_ROUND_BUDGET = 200


def round_budget(recipe: Recipe) -> int:
    """Most rounds an early-stopped fit may grow: ``max(8 * rounds, 200)`` (common practice, our choice)."""
    return max(_ROUND_BUDGET_FACTOR * recipe.rounds, _MIN_ROUND_BUDGET)


def _xgboost_data(module: Any, recipe: Recipe, X: np.ndarray, y: np.ndarray | None, columns: list[str]) -> Any:
    types = ["c" if j in recipe.categorical else "q" for j in range(X.shape[1])]
    return module.DMatrix(X, y, feature_names=columns, feature_types=types, enable_categorical=bool(recipe.categorical))


def _fit_xgboost(recipe: Recipe, X: np.ndarray, y: np.ndarray, groups: list[list[int]] | None, threads: int,
                 seed: int, rounds: int, stop: tuple | None, columns: list[str]) -> tuple[Any, int]:
    module = import_library("xgboost")
    run = {**recipe.params, "nthread": threads, "seed": seed}
    if groups is not None:
        run["interaction_constraints"] = xgboost_constraint_text(groups)
    train = _xgboost_data(module, recipe, X, y, columns)
    if stop is None:
        return module.train(run, train, num_boost_round=rounds), rounds
    X_stop, y_stop, patience = stop
    booster = module.train(run, train, num_boost_round=rounds, evals=[(_xgboost_data(module, recipe, X_stop, y_stop,
                                                                                      columns), "early_stop")],
                           early_stopping_rounds=patience, verbose_eval=False)
    best = int(booster.best_iteration) + 1
    return booster[:best], best


def _fit_lightgbm(recipe: Recipe, X: np.ndarray, y: np.ndarray, groups: list[list[int]] | None, threads: int,
                  seed: int, rounds: int, stop: tuple | None, columns: list[str]) -> tuple[Any, int]:
    module = import_library("lightgbm")
    run = {**recipe.params, "num_threads": threads, "seed": seed, "verbosity": -1}
    if groups is not None:
        run["interaction_constraints"] = groups
    categorical = list(recipe.categorical) or "auto"
    train = module.Dataset(X, y, feature_name=columns, categorical_feature=categorical, params={"verbosity": -1})
    if stop is None:
        return module.train(run, train, num_boost_round=rounds), rounds
    X_stop, y_stop, patience = stop
    held_out = module.Dataset(X_stop, y_stop, reference=train, categorical_feature=categorical)
    booster = module.train(run, train, num_boost_round=rounds, valid_sets=[held_out],
                           callbacks=[module.early_stopping(patience, verbose=False)])
    best = int(booster.best_iteration) if booster.best_iteration > 0 else booster.current_iteration()
    # The booster keeps the rounds after the best; a copy cut at the best is what later stages read.
    return module.Booster(model_str=booster.model_to_string(num_iteration=best)), best


def _fit_hist(recipe: Recipe, X: np.ndarray, y: np.ndarray, groups: list[list[int]] | None, threads: int,
              seed: int, rounds: int, stop: tuple | None, columns: list[str]) -> tuple[Any, int]:
    from sklearn.base import clone
    from threadpoolctl import threadpool_limits

    settings: dict[str, Any] = {"max_iter": rounds, "early_stopping": False, "random_state": seed}
    if recipe.categorical:
        settings["categorical_features"] = [j in recipe.categorical for j in range(X.shape[1])]
    if groups is not None:
        settings["interaction_cst"] = groups
    with threadpool_limits(threads, user_api="openmp"):
        if stop is None:
            return clone(recipe.estimator).set_params(**settings).fit(X, y), rounds
        X_stop, y_stop, patience = stop
        model = clone(recipe.estimator).set_params(**{**settings, "early_stopping": True, "scoring": "loss",
                                                      "n_iter_no_change": patience})
        model.fit(X, y, X_val=X_stop, y_val=y_stop)
        # validation_score_[i] is minus the hold-out loss after i iterations (i = 0: the constant start).
        best = int(np.argmax(model.validation_score_[1:])) + 1
        if best < model.n_iter_:
            model = clone(recipe.estimator).set_params(**{**settings, "max_iter": best}).fit(X, y)
        return model, best


def _fit_clone(recipe: Recipe, X: np.ndarray, y: np.ndarray, groups: list[list[int]] | None, threads: int,
               seed: int, rounds: int, stop: tuple | None, columns: list[str]) -> tuple[Any, int]:
    from sklearn.base import clone

    if groups is not None:
        raise UnsupportedModelError(f"{recipe.family} has no interaction constraints; see constrained_substitute")
    model = clone(recipe.estimator)
    own = model.get_params(deep=False)
    model.set_params(**{key: value for key, value in (("random_state", seed), ("n_jobs", threads)) if key in own})
    return model.fit(X, y), recipe.rounds


_FITTERS = {"xgboost": _fit_xgboost, "lightgbm": _fit_lightgbm, "hist": _fit_hist, "clone": _fit_clone}


def _columns(recipe: Recipe, X: np.ndarray) -> list[str]:
    return list(recipe.feature_names) if recipe.feature_names is not None else [f"x{j}" for j in range(X.shape[1])]


def fit(recipe: Recipe, X: np.ndarray, y: np.ndarray, *, groups: list[list[int]] | None = None,
        rounds: int | None = None, threads: int = 0, seed: int = 0) -> Any:
    """Train the recipe's model on all of ``(X, y)`` for a fixed number of rounds (default the recipe's).

    ``groups``: interaction-constraint groups of feature indices (None: the
    family's own setting). ``threads``: threads of this fit (0 = every free core).
    """
    model, _ = _FITTERS[recipe.trainer](recipe, X, y, groups, _thread_count(threads), seed,
                                        recipe.rounds if rounds is None else rounds, None, _columns(recipe, X))
    return model


def _thread_count(threads: int) -> int:
    return threads if threads > 0 else parallel.free_cores()


def _held_out_split(n_rows: int, inner_fraction: float, seed: int,
                    labels: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Row indices of the inner training part and of the early-stopping hold-out (per class when labels are given)."""
    rng = np.random.default_rng(seed)
    strata = [np.arange(n_rows)] if labels is None else [np.flatnonzero(labels == c) for c in np.unique(labels)]
    fit_parts, stop_parts = [], []
    for rows in strata:
        shuffled = rng.permutation(rows)
        n_stop = min(max(1, round((1.0 - inner_fraction) * len(rows))), len(rows) - 1) if len(rows) > 1 else 0
        stop_parts.append(shuffled[:n_stop])
        fit_parts.append(shuffled[n_stop:])
    return np.sort(np.concatenate(fit_parts)), np.sort(np.concatenate(stop_parts))


def fit_early_stopped(recipe: Recipe, X: np.ndarray, y: np.ndarray, *, groups: list[list[int]] | None = None,
                      threads: int = 0, seed: int = 0, max_rounds: int | None = None, patience: int = PATIENCE,
                      inner_fraction: float = INNER_FRACTION) -> tuple[Any, int]:
    """Fit on an inner split of ``(X, y)``, stop early on the rest; the model cut at its best round count.

    Parameters
    ----------
    recipe : Recipe
    X, y : ndarray
        Design matrix (categorical features as codes) and target.
    groups : list of list of int, optional
        Interaction-constraint groups (None: the family's own setting).
    threads : int, default 0
        Threads of this fit (0 = all cores; 1 inside parallel workers).
    seed : int, default 0
        Seed of the split and of the library's sampling.
    max_rounds : int, optional
        Round budget; default :func:`round_budget`.
    patience, inner_fraction
        Rounds without improvement before stopping; share of rows fitted.

    Returns
    -------
    model, best_rounds
        The model fitted on the inner split predicting with its first
        ``best_rounds`` rounds only, and ``best_rounds`` (1-based).

    Notes
    -----
    A seeded split keeps ``inner_fraction`` of the rows for fitting and the
    rest as the hold-out (stratified by class for classifiers). Boosting runs
    up to ``max_rounds`` and stops once the library's default loss for the
    objective (RMSE, log-loss) on the hold-out has not improved for
    ``patience`` rounds: ``xgboost.train(..., evals, early_stopping_rounds)``,
    LightGBM's ``early_stopping`` callback, or HistGradientBoosting's
    ``early_stopping`` with ``X_val``. Families without rounds to stop
    (forests, single trees, classic gradient boosting clones) fit all rows
    with their own settings.
    """
    columns = _columns(recipe, X)
    if not recipe.boosted:
        return _FITTERS[recipe.trainer](recipe, X, y, groups, _thread_count(threads), seed, recipe.rounds, None,
                                        columns)
    labels = y.astype(int) if recipe.task != REGRESSION else None
    fit_rows, stop_rows = _held_out_split(len(y), inner_fraction, seed, labels)
    budget = round_budget(recipe) if max_rounds is None else max_rounds
    return _FITTERS[recipe.trainer](recipe, X[fit_rows], y[fit_rows], groups, _thread_count(threads), seed, budget,
                                    (X[stop_rows], y[stop_rows], patience), columns)


def predict_response(recipe: Recipe, model: Any, X: np.ndarray) -> np.ndarray:
    """Predictions on the response scale: values for regression, class probabilities for classifiers.

    Binary: probability of class 1, shape (n_rows,); multiclass: shape (n_rows, n_classes).
    """
    if recipe.library == "xgboost":
        module = import_library("xgboost")
        predicted = model.predict(_xgboost_data(module, recipe, X, None, _columns(recipe, X)))
        # logitraw predicts the margin; the scores need probabilities.
        return 1.0 / (1.0 + np.exp(-predicted)) if recipe.objective == "binary:logitraw" else predicted
    if recipe.library == "lightgbm":
        return model.predict(X)
    if recipe.task == REGRESSION:
        return model.predict(X)
    probability = model.predict_proba(X)
    return probability[:, 1] if recipe.task == BINARY else probability


def loss_scores(task: str, y: np.ndarray, predicted: np.ndarray, n_classes: int) -> dict[str, float]:
    """Scores of response-scale predictions: ``rmse`` (regression), ``log_loss`` and, for binary, ``auc``.

    scikit-learn's ``mean_squared_error``, ``log_loss`` and ``roc_auc_score``; ``n_classes`` shapes
    multiclass probabilities (n_rows, n_classes). AUC is NaN when ``y`` holds one class only.
    """
    from sklearn.metrics import log_loss, mean_squared_error, roc_auc_score

    if task == REGRESSION:
        return {"rmse": float(np.sqrt(mean_squared_error(y, predicted)))}
    if task == BINARY:
        probability = np.clip(predicted.ravel(), 1e-15, 1 - 1e-15)
        scores = {"log_loss": float(log_loss(y, probability, labels=[0, 1]))}
        scores["auc"] = float(roc_auc_score(y, probability)) if np.unique(y).size == 2 else float("nan")
        return scores
    probability = predicted.reshape(len(y), n_classes)
    return {"log_loss": float(log_loss(y, probability, labels=list(range(n_classes))))}


def _training_loss(task: str, y: np.ndarray, predicted: np.ndarray) -> float:
    """The loss :func:`loss_scores` gives first: RMSE for regression, log-loss for classifiers."""
    n_classes = predicted.shape[1] if predicted.ndim == 2 else 2
    return next(iter(loss_scores(task, y, predicted, n_classes).values()))


def calibrate_step(recipe: Recipe, graph: ForestGraph, X: np.ndarray, y: np.ndarray, *, seed: int = 0) -> Recipe:
    """Choose the learning rate of a recipe whose eta is only the library default, by matching the model on the data.

    Parameters
    ----------
    recipe : Recipe
        Returned unchanged unless it is an XGBoost recipe whose ``eta`` has
        origin "default" (neither stored, given nor recovered from the trees).
    graph : ForestGraph
        The saved model, whose training loss on the rows is the reference.
    X, y : ndarray
        Coded design matrix and target (at most 2,000 rows are used, drawn with ``seed``).

    Returns
    -------
    Recipe
        With ``eta`` set to the grid value whose refit (the recipe's rounds,
        all rows used) comes closest to the saved model's training loss, in
        absolute log ratio; origin "calibrated", and a note with the figures.

    Notes
    -----
    Training loss is the root mean squared error for regression, log-loss
    for classifiers (:func:`loss_scores`), of response-scale predictions. It falls as eta grows at a
    fixed round count, so matching it pins the step size that reproduces
    the model's fit to these rows. The grid (0.01, 0.02, 0.05, 0.1, 0.2,
    0.3) holds common values; it is our choice.
    """
    if recipe.library != "xgboost" or recipe.origins.get("eta") != "default":
        return recipe
    rows = np.random.default_rng(seed).permutation(len(y))[:_CALIBRATION_ROWS]
    X, y = X[rows], y[rows]
    reference = _training_loss(recipe.task, y, graph.predict(X, checked=True))
    gaps = []
    for eta in _CALIBRATION_ETAS:
        trial = replace(recipe, params={**recipe.params, "eta": eta})
        loss = _training_loss(recipe.task, y, predict_response(trial, fit(trial, X, y, threads=0, seed=seed), X))
        gaps.append((abs(np.log(max(loss, 1e-300) / max(reference, 1e-300))), eta, loss))
    _, eta, loss = min(gaps)
    note = (f"eta could not be recovered from the trees, so it was calibrated: of {', '.join(map(str, _CALIBRATION_ETAS))}, "
            f"eta {eta} gives a refit whose training loss on {len(y)} rows ({loss:.4g}) comes closest to the saved "
            f"model's ({reference:.4g}).")
    return replace(recipe, params={**recipe.params, "eta": eta}, origins={**recipe.origins, "eta": "calibrated"},
                   notes=[*recipe.notes, note])
