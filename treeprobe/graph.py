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
  every other value (negative, unseen, not listed) goes the other way.

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
"""

from __future__ import annotations

import difflib
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError, ModelFormatError

__all__ = ["ForestGraph", "UnseenCategoryWarning", "LINKS", "MAX_DEPTH"]

LINKS = ("identity", "logit", "softmax", "log", "proba")
MAX_DEPTH = 512
_ZERO_THRESHOLD = 1e-35
_ROW_BLOCK_CELLS = 4_000_000


class UnseenCategoryWarning(UserWarning):
    """Data hold a category level the model never saw in training."""


def _as_array(values: Any, dtype: Any, name: str, source: str) -> np.ndarray:
    try:
        return np.ascontiguousarray(values, dtype=dtype)
    except (TypeError, ValueError) as exc:
        raise ModelFormatError(f"{source}: node array '{name}' is not {np.dtype(dtype).name}: {exc}") from None


def _missing_columns_message(missing: list[str], available: list[str], wanted: str) -> str:
    """One message naming the columns the data lack (``wanted`` says which), with close matches (typos)."""
    shown = ", ".join(missing[:10]) + (" ..." if len(missing) > 10 else "")
    hints = []
    for name in missing[:10]:
        close = difflib.get_close_matches(name, available, n=1, cutoff=0.75)
        if close:
            hints.append(f"{name!r} -> {close[0]!r}?")
    hint = f"; close matches in the data: {', '.join(hints)}" if hints else ""
    return f"data lacks {wanted}: {shown}{hint}"


def _numeric_values(series: pd.Series, col: str) -> tuple[np.ndarray, str | None]:
    """Float64 values of a column feeding a numeric feature, and a note when its type had to be coerced.

    Booleans become 0/1 and text that reads as a number becomes that number;
    empty cells and None are missing (NaN). Any other value, and infinity,
    raise a DataError naming the column, the first bad value and its row.
    """
    note = None
    kind = series.dtype.kind
    if kind == "b" or str(series.dtype) == "boolean":
        values = series.astype("float64").to_numpy(dtype=np.float64, na_value=np.nan)
        note = f"column {col!r}: booleans read as 0/1"
    elif kind in "iuf":
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        raw = series.astype(object)
        is_bool = np.fromiter((isinstance(v, (bool, np.bool_)) for v in raw), dtype=bool, count=len(raw))
        values = np.array(pd.to_numeric(raw.mask(is_bool), errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan))
        if is_bool.any():
            values[is_bool] = raw[is_bool].astype(float).to_numpy()
        bad = np.isnan(values) & raw.notna().to_numpy() & ~is_bool
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            raise DataError(
                f"column {col!r} feeds a numeric feature but holds {int(bad.sum())} value(s) that are not numbers; "
                f"the first is {raw.iloc[first]!r} at row {series.index[first]!r}"
            )
        parts = []
        n_text = int((~np.isnan(values) & ~is_bool).sum())
        if n_text:
            parts.append(f"{n_text} text value(s) read as numbers")
        if is_bool.any():
            parts.append(f"{int(is_bool.sum())} boolean(s) read as 0/1")
        note = f"column {col!r}: " + ", ".join(parts) if parts else None
    infinite = np.isinf(values)
    if infinite.any():
        first = int(np.flatnonzero(infinite)[0])
        raise DataError(
            f"column {col!r} holds an infinite value at row {series.index[first]!r}; "
            "use finite numbers, or NaN / an empty cell for missing"
        )
    return values, note


@dataclass(frozen=True, eq=False)
class ForestGraph:
    """A fitted tree ensemble as columnar arrays; see the module docstring for semantics.

    Build one with :meth:`from_arrays` (which validates) or through
    :func:`treeprobe.load_model`.

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
    library, objective, source : str
        Producing library, its objective name, and where the model came from.
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
    library: str = "unknown"
    objective: str = ""
    source: str = "<arrays>"
    metadata: dict = field(default_factory=dict)

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
        metadata: dict | None = None,
        local_children: bool = False,
    ) -> ForestGraph:
        """Build and validate an ensemble from per-node sequences.

        Children are global node indices, or indices local to each tree when
        ``local_children=True``. Optional per-node arrays default to: no
        missing-value special cases (NaN goes right), numeric splits, unknown
        gain/cover/sample counts (NaN). ``categories`` gives, per node, the
        listed categories of a categorical split (empty elsewhere).

        Raises
        ------
        ModelFormatError
            When the arrays are inconsistent or do not form trees.
        """
        src = source
        feature_a = _as_array(feature, np.int32, "feature", src)
        n_nodes = feature_a.shape[0]
        offsets = _as_array(tree_offsets, np.int64, "tree_offsets", src)
        if offsets.ndim != 1 or offsets.size < 2 or offsets[0] != 0 or offsets[-1] != n_nodes:
            raise ModelFormatError(
                f"{src}: tree_offsets must run from 0 to the node count {n_nodes}; got {offsets[:3]}...{offsets[-3:]}"
            )
        if np.any(np.diff(offsets) <= 0):
            bad = int(np.flatnonzero(np.diff(offsets) <= 0)[0])
            raise ModelFormatError(f"{src}: tree {bad} has no nodes")
        n_trees = offsets.size - 1
        sizes = np.diff(offsets)
        tree_a = np.repeat(np.arange(n_trees, dtype=np.int32), sizes)

        def node_array(values: Any, dtype: Any, name: str, default: Any) -> np.ndarray:
            if values is None:
                return np.full(n_nodes, default, dtype=dtype)
            arr = _as_array(values, dtype, name, src)
            if arr.shape != (n_nodes,):
                raise ModelFormatError(f"{src}: node array '{name}' has shape {arr.shape}, expected ({n_nodes},)")
            return arr

        left_a = node_array(left, np.int64, "left", -1)
        right_a = node_array(right, np.int64, "right", -1)
        if local_children:
            local_size = sizes[tree_a]
            bad = (left_a >= local_size) | (right_a >= local_size)
            if np.any(bad):
                i = int(np.flatnonzero(bad)[0])
                raise ModelFormatError(
                    f"{src}: tree {tree_a[i]}, node {i - offsets[tree_a[i]]} has a child index out of range "
                    f"({max(left_a[i], right_a[i])} >= {local_size[i]} nodes)"
                )
            base = offsets[:-1][tree_a]
            left_a = np.where(left_a >= 0, left_a + base, -1)
            right_a = np.where(right_a >= 0, right_a + base, -1)
        value_a = _as_array(value, np.float64, "value", src)
        if value_a.ndim == 1:
            value_a = value_a[:, None]
        if value_a.ndim != 2 or value_a.shape[0] != n_nodes:
            raise ModelFormatError(f"{src}: leaf values have shape {value_a.shape}, expected ({n_nodes}, k)")

        is_cat = node_array(is_categorical, bool, "is_categorical", False)
        cat_offsets = np.zeros(n_nodes + 1, dtype=np.int64)
        cat_values = np.zeros(0, dtype=np.int64)
        if categories is not None:
            if len(categories) != n_nodes:
                raise ModelFormatError(f"{src}: {len(categories)} category lists for {n_nodes} nodes")
            sizes_listed = np.fromiter((len(c) for c in categories), dtype=np.int64, count=n_nodes)
            lists = [np.unique(np.asarray(categories[i], dtype=np.int64)) for i in np.flatnonzero(sizes_listed)]
            counts = np.zeros(n_nodes, dtype=np.int64)
            counts[sizes_listed > 0] = [c.size for c in lists]
            cat_offsets[1:] = np.cumsum(counts)
            cat_values = np.concatenate(lists) if lists else cat_values
        if n_features is None:
            n_features = len(feature_names) if feature_names is not None else int(feature_a.max(initial=-1)) + 1
        names = tuple(str(n) for n in feature_names) if feature_names is not None else tuple(
            f"f{i}" for i in range(n_features)
        )
        if feature_types is None:
            types = ["numeric"] * len(names)
            for j in np.unique(feature_a[is_cat]):
                if 0 <= j < len(types):
                    types[j] = "categorical"
            feature_types = types
        n_values = value_a.shape[1]
        if n_outputs is None:
            n_outputs = n_values if n_values > 1 else int(np.max(output_of_tree, initial=0)) + 1 if output_of_tree is not None else 1
        out_a = (
            np.zeros(n_trees, dtype=np.int32) if output_of_tree is None else _as_array(output_of_tree, np.int32, "output_of_tree", src)
        )
        if n_values > 1 and output_of_tree is None:
            out_a = np.full(n_trees, -1, dtype=np.int32)
        weight_a = np.ones(n_trees) if tree_weight is None else _as_array(tree_weight, np.float64, "tree_weight", src)
        base_a = np.broadcast_to(np.asarray(base_score, dtype=np.float64), (n_outputs,)).copy()
        ens = cls(
            tree=tree_a,
            feature=feature_a,
            threshold=node_array(threshold, np.float64, "threshold", np.nan),
            left=left_a.astype(np.int32),
            right=right_a.astype(np.int32),
            missing_left=node_array(missing_left, bool, "missing_left", False),
            zero_as_missing=node_array(zero_as_missing, bool, "zero_as_missing", False),
            is_categorical=is_cat,
            category_left=node_array(category_left, bool, "category_left", True),
            cat_offsets=cat_offsets,
            cat_values=cat_values,
            value=value_a,
            gain=node_array(gain, np.float64, "gain", np.nan),
            cover=node_array(cover, np.float64, "cover", np.nan),
            n_samples=node_array(n_samples, np.float64, "n_samples", np.nan),
            tree_offsets=offsets,
            output_of_tree=out_a,
            tree_weight=weight_a,
            base_score=base_a,
            link=link,
            threshold_rule=threshold_rule,
            split_dtype=split_dtype,
            feature_names=names,
            feature_types=tuple(feature_types),
            library=library,
            objective=objective,
            source=source,
            metadata=dict(metadata or {}),
        )
        ens.validate()
        return ens

    def validate(self) -> None:
        """Check that the arrays are consistent and that every tree is a tree.

        Raises
        ------
        ModelFormatError
            Naming the source, tree and node of the first problem found.
        """
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

        def where(mask: np.ndarray) -> str:
            i = int(np.flatnonzero(mask)[0])
            t = int(self.tree[i])
            return f"tree {t}, node {i - int(self.tree_offsets[t])}"

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
        num_split = inner & ~self.is_categorical
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
        # With one parent per non-root node and none at the root, every tree is a
        # tree exactly when all its nodes are reachable; _depths proves that.
        object.__setattr__(self, "_depth_cache", self._depths())

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
        """Depth of every node (root = 0)."""
        cached = self.__dict__.get("_depth_cache")
        if cached is None:
            cached = self._depths()
            object.__setattr__(self, "_depth_cache", cached)
        return cached

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
        partial sums of the selected trees plus the base score.
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
        out = replace(
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
            metadata={**self.metadata, "selected_trees": idx},
        )
        object.__setattr__(out, "_depth_cache", self.depth[nodes])
        return out

    def trees_of_output(self, output: int) -> np.ndarray:
        """Indices of the trees that add to raw output ``output`` (vector-leaf trees included)."""
        if not 0 <= output < self.n_outputs:
            raise DataError(f"output must lie in 0..{self.n_outputs - 1}, got {output}")
        return np.flatnonzero((self.output_of_tree == output) | (self.output_of_tree == -1))

    # ------------------------------------------------------------ prediction
    def check_X(self, X: Any) -> np.ndarray:
        """Return ``X`` as a float64 matrix whose columns are the model's features.

        A DataFrame is matched by column name (order free; extra columns are
        ignored) when the model knows its feature names, or by position when
        the model has only generic names (``f0, f1, ...``) and the frame has
        as many columns; categorical columns become their integer codes
        (missing = NaN). Booleans become 0/1 and text that reads as numbers
        becomes float. A plain array must have exactly ``n_features`` columns.

        Raises
        ------
        DataError
            Naming the missing columns (with close matches for typos), the
            column count found and expected, a column whose values are not
            numbers (first bad value and its row), or an infinite value
            (column and row). Use :func:`treeprobe.data.prepare_data` to
            also refuse columns that are entirely missing and to get a
            report of what was coerced.
        """
        if isinstance(X, pd.DataFrame):
            frame = self._frame_columns(X)
            out = np.empty((len(frame), len(frame.columns)), dtype=np.float64)
            for j, col in enumerate(frame.columns):
                out[:, j] = self._column_values(frame.iloc[:, j], j, str(col))
            return out
        try:
            arr = np.asarray(X, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise DataError(f"data is not numeric: {exc}") from None
        if arr.ndim != 2:
            raise DataError(f"data must be 2-D (rows x features), got {arr.ndim}-D")
        if arr.shape[1] != self.n_features:
            raise DataError(f"data has {arr.shape[1]} columns, the model expects {self.n_features} features")
        if np.isinf(arr).any():
            row, col = (int(i) for i in np.argwhere(np.isinf(arr))[0])
            raise DataError(f"data column {col} ({self.feature_names[col]!r}) holds an infinite value at row {row}; "
                            "use finite numbers, or NaN for missing")
        return arr

    def _frame_columns(self, X: pd.DataFrame) -> pd.DataFrame:
        """The columns of ``X`` that feed the model's features, in the model's order."""
        cols = [str(c) for c in X.columns]
        names = list(self.feature_names)
        if cols == names:
            return X
        if len(set(cols)) != len(cols):
            repeated = sorted({c for c in cols if cols.count(c) > 1})
            raise DataError(f"data has repeated column names: {', '.join(repeated[:10])}")
        missing = [c for c in names if c not in cols]
        if missing and len(cols) == len(names) and self.metadata.get("generic_feature_names"):
            return X
        if missing:
            raise DataError(_missing_columns_message(
                missing, cols, f"{len(missing)} of the model's {len(names)} feature columns"))
        position = {c: i for i, c in enumerate(cols)}
        return X.iloc[:, [position[c] for c in names]]

    def _column_values(self, series: pd.Series, j: int, col: str) -> np.ndarray:
        """Float64 values of the column feeding feature ``j``.

        Categorical features with known levels are coded by the model's own
        levels (unseen ones warn, see :class:`UnseenCategoryWarning`); every
        other column must hold numbers, booleans or text that reads as numbers.
        """
        levels = (self.metadata.get("category_levels") or {}).get(self.feature_names[j])
        # pandas >= 3 reads text as the "str" dtype, older versions as object.
        is_text = series.dtype == object or pd.api.types.is_string_dtype(series.dtype)
        if levels is not None and (isinstance(series.dtype, pd.CategoricalDtype) or is_text):
            return self._coded_by_levels(series, list(levels), col)
        if isinstance(series.dtype, pd.CategoricalDtype):
            codes = series.cat.codes.to_numpy().astype(np.float64)
            codes[codes < 0] = np.nan
            return codes
        if is_text and self.feature_types[j] == "categorical" and series.notna().any():
            try:
                return _numeric_values(series, col)[0]
            except DataError:
                raise DataError(
                    f"column {col!r} holds text labels for the categorical feature {self.feature_names[j]!r}, but "
                    "the model stores no category levels to code them with; give the integer category codes used "
                    "in training, or a pandas categorical column with the training categories in training order"
                ) from None
        return _numeric_values(series, col)[0]

    def _coded_by_levels(self, series: pd.Series, levels: list, col: str) -> np.ndarray:
        """Codes of a categorical column by the model's fitted levels (NaN for missing; unseen levels warn).

        The model numbers categories by its own fitted levels, not by this frame's codes.
        """
        codes = pd.Index(levels).get_indexer(series.astype(object).to_numpy()).astype(np.float64)
        unseen = (codes < 0) & series.notna().to_numpy()
        codes[codes < 0] = np.nan
        if unseen.any():
            labels = sorted({str(v) for v in series[unseen]})
            shown = ", ".join(labels[:5]) + (" ..." if len(labels) > 5 else "")
            rule = self.metadata.get("unseen_category", "missing")
            warnings.warn(
                f"column {col!r} holds {len(labels)} categor{'y' if len(labels) == 1 else 'ies'} the model "
                f"never saw ({shown}); routed as {self.library} does: "
                + ("like a category no split lists" if rule == "unlisted" else "like a missing value"),
                UnseenCategoryWarning,
                stacklevel=5,
            )
            if rule == "unlisted":
                codes[unseen] = -1.0
        return codes

    def _goes_left(self, node: np.ndarray, x: np.ndarray) -> np.ndarray:
        """Routing decision at internal nodes ``node`` for values ``x`` (already cast)."""
        thr = self.threshold[node]
        with np.errstate(invalid="ignore"):
            numeric_left = (x < thr) if self.threshold_rule == "<" else (x <= thr)
        missing = np.isnan(x) | (self.zero_as_missing[node] & (np.abs(x) <= _ZERO_THRESHOLD))
        go_left = np.where(missing, self.missing_left[node], numeric_left)
        cat = self.is_categorical[node]
        if cat.any():
            cnode = node[cat]
            cx = x[cat]
            listed = self._in_categories(cnode, cx)
            cat_left = np.where(np.isnan(cx), self.missing_left[cnode], listed == self.category_left[cnode])
            go_left[cat] = cat_left
        return go_left

    def _in_categories(self, node: np.ndarray, x: np.ndarray) -> np.ndarray:
        keys = self.__dict__.get("_cat_keys")
        span = int(self.cat_values.max(initial=0)) + 1
        if keys is None:
            owner = np.repeat(np.arange(self.n_nodes, dtype=np.int64), np.diff(self.cat_offsets))
            keys = owner * span + self.cat_values
            object.__setattr__(self, "_cat_keys", keys)
        with np.errstate(invalid="ignore"):
            code = np.trunc(x)
            # LightGBM casts to int first (-0.5 becomes category 0); XGBoost and
            # scikit-learn treat every negative value as no category.
            sign_ok = code >= 0 if self.library == "lightgbm" else x >= 0
            valid = sign_ok & (code < span)
        query = node.astype(np.int64) * span + np.where(valid, code, 0).astype(np.int64)
        pos = np.searchsorted(keys, query)
        pos = np.minimum(pos, max(keys.size - 1, 0))
        return valid & (keys.size > 0) & (keys[pos] == query) if keys.size else np.zeros(node.shape, bool)

    def apply(self, X: Any, *, checked: bool = False) -> np.ndarray:
        """Global index of the leaf every row reaches in every tree.

        Vectorised over rows and trees; one numpy pass per tree level.

        Returns
        -------
        ndarray of int64, shape (n_rows, n_trees)
        """
        arr = X if checked else self.check_X(X)
        arr = arr.astype(self.split_dtype, copy=False)
        n_rows = arr.shape[0]
        out = np.empty((n_rows, self.n_trees), dtype=np.int64)
        block = max(1, _ROW_BLOCK_CELLS // max(self.n_trees, 1))
        roots = self.roots.astype(np.int64)
        for start in range(0, n_rows, block):
            xb = arr[start:start + block]
            nb = xb.shape[0]
            node = np.broadcast_to(roots, (nb, self.n_trees)).copy()
            rows = np.broadcast_to(np.arange(nb)[:, None], node.shape)
            active = np.flatnonzero(self.feature[node].ravel() >= 0)
            flat_node = node.ravel()
            flat_rows = rows.ravel()
            while active.size:
                cur = flat_node[active]
                vals = xb[flat_rows[active], self.feature[cur]]
                left = self._goes_left(cur, vals)
                nxt = np.where(left, self.left[cur], self.right[cur]).astype(np.int64)
                flat_node[active] = nxt
                active = active[self.feature[nxt] >= 0]
            out[start:start + nb] = flat_node.reshape(nb, self.n_trees)
        return out

    def predict_raw(self, X: Any, *, checked: bool = False) -> np.ndarray:
        """Raw (margin) output: ``base_score + sum_t tree_weight[t] * leaf_value_t(x)``.

        Parameters
        ----------
        X : array-like or DataFrame of shape (n_rows, n_features)
            Rows to score; see :meth:`check_X`.

        Returns
        -------
        ndarray of float64, shape (n_rows,) for one output, (n_rows, n_outputs) otherwise.
            The library's raw scale: XGBoost ``output_margin=True``, LightGBM
            ``raw_score=True``, scikit-learn ``decision_function`` (forests:
            ``predict_proba`` / ``predict``).
        """
        leaves = self.apply(X, checked=checked)
        out = np.tile(self.base_score, (leaves.shape[0], 1))
        if self.value.shape[1] == 1:
            contrib = self.value[leaves, 0] * self.tree_weight
            mix = np.zeros((self.n_trees, self.n_outputs))
            mix[np.arange(self.n_trees), np.maximum(self.output_of_tree, 0)] = 1.0
            out += contrib @ mix
        else:
            out += np.einsum("rtk,t->rk", self.value[leaves], self.tree_weight)
        return out[:, 0] if self.n_outputs == 1 else out

    def predict(self, X: Any) -> np.ndarray:
        """Prediction on the link's scale (probabilities for logit/softmax, exp for log links)."""
        raw = self.predict_raw(X)
        if self.link == "logit":
            # link_scale: LightGBM's binary objective uses 1 / (1 + exp(-sigmoid * raw)).
            return 1.0 / (1.0 + np.exp(-float(self.metadata.get("link_scale", 1.0)) * raw))
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
        import networkx as nx

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
