"""The one way tests load a script of ``scripts/`` as a module (the scripts are not a package)."""

import importlib.util
import sys
from collections.abc import Iterator
from pathlib import Path

SCRIPTS = Path(__file__).resolve().parent.parent / "scripts"


def loaded(name: str) -> Iterator:
    """Yield ``scripts/<name>.py`` as a module, registered under ``name`` while in use (for pytest fixtures)."""
    spec = importlib.util.spec_from_file_location(name, SCRIPTS / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    # Registered first: its dataclasses look their module up while being built.
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    yield module
    sys.modules.pop(spec.name, None)
