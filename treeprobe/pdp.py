"""Partial dependence: brute force for any predictor, exact and fast for tree ensembles.

The partial dependence of a model ``f`` on a feature set ``S`` (Friedman 2001,
eq. 9, in its empirical form) averages the model over background rows with the
features in ``S`` held at ``z``::

    F_S(z) = (1/n) sum_i f(z_S, x_{i, not S})

The brute-force estimate evaluates ``f`` on ``n`` modified copies of the
background per point ``z``. For a tree ensemble the same number follows from the
tree structure alone, which is what makes exact H-statistics cheap
(:mod:`treeprobe.measure`).

Exact partial dependence of a tree (our derivation from the definitions)
------------------------------------------------------------------------
A tree is a sum over its leaves ``L`` of ``v_L * 1[x in R_L]``. The region
``R_L`` is the set of rows that take the path's direction at every ancestor
split of ``L``; grouping the ancestors by split feature, it is a product of
per-feature conditions, ``1[x in R_L] = prod_j C_Lj(x_j)`` where ``C_Lj(x_j)``
says that ``x_j`` goes the path's way at every ancestor split on ``j`` (missing
values, ``zero_as_missing`` and category lists included, because ``C_Lj`` is
evaluated with the ensemble's own routing rule). Features not split on along
the path have ``C_Lj = 1``. By linearity::

    F_S(z) = sum_L v_L * prod_{j in S} C_Lj(z_j) * w_L(S)
    w_L(S) = (1/n) #{i : row i satisfies C_Lk for every k outside S}

Call ``fail(i, L)`` the set of path features whose condition row ``i`` fails.
Then ``w_L(S)`` is the share of background rows with ``fail(i, L)`` a subset of
``S``, i.e. with ``|fail(i, L)| - |fail(i, L) & S| == 0``. One pass that records
``fail`` for every row and every (leaf, path feature) gives every ``w_L(S)``.
The engine below computes, per chunk of trees, the boolean matrix ``fail`` of
shape (rows, path entries), one column per (leaf, distinct path feature), and the
per-leaf failure counts; everything else is sums over those columns.

References
----------
.. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
   machine", Annals of Statistics 29(5), 2001, section 8.2, eq. 9.
.. [2] J. H. Friedman and B. E. Popescu, "Predictive learning via rule
   ensembles", Annals of Applied Statistics 2(3), 2008, section 8.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError
from .graph import ForestGraph

__all__ = ["partial_dependence"]

# Cells (rows x columns) of one working matrix: bounds the memory of every chunk.
CELL_BUDGET = 2**23
# Bytes of modified rows one brute-force batch may hold.
BRUTE_BATCH_BYTES = 256 * 1024**2


# --------------------------------------------------------------------------- models
@dataclass(frozen=True)
class FittedModel:
    """A model resolved for partial dependence: a tree ensemble or a prediction callable."""

    ensemble: ForestGraph | None
    predict: Callable[[Any], Any] | None

    @property
    def is_tree(self) -> bool:
        return self.ensemble is not None


def resolve_model(model: Any) -> FittedModel:
    """Turn the user's ``model`` argument into a :class:`FittedModel`.

    A :class:`ForestGraph` is used as is; a plain callable (a function, not a
    model object with a ``predict`` method) is a predictor; anything else goes
    through :func:`treeprobe.load_model`.
    """
    if isinstance(model, ForestGraph):
        return FittedModel(model, None)
    if callable(model) and not hasattr(model, "predict"):
        return FittedModel(None, model)
    from .io import load_model

    return FittedModel(load_model(model), None)


# --------------------------------------------------------------------------- data
@dataclass(frozen=True)
class PreparedData:
    """Rows ready for partial dependence.

    ``matrix`` is the float64 feature matrix in the model's column order (tree
    ensembles; for a callable it is the numeric view used for checks), ``frame``
    the DataFrame handed to a callable (None for arrays), ``names`` the column names.
    """

    matrix: np.ndarray
    frame: pd.DataFrame | None
    names: tuple[str, ...]

    @property
    def n_rows(self) -> int:
        return int(self.matrix.shape[0])

    def take(self, rows: np.ndarray) -> PreparedData:
        frame = None if self.frame is None else self.frame.iloc[rows].reset_index(drop=True)
        return PreparedData(self.matrix[rows], frame, self.names)


def _numeric_view(frame: pd.DataFrame) -> np.ndarray:
    out = np.empty(frame.shape, dtype=np.float64)
    for j, col in enumerate(frame.columns):
        series = frame[col]
        if isinstance(series.dtype, pd.CategoricalDtype):
            codes = series.cat.codes.to_numpy().astype(np.float64)
            codes[codes < 0] = np.nan
            out[:, j] = codes
        else:
            out[:, j] = pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    return out


def prepare_rows(fitted: FittedModel, X: Any, *, min_rows: int = 1) -> PreparedData:
    """Validate ``X`` against the model and return it as :class:`PreparedData`.

    Raises
    ------
    DataError
        Columns that do not match the model, fewer than ``min_rows`` rows, or a
        column that is missing (NaN) in every row.
    """
    if fitted.is_tree:
        ens = fitted.ensemble
        matrix = ens.check_X(X)
        names = ens.feature_names
        frame = None
    elif isinstance(X, pd.DataFrame):
        frame = X.reset_index(drop=True)
        names = tuple(str(c) for c in frame.columns)
        if len(set(names)) != len(names):
            raise DataError(f"data has duplicate column names: {sorted(n for n in set(names) if names.count(n) > 1)}")
        matrix = _numeric_view(frame)
    else:
        try:
            matrix = np.asarray(X, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise DataError(f"data is not numeric: {exc}") from None
        if matrix.ndim != 2:
            raise DataError(f"data must be 2-D (rows x features), got {matrix.ndim}-D")
        names = tuple(f"x{j}" for j in range(matrix.shape[1]))
        frame = None
    if matrix.shape[0] < min_rows:
        raise DataError(f"data has {matrix.shape[0]} rows; at least {min_rows} are needed")
    # A callable may take non-numeric columns, so a frame's own missing-value test decides.
    all_missing = frame.isna().all(axis=0).to_numpy() if frame is not None else np.isnan(matrix).all(axis=0)
    if matrix.shape[0] and all_missing.any():
        raise DataError(f"column {names[int(np.flatnonzero(all_missing)[0])]!r} is missing (NaN) in every row")
    return PreparedData(matrix, frame, tuple(names))


def feature_index(names: Sequence[str], feature: Any, *, parameter: str) -> int:
    """Position of ``feature`` (a name, or an integer position) among ``names``."""
    if isinstance(feature, (int, np.integer)) and not isinstance(feature, bool):
        if not 0 <= feature < len(names):
            raise DataError(f"{parameter}: feature position {feature} is outside 0..{len(names) - 1}")
        return int(feature)
    name = str(feature)
    if name not in names:
        shown = ", ".join(names[:8]) + (" ..." if len(names) > 8 else "")
        raise DataError(f"{parameter}: unknown feature {name!r}; the model's features are {shown}")
    return names.index(name)


# --------------------------------------------------------------------------- outputs
def leaf_value_column(ens: ForestGraph, output: int) -> tuple[np.ndarray, np.ndarray]:
    """Trees adding to raw output ``output`` and, per node, its weighted value for that output."""
    trees = ens.trees_of_output(output)
    column = np.where(ens.output_of_tree[ens.tree] == -1, output, 0) if ens.value.shape[1] > 1 else np.zeros(
        ens.n_nodes, dtype=np.int64
    )
    weighted = ens.value[np.arange(ens.n_nodes), column] * ens.tree_weight[ens.tree]
    return trees, weighted


# --------------------------------------------------------------------------- path tables
@dataclass(frozen=True)
class PathTable:
    """Root-to-leaf paths of a chunk of trees, grouped by (leaf, split feature).

    An *entry* is one distinct feature on one leaf's path; its *steps* are the
    ancestor splits of the leaf on that feature with the direction the path takes.
    Entries are sorted by leaf, then feature; steps by entry.
    """

    leaf_value: np.ndarray        # (n_leaves,) weighted leaf value for the chosen output
    used_nodes: np.ndarray        # (n_used,) internal nodes on the paths
    step_node: np.ndarray         # (n_steps,) position of the step's node in used_nodes
    step_left: np.ndarray         # (n_steps,) whether the path goes left there
    entry_step_start: np.ndarray  # (n_entries,)
    entry_leaf: np.ndarray        # (n_entries,) local leaf index
    entry_feature: np.ndarray     # (n_entries,)
    leaf_entry_start: np.ndarray  # (n_leaves,)
    constant: float               # summed value of single-leaf trees

    @property
    def n_leaves(self) -> int:
        return int(self.leaf_value.shape[0])

    @property
    def n_entries(self) -> int:
        return int(self.entry_leaf.shape[0])


def parent_links(ens: ForestGraph) -> tuple[np.ndarray, np.ndarray]:
    """Parent of every node (-1 at roots) and whether the node is its parent's left child."""
    parent = np.full(ens.n_nodes, -1, dtype=np.int64)
    is_left = np.zeros(ens.n_nodes, dtype=bool)
    inner = np.flatnonzero(ens.feature >= 0)
    parent[ens.left[inner]] = inner
    parent[ens.right[inner]] = inner
    is_left[ens.left[inner]] = True
    return parent, is_left


def path_table(
    ens: ForestGraph, trees: np.ndarray, node_value: np.ndarray, links: tuple[np.ndarray, np.ndarray]
) -> PathTable:
    """Build the :class:`PathTable` of ``trees`` (global tree indices)."""
    parent, is_left = links
    nodes = np.concatenate([np.arange(ens.tree_offsets[t], ens.tree_offsets[t + 1]) for t in trees])
    leaf_nodes = nodes[ens.feature[nodes] < 0]
    single = leaf_nodes[parent[leaf_nodes] < 0]
    leaves = leaf_nodes[parent[leaf_nodes] >= 0]
    step_leaf, step_node, step_left = [], [], []
    current, owner = leaves, np.arange(leaves.size)
    while current.size:
        up = parent[current]
        keep = up >= 0
        owner, current, up = owner[keep], current[keep], up[keep]
        step_leaf.append(owner)
        step_node.append(up)
        step_left.append(is_left[current])
        current = up
    if not leaves.size:
        empty = np.zeros(0, dtype=np.int64)
        return PathTable(np.zeros(0), empty, empty, np.zeros(0, bool), empty, empty, empty, empty,
                         float(node_value[single].sum()))
    leaf_of_step = np.concatenate(step_leaf)
    node_of_step = np.concatenate(step_node)
    left_of_step = np.concatenate(step_left)
    feature_of_step = ens.feature[node_of_step].astype(np.int64)
    order = np.lexsort((node_of_step, feature_of_step, leaf_of_step))
    leaf_of_step, node_of_step = leaf_of_step[order], node_of_step[order]
    left_of_step, feature_of_step = left_of_step[order], feature_of_step[order]
    key = leaf_of_step * ens.n_features + feature_of_step
    entry_step_start = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    entry_leaf = leaf_of_step[entry_step_start]
    used_nodes, node_position = np.unique(node_of_step, return_inverse=True)
    return PathTable(
        leaf_value=node_value[leaves],
        used_nodes=used_nodes,
        step_node=node_position.ravel(),
        step_left=left_of_step,
        entry_step_start=entry_step_start,
        entry_leaf=entry_leaf,
        entry_feature=feature_of_step[entry_step_start],
        leaf_entry_start=np.flatnonzero(np.r_[True, entry_leaf[1:] != entry_leaf[:-1]]),
        constant=float(node_value[single].sum()),
    )


def tree_chunks(ens: ForestGraph, trees: np.ndarray, n_rows: int) -> list[np.ndarray]:
    """Split ``trees`` into chunks whose path steps times ``n_rows`` stay near :data:`CELL_BUDGET`."""
    leaves = ens.feature < 0
    steps = np.bincount(ens.tree[leaves], weights=ens.depth[leaves], minlength=ens.n_trees)[trees]
    budget = max(1.0, CELL_BUDGET / max(n_rows, 1))
    chunk_id = np.floor(np.cumsum(steps) / budget).astype(np.int64)
    _, starts = np.unique(chunk_id, return_index=True)
    return [c for c in np.split(trees, starts[1:]) if c.size]


def failed_conditions(ens: ForestGraph, table: PathTable, matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Which path conditions each row fails (entry-major layout, so gathers copy contiguous rows).

    Returns
    -------
    fail : ndarray of bool, shape (n_entries, n_rows)
        Row fails the leaf's condition on the entry's feature (goes the other way at
        one of the leaf's ancestor splits on that feature).
    n_failed : ndarray of int16, shape (n_leaves, n_rows)
        Number of path features whose condition the row fails; 0 means the row reaches the leaf.
    """
    columns = np.ascontiguousarray(matrix.astype(ens.split_dtype, copy=False).T)
    values = columns[ens.feature[table.used_nodes]]
    nodes = np.broadcast_to(table.used_nodes[:, None], values.shape)
    goes_left = ens._goes_left(nodes.ravel(), values.ravel()).reshape(values.shape)
    step_fail = goes_left[table.step_node] != table.step_left[:, None]
    fail = np.logical_or.reduceat(step_fail, table.entry_step_start, axis=0)
    n_failed = np.add.reduceat(fail, table.leaf_entry_start, axis=0, dtype=np.int16)
    return fail, n_failed


def sum_rows_by(values: np.ndarray, group: np.ndarray, into: np.ndarray) -> None:
    """Add row ``r`` of ``values`` into row ``group[r]`` of ``into`` (groups < 0 are dropped)."""
    keep = group >= 0
    if not keep.any():
        return
    group = group[keep]
    order = np.argsort(group, kind="stable")
    sorted_group = group[order]
    starts = np.flatnonzero(np.r_[True, sorted_group[1:] != sorted_group[:-1]])
    into[sorted_group[starts]] += np.add.reduceat(values[np.flatnonzero(keep)[order]], starts, axis=0)


# --------------------------------------------------------------------------- brute force
def model_output(values: Any, n_rows: int, output: int | None) -> np.ndarray:
    """Check a predictor's return value and select ``output`` (all outputs as columns when None)."""
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim == 2 and arr.shape[1] == 1:
        arr = arr[:, 0]
    if arr.ndim not in (1, 2) or arr.shape[0] != n_rows:
        raise DataError(
            f"model returned an array of shape {arr.shape} for {n_rows} rows; expected ({n_rows},) or ({n_rows}, n_outputs)"
        )
    if not np.all(np.isfinite(arr)):
        raise DataError(f"model returned {int(np.sum(~np.isfinite(arr)))} non-finite predictions for {n_rows} rows")
    if arr.ndim == 1:
        if output not in (None, 0):
            raise DataError(f"output={output} requested but the model has one output")
        return arr
    if output is None:
        return arr
    if not 0 <= output < arr.shape[1]:
        raise DataError(f"output must lie in 0..{arr.shape[1] - 1}, got {output}")
    return arr[:, output]


def _modified_rows(background: PreparedData, points: PreparedData, start: int, stop: int, columns: Sequence[int]):
    n_back = background.n_rows
    point_rows = np.repeat(np.arange(start, stop), n_back)
    if background.frame is None:
        block = np.tile(background.matrix, (stop - start, 1))
        block[:, columns] = points.matrix[point_rows][:, columns]
        return block
    block = background.frame.iloc[np.tile(np.arange(n_back), stop - start)].reset_index(drop=True)
    for j in columns:
        name = background.frame.columns[j]
        block[name] = points.frame[name].iloc[point_rows].reset_index(drop=True)
    return block


def brute_partial_dependence(
    predict: Callable[[Any], np.ndarray],
    background: PreparedData,
    points: PreparedData,
    columns: Sequence[int],
    output: int | None,
    row_bytes: int | None = None,
) -> np.ndarray:
    """``F_S`` at every row of ``points`` by averaging ``predict`` over modified background rows.

    Batches of point rows are sized so that one batch of modified rows, counted at
    ``row_bytes`` each (default: the row itself; more when the predictor's working
    memory grows with the model, see :func:`predictor_row_bytes`), holds about
    :data:`BRUTE_BATCH_BYTES`.
    """
    n_back = background.n_rows
    row_bytes = row_bytes or 8 * max(background.matrix.shape[1], 1)
    per_batch = max(1, BRUTE_BATCH_BYTES // (row_bytes * n_back))
    pieces = []
    for start in range(0, points.n_rows, per_batch):
        stop = min(start + per_batch, points.n_rows)
        block = _modified_rows(background, points, start, stop, columns)
        predicted = model_output(predict(block), (stop - start) * n_back, output)
        pieces.append(predicted.reshape((stop - start, n_back) + predicted.shape[1:]).mean(axis=1))
    return np.concatenate(pieces, axis=0)


def predictor_row_bytes(ens: ForestGraph | None, n_columns: int) -> int:
    """Working bytes per predicted row: the row, plus leaf indices and values per tree for an ensemble."""
    if ens is None:
        return 8 * max(n_columns, 1)
    return 8 * (n_columns + ens.n_trees * (1 + ens.value.shape[1]) + ens.n_outputs)


def ensemble_predictor(ens: ForestGraph, scale: str) -> Callable[[np.ndarray], np.ndarray]:
    """Predictor of ``ens`` on checked matrices: raw margin or the link's scale."""
    if scale == "margin":
        return lambda matrix: ens.predict_raw(matrix, checked=True)
    return ens.predict


# --------------------------------------------------------------------------- exact
def exact_partial_dependence(
    ens: ForestGraph, background: np.ndarray, grid_rows: np.ndarray, columns: Sequence[int], output: int
) -> np.ndarray:
    """``F_S`` of raw output ``output`` at ``grid_rows`` (columns ``S`` used), background ``background``.

    Implements ``F_S(z) = base + sum_L v_L prod_{j in S} C_Lj(z_j) w_L(S)``; see the module docstring.
    """
    trees, node_value = leaf_value_column(ens, output)
    in_set = np.zeros(ens.n_features, dtype=bool)
    in_set[list(columns)] = True
    links = parent_links(ens)
    result = np.full(grid_rows.shape[0], ens.base_score[output])
    for chunk in tree_chunks(ens, trees, max(background.shape[0], grid_rows.shape[0])):
        table = path_table(ens, chunk, node_value, links)
        result += table.constant
        if not table.n_leaves:
            continue
        entry_in_set = in_set[table.entry_feature][:, None]
        fail, n_failed = failed_conditions(ens, table, background)
        failed_in_set = np.add.reduceat(fail & entry_in_set, table.leaf_entry_start, axis=0, dtype=np.int16)
        share = (n_failed == failed_in_set).mean(axis=1)
        grid_fail, _ = failed_conditions(ens, table, grid_rows)
        grid_failed_in_set = np.add.reduceat(grid_fail & entry_in_set, table.leaf_entry_start, axis=0, dtype=np.int16)
        result += (table.leaf_value * share) @ (grid_failed_in_set == 0)
    return result


def partial_dependence(
    model: Any,
    X: Any,
    features: Sequence[Any],
    grid: Any,
    *,
    method: str = "auto",
    output: int | None = None,
    scale: str = "margin",
) -> np.ndarray:
    """Partial dependence of a model on a set of features at given grid points.

    Parameters
    ----------
    model : ForestGraph, model object, model file or callable
        A :class:`~treeprobe.graph.ForestGraph`, anything
        :func:`treeprobe.load_model` reads, or a function ``predict(X) -> array``.
    X : ndarray or DataFrame of shape (n_rows, n_features)
        Background rows averaged over. For a callable, DataFrames are passed on
        as DataFrames (dtypes kept).
    features : sequence of str or int
        The set ``S`` (names, or column positions).
    grid : array-like of shape (n_points, len(features))
        Values of the features in ``S`` at which to evaluate. Categorical
        features take their integer category codes.
    method : {"auto", "exact", "brute"}, default "auto"
        "exact" reads the tree structure (tree ensembles, margin scale only);
        "brute" averages predictions over modified rows; "auto" picks "exact"
        whenever it applies.
    output : int, optional
        Output (class) of a multi-output model; None returns every output.
    scale : {"margin", "probability"}, default "margin"
        Raw margin (log-odds for classifiers) or the link's scale (brute only).

    Returns
    -------
    ndarray of shape (n_points,), or (n_points, n_outputs) for all outputs of a multi-output model
        Uncentred partial dependence, ``F_S(z) = (1/n) sum_i f(z_S, x_{i, not S})``.

    Notes
    -----
    Friedman's estimate ([1]_, eq. 9). The exact path gives the same number as
    brute force on the common graph, without ``n_points * n_rows`` predictions;
    see the module docstring. When features in ``S`` are dependent on the others
    the modified rows leave the data's support and the model is extrapolating.

    References
    ----------
    .. [1] J. H. Friedman, "Greedy function approximation: a gradient boosting
       machine", Annals of Statistics 29(5), 2001.

    Examples
    --------
    >>> import numpy as np
    >>> f = lambda X: X[:, 0] * X[:, 1]
    >>> X = np.array([[1.0, 2.0], [3.0, 4.0]])
    >>> partial_dependence(f, X, [0], [[1.0], [2.0]])
    array([3., 6.])
    """
    if method not in ("auto", "exact", "brute"):
        raise DataError(f"method must be 'auto', 'exact' or 'brute', got {method!r}")
    if scale not in ("margin", "probability"):
        raise DataError(f"scale must be 'margin' or 'probability', got {scale!r}")
    fitted = resolve_model(model)
    if method == "exact" and (not fitted.is_tree or scale != "margin"):
        raise DataError("method='exact' needs a tree ensemble and scale='margin'")
    data = prepare_rows(fitted, X, min_rows=1)
    if isinstance(features, (str, int, np.integer)) or len(features) == 0:
        raise DataError(f"features must be a non-empty sequence of feature names, got {features!r}")
    columns = [feature_index(data.names, f, parameter="features") for f in features]
    if len(set(columns)) != len(columns):
        raise DataError(f"features lists a feature twice: {list(features)}")
    grid_values = np.asarray(grid, dtype=np.float64)
    if grid_values.ndim == 1 and len(columns) == 1:
        grid_values = grid_values[:, None]
    if grid_values.ndim != 2 or grid_values.shape[1] != len(columns):
        raise DataError(f"grid must have shape (n_points, {len(columns)}), got {grid_values.shape}")
    n_outputs = fitted.ensemble.n_outputs if fitted.is_tree else None
    if output is not None and n_outputs is not None and not 0 <= output < n_outputs:
        raise DataError(f"output must lie in 0..{n_outputs - 1}, got {output}")
    grid_matrix = np.full((grid_values.shape[0], data.matrix.shape[1]), np.nan)
    grid_matrix[:, columns] = grid_values
    if fitted.is_tree and method != "brute" and scale == "margin":
        ens = fitted.ensemble
        outputs = [output] if output is not None else list(range(ens.n_outputs))
        values = [exact_partial_dependence(ens, data.matrix, grid_matrix, columns, k) for k in outputs]
        return values[0] if len(values) == 1 else np.column_stack(values)
    predict = ensemble_predictor(fitted.ensemble, scale) if fitted.is_tree else fitted.predict
    points_frame = None
    if data.frame is not None:
        points_frame = data.frame.iloc[np.zeros(grid_values.shape[0], dtype=np.int64)].reset_index(drop=True)
        for position, j in enumerate(columns):
            name = data.frame.columns[j]
            column = data.frame[name]
            if isinstance(column.dtype, pd.CategoricalDtype):
                codes = np.where(np.isnan(grid_values[:, position]), -1, grid_values[:, position]).astype(np.int64)
                points_frame[name] = pd.Categorical.from_codes(codes, dtype=column.dtype)
            else:
                points_frame[name] = grid_values[:, position]
    points = PreparedData(grid_matrix, points_frame, data.names)
    return brute_partial_dependence(predict, data, points, columns, output,
                                    predictor_row_bytes(fitted.ensemble, data.matrix.shape[1]))
