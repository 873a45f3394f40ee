"""Rotary position embedding (Su et al. 2021, RoFormer, §3.4.2, Eq. 34), "rotate half" layout.

Llama-style decoders rotate each query and key vector by position-dependent angles before the
dot product. With the half-split layout the pair (x_i, x_{i+d/2}) is rotated by angle
θ_i·m at position m, with θ_i = base^(−2i/d):

    RoPE(x, m) = x ⊙ cos(mθ) + rotate_half(x) ⊙ sin(mθ),   rotate_half(x) = (−x₂, x₁)

where cos and sin tables repeat each frequency in both halves.
"""

from __future__ import annotations

import numpy as np


def rotary_tables(
    n_positions: int, head_dim: int, base: float = 10000.0
) -> tuple[np.ndarray, np.ndarray]:
    """(cos, sin) tables of shape (T, d) for positions 0..T-1 (float64)."""
    if head_dim % 2:
        raise ValueError(f"rotary embedding needs an even head size, got {head_dim}")
    inv_freq = base ** (-np.arange(0, head_dim, 2, dtype=np.float64) / head_dim)  # (d/2,)
    angles = np.outer(np.arange(n_positions, dtype=np.float64), inv_freq)  # (T, d/2)
    angles = np.concatenate([angles, angles], axis=-1)  # (T, d)
    return np.cos(angles), np.sin(angles)


def rotate_half(x: np.ndarray) -> np.ndarray:
    half = x.shape[-1] // 2
    return np.concatenate([-x[..., half:], x[..., :half]], axis=-1)


def apply_rotary(x: np.ndarray, cos: np.ndarray, sin: np.ndarray) -> np.ndarray:
    """Rotate x (..., T, d) by tables cos, sin (T, d)."""
    return x * cos + rotate_half(x) * sin
