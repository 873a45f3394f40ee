"""Small statistics: the Wilson score interval and Spearman rank correlation."""

from __future__ import annotations

import math

import numpy as np

Z95: float = 1.959963984540054
"""Two-sided 95% standard normal quantile, Φ⁻¹(0.975)."""


def wilson_interval(successes: int, trials: int, z: float = Z95) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion (Wilson 1927,
    "Probable inference, the law of succession, and statistical inference", JASA 22:209-212).

    With p = k / n:

        centre = (p + z²/(2n)) / (1 + z²/n)
        half   = z / (1 + z²/n) · sqrt(p(1 - p)/n + z²/(4n²))

    returns (centre - half, centre + half), clipped to [0, 1]. z defaults to the two-sided 95%
    quantile. With n = 0 nothing is known and the interval is (0, 1).
    """
    k, n = int(successes), int(trials)
    if n < 0 or not 0 <= k <= max(n, 0):
        raise ValueError(f"need 0 <= successes <= trials, got {k} of {n}")
    if n == 0:
        return 0.0, 1.0
    p = k / n
    z2 = z * z
    denom = 1.0 + z2 / n
    centre = (p + z2 / (2 * n)) / denom
    half = z / denom * math.sqrt(p * (1.0 - p) / n + z2 / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def average_ranks(values: np.ndarray) -> np.ndarray:
    """Ranks 1..n of a 1-D array, tied values sharing the mean of their ranks: (n,) -> (n,).

    The mid-rank rule of Spearman's coefficient with ties (Kendall 1948, "Rank Correlation
    Methods"): a group of tied values occupying ranks r..r+m-1 all get r + (m - 1)/2.
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    order = np.argsort(x, kind="stable")  # (n,)
    sorted_x = x[order]
    starts = np.flatnonzero(np.r_[True, sorted_x[1:] != sorted_x[:-1]])  # first index of groups
    ends = np.r_[starts[1:], x.size]  # one past the last index of each group
    group_rank = (starts + ends + 1) / 2.0  # mean of ranks starts+1 .. ends
    ranks = np.empty(x.size)
    ranks[order] = np.repeat(group_rank, ends - starts)
    return ranks


def spearman(x: np.ndarray, y: np.ndarray) -> float:
    """Spearman rank correlation: Pearson correlation of the average ranks (Spearman 1904).

    rho = sum (r_i - r̄)(s_i - s̄) / sqrt(sum (r_i - r̄)² · sum (s_i - s̄)²), r and s the mid-ranks
    of x and y (ties share their mean rank). Returns NaN when either side is constant (all its
    ranks equal, so the correlation is undefined) or has fewer than two values. Inputs must be
    finite and of equal length (ValueError otherwise).
    """
    a = np.asarray(x, dtype=np.float64).ravel()
    b = np.asarray(y, dtype=np.float64).ravel()
    if a.shape != b.shape:
        raise ValueError(f"spearman needs equal lengths, got {a.size} and {b.size}")
    if not (np.isfinite(a).all() and np.isfinite(b).all()):
        raise ValueError("spearman needs finite values")
    if a.size < 2:
        return float("nan")
    r = average_ranks(a) - (a.size + 1) / 2.0  # centred ranks; mean rank is (n + 1)/2
    s = average_ranks(b) - (b.size + 1) / 2.0
    denom = math.sqrt(float(r @ r) * float(s @ s))
    if denom == 0.0:
        return float("nan")
    return max(-1.0, min(1.0, float(r @ s) / denom))
