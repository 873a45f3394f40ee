"""The one softmax of the numeric core, in float64.

softmax(z)_j = exp(z_j − max z) / Σ_k exp(z_k − max z) over the last axis (subtracting the row
maximum changes nothing mathematically and keeps exp from overflowing; common practice).
Entries a row may not see are given −∞ and come out exactly 0; a row that sees nothing stays
all zero instead of becoming NaN.
"""

from __future__ import annotations

import numpy as np


def softmax(scores: np.ndarray, visible: np.ndarray | None = None) -> np.ndarray:
    """Softmax over the last axis in float64; ``visible`` (broadcastable bool) masks entries."""
    s = np.array(scores, dtype=np.float64)  # a private copy, worked on in place
    if visible is not None:
        s[..., ~np.asarray(visible, dtype=bool)] = -np.inf
    m = np.max(s, axis=-1, keepdims=True)
    m[~np.isfinite(m)] = 0.0  # a row that sees no key stays all zero
    s -= m
    np.exp(s, out=s)
    total = s.sum(axis=-1, keepdims=True)
    total[total == 0] = 1.0
    s /= total
    return s
