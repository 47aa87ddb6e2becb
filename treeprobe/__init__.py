"""treeprobe: which feature interactions a fitted tree ensemble really uses.

The public names below are imported on first use (PEP 562), so that
``import treeprobe`` and ``treeprobe --version`` stay fast and do not load
pandas or scipy; ``from treeprobe import triage`` works as usual.

Examples
--------
>>> import treeprobe
>>> "h_statistic" in dir(treeprobe)
True
>>> issubclass(treeprobe.ParameterError, treeprobe.TreeprobeError)
True
"""

from __future__ import annotations

import importlib
from typing import Any

# Public name -> the submodule that defines it.
_HOMES = {
    "ForestGraph": "graph",
    "load_model": "io",
    "structure": "cooccurrence",
    "structure_by_round": "cooccurrence",
    "StructureResult": "cooccurrence",
    "h_statistic": "measure",
    "MeasureResult": "measure",
    "partial_dependence": "pdp",
    "report": "reporting",
    "triage": "verdicts",
    "triage_classes": "verdicts",
    "TriageResult": "verdicts",
    "suggest_constraints": "constraints",
    "validate_constraints": "constraints",
    "interaction_graph": "constraints",
    "write_graphml": "constraints",
    "ConstraintSuggestion": "constraints",
    "ValidationResult": "constraints",
    "check_constraints": "policy",
    "PolicyResult": "policy",
    "compare_models": "compare",
    "ModelComparison": "compare",
    "search_constraints": "search",
    "SearchResult": "search",
    "load_data": "data",
    "prepare_data": "data",
    "DataReport": "data",
    "TreeprobeError": "errors",
    "ModelFormatError": "errors",
    "UnsafeModelError": "errors",
    "UnsupportedModelError": "errors",
    "ParameterError": "errors",
    "DataError": "errors",
    "MissingLibraryError": "errors",
    "DataWarning": "errors",
}
# The warning for unseen category levels may live in either module; the first that defines it wins.
_UNSEEN_CATEGORY_HOMES = ("data", "graph")

__all__ = [*_HOMES, "UnseenCategoryWarning", "__version__"]


def _package_version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("treeprobe")
    except PackageNotFoundError:  # a source tree that was never installed
        return "0+unknown"


def __getattr__(name: str) -> Any:
    if name == "__version__":
        value = _package_version()
    elif name == "UnseenCategoryWarning":
        modules = (importlib.import_module(f".{home}", __name__) for home in _UNSEEN_CATEGORY_HOMES)
        value = next(getattr(m, name) for m in modules if hasattr(m, name))
    elif name in _HOMES:
        value = getattr(importlib.import_module(f".{_HOMES[name]}", __name__), name)
    else:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
