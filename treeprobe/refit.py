"""Retraining a model the way it was trained: same library, objective and hyperparameters.

Later stages refit a model to test a hypothesis about it: the constraint
validation of :mod:`treeprobe.constraints` refits with and without
interaction constraints, and the noise floor of :mod:`treeprobe.verdicts`
refits on synthetic targets with no interaction (Friedman and Popescu 2008,
section 8.3). Both need the same thing: the training set-up read back from a
saved model (LightGBM stores its parameters in the model text; a saved
XGBoost JSON stores only the objective and a few learner facts, a live
booster its full configuration), a numeric design matrix, and a fit and
predict with the library itself. xgboost and lightgbm are optional; a missing
one gives :class:`~treeprobe.errors.MissingLibraryError`.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError, MissingLibraryError, ParameterError, UnsupportedModelError
from .graph import ForestGraph

__all__ = [
    "LIBRARIES",
    "REGRESSION",
    "BINARY",
    "MULTICLASS",
    "import_library",
    "task_of",
    "rounds_of",
    "live_training_params",
    "check_retrainable",
    "target_values",
    "params_from_xgboost_config",
    "Recipe",
    "recover_xgboost_step",
    "training_recipe",
    "with_threads",
    "training_setup",
    "design_matrix",
    "fit_model",
    "predict_model",
    "xgboost_constraint_text",
]

LIBRARIES = ("xgboost", "lightgbm")
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
    "tweedie_variance_power", "linear_tree", "data_sample_strategy",
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
ORIGINS = ("stored", "given", "recovered", "default")
_ORIGIN_TEXT = {"stored": "stored in the model", "given": "given", "recovered": "recovered from the trees",
                "default": "library default"}
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
        "xgboost" or "lightgbm".
    params : dict
        Native training parameters passed to the library's ``train``.
    rounds : int
        Boosting rounds.
    origins : dict
        Parameter name (and "rounds") -> one of ``ORIGINS``: "stored" (in the
        model file or the live model's configuration), "given" (by the user),
        "recovered" (read back from the trees) or "default" (the library's).
    feature_names : tuple of str or None
        The model's feature names (None when built from a parameter dict).
    notes : list of str
        Sentences for the reader (recovery figures, fall-backs).
    """

    library: str
    params: dict
    rounds: int
    origins: dict
    feature_names: tuple[str, ...] | None = None
    notes: list[str] = field(default_factory=list)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Recipe):
            return NotImplemented
        return (self.library, self.params, self.rounds, self.origins, self.feature_names) == (
            other.library, other.params, other.rounds, other.origins, other.feature_names)

    def to_dict(self) -> dict:
        """Plain JSON data: library, rounds and, per parameter, its value and origin."""
        return {"library": self.library, "rounds": self.rounds, "rounds_origin": self.origins.get("rounds", "given"),
                "params": {key: {"value": value, "origin": self.origins.get(key, "given")}
                           for key, value in self.params.items()}}

    def describe(self) -> str:
        """One line naming every value and its origin, e.g. ``eta 0.05 (recovered from the trees)``."""
        parts = [f"{key} {value:.6g}" if isinstance(value, float) else f"{key} {value}" for key, value in self.params.items()]
        parts = [f"{text} ({_ORIGIN_TEXT[self.origins.get(key, 'given')]})" for text, key in zip(parts, self.params, strict=True)]
        rounds_from = {"stored": "from the tree count", "given": "given"}.get(self.origins.get("rounds", "given"), "given")
        return f"refit recipe ({self.library}): " + ", ".join(parts) + f", {self.rounds} rounds ({rounds_from})"


def with_threads(recipe: Recipe, threads: int) -> dict:
    """The recipe's parameters with the thread count of one fit (``threads <= 0`` = all cores)."""
    count = threads if threads > 0 else (os.cpu_count() or 1)
    return {**recipe.params, ("nthread" if recipe.library == "xgboost" else "num_threads"): count}


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
                     "or max_delta_step change the leaf formula): XGBoost's defaults eta 0.3 and lambda 1 were used. "
                     "Give the real values with params (--param eta=...) for a trustworthy noise floor.")
    return base, origins, notes


def check_retrainable(ensemble: ForestGraph, library: str | None = None) -> None:
    """Refuse, before any work, a model treeprobe cannot retrain (raises UnsupportedModelError).

    Called at the entry points that retrain (triage with a target, constraint validation) so that a
    model of an unsupported kind fails at once instead of after the H computations.
    """
    if ensemble.library not in LIBRARIES:
        raise UnsupportedModelError(
            f"{ensemble.source}: treeprobe retrains XGBoost and LightGBM models; this one is from "
            f"{ensemble.library}"
        )
    if library is not None and library != ensemble.library:
        raise ParameterError(f"library={library!r} contradicts the model, which is from {ensemble.library}")
    if "categorical" in ensemble.feature_types:
        raise UnsupportedModelError(f"{ensemble.source}: retraining models with categorical splits is not supported")


def _without_aliases(base: dict, given: dict) -> dict:
    """``base`` without the XGBoost parameters the user gave under another of their names (eta vs learning_rate)."""
    dropped = {name for names in _XGBOOST_ALIASES if names & given.keys() for name in names - given.keys()}
    return {key: value for key, value in base.items() if key not in dropped}


def training_recipe(source: ForestGraph | dict, *, live_params: dict | None = None, params: dict | None = None,
                    library: str | None = None, num_boost_round: int | None = None) -> Recipe:
    """The recipe to retrain a model with: from the model, its live configuration and the user's params.

    ``source`` is the loaded model graph, or a dict of native training
    parameters (then ``library`` and ``num_boost_round`` are required).
    ``live_params`` are those of :func:`live_training_params`. Precedence:
    ``params`` (origin "given") over the live configuration and stored
    parameters ("stored") over values read back from the trees ("recovered")
    over library defaults ("default"). A saved XGBoost JSON keeps no learning
    rate or penalty; they are recovered with :func:`recover_xgboost_step`.
    """
    given = {str(k): v for k, v in (params or {}).items()}
    if isinstance(source, dict):
        if library not in LIBRARIES:
            raise ParameterError(f"library must be one of {LIBRARIES} when model_or_params is a parameter dict, got {library!r}")
        if num_boost_round is None:
            raise ParameterError("num_boost_round is required when model_or_params is a parameter dict")
        merged = {**{str(k): v for k, v in source.items()}, **given}
        return Recipe(library, merged, num_boost_round, {**dict.fromkeys(merged, "given"), "rounds": "given"})
    ensemble = source
    check_retrainable(ensemble, library)
    if ensemble.library == "lightgbm":
        stored = ensemble.provenance.stored_params
        base = {key: stored[key] for key in _LIGHTGBM_KEYS if stored.get(key, "") != ""}
        base.update({key: base[key] not in ("0", "false") for key in _LIGHTGBM_BOOLEANS & base.keys()})
        origins = dict.fromkeys(base, "stored")
        notes = [] if stored else ["The LightGBM model stores no training parameters; LightGBM's defaults were used."]
    else:
        base, origins, notes = _xgboost_base(ensemble, dict(live_params or {}))
    if ensemble.library == "xgboost":
        base = _without_aliases(base, given)
    origins.update(dict.fromkeys(given, "given"))
    rounds = num_boost_round if num_boost_round is not None else rounds_of(ensemble)
    origins["rounds"] = "given" if num_boost_round is not None else "stored"
    merged = {**base, **given}
    return Recipe(ensemble.library, merged, rounds, {k: origins[k] for k in [*merged, "rounds"]},
                  ensemble.feature_names, notes)


def training_setup(source: ForestGraph | dict, *, library: str | None = None, params: dict | None = None,
                   num_boost_round: int | None = None,
                   live_params: dict | None = None) -> tuple[str, dict, int, tuple[str, ...] | None, list[str]]:
    """Library, parameters, rounds, the model's feature names (None for a params dict) and notes.

    The tuple form of :func:`training_recipe` (same arguments and precedence).
    """
    recipe = training_recipe(source, live_params=live_params, params=params, library=library,
                             num_boost_round=num_boost_round)
    return recipe.library, dict(recipe.params), recipe.rounds, recipe.feature_names, [*recipe.notes, recipe.describe()]


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


def design_matrix(X: Any, y: Any, names: tuple[str, ...] | None) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
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
    target = target_values(y)
    if target.size != matrix.shape[0]:
        raise DataError(f"y has {target.size} values for {matrix.shape[0]} rows of X")
    if not np.all(np.isfinite(target)):
        raise DataError(f"y holds {int((~np.isfinite(target)).sum())} NaN or infinite value(s); the first at row "
                        f"{int(np.flatnonzero(~np.isfinite(target))[0])}")
    if np.isinf(matrix).any():
        row, column = np.argwhere(np.isinf(matrix))[0]
        raise DataError(f"X holds an infinite value at row {row}, column {columns[column]!r}")
    return matrix, target, columns


def fit_model(library: str, module: Any, params: dict, X: np.ndarray, y: np.ndarray, rounds: int,
         groups: list[list[int]] | None, columns: tuple[str, ...]) -> Any:
    if library == "xgboost":
        run = dict(params)
        if groups is not None:
            run["interaction_constraints"] = xgboost_constraint_text(groups)
        return module.train(run, module.DMatrix(X, y, feature_names=list(columns)), num_boost_round=rounds)
    run = {**params, "verbosity": -1}
    if groups is not None:
        run["interaction_constraints"] = groups
    data = module.Dataset(X, y, feature_name=list(columns), params={"verbosity": -1})
    return module.train(run, data, num_boost_round=rounds)


def predict_model(library: str, module: Any, model: Any, X: np.ndarray, columns: tuple[str, ...],
             objective: str) -> np.ndarray:
    if library == "xgboost":
        predicted = model.predict(module.DMatrix(X, feature_names=list(columns)))
        # logitraw predicts the margin; the scores need probabilities.
        return 1.0 / (1.0 + np.exp(-predicted)) if objective == "binary:logitraw" else predicted
    return model.predict(X)


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


def fit_early_stopped(library: str, module: Any, params: dict, X: np.ndarray, y: np.ndarray, *,
                      max_rounds: int, patience: int, inner_fraction: float, seed: int,
                      groups: list[list[int]] | None, columns: tuple[str, ...],
                      stratify: bool = False) -> tuple[Any, int]:
    """Fit on an inner split of ``(X, y)``, stop early on the rest; the model cut at its best round count.

    A seeded split keeps ``inner_fraction`` of the rows for fitting and the
    rest as the early-stopping hold-out (stratified by class when
    ``stratify``). Boosting runs up to ``max_rounds`` and stops once the
    library's default evaluation metric for the objective (e.g. RMSE,
    log-loss) on the hold-out has not improved for ``patience`` rounds:
    ``xgboost.train(..., evals, early_stopping_rounds)`` or LightGBM's
    ``lightgbm.early_stopping`` callback.

    Returns the model fitted on the inner split, predicting with its first
    ``best_rounds`` rounds only (XGBoost: the booster sliced to those rounds;
    LightGBM: ``predict`` uses ``best_iteration``), and ``best_rounds`` (1-based).
    """
    labels = y.astype(int) if stratify else None
    fit_rows, stop_rows = _held_out_split(len(y), inner_fraction, seed, labels)
    if library == "xgboost":
        run = dict(params)
        if groups is not None:
            run["interaction_constraints"] = xgboost_constraint_text(groups)
        fit_data = module.DMatrix(X[fit_rows], y[fit_rows], feature_names=list(columns))
        stop_data = module.DMatrix(X[stop_rows], y[stop_rows], feature_names=list(columns))
        booster = module.train(run, fit_data, num_boost_round=max_rounds, evals=[(stop_data, "early_stop")],
                               early_stopping_rounds=patience, verbose_eval=False)
        best_rounds = int(booster.best_iteration) + 1
        return booster[:best_rounds], best_rounds
    run = {**params, "verbosity": -1}
    if groups is not None:
        run["interaction_constraints"] = groups
    fit_data = module.Dataset(X[fit_rows], y[fit_rows], feature_name=list(columns), params={"verbosity": -1})
    stop_data = module.Dataset(X[stop_rows], y[stop_rows], reference=fit_data)
    booster = module.train(run, fit_data, num_boost_round=max_rounds, valid_sets=[stop_data],
                           callbacks=[module.early_stopping(patience, verbose=False)])
    best_rounds = int(booster.best_iteration) if booster.best_iteration > 0 else booster.current_iteration()
    return booster, best_rounds
