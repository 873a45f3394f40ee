"""Score terms: what an architecture adds to the scaled dot product, recorded as data.

For layer l, query head h (key/value group g = h // (H / G)), query row i and key column j the
re-derivation check forms

    s_ij = scale_l · (q_i · k_j  +  q_i · Kʳ[δ_ij]  +  k_j · Qʳ[δ_ij])  +  B[h, δ_ij]
                      content      c2p                 p2c                relative bias
    s_ij ← cap_l · tanh(s_ij / cap_l)                                     soft-capping
    P_i  = softmax of s_i over the keys row i sees                        causal rule, window

where δ_ij = ``rel_index[i, j]`` is the row of the position tables the pair (i, j) reads.
Each term is optional; a recording carries exactly the terms its model uses, taken from the
model's own run (the projected relative embeddings Kʳ/Qʳ, the bias table B, the bucket indices)
or from its configuration (the window, the cap). The terms are defined, with their sources,
in ``docs/families.md``: c2p/p2c are DeBERTa's disentangled attention (He et al. 2021, Eq. 4),
B is the bucketed relative bias of T5 (Raffel et al. 2020, §2.1) as MPNet uses it, the cap is
Gemma 2's soft-capping, and windows are the sliding windows of Mistral, Gemma 2/3, Qwen2 and
ModernBERT's local layers.

Shapes: L layers, H query heads, R rows of a position table, d head size, T tokens.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

UNBOUNDED = -1  # a window side that does not limit the keys


@dataclass(frozen=True, eq=False)
class ScoreTerms:
    """The optional score terms of one recording (None: the model has no such term)."""

    rel_index: np.ndarray | None = None  # (T, T) int: table row δ_ij read by the pair (i, j)
    pos_key: np.ndarray | None = None  # (L, H, R, d) Kʳ: relative embeddings projected to keys
    pos_query: np.ndarray | None = None  # (L, H, R, d) Qʳ: ... projected to queries
    bias: np.ndarray | None = None  # (L, H, R) B: relative-position bias table per head
    softcap: np.ndarray | None = None  # (L,) cap per layer; 0 for a layer without one
    window: np.ndarray | None = None  # (L, 2) int: keys (before, after) a row sees; -1 = all

    def names(self, layer: int | None = None) -> tuple[str, ...]:
        """The terms present (in one layer, or anywhere), e.g. ("c2p", "window")."""
        out = []
        if self.pos_key is not None:
            out.append("c2p")
        if self.pos_query is not None:
            out.append("p2c")
        if self.bias is not None:
            out.append("relative bias")
        if self.softcap is not None and _any(self.softcap, layer, lambda c: c > 0):
            out.append("soft-capping")
        if self.window is not None and _any(self.window, layer, lambda w: (w >= 0).any()):
            out.append("window")
        return tuple(out)

    def layer_window(self, layer: int) -> tuple[int, int] | None:
        """(before, after) of a layer's window, or None when the layer sees every key."""
        if self.window is None:
            return None
        before, after = (int(x) for x in self.window[layer])
        return None if before < 0 and after < 0 else (before, after)

    def layer_cap(self, layer: int) -> float:
        return 0.0 if self.softcap is None else float(self.softcap[layer])


def _any(values: np.ndarray, layer: int | None, test) -> bool:
    rows = values if layer is None else values[layer : layer + 1]
    return any(bool(test(np.asarray(r))) for r in rows)


def visible_rows(
    rows: slice, n_tokens: int, causal: bool, window: tuple[int, int] | None, keys: slice | None = None
) -> np.ndarray | None:
    """(rows, T) bool: which keys the query rows see, or (rows, S) for the keys of the slice
    ``keys`` only; None when they see every key.

    Key j is visible from query i when j <= i (causal), i − j <= before and j − i <= after
    (a window side of −1 does not limit).
    """
    if not causal and window is None:
        return None
    i = np.arange(n_tokens)[rows, None]
    j = np.arange(n_tokens)[keys if keys is not None else slice(None)]
    offset = i - j[None, :]  # (rows, S) i − j
    visible = np.ones(offset.shape, dtype=bool)
    if causal:
        visible &= offset >= 0
    if window is not None:
        before, after = window
        if before >= 0:
            visible &= offset <= before
        if after >= 0:
            visible &= -offset <= after
    return visible


def visible_mask(n_tokens: int, causal: bool, window: tuple[int, int] | None = None) -> np.ndarray:
    """(T, T) bool: True where query row i may see key column j."""
    mask = visible_rows(slice(None), n_tokens, causal, window)
    return np.ones((n_tokens, n_tokens), dtype=bool) if mask is None else mask


def layer_masks(n_tokens: int, causal: bool, window: np.ndarray | None, n_layers: int) -> np.ndarray | None:
    """(L, T, T) bool visible keys per layer, or None when every layer sees every key."""
    windows = (
        [None] * n_layers
        if window is None
        else [None if (w < 0).all() else (int(w[0]), int(w[1])) for w in np.asarray(window)]
    )
    if not causal and all(w is None for w in windows):
        return None
    return np.stack([visible_mask(n_tokens, causal, w) for w in windows])


def table_rows(terms: ScoreTerms) -> int:
    """R, the rows of the position tables (0 without relative terms)."""
    for table in (terms.pos_key, terms.pos_query, terms.bias):
        if table is not None:
            return int(table.shape[2])
    return 0


def add_relative_terms(
    scores: np.ndarray,
    terms: ScoreTerms,
    layer: int,
    rows: slice,
    q_scaled: np.ndarray,
    p2c_table: np.ndarray | None,
) -> None:
    """Add the c2p, p2c and bias terms of ``rows`` to ``scores`` (H, rows, T), in place.

    q_scaled: (H, T, d) queries already multiplied by the layer's scale; p2c_table: (H, T, R)
    scale · k_j · Qʳ[r] for every key and table row (from ``p2c_table``), or None.
    """
    if terms.rel_index is None:
        return
    index = terms.rel_index[rows]  # (rows, T) δ_ij
    if terms.pos_key is not None:
        table = np.asarray(terms.pos_key[layer], dtype=np.float64)  # (H, R, d)
        c2p = np.matmul(q_scaled[:, rows], table.transpose(0, 2, 1))  # (H, rows, R)
        scores += np.take_along_axis(c2p, np.broadcast_to(index, (c2p.shape[0], *index.shape)), axis=2)
    if p2c_table is not None:
        cols = np.arange(index.shape[1])[None, :]  # (1, T) key j
        scores += p2c_table[:, cols, index]  # (H, rows, T): scale · k_j · Qʳ[δ_ij]
    if terms.bias is not None:
        scores += np.asarray(terms.bias[layer], dtype=np.float64)[:, index]  # (H, rows, T)


def p2c_table(
    terms: ScoreTerms, layer: int, k: np.ndarray, scale: float, n_heads: int, chunk_products: int = 1 << 18
) -> np.ndarray | None:
    """(H, T, R) scale · k_j · Qʳ[r] for one layer, or None without a p2c term.

    k: (G, T, d) keys; query head h reads the keys of its group h // (H / G). Computed in
    chunks of keys of at most ``chunk_products`` multiply-adds per matrix product.
    """
    if terms.pos_query is None:
        return None
    table = np.asarray(terms.pos_query[layer], dtype=np.float64).transpose(0, 2, 1)  # (H, d, R)
    groups = n_heads // k.shape[0]
    keys = np.asarray(k, dtype=np.float64)[np.arange(n_heads) // groups]  # (H, T, d)
    out = np.empty((n_heads, keys.shape[1], table.shape[2]))  # (H, T, R)
    step = max(1, chunk_products // max(1, table.shape[1] * table.shape[2]))
    for start in range(0, keys.shape[1], step):  # small products stay on the calling thread
        np.matmul(keys[:, start : start + step], table, out=out[:, start : start + step])
    out *= scale
    return out


def soft_cap(scores: np.ndarray, cap: float) -> None:
    """scores ← cap · tanh(scores / cap), in place (a cap of 0 leaves them alone)."""
    if cap > 0:
        scores /= cap
        np.tanh(scores, out=scores)
        scores *= cap
