"""Read XGBoost tree models (JSON, UBJSON, in-memory boosters) into the common graph.

XGBoost (Chen & Guestrin, 2016) saves a model as one JSON document (or its
UBJSON twin) holding, per tree, columnar node arrays: children, split feature
and condition, default direction, loss change (gain) and hessian sum (cover).
This module checks that document strictly and turns it into a
:class:`~treeprobe.graph.ForestGraph` whose ``predict_raw`` reproduces
XGBoost's ``predict(..., output_margin=True)``.

Mapping to the common semantics (see :mod:`treeprobe.graph`):

* numeric splits send ``x < split_condition`` left, comparing in float32;
  a missing value follows ``default_left``;
* at leaves ``split_conditions`` holds the leaf value (already shrunk by the
  learning rate); vector-leaf trees (``multi_strategy="multi_output_tree"``)
  keep theirs in ``leaf_weights``;
* a categorical split lists the categories that go **right**; every other
  category (and any negative or out-of-range code) goes left, a missing value
  follows ``default_left`` -- found by experiment against XGBoost's own
  predictor and checked in the test suite;
* ``base_score`` is stored on the prediction scale and mapped to the margin
  through the objective's link (logit for ``binary:logistic`` and
  ``reg:logistic``, log for Poisson, gamma, Tweedie and survival objectives;
  ``binary:logitraw`` stores it on the margin scale already); XGBoost 3.x
  writes it as a list (``"[5E-1]"``), 2.x as a scalar (``"5E-1"``);
* DART models weigh tree ``t`` by ``weight_drop[t]``;
* nodes removed by XGBoost's prune updater stay in the arrays, unreachable,
  and are counted in ``tree_param.num_deleted``; they are dropped.

Reading files never imports xgboost; only :func:`from_xgboost` touches the
object it is given.

Limits: a categorical value is the category's integer code in the training
data's category list. XGBoost >= 3.1 stores that list (kept here as
``ForestGraph.category_levels``) and re-codes pandas categories by name when
predicting, as :func:`treeprobe.data.model_matrix` then does; for older files give data whose
categorical columns use the training categories in the training order, or
integer codes. Linear boosters
(``gblinear``) have no trees and are refused.

References
----------
.. [1] T. Chen and C. Guestrin, "XGBoost: A Scalable Tree Boosting System",
   KDD 2016, https://doi.org/10.1145/2939672.2939785
.. [2] K. V. Rashmi and R. Gilad-Bachrach, "DART: Dropouts meet Multiple
   Additive Regression Trees", AISTATS 2015.
"""

from __future__ import annotations

import json
import struct
from collections.abc import Callable, Sequence
from functools import lru_cache
from typing import Any

import numpy as np

from ..errors import ModelFormatError, UnsupportedModelError
from ..graph import ForestGraph, Provenance
from .ubjson import decode_ubjson

__all__ = ["load_xgboost_json", "load_xgboost_ubjson", "from_xgboost"]

# objective -> (link of the raw output, transform of the stored base_score to the margin)
_OBJECTIVES = {
    "reg:squarederror": ("identity", "identity"),
    "reg:linear": ("identity", "identity"),
    "reg:squaredlogerror": ("identity", "identity"),
    "reg:pseudohubererror": ("identity", "identity"),
    "reg:absoluteerror": ("identity", "identity"),
    "reg:quantileerror": ("identity", "identity"),
    "reg:logistic": ("logit", "logit"),
    "binary:logistic": ("logit", "logit"),
    "binary:logitraw": ("identity", "identity"),
    "binary:hinge": ("identity", "identity"),
    "count:poisson": ("log", "log"),
    "reg:gamma": ("log", "log"),
    "reg:tweedie": ("log", "log"),
    "survival:cox": ("log", "log"),
    "survival:aft": ("log", "log"),
    "multi:softprob": ("softmax", "identity"),
    "multi:softmax": ("softmax", "identity"),
    "rank:pairwise": ("identity", "identity"),
    "rank:ndcg": ("identity", "identity"),
    "rank:map": ("identity", "identity"),
}

_FLOAT_KEYS = ("split_conditions", "loss_changes", "sum_hessian", "leaf_weights")
_NODE_KEYS = ("left_children", "right_children", "split_indices", "split_conditions", "default_left",
              "loss_changes", "sum_hessian")
_CATEGORY_KEYS = ("categories", "categories_nodes", "categories_segments", "categories_sizes")
_INT32_MIN, _INT32_MAX = -(2**31), 2**31 - 1
# How the JSON hook packs a node list in one C call: struct code (None: bytes()) and the packed dtype.
# float32 and int32 are XGBoost's own node types; the flags are 0/1. A ``bytes`` value in a parsed tree
# is always such a packed list: JSON and UBJSON documents hold no bytes otherwise.
_PACKINGS = (
    ("left_children", "i", np.dtype("<i4")),
    ("right_children", "i", np.dtype("<i4")),
    ("split_indices", "i", np.dtype("<i4")),
    ("split_conditions", "f", np.dtype("<f4")),
    ("loss_changes", "f", np.dtype("<f4")),
    ("sum_hessian", "f", np.dtype("<f4")),
    ("default_left", None, np.dtype("u1")),
    ("split_type", None, np.dtype("u1")),
)
_PACKED_DTYPE = {key: dtype for key, _, dtype in _PACKINGS}
_PACK_ERRORS = (struct.error, TypeError, ValueError, OverflowError)
# Without stored names every feature gets a generated one, so a corrupt count
# must not be able to demand billions of them.
_MAX_FEATURES = 10_000_000
# A file without names gets one generated name per declared feature, however
# small the file: a tiny corrupt file must not cost seconds and a gigabyte.
# 2**21 leaves room for the common 2**20-column hashing of sparse text.
_MAX_UNNAMED_FEATURES = 2**21
# XGBoost refuses category codes of 2**24 and above (the integers float32 holds
# exactly); value from memory of XGBoost's "less than 2^24" data check.
_MAX_CATEGORY = 2**24


@lru_cache(maxsize=1024)
def _packer(code: str, count: int) -> Callable[..., bytes]:
    """``struct`` packer of ``count`` little-endian values of type ``code``; cached, as tree sizes repeat."""
    return struct.Struct(f"<{count}{code}").pack


def _compact_tree_lists(obj: dict) -> dict:
    """``json.loads`` object hook: pack a tree's number lists as soon as the tree is parsed.

    A JSON number list costs about 32 bytes per entry as Python objects and
    at most 8 packed, so compacting tree by tree keeps the peak memory of
    reading a large model near the file size. The node lists are packed by
    one ``struct``/``bytes`` call each, straight into XGBoost's own float32
    and int32 (0/1 flags as bytes), and stay ``bytes`` until one
    ``b"".join`` makes each column (:func:`_packed_column`): that is what
    makes loading not much slower than parsing. A list that does not pack
    (a value of another type or out of range, or booleans, which numpy would
    keep as such) goes through ``np.array``'s inference, and a list numpy
    cannot make into a flat numeric array stays a list, for the strict
    checks to report. An integer literal in a float list packs as that
    number, however large (JSON does not tell integers from decimals), where
    numpy's inference refuses integers beyond 64 bits.
    """
    if "split_conditions" not in obj or "left_children" not in obj:
        return obj
    # Parent links are implied by the children and base_weights (unshrunk node
    # weights) play no part in predictions; dropping them saves a third of the work.
    obj.pop("parents", None)
    obj.pop("base_weights", None)
    for key, code, _ in _PACKINGS:
        value = obj.get(key)
        # Booleans are left to numpy's inference, which keeps them as booleans.
        if type(value) is list and value and type(value[0]) is not bool:
            try:
                obj[key] = bytes(value) if code is None else _packer(code, len(value))(*value)
                continue
            except _PACK_ERRORS:
                pass
        if key in obj:
            obj[key] = _inferred_array(value)
    if "leaf_weights" in obj:
        obj["leaf_weights"] = _inferred_array(obj["leaf_weights"])
    return obj


def _as_node_array(part: Any, key: str) -> Any:
    """A tree's node list as the JSON hook left it, with packed bytes viewed as a numpy array."""
    return np.frombuffer(part, _PACKED_DTYPE[key]) if type(part) is bytes else part


def _inferred_array(value: Any) -> Any:
    """A non-empty list as the flat numeric array numpy infers (floats narrowed to float32), else unchanged."""
    if type(value) is not list or not value:
        return value
    try:
        # No dtype on purpose: numpy would silently accept strings, None or
        # fractions; the inferred dtype lets _node_column reject them.
        arr = np.array(value)
    except (ValueError, TypeError, OverflowError):
        return value
    if arr.ndim == 1 and arr.dtype.kind in "biuf":
        # Floats are float32 printed in shortest form, so narrowing is exact.
        return arr.astype(np.float32) if arr.dtype.kind == "f" else arr
    return value


def _member(mapping: Any, key: str, kind: type | tuple[type, ...], where: str, source: str) -> Any:
    """``mapping[key]``, checked to exist and to be of ``kind``."""
    if not isinstance(mapping, dict):
        raise ModelFormatError(f"{source}: {where} must be an object, found {type(mapping).__name__}")
    if key not in mapping:
        raise ModelFormatError(f"{source}: {where} lacks the key '{key}' (not an XGBoost model file, or corrupt)")
    value = mapping[key]
    if not isinstance(value, kind):
        expected = " or ".join(k.__name__ for k in (kind if isinstance(kind, tuple) else (kind,)))
        raise ModelFormatError(f"{source}: {where}.{key} must be {expected}, found {type(value).__name__}")
    return value


def _int_param(params: dict, key: str, where: str, source: str, default: int | None = None) -> int:
    """Integer stored as a string (XGBoost's parameter blocks)."""
    if not isinstance(params, dict):
        raise ModelFormatError(f"{source}: {where} must be an object, found {type(params).__name__}")
    if key not in params and default is not None:
        return default
    text = _member(params, key, (str, int), where, source)
    try:
        value = int(text)
    except ValueError:
        raise ModelFormatError(f"{source}: {where}.{key} must be an integer, found {text!r}") from None
    if value < 0:
        raise ModelFormatError(f"{source}: {where}.{key} must not be negative, found {value}")
    return value


def _tree_params(trees: list, key: str, source: str, *, default: int | np.ndarray,
                 usual: str | list[str]) -> np.ndarray:
    """``tree_param[key]`` of every tree, read and checked by :func:`_int_param` (``default`` where absent).

    When every tree stores the text ``usual`` (one for all, or one per tree),
    as XGBoost writes it, the values follow without a per-tree call.
    """
    try:
        texts = [tree["tree_param"][key] for tree in trees]
    except (KeyError, TypeError):
        texts = None
    if isinstance(usual, str) and texts is not None and texts.count(usual) == len(texts):
        return np.full(len(trees), int(usual), dtype=np.int64)
    if texts == usual:
        return np.array([int(text) for text in usual], dtype=np.int64)
    defaults = np.broadcast_to(default, (len(trees),)).tolist()
    # No dtype: a corrupt count beyond int64 must reach the callers' range checks, not overflow here.
    return np.array([_int_param(tree.get("tree_param", {}), key, f"tree {t}.tree_param", source, defaults[t])
                     for t, tree in enumerate(trees)])


def _parse_base_score(text: Any, source: str) -> np.ndarray:
    """``"5E-1"`` (XGBoost 1.x/2.x) or ``"[5E-1]"`` / ``"[1E0,2E0]"`` (3.x) as float64."""
    where = f"{source}: learner.learner_model_param.base_score"
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        return np.array([float(text)])
    if not isinstance(text, str):
        raise ModelFormatError(f"{where} must be a number string, found {type(text).__name__}")
    body = text.strip()
    if body.startswith("[") and body.endswith("]"):
        body = body[1:-1]
    try:
        values = np.array([float(part) for part in body.split(",")], dtype=np.float64)
    except ValueError:
        raise ModelFormatError(f"{where} is not a number or list of numbers: {text[:60]!r}") from None
    if values.size == 0 or not np.all(np.isfinite(values)):
        raise ModelFormatError(f"{where} must hold finite numbers, found {text[:60]!r}")
    return values


def _base_margin(stored: np.ndarray, transform: str, objective: str, source: str) -> np.ndarray:
    """Stored base_score (prediction scale) -> raw margin, as XGBoost's ProbToMargin does."""
    if transform == "logit":
        if np.any((stored <= 0) | (stored >= 1)):
            raise ModelFormatError(f"{source}: base_score {stored.tolist()} must lie in (0, 1) for {objective}")
        return np.log(stored / (1.0 - stored))
    if transform == "log":
        if np.any(stored <= 0):
            raise ModelFormatError(f"{source}: base_score {stored.tolist()} must be positive for {objective}")
        return np.log(stored)
    return stored


def _node_column(parts: Sequence, key: str, sizes: np.ndarray, source: str) -> np.ndarray:  # noqa: C901
    """One per-node key of every tree (``parts``, one per tree), concatenated into one array.

    Trees arrive as packed bytes (JSON, see :func:`_compact_tree_lists`) or
    numpy arrays (UBJSON) and are joined in one step; lists and mixed parts
    take a per-tree path, which also names the tree when something is wrong.
    """
    values = _packed_column(parts, key, sizes)
    if values is not None:
        return _typed_column(values, key, sizes, source)
    parts = [_as_node_array(part, key) for part in parts]

    def bad_tree(message: str) -> ModelFormatError:
        for t, part in enumerate(parts):
            if not isinstance(part, (list, np.ndarray)):
                return ModelFormatError(f"{source}: tree {t}: '{key}' must be an array, found {type(part).__name__}")
            arr = np.asarray(part) if isinstance(part, np.ndarray) else _checked_list(part)
            if arr is None or arr.ndim != 1 or (arr.size and not _kind_ok(arr, key)):
                return ModelFormatError(f"{source}: tree {t}: '{key}' must be a flat array of {_kind_name(key)}")
        return ModelFormatError(f"{source}: '{key}': {message}")

    arrays = []
    for part in parts:
        arr = part if type(part) is np.ndarray else _checked_list(part) if type(part) is list else None
        if arr is None or arr.ndim != 1:
            raise bad_tree("every tree must store a flat array")
        if arr.size:
            arrays.append(arr)
    try:
        values = np.concatenate(arrays) if arrays else np.zeros(0, np.int32)
    except (ValueError, TypeError):
        raise bad_tree("holds values of the wrong type") from None
    if values.size and not _kind_ok(values, key):
        raise bad_tree("holds values of the wrong type")
    lengths = np.fromiter((len(p) for p in parts), dtype=np.int64, count=len(parts))
    if np.any(lengths != sizes):
        t = int(np.flatnonzero(lengths != sizes)[0])
        raise ModelFormatError(
            f"{source}: tree {t}: '{key}' has {lengths[t]} entries, 'left_children' has {sizes[t]} (arrays of unequal length)"
        )
    return _typed_column(values, key, sizes, source)


def _packed_column(parts: list, key: str, sizes: np.ndarray) -> np.ndarray | None:
    """The parts joined, when every tree's is a non-empty array of the declared length and kind; else None.

    This is the common case, checked without a per-tree Python step: every
    part packed by the JSON hook (joined as bytes), or every part a numpy
    array (UBJSON; 1-D, as the decoder makes no others). Anything else goes
    through the general path of :func:`_node_column`, which names the tree
    at fault.
    """
    kinds = set(map(type, parts))
    if kinds not in ({bytes}, {np.ndarray}):
        return None
    itemsize = _PACKED_DTYPE[key].itemsize if kinds == {bytes} else 1
    # Sizes are positive (checked before), so matching lengths also means no empty array.
    if not np.array_equal(np.fromiter(map(len, parts), dtype=np.int64, count=len(parts)), sizes * itemsize):
        return None
    values = np.frombuffer(b"".join(parts), _PACKED_DTYPE[key]) if kinds == {bytes} else np.concatenate(parts)
    return values if values.ndim == 1 and _kind_ok(values, key) else None


def _typed_column(values: np.ndarray, key: str, sizes: np.ndarray, source: str) -> np.ndarray:
    """A joined node column of checked kind in the common type of its key: float64, bool or int32."""
    if key in _FLOAT_KEYS:
        # XGBoost stores float32; JSON prints the shortest decimal of it, so round back.
        return values.astype(np.float32, copy=False).astype(np.float64)
    if key == "default_left":
        return values != 0
    if values.dtype.itemsize <= 4 and values.dtype != np.uint32:
        # Every value of a narrower type (or of int32 itself) fits in int32.
        return values.astype(np.int32, copy=False)
    outside = (values < _INT32_MIN) | (values > _INT32_MAX) if values.size else None
    if outside is not None and outside.any():
        t = int(np.searchsorted(np.cumsum(sizes), np.flatnonzero(outside)[0], side="right"))
        raise ModelFormatError(f"{source}: tree {t}: '{key}' holds values outside the 32-bit integer range XGBoost uses")
    return values.astype(np.int32)


def _checked_list(part: list) -> np.ndarray | None:
    try:
        return np.array(part)
    except (ValueError, TypeError, OverflowError):
        return None


def _kind_ok(values: np.ndarray, key: str) -> bool:
    if key in _FLOAT_KEYS:
        return values.dtype.kind in "iuf"
    if key == "default_left":
        return values.dtype.kind in "biu"
    return values.dtype.kind in "iu"


def _kind_name(key: str) -> str:
    return "numbers" if key in _FLOAT_KEYS else "integers or booleans" if key == "default_left" else "integers"


def _drop_deleted_nodes(left: np.ndarray, right: np.ndarray, leaf: np.ndarray, sizes: np.ndarray,
                        declared_deleted: np.ndarray, source: str) -> np.ndarray | None:
    """Nodes to keep when trees carry pruned ("deleted") nodes, else None.

    XGBoost's prune updater leaves pruned nodes in the arrays, unreachable
    and counted in ``tree_param.num_deleted``. Breadth-first search from the
    roots finds the live nodes; a node met twice means shared or cyclic
    children.
    """
    if not declared_deleted.any():
        return None
    n = left.size
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    seen = np.zeros(n, bool)
    frontier = offsets[:-1]
    while frontier.size:
        if seen[frontier].any() or np.unique(frontier).size != frontier.size:
            node = int(frontier[seen[frontier]][0]) if seen[frontier].any() else int(frontier[0])
            t = int(np.searchsorted(offsets, node, side="right") - 1)
            raise ModelFormatError(f"{source}: tree {t}: node {node - offsets[t]} is reached twice (cyclic or shared children)")
        seen[frontier] = True
        inner = frontier[~leaf[frontier]]
        frontier = np.concatenate([left[inner], right[inner]])
    tree_of = np.repeat(np.arange(sizes.size), sizes)
    unreachable = np.bincount(tree_of[~seen], minlength=sizes.size)
    if np.any(unreachable != declared_deleted):
        t = int(np.flatnonzero(unreachable != declared_deleted)[0])
        raise ModelFormatError(
            f"{source}: tree {t} has {unreachable[t]} unreachable nodes but declares num_deleted={declared_deleted[t]}"
        )
    return seen


def _category_lists(split_type: np.ndarray, sizes: np.ndarray, trees: list,  # noqa: C901
                    source: str) -> list[np.ndarray]:
    """Per-node category lists from XGBoost's per-tree CSR (``categories_nodes``/``_segments``/``_sizes``)."""
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    lists: list[np.ndarray] = [np.zeros(0, np.int64)] * int(offsets[-1])
    for t in np.unique(np.repeat(np.arange(sizes.size), sizes)[split_type == 1]):
        tree = trees[t]
        missing = [k for k in _CATEGORY_KEYS if k not in tree]
        if missing:
            raise ModelFormatError(f"{source}: tree {t} has categorical splits but lacks the key '{missing[0]}'")
        arrays = {}
        for key in _CATEGORY_KEYS:
            arr = np.asarray(tree[key]) if isinstance(tree[key], (list, np.ndarray)) else None
            if arr is None or arr.ndim != 1 or (arr.size and arr.dtype.kind not in "iu"):
                raise ModelFormatError(f"{source}: tree {t}: '{key}' must be a flat array of integers")
            arrays[key] = arr.astype(np.int64)
        nodes, starts, counts, cats = (arrays[k] for k in ("categories_nodes", "categories_segments",
                                                            "categories_sizes", "categories"))
        if not nodes.size == starts.size == counts.size:
            raise ModelFormatError(f"{source}: tree {t}: categories_nodes, _segments and _sizes differ in length")
        if np.any((nodes < 0) | (nodes >= sizes[t])):
            raise ModelFormatError(f"{source}: tree {t}: categories_nodes holds a node index out of range 0..{sizes[t] - 1}")
        if np.any((starts < 0) | (counts < 0) | (starts + counts > cats.size)):
            raise ModelFormatError(f"{source}: tree {t}: categories_segments/_sizes point outside 'categories'")
        if np.any(cats < 0):
            raise ModelFormatError(f"{source}: tree {t}: 'categories' holds a negative category")
        if np.any(cats >= _MAX_CATEGORY):
            raise ModelFormatError(f"{source}: tree {t}: 'categories' holds {int(cats.max())}, beyond the "
                                   f"largest category code XGBoost accepts ({_MAX_CATEGORY - 1})")
        local_type = split_type[offsets[t]:offsets[t + 1]]
        listed = np.zeros(sizes[t], bool)
        listed[nodes] = True
        if np.any((local_type == 1) & ~listed):
            node = int(np.flatnonzero((local_type == 1) & ~listed)[0])
            raise ModelFormatError(f"{source}: tree {t}, node {node}: categorical split without a category list")
        for node, start, count in zip(nodes.tolist(), starts.tolist(), counts.tolist(), strict=True):
            lists[offsets[t] + node] = cats[start:start + count]
    return lists


def _feature_names_and_types(learner: dict, n_features: int, source: str) -> tuple[list[str] | None, list[str] | None]:
    names = learner.get("feature_names", [])
    types = learner.get("feature_types", [])
    for key, value in (("feature_names", names), ("feature_types", types)):
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ModelFormatError(f"{source}: learner.{key} must be a list of strings")
        if value and len(value) != n_features:
            raise ModelFormatError(f"{source}: learner.{key} has {len(value)} entries, the model has {n_features} features")
    if len(set(names)) != len(names):
        # XGBoost itself refuses repeated names at training; data columns could not be matched to them.
        repeated = sorted({n for n in names if names.count(n) > 1})
        raise ModelFormatError(f"{source}: learner.feature_names repeats {', '.join(repeated[:5])}")
    if not names and n_features > _MAX_UNNAMED_FEATURES:
        raise ModelFormatError(
            f"{source}: learner_model_param.num_feature is {n_features} but the file stores no feature names; "
            f"treeprobe accepts at most {_MAX_UNNAMED_FEATURES} unnamed features (corrupt file?)"
        )
    kinds = ["categorical" if t == "c" else "numeric" for t in types] if types else None
    return (names or None), kinds


def _category_names(model: dict, feature_names: list[str]) -> dict[str, list[str]]:
    """Category labels XGBoost >= 3.1 stores for string categories (``cats.enc``); empty when absent."""
    cats = model.get("cats")
    enc = cats.get("enc") if isinstance(cats, dict) else None
    out: dict[str, list[str]] = {}
    if not isinstance(enc, list) or len(enc) != len(feature_names):
        return out
    for name, block in zip(feature_names, enc, strict=True):
        if not isinstance(block, dict) or not {"offsets", "values"} <= block.keys():
            continue
        offsets = np.asarray(block["offsets"])
        values = np.asarray(block["values"])
        if offsets.size < 2 or values.dtype.kind not in "iu" or offsets.dtype.kind not in "iu":
            continue
        if np.any(np.diff(offsets) < 0) or offsets[0] != 0 or offsets[-1] != values.size or np.any(values > 255):
            continue
        raw = values.astype(np.uint8).tobytes()
        try:
            out[name] = [raw[a:b].decode("utf-8") for a, b in zip(offsets[:-1].tolist(), offsets[1:].tolist(), strict=True)]
        except UnicodeDecodeError:
            continue
    return out


def _booster_trees(learner: dict, source: str) -> tuple[str, dict, list, np.ndarray, np.ndarray | None]:  # noqa: C901
    """Booster name, model block, tree list, ``tree_info`` and DART tree weights (None for gbtree)."""
    booster = _member(learner, "gradient_booster", dict, "learner", source)
    booster_name = _member(booster, "name", str, "learner.gradient_booster", source)
    tree_weight = None
    if booster_name == "gblinear":
        raise UnsupportedModelError(
            f"{source}: a gblinear (linear booster) model has no trees; treeprobe reads tree boosters (gbtree, dart)"
        )
    if booster_name == "dart":
        weights = _member(booster, "weight_drop", (list, np.ndarray), "learner.gradient_booster", source)
        tree_weight = np.asarray(weights)
        if tree_weight.ndim != 1 or (tree_weight.size and tree_weight.dtype.kind not in "iuf"):
            raise ModelFormatError(f"{source}: learner.gradient_booster.weight_drop must be a list of numbers")
        booster = _member(booster, "gbtree", dict, "learner.gradient_booster", source)
    elif booster_name != "gbtree":
        raise UnsupportedModelError(f"{source}: unknown XGBoost booster {booster_name!r}; expected gbtree or dart")
    model = _member(booster, "model", dict, "learner.gradient_booster", source)
    trees = _member(model, "trees", list, "learner.gradient_booster.model", source)
    tree_info = np.asarray(_member(model, "tree_info", (list, np.ndarray), "learner.gradient_booster.model", source))
    if not trees:
        raise ModelFormatError(f"{source}: the model has no trees (trained for zero rounds?)")
    if tree_info.shape != (len(trees),) or tree_info.dtype.kind not in "iu":
        raise ModelFormatError(f"{source}: tree_info must list one integer output per tree ({len(trees)} trees)")
    if tree_weight is not None and tree_weight.size != len(trees):
        raise ModelFormatError(f"{source}: weight_drop has {tree_weight.size} weights for {len(trees)} trees")
    for t, tree in enumerate(trees):
        if not isinstance(tree, dict):
            raise ModelFormatError(f"{source}: tree {t} must be an object, found {type(tree).__name__}")
        missing = [k for k in _NODE_KEYS if k not in tree]
        if missing:
            raise ModelFormatError(f"{source}: tree {t} lacks the key '{missing[0]}'")
    return booster_name, model, trees, tree_info, tree_weight


def _learner_params(learner: dict, source: str) -> dict:
    """Feature and output counts, objective, link and base score (raw margin) from the learner block."""
    params = _member(learner, "learner_model_param", dict, "learner", source)
    where = "learner.learner_model_param"
    n_features = _int_param(params, "num_feature", where, source)
    if n_features > _MAX_FEATURES:
        raise ModelFormatError(f"{source}: {where}.num_feature is {n_features}, more than the {_MAX_FEATURES} "
                               "treeprobe accepts (corrupt file?)")
    n_class = _int_param(params, "num_class", where, source, default=0)
    n_target = _int_param(params, "num_target", where, source, default=1)
    objective = _member(_member(learner, "objective", dict, "learner", source), "name", str, "learner.objective", source)
    if objective not in _OBJECTIVES:
        raise UnsupportedModelError(f"{source}: objective {objective!r} is not supported (known: {', '.join(_OBJECTIVES)})")
    link, transform = _OBJECTIVES[objective]
    n_outputs = max(n_class, n_target, 1)
    stored_base = _parse_base_score(params.get("base_score", "0.5"), source)
    if stored_base.size not in (1, n_outputs):
        raise ModelFormatError(f"{source}: base_score has {stored_base.size} values for {n_outputs} outputs")
    return {
        "n_features": n_features, "n_class": n_class, "n_target": n_target, "n_outputs": n_outputs,
        "objective": objective, "link": link, "stored_base": stored_base,
        "base_score": _base_margin(stored_base, transform, objective, source),
    }


def _tree_sizes(trees: list, n_outputs: int, source: str) -> tuple[np.ndarray, bool]:
    """Node count of every tree (checked against ``tree_param.num_nodes``) and whether leaves are vectors."""
    leaf_sizes = _tree_params(trees, "size_leaf_vector", source, default=1, usual="1")
    vector_leaves = bool(np.any(leaf_sizes > 1))
    if vector_leaves and np.any(leaf_sizes != n_outputs):
        raise ModelFormatError(f"{source}: trees have leaf vectors of size {sorted(set(leaf_sizes.tolist()))}, "
                               f"the model has {n_outputs} outputs")
    # Every output needs a tree of its own (scalar leaves) or a slot in every
    # leaf vector; checking that before anything is sized by the output count
    # keeps a corrupt num_class/num_target from demanding gigabytes.
    if not vector_leaves and n_outputs > len(trees):
        raise ModelFormatError(f"{source}: learner_model_param declares {n_outputs} outputs (num_class/num_target) "
                               f"but the model has only {len(trees)} trees (corrupt file?)")
    if vector_leaves:
        for t, tree in enumerate(trees):
            weights = tree.get("leaf_weights")
            if not isinstance(weights, (list, np.ndarray)) or len(weights) < n_outputs:
                raise ModelFormatError(f"{source}: tree {t}: 'leaf_weights' holds fewer values than the "
                                       f"{n_outputs} outputs each leaf vector needs")
    lefts = [tree["left_children"] for tree in trees]
    kinds = set(map(type, lefts))
    if not kinds <= {list, np.ndarray, bytes}:
        t = next(t for t, left in enumerate(lefts) if not isinstance(left, (list, np.ndarray, bytes)))
        raise ModelFormatError(f"{source}: tree {t}: 'left_children' must be an array")
    sizes = np.fromiter(map(len, lefts), dtype=np.int64, count=len(trees))
    if bytes in kinds:
        # Lists packed by the JSON hook count bytes, not entries.
        packed = np.fromiter((type(left) is bytes for left in lefts), dtype=bool, count=len(trees))
        sizes[packed] //= _PACKED_DTYPE["left_children"].itemsize
    if np.any(sizes == 0):
        raise ModelFormatError(f"{source}: tree {int(np.flatnonzero(sizes == 0)[0])} has no nodes")
    declared = _tree_params(trees, "num_nodes", source, default=sizes, usual=[str(n) for n in sizes.tolist()])
    if np.any(declared != sizes):
        t = int(np.flatnonzero(declared != sizes)[0])
        raise ModelFormatError(f"{source}: tree {t}: tree_param.num_nodes is {declared[t]} "
                               f"but 'left_children' has {sizes[t]} entries")
    return sizes, vector_leaves


def _tree_nodes(trees: list, sizes: np.ndarray, vector_leaves: bool, n_features: int, n_outputs: int,
                source: str) -> dict:
    """Check every node and return the common per-node arrays (global children, pruned nodes dropped).

    Consumes the per-tree node arrays (see :func:`_node_column`): each key is
    removed from every tree as its column is built, so that the per-tree
    copies are freed one column at a time, before ``from_arrays`` makes its
    own copies.
    """
    cols = {key: _node_column([tree.pop(key) for tree in trees], key, sizes, source) for key in _NODE_KEYS}
    if all("split_type" in tree for tree in trees):
        cols["split_type"] = _node_column([tree.pop("split_type") for tree in trees], "split_type", sizes, source)
    else:
        cols["split_type"] = np.zeros(int(sizes.sum()), np.int32)
    left, right, split_type = cols["left_children"], cols["right_children"], cols["split_type"]
    tree_of = np.repeat(np.arange(len(trees), dtype=np.int32), sizes)
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    leaf = left == -1
    inner = ~leaf

    def where_node(mask: np.ndarray) -> str:
        i = int(np.flatnonzero(mask)[0])
        t = int(tree_of[i])
        return f"tree {t}, node {i - int(offsets[t])}"

    # Columns of indices are int32 (see _typed_column). Viewed as unsigned, a
    # negative index lies above every tree size, so one comparison checks both ends.
    local_size = sizes.astype(np.uint32)[tree_of]
    bad = inner & ((left.view(np.uint32) >= local_size) | (right.view(np.uint32) >= local_size))
    if bad.any():
        raise ModelFormatError(f"{source}: {where_node(bad)}: child index out of range "
                               f"(left_children/right_children must lie in 0..n_nodes-1, or -1 at a leaf)")
    if not vector_leaves and np.any(leaf & (right != -1)):
        raise ModelFormatError(f"{source}: {where_node(leaf & (right != -1))}: leaf (left child -1) with a right child")
    bad = inner & (split_type != 0) & (split_type != 1)
    if bad.any():
        raise ModelFormatError(f"{source}: {where_node(bad)}: split_type must be 0 (numeric) or 1 (categorical)")
    bad = inner & (cols["split_indices"].view(np.uint32) >= n_features)
    if bad.any():
        raise ModelFormatError(f"{source}: {where_node(bad)}: split_indices out of range 0..{n_features - 1}")
    is_categorical = inner & (split_type == 1)
    if vector_leaves:
        value = _vector_leaf_values(trees, leaf, right, sizes, n_outputs, source)
    else:
        value = np.where(leaf, cols["split_conditions"], np.nan)[:, None]
    first_node = offsets[:-1][tree_of]
    nodes = {
        "feature": np.where(leaf, -1, cols["split_indices"]),
        "threshold": np.where(inner & ~is_categorical, cols["split_conditions"], np.nan),
        "left": np.where(inner, left + first_node, -1),
        "right": np.where(inner, right + first_node, -1),
        "missing_left": cols["default_left"],
        "is_categorical": is_categorical,
        "value": value,
        "gain": np.where(leaf, 0.0, cols["loss_changes"]),
        "cover": cols["sum_hessian"],
    }
    categories = _category_lists(split_type, sizes, trees, source) if is_categorical.any() else None
    declared = _tree_params(trees, "num_deleted", source, default=0, usual="0")
    keep = _drop_deleted_nodes(nodes["left"], nodes["right"], leaf, sizes, declared, source)
    if keep is not None:
        remap = np.cumsum(keep) - 1
        nodes["left"] = np.where(inner, remap[np.maximum(nodes["left"], 0)], -1)
        nodes["right"] = np.where(inner, remap[np.maximum(nodes["right"], 0)], -1)
        nodes = {key: column[keep] for key, column in nodes.items()}
        if categories is not None:
            categories = [c for c, kept in zip(categories, keep, strict=True) if kept]
        offsets = np.concatenate([[0], np.cumsum(np.bincount(tree_of[keep], minlength=len(trees)))])
    nodes["categories"] = categories
    nodes["tree_offsets"] = offsets
    nodes["pruned_nodes_dropped"] = int(declared.sum()) if keep is not None else 0
    return nodes


def _version_string(version: Any) -> str | None:
    """``[3, 2, 0]`` -> ``"3.2.0"``; None when the document has no usable version."""
    if isinstance(version, (list, np.ndarray)) and all(isinstance(v, (int, np.integer)) for v in version):
        return ".".join(str(int(v)) for v in version)
    return None


def _ensemble_from_document(doc: Any, *, source: str, file_format: str) -> ForestGraph:
    """Check an XGBoost model document (decoded JSON/UBJSON) and build the ensemble.

    The document's per-tree node arrays are consumed (removed) on the way, to
    keep the peak memory of large models low.
    """
    learner = _member(doc, "learner", dict, "the document", source)
    booster_name, model, trees, tree_info, tree_weight = _booster_trees(learner, source)
    params = _learner_params(learner, source)
    n_outputs = params["n_outputs"]
    sizes, vector_leaves = _tree_sizes(trees, n_outputs, source)
    nodes = _tree_nodes(trees, sizes, vector_leaves, params["n_features"], n_outputs, source)
    output_of_tree = np.full(len(trees), -1) if vector_leaves else tree_info
    if not vector_leaves and np.any(output_of_tree >= n_outputs):
        t = int(np.flatnonzero(output_of_tree >= n_outputs)[0])
        raise ModelFormatError(f"{source}: tree_info sends tree {t} to output {output_of_tree[t]}, the model has {n_outputs}")

    names, kinds = _feature_names_and_types(learner, params["n_features"], source)
    if kinds is not None:
        for j in np.unique(nodes["feature"][nodes["is_categorical"]]):
            kinds[j] = "categorical"
    gbtree_param = model.get("gbtree_model_param", {})
    attributes = learner.get("attributes", {})
    parallel = (_int_param(gbtree_param, "num_parallel_tree", "gbtree_model_param", source, 1)
                if isinstance(gbtree_param, dict) else 1)
    provenance = Provenance(
        library="xgboost",
        library_version=_version_string(doc.get("version")) or "",
        objective=params["objective"],
        source=source,
        stored_params={
            "booster": booster_name,
            "num_parallel_tree": parallel,
            "base_score": params["stored_base"].tolist(),
            "num_class": params["n_class"],
            "num_target": params["n_target"],
            "attributes": dict(attributes) if isinstance(attributes, dict) else {},
        },
        file_format=file_format,
        pruned_nodes_dropped=nodes["pruned_nodes_dropped"],
    )
    # check_X codes pandas categories by these labels, as XGBoost >= 3.1 does.
    category_levels = _category_names(model, names) if names is not None else {}
    return ForestGraph.from_arrays(
        feature=nodes["feature"],
        threshold=nodes["threshold"],
        left=nodes["left"],
        right=nodes["right"],
        value=nodes["value"],
        tree_offsets=nodes["tree_offsets"],
        feature_names=names,
        n_features=params["n_features"],
        feature_types=kinds,
        missing_left=nodes["missing_left"],
        is_categorical=nodes["is_categorical"],
        # XGBoost lists the categories that go right (see the module docstring).
        category_left=np.zeros(nodes["feature"].size, bool),
        categories=nodes["categories"],
        gain=nodes["gain"],
        cover=nodes["cover"],
        output_of_tree=output_of_tree,
        tree_weight=tree_weight,
        base_score=params["base_score"],
        n_outputs=n_outputs,
        link=params["link"],
        threshold_rule="<",
        split_dtype="float32",
        provenance=provenance,
        category_levels=category_levels,
        # XGBoost codes an unseen label as no known category: it takes the unlisted branch, not the missing one.
        unseen_category="unlisted",
        negative_category="none",
        generic_feature_names=names is None,
        trees_per_round=max(int(parallel), 1),
    )


def _vector_leaf_values(trees: list, leaf: np.ndarray, right: np.ndarray, sizes: np.ndarray,
                        n_outputs: int, source: str) -> np.ndarray:
    """Leaf vectors of multi-output trees: leaf ``i`` holds ``leaf_weights[k*right[i]:k*(right[i]+1)]``."""
    value = np.full((leaf.size, n_outputs), np.nan)
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    for t, tree in enumerate(trees):
        if "leaf_weights" not in tree:
            raise ModelFormatError(f"{source}: tree {t} has vector leaves but lacks the key 'leaf_weights'")
        weights = np.asarray(tree["leaf_weights"]) if isinstance(tree["leaf_weights"], (list, np.ndarray)) else None
        if weights is None or weights.ndim != 1 or (weights.size and weights.dtype.kind not in "iuf"):
            raise ModelFormatError(f"{source}: tree {t}: 'leaf_weights' must be a flat array of numbers")
        weights = weights.astype(np.float32).astype(np.float64)
        start, end = offsets[t], offsets[t + 1]
        local_leaf = leaf[start:end]
        slots = right[start:end][local_leaf]
        n_slots = weights.size // n_outputs
        if weights.size % n_outputs or np.any((slots < 0) | (slots >= n_slots)):
            raise ModelFormatError(f"{source}: tree {t}: a leaf points outside 'leaf_weights' ({weights.size} values)")
        value[start:end][local_leaf] = weights.reshape(n_slots, n_outputs)[slots]
    return value


def load_xgboost_json(data: bytes | str, *, source: str) -> ForestGraph:
    """Read an XGBoost model saved as JSON (``Booster.save_model("model.json")``).

    Parameters
    ----------
    data : bytes or str
        The file's contents.
    source : str
        Where the model came from (file path), used in messages and kept on
        the ensemble.

    Returns
    -------
    ForestGraph
        With ``threshold_rule="<"``, ``split_dtype="float32"``, ``gain`` from
        ``loss_changes`` (0 at leaves) and ``cover`` from ``sum_hessian``.

    Raises
    ------
    ModelFormatError
        Invalid JSON, or a document that is not a well-formed XGBoost tree
        model; the message names the tree and key.
    UnsupportedModelError
        A linear booster or an objective treeprobe does not know.

    Notes
    -----
    The raw output is ``base_margin + sum_t w_t f_t(x)`` [1]_ with
    ``w_t = 1`` for gbtree and the dropout weight for DART [2]_;
    ``base_margin`` is the stored ``base_score`` through the objective's
    inverse link (``log(p / (1 - p))`` for logistic objectives, ``log(mu)``
    for log-link ones).

    References
    ----------
    .. [1] T. Chen and C. Guestrin, "XGBoost: A Scalable Tree Boosting
       System", KDD 2016.
    .. [2] K. V. Rashmi and R. Gilad-Bachrach, "DART: Dropouts meet Multiple
       Additive Regression Trees", AISTATS 2015.
    """
    if not isinstance(source, str):
        raise TypeError(f"source must be a str, got {type(source).__name__}")
    if not isinstance(data, (bytes, bytearray, str)):
        raise ModelFormatError(f"{source}: JSON model data must be bytes or str, got {type(data).__name__}")
    try:
        doc = json.loads(data, object_hook=_compact_tree_lists)
    except json.JSONDecodeError as exc:
        raise ModelFormatError(f"{source}: invalid JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}") from None
    except (UnicodeDecodeError, RecursionError) as exc:
        raise ModelFormatError(f"{source}: unreadable JSON: {type(exc).__name__}: {exc}") from None
    except ValueError as exc:
        # Python refuses integer literals longer than its digit limit (4300 by default).
        raise ModelFormatError(f"{source}: unreadable JSON: {exc}") from None
    return _ensemble_from_document(doc, source=source, file_format="json")


def load_xgboost_ubjson(data: bytes, *, source: str) -> ForestGraph:
    """Read an XGBoost model saved as UBJSON (``Booster.save_model("model.ubj")``).

    Same document and checks as :func:`load_xgboost_json`; numeric node
    arrays are decoded straight into numpy by :func:`treeprobe.io.ubjson.decode_ubjson`.

    Parameters
    ----------
    data : bytes
        The file's contents.
    source : str
        Where the model came from, used in messages.

    Returns
    -------
    ForestGraph

    Raises
    ------
    ModelFormatError
        Truncated or corrupt bytes (naming the byte offset) or a malformed model.
    UnsupportedModelError
        A linear booster or an unknown objective.
    """
    if not isinstance(source, str):
        raise TypeError(f"source must be a str, got {type(source).__name__}")
    doc = decode_ubjson(data, source=source)
    return _ensemble_from_document(doc, source=source, file_format="ubjson")


def from_xgboost(obj: Any, *, source: str) -> ForestGraph:
    """Read a fitted XGBoost ``Booster`` or scikit-learn wrapper (``XGBRegressor``, ``XGBClassifier``, ...).

    The booster is serialised with ``save_raw("ubj")`` and read by
    :func:`load_xgboost_ubjson`, so objects and files share one code path.

    Parameters
    ----------
    obj : xgboost.Booster or xgboost.XGBModel
        A fitted model.
    source : str
        Label for messages, e.g. ``"<XGBRegressor object>"``.

    Returns
    -------
    ForestGraph
        Feature names and types are those the booster holds.

    Raises
    ------
    ModelFormatError
        When the wrapper is not fitted or the booster cannot be serialised.
    """
    if not isinstance(source, str):
        raise TypeError(f"source must be a str, got {type(source).__name__}")
    booster = obj
    if hasattr(obj, "get_booster"):
        try:
            booster = obj.get_booster()
        except Exception as exc:  # noqa: BLE001 - xgboost raises sklearn's NotFittedError or XGBoostError
            raise ModelFormatError(f"{source}: cannot get the booster ({type(exc).__name__}: {exc}); is the model fitted?") from None
    if not hasattr(booster, "save_raw"):
        raise ModelFormatError(f"{source}: expected an xgboost Booster or XGBModel, got {type(obj).__name__}")
    try:
        raw = bytes(booster.save_raw("ubj"))
    except Exception as exc:  # noqa: BLE001 - any serialisation failure means an unusable booster
        raise ModelFormatError(f"{source}: XGBoost could not serialise the booster: {type(exc).__name__}: {exc}") from None
    return load_xgboost_ubjson(raw, source=source)
