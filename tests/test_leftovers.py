"""Nothing is left behind: staging folders of killed exports, and the tests' own cache folder.

References: the kernel releases a process's file locks when the process dies (flock(2)), which
is what tells a killed export's staging folder from one being written; the file system
before and after.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from viewer.files import StagedFolder, remove_stale_staging

ROOT = Path(__file__).resolve().parents[1]
EXPORT = """
import os, sys
from pathlib import Path
from viewer.files import StagedFolder, remove_stale_staging
staged = StagedFolder(Path(sys.argv[1]), force=True)
tmp = staged.__enter__()
(tmp / "card.md").write_text("half a card")
print(tmp, flush=True)
if sys.argv[2] == "kill":
    os.kill(os.getpid(), 9)
sys.stdin.read()  # an export still running, until the test closes its stdin
"""


def start_export(target: Path, how: str) -> tuple[subprocess.Popen, Path]:
    proc = subprocess.Popen(
        [sys.executable, "-c", EXPORT, str(target), how],
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
    )
    staging = Path(proc.stdout.readline().strip())
    return proc, staging


def hidden(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def export(target: Path) -> None:
    with StagedFolder(target, force=True) as tmp:
        (tmp / "card.md").write_text("a whole card")


def test_a_killed_exports_staging_folder_is_removed_at_the_next_export(tmp_path):
    target = tmp_path / "card"
    proc, staging = start_export(target, "kill")
    proc.wait()
    assert proc.returncode == -9 and staging.is_dir() and (staging / "card.md").is_file()
    (tmp_path / ".card.x1y2z3w4").mkdir()  # one left by an earlier version (tempfile's name)
    export(target)
    assert hidden(tmp_path) == []
    assert (target / "card.md").read_text() == "a whole card"


def test_a_running_exports_staging_folder_is_kept(tmp_path):
    target = tmp_path / "card"
    proc, staging = start_export(target, "wait")
    try:
        export(target)
        assert staging.is_dir() and (staging / "card.md").read_text() == "half a card"
        assert (target / "card.md").read_text() == "a whole card"
    finally:
        proc.stdin.close()
        proc.wait()


def test_a_swap_killed_between_its_renames_gives_the_old_folder_back(tmp_path):
    target = tmp_path / "card"
    export(target)
    os.replace(target, tmp_path / ".card.old")  # the first rename of a swap, then a kill
    export(tmp_path / "other")  # another target: nothing of "card" is touched
    assert (tmp_path / ".card.old").is_dir()
    assert remove_stale_staging(target) == [tmp_path / ".card.old"]  # what the next export does
    assert (target / "card.md").read_text() == "a whole card" and hidden(tmp_path) == []


TEST = """
def test_nothing():
    pass
"""


def test_a_test_run_leaves_no_cache_folder_in_the_temporary_folder(tmp_path):
    """A pytest run of this suite's configuration (tests/conftest.py) in a fresh TMPDIR leaves
    that folder as empty as it found it."""
    scratch, tests = tmp_path / "tmp", tmp_path / "tests"
    scratch.mkdir()
    tests.mkdir()
    (tests / "conftest.py").write_text((ROOT / "tests" / "conftest.py").read_text())
    (tests / "test_one.py").write_text(TEST)
    out = subprocess.run(
        [
            sys.executable,
            "-m",
            "pytest",
            "-q",
            "-p",
            "no:cacheprovider",
            str(tests),
            "--basetemp",
            str(tmp_path / "base"),
        ],
        env={**os.environ, "TMPDIR": str(scratch), "PYTHONPATH": str(ROOT)},
        capture_output=True,
        text=True,
        cwd=tmp_path,
    )
    assert out.returncode == 0, out.stdout + out.stderr
    assert list(scratch.iterdir()) == []
