"""How long a full garbage collection stops every thread once torch, transformers and matplotlib
are loaded and a model is open, with and without ``gc.freeze()``, measured side by side.

Run:  python tests/benchmarks/bench_collector.py [--model DIR]   (default: the demo model)

A full collection traverses every object the collector tracks, and it holds the GIL while it
does: the window's GUI, worker and render threads all wait. ``viewer.session.jobs.settle_imports``
freezes what the heavy imports created (it never becomes garbage); ``viewer.gui.app.tune_collector``
leaves full collections to idle moments. Prints the median full-collection pause before and after
the freeze.
"""

from __future__ import annotations

import argparse
import gc
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))


def pause(repeats: int = 7) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        gc.collect()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--model", help="model folder (default: the demo model)")
    args = parser.parse_args(argv)
    import matplotlib.pyplot  # noqa: F401  (what the window has loaded)
    import torch  # noqa: F401
    import transformers  # noqa: F401

    from viewer.demo import MODEL_DIR
    from viewer.model.loader import open_model

    open_model(args.model or MODEL_DIR)
    tracked = len(gc.get_objects())
    before = pause()
    gc.freeze()
    after = pause()
    print(
        f"full collection with {tracked} tracked objects: {before * 1e3:.0f} ms; "
        f"after gc.freeze(): {after * 1e3:.2f} ms"
    )


if __name__ == "__main__":
    main()
