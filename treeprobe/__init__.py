"""treeprobe: which feature interactions a fitted tree ensemble really uses."""

from __future__ import annotations

from .ensemble import TreeEnsemble
from .errors import DataError, ModelFormatError, TreeprobeError, UnsafeModelError, UnsupportedModelError
from .io import load_model
from .structure import StructureResult, structure, structure_by_round

__version__ = "0.1.0"

__all__ = [
    "TreeEnsemble",
    "load_model",
    "structure",
    "structure_by_round",
    "StructureResult",
    "TreeprobeError",
    "ModelFormatError",
    "UnsafeModelError",
    "UnsupportedModelError",
    "DataError",
    "__version__",
]
