"""The numeric core imports only numpy, scipy, the standard library and itself (docs/definitions.md)."""

import ast
import sys
from pathlib import Path

import pytest

CORE = Path(__file__).resolve().parents[2] / "viewer" / "core"
ALLOWED = {"numpy", "scipy", "threadpoolctl", "viewer"} | set(sys.stdlib_module_names)
ALLOWED_VIEWER = ("viewer.core", "viewer.errors", "viewer.safejson")


def _imports(path: Path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            yield from (alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            yield node.module


@pytest.mark.parametrize("path", sorted(CORE.glob("*.py")), ids=lambda p: p.name)
def test_core_module_imports(path):
    # reference: docs/definitions.md, "Layers of the code": the numeric core uses numpy and
    # SciPy only (and the standard library, and the project's standard-library-only helpers)
    for name in _imports(path):
        root = name.split(".")[0]
        assert root in ALLOWED, f"{path.name} imports {name}"
        if root == "viewer":
            assert name.startswith(ALLOWED_VIEWER), f"{path.name} imports {name}"
