"""Reading LightGBM models: the model text format, ``Booster`` and the scikit-learn wrappers.

LightGBM [1]_ saves a fitted model as plain text (``Booster.save_model``,
``Booster.model_to_string``): a header of ``key=value`` lines, one ``Tree=k``
block per tree whose per-node arrays are space-separated numbers, an
``end of trees`` marker, and then the split-count importances, the training
parameters (``[name: value]`` lines up to ``end of parameters``) and, from the
Python package, the pandas category lists. This module parses that text
without importing LightGBM and turns it into the common
:class:`~treeprobe.graph.ForestGraph`; :func:`from_lightgbm` runs a live
``Booster`` or ``LGBMModel`` through the same parser via ``model_to_string``.

Node layout
-----------
LightGBM numbers the ``num_leaves - 1`` internal nodes of a tree ``0 ..
num_leaves - 2`` (node 0 is the root) and writes a child that is leaf ``j`` as
``~j`` (``-j - 1``). Here every tree becomes one contiguous block: its internal
nodes in LightGBM's order, then its leaves in LightGBM's order. A tree with a
single leaf (``num_leaves=1``) is one leaf node.

Routing
-------
LightGBM's ``Tree::NumericalDecision`` and ``Tree::CategoricalDecision``
(``include/LightGBM/tree.h``) read ``decision_type`` bit 0 (categorical),
bit 1 (default left) and bits 2-3 (missing type: 0 none, 1 zero, 2 NaN), and
are mapped onto the common semantics as follows (each case is checked against
LightGBM's own predictor in ``tests/test_io_lightgbm.py``):

* numeric, missing type none: NaN is replaced by 0.0 and compared, so
  ``missing_left`` is ``0.0 <= threshold``;
* numeric, missing type zero: NaN and ``|x| <= 1e-35`` take the default
  direction (``zero_as_missing``);
* numeric, missing type NaN: NaN takes the default direction;
* categorical: ``int(x)`` listed in the node's bitset goes left; unlisted,
  negative and NaN values go right, whatever the missing type (measured with
  LightGBM 4.7; the threshold field holds the bitset's index).

Leaf values already include the learning rate (``shrinkage`` is recorded per
tree but applied at training time), and ``boost_from_average`` is baked into
the first tree(s), so ``tree_weight`` is 1 and ``base_score`` 0. Random-forest
models (``boosting="rf"``, header flag ``average_output``) average their trees:
``tree_weight`` is ``1 / n_iterations``. LightGBM's own ``raw_score=True``
skips that averaging for them (it returns ``n_iterations`` times the margin
that its ``predict`` then maps through the link); treeprobe keeps the averaged
margin, so that the link reproduces ``predict``.

Raw output and links
--------------------
:meth:`ForestGraph.predict_raw` equals ``Booster.predict(X, raw_score=True)``
(random forests: see above).
The link follows the objective: ``binary``, ``cross_entropy`` and
``multiclassova`` use "logit", ``multiclass`` "softmax", ``poisson``,
``gamma`` and ``tweedie`` "log", every other objective "identity". For
``binary`` LightGBM's probability is ``1 / (1 + exp(-sigmoid * raw))``; the
``sigmoid`` factor (1 unless set at training) is kept as
``ForestGraph.link_scale``, which :meth:`ForestGraph.predict` applies inside
the logit. Likewise the probability
of ``cross_entropy_lambda`` (``log1p(exp(raw))``) and the squared output of
``reg_sqrt`` models are not links; their raw scores are still exact.

References
----------
.. [1] Ke, G., Meng, Q., Finley, T., Wang, T., Chen, W., Ma, W., Ye, Q. and
   Liu, T.-Y. (2017). "LightGBM: A highly efficient gradient boosting decision
   tree". Advances in Neural Information Processing Systems 30, 3146-3154.
.. [2] Fisher, W. D. (1958). "On grouping for maximum homogeneity". Journal
   of the American Statistical Association 53(284), 789-798. (The basis of
   LightGBM's many-category splits, which the bitsets store.)
"""

from __future__ import annotations

import json
from collections import Counter
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..errors import ModelFormatError, UnsupportedModelError
from ..graph import ForestGraph, Provenance

__all__ = ["load_lightgbm_text", "from_lightgbm"]

_HEADER_REQUIRED = ("version", "num_class", "num_tree_per_iteration", "max_feature_idx", "feature_names")
# Header lines LightGBM writes without "=": the format tag and the random-forest flag.
_HEADER_FLAGS = ("tree", "average_output")
_INTERNAL_KEYS = {
    "split_feature": np.int64,
    "split_gain": np.float64,
    "threshold": np.float64,
    "decision_type": np.int64,
    "left_child": np.int64,
    "right_child": np.int64,
    "internal_value": np.float64,
    "internal_weight": np.float64,
    "internal_count": np.float64,
}
# LightGBM leaves leaf_weight (and in old files leaf_count) empty for a
# single-leaf tree; those become NaN.
_LEAF_STAT_KEYS = ("leaf_weight", "leaf_count")
_LOGIT_OBJECTIVES = ("binary", "cross_entropy", "multiclassova")
_LOG_OBJECTIVES = ("poisson", "gamma", "tweedie")
_CATEGORICAL_BIT, _DEFAULT_LEFT_BIT = 1, 2
# Sizes and counts beyond this cannot come from a real model; it keeps int64 arithmetic exact.
_INT_LIMIT = 2**40
_MISSING_NONE, _MISSING_ZERO, _MISSING_NAN = 0, 1, 2


def _decode(data: bytes | str, source: str) -> str:
    if isinstance(data, str):
        return data
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise ModelFormatError(f"{source}: data must be bytes or str, got {type(data).__name__}")
    try:
        return bytes(data).decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ModelFormatError(
            f"{source}: not LightGBM model text (invalid UTF-8 at byte {exc.start})"
        ) from None


def _split_key_value(line: str) -> tuple[str, str] | None:
    key, sep, value = line.partition("=")
    return (key.strip(), value.strip()) if sep else None


def _split_sections(lines: list[str], source: str) -> tuple[dict, list[dict], list[str]]:  # noqa: C901
    """Header entries, one ``{key: (value, line_number)}`` per ``Tree=k`` block, and the lines after the trees."""
    header: dict[str, tuple[str, int]] = {}
    blocks: list[dict[str, tuple[str, int]]] = []
    n_lines = len(lines)
    i = 0
    while i < n_lines and not lines[i].startswith("Tree=") and lines[i] != "end of trees":
        line = lines[i]
        i += 1
        if not line or line in _HEADER_FLAGS:
            if line:
                header[line] = ("", i)
            continue
        entry = _split_key_value(line)
        if entry is None or not entry[0]:
            raise ModelFormatError(f"{source}: line {i}: expected 'key=value' in the model header, found {line[:60]!r}")
        if entry[0] in header:
            raise ModelFormatError(f"{source}: line {i}: header key '{entry[0]}' appears twice")
        header[entry[0]] = (entry[1], i)
    while i < n_lines and lines[i] != "end of trees":
        line = lines[i]
        i += 1
        if not line:
            continue
        entry = _split_key_value(line)
        if entry is None or not entry[0]:
            where = f"Tree={len(blocks) - 1}" if blocks else "the model header"
            raise ModelFormatError(f"{source}: line {i} ({where}): expected 'key=value', found {line[:60]!r}")
        key, value = entry
        if key == "Tree":
            if value != str(len(blocks)):
                raise ModelFormatError(
                    f"{source}: line {i}: found 'Tree={value[:20]}' where 'Tree={len(blocks)}' was expected "
                    "(trees must be numbered 0, 1, 2, ... in order)"
                )
            blocks.append({})
            continue
        block = blocks[-1]
        if key in block:
            raise ModelFormatError(
                f"{source}: line {i} (Tree={len(blocks) - 1}): key '{key}' appears twice (a 'Tree=' line is missing?)"
            )
        block[key] = (value, i)
    if i >= n_lines:
        raise ModelFormatError(f"{source}: the model text is truncated: no 'end of trees' line after {len(blocks)} trees")
    return header, blocks, lines[i + 1:]


def _header_int(header: dict, key: str, source: str, *, minimum: int) -> int:
    value, line = header[key]
    try:
        number = int(value)
    except ValueError:
        raise ModelFormatError(f"{source}: line {line}: header key '{key}' is not an integer: {value[:40]!r}") from None
    if number < minimum or number >= _INT_LIMIT:
        raise ModelFormatError(
            f"{source}: line {line}: header key '{key}' is {value[:40]}, expected {minimum}..{_INT_LIMIT - 1}"
        )
    return number


def _tree_int(block: dict, key: str, tree: int, source: str, *, default: int | None = None) -> int:
    if key not in block:
        if default is not None:
            return default
        raise ModelFormatError(f"{source}: Tree={tree}: key '{key}' is missing")
    value, line = block[key]
    try:
        number = int(value)
    except ValueError:
        raise ModelFormatError(
            f"{source}: line {line} (Tree={tree}): key '{key}' is not an integer: {value[:40]!r}"
        ) from None
    if abs(number) >= _INT_LIMIT:
        raise ModelFormatError(f"{source}: line {line} (Tree={tree}): key '{key}' is out of range: {value[:40]!r}")
    return number


def _bad_token(tokens: list[str], dtype: Any) -> str | None:
    for token in tokens:
        try:
            np.array(token, dtype=dtype)
        except (ValueError, OverflowError):
            return token
    return None


def _to_numbers(tokens: list[str], dtype: Any, key: str, tree: int, line: int, source: str) -> np.ndarray:
    try:
        return np.array(tokens, dtype=dtype)
    except (ValueError, OverflowError):
        token = _bad_token(tokens, dtype)
        kind = "an integer" if np.issubdtype(dtype, np.integer) else "a number"
        raise ModelFormatError(
            f"{source}: line {line} (Tree={tree}): key '{key}' holds {token[:40]!r}, which is not {kind}"
        ) from None


def _node_values(blocks: list[dict], key: str, dtype: Any, counts: np.ndarray, source: str, *,
                 empty_as_nan: np.ndarray | None = None) -> np.ndarray:
    """Concatenate one per-node key over all trees, checking that tree ``k`` holds ``counts[k]`` values.

    Tokens of all trees are converted in one numpy call; the per-tree loop only
    splits lines and counts, so a bad token is searched for only on failure.
    """
    tokens: list[str] = []
    for tree, (block, count) in enumerate(zip(blocks, counts.tolist(), strict=True)):
        entry = block.get(key)
        if entry is None:
            if count == 0:
                continue
            raise ModelFormatError(f"{source}: Tree={tree}: key '{key}' is missing")
        parts = entry[0].split()
        if len(parts) != count:
            if not parts and empty_as_nan is not None and empty_as_nan[tree]:
                parts = ["nan"] * count
            else:
                raise ModelFormatError(
                    f"{source}: line {entry[1]} (Tree={tree}): key '{key}' has {len(parts)} values, expected {count}"
                )
        tokens.extend(parts)
    try:
        return np.array(tokens, dtype=dtype)
    except (ValueError, OverflowError):
        for tree, block in enumerate(blocks):
            if key in block:
                value, line = block[key]
                _to_numbers(value.split(), dtype, key, tree, line, source)
        raise ModelFormatError(f"{source}: key '{key}' holds a value that is not a number") from None


def _locate(mask: np.ndarray, node_tree: np.ndarray, node_local: np.ndarray) -> tuple[int, int]:
    i = int(np.flatnonzero(mask)[0])
    return int(node_tree[i]), int(node_local[i])


def _bitset_categories(block: dict, tree: int, num_cat: int, source: str) -> list[np.ndarray]:
    """The categories listed by each of a tree's ``num_cat`` bitsets (bit ``c`` of word ``c // 32``)."""
    for key in ("cat_boundaries", "cat_threshold"):
        if key not in block:
            raise ModelFormatError(f"{source}: Tree={tree}: key '{key}' is missing (num_cat={num_cat})")
    bounds_text, bounds_line = block["cat_boundaries"]
    words_text, words_line = block["cat_threshold"]
    bounds = _to_numbers(bounds_text.split(), np.int64, "cat_boundaries", tree, bounds_line, source)
    words = _to_numbers(words_text.split(), np.int64, "cat_threshold", tree, words_line, source)
    if bounds.size != num_cat + 1:
        raise ModelFormatError(
            f"{source}: line {bounds_line} (Tree={tree}): key 'cat_boundaries' has {bounds.size} values, "
            f"expected num_cat + 1 = {num_cat + 1}"
        )
    if bounds[0] != 0 or np.any(np.diff(bounds) < 0) or bounds[-1] != words.size:
        raise ModelFormatError(
            f"{source}: line {bounds_line} (Tree={tree}): key 'cat_boundaries' must rise from 0 to the "
            f"{words.size} words of 'cat_threshold'; got {bounds_text[:60]!r}"
        )
    if np.any((words < 0) | (words >= 2**32)):
        raise ModelFormatError(
            f"{source}: line {words_line} (Tree={tree}): key 'cat_threshold' holds a value outside 0..2**32-1"
        )
    bits = np.unpackbits(words.astype("<u4").view(np.uint8), bitorder="little").reshape(-1, 32)
    word_owner = np.repeat(np.arange(num_cat), np.diff(bounds))
    word_rank = np.arange(words.size) - bounds[word_owner]
    word, bit = np.nonzero(bits)
    owner = word_owner[word]
    category = word_rank[word] * 32 + bit
    return [category[owner == c] for c in range(num_cat)]


def _parse_parameters(tail: list[str], source: str) -> tuple[dict[str, str], Any]:
    """Training parameters (``[name: value]`` lines) and the pandas category lists after the trees."""
    parameters: dict[str, str] = {}
    pandas_categorical: Any = None
    i = 0
    while i < len(tail):
        line = tail[i]
        i += 1
        if line == "parameters:":
            while i < len(tail) and tail[i] != "end of parameters":
                entry = tail[i]
                i += 1
                if not entry:
                    continue
                name, sep, value = entry[1:-1].partition(": ")
                if not (entry.startswith("[") and entry.endswith("]") and sep):
                    raise ModelFormatError(
                        f"{source}: parameter line {entry[:60]!r} is not of the form '[name: value]'"
                    )
                parameters[name] = value
            if i >= len(tail):
                raise ModelFormatError(f"{source}: the model text is truncated: no 'end of parameters' line")
            i += 1
        elif line.startswith("pandas_categorical:"):
            try:
                pandas_categorical = json.loads(line[len("pandas_categorical:"):])
            except (ValueError, RecursionError):
                raise ModelFormatError(f"{source}: the 'pandas_categorical' line is not valid JSON") from None
            if pandas_categorical is not None and not (
                isinstance(pandas_categorical, list)
                and all(isinstance(levels, list) for levels in pandas_categorical)
                and all(isinstance(v, (str, int, float)) for levels in pandas_categorical for v in levels)
            ):
                raise ModelFormatError(
                    f"{source}: the 'pandas_categorical' line must be null or a list of lists of category labels, "
                    f"found {line[len('pandas_categorical:'):][:60]!r}"
                )
    return parameters, pandas_categorical


def _declared_categorical(parameters: dict[str, str], feature_names: list[str]) -> set[int]:
    """Feature indices named by the ``categorical_feature`` parameter (indices, or names after ``name:``)."""
    spec = parameters.get("categorical_feature", "").strip()
    by_name = spec.startswith("name:")
    items = [item.strip() for item in spec[len("name:") if by_name else 0:].split(",") if item.strip()]
    if by_name:
        return {feature_names.index(item) for item in items if item in feature_names}
    return {int(item) for item in items if item.isdigit() and int(item) < len(feature_names)}


def _link(objective: str) -> str:
    if objective == "multiclass":
        return "softmax"
    if objective in _LOGIT_OBJECTIVES:
        return "logit"
    if objective in _LOG_OBJECTIVES:
        return "log"
    return "identity"


@dataclass(frozen=True)
class _Header:
    """The model-wide facts of the text's header."""

    per_iteration: int
    feature_names: list[str]
    objective: str
    objective_options: dict[str, str]
    average_output: bool


@dataclass(frozen=True)
class _Layout:
    """Where LightGBM's internal nodes and leaves go in the common node numbering (see "Node layout")."""

    num_leaves: np.ndarray
    num_cat: np.ndarray
    offsets: np.ndarray
    internal_tree: np.ndarray
    internal_local: np.ndarray
    internal_at: np.ndarray
    leaf_at: np.ndarray

    @property
    def n_internal(self) -> np.ndarray:
        return self.num_leaves - 1

    @property
    def n_nodes(self) -> int:
        return int(self.offsets[-1])


def _read_header(header: dict, blocks: list[dict], source: str) -> _Header:
    """Check the header keys against each other and the tree count."""
    for key in _HEADER_REQUIRED:
        if key not in header:
            raise ModelFormatError(f"{source}: the model header lacks the key '{key}'")
    if not blocks:
        raise ModelFormatError(f"{source}: the model has no trees")
    _header_int(header, "num_class", source, minimum=1)
    per_iteration = _header_int(header, "num_tree_per_iteration", source, minimum=1)
    n_features = _header_int(header, "max_feature_idx", source, minimum=0) + 1
    feature_names = header["feature_names"][0].split()
    if len(feature_names) != n_features:
        raise ModelFormatError(
            f"{source}: line {header['feature_names'][1]}: {len(feature_names)} feature names for "
            f"max_feature_idx={n_features - 1} ({n_features} features)"
        )
    if len(set(feature_names)) != n_features:
        # LightGBM itself refuses a feature name that appears twice; data columns could not be matched to it.
        repeated = next(name for name, count in Counter(feature_names).items() if count > 1)
        raise ModelFormatError(
            f"{source}: line {header['feature_names'][1]}: feature name {repeated[:40]!r} appears more than once"
        )
    n_trees = len(blocks)
    if n_trees % per_iteration:
        raise ModelFormatError(
            f"{source}: {n_trees} trees is not a multiple of num_tree_per_iteration={per_iteration}"
        )
    if "tree_sizes" in header and len(header["tree_sizes"][0].split()) != n_trees:
        raise ModelFormatError(
            f"{source}: line {header['tree_sizes'][1]}: 'tree_sizes' lists "
            f"{len(header['tree_sizes'][0].split())} trees, the text holds {n_trees}"
        )
    objective_tokens = header.get("objective", ("", 0))[0].split()
    return _Header(
        per_iteration=per_iteration,
        feature_names=feature_names,
        objective=objective_tokens[0] if objective_tokens else "",
        objective_options=dict(token.partition(":")[::2] for token in objective_tokens[1:]),
        average_output="average_output" in header,
    )


def _tree_layout(blocks: list[dict], source: str) -> _Layout:
    """Leaf and bitset counts of every tree (linear trees refused) and the node numbering they imply."""
    n_trees = len(blocks)
    num_leaves = np.empty(n_trees, dtype=np.int64)
    num_cat = np.empty(n_trees, dtype=np.int64)
    for tree, block in enumerate(blocks):
        num_leaves[tree] = _tree_int(block, "num_leaves", tree, source)
        num_cat[tree] = _tree_int(block, "num_cat", tree, source)
        if num_leaves[tree] < 1:
            raise ModelFormatError(f"{source}: Tree={tree}: num_leaves is {num_leaves[tree]}, expected at least 1")
        if not 0 <= num_cat[tree] < max(num_leaves[tree], 2):
            raise ModelFormatError(
                f"{source}: Tree={tree}: num_cat is {num_cat[tree]}, expected 0..{max(num_leaves[tree] - 1, 0)}"
            )
        linear = _tree_int(block, "is_linear", tree, source, default=0)
        if linear not in (0, 1):
            raise ModelFormatError(f"{source}: Tree={tree}: is_linear is {linear}, expected 0 or 1")
        if linear:
            raise UnsupportedModelError(
                f"{source}: Tree={tree} is a linear tree (trained with linear_tree=True); treeprobe reads "
                "only constant-leaf trees"
            )
    n_internal = num_leaves - 1
    offsets = np.concatenate([[0], np.cumsum(2 * num_leaves - 1)])
    internal_tree = np.repeat(np.arange(n_trees), n_internal)
    internal_local = np.arange(internal_tree.size) - np.repeat(np.cumsum(n_internal) - n_internal, n_internal)
    leaf_tree = np.repeat(np.arange(n_trees), num_leaves)
    leaf_local = np.arange(leaf_tree.size) - np.repeat(np.cumsum(num_leaves) - num_leaves, num_leaves)
    return _Layout(
        num_leaves=num_leaves,
        num_cat=num_cat,
        offsets=offsets,
        internal_tree=internal_tree,
        internal_local=internal_local,
        internal_at=offsets[internal_tree] + internal_local,
        leaf_at=offsets[leaf_tree] + n_internal[leaf_tree] + leaf_local,
    )


def _read_node_keys(blocks: list[dict], layout: _Layout, source: str) -> tuple[np.ndarray, dict, dict]:
    """Leaf values, the per-internal-node keys and the per-leaf statistics of all trees."""
    # leaf_value is read first: it bounds every allocation below by the text's own size.
    leaf_value = _node_values(blocks, "leaf_value", np.float64, layout.num_leaves, source)
    internal = {key: _node_values(blocks, key, dtype, layout.n_internal, source) for key, dtype in _INTERNAL_KEYS.items()}
    single = layout.num_leaves == 1
    leaf_stats = {key: _node_values(blocks, key, np.float64, layout.num_leaves, source, empty_as_nan=single)
                  for key in _LEAF_STAT_KEYS}
    return leaf_value, internal, leaf_stats


def _checked_split_features(internal: dict, layout: _Layout, n_features: int, source: str) -> np.ndarray:
    split_feature = internal["split_feature"]
    bad = (split_feature < 0) | (split_feature >= n_features)
    if bad.any():
        tree, node = _locate(bad, layout.internal_tree, layout.internal_local)
        raise ModelFormatError(
            f"{source}: Tree={tree}, node {node}: key 'split_feature' is {split_feature[bad][0]}, "
            f"expected 0..{n_features - 1}"
        )
    return split_feature


def _local_children(internal: dict, layout: _Layout, source: str) -> dict[str, np.ndarray]:
    """Left and right children as tree-local indices of the common layout (leaf ``~j`` -> ``n_internal + j``)."""
    children = {}
    own_internal = layout.n_internal[layout.internal_tree]
    for key in ("left_child", "right_child"):
        child = internal[key]
        bad = (child >= own_internal) | (~child >= layout.num_leaves[layout.internal_tree])
        if bad.any():
            tree, node = _locate(bad, layout.internal_tree, layout.internal_local)
            raise ModelFormatError(
                f"{source}: Tree={tree}, node {node}: key '{key}' is {child[bad][0]}, expected an internal node "
                f"0..{layout.n_internal[tree] - 1} or a leaf -1..-{layout.num_leaves[tree]}"
            )
        children[key] = np.where(child >= 0, child, own_internal + ~child)
    return children


def _decision_flags(internal: dict, layout: _Layout, source: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Categorical flag, missing-goes-left flag of numeric splits, and missing type of every internal node."""
    decision = internal["decision_type"]
    missing_type = (decision >> 2) & 3
    bad = (decision < 0) | (decision > 15) | (missing_type > _MISSING_NAN)
    if bad.any():
        tree, node = _locate(bad, layout.internal_tree, layout.internal_local)
        raise ModelFormatError(
            f"{source}: Tree={tree}, node {node}: key 'decision_type' is {decision[bad][0]}, which is not a "
            "LightGBM decision type (bits: 1 categorical, 2 default left, 4-8 missing type)"
        )
    categorical = (decision & _CATEGORICAL_BIT) != 0
    default_left = (decision & _DEFAULT_LEFT_BIT) != 0
    # Missing type "None" replaces NaN by 0.0 and compares it (see the module docstring).
    numeric_missing_left = np.where(missing_type == _MISSING_NONE, internal["threshold"] >= 0.0, default_left)
    return categorical, numeric_missing_left, missing_type


def _split_categories(blocks: list[dict], internal: dict, categorical: np.ndarray, layout: _Layout,
                      source: str) -> list[np.ndarray] | None:
    """Listed categories of every node (global numbering), read from the bitsets; None without categorical splits."""
    if not categorical.any():
        return None
    threshold = internal["threshold"]
    categories = [np.zeros(0, dtype=np.int64)] * layout.n_nodes
    cat_index = np.where(categorical, threshold, 0.0)
    bad = categorical & ((cat_index != np.floor(cat_index)) | (cat_index < 0)
                         | (cat_index >= layout.num_cat[layout.internal_tree]))
    if bad.any():
        tree, node = _locate(bad, layout.internal_tree, layout.internal_local)
        raise ModelFormatError(
            f"{source}: Tree={tree}, node {node}: categorical split has 'threshold' {threshold[bad][0]}, "
            f"expected a bitset index 0..{layout.num_cat[tree] - 1}"
        )
    for tree in np.unique(layout.internal_tree[categorical]).tolist():
        listed = _bitset_categories(blocks[tree], tree, int(layout.num_cat[tree]), source)
        for row in np.flatnonzero(categorical & (layout.internal_tree == tree)).tolist():
            categories[int(layout.internal_at[row])] = listed[int(cat_index[row])]
    return categories


def _scatter(layout: _Layout, fill: Any, dtype: Any, internal_values: Any, leaf_values: Any = None) -> np.ndarray:
    """One array over all nodes: internal values at the internal nodes, leaf values at the leaves."""
    out = np.full(layout.n_nodes, fill, dtype=dtype)
    out[layout.internal_at] = internal_values
    if leaf_values is not None:
        out[layout.leaf_at] = leaf_values
    return out


def _feature_types(header: dict, parameters: dict[str, str], feature_names: list[str],
                   split_categorical: set[int]) -> list[str]:
    """Categorical where a split, the ``categorical_feature`` parameter or ``feature_infos`` says so."""
    n_features = len(feature_names)
    categorical = split_categorical | _declared_categorical(parameters, feature_names)
    if "feature_infos" in header:
        # LightGBM writes "[min:max]" for numeric features, "none" for unused
        # ones, and the colon-joined category list for categorical ones.
        infos = header["feature_infos"][0].split()
        if len(infos) == n_features:
            categorical |= {j for j, info in enumerate(infos) if not info.startswith("[") and info != "none"}
    return ["categorical" if j in categorical else "numeric" for j in range(n_features)]


def _category_levels(parameters: dict[str, str], feature_names: list[str], pandas_categorical: Any) -> dict:
    """Level labels of the pandas categorical columns LightGBM saw at training, by feature name."""
    declared = sorted(_declared_categorical(parameters, feature_names))
    if isinstance(pandas_categorical, list) and pandas_categorical and len(declared) == len(pandas_categorical):
        # LightGBM codes a pandas category column by the levels it saw at training,
        # in the order of the frame's category columns.
        return {feature_names[j]: list(levels) for j, levels in zip(declared, pandas_categorical, strict=True)}
    return {}


def _link_scale(head: _Header, source: str) -> float:
    if _link(head.objective) != "logit":
        return 1.0
    try:
        return float(head.objective_options.get("sigmoid", 1.0))
    except ValueError:
        raise ModelFormatError(
            f"{source}: objective option sigmoid={head.objective_options['sigmoid']!r} is not a number") from None


def load_lightgbm_text(data: bytes | str, *, source: str) -> ForestGraph:
    """Parse LightGBM model text into a :class:`~treeprobe.graph.ForestGraph`.

    Reading the text does not import LightGBM.

    Parameters
    ----------
    data : bytes or str
        The text written by ``Booster.save_model`` / ``Booster.model_to_string``
        (bytes are decoded as UTF-8).
    source : str
        Where the text came from (a path, or a description); it heads every
        error message and is stored as ``ForestGraph.source``.

    Returns
    -------
    ForestGraph
        ``library="lightgbm"``, ``threshold_rule="<="``, ``split_dtype="float64"``.
        ``gain`` is LightGBM's ``split_gain``, ``cover`` its ``internal_weight`` /
        ``leaf_weight`` (hessian sums), ``n_samples`` its ``internal_count`` /
        ``leaf_count``. ``provenance.stored_params`` holds the training
        parameters (name to text); ``link_scale`` is the binary objective's
        ``sigmoid``; ``generic_feature_names`` is True when LightGBM named the
        columns ``Column_0, Column_1, ...``; ``category_levels`` holds the
        level lists of pandas categorical columns; ``negative_category`` is
        "truncate" and ``unseen_category`` "missing".

    Raises
    ------
    ModelFormatError
        Truncated text, a missing key, arrays whose length disagrees with
        ``num_leaves``, out-of-range children, features or bitset boundaries,
        or a token that is not a number; the message names the source, the
        line, the tree (``Tree=k``) and the key.
    UnsupportedModelError
        Linear trees (``is_linear=1``).

    Notes
    -----
    The raw output of output ``k`` is
    ``raw_k(x) = w * sum_{t : t mod K = k} leaf_value_t(x)`` with ``K =
    num_tree_per_iteration`` and ``w = 1``, which is
    ``Booster.predict(X, raw_score=True)``. For random-forest models ``w = K /
    n_trees``: the averaged margin behind LightGBM's ``predict`` (its
    ``raw_score=True`` output is the unaveraged sum).
    See the module docstring for how LightGBM's missing-value and categorical
    rules are mapped.

    References
    ----------
    .. [1] Ke, G. et al. (2017). "LightGBM: A highly efficient gradient
       boosting decision tree". NeurIPS 30, 3146-3154.

    Examples
    --------
    A one-split model on ``fuel_price`` (missing values go left):

    >>> text = '''tree
    ... version=v4
    ... num_class=1
    ... num_tree_per_iteration=1
    ... label_index=0
    ... max_feature_idx=0
    ... objective=regression
    ... feature_names=fuel_price
    ... feature_infos=[1:2]
    ...
    ... Tree=0
    ... num_leaves=2
    ... num_cat=0
    ... split_feature=0
    ... split_gain=4.5
    ... threshold=1.5
    ... decision_type=10
    ... left_child=-1
    ... right_child=-2
    ... leaf_value=10 20
    ... leaf_weight=3 2
    ... leaf_count=3 2
    ... internal_value=14
    ... internal_weight=5
    ... internal_count=5
    ... is_linear=0
    ... shrinkage=1
    ...
    ... end of trees
    ... '''
    >>> model = load_lightgbm_text(text, source="stump.txt")
    >>> model.predict_raw([[1.0], [1.5], [2.0], [float("nan")]]).tolist()
    [10.0, 10.0, 20.0, 10.0]
    """
    if not isinstance(source, str):
        raise TypeError(f"source must be a str, got {type(source).__name__}")
    lines = [line.strip() for line in _decode(data, source).splitlines()]
    header, blocks, tail = _split_sections(lines, source)
    head = _read_header(header, blocks, source)
    layout = _tree_layout(blocks, source)
    leaf_value, internal, leaf_stats = _read_node_keys(blocks, layout, source)
    split_feature = _checked_split_features(internal, layout, len(head.feature_names), source)
    children = _local_children(internal, layout, source)
    categorical, numeric_missing_left, missing_type = _decision_flags(internal, layout, source)
    categories = _split_categories(blocks, internal, categorical, layout, source)
    parameters, pandas_categorical = _parse_parameters(tail, source)
    n_trees = len(blocks)
    return ForestGraph.from_arrays(
        feature=_scatter(layout, -1, np.int64, split_feature),
        threshold=_scatter(layout, np.nan, np.float64, np.where(categorical, np.nan, internal["threshold"])),
        left=_scatter(layout, -1, np.int64, children["left_child"]),
        right=_scatter(layout, -1, np.int64, children["right_child"]),
        value=_scatter(layout, np.nan, np.float64, internal["internal_value"], leaf_value),
        tree_offsets=layout.offsets,
        feature_names=head.feature_names,
        feature_types=_feature_types(header, parameters, head.feature_names,
                                     set(np.unique(split_feature[categorical]).tolist())),
        missing_left=_scatter(layout, False, bool, ~categorical & numeric_missing_left),
        zero_as_missing=_scatter(layout, False, bool, ~categorical & (missing_type == _MISSING_ZERO)),
        is_categorical=_scatter(layout, False, bool, categorical),
        category_left=np.ones(layout.n_nodes, dtype=bool),
        categories=categories,
        gain=_scatter(layout, 0.0, np.float64, internal["split_gain"]),
        cover=_scatter(layout, np.nan, np.float64, internal["internal_weight"], leaf_stats["leaf_weight"]),
        n_samples=_scatter(layout, np.nan, np.float64, internal["internal_count"], leaf_stats["leaf_count"]),
        output_of_tree=np.arange(n_trees) % head.per_iteration,
        tree_weight=np.full(n_trees, head.per_iteration / n_trees if head.average_output else 1.0),
        base_score=0.0,
        n_outputs=head.per_iteration,
        link=_link(head.objective),
        threshold_rule="<=",
        split_dtype="float64",
        provenance=Provenance(library="lightgbm", objective=head.objective, source=source,
                              stored_params=parameters, file_format="text"),
        link_scale=_link_scale(head, source),
        category_levels=_category_levels(parameters, head.feature_names, pandas_categorical),
        unseen_category="missing",
        negative_category="truncate",
        generic_feature_names=head.feature_names == [f"Column_{j}" for j in range(len(head.feature_names))],
        local_children=True,
    )


def from_lightgbm(obj: Any, *, source: str) -> ForestGraph:
    """Read a fitted LightGBM ``Booster``, ``LGBMRegressor``, ``LGBMClassifier`` or other ``LGBMModel``.

    The model is written out with ``Booster.model_to_string()`` and parsed by
    :func:`load_lightgbm_text`, so objects and files share one parser. As in
    LightGBM's own ``predict``, a model trained with early stopping keeps its
    trees up to ``best_iteration``.

    Parameters
    ----------
    obj : lightgbm.Booster or lightgbm.LGBMModel
        A fitted model.
    source : str
        Description of the model for messages and ``ForestGraph.source``.

    Returns
    -------
    ForestGraph
        See :func:`load_lightgbm_text`.

    Raises
    ------
    ModelFormatError
        When a scikit-learn wrapper is not fitted.
    UnsupportedModelError
        When ``obj`` is not a LightGBM model, or it has linear trees.

    Examples
    --------
    >>> import numpy as np, lightgbm
    >>> rng = np.random.default_rng(0)
    >>> shift_length = rng.uniform(4, 12, size=(200, 1))
    >>> fatigue = shift_length[:, 0] ** 2 + rng.normal(size=200)
    >>> fitted = lightgbm.LGBMRegressor(n_estimators=5, num_leaves=4, verbose=-1).fit(shift_length, fatigue)
    >>> model = from_lightgbm(fitted, source="fatigue model")
    >>> bool(np.allclose(model.predict_raw(shift_length), fitted.predict(shift_length, raw_score=True)))
    True
    """
    if not isinstance(source, str):
        raise TypeError(f"source must be a str, got {type(source).__name__}")
    import lightgbm

    if isinstance(obj, lightgbm.LGBMModel):
        try:
            booster = obj.booster_
        except (ValueError, AttributeError):
            raise ModelFormatError(f"{source}: the {type(obj).__name__} is not fitted; call fit first") from None
    elif isinstance(obj, lightgbm.Booster):
        booster = obj
    else:
        raise UnsupportedModelError(
            f"{source}: expected a lightgbm.Booster or LGBMModel, got {type(obj).__module__}.{type(obj).__name__}"
        )
    graph = load_lightgbm_text(booster.model_to_string(), source=source)
    return replace(graph, provenance=replace(graph.provenance, library_version=str(lightgbm.__version__),
                                             file_format="object"))
