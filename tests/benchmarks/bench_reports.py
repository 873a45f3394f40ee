"""Dataset-level report costs on the real MiniLM model, as ratios measured side by side.

Run:  python tests/benchmarks/bench_reports.py

1. ``heads`` throughput over 1000 texts against a bare batched forward with
   ``output_attentions=True`` over the same texts and batches (goal: >= 0.8x), alternating the
   two three times and comparing medians.
2. Peak resident memory growth between a 1000-text and a 4000-text ``heads`` run in the same
   process (goal: < 50 MB).
3. Shortcut search cost at two sizes of the same kind of text set, per word knocked out
   (linear growth means the per-word cost stays flat). Uses a tiny random classifier built on
   the fly, since MiniLM has no prediction head.
"""

from __future__ import annotations

import random
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from tests.conftest import minilm_folder  # noqa: E402
from tests.model import tiny  # noqa: E402
from viewer.model.loader import open_model  # noqa: E402
from viewer.model.runs import model_inputs  # noqa: E402
from viewer.reports.heads import HeadsKind  # noqa: E402
from viewer.reports.shards import run_report  # noqa: E402
from viewer.reports.shortcuts import shortcut_search  # noqa: E402
from viewer.reports.textsets import TextItem  # noqa: E402

WORDS = (
    "member mechanic wheel chain invoice brake cable tandem renewal workshop portal "
    "saddle refund gears spoke frame courier tuesday receipt puncture"
).split()


def texts(n: int, seed: int = 0) -> list[TextItem]:
    rng = random.Random(seed)
    return [TextItem(" ".join(rng.choices(WORDS, k=rng.randint(6, 30))), None, i) for i in range(n)]


def bare(loaded, items, batch_size=16) -> None:
    """The same batches through the model with no hooks and nothing kept."""
    with loaded.unhooked() as model, torch.no_grad():
        for start in range(0, len(items), batch_size):
            batch = loaded.encode([i.text for i in items[start : start + batch_size]])
            model(**model_inputs(loaded, batch), output_attentions=True)


def rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def head_summary(loaded, items):
    """`headlight heads --skip-importance` without the command around it."""
    return run_report(HeadsKind(), loaded, items).stats.summary()


def main() -> None:
    torch.set_num_threads(2)
    loaded = open_model(minilm_folder())
    items = texts(1000)
    ours, theirs = [], []
    for _ in range(3):
        t0 = time.perf_counter()
        head_summary(loaded, iter(items))
        ours.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        bare(loaded, items)
        theirs.append(time.perf_counter() - t0)
    o, b = statistics.median(ours), statistics.median(theirs)
    print(
        f"heads over 1000 texts: {o:.2f} s; bare forward {b:.2f} s; "
        f"throughput ratio {b / o:.2f}x (goal >= 0.8x)"
    )

    head_summary(loaded, iter(texts(1000, seed=1)))
    after_1000 = rss_mb()
    head_summary(loaded, iter(texts(4000, seed=2)))
    after_4000 = rss_mb()
    print(
        f"peak RSS after 1000 texts {after_1000:.0f} MB, after 4000 texts {after_4000:.0f} MB: "
        f"growth {after_4000 - after_1000:.1f} MB (goal < 50 MB)"
    )

    folder = tiny.save(Path(tempfile.mkdtemp()) / "clf", "bert")
    clf = open_model(folder)
    for n in (50, 200):
        items = texts(n, seed=3)
        words = sum(len(i.text.split()) for i in items)
        t0 = time.perf_counter()
        shortcut_search(clf, items)
        dt = time.perf_counter() - t0
        print(
            f"shortcut search over {n} texts ({words} words): {dt:.2f} s, {dt / words * 1e3:.2f} ms per word"
        )


if __name__ == "__main__":
    main()
