"""Load docs/make_readme_outputs.py (not a package module) for the tests."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path


def load_readme_tool():
    """docs/make_readme_outputs.py as a module (runs the README's shown commands)."""
    name = "make_readme_outputs"
    if name not in sys.modules:
        path = Path(__file__).resolve().parents[1] / "docs" / "make_readme_outputs.py"
        spec = importlib.util.spec_from_file_location(name, path)
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module  # dataclasses look their module up there
        spec.loader.exec_module(module)
    return sys.modules[name]

