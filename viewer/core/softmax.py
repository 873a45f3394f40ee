"""The one softmax of the numeric core, in float64.

softmax(z)_j = exp(z_j − m) / Σ_k exp(z_k − m) over the last axis, for any constant m per row
(common practice: m is the row maximum, which keeps exp from overflowing). Entries a row may not
see are given −∞ and come out exactly 0; a row that sees nothing stays all zero instead of
becoming NaN.

The re-derivation check calls this on millions of rows, so the shift is skipped when it cannot
matter: exp of float64 scores within ±``SAFE_EXP`` neither overflows nor loses a whole row to
underflow, and m = 0 changes nothing mathematically.
"""

from __future__ import annotations

import numpy as np

SAFE_EXP = 600.0


def softmax_in_place(s: np.ndarray) -> None:
    """Softmax over the last axis of the float64 array ``s``, in place."""
    m = s.max(axis=-1, keepdims=True)
    m[~np.isfinite(m)] = 0.0  # a row that sees no key stays all zero
    if m.size and (m.max() > SAFE_EXP or m.min() < -SAFE_EXP):
        s -= m
    np.exp(s, out=s)
    total = s.sum(axis=-1, keepdims=True)
    total[total == 0] = 1.0
    np.reciprocal(total, out=total)
    s *= total


def softmax(scores: np.ndarray, visible: np.ndarray | None = None) -> np.ndarray:
    """Softmax over the last axis in float64; ``visible`` (broadcastable bool) masks entries."""
    s = np.array(scores, dtype=np.float64)  # a private copy, worked on in place
    if visible is not None:
        s[..., ~np.asarray(visible, dtype=bool)] = -np.inf
    softmax_in_place(s)
    return s
