"""The Wilson interval's cost: one SciPy call against the cached answer, measured side by side.

Run:  python tests/benchmarks/bench_stats.py

``viewer.core.stats.wilson_interval`` keeps SciPy's answers per (successes, trials), since a
shortcut ranking asks for the same counts many times. Prints the time of one uncached call
(``scipy.stats.binomtest(k, n).proportion_ci(method="wilson")``), of one cached call, and their
ratio, over the counts a ranking of 2,000 words seen in up to 90 texts asks for.
"""

from __future__ import annotations

import random
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from viewer.core import stats  # noqa: E402


def main() -> None:
    rng = random.Random(0)
    counts = [(k, n) for n in (rng.randint(3, 90) for _ in range(2000)) for k in [rng.randint(0, n)]]
    stats.wilson_interval(1, 2)  # import SciPy before timing
    uncached, cached = [], []
    for _ in range(5):
        stats._wilson.cache_clear()
        t0 = time.perf_counter()
        for k, n in counts:
            stats.wilson_interval(k, n)
        uncached.append((time.perf_counter() - t0) / len(counts))
        t0 = time.perf_counter()
        for k, n in counts:
            stats.wilson_interval(k, n)
        cached.append((time.perf_counter() - t0) / len(counts))
    u, c = statistics.median(uncached), statistics.median(cached)
    print(f"wilson_interval: {u * 1e3:.3f} ms a SciPy call, {c * 1e6:.2f} µs cached: {u / c:.0f}x")


if __name__ == "__main__":
    main()
