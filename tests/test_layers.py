"""The layering of docs/definitions.md ("Layers of the code"), enforced by import-linter."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_import_contracts_hold():
    lint = Path(sys.executable).with_name("lint-imports")
    run = subprocess.run([str(lint)], cwd=ROOT, capture_output=True, text=True)
    assert run.returncode == 0, run.stdout[-3000:] + run.stderr[-2000:]
    assert "0 broken" in run.stdout


def test_cli_imports_qt_only_lazily():
    """`headlight --help` must not import Qt, torch or transformers (fast start, headless use)."""
    code = (
        "import sys, viewer.cli; viewer.cli.build_parser(); "
        "print(sorted(m for m in ('PySide6','torch','transformers') if m in sys.modules))"
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert run.stdout.strip() == "[]", run.stdout + run.stderr


def test_no_import_cycles():
    """No module of the package imports, directly or through others, a module that imports it.

    Reference: grimp (the import graph library import-linter is built on) builds the graph.
    """
    import grimp

    graph = grimp.build_graph("viewer")
    cycles = []
    for module in sorted(graph.modules):
        for imported in graph.find_modules_directly_imported_by(module):
            if imported.startswith("viewer.") and graph.find_shortest_chain(imported, module):
                cycles.append(f"{module} -> {imported}")
    assert not cycles, cycles


def test_everything_but_the_window_imports_without_qt():
    """Every module outside viewer.gui imports with PySide6 made unimportable."""
    code = (
        "import sys, pkgutil, importlib, viewer\n"
        "sys.modules['PySide6'] = None\n"
        "names = [m.name for m in pkgutil.walk_packages(viewer.__path__, 'viewer.')\n"
        "         if not m.name.startswith(('viewer.gui', 'viewer.__main__'))]\n"
        "for name in names:\n"
        "    importlib.import_module(name)\n"
        "print(len(names))\n"
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert run.returncode == 0, run.stderr[-3000:]
    assert int(run.stdout.strip()) > 30
