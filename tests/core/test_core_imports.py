"""The numeric core imports only numpy, scipy, the standard library and itself (docs/definitions.md,
"Layers of the code").

import-linter's contracts (tests/test_layers.py) forbid the core a list of packages; this test
is the other half, an allow-list: anything that is not numpy, SciPy, the standard library,
``viewer.core`` or ``viewer.errors`` is refused, whether imported absolutely, relatively
(``from .. import model``) or inside a function.
"""

import ast
import sys
from pathlib import Path

import pytest

VIEWER = Path(__file__).resolve().parents[2] / "viewer"
CORE = VIEWER / "core"
ALLOWED = {"numpy", "scipy", "threadpoolctl"} | set(sys.stdlib_module_names)
ALLOWED_VIEWER = ("viewer.core", "viewer.errors", "viewer.safejson")


def imported_modules(source: str, module: str) -> list[str]:
    """Every module ``source`` (the text of module ``module``, e.g. ``viewer.core.links``)
    imports, relative imports resolved against its package; ``from a import b`` counts as
    ``a.b``, since b may be a module."""
    package = module.rsplit(".", 1)[0]
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                parts = package.split(".")
                base = ".".join(parts[: len(parts) - node.level + 1])
                prefix = f"{base}.{node.module}" if node.module else base
            else:
                prefix = node.module or ""
            found += [f"{prefix}.{alias.name}" for alias in node.names]
    return found


def refused(name: str) -> bool:
    root = name.split(".")[0]
    if root == "viewer":
        return not (name + ".").startswith(tuple(p + "." for p in ALLOWED_VIEWER))
    return root not in ALLOWED


def test_the_checker_sees_every_form_of_import():
    source = (
        "import numpy as np\n"
        "from scipy.stats import norm\n"
        "from . import softmax\n"
        "from .stats import wilson_interval\n"
        "from ..errors import HeadlightError\n"
        "from .. import model\n"
        "def f():\n"
        "    import torch\n"
    )
    names = imported_modules(source, "viewer.core.links")
    assert names == [
        "numpy",
        "scipy.stats.norm",
        "viewer.core.softmax",
        "viewer.core.stats.wilson_interval",
        "viewer.errors.HeadlightError",
        "viewer.model",
        "torch",
    ]
    assert [n for n in names if refused(n)] == ["viewer.model", "torch"]


@pytest.mark.parametrize("path", sorted(CORE.rglob("*.py")), ids=lambda p: str(p.relative_to(CORE)))
def test_core_module_imports(path):
    # reference: docs/definitions.md, "Layers of the code": the numeric core uses numpy and
    # SciPy only (and the standard library, and the project's standard-library-only helpers)
    # viewer.core.links, or viewer.core.__init__ (whose package, for "from . import", is viewer.core)
    module = ".".join(("viewer", *path.relative_to(VIEWER).with_suffix("").parts))
    bad = [n for n in imported_modules(path.read_text(encoding="utf-8"), module) if refused(n)]
    assert not bad, f"{module} imports {bad}"
