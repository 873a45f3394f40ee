"""The layering of DESIGN.md, enforced by import-linter's contracts in pyproject.toml."""

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
    code = ("import sys, viewer.cli; viewer.cli.build_parser(); "
            "print(sorted(m for m in ('PySide6','torch','transformers') if m in sys.modules))")
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert run.stdout.strip() == "[]", run.stdout + run.stderr
