"""Why every engine maps shards on one torch thread: a forward on two threads is not bit-identical
to the same forward on one, measured side by side on the demo model.

Run:  python tests/benchmarks/bench_threads.py

The shortcut search (words and phrases) over the sample messages, in this process, once
with one torch thread and once with two (``RunOptions.threads``); prints the largest difference
of any word's or phrase's summed drop and focus between the two runs (0 would mean threads do not
matter), and the time of each run.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from viewer.demo import MODEL_DIR  # noqa: E402
from viewer.model.loader import open_model  # noqa: E402
from viewer.reports.shards import RunOptions, run_shards  # noqa: E402
from viewer.reports.shortcuts import ShortcutKind  # noqa: E402
from viewer.reports.textsets import load_text_set  # noqa: E402


def main() -> None:
    demo = open_model(MODEL_DIR)
    items = load_text_set(ROOT / "sample_sentences" / "coop_messages.jsonl")
    kind = ShortcutKind(batch_size=16)
    states, seconds = {}, {}
    for threads in (1, 2):
        t0 = time.perf_counter()
        states[threads] = kind.state(run_shards(kind, demo, items, options=RunOptions(threads=threads)))
        seconds[threads] = time.perf_counter() - t0
    worst = max(
        float(np.max(np.abs(states[1][k] - states[2][k])))
        for k in states[1]
        if k.endswith(".sums") and states[1][k].size
    )
    print(
        f"largest difference of a summed drop or focus, 1 vs 2 torch threads: {worst:.1e} "
        f"(1 thread {seconds[1]:.1f} s, 2 threads {seconds[2]:.1f} s)"
    )


if __name__ == "__main__":
    main()
