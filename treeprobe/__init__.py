"""treeprobe: which feature interactions a fitted tree ensemble really uses."""

from __future__ import annotations

from .constraints import (
    ConstraintSuggestion,
    ValidationResult,
    interaction_graph,
    suggest_constraints,
    validate_constraints,
    write_graphml,
)
from .cooccurrence import StructureResult, structure, structure_by_round
from .data import DataReport, load_data, prepare_data
from .errors import DataError, DataWarning, ModelFormatError, TreeprobeError, UnsafeModelError, UnsupportedModelError
from .graph import ForestGraph
from .io import load_model
from .measure import MeasureResult, h_statistic
from .pdp import partial_dependence
from .reporting import report
from .verdicts import TriageResult, triage

__version__ = "0.1.0"

__all__ = [
    "ForestGraph",
    "load_model",
    "structure",
    "structure_by_round",
    "StructureResult",
    "h_statistic",
    "MeasureResult",
    "partial_dependence",
    "report",
    "triage",
    "TriageResult",
    "suggest_constraints",
    "validate_constraints",
    "interaction_graph",
    "write_graphml",
    "ConstraintSuggestion",
    "ValidationResult",
    "TreeprobeError",
    "ModelFormatError",
    "UnsafeModelError",
    "UnsupportedModelError",
    "DataError",
    "DataWarning",
    "load_data",
    "prepare_data",
    "DataReport",
    "__version__",
]
