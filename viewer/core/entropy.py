"""Attention entropy per query row, raw and normalised by the number of visible keys.

Each query row i of an attention matrix is a probability distribution over the keys it may see:
all T keys in an encoder, keys 0..i in a causal decoder (so row i sees i + 1 keys). A row's
entropy is at most the log of its visible key count, so dividing by that log puts every row on
the same 0-1 scale: 0 for all weight on one key, 1 for weight spread evenly.

A row that sees a single key (row 0 of a causal decoder, or every row of a one-token text) has no
choice to make: its weight is forced to 1 on that key. Its normalised entropy is *defined* as 0
(log 1 = 0 would otherwise divide 0 by 0). Averages over rows should leave such rows out, see
``viewer.core.headstats``.

The probabilities are taken as they are: keys a row may not see are assumed to carry zero
weight (the model's mask makes them exactly 0). In a windowed layer (sliding or local windows,
``viewer.core.terms``) a row sees only the keys inside its window; pass the recording's visible
mask (``Recording.key_mask(layer)``) as ``visible`` and each row is normalised by the log of its
own visible key count.
"""

from __future__ import annotations

import numpy as np
from scipy.special import entr


def visible_keys(n_tokens: int, causal: bool) -> np.ndarray:
    """(T,) int64: how many keys each query row may see.

    Causal row i sees keys 0..i, i.e. i + 1 keys; an encoder row sees all T keys.
    """
    if causal:
        return np.arange(1, n_tokens + 1, dtype=np.int64)  # (T,)
    return np.full(n_tokens, n_tokens, dtype=np.int64)  # (T,)


def row_entropy(probs: np.ndarray) -> np.ndarray:
    """Shannon entropy of each query row, in nats: (..., T, T) -> (..., T) float64.

    H_i = -sum_j a_ij ln a_ij with 0 ln 0 = 0 (Shannon 1948, "A Mathematical Theory of
    Communication", §6 Theorem 2, H = -K sum p_i log p_i, here with K = 1 and natural log).
    Rows are the second-to-last axis, keys the last.
    """
    a = np.asarray(probs, dtype=np.float64)
    return entr(np.clip(a, 0.0, None)).sum(axis=-1)  # (..., T)


def normalized_entropy(probs: np.ndarray, causal: bool, visible: np.ndarray | None = None) -> np.ndarray:
    """Row entropy divided by the log of the row's visible key count: (..., T, T) -> (..., T).

    H_i / ln n_i, with n_i = i + 1 for a causal row and n_i = T otherwise, or n_i the number of
    True entries in row i of ``visible`` (broadcastable to probs) when given (Shannon 1948
    entropy; ln n_i is its maximum, reached by the uniform distribution over the n_i visible
    keys). A row with n_i = 1 has normalised entropy 0 by definition. Values lie in [0, 1] up to
    rounding.
    """
    a = np.asarray(probs, dtype=np.float64)
    rows, keys = a.shape[-2], a.shape[-1]
    if visible is not None:
        n = np.asarray(visible, dtype=bool).sum(axis=-1)  # (..., T) keys each row sees
    elif causal and rows != keys:
        raise ValueError(f"causal attention must be square, got {rows} rows and {keys} keys")
    else:
        n = visible_keys(keys, True) if causal else np.full(rows, keys)  # (T,) keys per row
    h = row_entropy(a)  # (..., T)
    log_n = np.log(n.astype(np.float64))  # (T,)
    safe = np.where(n > 1, log_n, 1.0)  # (T,) avoid 0/0 for single-key rows
    return np.where(n > 1, h / safe, 0.0)  # (..., T)
