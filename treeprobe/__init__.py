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
from .data import DataReport, load_data, prepare_data
from .ensemble import TreeEnsemble
from .errors import DataError, DataWarning, ModelFormatError, TreeprobeError, UnsafeModelError, UnsupportedModelError
from .hstat import HStatResult, h_statistic
from .io import load_model
from .pdp import partial_dependence
from .report import report
from .structure import StructureResult, structure, structure_by_round
from .triage import TriageResult, triage

__version__ = "0.1.0"

__all__ = [
    "TreeEnsemble",
    "load_model",
    "structure",
    "structure_by_round",
    "StructureResult",
    "h_statistic",
    "HStatResult",
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
