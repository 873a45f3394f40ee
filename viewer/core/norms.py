"""Value-weighted norms (Kobayashi et al. 2020): attention weight times the size of what moves.

An attention layer's output for token i is (Kobayashi et al. 2020, "Attention is Not Only a
Weight", §2, the multi-head form of their re-written attention)

    y_i = sum_h sum_j α^h_ij f^h(x_j) + b_O,   f^h(x) = (x W_V^h + b_V^h) W_O^h,

so the contribution of key token j to query token i in head h is the vector α^h_ij f^h(x_j).
Its norm, not α^h_ij alone, says how much j moved into i: a large weight on a token whose
transformed vector is short moves little.

Weight convention: **row vectors times matrices**, x @ W.

=======  ===============  ===================================================================
array    shape            meaning
=======  ===============  ===================================================================
x        (T, D_in)        the layer's input vectors (after any layer norm the layer applies)
w_v      (D_in, G·d)      value projection; head group g uses columns g·d .. (g+1)·d
b_v      (G·d,) or None   value bias
w_o      (H·d, D)         output projection; head h uses rows h·d .. (h+1)·d
=======  ===============  ===================================================================

torch's ``nn.Linear`` stores its weight as (out, in) and computes x @ weight.T, so a caller
holding torch weights passes ``weight.T``. G = H except for grouped K/V heads (Llama style),
where query head h reads value group h // (H / G).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class ValueNorms:
    """Value-weighted norms of one layer."""

    per_head: np.ndarray  # (H, T, T) ‖α^h_ij f^h(x_j)‖
    head_sum: np.ndarray  # (T, T) ‖sum_h α^h_ij f^h(x_j)‖


def transformed_vectors(
    x: np.ndarray,
    w_v: np.ndarray,
    b_v: np.ndarray | None,
    w_o: np.ndarray,
    n_heads: int,
    n_kv_heads: int | None = None,
) -> np.ndarray:
    """f^h(x_j) = (x_j W_V^h + b_V^h) W_O^h for every head and token (Kobayashi et al. 2020, §2).

    x (T, D_in), w_v (D_in, G·d), b_v (G·d,) or None, w_o (H·d, D) -> (H, T, D) float64.
    Weights in x @ W convention (transpose torch ``nn.Linear.weight``). ``n_kv_heads`` (G)
    defaults to ``n_heads``; query head h uses value group h // (H / G).
    """
    x = np.asarray(x, dtype=np.float64)
    w_v = np.asarray(w_v, dtype=np.float64)
    w_o = np.asarray(w_o, dtype=np.float64)
    h_count = int(n_heads)
    g_count = h_count if n_kv_heads is None else int(n_kv_heads)
    if h_count % g_count:
        raise ValueError(f"{g_count} value groups do not divide {h_count} heads")
    if w_o.shape[0] % h_count:
        raise ValueError(f"w_o rows {w_o.shape[0]} are not a multiple of {h_count} heads")
    d = w_o.shape[0] // h_count
    if w_v.shape != (x.shape[1], g_count * d):
        raise ValueError(
            f"w_v must be (D_in={x.shape[1]}, G·d={g_count * d}), got {w_v.shape}; "
            "torch nn.Linear weights need a transpose"
        )
    v = x @ w_v  # (T, G·d)
    if b_v is not None:
        v = v + np.asarray(b_v, dtype=np.float64)
    t = x.shape[0]
    v = v.reshape(t, g_count, d).transpose(1, 0, 2)  # (G, T, d)
    v = np.repeat(v, h_count // g_count, axis=0)  # (H, T, d) group of head h is h // (H/G)
    w_o_heads = w_o.reshape(h_count, d, w_o.shape[1])  # (H, d, D)
    return np.einsum("htd,hdD->htD", v, w_o_heads)  # (H, T, D)


def value_weighted_norms(alpha: np.ndarray, f: np.ndarray) -> ValueNorms:
    """Value-weighted norms of one layer (Kobayashi et al. 2020, §2).

    per_head[h, i, j] = ‖α^h_ij f^h(x_j)‖ and head_sum[i, j] = ‖sum_h α^h_ij f^h(x_j)‖.

    alpha (H, R, T) attention of one layer (R query rows, e.g. all T or just the summary
    token's, and T key columns), f (H, T, D) from ``transformed_vectors``. Returns per_head
    (H, R, T) and head_sum (R, T), float64.

    The head sum is computed from the per-token Gram matrix of the heads' vectors,
    ‖sum_h α_h f_h‖² = sum_{h,g} α_h α_g <f_h, f_g>, so no (T, T, D) array is formed.
    """
    a = np.asarray(alpha, dtype=np.float64)
    f = np.asarray(f, dtype=np.float64)
    if a.ndim != 3 or f.ndim != 3 or a.shape[0] != f.shape[0] or a.shape[2] != f.shape[1]:
        raise ValueError(f"alpha (H, R, T) and f (H, T, D) disagree: {a.shape} vs {f.shape}")
    f_norm = np.linalg.norm(f, axis=-1)  # (H, T) ‖f^h(x_j)‖
    per_head = np.abs(a) * f_norm[:, None, :]  # (H, R, T)
    gram = np.einsum("hjD,gjD->jhg", f, f)  # (T, H, H) <f^h(x_j), f^g(x_j)>
    mixed = np.einsum("hij,jhg->gij", a, gram)  # (H, R, T) sum_h α^h_ij <f^h, f^g>
    squared = np.einsum("gij,gij->ij", mixed, a)  # (R, T)
    head_sum = np.sqrt(np.clip(squared, 0.0, None))  # (R, T)
    return ValueNorms(per_head=per_head, head_sum=head_sum)


def head_sum_norms(alpha: np.ndarray, v: np.ndarray, w_o: np.ndarray, tokens: int = 1024) -> np.ndarray:
    """head_sum of ``value_weighted_norms`` for a few query rows, without forming f.

    ‖sum_h α^h_ij f^h(x_j)‖ with f^h(x_j) = v^h_j W_O^h (Kobayashi et al. 2020, §2), where the
    values v^h_j = x_j W_V^h + b_V^h are given as captured: alpha (H, R, T), v (G, T, d) with
    query head h reading group h // (H / G), w_o (H, d, D). Per block of ``tokens`` key tokens
    and per query row, sum_h (α^h_ij v^h_j) W_O^h is accumulated in a (block, D) float64 array,
    so memory is O(tokens · D), not the (H, T, D) of ``transformed_vectors`` (604 MB for 12
    heads, 8,192 tokens and D = 768). Returns (R, T) float64.
    """
    a = np.asarray(alpha, dtype=np.float64)
    h_count, r_count, t_count = a.shape
    g_count = v.shape[0]
    if h_count % g_count or v.shape[1] != t_count or w_o.shape[:2] != (h_count, v.shape[2]):
        raise ValueError(f"alpha {a.shape}, values {v.shape} and w_o {w_o.shape} disagree")
    per_group = h_count // g_count
    out = np.empty((r_count, t_count), dtype=np.float64)
    w = np.asarray(w_o, dtype=np.float64)
    step = max(1, int(tokens))
    for start in range(0, t_count, step):
        cols = slice(start, min(t_count, start + step))
        vb = np.asarray(v[:, cols], dtype=np.float64)  # (G, b, d)
        for r in range(r_count):
            total = np.zeros((cols.stop - cols.start, w.shape[2]))  # (b, D)
            for head in range(h_count):
                total += (a[head, r, cols, None] * vb[head // per_group]) @ w[head]
            out[r, cols] = np.linalg.norm(total, axis=1)
    return out
