"""The common tree-ensemble graph every treeprobe stage works on.

A fitted forest from any library becomes one :class:`ForestGraph`: columnar
numpy arrays over all nodes of all trees (in the manner of scikit-learn's
``tree_`` object), plus a few ensemble-wide facts. Parsers in
:mod:`treeprobe.io` produce it; the structure, H-statistic and report stages
consume it.

Semantics (one for every library)
---------------------------------
Nodes are numbered globally; the nodes of tree ``t`` are the contiguous range
``tree_offsets[t]:tree_offsets[t + 1]`` and the tree's root is its first node.
A node is a leaf when ``feature == -1``.

A row ``x`` reaches a node and is routed as follows, with ``v = x[feature]``
cast to ``split_dtype`` (float32 for XGBoost and scikit-learn's classic trees,
which compare in single precision; float64 for LightGBM and scikit-learn's
histogram gradient boosting):

* numeric split, ``v`` is NaN, or ``zero_as_missing`` and ``|v| <= 1e-35``:
  left when ``missing_left`` else right;
* numeric split otherwise: left when ``v < threshold`` (``threshold_rule ==
  "<"``, XGBoost) or ``v <= threshold`` (``threshold_rule == "<="``, LightGBM
  and scikit-learn);
* categorical split, ``v`` is NaN: left when ``missing_left``;
* categorical split otherwise: ``c = int(v)`` (truncation toward zero); when
  ``c`` is one of the node's listed categories ``cat_values[cat_offsets[i]:
  cat_offsets[i + 1]]`` the row goes left if ``category_left`` else right;
  every other value (negative, unseen, not listed) goes the other way. A
  negative ``v`` is no category when ``negative_category == "none"``
  (XGBoost, scikit-learn); with ``"truncate"`` (LightGBM, which casts to int
  first) ``-1 < v < 0`` is category 0.

A library whose missing-value rule differs is normalised by its parser (for
instance LightGBM's missing type "None" maps NaN to 0.0, so its parser sets
``missing_left`` to where 0.0 goes).

The raw output (margin) of the ensemble for output ``k`` is::

    raw[k] = base_score[k] + sum_t tree_weight[t] * leaf_value_t(x)[k]

where a tree with ``output_of_tree[t] == k`` contributes its scalar leaf value to
output ``k`` only, and a tree with ``output_of_tree[t] == -1`` has vector leaves
(``value`` has ``n_outputs`` columns) and contributes to every output. The
``link`` maps the raw output to the prediction scale ("identity", "logit",
"softmax", "log" for log-link objectives, "proba" for forests whose raw
output already is a probability).

``gain`` is the loss reduction of a split (XGBoost ``loss_changes``, LightGBM
``split_gain``, scikit-learn's weighted impurity decrease), ``cover`` the
hessian sum (XGBoost ``sum_hessian``, LightGBM ``internal_weight`` /
``leaf_weight``, scikit-learn's weighted sample count) and ``n_samples`` the
training row count where the library stores it (NaN otherwise).

Every array is read-only once the graph is validated, so the depths cached at
validation cannot go stale and the level-by-level walk of :meth:`ForestGraph.apply`
always ends. ``dataclasses.replace`` builds a new graph and validates it again.
Turning user data into the float matrix the walk reads is the job of
:func:`treeprobe.data.model_matrix`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields, replace
from types import MappingProxyType
from typing import Any

import networkx as nx
import numpy as np
import pandas as pd

from .data import model_matrix
from .errors import DataError, ModelFormatError

__all__ = ["ForestGraph", "Provenance", "LINKS", "UNSEEN_CATEGORY_RULES", "NEGATIVE_CATEGORY_RULES", "MAX_DEPTH"]

LINKS = ("identity", "logit", "softmax", "log", "proba")
# How a category level the model never saw is routed: like a missing value, or like a category no split lists.
UNSEEN_CATEGORY_RULES = ("missing", "unlisted")
# How a negative value reaching a categorical split is read: never a category, or truncated toward zero first.
NEGATIVE_CATEGORY_RULES = ("none", "truncate")
IMPORTANCE_POOLINGS = ("", "normalised_per_tree", "raw_per_tree")
MAX_DEPTH = 512
# |v| at or below this is missing at a zero_as_missing split (LightGBM's kZeroThreshold); read by the exact engine too.
ZERO_MISSING_BOUND = 1e-35
_ROW_BLOCK_CELLS = 4_000_000
# Values (rows x feature slots) of one block of the fast walk: bounds its lookup table (16 MB in float64).
_FAST_BLOCK_VALUES = 1 << 21
_EMPTY_MAPPING: Mapping[str, Any] = MappingProxyType({})


def _read_only_mapping(values: Mapping | None) -> Mapping:
    return MappingProxyType(dict(values or {}))


@dataclass(frozen=True)
class Provenance:
    """Where a graph came from and what its source stores beside the trees.

    Attributes
    ----------
    library : str
        Producing library: "xgboost", "lightgbm", "sklearn", or "unknown" for hand-built graphs.
    library_version : str
        Version of the library that wrote the model ("" when the source does not say).
    objective : str
        The library's objective (XGBoost, LightGBM), or the criterion / loss of a scikit-learn estimator.
    source : str
        Where the model came from (file path or object description); heads every message.
    estimator : str
        scikit-learn class name (for instance "RandomForestRegressor"); "" for other libraries.
    stored_params : mapping
        Read-only training parameters the file or object stores: LightGBM's parameter block (name to
        text), XGBoost's model parameters (booster, num_class, num_target, num_parallel_tree, stored
        base_score, attributes), a scikit-learn estimator's JSON-serialisable ``get_params()``;
        empty when none.
    file_format : str
        "json", "ubjson" (XGBoost files), "text" (LightGBM model text), "object" (a live
        scikit-learn estimator) or "" (hand-built).
    class_labels : tuple
        Class labels of a scikit-learn classifier (``classes_``), in output order; empty otherwise.
    importance_pooling : {"", "normalised_per_tree", "raw_per_tree"}
        How scikit-learn pools per-tree impurity importances for this estimator (forests and
        single trees normalise each tree; classic gradient boosting does not); "" when scikit-learn
        gives none. Read by :func:`treeprobe.io.sklearn.sklearn_feature_importances`.
    margin_scale : float
        Factor between the graph's raw margin and the library's own raw output (2 for scikit-learn's
        exponential-loss gradient boosting, whose probability is ``expit(2 f)``; 1 otherwise).
    pruned_nodes_dropped : int
        Nodes the loader dropped because the file marks them pruned (XGBoost); 0 otherwise.
    """

    library: str = "unknown"
    library_version: str = ""
    objective: str = ""
    source: str = "<arrays>"
    estimator: str = ""
    stored_params: Mapping[str, Any] = field(default_factory=lambda: _EMPTY_MAPPING)
    file_format: str = ""
    class_labels: tuple = ()
    importance_pooling: str = ""
    margin_scale: float = 1.0
    pruned_nodes_dropped: int = 0

    def __post_init__(self) -> None:
        object.__setattr__(self, "stored_params", _read_only_mapping(self.stored_params))
        object.__setattr__(self, "class_labels", tuple(self.class_labels))
        if self.importance_pooling not in IMPORTANCE_POOLINGS:
            raise ModelFormatError(
                f"{self.source}: importance_pooling must be one of {IMPORTANCE_POOLINGS}, got {self.importance_pooling!r}"
            )


def _as_array(values: Any, dtype: Any, name: str, source: str) -> np.ndarray:
    try:
        return np.ascontiguousarray(values, dtype=dtype)
    except (TypeError, ValueError) as exc:
        raise ModelFormatError(f"{source}: node array '{name}' is not {np.dtype(dtype).name}: {exc}") from None


def _frozen(arr: np.ndarray) -> np.ndarray:
    """``arr`` made read-only; a view is copied first, since its base could still be written."""
    if arr.base is not None and not (isinstance(arr.base, np.ndarray) and not arr.base.flags.writeable):
        arr = arr.copy()
    arr.setflags(write=False)
    return arr


# ------------------------------------------------------------------ steps of ForestGraph.from_arrays
def _tree_layout(tree_offsets: Sequence[int], n_nodes: int, source: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Checked tree offsets, the node count of every tree and the owning tree of every node."""
    offsets = _as_array(tree_offsets, np.int64, "tree_offsets", source)
    if offsets.ndim != 1 or offsets.size < 2 or offsets[0] != 0 or offsets[-1] != n_nodes:
        raise ModelFormatError(
            f"{source}: tree_offsets must run from 0 to the node count {n_nodes}; got {offsets[:3]}...{offsets[-3:]}"
        )
    sizes = np.diff(offsets)
    if np.any(sizes <= 0):
        raise ModelFormatError(f"{source}: tree {int(np.flatnonzero(sizes <= 0)[0])} has no nodes")
    return offsets, sizes, np.repeat(np.arange(sizes.size, dtype=np.int32), sizes)


def _node_array(values: Any, dtype: Any, name: str, default: Any, n_nodes: int, source: str) -> np.ndarray:
    """One per-node array of ``n_nodes`` entries, filled with ``default`` when not given."""
    if values is None:
        return np.full(n_nodes, default, dtype=dtype)
    arr = _as_array(values, dtype, name, source)
    if arr.shape != (n_nodes,):
        raise ModelFormatError(f"{source}: node array '{name}' has shape {arr.shape}, expected ({n_nodes},)")
    return arr


def _global_children(left: np.ndarray, right: np.ndarray, offsets: np.ndarray, sizes: np.ndarray,
                     tree: np.ndarray, source: str) -> tuple[np.ndarray, np.ndarray]:
    """Children given as indices local to each tree, turned into global node indices."""
    local_size = sizes[tree]
    bad = (left >= local_size) | (right >= local_size)
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise ModelFormatError(
            f"{source}: tree {tree[i]}, node {i - offsets[tree[i]]} has a child index out of range "
            f"({max(left[i], right[i])} >= {local_size[i]} nodes)"
        )
    base = offsets[:-1][tree]
    return np.where(left >= 0, left + base, -1), np.where(right >= 0, right + base, -1)


def _leaf_value_matrix(value: Any, n_nodes: int, source: str) -> np.ndarray:
    """Node values as an (n_nodes, n_values) matrix."""
    value_a = _as_array(value, np.float64, "value", source)
    if value_a.ndim == 1:
        value_a = value_a[:, None]
    if value_a.ndim != 2 or value_a.shape[0] != n_nodes:
        raise ModelFormatError(f"{source}: leaf values have shape {value_a.shape}, expected ({n_nodes}, k)")
    return value_a


def _category_csr(categories: Sequence[Sequence[int]] | None, n_nodes: int, source: str) -> tuple[np.ndarray, np.ndarray]:
    """Per-node category lists as CSR offsets and sorted, de-duplicated values."""
    cat_offsets = np.zeros(n_nodes + 1, dtype=np.int64)
    if categories is None:
        return cat_offsets, np.zeros(0, dtype=np.int64)
    if len(categories) != n_nodes:
        raise ModelFormatError(f"{source}: {len(categories)} category lists for {n_nodes} nodes")
    sizes_listed = np.fromiter((len(c) for c in categories), dtype=np.int64, count=n_nodes)
    lists = [np.unique(np.asarray(categories[i], dtype=np.int64)) for i in np.flatnonzero(sizes_listed)]
    counts = np.zeros(n_nodes, dtype=np.int64)
    counts[sizes_listed > 0] = [c.size for c in lists]
    cat_offsets[1:] = np.cumsum(counts)
    return cat_offsets, (np.concatenate(lists) if lists else np.zeros(0, dtype=np.int64))


def _names_and_types(feature_names: Sequence[str] | None, n_features: int | None, feature_types: Sequence[str] | None,
                     feature: np.ndarray, is_categorical: np.ndarray) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """Feature names (``f0, f1, ...`` when none are given) and kinds (categorical where a split says so)."""
    if n_features is None:
        n_features = len(feature_names) if feature_names is not None else int(feature.max(initial=-1)) + 1
    names = (tuple(str(n) for n in feature_names) if feature_names is not None
             else tuple(f"f{i}" for i in range(n_features)))
    if feature_types is None:
        types = ["numeric"] * len(names)
        for j in np.unique(feature[is_categorical]):
            if 0 <= j < len(types):
                types[j] = "categorical"
        feature_types = types
    return names, tuple(feature_types)


def _per_tree_arrays(output_of_tree: Sequence[int] | None, tree_weight: Sequence[float] | None,
                     base_score: Sequence[float] | float, n_outputs: int | None, n_values: int, n_trees: int,
                     source: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Output of every tree (-1 for vector leaves), tree weights and the base score of every output."""
    if n_outputs is None:
        if n_values > 1:
            n_outputs = n_values
        else:
            n_outputs = int(np.max(output_of_tree, initial=0)) + 1 if output_of_tree is not None else 1
    if output_of_tree is not None:
        out_a = _as_array(output_of_tree, np.int32, "output_of_tree", source)
    else:
        out_a = np.full(n_trees, -1 if n_values > 1 else 0, dtype=np.int32)
    weight_a = np.ones(n_trees) if tree_weight is None else _as_array(tree_weight, np.float64, "tree_weight", source)
    base_a = np.broadcast_to(np.asarray(base_score, dtype=np.float64), (n_outputs,)).copy()
    return out_a, weight_a, base_a


@dataclass(frozen=True)
class _Routing:
    """Node tables of the fast walk of :meth:`ForestGraph.apply` (numeric splits with finite thresholds).

    A missing value is replaced by -inf where it goes left and by +inf where it
    goes right, so one comparison routes every row: each node reads its feature
    from one of up to four copies of the column (missing sent low or high, with
    or without ``zero_as_missing``; only the copies some split reads are built),
    a *slot* ``feature + n_features * copy``.
    Arrays are indexed by ``2 * node`` (and ``2 * node + goes_right`` for
    children), so one walk step is three gathers and an add. Leaves point to
    themselves, so a walk of a tree's depth ends on a leaf from every start.
    """

    slot2: np.ndarray            # (2 n_nodes,) slot read at node, at 2 node and 2 node + 1
    threshold2: np.ndarray       # (2 n_nodes,) threshold at node, likewise
    child2: np.ndarray           # (2 n_nodes,) 2 * left child at 2 node, 2 * right child at 2 node + 1
    tree_depth: np.ndarray       # (n_trees,)
    fast_trees: np.ndarray       # trees the fast walk handles
    generic_trees: np.ndarray    # trees with categorical splits or infinite thresholds
    weighted_value: np.ndarray   # (n_nodes, n_values) leaf values times tree weight
    roots: np.ndarray
    n_features: int
    variants: tuple[int, ...]    # the copies some split reads (0..3: missing low/high, with zero read as missing)
    right_on_tie: bool           # "<" rule: a value equal to the threshold goes right
    table_dtype: Any

    @property
    def n_slots(self) -> int:
        return len(self.variants) * self.n_features

    @classmethod
    def of(cls, graph: ForestGraph) -> _Routing:
        n_nodes, p = graph.n_nodes, graph.n_features
        inner = graph.feature >= 0
        unusual = inner & (graph.is_categorical | ~np.isfinite(graph.threshold))
        generic = np.zeros(graph.n_trees, dtype=bool)
        generic[graph.tree[unusual]] = True
        variant = (~graph.missing_left).astype(np.int64) + 2 * graph.zero_as_missing.astype(np.int64)
        variants, copy = np.unique(np.r_[0, variant[inner]], return_inverse=True)
        slot = np.zeros(n_nodes, dtype=np.int64)
        slot[inner] = graph.feature[inner].astype(np.int64) + p * copy[1:]
        threshold = np.where(inner & ~unusual, graph.threshold, 0.0)
        # Compare in single precision only when no threshold changes on the way (XGBoost's are float32).
        single = graph.split_dtype == "float32" and bool(
            np.all(threshold.astype(np.float32).astype(np.float64) == threshold))
        node = np.arange(n_nodes, dtype=np.int64)
        child2 = np.empty(2 * n_nodes, dtype=np.intp)
        child2[0::2] = 2 * np.where(inner, graph.left, node)
        child2[1::2] = 2 * np.where(inner, graph.right, node)
        tree_depth = np.zeros(graph.n_trees, dtype=np.int64)
        np.maximum.at(tree_depth, graph.tree, graph.depth)
        return cls(
            slot2=np.repeat(slot, 2).astype(np.intp),
            threshold2=np.repeat(threshold, 2).astype(np.float32 if single else np.float64),
            child2=child2,
            tree_depth=tree_depth,
            fast_trees=np.flatnonzero(~generic),
            generic_trees=np.flatnonzero(generic),
            weighted_value=graph.value * graph.tree_weight[graph.tree][:, None],
            roots=graph.tree_offsets[:-1].astype(np.intp),
            n_features=p,
            variants=tuple(int(v) for v in variants),
            right_on_tie=graph.threshold_rule == "<",
            table_dtype=np.float32 if single else np.float64,
        )

    def _table(self, arr: np.ndarray) -> np.ndarray:
        """The copies of every column the splits read, slot-major and flattened: ``table[slot * n_rows + row]``."""
        columns = arr.T.astype(self.table_dtype)
        missing = np.isnan(columns)
        zero = missing | (np.abs(columns) <= ZERO_MISSING_BOUND) if max(self.variants) >= 2 else missing
        table = np.empty((len(self.variants), columns.shape[0], columns.shape[1]), dtype=self.table_dtype)
        for position, variant in enumerate(self.variants):
            table[position] = np.where(zero if variant >= 2 else missing, np.inf if variant % 2 else -np.inf, columns)
        return table.ravel()

    def walk(self, arr: np.ndarray):
        """Yield ``(tree, leaves)``: the global leaf of every row of ``arr`` (cast to the split dtype) in each fast tree."""
        n_rows = arr.shape[0]
        table = self._table(arr)
        offset = np.arange(n_rows, dtype=np.intp)
        slot_start = self.slot2 * n_rows
        goes_right = np.greater_equal if self.right_on_tie else np.greater
        position = np.empty(n_rows, dtype=np.intp)
        right = np.empty(n_rows, dtype=bool)
        for tree in self.fast_trees:
            root = 2 * self.roots[tree]
            if not self.tree_depth[tree]:
                yield tree, np.full(n_rows, root >> 1, dtype=np.intp)
                continue
            # Every row starts at the root: one contiguous column against one threshold.
            start = slot_start[root]
            goes_right(table[start:start + n_rows], self.threshold2[root], out=right)
            at = self.child2.take(root + right)
            for _ in range(int(self.tree_depth[tree]) - 1):
                np.add(slot_start.take(at), offset, out=position)
                goes_right(table.take(position), self.threshold2.take(at), out=right)
                at += right
                at = self.child2.take(at)
            yield tree, at >> 1


@dataclass(frozen=True, eq=False)
class ForestGraph:
    """A fitted tree ensemble as columnar arrays; see the module docstring for semantics.

    Build one with :meth:`from_arrays` or through :func:`treeprobe.load_model`. Every
    construction, ``dataclasses.replace`` included, validates the graph and then makes
    its arrays read-only. Graphs compare by identity (``eq=False``), never raising.

    Attributes
    ----------
    tree, feature, left, right : ndarray of int32, shape (n_nodes,)
        Owning tree, split feature (-1 at leaves) and global child indices (-1 at leaves).
    threshold : ndarray of float64, shape (n_nodes,)
        Numeric split threshold; NaN at leaves and categorical splits.
    missing_left, zero_as_missing, is_categorical, category_left : ndarray of bool
        Routing flags, see the module docstring.
    cat_offsets : ndarray of int64, shape (n_nodes + 1,)
        CSR offsets of each node's listed categories in ``cat_values``.
    cat_values : ndarray of int64
        Listed categories of categorical splits, sorted within each node.
    value : ndarray of float64, shape (n_nodes, n_values)
        Leaf values (raw margin units, before ``tree_weight``); NaN at internal nodes
        where the library does not store a value.
    gain, cover, n_samples : ndarray of float64, shape (n_nodes,)
        Split loss reduction (0 at leaves), hessian sum and training row count (NaN when unknown).
    tree_offsets : ndarray of int64, shape (n_trees + 1,)
        First node of every tree, plus ``n_nodes``.
    output_of_tree : ndarray of int32, shape (n_trees,)
        Output column each tree adds to; -1 for vector-leaf trees.
    tree_weight : ndarray of float64, shape (n_trees,)
        Factor applied to each tree's leaf values (learning rate, forest averaging, DART weight).
    base_score : ndarray of float64, shape (n_outputs,)
        Raw-margin intercept of every output.
    link : str
        One of ``LINKS``.
    threshold_rule : {"<", "<="}
        Comparison that sends a numeric value left.
    split_dtype : {"float32", "float64"}
        Precision in which the library compares feature values.
    feature_names, feature_types : tuple of str
        Names and kinds ("numeric" or "categorical") of the model's input columns.
    provenance : Provenance
        Library, version, objective, source, estimator class and stored training parameters.
    link_scale : float
        Factor on the raw margin inside the "logit" link: ``p = 1 / (1 + exp(-link_scale * raw))``.
        1.0 except for LightGBM's binary objective trained with ``sigmoid`` other than 1.
    category_levels : mapping of str to tuple
        Read-only: for categorical features whose source stores level labels, the labels in code
        order (code ``c`` is ``levels[c]``); :func:`treeprobe.data.model_matrix` codes text and
        pandas categorical columns by them.
    unseen_category : {"missing", "unlisted"}
        How the library routes a level absent from ``category_levels``: like a missing value
        (LightGBM, scikit-learn) or like a category no split lists (XGBoost).
    negative_category : {"none", "truncate"}
        How a negative value reaching a categorical split is read: "none", no category at all
        (XGBoost, scikit-learn); "truncate", truncated toward zero first, so ``-0.5`` is category 0
        (LightGBM, which casts to int).
    generic_feature_names : bool
        True when the model stores no real feature names (``f0, f1, ...``, ``Column_0, ...``), so
        data columns may be matched to features by position.
    trees_per_round : int
        Trees one boosting round grows for each output: XGBoost's ``num_parallel_tree``, 1 for every
        other model (a random forest's trees count as one round each). A round of a model with one
        tree per output adds ``trees_per_round * n_outputs`` trees.
    """

    tree: np.ndarray
    feature: np.ndarray
    threshold: np.ndarray
    left: np.ndarray
    right: np.ndarray
    missing_left: np.ndarray
    zero_as_missing: np.ndarray
    is_categorical: np.ndarray
    category_left: np.ndarray
    cat_offsets: np.ndarray
    cat_values: np.ndarray
    value: np.ndarray
    gain: np.ndarray
    cover: np.ndarray
    n_samples: np.ndarray
    tree_offsets: np.ndarray
    output_of_tree: np.ndarray
    tree_weight: np.ndarray
    base_score: np.ndarray
    link: str
    threshold_rule: str
    split_dtype: str
    feature_names: tuple[str, ...]
    feature_types: tuple[str, ...]
    provenance: Provenance = field(default_factory=Provenance)
    link_scale: float = 1.0
    category_levels: Mapping[str, tuple] = field(default_factory=lambda: _EMPTY_MAPPING)
    unseen_category: str = "missing"
    negative_category: str = "none"
    generic_feature_names: bool = False
    trees_per_round: int = 1

    def __post_init__(self) -> None:
        levels = {str(name): tuple(values) for name, values in dict(self.category_levels or {}).items()}
        object.__setattr__(self, "category_levels", MappingProxyType(levels))
        object.__setattr__(self, "feature_names", tuple(self.feature_names))
        object.__setattr__(self, "feature_types", tuple(self.feature_types))
        self.validate()
        for item in fields(self):
            value = getattr(self, item.name)
            if isinstance(value, np.ndarray):
                object.__setattr__(self, item.name, _frozen(value))

    # ------------------------------------------------------------------ build
    @classmethod
    def from_arrays(
        cls,
        *,
        feature: Sequence[int],
        threshold: Sequence[float],
        left: Sequence[int],
        right: Sequence[int],
        value: Any,
        tree_offsets: Sequence[int],
        feature_names: Sequence[str] | None = None,
        n_features: int | None = None,
        feature_types: Sequence[str] | None = None,
        missing_left: Sequence[bool] | None = None,
        zero_as_missing: Sequence[bool] | None = None,
        is_categorical: Sequence[bool] | None = None,
        category_left: Sequence[bool] | None = None,
        categories: Sequence[Sequence[int]] | None = None,
        gain: Sequence[float] | None = None,
        cover: Sequence[float] | None = None,
        n_samples: Sequence[float] | None = None,
        output_of_tree: Sequence[int] | None = None,
        tree_weight: Sequence[float] | None = None,
        base_score: Sequence[float] | float = 0.0,
        n_outputs: int | None = None,
        link: str = "identity",
        threshold_rule: str = "<=",
        split_dtype: str = "float64",
        library: str = "unknown",
        objective: str = "",
        source: str = "<arrays>",
        provenance: Provenance | None = None,
        link_scale: float = 1.0,
        category_levels: Mapping[str, Sequence] | None = None,
        unseen_category: str = "missing",
        negative_category: str = "none",
        generic_feature_names: bool | None = None,
        trees_per_round: int = 1,
        local_children: bool = False,
    ) -> ForestGraph:
        """Build and validate an ensemble from per-node sequences.

        Children are global node indices, or indices local to each tree when
        ``local_children=True``. Optional per-node arrays default to: no
        missing-value special cases (NaN goes right), numeric splits, unknown
        gain/cover/sample counts (NaN). ``categories`` gives, per node, the
        listed categories of a categorical split (empty elsewhere).
        ``provenance`` wins over ``library``, ``objective`` and ``source``,
        which build a :class:`Provenance` when it is not given.
        ``generic_feature_names`` defaults to whether ``feature_names`` is None.
        The arrays given are taken over and become read-only.

        Raises
        ------
        ModelFormatError
            When the arrays are inconsistent or do not form trees.
        """
        if provenance is None:
            provenance = Provenance(library=library, objective=objective, source=source)
        src = provenance.source
        feature_a = _as_array(feature, np.int32, "feature", src)
        n_nodes = feature_a.shape[0]
        offsets, sizes, tree_a = _tree_layout(tree_offsets, n_nodes, src)
        left_a = _node_array(left, np.int64, "left", -1, n_nodes, src)
        right_a = _node_array(right, np.int64, "right", -1, n_nodes, src)
        if local_children:
            left_a, right_a = _global_children(left_a, right_a, offsets, sizes, tree_a, src)
        value_a = _leaf_value_matrix(value, n_nodes, src)
        is_cat = _node_array(is_categorical, bool, "is_categorical", False, n_nodes, src)
        cat_offsets, cat_values = _category_csr(categories, n_nodes, src)
        names, types = _names_and_types(feature_names, n_features, feature_types, feature_a, is_cat)
        out_a, weight_a, base_a = _per_tree_arrays(output_of_tree, tree_weight, base_score, n_outputs,
                                                   value_a.shape[1], sizes.size, src)
        return cls(
            tree=tree_a,
            feature=feature_a,
            threshold=_node_array(threshold, np.float64, "threshold", np.nan, n_nodes, src),
            left=left_a.astype(np.int32),
            right=right_a.astype(np.int32),
            missing_left=_node_array(missing_left, bool, "missing_left", False, n_nodes, src),
            zero_as_missing=_node_array(zero_as_missing, bool, "zero_as_missing", False, n_nodes, src),
            is_categorical=is_cat,
            category_left=_node_array(category_left, bool, "category_left", True, n_nodes, src),
            cat_offsets=cat_offsets,
            cat_values=cat_values,
            value=value_a,
            gain=_node_array(gain, np.float64, "gain", np.nan, n_nodes, src),
            cover=_node_array(cover, np.float64, "cover", np.nan, n_nodes, src),
            n_samples=_node_array(n_samples, np.float64, "n_samples", np.nan, n_nodes, src),
            tree_offsets=offsets,
            output_of_tree=out_a,
            tree_weight=weight_a,
            base_score=base_a,
            link=link,
            threshold_rule=threshold_rule,
            split_dtype=split_dtype,
            feature_names=names,
            feature_types=types,
            provenance=provenance,
            link_scale=float(link_scale),
            category_levels=category_levels or {},
            unseen_category=unseen_category,
            negative_category=negative_category,
            generic_feature_names=feature_names is None if generic_feature_names is None else bool(generic_feature_names),
            trees_per_round=int(trees_per_round),
        )

    def validate(self) -> None:
        """Check that the arrays are consistent and that every tree is a tree.

        Raises
        ------
        ModelFormatError
            Naming the source, tree and node of the first problem found.
        """
        self._validate_shapes()
        self._validate_facts()
        self._validate_links()
        self._validate_values()
        # With one parent per non-root node and none at the root, every tree is a
        # tree exactly when all its nodes are reachable; _depths proves that.
        object.__setattr__(self, "_depth_cache", _frozen(self._depths()))

    def _where(self, mask: np.ndarray) -> str:
        """Tree and local node of the first node in ``mask``, for messages."""
        i = int(np.flatnonzero(mask)[0])
        t = int(self.tree[i])
        return f"tree {t}, node {i - int(self.tree_offsets[t])}"

    def _validate_shapes(self) -> None:
        """Array shapes, the link and comparison rules, and the per-tree and per-output arrays."""
        src = self.source
        n = self.n_nodes
        for name in ("tree", "feature", "threshold", "left", "right", "missing_left", "zero_as_missing",
                     "is_categorical", "category_left", "gain", "cover", "n_samples"):
            if getattr(self, name).shape != (n,):
                raise ModelFormatError(f"{src}: node array '{name}' has shape {getattr(self, name).shape}, expected ({n},)")
        if self.link not in LINKS:
            raise ModelFormatError(f"{src}: unknown link {self.link!r}; expected one of {LINKS}")
        if self.threshold_rule not in ("<", "<="):
            raise ModelFormatError(f"{src}: threshold_rule must be '<' or '<=', got {self.threshold_rule!r}")
        if self.split_dtype not in ("float32", "float64"):
            raise ModelFormatError(f"{src}: split_dtype must be 'float32' or 'float64', got {self.split_dtype!r}")
        if len(self.feature_types) != self.n_features:
            raise ModelFormatError(f"{src}: {len(self.feature_types)} feature types for {self.n_features} features")
        if self.output_of_tree.shape != (self.n_trees,) or self.tree_weight.shape != (self.n_trees,):
            raise ModelFormatError(f"{src}: per-tree arrays do not match the {self.n_trees} trees")
        if np.any(self.output_of_tree >= self.n_outputs) or np.any(self.output_of_tree < -1):
            t = int(np.flatnonzero((self.output_of_tree >= self.n_outputs) | (self.output_of_tree < -1))[0])
            raise ModelFormatError(f"{src}: tree {t} adds to output {self.output_of_tree[t]}, model has {self.n_outputs}")
        if self.value.shape[1] not in (1, self.n_outputs) or (
            self.value.shape[1] == 1 and np.any(self.output_of_tree < 0) and self.n_outputs > 1
        ):
            raise ModelFormatError(f"{src}: leaf values have {self.value.shape[1]} columns for {self.n_outputs} outputs")

    def _validate_links(self) -> None:
        """Split features in range, children in range and in the same tree, one parent per non-root node."""
        src, n, where = self.source, self.n_nodes, self._where
        is_leaf = self.feature < 0
        if np.any(self.feature < -1) or np.any(self.feature >= self.n_features):
            bad = (self.feature < -1) | (self.feature >= self.n_features)
            raise ModelFormatError(
                f"{src}: {where(bad)} splits on feature {self.feature[bad][0]}, model has {self.n_features} features"
            )
        inner = ~is_leaf
        child_ok = (self.left >= 0) & (self.left < n) & (self.right >= 0) & (self.right < n)
        if np.any(inner & ~child_ok):
            raise ModelFormatError(f"{src}: {where(inner & ~child_ok)} has a child index out of range")
        if np.any(is_leaf & ((self.left != -1) | (self.right != -1))):
            raise ModelFormatError(f"{src}: {where(is_leaf & ((self.left != -1) | (self.right != -1)))} is a leaf with children")
        li, ri = self.left[inner], self.right[inner]
        own = self.tree[inner]
        if np.any(self.tree[li] != own) or np.any(self.tree[ri] != own):
            bad = np.zeros(n, bool)
            bad[np.flatnonzero(inner)[(self.tree[li] != own) | (self.tree[ri] != own)]] = True
            raise ModelFormatError(f"{src}: {where(bad)} points to a child in another tree")
        parents = np.zeros(n, dtype=np.int64)
        np.add.at(parents, li, 1)
        np.add.at(parents, ri, 1)
        roots = np.zeros(n, bool)
        roots[self.tree_offsets[:-1]] = True
        if np.any(parents[roots] != 0):
            raise ModelFormatError(f"{src}: {where(roots & (parents != 0))} is a tree root but is another node's child (cycle)")
        if np.any(parents[~roots] != 1):
            bad = ~roots & (parents != 1)
            raise ModelFormatError(
                f"{src}: {where(bad)} has {parents[bad][0]} parents (expected 1: unreachable, shared or cyclic children)"
            )

    def _validate_values(self) -> None:
        """Thresholds, finite leaf values and the category lists."""
        src, n, where = self.source, self.n_nodes, self._where
        is_leaf = self.feature < 0
        num_split = ~is_leaf & ~self.is_categorical
        if np.any(num_split & ~np.isfinite(self.threshold) & ~np.isinf(self.threshold)):
            raise ModelFormatError(f"{src}: {where(num_split & np.isnan(self.threshold))} has a NaN threshold")
        if np.any(is_leaf & ~np.isfinite(self.value).all(axis=1)):
            raise ModelFormatError(f"{src}: {where(is_leaf & ~np.isfinite(self.value).all(axis=1))} has a non-finite leaf value")
        if self.cat_values.size and (self.cat_values.min() < 0 or self.cat_values.max() >= 2**31):
            bad = self.cat_values.min() if self.cat_values.min() < 0 else self.cat_values.max()
            raise ModelFormatError(f"{src}: a categorical split lists category {bad}; codes must lie in 0..2^31-1")
        if self.cat_offsets.shape != (n + 1,) or self.cat_offsets[0] != 0 or self.cat_offsets[-1] != self.cat_values.size \
                or np.any(np.diff(self.cat_offsets) < 0):
            raise ModelFormatError(f"{src}: category offsets are inconsistent with {self.cat_values.size} listed categories")

    def _validate_facts(self) -> None:
        """Check the ensemble-wide typed facts (routing rules, link scale, levels, round size)."""
        src = self.source
        if not isinstance(self.provenance, Provenance):
            raise ModelFormatError(f"{src}: provenance must be a Provenance, got {type(self.provenance).__name__}")
        if self.unseen_category not in UNSEEN_CATEGORY_RULES:
            raise ModelFormatError(
                f"{src}: unseen_category must be one of {UNSEEN_CATEGORY_RULES}, got {self.unseen_category!r}")
        if self.negative_category not in NEGATIVE_CATEGORY_RULES:
            raise ModelFormatError(
                f"{src}: negative_category must be one of {NEGATIVE_CATEGORY_RULES}, got {self.negative_category!r}")
        if not (isinstance(self.link_scale, (int, float)) and np.isfinite(self.link_scale) and self.link_scale > 0):
            raise ModelFormatError(f"{src}: link_scale must be a positive finite number, got {self.link_scale!r}")
        if isinstance(self.trees_per_round, bool) or not isinstance(self.trees_per_round, (int, np.integer)) \
                or self.trees_per_round < 1:
            raise ModelFormatError(f"{src}: trees_per_round must be a positive integer, got {self.trees_per_round!r}")
        unknown = [name for name in self.category_levels if name not in self.feature_names]
        if unknown:
            raise ModelFormatError(f"{src}: category_levels names {unknown[0]!r}, which is not a feature of the model")

    def _depths(self) -> np.ndarray:
        n = self.n_nodes
        depth = np.full(n, -1, dtype=np.int32)
        frontier = self.tree_offsets[:-1].astype(np.int64)
        level = 0
        while frontier.size:
            if level > MAX_DEPTH:
                raise ModelFormatError(f"{self.source}: a tree is deeper than {MAX_DEPTH} levels")
            depth[frontier] = level
            inner = frontier[self.feature[frontier] >= 0]
            frontier = np.concatenate([self.left[inner], self.right[inner]]).astype(np.int64)
            level += 1
        if np.any(depth < 0):
            i = int(np.flatnonzero(depth < 0)[0])
            t = int(self.tree[i])
            raise ModelFormatError(
                f"{self.source}: tree {t}, node {i - int(self.tree_offsets[t])} is not reachable from its root (cycle)"
            )
        return depth

    # ------------------------------------------------------------ properties
    @property
    def library(self) -> str:
        """Producing library (``provenance.library``)."""
        return self.provenance.library

    @property
    def objective(self) -> str:
        """The library's objective name (``provenance.objective``)."""
        return self.provenance.objective

    @property
    def source(self) -> str:
        """Where the model came from (``provenance.source``)."""
        return self.provenance.source

    @property
    def n_nodes(self) -> int:
        """Number of nodes over all trees."""
        return int(self.feature.shape[0])

    @property
    def n_trees(self) -> int:
        """Number of trees."""
        return int(self.tree_offsets.shape[0] - 1)

    @property
    def n_features(self) -> int:
        """Number of input columns the model expects."""
        return len(self.feature_names)

    @property
    def n_outputs(self) -> int:
        """Number of raw outputs (1, or the class count of a multiclass model)."""
        return int(self.base_score.shape[0])

    @property
    def is_leaf(self) -> np.ndarray:
        """Boolean mask of leaves."""
        return self.feature < 0

    @property
    def depth(self) -> np.ndarray:
        """Depth of every node (root = 0); read-only, computed once at validation."""
        return self.__dict__["_depth_cache"]

    @property
    def roots(self) -> np.ndarray:
        """Global index of every tree's root."""
        return self.tree_offsets[:-1]

    def categories(self, node: int) -> np.ndarray:
        """Listed categories of node ``node`` (global index)."""
        return self.cat_values[self.cat_offsets[node]:self.cat_offsets[node + 1]]

    # -------------------------------------------------------------- subsets
    def select_trees(self, trees: Sequence[int] | np.ndarray | slice) -> ForestGraph:
        """Return a new ensemble holding only the given trees (in the given order).

        The base score and links are kept, so predictions of the subset are the
        partial sums of the selected trees plus the base score. The copy is
        validated and read-only like every graph.
        """
        idx = np.arange(self.n_trees)[trees] if isinstance(trees, slice) else np.asarray(trees, dtype=np.int64)
        if idx.size == 0:
            raise DataError(f"{self.source}: the tree selection is empty (model has {self.n_trees} trees)")
        if np.any(idx < 0) or np.any(idx >= self.n_trees):
            raise DataError(f"{self.source}: tree indices must lie in 0..{self.n_trees - 1}")
        starts, ends = self.tree_offsets[idx], self.tree_offsets[idx + 1]
        sizes = ends - starts
        nodes = np.concatenate([np.arange(s, e) for s, e in zip(starts, ends, strict=False)])
        new_offsets = np.concatenate([[0], np.cumsum(sizes)])
        remap = np.full(self.n_nodes, -1, dtype=np.int64)
        remap[nodes] = np.arange(nodes.size)
        left = self.left[nodes]
        right = self.right[nodes]
        left = np.where(left >= 0, remap[np.maximum(left, 0)], -1)
        right = np.where(right >= 0, remap[np.maximum(right, 0)], -1)
        cat_sizes = np.diff(self.cat_offsets)[nodes]
        cat_offsets = np.concatenate([[0], np.cumsum(cat_sizes)]).astype(np.int64)
        cat_values = (
            np.concatenate([self.categories(i) for i in nodes[cat_sizes > 0]]) if cat_sizes.any() else np.zeros(0, np.int64)
        )
        return replace(
            self,
            tree=np.repeat(np.arange(idx.size, dtype=np.int32), sizes),
            feature=self.feature[nodes],
            threshold=self.threshold[nodes],
            left=left.astype(np.int32),
            right=right.astype(np.int32),
            missing_left=self.missing_left[nodes],
            zero_as_missing=self.zero_as_missing[nodes],
            is_categorical=self.is_categorical[nodes],
            category_left=self.category_left[nodes],
            cat_offsets=cat_offsets,
            cat_values=cat_values,
            value=self.value[nodes],
            gain=self.gain[nodes],
            cover=self.cover[nodes],
            n_samples=self.n_samples[nodes],
            tree_offsets=new_offsets.astype(np.int64),
            output_of_tree=self.output_of_tree[idx],
            tree_weight=self.tree_weight[idx],
        )

    def trees_of_output(self, output: int) -> np.ndarray:
        """Indices of the trees that add to raw output ``output`` (vector-leaf trees included)."""
        if not 0 <= output < self.n_outputs:
            raise DataError(f"output must lie in 0..{self.n_outputs - 1}, got {output}")
        return np.flatnonzero((self.output_of_tree == output) | (self.output_of_tree == -1))

    # ------------------------------------------------------------ prediction
    def check_X(self, X: Any) -> np.ndarray:
        """``X`` as the model's float64 matrix: the same as :func:`treeprobe.data.model_matrix` ``(self, X)``."""
        return model_matrix(self, X)

    def _matrix(self, X: Any, checked: bool) -> np.ndarray:
        if checked and isinstance(X, np.ndarray) and X.ndim == 2 and X.shape[1] == self.n_features:
            return X
        return model_matrix(self, X)

    def _goes_left(self, node: np.ndarray, x: np.ndarray) -> np.ndarray:
        """Routing decision at internal nodes ``node`` for values ``x`` (already cast)."""
        thr = self.threshold[node]
        with np.errstate(invalid="ignore"):
            numeric_left = (x < thr) if self.threshold_rule == "<" else (x <= thr)
        missing = np.isnan(x) | (self.zero_as_missing[node] & (np.abs(x) <= ZERO_MISSING_BOUND))
        go_left = np.where(missing, self.missing_left[node], numeric_left)
        cat = self.is_categorical[node]
        if cat.any():
            cnode = node[cat]
            cx = x[cat]
            listed = self._in_categories(cnode, cx)
            cat_left = np.where(np.isnan(cx), self.missing_left[cnode], listed == self.category_left[cnode])
            go_left[cat] = cat_left
        return go_left

    def _category_keys(self) -> np.ndarray:
        """Sorted keys ``node * span + category`` of every listed category (``span`` = largest code + 1)."""
        keys = self.__dict__.get("_cat_keys")
        if keys is None:
            span = int(self.cat_values.max(initial=0)) + 1
            owner = np.repeat(np.arange(self.n_nodes, dtype=np.int64), np.diff(self.cat_offsets))
            keys = _frozen(owner * span + self.cat_values)
            object.__setattr__(self, "_cat_keys", keys)
        return keys

    def _in_categories(self, node: np.ndarray, x: np.ndarray) -> np.ndarray:
        keys = self._category_keys()
        if not keys.size:
            return np.zeros(node.shape, bool)
        span = int(self.cat_values.max(initial=0)) + 1
        with np.errstate(invalid="ignore"):
            code = np.trunc(x)
            sign_ok = code >= 0 if self.negative_category == "truncate" else x >= 0
            valid = sign_ok & (code < span)
        query = node.astype(np.int64) * span + np.where(valid, code, 0).astype(np.int64)
        pos = np.minimum(np.searchsorted(keys, query), keys.size - 1)
        return valid & (keys[pos] == query)

    def _routing(self) -> _Routing:
        """Per-node tables of the fast walk, built once per graph (the graph is immutable)."""
        routing = self.__dict__.get("_routing_cache")
        if routing is None:
            routing = _Routing.of(self)
            object.__setattr__(self, "_routing_cache", routing)
        return routing

    def _walk_generic(self, arr: np.ndarray, trees: np.ndarray) -> np.ndarray:
        """Leaves of ``trees`` for the rows of ``arr`` by :meth:`_goes_left`, all trees level by level."""
        n_rows, n_trees = arr.shape[0], trees.size
        out = np.empty((n_rows, n_trees), dtype=np.int64)
        block = max(1, _ROW_BLOCK_CELLS // max(n_trees, 1))
        roots = self.tree_offsets[trees].astype(np.int64)
        # The validated depths bound the walk, whatever the arrays hold.
        levels = int(self.depth.max(initial=0)) + 1
        for start in range(0, n_rows, block):
            xb = arr[start:start + block]
            nb = xb.shape[0]
            flat_node = np.broadcast_to(roots, (nb, n_trees)).ravel().copy()
            flat_rows = np.repeat(np.arange(nb), n_trees)
            active = np.flatnonzero(self.feature[flat_node] >= 0)
            for _ in range(levels):
                if not active.size:
                    break
                cur = flat_node[active]
                vals = xb[flat_rows[active], self.feature[cur]]
                left = self._goes_left(cur, vals)
                nxt = np.where(left, self.left[cur], self.right[cur]).astype(np.int64)
                flat_node[active] = nxt
                active = active[self.feature[nxt] >= 0]
            out[start:start + nb] = flat_node.reshape(nb, n_trees)
        return out

    def _leaf_blocks(self, arr: np.ndarray):
        """Yield ``(rows, trees, leaves)``: the global leaf every row of the slice reaches in each listed tree,
        ``leaves`` of shape (rows, trees); fast trees come one at a time.

        Trees whose splits are all numeric with finite thresholds take the fast
        walk of :class:`_Routing` (one tree at a time over a block of rows, so
        the gathers stay in cache); the others go through :meth:`_walk_generic`.
        Both follow the routing rules of the module docstring.
        """
        routing = self._routing()
        n_rows = arr.shape[0]
        block = max(1, _FAST_BLOCK_VALUES // max(routing.n_slots, 1))
        for start in range(0, n_rows, block):
            rows = slice(start, min(start + block, n_rows))
            sub = arr[rows]
            if routing.generic_trees.size:
                yield rows, routing.generic_trees, self._walk_generic(sub, routing.generic_trees)
            for tree, leaves in routing.walk(sub):
                yield rows, tree, leaves

    def apply(self, X: Any, *, checked: bool = False) -> np.ndarray:
        """Global index of the leaf every row reaches in every tree.

        Vectorised over rows; one numpy pass per tree level. ``X`` is
        the model's float matrix (a DataFrame or other input goes through
        :func:`treeprobe.data.model_matrix`); ``checked=True`` skips that step
        for a float array that already came from it.

        Returns
        -------
        ndarray of int64, shape (n_rows, n_trees)
        """
        arr = self._matrix(X, checked).astype(self.split_dtype, copy=False)
        out = np.empty((arr.shape[0], self.n_trees), dtype=np.int64)
        for rows, trees, leaves in self._leaf_blocks(arr):
            out[rows, trees] = leaves
        return out

    def predict_raw(self, X: Any, *, checked: bool = False) -> np.ndarray:
        """Raw (margin) output: ``base_score + sum_t tree_weight[t] * leaf_value_t(x)``.

        Parameters
        ----------
        X : ndarray of shape (n_rows, n_features), or anything :func:`treeprobe.data.model_matrix` reads
            Rows to score.
        checked : bool, default False
            ``X`` is already the model's float matrix.

        Returns
        -------
        ndarray of float64, shape (n_rows,) for one output, (n_rows, n_outputs) otherwise.
            The library's raw scale: XGBoost ``output_margin=True``, LightGBM
            ``raw_score=True``, scikit-learn ``decision_function`` (forests:
            ``predict_proba`` / ``predict``).
        """
        arr = self._matrix(X, checked).astype(self.split_dtype, copy=False)
        weighted = self._routing().weighted_value
        first_value = np.ascontiguousarray(weighted[:, 0])
        vector_leaves = self.value.shape[1] > 1
        # Output-major, so each tree adds into one contiguous run of rows.
        out = np.tile(self.base_score[:, None], (1, arr.shape[0]))
        for rows, trees, leaves in self._leaf_blocks(arr):
            if vector_leaves:
                out[:, rows] += (weighted[leaves].sum(axis=1) if leaves.ndim == 2 else weighted[leaves]).T
            elif leaves.ndim == 1:
                out[max(int(self.output_of_tree[trees]), 0), rows] += first_value.take(leaves)
            else:
                contrib = first_value[leaves]
                outputs = np.maximum(self.output_of_tree[trees], 0)
                for k in np.unique(outputs):
                    out[k, rows] += contrib[:, outputs == k].sum(axis=1)
        return out[0] if self.n_outputs == 1 else out.T

    def predict(self, X: Any, *, checked: bool = False) -> np.ndarray:
        """Prediction on the link's scale (probabilities for logit/softmax, exp for log links)."""
        raw = self.predict_raw(X, checked=checked)
        if self.link == "logit":
            return 1.0 / (1.0 + np.exp(-self.link_scale * raw))
        if self.link == "softmax":
            z = raw - raw.max(axis=1, keepdims=True)
            e = np.exp(z)
            return e / e.sum(axis=1, keepdims=True)
        if self.link == "log":
            return np.exp(raw)
        return raw

    # --------------------------------------------------------------- summary
    def feature_totals(self) -> pd.DataFrame:
        """Per-feature split count, total gain and total cover over all split nodes.

        ``splits_j = #{internal nodes splitting on j}``, ``gain_j = sum gain``,
        ``cover_j = sum cover`` over those nodes: the quantities behind XGBoost's
        ``get_score`` (``weight``, ``total_gain``, ``total_cover``) and LightGBM's
        ``feature_importance("split" | "gain")``.
        """
        inner = self.feature >= 0
        f = self.feature[inner]
        k = self.n_features
        return pd.DataFrame(
            {
                "feature": list(self.feature_names),
                "splits": np.bincount(f, minlength=k).astype(np.int64),
                "gain": np.bincount(f, weights=np.nan_to_num(self.gain[inner]), minlength=k),
                "cover": np.bincount(f, weights=np.nan_to_num(self.cover[inner]), minlength=k),
            }
        )

    def summary(self) -> dict:
        """Plain facts about the model, for display: library, objective, sizes, depth and leaf statistics."""
        leaves = self.is_leaf
        per_tree_leaves = np.bincount(self.tree[leaves], minlength=self.n_trees)
        per_tree_depth = np.zeros(self.n_trees, dtype=np.int64)
        np.maximum.at(per_tree_depth, self.tree, self.depth)
        used = np.unique(self.feature[~leaves])
        return {
            "source": self.source,
            "library": self.library,
            "objective": self.objective,
            "link": self.link,
            "n_trees": self.n_trees,
            "n_outputs": self.n_outputs,
            "n_nodes": self.n_nodes,
            "n_leaves": int(leaves.sum()),
            "n_features": self.n_features,
            "n_features_used": int(used.size),
            "n_categorical_features": int(sum(t == "categorical" for t in self.feature_types)),
            "max_depth": int(per_tree_depth.max(initial=0)),
            "mean_tree_depth": float(per_tree_depth.mean()) if self.n_trees else 0.0,
            "mean_leaves": float(per_tree_leaves.mean()) if self.n_trees else 0.0,
            "max_leaves": int(per_tree_leaves.max(initial=0)),
            "features_used": [self.feature_names[j] for j in used],
        }

    def to_networkx(self, tree_index: int):
        """One tree as a ``networkx.DiGraph``; node keys are local node ids.

        Node attributes: ``feature`` (name, None at leaves), ``threshold``,
        ``categories``, ``category_left``, ``missing_left``, ``value`` (leaf
        values as a tuple), ``gain``, ``cover``, ``n_samples``, ``depth``,
        ``leaf``. Edge attribute ``branch`` is "left" or "right".
        """
        if not 0 <= tree_index < self.n_trees:
            raise DataError(f"tree_index must lie in 0..{self.n_trees - 1}, got {tree_index}")
        start, end = int(self.tree_offsets[tree_index]), int(self.tree_offsets[tree_index + 1])
        g = nx.DiGraph(tree=tree_index, library=self.library, output_of_tree=int(self.output_of_tree[tree_index]))
        depth = self.depth
        for i in range(start, end):
            leaf = bool(self.feature[i] < 0)
            g.add_node(
                i - start,
                leaf=leaf,
                feature=None if leaf else self.feature_names[self.feature[i]],
                threshold=float(self.threshold[i]),
                categories=tuple(int(c) for c in self.categories(i)),
                category_left=bool(self.category_left[i]),
                missing_left=bool(self.missing_left[i]),
                value=tuple(float(v) for v in self.value[i]),
                gain=float(self.gain[i]),
                cover=float(self.cover[i]),
                n_samples=float(self.n_samples[i]),
                depth=int(depth[i]),
            )
            if not leaf:
                g.add_edge(i - start, int(self.left[i]) - start, branch="left")
                g.add_edge(i - start, int(self.right[i]) - start, branch="right")
        return g
