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
from .ensemble import TreeEnsemble
from .errors import DataError, ModelFormatError, TreeprobeError, UnsafeModelError, UnsupportedModelError
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
    "__version__",
]
