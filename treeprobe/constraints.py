"""Interaction constraints: which features a retrained model may combine, and what it costs.

XGBoost and LightGBM accept ``interaction_constraints``, a list of feature
groups: a tree may only combine on one root-to-leaf path features that lie in
a common group [1]_ [2]_. This module turns the triage of feature pairs into
such groups, exports them in each library's accepted form (and as
scikit-learn's ``interaction_cst`` for ``HistGradientBoosting*``), and checks them
by retraining: cross-validated loss with and without the groups, and a walk
of the constrained refit (:mod:`treeprobe.cooccurrence`) to confirm that no path
crosses the groups.

The groups are the maximal cliques [3]_ of the graph whose edges are the
supported pairs, so every pair inside a group is supported by the evidence.
Features with no supported partner become groups of their own (they may still
be used, alone).

How the libraries enforce groups (measured, not from documentation)
-------------------------------------------------------------------
Facts established by training with ``interaction_constraints`` and walking
the result with :func:`treeprobe.cooccurrence.structure`; tested in
``tests/test_constraints.py`` so that a library change is noticed. Versions
tested: xgboost-cpu 3.2.0 (``hist``, ``approx`` and ``exact`` tree methods)
and lightgbm 4.7.0.

* Overlapping groups: both libraries keep every path's feature set inside one
  single group. With groups ``[[0, 1], [1, 2]]`` and a target driven by
  ``x0 * x2``, no path of either library ever splits on both 0 and 2; with
  the three pairwise groups ``[[0, 1], [1, 2], [0, 2]]`` paths hold each pair
  but never all three features. (A belief that XGBoost lets a branch use the
  union of all groups containing any feature used so far, and so admits
  ``{0, 1, 2}`` after a split on 1, did not hold for 3.2.0.) Overlapping
  clique groups are therefore enforced exactly by both.
* Features listed in no group: XGBoost still uses them, but only alone (no
  path combines them with another feature); LightGBM never splits on them.
  The exported parameters therefore list every feature, unused ones as
  singletons, so both libraries treat them alike.
* Accepted forms. XGBoost's Python package (native ``xgboost.train`` params
  and the scikit-learn wrappers) reads a Python *list* as feature *names*: a
  list of integer lists is refused ("Constrained features are not a subset
  of training data feature names") even when the data has no names; the
  string ``"[[0, 1], [2]]"`` of indices is accepted everywhere, and a list of
  name lists is accepted when the data carries those names. LightGBM accepts
  a list of integer lists (and the same written as a string); a list of name
  lists is *silently misread* (every name parses as feature 0, so the model
  uses feature 0 only), and the form ``"0,1;2"`` is silently ignored (no
  constraint at all). Export indices to LightGBM.

Limits
------
A suggestion is only as good as the triage behind it: H-statistics
extrapolate when features are dependent, path structure is not causation,
and a model's interactions are not the world's. Constraining can cost
accuracy; :func:`validate_constraints` measures how much on held-out folds.

References
----------
.. [1] T. Chen and C. Guestrin, "XGBoost: a scalable tree boosting system",
   KDD 2016; XGBoost documentation, "Feature Interaction Constraints".
.. [2] G. Ke et al., "LightGBM: a highly efficient gradient boosting decision
   tree", NeurIPS 2017; LightGBM parameter ``interaction_constraints``.
.. [3] C. Bron and J. Kerbosch, "Algorithm 457: finding all cliques of an
   undirected graph", Communications of the ACM 16(9), 575-577, 1973.
.. [4] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", The Annals of Applied Statistics 2(3), 916-954, 2008.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from functools import partial
from itertools import combinations
from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import pandas as pd
from scipy.stats import t as student_t
from sklearn.model_selection import KFold, StratifiedKFold

from .checks import check_choice, check_float, check_int, check_n_jobs, check_progress, check_seed
from .data import model_matrix
from .errors import DataError, MissingLibraryError, ParameterError, UnsupportedModelError
from .graph import ForestGraph
from .io import load_model
from .output import atomic_write, dumps_json, to_jsonable
from .parallel import run_tasks, threads_per_fit
from .policy import index_groups
from .policy import paths_outside_groups as _cross_group  # the one check of paths against groups
from .refit import (
    INNER_FRACTION,
    LIBRARIES,
    MULTICLASS,
    PATIENCE,
    REGRESSION,
    Recipe,
    calibrate_step,
    checked_target,
    constrained_substitute,
    design_matrix,
    fit,
    fit_early_stopped,
    live_model_of,
    loss_scores,
    predict_response,
    round_budget,
    task_of,
    training_recipe,
    xgboost_constraint_text,
)
from .verdicts import VERDICTS

__all__ = [
    "VERDICTS",
    "LIMITS",
    "ConstraintSuggestion",
    "ValidationResult",
    "MissingLibraryError",
    "interaction_graph",
    "write_graphml",
    "suggest_constraints",
    "validate_constraints",
]

LIMITS = (
    "Groups follow the model's evidence: H-statistics extrapolate when features are dependent, path structure "
    "is not causation, and a model's interactions are not the world's."
)
_PAIR_COLUMNS = ("feature_a", "feature_b", "verdict", "strength")
_TRIPLE_COLUMNS = ("feature_a", "feature_b", "feature_c", "verdict", "strength")
_FEATURE_COLUMNS = ("feature", "gain", "splits", "h2_rest", "used")
_SCHEMA = "treeprobe.constraints/2"
_VALIDATION_SCHEMA = "treeprobe.constraints.validation/4"
_FOLD_COLUMNS = ("fold", "metric", "unconstrained", "constrained", "difference", "unconstrained_rounds",
                 "constrained_rounds")
# Forbidden pairs named in a note when the groups measurably hurt.
_PAIRS_NAMED = 5
# Where each library's snippet puts the groups: the estimator class by task, and its keyword.
_SNIPPET_LIBRARIES = (*LIBRARIES, "sklearn")
_ESTIMATORS = {
    "xgboost": {"regression": "xgboost.XGBRegressor", "classification": "xgboost.XGBClassifier",
                "ranking": "xgboost.XGBRanker"},
    "lightgbm": {"regression": "lightgbm.LGBMRegressor", "classification": "lightgbm.LGBMClassifier",
                 "ranking": "lightgbm.LGBMRanker"},
    "sklearn": {"regression": "HistGradientBoostingRegressor", "classification": "HistGradientBoostingClassifier",
                "ranking": "HistGradientBoostingRegressor"},
}


# --------------------------------------------------------------------- reading the triage result
def _frame_of(result: Any, attribute: str, required: Sequence[str], *, allow_missing: bool = False) -> pd.DataFrame:
    frame = getattr(result, attribute, None)
    if frame is None and allow_missing:
        return pd.DataFrame(columns=list(required))
    if not isinstance(frame, pd.DataFrame):
        raise DataError(f"triage_result.{attribute} must be a pandas DataFrame, got {type(frame).__name__}")
    missing = [c for c in required if c not in frame.columns]
    if missing and not (allow_missing and frame.empty):
        raise DataError(
            f"triage_result.{attribute} lacks the column(s) {', '.join(missing)}; it has {', '.join(map(str, frame.columns))}"
        )
    return frame


def _feature_names(result: Any) -> tuple[str, ...]:
    ensemble = getattr(result, "ensemble", None)
    if not isinstance(ensemble, ForestGraph):
        raise DataError(f"triage_result.ensemble must be a ForestGraph, got {type(ensemble).__name__}")
    return ensemble.feature_names


def _check_include(include: Any) -> tuple[str, ...]:
    verdicts = (include,) if isinstance(include, str) else include
    if not isinstance(verdicts, (tuple, list)) or not verdicts:
        raise ParameterError(f"include must be a verdict or a non-empty tuple of verdicts from {VERDICTS}, got {include!r}")
    unknown = [v for v in verdicts if v not in VERDICTS]
    if unknown:
        raise ParameterError(f"include holds {unknown[0]!r}, which is not a verdict; expected some of {VERDICTS}")
    return tuple(dict.fromkeys(verdicts))


def _check_members(frame: pd.DataFrame, columns: Sequence[str], known: dict[str, int], table: str) -> None:
    for column in columns:
        unknown = ~frame[column].astype(str).isin(known)
        if unknown.any():
            row = int(np.flatnonzero(unknown.to_numpy())[0])
            raise DataError(
                f"triage_result.{table} row {row}: {column} = {frame[column].iloc[row]!r} is not a feature of the model"
            )


def _check_strength(frame: pd.DataFrame, table: str) -> np.ndarray:
    strength = pd.to_numeric(frame["strength"], errors="coerce").to_numpy(dtype=float)
    bad = ~(strength >= 0)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise DataError(f"triage_result.{table} row {row}: strength must be a number >= 0, got {frame['strength'].iloc[row]!r}")
    return strength


# --------------------------------------------------------------------- graph
def _scalar(value: Any, kind: str) -> Any:
    """A GraphML-safe scalar: networkx writes str, int, float and bool only (no None)."""
    if kind == "bool":
        return bool(value)
    if kind == "int":
        return int(value)
    if kind == "float":
        return float(value) if value is not None and not pd.isna(value) else math.nan
    return "" if value is None or (not isinstance(value, str) and pd.isna(value)) else str(value)


def _column_kind(series: pd.Series) -> str:
    if pd.api.types.is_bool_dtype(series):
        return "bool"
    if pd.api.types.is_integer_dtype(series):
        return "int"
    if pd.api.types.is_numeric_dtype(series):
        return "float"
    return "str"


def interaction_graph(triage_result: Any, *, include: str | Sequence[str] = ("interaction",)) -> nx.Graph:
    """The triaged feature pairs as a graph, for drawing or export.

    Parameters
    ----------
    triage_result : triage result
        Needs ``features`` (``feature``, ``gain``, ``splits``, ``h2_rest``,
        ``used``), ``pairs`` (``feature_a``, ``feature_b``, ``verdict``,
        ``strength`` and any further columns) and ``ensemble``.
    include : str or sequence of str, default ("interaction",)
        Verdicts (from ``VERDICTS``) whose pairs get ``allowed = True``.

    Returns
    -------
    networkx.Graph
        One node per row of ``features`` (attributes ``gain``, ``splits``,
        ``h2_rest``, ``used``) and one edge per row of ``pairs``, carrying
        every column of the row and ``allowed``. Attribute values are plain
        str, int, float or bool (NaN kept as float; missing text as ""), so the
        graph can be written as GraphML. Graph attributes: ``include`` (the
        verdicts, comma-joined) and ``limits``.

    Raises
    ------
    DataError
        When a table or column is missing, or a pair names an unknown feature.

    Examples
    --------
    >>> import pandas as pd
    >>> from types import SimpleNamespace
    >>> from treeprobe.graph import ForestGraph
    >>> ens = ForestGraph.from_arrays(feature=[0, -1, -1], threshold=[0.5, 0, 0], left=[1, -1, -1],
    ...     right=[2, -1, -1], value=[0, 1.0, 2.0], tree_offsets=[0, 3], feature_names=["fuel_price", "shift_length"])
    >>> result = SimpleNamespace(ensemble=ens,
    ...     features=pd.DataFrame({"feature": ["fuel_price", "shift_length"], "gain": [3.0, 1.0],
    ...                            "splits": [4, 2], "h2_rest": [0.2, 0.1], "used": [True, True]}),
    ...     pairs=pd.DataFrame({"feature_a": ["fuel_price"], "feature_b": ["shift_length"],
    ...                         "verdict": ["interaction"], "strength": [0.4]}))
    >>> graph = interaction_graph(result)
    >>> graph.edges["fuel_price", "shift_length"]["allowed"]
    True
    """
    verdicts = _check_include(include)
    names = _feature_names(triage_result)
    features = _frame_of(triage_result, "features", _FEATURE_COLUMNS)
    pairs = _frame_of(triage_result, "pairs", _PAIR_COLUMNS)
    known = {name: j for j, name in enumerate(names)}
    _check_members(features, ["feature"], known, "features")
    _check_members(pairs, ["feature_a", "feature_b"], known, "pairs")
    graph = nx.Graph(include=",".join(verdicts), limits=LIMITS)
    node_kinds = {"gain": "float", "splits": "int", "h2_rest": "float", "used": "bool"}
    for row in features.itertuples(index=False):
        graph.add_node(str(row.feature), **{key: _scalar(getattr(row, key), kind) for key, kind in node_kinds.items()})
    kinds = {column: _column_kind(pairs[column]) for column in pairs.columns}
    for record in pairs.to_dict(orient="records"):
        attributes = {str(column): _scalar(record[column], kinds[column]) for column in pairs.columns}
        attributes["allowed"] = record["verdict"] in verdicts
        graph.add_edge(str(record["feature_a"]), str(record["feature_b"]), **attributes)
    return graph


def write_graphml(graph: nx.Graph, path: str | os.PathLike) -> Path:
    """Write a graph as GraphML, atomically (the old file or none survives a failure).

    Parameters
    ----------
    graph : networkx.Graph
        For instance from :func:`interaction_graph`. Attribute values must be
        str, int, float or bool.
    path : str or path
        Target file.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    DataError
        When an attribute value has a type GraphML cannot hold (the message
        names the node or edge and the attribute); nothing is written then.
    TreeprobeError
        When the folder does not exist or is not writable.
    """
    if not isinstance(graph, nx.Graph):
        raise DataError(f"graph must be a networkx graph, got {type(graph).__name__}")
    plain = (str, bool, int, float)
    places = [("graph", graph.graph)]
    places += [(f"node {node!r}", data) for node, data in graph.nodes(data=True)]
    places += [(f"edge {u!r}-{v!r}", data) for u, v, data in graph.edges(data=True)]
    for where, data in places:
        for key, value in data.items():
            if not isinstance(value, plain):
                raise DataError(f"{where}: attribute {key!r} is {type(value).__name__} {value!r}; GraphML holds str, int, "
                                "float or bool only")
    text = "\n".join(nx.generate_graphml(graph)) + "\n"
    return atomic_write(path, lambda handle: handle.write(text))


# --------------------------------------------------------------------- suggestion
def _group_order(groups: list[list[int]], names: Sequence[str]) -> list[list[int]]:
    members_sorted = [sorted(group) for group in groups]
    return sorted(members_sorted, key=lambda group: (-len(group), [names[j] for j in group]))


def _pairs_outside(groups: list[list[int]], edges: set[tuple[int, int]]) -> list[tuple[int, int]]:
    """Pairs that share a group but are not supported edges."""
    allowed = {pair for group in groups for pair in combinations(sorted(group), 2)}
    return sorted(allowed - edges)


def _named(pairs: Sequence[tuple[int, int]], names: Sequence[str]) -> str:
    return ", ".join(f"({names[a]}, {names[b]})" for a, b in pairs)


def _estimator_name(model: ForestGraph) -> str:
    return model.provenance.estimator


@dataclass(frozen=True)
class ConstraintSuggestion:
    """Feature groups allowed to interact, with the libraries' parameters.

    Attributes
    ----------
    groups : list of list of str
        Groups of feature names: members in model feature order, groups
        largest first, then by member names.
    group_indices : list of list of int
        The same groups as indices into ``feature_names``.
    unused : list of str
        Features the model never splits on (exported as singletons).
    overlapping : bool
        Whether a feature lies in more than one group.
    notes : list of str
        Sentences for the reader: edges added for triples, pairs left out,
        what the alternative grouping allows.
    xgboost_param : str
        Value for XGBoost's ``interaction_constraints`` (indices in the string
        form every XGBoost Python API accepts, unused features as singletons).
    xgboost_param_by_name : list of list of str
        The same by name, for XGBoost data that carries these feature names.
    lightgbm_param : list of list of int
        Value for LightGBM's ``interaction_constraints`` (indices; LightGBM
        misreads names).
    alternative : list of list of str or None
        A non-overlapping grouping (connected components of the supported
        pairs) when ``groups`` overlap, else None.
    feature_names : tuple of str
        The model's input columns, which the indices refer to.
    library, objective, estimator : str
        The triaged model's library, objective and scikit-learn class name
        ("" when none), which choose the estimator class of
        :meth:`python_snippet`.

    Results compare by value (every field is plain data).
    """

    groups: list[list[str]]
    group_indices: list[list[int]]
    unused: list[str]
    overlapping: bool
    notes: list[str]
    xgboost_param: str
    xgboost_param_by_name: list[list[str]]
    lightgbm_param: list[list[int]]
    alternative: list[list[str]] | None
    feature_names: tuple[str, ...] = field(default=())
    library: str = ""
    objective: str = ""
    estimator: str = ""

    def to_dict(self) -> dict:
        """JSON-ready dict: ``schema``, ``limits`` and every attribute."""
        return to_jsonable({
            "schema": _SCHEMA, "limits": LIMITS, "groups": self.groups, "group_indices": self.group_indices,
            "unused": self.unused, "overlapping": self.overlapping, "notes": self.notes,
            "xgboost_param": self.xgboost_param, "xgboost_param_by_name": self.xgboost_param_by_name,
            "lightgbm_param": self.lightgbm_param, "alternative": self.alternative,
            "feature_names": list(self.feature_names), "library": self.library, "objective": self.objective,
            "estimator": self.estimator,
        })

    def to_json(self) -> str:
        """:meth:`to_dict` as indented JSON text."""
        return dumps_json(self.to_dict())

    def _task(self) -> str:
        """"classification", "regression" or "ranking", read from the model's estimator class or objective."""
        if self.estimator:
            return "classification" if self.estimator.endswith("Classifier") else "regression"
        if self.objective.startswith(("rank:", "lambdarank", "rank_xendcg")):
            return "ranking"
        try:
            task = task_of(self.library, self.objective) if self.library in LIBRARIES else REGRESSION
        except UnsupportedModelError:
            task = REGRESSION
        return "regression" if task == REGRESSION else "classification"

    def python_snippet(self, library: str | None = None, *, num_boost_round: int | None = None) -> str:
        """Python lines to paste into a training script: the groups in ``library``'s accepted form.

        ``library`` is "xgboost", "lightgbm" or "sklearn" (scikit-learn's
        ``HistGradientBoosting*``, keyword ``interaction_cst``); default the
        model's own library. The estimator class (regressor, classifier or
        ranker) follows the model's objective. ``num_boost_round`` (e.g.
        :attr:`ValidationResult.recommended_rounds`) adds a line with the
        round count the constrained model needed under early stopping.
        """
        library = check_choice("library", self.library if library is None else library, _SNIPPET_LIBRARIES)
        num_boost_round = check_int("num_boost_round", num_boost_round, low=1, allow_none=True)
        estimator = _ESTIMATORS[library][self._task()]
        legend = [f"#   group {i}: {', '.join(group)}" for i, group in enumerate(self.groups)]
        if self.unused:
            legend.append(f"#   unused, kept alone: {', '.join(self.unused)}")
        header = ["# Feature groups allowed to interact (indices into the training columns):", *legend]
        if library == "sklearn":
            # Features missing from interaction_cst would form one extra group together: list every feature.
            body = [
                f"from sklearn.ensemble import {estimator}",
                "",
                f"interaction_cst = {self.lightgbm_param!r}",
                f"model = {estimator}(interaction_cst=interaction_cst)",
            ]
        elif library == "xgboost":
            body = [
                f"interaction_constraints = {self.xgboost_param!r}",
                'params["interaction_constraints"] = interaction_constraints  # xgboost.train(params, dtrain, ...)',
                f"# or: {estimator}(..., interaction_constraints=interaction_constraints)",
            ]
        else:
            body = [
                f"interaction_constraints = {self.lightgbm_param!r}",
                'params["interaction_constraints"] = interaction_constraints  # lightgbm.train(params, train_set, ...)',
                f"# or: {estimator}(..., interaction_constraints=interaction_constraints)",
            ]
        if num_boost_round is not None:
            keyword = "max_iter" if library == "sklearn" else "num_boost_round"
            body.append(f"{keyword} = {num_boost_round}  # median best round count of the constrained fits "
                        "over cross-validation folds (early stopping)")
        return "\n".join(header + body) + "\n"


def _used_features(triage_result: Any, known: dict[str, int]) -> set[int]:
    """Indices of the features the model splits on (``features.used``)."""
    features = _frame_of(triage_result, "features", ("feature", "used"))
    _check_members(features, ["feature"], known, "features")
    used_column = features["used"]
    if not (pd.api.types.is_bool_dtype(used_column) or used_column.isin([True, False]).all()):
        row = int(np.flatnonzero(~used_column.isin([True, False]).to_numpy())[0])
        raise DataError(f"triage_result.features row {row}: used must be True or False, got {used_column.iloc[row]!r}")
    flags = used_column.to_numpy(dtype=bool)
    return {known[str(f)] for f, flag in zip(features["feature"], flags, strict=True) if flag}


def _supported_pairs(triage_result: Any, known: dict[str, int], verdicts: tuple[str, ...],
                     min_strength: float) -> tuple[set[tuple[int, int]], list[str]]:
    """Edges (index pairs) whose verdict is included and whose strength reaches ``min_strength``, and a note."""
    pairs = _frame_of(triage_result, "pairs", _PAIR_COLUMNS)
    _check_members(pairs, ["feature_a", "feature_b"], known, "pairs")
    strength = _check_strength(pairs, "pairs")
    verdict_in = pairs["verdict"].isin(verdicts).to_numpy()
    supported = verdict_in & (strength >= min_strength)
    notes = []
    if (verdict_in & ~supported).any():
        notes.append(f"{int((verdict_in & ~supported).sum())} pair(s) with verdict in {list(verdicts)} were left out "
                     f"for strength below min_strength = {min_strength:g}.")
    edges = {tuple(sorted((known[str(a)], known[str(b)])))
             for a, b in zip(pairs["feature_a"][supported], pairs["feature_b"][supported], strict=True) if a != b}
    return edges, notes


def _triple_edges(triage_result: Any, known: dict[str, int], names: Sequence[str], verdicts: tuple[str, ...],
                  min_strength: float, edges: set[tuple[int, int]]) -> tuple[set[tuple[int, int]], list[str]]:
    """``edges`` plus the pairs of every supported triple (so it lies within one group), and a note per triple."""
    triples = _frame_of(triage_result, "triples", _TRIPLE_COLUMNS, allow_missing=True)
    edges, notes = set(edges), []
    if triples.empty:
        return edges, notes
    _check_members(triples, ["feature_a", "feature_b", "feature_c"], known, "triples")
    strength = _check_strength(triples, "triples")
    chosen = triples["verdict"].isin(verdicts).to_numpy() & (strength >= min_strength)
    for a, b, c in triples.loc[chosen, ["feature_a", "feature_b", "feature_c"]].itertuples(index=False):
        members = sorted({known[str(a)], known[str(b)], known[str(c)]})
        missing = [pair for pair in combinations(members, 2) if pair not in edges]
        if missing:
            edges.update(missing)
            notes.append(f"The triple ({', '.join(names[j] for j in members)}) is supported, so its pair(s) "
                         f"{_named(missing, names)} were added to keep it within one group.")
    return edges, notes


def _disjoint_alternative(graph: nx.Graph, cliques: list[list[int]], edges: set[tuple[int, int]],
                          names: Sequence[str]) -> tuple[list[list[str]] | None, list[str]]:
    """When cliques overlap: the connected components as disjoint groups, and notes on what they allow."""
    member_count = np.bincount([j for group in cliques for j in group], minlength=len(names))
    if not (member_count > 1).any():
        return None, []
    shared = [names[j] for j in np.flatnonzero(member_count > 1)]
    components = _group_order([list(c) for c in nx.connected_components(graph)], names)
    extra = _pairs_outside(components, edges)
    notes = [f"Groups overlap in {', '.join(shared)}. XGBoost 3.2.0 and LightGBM 4.7.0 keep each path "
             "inside one group, so they allow exactly the supported pairs.",
             "The non-overlapping alternative (connected components) forbids no supported pair but allows "
             f"{len(extra)} unsupported pair(s): {_named(extra, names)}."]
    return [[names[j] for j in group] for group in components], notes


def suggest_constraints(
    triage_result: Any,
    *,
    include: str | Sequence[str] = "interaction",
    min_strength: float = 0.0,
) -> ConstraintSuggestion:
    """Feature groups allowed to interact, from the triaged pairs and triples.

    Parameters
    ----------
    triage_result : triage result
        Needs ``pairs`` (``feature_a``, ``feature_b``, ``verdict``,
        ``strength``), ``features`` (``feature``, ``used``, ...), ``ensemble``
        and optionally ``triples`` (``feature_a``, ``feature_b``,
        ``feature_c``, ``verdict``, ``strength``).
    include : str or sequence of str, default "interaction"
        Verdicts that make a pair (or triple) supported.
    min_strength : float, default 0.0
        Supported pairs and triples also need ``strength >= min_strength``.

    Returns
    -------
    ConstraintSuggestion

    Raises
    ------
    DataError
        For an invalid option, a missing table or column, a negative or
        missing strength, or a row naming an unknown feature.

    Notes
    -----
    Let ``E`` be the supported pairs and ``U`` the used features
    (``features.used``). Every supported triple ``{a, b, c}`` adds its three
    pairs to ``E`` (so that it lies within one group; a note names the edges
    added). The groups are the maximal cliques of the graph ``(U + members
    of E, E)`` (Bron and Kerbosch [1]_, ``networkx.find_cliques``): every pair
    within a group is in ``E``, and every pair in ``E`` lies in some group. A
    used feature with no supported partner is a clique of one. Features not
    used by the model are listed in ``unused`` and exported as singletons, so
    XGBoost (which uses unlisted features alone) and LightGBM (which never
    uses unlisted features) treat them alike.

    Cliques may overlap. XGBoost 3.2.0 and LightGBM 4.7.0 both keep each
    path inside one group (see the module docstring), so overlapping groups
    allow exactly the supported pairs; note though that a group of three or
    more also allows higher-order interactions among its members that only
    pairwise evidence supports. For tools or versions that enforce
    overlapping groups differently, ``alternative`` gives disjoint groups:
    the connected components of ``E``. They are enforced exactly everywhere
    and forbid no supported pair, but allow every pair within a component,
    including unsupported ones (named in ``notes``). Disjoint groups from
    dropping the weaker edges instead would forbid supported pairs; that
    option is not offered.

    References
    ----------
    .. [1] C. Bron and J. Kerbosch, "Algorithm 457: finding all cliques of an
       undirected graph", Communications of the ACM 16(9), 575-577, 1973.

    Examples
    --------
    >>> import pandas as pd
    >>> from types import SimpleNamespace
    >>> from treeprobe.graph import ForestGraph
    >>> names = ["fuel_price", "shift_length", "crew_size"]
    >>> ens = ForestGraph.from_arrays(feature=[0, -1, -1], threshold=[0.5, 0, 0], left=[1, -1, -1],
    ...     right=[2, -1, -1], value=[0, 1.0, 2.0], tree_offsets=[0, 3], feature_names=names)
    >>> result = SimpleNamespace(ensemble=ens,
    ...     features=pd.DataFrame({"feature": names, "gain": [3.0, 1.0, 0.0], "splits": [4, 2, 0],
    ...                            "h2_rest": [0.2, 0.1, 0.0], "used": [True, True, False]}),
    ...     pairs=pd.DataFrame({"feature_a": ["fuel_price"], "feature_b": ["shift_length"],
    ...                         "verdict": ["interaction"], "strength": [0.4]}))
    >>> suggestion = suggest_constraints(result)
    >>> suggestion.groups, suggestion.unused, suggestion.xgboost_param
    ([['fuel_price', 'shift_length']], ['crew_size'], '[[0, 1], [2]]')
    """
    verdicts = _check_include(include)
    min_strength = check_float("min_strength", min_strength, low=0.0)
    names = _feature_names(triage_result)
    known = {name: j for j, name in enumerate(names)}
    used = _used_features(triage_result, known)
    edges, notes = _supported_pairs(triage_result, known, verdicts, min_strength)
    edges, triple_notes = _triple_edges(triage_result, known, names, verdicts, min_strength, edges)
    graph = nx.Graph()
    graph.add_nodes_from(sorted(used | {j for edge in edges for j in edge}))
    graph.add_edges_from(edges)
    cliques = _group_order([list(c) for c in nx.find_cliques(graph)], names)
    alternative, overlap_notes = _disjoint_alternative(graph, cliques, edges, names)
    additive_note = [] if edges else ["No pair is supported: every used feature is its own group (an additive model)."]
    unused = [j for j in range(len(names)) if j not in graph]
    export = cliques + [[j] for j in unused]
    model = triage_result.ensemble
    return ConstraintSuggestion(
        groups=[[names[j] for j in group] for group in cliques],
        group_indices=cliques,
        unused=[names[j] for j in unused],
        overlapping=alternative is not None,
        notes=notes + triple_notes + additive_note + overlap_notes,
        xgboost_param=xgboost_constraint_text(export),
        xgboost_param_by_name=[[names[j] for j in group] for group in export],
        lightgbm_param=[list(group) for group in export],
        alternative=alternative,
        feature_names=tuple(names),
        library=model.library,
        objective=model.objective,
        estimator=_estimator_name(model),
    )


# --------------------------------------------------------------------- validation by retraining


def _index_groups(groups: Any, columns: tuple[str, ...]) -> list[list[int]]:
    """Groups as sorted index lists; features listed nowhere are appended as singletons."""
    if isinstance(groups, ConstraintSuggestion):
        groups = groups.xgboost_param_by_name
    if isinstance(groups, (str, bytes)) or not isinstance(groups, Sequence) or len(groups) == 0:
        raise DataError(f"groups must be a non-empty list of feature groups (lists of names or indices), got {groups!r}")
    out = index_groups(groups, columns, indices=True)
    listed = {j for group in out for j in group}
    return out + [[j] for j in range(len(columns)) if j not in listed]


def _t_quantile(degrees: int) -> float:
    return float(student_t.ppf(0.975, degrees))


def _corrected_interval(differences: np.ndarray, test_to_train: float) -> tuple[float, float]:
    """95% interval of the mean paired difference by the corrected resampled t-test (Nadeau and Bengio 2003).

    ``mean +/- t(0.975, K - 1) * sqrt((1/K + n_test/n_train) * sd^2)``, where
    ``sd^2`` is the sample variance of the K fold differences. The naive
    paired interval uses ``sd^2 / K``; the added ``n_test/n_train`` accounts
    for the overlap of the training parts.
    """
    mean = float(differences.mean())
    half = _t_quantile(len(differences) - 1) * corrected_standard_error(differences, test_to_train)
    return mean - half, mean + half


def corrected_standard_error(values: np.ndarray, test_to_train: float) -> float:
    """Standard error of a mean over K folds by the corrected variance of Nadeau and Bengio (2003, section 4).

    ``sqrt((1/K + n_test/n_train) * s^2)`` with ``s^2`` the sample variance of
    the K values: the naive ``s^2 / K`` ignores that the folds' training parts overlap.
    """
    return math.sqrt((1.0 / len(values) + test_to_train) * float(np.var(values, ddof=1)))


def fold_size_ratio(splits: Sequence[tuple[int, np.ndarray, np.ndarray]]) -> float:
    """Mean ``n_test / n_train`` over the folds of :func:`fold_splits`."""
    return float(np.mean([len(test) / len(train) for _, train, test in splits]))


@dataclass(frozen=True, eq=False)
class ValidationResult:
    """Cross-validated cost of interaction constraints, and a check of the constrained refit.

    Attributes
    ----------
    folds : DataFrame
        One row per (fold, metric): ``fold`` (1..K), ``metric`` ("rmse",
        "log_loss" or "auc"), ``unconstrained``, ``constrained`` (held-out
        scores), ``difference`` = constrained - unconstrained, and
        ``unconstrained_rounds``, ``constrained_rounds`` (each variant's best
        round count under early stopping in that fold).
    summary : dict
        Per metric (key = metric name): ``unconstrained_mean``,
        ``constrained_mean``, ``difference_mean``, ``difference_sd`` (sample
        standard deviation over folds), ``difference_low`` and
        ``difference_high`` (95% interval of the mean paired difference by the
        corrected resampled t-test), ``relative_change`` (``difference_mean /
        unconstrained_mean``); plus ``library``, ``objective``, ``task``,
        ``num_boost_round`` (the model's), ``max_rounds``, ``patience``,
        ``inner_fraction`` (early stopping), ``recommended_rounds``,
        ``variance_factor`` (``1/K + n_test/n_train``), ``params``,
        ``groups``, ``n_folds``, ``n_rows``, ``stray_paths`` and ``notes``
        (the first note says whether the groups help, hurt, or make no clear
        difference).
    cross_group_pairs : list of (str, str)
        Pairs that share a path of the constrained refit (all data) but no
        group. Empty when the library enforced the groups.
    stray_paths : list of list of str
        Feature sets of refit paths contained in no single group (catches a
        path holding three features whose pairs each share some group).
    recommended_rounds : int
        Median best round count of the constrained variant over the folds:
        the ``num_boost_round`` to train the constrained model with
        (:meth:`ConstraintSuggestion.python_snippet` prints it).

    Results compare by value (``folds`` with :meth:`pandas.DataFrame.equals`).
    """

    folds: pd.DataFrame
    summary: dict
    cross_group_pairs: list[tuple[str, str]]
    stray_paths: list[list[str]]
    recommended_rounds: int = 0

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, ValidationResult):
            return NotImplemented
        return (self.folds.equals(other.folds) and self.summary == other.summary
                and self.cross_group_pairs == other.cross_group_pairs and self.stray_paths == other.stray_paths
                and self.recommended_rounds == other.recommended_rounds)

    __hash__ = None  # type: ignore[assignment]

    def to_dict(self) -> dict:
        """JSON-ready dict: ``schema``, ``limits``, ``folds`` (rows), ``summary``, ``cross_group_pairs``,
        ``stray_paths``, ``recommended_rounds``."""
        return to_jsonable({
            "schema": _VALIDATION_SCHEMA, "limits": LIMITS, "folds": self.folds, "summary": self.summary,
            "cross_group_pairs": [list(p) for p in self.cross_group_pairs], "stray_paths": self.stray_paths,
            "recommended_rounds": self.recommended_rounds,
        })


def _validation_recipe(model_or_params: Any, *, library: str | None, params: dict | None,
                       num_boost_round: int | None) -> tuple[Recipe, ForestGraph | None]:
    """The recipe of every validation fit (a family without constraints replaced by its nearest one) and the graph."""
    source = model_or_params if isinstance(model_or_params, dict) else load_model(model_or_params)
    recipe = training_recipe(source, live_model=live_model_of(model_or_params), params=params, library=library,
                             num_boost_round=num_boost_round)
    if recipe.objective == "binary:hinge":
        raise UnsupportedModelError("validate_constraints scores probabilities; binary:hinge predicts labels only")
    return constrained_substitute(recipe), (None if isinstance(source, dict) else source)


def _class_count(recipe: Recipe, target: np.ndarray) -> tuple[Recipe, int]:
    """Classes scored (2 for binary and regression), and the recipe with ``num_class`` set for a multiclass fit."""
    if recipe.task != MULTICLASS:
        return recipe, 2
    if recipe.library == "sklearn":
        return recipe, max(recipe.n_classes, int(target.max()) + 1)
    count = int(recipe.params.get("num_class", int(target.max()) + 1))
    return replace(recipe, params={**recipe.params, "num_class": count}), count


@dataclass(frozen=True)
class FoldContext:
    """What every fold's fits share (sent once to each worker)."""

    recipe: Recipe
    matrix: np.ndarray
    target: np.ndarray
    groups: list[list[int]]
    n_classes: int
    random_state: int
    threads: int


def _variant_scores(context: FoldContext, chosen: list[list[int]] | None, train: np.ndarray, test: np.ndarray,
                    seed: int) -> tuple[dict[str, float], int]:
    """Held-out scores of one variant, early-stopped on an inner split of the training part, and its best rounds."""
    model, best_rounds = fit_early_stopped(context.recipe, context.matrix[train], context.target[train], groups=chosen,
                                           threads=context.threads, seed=seed)
    predicted = predict_response(context.recipe, model, context.matrix[test])
    return loss_scores(context.recipe.task, context.target[test], predicted, context.n_classes), best_rounds


def fold_splits(context: FoldContext, folds: int) -> list[tuple[int, np.ndarray, np.ndarray]]:
    """Outer folds ``(fold, train rows, test rows)`` numbered 1..K, seeded shuffle, stratified for classifiers."""
    task = context.recipe.task
    splitter = (StratifiedKFold if task != REGRESSION else KFold)(n_splits=folds, shuffle=True,
                                                                   random_state=context.random_state)
    labels = context.target.astype(int) if task != REGRESSION else None
    return [(fold, train, test) for fold, (train, test) in enumerate(splitter.split(context.matrix, labels), start=1)]


# A variant's groups (None: unconstrained) and one outer fold (fold number, train rows, test rows).
FoldTask = tuple[list[list[int]] | None, tuple[int, np.ndarray, np.ndarray]]


def _variant_on_fold(context: FoldContext, task: FoldTask) -> tuple[dict, int]:
    groups, (fold, train, test) = task
    return _variant_scores(context, groups, train, test, context.random_state + fold)


def cross_validated_scores(context: FoldContext, tasks: Sequence[FoldTask], *, n_jobs: int, progress: bool | None,
                           label: str = "constraint folds") -> list[tuple[dict, int]]:
    """Held-out scores and best round count of each task: a variant (groups, or None: unconstrained) on one split.

    One early-stopped fit per task, all through :func:`treeprobe.parallel.run_tasks`.
    Every variant uses the fold's seed (``random_state + fold``) for its inner
    early-stopping split, so variants on a fold differ by their groups only.
    """
    return run_tasks(partial(_variant_on_fold, context), tasks, n_jobs=n_jobs, label=label, progress=progress)


def _fold_scores(context: FoldContext, *, folds: int, n_jobs: int,
                 progress: bool | None) -> tuple[pd.DataFrame, float]:
    """Held-out scores and best rounds of both variants on each fold (numbered 1..K), and mean n_test / n_train."""
    items = fold_splits(context, folds)
    results = cross_validated_scores(context, [(groups, split) for split in items for groups in (None, context.groups)],
                                     n_jobs=n_jobs, progress=progress)
    rows = [{"fold": fold, "metric": metric, "unconstrained": free_scores[metric], "constrained": bound_scores[metric],
             "difference": bound_scores[metric] - free_scores[metric], "unconstrained_rounds": free_rounds,
             "constrained_rounds": bound_rounds}
            for (fold, _, _), (free_scores, free_rounds), (bound_scores, bound_rounds)
            in zip(items, results[0::2], results[1::2], strict=True) for metric in free_scores]
    return pd.DataFrame(rows, columns=list(_FOLD_COLUMNS)), fold_size_ratio(items)


def _budget_notes(per_fold: pd.DataFrame, budget: int) -> list[str]:
    """A note per variant whose best round count reached the budget in some fold (it may need more rounds)."""
    notes = []
    for label in ("unconstrained", "constrained"):
        capped = int((per_fold[f"{label}_rounds"] >= budget).sum())
        if capped:
            notes.append(f"The {label} variant was still improving at the round budget ({budget}) in {capped} "
                         "fold(s); its loss may be overstated.")
    return notes


def _paired_summary(table: pd.DataFrame, test_to_train: float) -> dict[str, dict[str, float]]:
    """Per metric: means, the mean paired difference, its sd and corrected 95% interval, and the relative change."""
    summary = {}
    for metric, part in table.groupby("metric", sort=False):
        difference = part["difference"].to_numpy()
        low, high = _corrected_interval(difference, test_to_train)
        free_mean = float(part["unconstrained"].mean())
        mean = float(difference.mean())
        summary[str(metric)] = {
            "unconstrained_mean": free_mean, "constrained_mean": float(part["constrained"].mean()),
            "difference_mean": mean, "difference_sd": float(difference.std(ddof=1)), "difference_low": low,
            "difference_high": high, "relative_change": mean / free_mean if free_mean != 0 else math.nan,
        }
    return summary


def _forbidden_pairs(groups: list[list[int]], columns: tuple[str, ...], triage_result: Any) -> list[tuple[str, str]]:
    """Pairs that share no group, strongest first by the triage's ``strength`` when a triage result is given."""
    within = {pair for group in groups for pair in combinations(sorted(group), 2)}
    forbidden = [(columns[a], columns[b]) for a, b in combinations(range(len(columns)), 2) if (a, b) not in within]
    if triage_result is None:
        return forbidden
    pairs = _frame_of(triage_result, "pairs", _PAIR_COLUMNS)
    strength = dict(zip(map(frozenset, zip(pairs["feature_a"].astype(str), pairs["feature_b"].astype(str),
                                           strict=True)), _check_strength(pairs, "pairs"), strict=True))
    return sorted(forbidden, key=lambda pair: -strength.get(frozenset(pair), 0.0))


def _outcome_note(summary: dict, groups: list[list[int]], columns: tuple[str, ...], triage_result: Any) -> str:
    """One sentence: whether the groups help, hurt or make no clear difference on the loss (rmse or log-loss)."""
    metric = "rmse" if "rmse" in summary else "log_loss"
    part = summary[metric]
    interval = (f"mean {metric} difference constrained - unconstrained {part['difference_mean']:+.4g}, 95% corrected "
                f"interval [{part['difference_low']:+.4g}, {part['difference_high']:+.4g}], "
                f"relative change {part['relative_change']:+.1%}")
    if part["difference_high"] < 0:
        return f"The groups help: the constrained model's held-out {metric} is lower ({interval})."
    if part["difference_low"] <= 0:
        return f"No clear difference between the constrained and the unconstrained model ({interval})."
    forbidden = _forbidden_pairs(groups, columns, triage_result)
    ranked = "strongest by triage strength" if triage_result is not None else "in feature order"
    named = ", ".join(f"({a}, {b})" for a, b in forbidden[:_PAIRS_NAMED])
    more = f" and {len(forbidden) - _PAIRS_NAMED} more" if len(forbidden) > _PAIRS_NAMED else ""
    return (f"The groups measurably hurt: the constrained model's held-out {metric} is higher ({interval}). "
            f"The groups forbid {len(forbidden)} pair(s), {ranked}: {named}{more}; the cost most likely lies there.")


def validate_constraints(
    model_or_params: Any,
    X: Any,
    y: Any,
    groups: Any,
    *,
    folds: int = 5,
    library: str | None = None,
    params: dict | None = None,
    num_boost_round: int | None = None,
    random_state: int = 0,
    n_jobs: int = 1,
    progress: bool | None = None,
    triage_result: Any = None,
) -> ValidationResult:
    """Cross-validated loss of the same model with and without interaction constraints.

    Parameters
    ----------
    model_or_params : model, model file, ForestGraph or dict
        An XGBoost or LightGBM model (object or saved file) whose library,
        objective and hyperparameters are reused, or a dict of native training
        parameters (then ``library`` and ``num_boost_round`` are required).
    X : DataFrame or array of shape (n_rows, n_features)
        Training data; a DataFrame is matched to the model's columns by name.
        Numeric features only; NaN is passed to the library as missing.
    y : array of shape (n_rows,)
        Target: numbers for regression, class codes 0..k-1 for classification.
    groups : list of lists of str or int, or ConstraintSuggestion
        Feature groups by name or index. Features in no group are added as
        singletons (so LightGBM, which drops unlisted features, and XGBoost,
        which keeps them alone, agree).
    folds : int, default 5
        Number of cross-validation folds (>= 2); stratified for classification.
    library : {"xgboost", "lightgbm"}, optional
        Needed with a parameter dict; otherwise read from the model.
    params : dict, optional
        Native parameters of ``xgboost.train`` / ``lightgbm.train`` that
        override or supply the ones read from the model (e.g. ``eta``,
        ``max_depth`` for a saved XGBoost model, which does not store them).
        ``interaction_constraints`` is not allowed here (pass ``groups``).
    num_boost_round : int, optional
        The model's boosting rounds; default read from the model (trees /
        outputs / parallel trees). Sets the early-stopping budget.
    random_state : int, default 0
        Seed of the fold split and of the libraries' sampling.
    n_jobs : int, default 1
        Parallel workers for the folds (joblib; -1 = all cores). With 1 the
        folds run one after another and each fit uses every core; with more,
        each fit uses one thread (never threads x workers). Inside joblib's
        Dask backend the folds run on the cluster's workers.
    progress : bool, optional
        Progress bar over folds on standard error; default: only on a terminal.
    triage_result : triage result, optional
        When given, its ``pairs`` (``feature_a``, ``feature_b``, ``strength``)
        rank the forbidden pairs named when the groups measurably hurt.

    Returns
    -------
    ValidationResult

    Raises
    ------
    ParameterError
        An option outside what it accepts (the message names it).
    DataError
        Groups naming unknown features, X or y not matching the model.
    UnsupportedModelError
        A scikit-learn model, categorical splits, or a ranking objective.
    MissingLibraryError
        xgboost or lightgbm is not installed.

    Notes
    -----
    Hyperparameters: from a LightGBM model, its stored training parameters
    (tree shape, objective, sampling, regularisation); from a live XGBoost
    booster, its configuration (``save_config``); from a saved XGBoost file
    only the objective, ``num_class`` and ``num_parallel_tree`` (the format
    keeps no training parameters), with ``max_depth`` set to the deepest leaf
    found. The intercept (``base_score``) is left for each fit to estimate
    from its own training folds rather than copied from the full-data model.

    Each variant is compared at its own best round count: a model with
    many groups needs more rounds than the unconstrained one. In each outer
    fold, each variant (unconstrained, constrained) is fitted on a seeded
    80/20 inner split of the training part (:func:`treeprobe.refit.fit_early_stopped`;
    both variants share the split), with early stopping on the 20% after
    50 rounds without improvement of the library's default metric, up to
    ``max(8 * num_boost_round, 200)`` rounds. That inner-split model, cut at
    its best round count, is scored on the outer fold (no refit on the full
    training part). The constrained refit on all rows, walked for
    cross-group paths, uses ``recommended_rounds`` (median best rounds of the
    constrained variant).

    Per fold ``k`` with held-out score ``s``: ``d_k = s_constrained -
    s_unconstrained``, mean ``d`` and sample variance ``sd^2`` over the K
    folds. Fold scores share training rows, so the naive paired interval
    ``d +/- t(0.975, K - 1) sd / sqrt(K)`` is too narrow. Reported is the
    corrected resampled t-test of Nadeau and Bengio [1]_ (their corrected
    variance estimate, section 4, applied to K-fold differences):

    ``d +/- t(0.975, K - 1) * sqrt((1/K + n_test/n_train) * sd^2)``

    with ``n_test/n_train`` the mean ratio of outer-fold sizes (about
    ``1/(K - 1)``). The first note reads "the groups help" only when the
    whole interval lies below zero (lower loss), "no clear difference" when
    it spans zero, and "the groups measurably hurt" (naming the forbidden
    pairs) when it lies above zero. The interval is still approximate: the
    correction is a heuristic under the assumption of its paper, not exact.

    References
    ----------
    .. [1] C. Nadeau and Y. Bengio, "Inference for the generalization error",
       Machine Learning 52(3), 239-281, 2003.
    """
    folds = check_int("folds", folds, low=2)
    n_jobs = check_n_jobs(n_jobs)
    num_boost_round = check_int("num_boost_round", num_boost_round, low=1, allow_none=True)
    random_state = check_seed("random_state", random_state, allow_none=False)
    library = check_choice("library", library, (*LIBRARIES, None))
    progress = check_progress(progress)
    if params is not None and not isinstance(params, dict):
        raise ParameterError(f"params must be a dict of training parameters, got {type(params).__name__}")
    if params and ({"interaction_constraints", "interaction_cst"} & params.keys()):
        raise ParameterError("params must not hold interaction constraints; pass the groups as groups=")
    if triage_result is not None:
        _frame_of(triage_result, "pairs", _PAIR_COLUMNS)
    recipe, graph = _validation_recipe(model_or_params, library=library, params=params, num_boost_round=num_boost_round)
    if graph is None:
        matrix, target, columns = design_matrix(X, y, None)
    else:
        matrix, columns = model_matrix(graph, X), graph.feature_names
        target = checked_target(y, matrix.shape[0], recipe.task)
        recipe = calibrate_step(recipe, graph, matrix, target, seed=random_state)
    index_groups = _index_groups(groups, columns)
    recipe, n_classes = _class_count(recipe, target)
    if matrix.shape[0] < 2 * folds:
        raise DataError(f"X has {matrix.shape[0]} rows, too few for {folds} folds")
    context = FoldContext(recipe, matrix, target, index_groups, n_classes, random_state, threads_per_fit(n_jobs))
    table, test_to_train = _fold_scores(context, folds=folds, n_jobs=n_jobs, progress=progress)
    per_fold = table.drop_duplicates("fold")
    recommended = int(round(float(np.median(per_fold["constrained_rounds"]))))
    refit = load_model(fit(recipe, matrix, target, groups=index_groups, rounds=recommended, threads=0,
                           seed=random_state), feature_names=columns)
    crossing, stray = _cross_group(refit, index_groups, columns)
    summary: dict[str, Any] = _paired_summary(table, test_to_train)
    notes = [_outcome_note(summary, index_groups, columns, triage_result), *recipe.notes, recipe.describe(),
             *_budget_notes(per_fold, round_budget(recipe))]
    if crossing or stray:
        notes.append(f"The constrained refit has {len(stray)} path feature set(s) outside every group; "
                     f"pairs crossing groups: {', '.join(f'({a}, {b})' for a, b in crossing) or 'none'}.")
    summary.update({
        "library": recipe.library, "family": recipe.family, "objective": recipe.objective, "task": recipe.task,
        "num_boost_round": recipe.rounds, "max_rounds": round_budget(recipe), "patience": PATIENCE,
        "inner_fraction": INNER_FRACTION, "recommended_rounds": recommended,
        "variance_factor": 1.0 / folds + test_to_train, "params": dict(recipe.params), "recipe": recipe.to_dict(),
        "threads_per_fit": context.threads, "groups": [[columns[j] for j in g] for g in index_groups],
        "n_folds": folds, "n_rows": int(matrix.shape[0]), "stray_paths": len(stray), "notes": notes,
        "class_scored": "all classes (multiclass log-loss)" if recipe.task == MULTICLASS else None,
    })
    return ValidationResult(folds=table, summary=summary, cross_group_pairs=crossing, stray_paths=stray,
                            recommended_rounds=recommended)
