"""Interaction policy: does a fitted model keep the feature groups and forbidden pairs a team decided on?

A tree ensemble can only make features interact that meet on one
root-to-leaf path: a leaf's value is a function of the features split on
above it ([1]_, section 5; [2]_, section 8). So a rule "these features may only
interact within their group" or "this feature never interacts with anything"
is checked exactly, from the model file alone, by walking every path:

* a *group policy* holds when every path's feature set lies inside one group
  (features listed in no group may be used, but only alone). This is how
  XGBoost and LightGBM enforce ``interaction_constraints`` ([3]_, [4]_; for
  overlapping groups measured in :mod:`treeprobe.constraints`);
* a *forbidden pair* ``a:b`` holds when no path splits on both ``a`` and
  ``b``; ``a:*`` forbids ``a`` from sharing a path with any other feature.

No data, no training library and no network are needed: the file is parsed
by :func:`treeprobe.load_model`. This module is also the one place that decides
which paths cross a set of groups; :mod:`treeprobe.constraints` uses it to check
a constrained refit.

Limits
------
A path that combines two features lets the model make them interact; whether
the prediction then varies jointly in them is measured by the H-statistic
(:mod:`treeprobe.measure`). A clean check is exact in the other direction:
two features that never share a path have no interaction in this model
(H = 0). Either way it describes the model, not the world.

References
----------
.. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", The Annals of Applied Statistics 2(3), 916-954, 2008.
.. [2] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", The Annals of Statistics 29(5), 1189-1232, 2001.
.. [3] T. Chen and C. Guestrin, "XGBoost: a scalable tree boosting system",
   KDD 2016; XGBoost documentation, "Feature Interaction Constraints".
.. [4] G. Ke et al., "LightGBM: a highly efficient gradient boosting decision
   tree", NeurIPS 2017; LightGBM parameter ``interaction_constraints``.
"""

from __future__ import annotations

import json
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .cautions import DECISIONS_ABOUT_PEOPLE
from .checks import close_name
from .cooccurrence import structure
from .errors import DataError, ParameterError, TreeprobeError
from .graph import ForestGraph
from .io import load_model
from .output import dumps_json, to_jsonable
from .paths import path_set_counts

__all__ = [
    "PolicyResult",
    "check_constraints",
    "read_groups",
    "index_groups",
    "parse_forbidden",
    "paths_outside_groups",
    "VIOLATION_COLUMNS",
    "ANY_FEATURE",
    "LIMITS",
]

ANY_FEATURE = "*"
VIOLATION_COLUMNS = ("kind", "features", "rule", "paths", "trees", "first_tree")
LIMITS = (
    "The check reads the trees: a path that combines features lets the model make them interact, and features that "
    "never share a path cannot interact in this model (H = 0). It describes the model, not the world. "
    + DECISIONS_ABOUT_PEOPLE
)
_SCHEMA = "treeprobe.policy/1"
_CROSSING_RULE = "no group holds both"
_STRAY_RULE = "no single group holds the whole set"


# --------------------------------------------------------------------- reading a policy
def _close_match(name: str, names: Sequence[str]) -> str:
    close = close_name(name, names)
    return f"; did you mean {close!r}?" if close else ""


def _feature_index(name: Any, names: Sequence[str], where: str) -> int:
    """Index of a feature named in the policy; one-line DataError with a close match when the model lacks it."""
    if not isinstance(name, str) or not name:
        raise DataError(f"{where}: expected a feature name, found {name!r}")
    try:
        return list(names).index(name)
    except ValueError:
        raise DataError(f"{where}: the model has no feature {name!r}{_close_match(name, names)} "
                        f"(it has {len(names)}: {', '.join(names[:8])}{' ...' if len(names) > 8 else ''})") from None


def _groups_from_json(content: Any, where: str) -> Any:
    """The group list inside what ``constrain --format json`` writes, a search's or a suggestion's JSON, or a list.

    When the JSON holds a search (``constrain --search``), its chosen groups are
    the recommendation the command printed, so they win over the suggestion
    from verdicts that the same file also carries.
    """
    if isinstance(content, dict):
        search = content.get("search")
        if isinstance(search, dict) and isinstance(search.get("chosen"), dict):
            content = search["chosen"]
        elif isinstance(content.get("suggestion"), dict):
            content = content["suggestion"]
        if "groups" not in content:
            raise DataError(f"{where}: expected a list of feature groups or the JSON of treeprobe constrain "
                            f"(with 'groups'), found an object with keys {', '.join(map(str, content)) or 'none'}")
        return content["groups"]
    return content


def _read_json(path: str | os.PathLike) -> Any:
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise TreeprobeError(f"{path}: cannot read the groups file ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise DataError(f"{path}: not a UTF-8 text file; expected JSON") from None
    try:
        return json.loads(text)
    except ValueError as exc:
        raise DataError(f"{path}: not valid JSON ({exc})") from None


def read_groups(source: Any) -> list[list[str]]:
    """Feature groups of a policy, by name, from a JSON file or an object.

    Parameters
    ----------
    source : str, path, list of lists of str, dict or ConstraintSuggestion
        A JSON file holding a list of lists of feature names, or the JSON
        that ``treeprobe constrain --format json`` writes (schema
        ``treeprobe.constrain/2``; its ``search.chosen.groups`` when it ran
        with ``--search``, else its ``suggestion.groups``), a search's own
        JSON (``treeprobe.search/1``) or a suggestion's
        (``treeprobe.constraints/2``); or the same already parsed, or an
        object with a ``groups`` attribute (a search result: its
        ``chosen_groups``).

    Returns
    -------
    list of list of str
        The groups as given (not yet checked against a model).

    Raises
    ------
    DataError
        Not valid JSON, or not a list of non-empty lists of names (the
        message names the file and the group).
    TreeprobeError
        The file cannot be read.

    Examples
    --------
    >>> read_groups({"schema": "treeprobe.constrain/2", "suggestion": {"groups": [["fuel_price", "shift_length"]]}})
    [['fuel_price', 'shift_length']]
    """
    where = "groups"
    if isinstance(source, (str, os.PathLike)):
        where, source = str(source), _read_json(source)
    elif not isinstance(source, (list, tuple, dict)) and isinstance(getattr(source, "chosen_groups", None), list):
        source = source.chosen_groups
    elif not isinstance(source, (list, tuple, dict)) and isinstance(getattr(source, "groups", None), list):
        source = source.groups
    groups = _groups_from_json(source, where)
    if not isinstance(groups, (list, tuple)):
        raise DataError(f"{where}: expected a list of feature groups (lists of names), found {type(groups).__name__}")
    out = []
    for g, group in enumerate(groups):
        if not isinstance(group, (list, tuple)) or not group:
            raise DataError(f"{where}: group {g} must be a non-empty list of feature names, found {group!r}")
        for member in group:
            if not isinstance(member, str) or not member:
                raise DataError(f"{where}: group {g} holds {member!r}; give feature names (indices are ambiguous "
                                "between libraries)")
        out.append(list(group))
    return out


def _forbidden_item(item: str, name: str) -> tuple[str, str]:
    parts = [part.strip() for part in item.split(":")]
    if len(parts) != 2 or not all(parts):
        raise ParameterError(f"{name} expects name:name or name:* items separated by commas, got {item!r}")
    return parts[0], parts[1]


def parse_forbidden(forbid: str | Sequence[Sequence[str]] | None, *, name: str = "forbid") -> list[tuple[str, str]]:
    """Forbidden pairs from ``"a:b,c:*"`` text or a sequence of pairs; ``*`` stands for any feature.

    ``name`` is the option named in errors (``--forbid`` on the command line).

    Raises
    ------
    ParameterError
        A malformed item (the message quotes it), or a feature paired with itself.

    Examples
    --------
    >>> parse_forbidden("postcode:*, age:income")
    [('postcode', '*'), ('age', 'income')]
    """
    if forbid is None:
        return []
    if isinstance(forbid, str):
        pairs = [_forbidden_item(item.strip(), name) for item in forbid.split(",") if item.strip()]
        if not pairs:
            raise ParameterError(f"{name} is empty; give pairs such as age:income or postcode:*")
    elif isinstance(forbid, Sequence):
        pairs = []
        for item in forbid:
            if (isinstance(item, str) or not isinstance(item, Sequence) or len(item) != 2
                    or not all(isinstance(n, str) and n for n in item)):
                raise ParameterError(f"{name} must hold pairs of feature names (or '*'), got {item!r}")
            pairs.append((item[0], item[1]))
    else:
        raise ParameterError(f"{name} must be 'a:b,c:*' text or a sequence of name pairs, got {forbid!r}")
    for a, b in pairs:
        if a == b and a != ANY_FEATURE:
            raise ParameterError(f"{name} pairs {a!r} with itself; a pair needs two different features")
    return pairs


# --------------------------------------------------------------------- the path check
def _member_index(member: Any, names: Sequence[str], where: str, indices: bool) -> int:
    if indices and isinstance(member, (int, np.integer)) and not isinstance(member, (bool, np.bool_)):
        if not 0 <= member < len(names):
            raise DataError(f"{where} holds index {member}; the features are 0..{len(names) - 1}")
        return int(member)
    return _feature_index(member, names, where)


def index_groups(groups: Any, names: Sequence[str], *, where: str = "groups", indices: bool = False) -> list[list[int]]:
    """Feature groups as sorted lists of positions in ``names``: the one place groups meet a model's features.

    Members are feature names (``indices=True`` also takes 0-based positions,
    as the Python API does). Every error is one line naming ``where``, the
    group and the member, with a close match for a misspelt name.

    Parameters
    ----------
    groups : sequence of sequences
        The groups, each a non-empty list of feature names (or positions).
    names : sequence of str
        The model's feature names, in column order.
    where : str, default "groups"
        Where the groups came from (a file name, an option), for messages.
    indices : bool, default False
        Accept 0-based positions as members too.

    Returns
    -------
    list of list of int
        Each group's positions, sorted; the groups in the order given.

    Raises
    ------
    DataError
        A group that is empty or not a list, a member the model lacks, a
        position out of range, or a feature listed twice in one group.

    Examples
    --------
    >>> index_groups([["shift_length", "fuel_price"]], ["fuel_price", "shift_length", "crew_size"])
    [[0, 1]]
    """
    if isinstance(groups, (str, bytes)) or not isinstance(groups, Sequence):
        raise DataError(f"{where}: expected a list of feature groups, found {type(groups).__name__}")
    out = []
    for g, group in enumerate(groups):
        if isinstance(group, (str, bytes)) or not isinstance(group, Sequence) or len(group) == 0:
            raise DataError(f"{where}: group {g} must be a non-empty list of feature names, found {group!r}")
        positions = [_member_index(member, names, f"{where}: group {g}", indices) for member in group]
        if len(set(positions)) != len(positions):
            raise DataError(f"{where}: group {g} lists a feature twice: {list(group)!r}")
        out.append(sorted(positions))
    return out


def _membership(groups: list[list[int]], n_features: int) -> np.ndarray:
    """Boolean (groups x features) matrix; every feature is also a group of its own (used alone it is allowed)."""
    membership = np.zeros((len(groups) + n_features, n_features), dtype=bool)
    for g, group in enumerate(groups):
        membership[g, group] = True
    membership[len(groups) + np.arange(n_features), np.arange(n_features)] = True
    return membership


def _within(sets: np.ndarray, membership: np.ndarray) -> np.ndarray:
    """Whether each set (row of a boolean matrix) lies inside at least one group."""
    outside = sets.astype(np.int64) @ (~membership).T.astype(np.int64)
    return (outside == 0).any(axis=1) | (sets.sum(axis=1) <= 1)


def _holds_pair(sets: np.ndarray, pair_matrix: np.ndarray) -> np.ndarray:
    """Whether each set holds two features ``a, b`` with ``pair_matrix[a, b]``."""
    as_int = sets.astype(np.int64)
    return ((as_int @ pair_matrix.astype(np.int64)) * as_int).sum(axis=1) > 0


def paths_outside_groups(graph: ForestGraph, groups: list[list[int]], names: Sequence[str] | None = None
                         ) -> tuple[list[tuple[str, str]], list[list[str]]]:
    """Pairs on a path that no group holds, and path feature sets that no single group holds.

    Parameters
    ----------
    graph : ForestGraph
    groups : list of list of int
        Feature indices; a feature in no group may only be used alone.
    names : sequence of str, optional
        Names to report (default the model's feature names).

    Returns
    -------
    crossing : list of (str, str)
        Sorted pairs sharing a root-to-leaf path but no group.
    stray : list of list of str
        Distinct path feature sets inside no single group (this also catches
        a path holding three features whose pairs each share some group).

    Examples
    --------
    >>> from treeprobe.graph import ForestGraph
    >>> graph = ForestGraph.from_arrays(
    ...     feature=[0, 1, -1, -1, -1], threshold=[0.5, 2.0, 0, 0, 0], left=[1, 2, -1, -1, -1],
    ...     right=[4, 3, -1, -1, -1], value=[0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 5])
    >>> paths_outside_groups(graph, [[0], [1]], ["fuel_price", "shift_length"])
    ([('fuel_price', 'shift_length')], [['fuel_price', 'shift_length']])
    """
    names = tuple(graph.feature_names if names is None else names)
    membership = _membership(groups, graph.n_features)
    allowed = (membership.T.astype(np.int64) @ membership.astype(np.int64)) > 0
    pairs = structure(graph, max_order=2).pairs
    position = {name: j for j, name in enumerate(graph.feature_names)}
    crossing = sorted((names[position[a]], names[position[b]])
                      for a, b in zip(pairs["feature_a"], pairs["feature_b"], strict=True)
                      if not allowed[position[a], position[b]])
    sets = path_set_counts(graph)[0]
    stray = sets[~_within(sets, membership)]
    return crossing, [[names[j] for j in np.flatnonzero(row)] for row in stray]


def _forbidden_matrices(forbidden: list[tuple[str, str]], names: Sequence[str]) -> list[np.ndarray]:
    """One symmetric (features x features) boolean matrix per forbidden rule; ``*`` spans every other feature."""
    n = len(names)
    matrices = []
    for a, b in forbidden:
        where = f"forbid {a}:{b}"
        rows = np.arange(n) if a == ANY_FEATURE else [_feature_index(a, names, where)]
        cols = np.arange(n) if b == ANY_FEATURE else [_feature_index(b, names, where)]
        matrix = np.zeros((n, n), dtype=bool)
        matrix[np.ix_(rows, cols)] = True
        matrix |= matrix.T
        np.fill_diagonal(matrix, False)
        matrices.append(matrix)
    return matrices


def _pair_rows(pairs: pd.DataFrame, position: dict[str, int], allowed: np.ndarray | None,
               rules: list[tuple[str, np.ndarray]]) -> list[dict]:
    rows = []
    for record in pairs.to_dict(orient="records"):
        a, b = position[record["feature_a"]], position[record["feature_b"]]
        broken = [] if allowed is None or allowed[a, b] else [_CROSSING_RULE]
        broken += [f"forbidden {text}" for text, matrix in rules if matrix[a, b]]
        if broken:
            rows.append({"kind": "pair", "features": (record["feature_a"], record["feature_b"]),
                         "rule": "; ".join(broken), "paths": int(record["paths"]), "trees": int(record["trees"]),
                         "first_tree": int(record["first_tree"])})
    return rows


@dataclass(frozen=True, eq=False)
class PolicyResult:
    """Whether a model keeps an interaction policy, and where it does not.

    Attributes
    ----------
    violations : DataFrame
        One row per breach, columns ``VIOLATION_COLUMNS``:

        - ``kind``: "pair" (two features sharing a root-to-leaf path that
          share no group, or that a rule forbids) or "path" (a path feature
          set inside no single group although each of its pairs shares some
          group: possible with overlapping groups);
        - ``features``: tuple of the feature names, in model order;
        - ``rule``: the rule broken ("no group holds both", "forbidden a:*",
          "no single group holds the whole set"; several joined by "; ");
        - ``paths``: leaves whose path splits on every feature of the row
          (for "path" rows: on exactly these features);
        - ``trees``: trees holding such a leaf; ``first_tree``: the smallest
          such tree index.

        Pair rows come first, each kind by ``paths`` descending.
    groups : list of list of str or None
        The groups checked (None when only forbidden pairs were given).
    forbidden : list of (str, str)
        The forbidden pairs as given (``"*"`` kept).
    facts : dict
        ``source``, ``library``, ``n_trees``, ``n_paths`` (leaves walked),
        ``n_path_sets`` (distinct path feature sets), ``n_pairs_on_paths``,
        ``n_paths_breaking`` (leaves whose path breaks the policy),
        ``features_alone`` (used features listed in no group, so allowed
        only alone).
    limits : str
        What the check can and cannot say.
    """

    violations: pd.DataFrame
    groups: list[list[str]] | None
    forbidden: list[tuple[str, str]]
    facts: dict = field(default_factory=dict)
    limits: str = LIMITS

    @property
    def ok(self) -> bool:
        """True when no path breaks the policy."""
        return self.violations.empty

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, PolicyResult):
            return NotImplemented
        return (self.violations.equals(other.violations) and self.groups == other.groups
                and self.forbidden == other.forbidden and self.facts == other.facts)

    __hash__ = None  # type: ignore[assignment]

    def to_dict(self) -> dict:
        """JSON-ready dict: ``schema`` ("treeprobe.policy/1"), ``ok``, ``limits``, ``groups``, ``forbidden``,
        ``facts`` and ``violations`` (rows; ``features`` as a list)."""
        return to_jsonable({"schema": _SCHEMA, "ok": self.ok, "limits": self.limits, "groups": self.groups,
                            "forbidden": [list(pair) for pair in self.forbidden], "facts": self.facts,
                            "violations": self.violations})

    def to_json(self) -> str:
        """:meth:`to_dict` as indented JSON text."""
        return dumps_json(self.to_dict())


def _path_rows(sets: np.ndarray, counts: tuple[np.ndarray, ...], names: Sequence[str]) -> list[dict]:
    leaves, trees, first_tree = counts
    return [{"kind": "path", "features": tuple(names[j] for j in np.flatnonzero(sets[i])), "rule": _STRAY_RULE,
             "paths": int(leaves[i]), "trees": int(trees[i]), "first_tree": int(first_tree[i])}
            for i in range(len(sets))]


def _violation_frame(rows: list[dict]) -> pd.DataFrame:
    frame = pd.DataFrame(rows, columns=list(VIOLATION_COLUMNS))
    frame = frame.astype({"paths": np.int64, "trees": np.int64, "first_tree": np.int64})
    frame["_kind"] = (frame["kind"] == "path").astype(int)
    frame = frame.sort_values(["_kind", "paths"], ascending=[True, False], kind="stable")
    return frame.drop(columns="_kind").reset_index(drop=True)


def check_constraints(
    model: Any,
    groups: Any = None,
    *,
    forbid: str | Sequence[Sequence[str]] | None = None,
) -> PolicyResult:
    """Check every root-to-leaf path of a model against feature groups and forbidden pairs.

    Parameters
    ----------
    model : ForestGraph or anything :func:`treeprobe.load_model` accepts
        The fitted model; a file is parsed without the training library.
    groups : str, path, list of lists of str, dict or ConstraintSuggestion, optional
        Feature groups allowed to interact (see :func:`read_groups`): the
        JSON of ``treeprobe constrain``, or a JSON list of lists of names.
        Features listed in no group may only be used alone.
    forbid : str or sequence of (str, str), optional
        Pairs that must never share a path: ``"a:b,c:*"`` or ``[("a", "b"),
        ("c", "*")]``; ``*`` stands for any feature.

    Returns
    -------
    PolicyResult
        ``ok`` is True when every path keeps the policy.

    Raises
    ------
    ParameterError
        Neither groups nor forbidden pairs, or a malformed ``forbid``.
    DataError
        A group or rule names a feature the model does not have (with the
        closest name the model has), or a groups file that is not a list of
        lists of names.

    Notes
    -----
    With ``F(l)`` the features split on between the root and leaf ``l``, and
    groups ``G_1 .. G_m`` (every unlisted feature a group of its own), the
    policy holds when for every leaf ``F(l)`` is a subset of some ``G_k`` and
    no forbidden pair ``{a, b}`` is a subset of ``F(l)``. Pairs are read
    from :func:`treeprobe.structure` (``paths``, ``trees``, ``first_tree``)
    and whole path sets from :func:`treeprobe.paths.path_set_counts`. A
    feature set that never occurs on a path is an interaction the model
    cannot express ([1]_, eq. 34-35 for the rule form of a path), so H of a
    pair that shares no path is exactly 0.

    References
    ----------
    .. [1] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
       ensembles", The Annals of Applied Statistics 2(3), 916-954, 2008.

    Examples
    --------
    One tree: the root splits on ``fuel_price``, its left child on ``shift_length``.

    >>> from treeprobe.graph import ForestGraph
    >>> ens = ForestGraph.from_arrays(
    ...     feature=[0, 1, -1, -1, -1], threshold=[0.5, 2.0, 0, 0, 0], left=[1, 2, -1, -1, -1],
    ...     right=[4, 3, -1, -1, -1], value=[0, 0, 1.0, 2.0, 3.0], tree_offsets=[0, 5],
    ...     feature_names=["fuel_price", "shift_length", "crew_size"])
    >>> check_constraints(ens, [["fuel_price", "shift_length"], ["crew_size"]]).ok
    True
    >>> check_constraints(ens, forbid="shift_length:*").violations[["features", "rule", "paths"]]
                         features                      rule  paths
    0  (fuel_price, shift_length)  forbidden shift_length:*      2
    """
    forbidden = parse_forbidden(forbid)
    where = str(groups) if isinstance(groups, (str, os.PathLike)) else "groups"
    named_groups = None if groups is None else read_groups(groups)
    if named_groups is None and not forbidden:
        raise ParameterError("check_constraints needs groups, forbidden pairs (forbid=), or both")
    graph = load_model(model)
    names = graph.feature_names
    grouped = None if named_groups is None else index_groups(named_groups, names, where=where)
    rules = list(zip([f"{a}:{b}" for a, b in forbidden], _forbidden_matrices(forbidden, names), strict=True))
    membership = None if grouped is None else _membership(grouped, graph.n_features)
    allowed = None if membership is None else (membership.T.astype(np.int64) @ membership.astype(np.int64)) > 0
    pairs = structure(graph, max_order=2).pairs
    position = {name: j for j, name in enumerate(names)}
    sets, leaves, trees, first_tree = path_set_counts(graph)
    breaks = np.zeros(len(sets), dtype=bool)
    path_rows: list[dict] = []
    if allowed is not None:
        outside = ~_within(sets, membership)
        breaks |= outside
        stray = outside & ~_holds_pair(sets, ~allowed)
        path_rows = _path_rows(sets[stray], (leaves[stray], trees[stray], first_tree[stray]), names)
    for _, matrix in rules:
        breaks |= _holds_pair(sets, matrix)
    used = set(pairs["feature_a"]) | set(pairs["feature_b"]) | {names[j] for j in np.flatnonzero(sets.any(axis=0))}
    listed = {name for group in named_groups or () for name in group}
    facts = {
        "source": graph.source, "library": graph.library, "n_trees": graph.n_trees, "n_paths": int(leaves.sum()),
        "n_path_sets": len(sets), "n_pairs_on_paths": len(pairs), "n_paths_breaking": int(leaves[breaks].sum()),
        "features_alone": [] if named_groups is None else [n for n in names if n in used and n not in listed],
    }
    return PolicyResult(violations=_violation_frame(_pair_rows(pairs, position, allowed, rules) + path_rows),
                        groups=named_groups, forbidden=forbidden, facts=facts)
