"""Rotary position embedding (Su et al. 2021, RoFormer, §3.4.2, Eq. 34), "rotate half" layout.

Llama-style decoders rotate each query and key vector by position-dependent angles before the
dot product. With the half-split layout the pair (x_i, x_{i+d/2}) is rotated by angle
θ_i·m at position m, with θ_i = base^(−2i/d):

    RoPE(x, m) = x ⊙ cos(mθ) + rotate_half(x) ⊙ sin(mθ),   rotate_half(x) = (−x₂, x₁)

where cos and sin tables repeat each frequency in both halves.

Partial rotary (GPT-NeoX's ``rotary_pct``, Phi-3's ``partial_rotary_factor``): only the first r
dimensions of each head are rotated, r being the width of the tables, and the other d − r pass
through unchanged (docs/families.md). Scaled rotary of any kind (linear, dynamic, llama3, yarn,
longrope) changes only the tables, which Headlight takes from the model itself.
"""

from __future__ import annotations

import numpy as np


def rotate_half(x: np.ndarray) -> np.ndarray:
    half = x.shape[-1] // 2
    return np.concatenate([-x[..., half:], x[..., :half]], axis=-1)


def apply_rotary(x: np.ndarray, cos: np.ndarray, sin: np.ndarray) -> np.ndarray:
    """Rotate the first r dimensions of x (..., T, d) by tables cos, sin (T, r), r <= d."""
    r = cos.shape[-1]
    if r > x.shape[-1] or r % 2:
        raise ValueError(f"rotary tables of width {r} do not fit head size {x.shape[-1]}")
    if r == x.shape[-1]:
        return x * cos + rotate_half(x) * sin
    part = x[..., :r]
    return np.concatenate([part * cos + rotate_half(part) * sin, x[..., r:]], axis=-1)
