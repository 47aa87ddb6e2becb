"""Two versions of a model side by side: which features and pairs are new, gone or changed.

A retrained model can start combining features the previous version kept
apart. Both versions are walked (:func:`treeprobe.structure`) and their
feature and pair tables are matched by feature name, so the two may come
from different libraries and need not have the same input columns. With
data, both are also triaged (:func:`treeprobe.triage`, without a target) and
the verdicts compared.

Raw gains are not comparable between libraries or training set-ups (their
scale follows the loss, the learning rate and the number of trees), so each
version's gain is also given as a share of its own total gain; the cover
share of a pair (the share of training cover routed through paths splitting
on both) is a share already.

Limits
------
Path structure shows what the trees combine, not that the prediction varies
jointly in it; the H-statistic measures that ([1]_). Both describe the models,
not the world: a change between versions is a change of the model.

References
----------
.. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", The Annals of Applied Statistics 2(3), 916-954, 2008.
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .checks import check_choice, check_int, check_progress
from .cooccurrence import structure
from .errors import ParameterError
from .graph import ForestGraph
from .io import load_model
from .output import dumps_json, to_jsonable
from .verdicts import triage

__all__ = ["ModelComparison", "compare_models", "STATUSES", "FLAGS", "FEATURE_COLUMNS", "PAIR_COLUMNS",
           "VERDICT_COLUMNS", "TRIAGE_OPTIONS", "LIMITS"]

STATUSES = ("new", "gone", "changed", "same")
FLAGS = ("new-pair", "new-interaction")
_FEATURE_MEASURES = ("splits", "paths", "gain_share")
_PAIR_MEASURES = ("paths", "trees", "cover_share", "nested_gain", "nested_gain_share")
_VERDICT_MEASURES = ("h2", "h")


def _side_columns(measures: tuple[str, ...]) -> tuple[str, ...]:
    return tuple(f"{m}_{side}" for m in measures for side in ("old", "new", "change"))


FEATURE_COLUMNS = ("feature", "status", "input_old", "input_new", *_side_columns(_FEATURE_MEASURES))
PAIR_COLUMNS = ("feature_a", "feature_b", "status", *_side_columns(_PAIR_MEASURES))
VERDICT_COLUMNS = (*_side_columns(_VERDICT_MEASURES), "verdict_old", "verdict_new", "verdict_changed")
LIMITS = (
    "Path structure shows what each version's trees combine, not that the prediction varies jointly in it; verdicts "
    "come from a triage without target (no noise floor) and H-statistics extrapolate when features are dependent. "
    "A change between versions is a change of the model, not of the world."
)
_SCHEMA = "treeprobe.compare/1"
# Shares and gains equal to this relative precision count as unchanged (float sums in another order).
_RTOL = 1e-9
# Options of the triage a comparison passes on: not those that need a target (it triages without one), and not
# output and progress, which compare_models takes itself.
TRIAGE_OPTIONS = tuple(name for name, p in inspect.signature(triage).parameters.items() if p.kind == p.KEYWORD_ONLY
                       and name not in ("null_refits", "level", "params", "n_jobs", "output", "progress"))


# --------------------------------------------------------------------- matching the two versions
def _name_order(old: ForestGraph, new: ForestGraph) -> dict[str, int]:
    """Rank of every feature name: the new version's order, then features only the old one has."""
    names = list(new.feature_names) + [n for n in old.feature_names if n not in set(new.feature_names)]
    return {name: i for i, name in enumerate(names)}


def _oriented(frame: pd.DataFrame, rank: dict[str, int]) -> pd.DataFrame:
    """Pairs with ``feature_a`` before ``feature_b`` in the common name order."""
    frame = frame.copy()
    swap = frame["feature_a"].map(rank).to_numpy() > frame["feature_b"].map(rank).to_numpy()
    frame.loc[swap, ["feature_a", "feature_b"]] = frame.loc[swap, ["feature_b", "feature_a"]].to_numpy()
    return frame


def _side_by_side(old: pd.DataFrame, new: pd.DataFrame, keys: list[str], measures: tuple[str, ...]) -> pd.DataFrame:
    """Outer join on ``keys``; a row missing on one side has measures 0 there (that version never uses it)."""
    merged = old[keys + list(measures)].merge(new[keys + list(measures)], on=keys, how="outer",
                                               suffixes=("_old", "_new"), indicator=True)
    for measure in measures:
        whole = not (pd.api.types.is_float_dtype(old[measure]) or pd.api.types.is_float_dtype(new[measure]))
        for side, missing in (("old", "right_only"), ("new", "left_only")):
            column = f"{measure}_{side}"
            merged[column] = merged[column].astype(float).mask(merged["_merge"] == missing, 0.0)
            if whole:
                merged[column] = merged[column].astype(np.int64)
        merged[f"{measure}_change"] = merged[f"{measure}_new"] - merged[f"{measure}_old"]
    return merged.drop(columns="_merge")


def _status(frame: pd.DataFrame, presence: str, measures: tuple[str, ...]) -> np.ndarray:
    """new / gone by ``presence`` > 0 on one side only; same when every measure agrees, else changed."""
    before = frame[f"{presence}_old"].to_numpy() > 0
    after = frame[f"{presence}_new"].to_numpy() > 0
    same = np.ones(len(frame), dtype=bool)
    for measure in measures:
        old, new = frame[f"{measure}_old"].to_numpy(float), frame[f"{measure}_new"].to_numpy(float)
        same &= np.isclose(old, new, rtol=_RTOL, atol=0.0, equal_nan=True)
    return np.select([after & ~before, before & ~after, same], ["new", "gone", "same"], "changed")


def _ranked(frame: pd.DataFrame, keys: list[str], rank: dict[str, int], primary: str, secondary: str) -> pd.DataFrame:
    """Status order (new, gone, changed, same), then the largest change of ``primary`` (else ``secondary``) first,
    then the common feature order."""
    size = frame[f"{primary}_change"].abs().fillna(frame[f"{secondary}_change"].abs())
    ordered = frame.assign(_status=frame["status"].map(STATUSES.index), _size=-size,
                           **{f"_{key}": frame[key].map(rank) for key in keys})
    ordered = ordered.sort_values(["_status", "_size", *(f"_{key}" for key in keys)], kind="stable",
                                  na_position="last")
    return ordered[list(frame.columns)].reset_index(drop=True)


def _share(values: pd.Series, total: float) -> pd.Series:
    return values / total if total > 0 else values * np.nan


def _feature_table(old: Any, new: Any, old_graph: ForestGraph, new_graph: ForestGraph,
                   rank: dict[str, int]) -> pd.DataFrame:
    sides = []
    for walked in (old, new):
        table = walked.features
        sides.append(pd.DataFrame({"feature": table["feature"], "splits": table["splits"],
                                   "paths": table["leaf_paths"],
                                   "gain_share": _share(table["gain"], float(table["gain"].sum()))}))
    frame = _side_by_side(*sides, ["feature"], _FEATURE_MEASURES)
    frame = frame[(frame["splits_old"] > 0) | (frame["splits_new"] > 0)]
    frame["status"] = _status(frame, "splits", _FEATURE_MEASURES)
    frame["input_old"] = frame["feature"].isin(old_graph.feature_names)
    frame["input_new"] = frame["feature"].isin(new_graph.feature_names)
    return _ranked(frame[list(FEATURE_COLUMNS)], ["feature"], rank, "gain_share", "splits")


def _pair_table(old: Any, new: Any, rank: dict[str, int]) -> pd.DataFrame:
    sides = []
    for walked in (old, new):
        pairs = _oriented(walked.pairs, rank)
        pairs["nested_gain_share"] = _share(pairs["nested_gain"], float(walked.features["gain"].sum()))
        sides.append(pairs)
    frame = _side_by_side(*sides, ["feature_a", "feature_b"], _PAIR_MEASURES)
    frame["status"] = _status(frame, "paths", _PAIR_MEASURES)
    return _ranked(frame[list(PAIR_COLUMNS)], ["feature_a", "feature_b"], rank, "cover_share", "nested_gain_share")


# --------------------------------------------------------------------- verdicts
def _checked_triage_options(options: Any) -> dict:
    if options is None:
        return {}
    if not isinstance(options, dict):
        raise ParameterError(f"triage_options must be a dict of triage options or None, got {type(options).__name__}")
    unknown = sorted(set(options) - set(TRIAGE_OPTIONS))
    if unknown:
        raise ParameterError(f"triage_options: {', '.join(map(repr, unknown))} not accepted here; the comparison "
                             f"triages without a target and accepts {', '.join(TRIAGE_OPTIONS)}")
    return dict(options)


def _with_verdicts(pairs: pd.DataFrame, triaged: tuple[Any, Any], rank: dict[str, int]) -> pd.DataFrame:
    """H², h and verdict of both versions; a pair missing from a triage has a feature that version never uses
    (H = 0 exactly, verdict absent)."""
    sides = [_oriented(result.pairs[["feature_a", "feature_b", *_VERDICT_MEASURES, "verdict"]], rank)
             for result in triaged]
    out = pairs
    for side, frame in zip(("old", "new"), sides, strict=True):
        renamed = frame.rename(columns={c: f"{c}_{side}" for c in (*_VERDICT_MEASURES, "verdict")})
        out = out.merge(renamed, on=["feature_a", "feature_b"], how="left")
        for measure in _VERDICT_MEASURES:
            out[f"{measure}_{side}"] = out[f"{measure}_{side}"].astype(float).fillna(0.0)
        out[f"verdict_{side}"] = out[f"verdict_{side}"].fillna("absent").astype(str)
    for measure in _VERDICT_MEASURES:
        out[f"{measure}_change"] = out[f"{measure}_new"] - out[f"{measure}_old"]
    out["verdict_changed"] = out["verdict_old"] != out["verdict_new"]
    return out[[*PAIR_COLUMNS, *VERDICT_COLUMNS]]


# --------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class ModelComparison:
    """What changed in the interaction structure between two versions of a model.

    Attributes
    ----------
    features : DataFrame
        One row per feature either version splits on, columns
        ``FEATURE_COLUMNS``: ``feature``, ``status``, ``input_old`` and
        ``input_new`` (the version has this input column), then for each
        measure ``m`` the columns ``m_old``, ``m_new`` and ``m_change`` (new
        minus old): ``splits`` (split nodes), ``paths`` (leaves whose path
        splits on it) and ``gain_share`` (its gain over the version's total
        gain).
    pairs : DataFrame
        One row per pair sharing a root-to-leaf path in either version,
        columns ``PAIR_COLUMNS`` and, with data, ``VERDICT_COLUMNS``:
        ``feature_a``, ``feature_b`` (in the new version's feature order),
        ``status``, and ``_old``/``_new``/``_change`` of ``paths``,
        ``trees``, ``cover_share``, ``nested_gain`` (as in
        :func:`treeprobe.structure`) and ``nested_gain_share`` (nested gain
        over the version's total gain); with data also of ``h2`` (H²) and
        ``h``, and ``verdict_old``, ``verdict_new``, ``verdict_changed``.
    facts : dict
        ``old`` and ``new`` (source, library, objective, trees, input
        features), ``inputs_added``, ``inputs_removed``, ``counts`` (rows per
        status of each table), ``output``, ``has_data``, and with data ``n_rows``,
        ``resamples``, ``thresholds`` and ``verdict_changes``; ``notes``.
    limits : str

    Notes
    -----
    Status: ``new`` when only the new version has the feature on a split
    (the pair on a path), ``gone`` when only the old one has, ``same`` when
    every structure measure agrees (to a relative 1e-9), ``changed``
    otherwise. Rows are ordered new, gone, changed, same, each by the size
    of the change of ``cover_share`` (pairs) or ``gain_share`` (features).
    """

    features: pd.DataFrame
    pairs: pd.DataFrame
    facts: dict = field(default_factory=dict)
    limits: str = LIMITS

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, ModelComparison):
            return NotImplemented
        return self.features.equals(other.features) and self.pairs.equals(other.pairs) and self.facts == other.facts

    __hash__ = None  # type: ignore[assignment]

    def flagged(self, flag: str) -> pd.DataFrame:
        """Pairs a pipeline may refuse: ``"new-pair"`` (status new) or ``"new-interaction"`` (verdict interaction
        in the new version only; needs the comparison to have data).

        Raises
        ------
        ParameterError
            An unknown flag, or "new-interaction" without data.
        """
        flag = check_choice("flag", flag, FLAGS)
        if flag == "new-pair":
            return self.pairs[self.pairs["status"] == "new"].reset_index(drop=True)
        if "verdict_new" not in self.pairs.columns:
            raise ParameterError("flag 'new-interaction' needs verdicts: compare with data (X=, --data)")
        mask = (self.pairs["verdict_new"] == "interaction") & (self.pairs["verdict_old"] != "interaction")
        return self.pairs[mask].reset_index(drop=True)

    def to_dict(self) -> dict:
        """JSON-ready dict: ``schema`` ("treeprobe.compare/1"), ``limits``, ``facts``, ``features``, ``pairs``."""
        return to_jsonable({"schema": _SCHEMA, "limits": self.limits, "facts": self.facts,
                            "features": self.features, "pairs": self.pairs})

    def to_json(self) -> str:
        """:meth:`to_dict` as indented JSON text."""
        return dumps_json(self.to_dict())


def _model_facts(graph: ForestGraph) -> dict:
    return {"source": graph.source, "library": graph.library, "objective": graph.objective,
            "n_trees": graph.n_trees, "n_features": graph.n_features}


def _notes(old: ForestGraph, new: ForestGraph, walked: tuple[Any, Any]) -> list[str]:
    notes = []
    if old.library != new.library:
        notes.append(f"The versions come from different libraries ({old.library}, {new.library}): compare the shares "
                     "(cover_share, gain_share, nested_gain_share); raw gains differ in scale.")
    if walked[0].cover_basis != walked[1].cover_basis:
        notes.append(f"Cover is read as {walked[0].cover_basis} in the old version and {walked[1].cover_basis} in "
                     "the new one, so cover shares compare different weights.")
    return notes


def compare_models(
    old: Any,
    new: Any,
    X: Any = None,
    *,
    output: int | None = None,
    triage_options: dict | None = None,
    progress: bool | None = None,
) -> ModelComparison:
    """Compare the interaction structure (and, with data, the verdicts) of two versions of a model.

    Parameters
    ----------
    old, new : ForestGraph or anything :func:`treeprobe.load_model` accepts
        The previous and the new version; they may come from different
        libraries. Features are matched by name.
    X : DataFrame, optional
        Data holding the input columns of both versions (matched by name).
        When given, both versions are triaged on it without a target and
        the pair table gains H², h and the verdicts.
    output : int, optional
        Output (class) of multiclass models, 0-based: only its trees are
        walked and triaged. Default all trees (structure) and output 0
        (triage).
    triage_options : dict, optional
        Keyword options of :func:`treeprobe.triage` for both triages
        (``sample``, ``resamples``, ``random_state``, ``min_h2``,
        ``min_effect``, ``max_dependence``, ...); options that need a target
        are refused. Needs ``X``.
    progress : bool, optional
        Progress bars of the triages; default only on a terminal.

    Returns
    -------
    ModelComparison

    Raises
    ------
    ParameterError
        An invalid option, or ``triage_options`` without ``X``.
    DataError
        ``X`` lacks input columns of either version (named, with close
        matches).
    ModelFormatError
        A model that cannot be read.

    Notes
    -----
    Per version ``v`` with total gain ``G_v`` (sum of the gain of all its
    splits), a feature's ``gain_share = gain / G_v`` and a pair's
    ``nested_gain_share = nested_gain / G_v``; ``cover_share`` is
    ``leaf_cover / total leaf cover`` as in :func:`treeprobe.structure`.
    Each ``_change`` is new minus old. A pair that shares no path in a
    version has paths 0 and, with data, H = 0 exactly there: a tree ensemble
    cannot make two features interact without a path through both
    (Friedman and Popescu [1]_, section 8).

    References
    ----------
    .. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
       ensembles", The Annals of Applied Statistics 2(3), 916-954, 2008.

    Examples
    --------
    The old version splits on ``fuel_price`` alone; the new one then splits
    on ``shift_length`` below it.

    >>> from treeprobe.graph import ForestGraph
    >>> names = ["fuel_price", "shift_length"]
    >>> old = ForestGraph.from_arrays(feature=[0, -1, -1], threshold=[0.5, 0, 0], left=[1, -1, -1],
    ...     right=[2, -1, -1], value=[0, 1.0, 2.0], tree_offsets=[0, 3], feature_names=names)
    >>> new = ForestGraph.from_arrays(feature=[0, 1, -1, -1, -1], threshold=[0.5, 2.0, 0, 0, 0],
    ...     left=[1, 2, -1, -1, -1], right=[4, 3, -1, -1, -1], value=[0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 5],
    ...     feature_names=names)
    >>> diff = compare_models(old, new)
    >>> diff.pairs[["feature_a", "feature_b", "status", "paths_old", "paths_new"]]
        feature_a     feature_b status  paths_old  paths_new
    0  fuel_price  shift_length    new          0          2
    >>> diff.features[["feature", "status"]].values.tolist()
    [['shift_length', 'new'], ['fuel_price', 'changed']]
    """
    options = _checked_triage_options(triage_options)
    progress = check_progress(progress)
    output = check_int("output", output, low=0, allow_none=True)
    if options and X is None:
        raise ParameterError("triage_options set how the versions are triaged on data; they need X")
    old_graph, new_graph = load_model(old), load_model(new)
    walked = (structure(old_graph, max_order=2, output=output), structure(new_graph, max_order=2, output=output))
    rank = _name_order(old_graph, new_graph)
    features = _feature_table(*walked, old_graph, new_graph, rank)
    pairs = _pair_table(*walked, rank)
    facts: dict[str, Any] = {
        "old": _model_facts(old_graph), "new": _model_facts(new_graph),
        "inputs_added": [n for n in new_graph.feature_names if n not in old_graph.feature_names],
        "inputs_removed": [n for n in old_graph.feature_names if n not in new_graph.feature_names],
        "output": output, "has_data": X is not None, "notes": _notes(old_graph, new_graph, walked),
    }
    if X is not None:
        settings = {"progress": progress, **options, **({} if output is None else {"output": output})}
        triaged = (triage(old_graph, X, None, **settings), triage(new_graph, X, None, **settings))
        pairs = _with_verdicts(pairs, triaged, rank)
        facts.update({"n_rows": triaged[1].facts["n_rows"], "resamples": triaged[1].facts["resamples"],
                      "thresholds": dict(triaged[1].thresholds), "verdict_changes": int(pairs["verdict_changed"].sum())})
    facts["counts"] = {name: {s: int((table["status"] == s).sum()) for s in STATUSES}
                       for name, table in (("features", features), ("pairs", pairs))}
    return ModelComparison(features=features, pairs=pairs, facts=facts)
