"""Crafted model folders through ``headlight check``, each in a fresh process.

For every case of ``tests/model/crafted.py``: the exit status, whether stderr is one line with no
traceback, the wall-clock seconds and the process's peak resident memory, side by side with the
good folder the cases are made from (the ratio of peak memory to the good folder's is printed:
a refusal must not allocate more than opening the real checkpoint does).

    python tests/benchmarks/bench_crafted.py [--timeout S] [CASE ...]
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from tests.model import crafted  # noqa: E402  (json and struct only: this process stays small)


def run(folder: Path, timeout: float) -> tuple[int | None, str, float, float]:
    """(exit status or None on timeout, stderr, seconds, peak RSS in MB) of one check."""
    env = {**os.environ, "PYTHONPATH": str(ROOT), "HF_HUB_OFFLINE": "1"}
    start = time.perf_counter()
    with tempfile.TemporaryFile() as err_file:
        proc = subprocess.Popen(
            [sys.executable, "-m", "viewer", "check", str(folder), "--workers", "1"],
            env=env,
            stdout=subprocess.DEVNULL,
            stderr=err_file,
        )
        status: int | None = None
        while True:  # os.wait4 reports the child's own peak memory
            pid, raw, usage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                status = os.waitstatus_to_exitcode(raw)
                break
            if time.perf_counter() > start + timeout:
                proc.kill()
                _, raw, usage = os.wait4(proc.pid, 0)
                break
            time.sleep(0.02)
        proc.returncode = status if status is not None else -9  # reaped here, not by Popen
        seconds = time.perf_counter() - start
        err_file.seek(0)
        err = err_file.read().decode("utf-8", "replace")
    return status, err, seconds, usage.ru_maxrss / 1024


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--timeout", type=float, default=30.0)
    parser.add_argument("cases", nargs="*")
    args = parser.parse_args()
    cases = args.cases or list(crafted.CASES)
    root = Path(tempfile.mkdtemp(prefix="headlight-bench-crafted-"))
    try:
        # built in another process: a child's peak memory counts what it had before its exec,
        # so the process starting the checks must not hold torch itself
        good = root / "good"
        subprocess.run(
            [
                sys.executable,
                "-c",
                "import sys; from pathlib import Path; from tests.model import tiny; "
                "tiny.save(Path(sys.argv[1]), 'bert')",
                str(good),
            ],
            env={**os.environ, "PYTHONPATH": str(ROOT)},
            check=True,
            capture_output=True,
        )
        status, err, seconds, good_mb = run(good, args.timeout)
        print(f"{'good folder':<40} exit {status}  {seconds:5.2f} s  {good_mb:7.0f} MB")
        worst = 0.0
        for n, case in enumerate(cases):
            folder = crafted.make(good, root / f"case{n}", case)
            status, err, seconds, mb = run(folder, args.timeout)
            lines = err.strip().splitlines()
            one_line = len(lines) == 1 and "Traceback" not in err
            verdict = "ok" if status == 2 and one_line else "BAD"
            worst = max(worst, seconds)
            shown = lines[-1][:90] if lines else "(nothing on stderr)"
            print(
                f"{case:<40} exit {status}  {seconds:5.2f} s  {mb:7.0f} MB "
                f"({mb / good_mb:4.2f}× good)  {verdict}  {shown}"
            )
            shutil.rmtree(folder, ignore_errors=True)
        print(f"slowest case: {worst:.2f} s")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
