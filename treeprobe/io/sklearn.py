"""Read fitted scikit-learn tree estimators into the common ensemble graph.

scikit-learn keeps every classic tree as columnar arrays (``tree_.feature``,
``tree_.threshold``, ``tree_.children_left`` ...) and every histogram
gradient-boosting tree as a structured ``nodes`` array; both map directly onto
:class:`~treeprobe.graph.ForestGraph`. This module reads

* single CART trees [1]_ (``DecisionTree*``, ``ExtraTree*``),
* random forests [2]_ and extremely randomised trees [3]_ (``RandomForest*``,
  ``ExtraTrees*``), averaged with ``tree_weight = 1 / n_estimators``,
* gradient boosting [4]_ (``GradientBoosting*``), with the learning rate as
  ``tree_weight`` and the init estimator's constant raw prediction as
  ``base_score``,
* histogram gradient boosting (``HistGradientBoosting*``, modelled on
  LightGBM [5]_), including categorical splits,

so that the ensemble's ``predict_raw`` reproduces scikit-learn's
``decision_function`` (boosting), ``predict`` (regressors) or
``predict_proba`` (tree and forest classifiers), and so that
:func:`sklearn_feature_importances` reproduces ``feature_importances_``.

Split gain of a classic tree node ``t`` with children ``l`` and ``r`` is the
weighted impurity decrease that scikit-learn's impurity importance sums [1]_::

    gain_t = (W_t * impurity_t - W_l * impurity_l - W_r * impurity_r) / W_root

with ``W`` the weighted training sample count of a node.

References
----------
.. [1] Breiman, L., Friedman, J., Olshen, R. and Stone, C. (1984).
   *Classification and Regression Trees*. Wadsworth.
.. [2] Breiman, L. (2001). Random forests. *Machine Learning*, 45(1), 5-32.
.. [3] Geurts, P., Ernst, D. and Wehenkel, L. (2006). Extremely randomized
   trees. *Machine Learning*, 63(1), 3-42.
.. [4] Friedman, J. H. (2001). Greedy function approximation: a gradient
   boosting machine. *Annals of Statistics*, 29(5), 1189-1232.
.. [5] Ke, G. et al. (2017). LightGBM: a highly efficient gradient boosting
   decision tree. *Advances in Neural Information Processing Systems* 30.
"""

from __future__ import annotations

import importlib
import json
from typing import Any

import numpy as np

from ..errors import UnsupportedModelError
from ..graph import ForestGraph, Provenance

__all__ = ["from_sklearn", "sklearn_feature_importances", "PRIVATE_ATTRIBUTES"]

# How scikit-learn pools per-tree impurity importances (Provenance.importance_pooling):
# forests and single trees normalise every tree to sum to one before averaging;
# classic gradient boosting averages the raw sums.
_POOL_NORMALISED = "normalised_per_tree"
_POOL_RAW = "raw_per_tree"

#: Every private part of scikit-learn this converter reads, in one place:
#: ``(owner, attribute, what it holds)``. The owner is an estimator family
#: ("GradientBoosting*", "HistGradientBoosting*"), the ``TreePredictor`` of
#: histogram boosting, or a private module. scikit-learn may rename or
#: reshape any of them in a release: each is read through :func:`_private` or
#: :func:`_private_module_attribute`, which fail with an error naming the
#: attribute, and ``tests/test_io_sklearn.py`` checks every entry against the
#: installed version.
PRIVATE_ATTRIBUTES: tuple[tuple[str, str, str], ...] = (
    ("GradientBoosting*", "_raw_predict_init", "raw prediction of the init estimator: the boosting intercept"),
    ("HistGradientBoosting*", "_predictors", "one list of TreePredictor objects per boosting iteration"),
    ("HistGradientBoosting*", "_baseline_prediction", "raw intercept of every output"),
    ("HistGradientBoosting*", "_bin_mapper", "the bin mapper; its bin_thresholds_ list the known categories"),
    ("HistGradientBoosting*", "_preprocessor", "ColumnTransformer putting categorical columns first, or None"),
    ("TreePredictor", "nodes", "structured node array (feature_idx, num_threshold, left, right, value, ...)"),
    ("TreePredictor", "raw_left_cat_bitsets", "bitsets of the categories each categorical split sends left"),
    ("sklearn.ensemble._forest", "ForestClassifier", "base class of random-forest and extra-trees classifiers"),
    ("sklearn.ensemble._forest", "ForestRegressor", "base class of random-forest and extra-trees regressors"),
    ("sklearn.ensemble._hist_gradient_boosting.common", "X_DTYPE", "dtype in which histogram boosting compares"),
)
_PRIVATE_NAMES = {attribute for _, attribute, _ in PRIVATE_ATTRIBUTES}

_LOG_LINK_LOSSES = {"poisson", "gamma"}
_CONSTANT_DUMMY_STRATEGIES = {"prior", "most_frequent", "uniform", "constant", "mean", "median", "quantile"}


# --------------------------------------------------------------------- helpers
def _estimator_label(estimator: Any) -> str:
    return type(estimator).__name__


def _sklearn_version() -> str:
    import sklearn

    return str(sklearn.__version__)


def _is_classifier(estimator: Any) -> bool:
    from sklearn.base import is_classifier

    return bool(is_classifier(estimator))


def _private(obj: Any, attribute: str, source: str) -> Any:
    """``obj.attribute`` for one of the private parts listed in ``PRIVATE_ATTRIBUTES``, or a clear error."""
    if attribute not in _PRIVATE_NAMES:
        raise AssertionError(f"{attribute!r} is not listed in PRIVATE_ATTRIBUTES")
    try:
        return getattr(obj, attribute)
    except AttributeError:
        raise UnsupportedModelError(
            f"{source}: the {type(obj).__name__} has no attribute {attribute!r}, which treeprobe reads from "
            f"scikit-learn's internals; scikit-learn {_sklearn_version()} changed it, so this estimator "
            "cannot be converted with this treeprobe version"
        ) from None


def _private_module_attribute(module: str, attribute: str) -> Any:
    """A class or constant from a private scikit-learn module listed in ``PRIVATE_ATTRIBUTES``, or a clear error."""
    if attribute not in _PRIVATE_NAMES:
        raise AssertionError(f"{attribute!r} is not listed in PRIVATE_ATTRIBUTES")
    try:
        return getattr(importlib.import_module(module), attribute)
    except (ImportError, AttributeError):
        raise UnsupportedModelError(
            f"scikit-learn {_sklearn_version()} has no {module}.{attribute}, which treeprobe reads from its "
            "internals; this treeprobe version cannot convert its estimators"
        ) from None


def _check_fitted(estimator: Any, source: str) -> None:
    from sklearn.exceptions import NotFittedError
    from sklearn.utils.validation import check_is_fitted

    try:
        check_is_fitted(estimator)
    except NotFittedError:
        raise UnsupportedModelError(
            f"{source}: the {_estimator_label(estimator)} is not fitted; call fit() before reading it"
        ) from None


def _feature_names(estimator: Any) -> tuple[tuple[str, ...], bool]:
    names = getattr(estimator, "feature_names_in_", None)
    if names is not None:
        return tuple(str(n) for n in names), False
    return tuple(f"f{j}" for j in range(int(estimator.n_features_in_))), True


def _json_params(estimator: Any) -> dict:
    # Only values that survive a JSON round trip are kept, so the parameters can
    # be stored with results and passed back to the estimator to retrain it.
    kept = {}
    for key, val in estimator.get_params(deep=False).items():
        try:
            json.dumps(val)
        except (TypeError, ValueError):
            continue
        kept[key] = val
    return kept


def _json_value(value: Any) -> Any:
    return value.item() if isinstance(value, np.generic) else value


def _classic_tree_nodes(tree: Any, *, value_mode: str, n_classes: int = 0) -> dict:
    """Per-node arrays (local child indices) of one fitted ``sklearn.tree._tree.Tree``.

    ``value_mode`` is "regression" (one column per output), "proba" (class
    fractions, renormalised as ``predict_proba`` does) or "boosting" (the
    scalar leaf value; internal values left NaN because scikit-learn does not
    refit them to the loss as it does leaves).
    """
    left = tree.children_left.astype(np.int64)
    right = tree.children_right.astype(np.int64)
    inner = left >= 0
    feature = np.where(inner, tree.feature, -1)
    threshold = np.where(inner, tree.threshold, np.nan)
    weight = tree.weighted_n_node_samples.astype(np.float64)
    weighted_impurity = weight * tree.impurity
    gain = np.zeros(left.shape[0])
    gain[inner] = (
        weighted_impurity[inner] - weighted_impurity[left[inner]] - weighted_impurity[right[inner]]
    ) / weight[0]
    raw_value = tree.value
    if value_mode == "proba":
        proba = raw_value[:, 0, :n_classes].astype(np.float64)
        total = proba.sum(axis=1, keepdims=True)
        total[total == 0.0] = 1.0
        value = proba / total
    elif value_mode == "boosting":
        value = np.where(inner, np.nan, raw_value[:, 0, 0])[:, None]
    else:
        value = raw_value[:, :, 0].astype(np.float64)
    missing = getattr(tree, "missing_go_to_left", None)
    missing_left = np.zeros(left.shape[0], bool) if missing is None else np.asarray(missing, dtype=bool) & inner
    return {
        "feature": feature,
        "threshold": threshold,
        "left": np.where(inner, left, -1),
        "right": np.where(inner, right, -1),
        "missing_left": missing_left,
        "value": value,
        "gain": gain,
        "cover": weight,
        "n_samples": tree.n_node_samples.astype(np.float64),
    }


def _stack_trees(per_tree: list[dict]) -> dict:
    """Concatenate per-tree node arrays; adds ``tree_offsets`` (children stay local)."""
    sizes = [part["feature"].shape[0] for part in per_tree]
    stacked = {key: np.concatenate([part[key] for part in per_tree]) for key in per_tree[0] if key != "categories"}
    if "categories" in per_tree[0]:
        stacked["categories"] = [cats for part in per_tree for cats in part["categories"]]
    stacked["tree_offsets"] = np.concatenate([[0], np.cumsum(sizes)])
    return stacked


def _provenance(estimator: Any, source: str, objective: str, *, importance_pooling: str = "",
                margin_scale: float = 1.0) -> Provenance:
    classes = getattr(estimator, "classes_", None)
    return Provenance(
        library="sklearn",
        library_version=_sklearn_version(),
        objective=objective,
        source=source,
        estimator=_estimator_label(estimator),
        stored_params=_json_params(estimator),
        file_format="object",
        class_labels=() if classes is None else tuple(_json_value(c) for c in np.asarray(classes).tolist()),
        importance_pooling=importance_pooling,
        margin_scale=margin_scale,
    )


def _single_output_classes(estimator: Any, source: str) -> int:
    n_classes = estimator.n_classes_
    if not np.isscalar(n_classes) or int(getattr(estimator, "n_outputs_", 1)) != 1:
        raise UnsupportedModelError(
            f"{source}: multi-output classification ({_estimator_label(estimator)} fitted on a 2-D y) is not "
            "supported; fit one classifier per target column"
        )
    return int(n_classes)


# ------------------------------------------------------------ classic trees
def _from_trees(estimator: Any, trees: list[Any], *, source: str, averaged: bool) -> ForestGraph:
    names, generic = _feature_names(estimator)
    if _is_classifier(estimator):
        n_classes = _single_output_classes(estimator, source)
        parts = [_classic_tree_nodes(t.tree_, value_mode="proba", n_classes=n_classes) for t in trees]
        link = "proba"
    else:
        parts = [_classic_tree_nodes(t.tree_, value_mode="regression") for t in trees]
        link = "identity"
    nodes = _stack_trees(parts)
    n_values = nodes["value"].shape[1]
    return ForestGraph.from_arrays(
        **nodes,
        local_children=True,
        feature_names=names,
        feature_types=["numeric"] * len(names),
        output_of_tree=np.full(len(trees), -1 if n_values > 1 else 0),
        tree_weight=np.full(len(trees), 1.0 / len(trees) if averaged else 1.0),
        base_score=0.0,
        n_outputs=n_values,
        link=link,
        threshold_rule="<=",
        split_dtype="float32",
        provenance=_provenance(estimator, source, str(estimator.criterion), importance_pooling=_POOL_NORMALISED),
        generic_feature_names=generic,
    )


# -------------------------------------------------------- gradient boosting
def _boosting_base_score(estimator: Any, source: str) -> np.ndarray:
    init = estimator.init_
    n_outputs = int(estimator.n_trees_per_iteration_)
    if isinstance(init, str) and init == "zero":
        return np.zeros(n_outputs)
    from sklearn.dummy import DummyClassifier, DummyRegressor

    constant = isinstance(init, (DummyClassifier, DummyRegressor)) and init.strategy in _CONSTANT_DUMMY_STRATEGIES
    if not constant:
        raise UnsupportedModelError(
            f"{source}: the {_estimator_label(estimator)} starts from init={type(init).__name__}, whose prediction "
            "varies from row to row; treeprobe reads only a constant start (the default, a constant Dummy "
            "estimator, or init='zero')"
        )
    # A constant init predicts the same for any row, so one all-zero row yields
    # the intercept through scikit-learn's own link.
    row = np.zeros((1, int(estimator.n_features_in_)), dtype=np.float32)
    base = np.asarray(_private(estimator, "_raw_predict_init", source)(row), dtype=np.float64).ravel()
    if not np.all(np.isfinite(base)):
        raise UnsupportedModelError(
            f"{source}: the init estimator's raw prediction is not finite ({base}); treeprobe needs a finite intercept"
        )
    return base


def _from_gradient_boosting(estimator: Any, *, source: str) -> ForestGraph:
    names, generic = _feature_names(estimator)
    stages = estimator.estimators_
    n_stages, n_per_stage = stages.shape
    parts = [_classic_tree_nodes(t.tree_, value_mode="boosting") for t in stages.ravel()]
    nodes = _stack_trees(parts)
    # scikit-learn refuses NaN in gradient boosting and its stage predictor
    # ignores missing_go_to_left, so no row is routed by that flag.
    nodes["missing_left"] = np.zeros_like(nodes["missing_left"])
    base = _boosting_base_score(estimator, source)
    weight = np.full(n_stages * n_per_stage, float(estimator.learning_rate))
    loss = str(estimator.loss)
    margin_scale = 1.0
    if not _is_classifier(estimator):
        link = "identity"
    elif n_per_stage > 1:
        link = "softmax"
    else:
        link = "logit"
        if loss == "exponential":
            # AdaBoost-style exponential loss maps the margin f to a probability
            # through expit(2 f); doubling the margin lets the logit link apply.
            base = 2.0 * base
            weight = 2.0 * weight
            margin_scale = 2.0
    return ForestGraph.from_arrays(
        **nodes,
        local_children=True,
        feature_names=names,
        feature_types=["numeric"] * len(names),
        output_of_tree=np.tile(np.arange(n_per_stage), n_stages),
        tree_weight=weight,
        base_score=base,
        n_outputs=n_per_stage,
        link=link,
        threshold_rule="<=",
        split_dtype="float32",
        provenance=_provenance(estimator, source, loss, importance_pooling=_POOL_RAW, margin_scale=margin_scale),
        generic_feature_names=generic,
    )


# ---------------------------------------------- histogram gradient boosting
def _bitset_members(words: np.ndarray) -> np.ndarray:
    """Integers whose bit is set in a scikit-learn bitset (uint32 words, bit ``v % 32`` of word ``v // 32``)."""
    bits = (words.astype(np.uint64)[:, None] >> np.arange(32, dtype=np.uint64)) & np.uint64(1)
    return np.flatnonzero(bits.ravel())


def _hist_column_map(estimator: Any, source: str) -> np.ndarray:
    """Original column of every column the trees see (the preprocessor puts categorical columns first)."""
    n_features = int(estimator.n_features_in_)
    pre = _private(estimator, "_preprocessor", source)
    if pre is None:
        return np.arange(n_features)
    original = np.full(n_features, -1, dtype=np.int64)
    for name, _, columns in pre.transformers_:
        out = pre.output_indices_.get(name)
        cols = np.asarray(columns)
        idx = np.flatnonzero(cols) if cols.dtype == bool else cols.astype(np.int64)
        if out is None or idx.size == 0:
            continue
        original[out] = idx
    return original


def _hist_category_levels(estimator: Any, names: tuple[str, ...], source: str) -> tuple[dict, dict]:
    """Per original categorical column: integer value of every category code, and its labels when not integers.

    scikit-learn encodes a categorical column as the position of its value in
    the sorted levels seen at fit time. Non-negative integer levels keep their
    own value (rows of integer-coded arrays route as given); other levels
    (strings, a pandas ``category`` column) are numbered by position, and their
    labels are returned so callers can encode data the same way.
    """
    pre = _private(estimator, "_preprocessor", source)
    if pre is None:
        return {}, {}
    encoder = pre.named_transformers_["encoder"]
    encoder_columns = _hist_column_map(estimator, source)[pre.output_indices_["encoder"]]
    from_dtype = isinstance(estimator.categorical_features, str)
    code_values: dict[int, np.ndarray] = {}
    labels: dict[str, list] = {}
    for column, levels in zip(encoder_columns, encoder.categories_, strict=True):
        levels = np.asarray(levels)
        if levels.size and levels.dtype.kind == "f" and np.isnan(levels[-1]):
            levels = levels[:-1]
        numeric = levels.dtype.kind in "biuf"
        if numeric and levels.size and np.any(levels.astype(np.float64) < 0):
            raise UnsupportedModelError(
                f"{source}: categorical column {names[column]!r} has negative levels "
                f"({levels[levels.astype(np.float64) < 0][:5]}); treeprobe needs non-negative integer categories"
            )
        integral = numeric and bool(np.all(np.mod(levels.astype(np.float64), 1.0) == 0.0))
        if numeric and not integral and not from_dtype:
            raise UnsupportedModelError(
                f"{source}: categorical column {names[column]!r} has non-integer levels ({levels[:5]}); "
                "encode the categories as non-negative integers and refit"
            )
        if integral and not from_dtype:
            code_values[int(column)] = levels.astype(np.int64)
        else:
            code_values[int(column)] = np.arange(levels.size, dtype=np.int64)
            labels[names[column]] = [_json_value(v) for v in levels.tolist()]
    return code_values, labels


def _hist_tree_nodes(predictor: Any, column_of: np.ndarray, known_codes: dict, code_values: dict, source: str) -> dict:
    """Per-node arrays of one ``TreePredictor``, categorical splits normalised to the common semantics.

    scikit-learn sends a category left when it is in the split's left bitset,
    right when it is another category known at fit time, and the missing-value
    way otherwise (NaN, negative or unseen). Listing the known categories that
    go right (``category_left=False``) when missing goes left, or the left
    bitset (``category_left=True``) when missing goes right, makes every
    unlisted value follow the missing-value branch, as scikit-learn does.
    """
    nodes = _private(predictor, "nodes", source)
    is_leaf = nodes["is_leaf"].astype(bool)
    inner = ~is_leaf
    is_cat = nodes["is_categorical"].astype(bool) & inner
    missing_left = nodes["missing_go_to_left"].astype(bool) & inner
    feature = np.where(inner, column_of[nodes["feature_idx"]], -1)
    categories: list[np.ndarray] = [np.zeros(0, np.int64)] * nodes.shape[0]
    category_left = np.ones(nodes.shape[0], bool)
    for i in np.flatnonzero(is_cat):
        column = int(feature[i])
        left_codes = _bitset_members(_private(predictor, "raw_left_cat_bitsets", source)[nodes["bitset_idx"][i]])
        if missing_left[i]:
            listed = np.setdiff1d(known_codes[column], left_codes)
            category_left[i] = False
        else:
            listed = left_codes
        categories[i] = code_values[column][listed]
    return {
        "feature": feature,
        "threshold": np.where(inner & ~is_cat, nodes["num_threshold"], np.nan),
        "left": np.where(inner, nodes["left"].astype(np.int64), -1),
        "right": np.where(inner, nodes["right"].astype(np.int64), -1),
        "missing_left": missing_left,
        "is_categorical": is_cat,
        "category_left": category_left,
        "categories": categories,
        "value": np.where(is_leaf, nodes["value"], np.nan),
        "gain": np.where(inner, nodes["gain"], 0.0),
        "cover": nodes["count"].astype(np.float64),
        "n_samples": nodes["count"].astype(np.float64),
    }


def _from_hist_gradient_boosting(estimator: Any, *, source: str) -> ForestGraph:
    x_dtype = _private_module_attribute("sklearn.ensemble._hist_gradient_boosting.common", "X_DTYPE")
    names, generic = _feature_names(estimator)
    column_of = _hist_column_map(estimator, source)
    code_values, labels = _hist_category_levels(estimator, names, source)
    is_categorical = estimator.is_categorical_
    cat_columns = np.zeros(len(names), bool) if is_categorical is None else np.asarray(is_categorical, bool)
    known_codes: dict[int, np.ndarray] = {}
    if cat_columns.any():
        thresholds = _private(estimator, "_bin_mapper", source).bin_thresholds_
        for model_column, column in enumerate(column_of):
            if cat_columns[column]:
                known_codes[int(column)] = np.asarray(thresholds[model_column]).astype(np.int64)
    iterations = _private(estimator, "_predictors", source)
    predictors = [p for iteration in iterations for p in iteration]
    n_per_iteration = int(estimator.n_trees_per_iteration_)
    nodes = _stack_trees([_hist_tree_nodes(p, column_of, known_codes, code_values, source) for p in predictors])
    loss = str(estimator.loss)
    if not _is_classifier(estimator):
        link = "log" if loss in _LOG_LINK_LOSSES else "identity"
    else:
        link = "softmax" if n_per_iteration > 1 else "logit"
    return ForestGraph.from_arrays(
        **nodes,
        local_children=True,
        feature_names=names,
        feature_types=["categorical" if c else "numeric" for c in cat_columns],
        output_of_tree=np.tile(np.arange(n_per_iteration), len(iterations)),
        tree_weight=np.ones(len(predictors)),
        base_score=np.asarray(_private(estimator, "_baseline_prediction", source), dtype=np.float64).ravel(),
        n_outputs=n_per_iteration,
        link=link,
        threshold_rule="<=",
        split_dtype=np.dtype(x_dtype).name,
        provenance=_provenance(estimator, source, loss),
        category_levels=labels,
        unseen_category="missing",
        negative_category="none",
        generic_feature_names=generic,
    )


# ------------------------------------------------------------------ public
def from_sklearn(estimator: Any, *, source: str) -> ForestGraph:
    """Convert a fitted scikit-learn tree estimator into a :class:`ForestGraph`.

    Parameters
    ----------
    estimator : fitted scikit-learn estimator
        ``DecisionTreeRegressor/Classifier``, ``ExtraTreeRegressor/Classifier``,
        ``RandomForestRegressor/Classifier``, ``ExtraTreesRegressor/Classifier``,
        ``GradientBoostingRegressor/Classifier`` or
        ``HistGradientBoostingRegressor/Classifier``. Tree and forest
        regressors may be multi-output (vector leaves).
    source : str
        Where the estimator came from, used in error messages and kept as
        ``ensemble.source``.

    Returns
    -------
    ForestGraph
        With ``library="sklearn"``; ``objective`` is the criterion (trees,
        forests) or the loss (boosting); ``provenance`` holds ``estimator`` (class
        name), ``stored_params`` (JSON-serialisable ``get_params()``),
        ``class_labels`` for classifiers, ``importance_pooling`` for estimators
        with ``feature_importances_``; ``category_levels`` holds the levels of
        histogram boosting's non-integer categories.

    Raises
    ------
    UnsupportedModelError
        Unfitted estimators, pipelines, estimators that are not trees, multi-output
        classifiers, gradient boosting started from a non-constant ``init``,
        categorical levels treeprobe cannot express.

    Notes
    -----
    ``predict_raw`` of the result reproduces:

    * tree and forest regressors: ``predict``
      (``raw = sum_t tree_weight_t * leaf_t(x)``, ``tree_weight = 1 / n_trees``
      for forests);
    * tree and forest classifiers: ``predict_proba`` (link "proba"; one output
      per class, two for a binary problem; leaves hold class fractions);
    * ``GradientBoosting*``: ``decision_function`` / ``predict``
      (``raw_k = init_k + learning_rate * sum_t leaf_t(x)`` over the trees of
      output ``k``; links "logit" and "softmax" for binary and multiclass);
      with ``loss="exponential"`` the raw output is twice
      ``decision_function``, because scikit-learn's probability is
      ``expit(2 f)`` (``provenance.margin_scale = 2``);
    * ``HistGradientBoosting*``: ``decision_function`` / ``predict`` before
      the inverse link (link "log" for the poisson and gamma losses).

    Classic trees compare ``float32(x) <= threshold`` and send NaN where
    ``tree_.missing_go_to_left`` says; histogram boosting compares in float64
    and treats categories unseen at fit time like missing values.

    ``gain`` of a classic tree split is the weighted impurity decrease
    ``(W_t I_t - W_l I_l - W_r I_r) / W_root`` (``W`` weighted sample count,
    ``I`` impurity); ``cover`` is ``W`` and ``n_samples`` the unweighted count.
    Histogram boosting stores neither impurities nor hessian sums with its
    trees: ``gain`` is its stored split gain and ``cover`` and ``n_samples``
    are both the training row count of the node. Internal nodes of boosted
    trees carry NaN values, since scikit-learn fits only the leaves to the loss.

    Categorical columns of histogram boosting: integer levels keep their value.
    Other levels (strings; any pandas ``category`` column picked by
    ``categorical_features="from_dtype"``) are numbered by their position in
    the sorted levels seen at fit time, listed in
    ``ForestGraph.category_levels``; data must be encoded the same way.
    A non-integer value of a categorical column is truncated to an integer,
    where scikit-learn treats it as unseen.

    References
    ----------
    .. [1] Breiman, L., Friedman, J., Olshen, R. and Stone, C. (1984).
       *Classification and Regression Trees*. Wadsworth.
    .. [2] Friedman, J. H. (2001). Greedy function approximation: a gradient
       boosting machine. *Annals of Statistics*, 29(5), 1189-1232.

    Examples
    --------
    >>> import numpy as np
    >>> from sklearn.tree import DecisionTreeRegressor
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(50, 2))
    >>> model = DecisionTreeRegressor(max_depth=2, random_state=0).fit(X, X[:, 0] * X[:, 1])
    >>> ens = from_sklearn(model, source="demo")
    >>> bool(np.allclose(ens.predict_raw(X), model.predict(X)))
    True
    """
    if not isinstance(source, str):
        raise TypeError(f"source must be a str, got {type(source).__name__}: {source!r}")
    from sklearn.ensemble import (
        GradientBoostingClassifier,
        GradientBoostingRegressor,
        HistGradientBoostingClassifier,
        HistGradientBoostingRegressor,
    )
    forest_classes = tuple(_private_module_attribute("sklearn.ensemble._forest", name)
                           for name in ("ForestClassifier", "ForestRegressor"))
    from sklearn.pipeline import Pipeline
    from sklearn.tree import BaseDecisionTree

    label = _estimator_label(estimator)
    if isinstance(estimator, Pipeline):
        raise UnsupportedModelError(
            f"{source}: got a Pipeline; pass its final step (pipeline[-1]) and transform the data with "
            "pipeline[:-1].transform(X) yourself before analysing it"
        )
    forest = isinstance(estimator, forest_classes)
    boosted = isinstance(estimator, (GradientBoostingClassifier, GradientBoostingRegressor))
    histogram = isinstance(estimator, (HistGradientBoostingClassifier, HistGradientBoostingRegressor))
    single = isinstance(estimator, BaseDecisionTree)
    if not (forest or boosted or histogram or single):
        raise UnsupportedModelError(
            f"{source}: cannot read a scikit-learn {label}; supported are DecisionTree*, ExtraTree*, "
            "RandomForest*, ExtraTrees*, GradientBoosting* and HistGradientBoosting* estimators"
        )
    _check_fitted(estimator, source)
    if single:
        return _from_trees(estimator, [estimator], source=source, averaged=False)
    if forest:
        return _from_trees(estimator, list(estimator.estimators_), source=source, averaged=True)
    if boosted:
        return _from_gradient_boosting(estimator, source=source)
    return _from_hist_gradient_boosting(estimator, source=source)


def sklearn_feature_importances(ensemble: ForestGraph) -> np.ndarray:
    """scikit-learn's impurity-based ``feature_importances_``, recomputed from ``ensemble.gain``.

    Parameters
    ----------
    ensemble : ForestGraph
        Built by :func:`from_sklearn` from a tree, forest or classic gradient
        boosting estimator (``provenance.importance_pooling`` set).

    Returns
    -------
    ndarray of float64, shape (n_features,)
        Sums to one, unless no tree has a split (then all zeros).

    Raises
    ------
    UnsupportedModelError
        For ensembles that scikit-learn gives no impurity importances
        (histogram gradient boosting, other libraries).

    Notes
    -----
    With ``G_tj = sum of gain over the splits of tree t on feature j`` and
    ``T`` the trees with at least one split, forests and single trees use::

        imp_j = mean_{t in T} (G_tj / sum_i G_ti);   importance_j = imp_j / sum_i imp_i

    and classic gradient boosting averages the unnormalised ``G_tj``::

        imp_j = mean_{t in T} G_tj;                  importance_j = imp_j / sum_i imp_i

    Impurity importances favour features with many distinct values and
    describe the fitted model, not the data-generating process.

    References
    ----------
    .. [1] Breiman, L. (2001). Random forests. *Machine Learning*, 45(1), 5-32.

    Examples
    --------
    >>> import numpy as np
    >>> from sklearn.ensemble import RandomForestRegressor
    >>> rng = np.random.default_rng(1)
    >>> X = rng.normal(size=(60, 3))
    >>> model = RandomForestRegressor(n_estimators=4, max_depth=3, random_state=0).fit(X, X[:, 0] + X[:, 2])
    >>> ens = from_sklearn(model, source="demo")
    >>> bool(np.allclose(sklearn_feature_importances(ens), model.feature_importances_))
    True
    """
    if not isinstance(ensemble, ForestGraph):
        raise TypeError(f"ensemble must be a ForestGraph, got {type(ensemble).__name__}")
    pooling = ensemble.provenance.importance_pooling
    if pooling not in (_POOL_NORMALISED, _POOL_RAW):
        raise UnsupportedModelError(
            f"{ensemble.source}: scikit-learn has no impurity importances for this model "
            f"({ensemble.library} {ensemble.provenance.estimator}); "
            "use ensemble.feature_totals() for gain sums"
        )
    inner = ~ensemble.is_leaf
    per_tree = np.zeros((ensemble.n_trees, ensemble.n_features))
    np.add.at(per_tree, (ensemble.tree[inner], ensemble.feature[inner]), ensemble.gain[inner])
    has_split = np.bincount(ensemble.tree[inner], minlength=ensemble.n_trees) > 0
    if not has_split.any():
        return np.zeros(ensemble.n_features)
    per_tree = per_tree[has_split]
    if pooling == _POOL_NORMALISED:
        totals = per_tree.sum(axis=1, keepdims=True)
        per_tree = np.divide(per_tree, totals, out=per_tree.copy(), where=totals > 0)
    pooled = per_tree.mean(axis=0)
    total = pooled.sum()
    return pooled / total if total > 0 else pooled
