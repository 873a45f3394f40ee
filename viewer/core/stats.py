"""Small statistics from SciPy: the Wilson score interval and Spearman rank correlation.

Both are thin wrappers that fix the conventions Headlight relies on; the arithmetic is SciPy's.
``scipy.stats`` is imported on first use: it takes about two seconds to import, and modules that
only need a constant from their neighbours (the window's panes) must not wait for it.
"""

from __future__ import annotations

import math
import warnings
from functools import lru_cache

import numpy as np


@lru_cache(maxsize=65536)
def _wilson(k: int, n: int, level: float) -> tuple[float, float]:
    from scipy.stats import binomtest

    ci = binomtest(k, n).proportion_ci(confidence_level=level, method="wilson")
    return max(0.0, float(ci.low)), min(1.0, float(ci.high))


def wilson_interval(successes: int, trials: int, level: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion (Wilson 1927, JASA 22:209-212).

    ``scipy.stats.binomtest(k, n).proportion_ci(method="wilson")``, without continuity
    correction, at confidence ``level`` (default 95%). With n = 0 nothing is known and the
    interval is (0, 1). Results are cached per (k, n): a shortcut ranking asks for the same
    counts many times, and one SciPy call costs 0.4-0.8 ms against about 1 µs cached
    (``tests/benchmarks/bench_stats.py``).
    """
    k, n = int(successes), int(trials)
    if n < 0 or not 0 <= k <= max(n, 0):
        raise ValueError(f"need 0 <= successes <= trials, got {k} of {n}")
    if n == 0:
        return 0.0, 1.0
    return _wilson(k, n, float(level))


def spearman(x: np.ndarray, y: np.ndarray) -> float:
    """Spearman rank correlation (Spearman 1904), ties as mid-ranks: ``scipy.stats.spearmanr``.

    Returns NaN when either side is constant (the correlation is undefined) or has fewer than two
    values; inputs must be finite and of equal length (ValueError otherwise).
    """
    a = np.asarray(x, dtype=np.float64).ravel()
    b = np.asarray(y, dtype=np.float64).ravel()
    if a.shape != b.shape:
        raise ValueError(f"spearman needs equal lengths, got {a.size} and {b.size}")
    if not (np.isfinite(a).all() and np.isfinite(b).all()):
        raise ValueError("spearman needs finite values")
    if a.size < 2 or np.ptp(a) == 0 or np.ptp(b) == 0:
        return float("nan")
    from scipy.stats import ConstantInputWarning, spearmanr

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConstantInputWarning)
        rho = float(spearmanr(a, b).statistic)
    return rho if math.isnan(rho) else max(-1.0, min(1.0, rho))
