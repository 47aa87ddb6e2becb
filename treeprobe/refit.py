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
        config = json.loads(booster.save_config())["learner"]
    except Exception:  # noqa: BLE001 - a booster without a readable configuration gives no extra parameters
        return {}
    tree = config.get("gradient_booster", {}).get("tree_train_param", {})
    params = {key: tree[key] for key in _XGBOOST_TREE_KEYS if key in tree and tree[key] not in ("", "()")}
    method = config.get("gradient_booster", {}).get("gbtree_train_param", {}).get("tree_method")
    if method and method != "auto":
        params["tree_method"] = method
    return params


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


def training_setup(source: ForestGraph | dict, *, library: str | None = None, params: dict | None = None,  # noqa: C901
                   num_boost_round: int | None = None,
                   live_params: dict | None = None) -> tuple[str, dict, int, tuple[str, ...] | None, list[str]]:
    """Library, parameters, rounds, the model's feature names (None for a params dict) and notes.

    ``source`` is the loaded model graph, or a dict of native training
    parameters (then ``library`` and ``num_boost_round`` are required).
    ``live_params`` are those of :func:`live_training_params`; ``params``
    override everything read from the model.
    """
    notes: list[str] = []
    if isinstance(source, dict):
        if library not in LIBRARIES:
            raise ParameterError(f"library must be one of {LIBRARIES} when model_or_params is a parameter dict, got {library!r}")
        if num_boost_round is None:
            raise ParameterError("num_boost_round is required when model_or_params is a parameter dict")
        base = {str(k): v for k, v in source.items()}
        return library, {**base, **(params or {})}, num_boost_round, None, notes
    ensemble = source
    if ensemble.library not in LIBRARIES:
        raise UnsupportedModelError(
            f"{ensemble.source}: treeprobe retrains XGBoost and LightGBM models; this one is from "
            f"{ensemble.library}"
        )
    if library is not None and library != ensemble.library:
        raise ParameterError(f"library={library!r} contradicts the model, which is from {ensemble.library}")
    if "categorical" in ensemble.feature_types:
        raise UnsupportedModelError(f"{ensemble.source}: retraining models with categorical splits is not supported")
    library = ensemble.library
    if library == "lightgbm":
        stored = ensemble.provenance.stored_params
        base = {key: stored[key] for key in _LIGHTGBM_KEYS if stored.get(key, "") != ""}
        base.update({key: base[key] not in ("0", "false") for key in _LIGHTGBM_BOOLEANS & base.keys()})
        if not stored:
            notes.append("The LightGBM model stores no training parameters; LightGBM's defaults were used.")
    else:
        base = {"objective": ensemble.objective}
        if ensemble.provenance.stored_params.get("num_class"):
            base["num_class"] = int(ensemble.provenance.stored_params["num_class"])
        if ensemble.trees_per_round > 1:
            base["num_parallel_tree"] = ensemble.trees_per_round
        live = dict(live_params or {})
        base.update(live)
        if not live:
            depth = int(ensemble.depth[ensemble.is_leaf].max()) if ensemble.n_nodes else 1
            base["max_depth"] = max(depth, 1)
            notes.append(
                "A saved XGBoost model does not store its training parameters: max_depth was set to the deepest "
                f"leaf found ({depth}) and the rest (eta, subsample, ...) are XGBoost's defaults unless given in params."
            )
    rounds = num_boost_round if num_boost_round is not None else rounds_of(ensemble)
    return library, {**base, **(params or {})}, rounds, ensemble.feature_names, notes


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
    target = np.asarray(y, dtype=np.float64).ravel()
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
