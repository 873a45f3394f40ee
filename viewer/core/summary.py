"""The summary token and the attention it pays: the one definition used by every report.

A sequence classifier reads its prediction from one position, the *summary token*: the first
token of an encoder ([CLS], <s>), or the last real token of a causal decoder, the only decoder
position that sees the whole text (and the position a decoder's sequence-classification head
pools; transformers' ``*ForSequenceClassification`` takes the last non-padding token). A causal
language model's next-token prediction is read from the last token too.

*Summary-token attention* is the last layer's attention row of that token: per head (H, T), or
its head mean (T,). Its softmax already runs over every key the token sees, so nothing is
re-normalised.
"""

from __future__ import annotations

import numpy as np


def summary_index(n_tokens: int, causal: bool) -> int:
    """The summary token of a text of ``n_tokens`` tokens (no padding)."""
    return n_tokens - 1 if causal else 0


def summary_attention(row: np.ndarray, head: int | None = None) -> np.ndarray:
    """Attention from the summary token: its row of one layer, (H, T) -> (T,) float64.

    The head mean Ā[s, :] = (1/H) Σ_h A_h[s, :] when ``head`` is None, else A_head[s, :].
    ``row`` is every head's attention from the summary token s (``LayerScores.row(s)``).
    """
    a = np.asarray(row)
    if head is not None:
        return a[head].astype(np.float64)
    return a.mean(axis=0, dtype=np.float64)


def summary_share(row: np.ndarray, tokens: np.ndarray, head: int | None = None) -> float:
    """Share of the summary token's attention that lands on ``tokens``: Σ_{j ∈ tokens} Ā[s, j].

    row (H, T) of the last layer. With the head mean this is a word's ``focus`` in the shortcut
    search (docs/definitions.md, "Word knockout").
    """
    return float(summary_attention(row, head)[np.asarray(tokens, dtype=np.int64)].sum())


def summary_head_shares(row: np.ndarray, tokens: np.ndarray) -> np.ndarray:
    """``summary_share`` in every head at once: (H,) float64, Σ_{j ∈ tokens} A_h[s, j].

    Their mean over heads is the head-mean share (up to float rounding)."""
    a = np.asarray(row).astype(np.float64)
    return a[:, np.asarray(tokens, dtype=np.int64)].sum(axis=1)
