"""Head summaries over a text set: a streaming, mergeable accumulator of per-head metrics.

``HeadStats`` keeps float64 sums and row counts of shape (L, H) and nothing per text, so its
memory does not depend on how many texts it has seen. Two accumulators filled on different
parts of a text set (another process, another batch) ``merge`` into the one a single pass
would have produced; ``state`` / ``from_state`` turn one into plain arrays and back, exactly
(a run folder keeps finished shards that way, docs/scale.md).

Every metric is a **mean over query rows**, pooled over all texts (a long text weighs more than
a short one, in proportion to its rows). For a query row i with attention a_i. over keys j:

==============  =======================================  ======================================
metric          per row                                  rows counted
==============  =======================================  ======================================
entropy         H_i / ln n_i (``viewer.core.entropy``)   rows that see more than one key
distance        sum_j a_ij |i - j|                       all rows
special         sum_{j special} a_ij                     all rows
previous        a_{i, i-1}                               rows i >= 1
same            a_ii                                     all rows
next            a_{i, i+1}                               rows i <= T-2 of an encoder; none in a
                                                         causal model (key i+1 is not visible)
confidence      max_j a_ij (Voita et al. 2019)           all rows
==============  =======================================  ======================================

Which keys a row sees is the causal rule, or, when ``add`` is given the recording's per-layer
visible mask (``Recording.key_masks()``), that mask: windowed layers then normalise entropy by
the keys inside each row's window, and ``previous``/``next`` count the rows that can see that
neighbour. Row counts are kept per layer for that reason.

Every metric is a sum over rows, so a text is added block by block of query rows
(``add_block``, from ``viewer.core.scores``): a long text never needs a head's whole T × T, and a
layer's probabilities are computed once for the check and the metrics together
(``viewer.core.attention.layer_pass``). ``add`` (dense arrays) and ``add_recording`` go through
the same blocks.

A metric with no counted rows is NaN (e.g. ``next`` when only causal texts were added);
``to_dict`` writes NaN as ``None`` so the JSON stays valid. Row 0 of a causal model is forced
(all weight on itself): it is left out of the entropy mean, where it would add a fake 0, and kept
in the others, where it is what the model actually does.

"Confidence" follows Voita et al. (2019), who define a head's confidence as the average of its
maximum attention weight over tokens; they leave out the end-of-sentence token, here every query
row counts (use ``special`` alongside to see heads that park weight on special tokens).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from viewer.core.entropy import normalized_entropy
from viewer.core.scores import Block, LayerScores

METRICS: tuple[str, ...] = (
    "entropy",
    "distance",
    "special",
    "previous",
    "same",
    "next",
    "confidence",
)


@dataclass(frozen=True, eq=False)
class HeadSummary:
    """Per-head means over a text set; every array is (L, H) float64."""

    texts: int
    rows: int  # query rows seen (sum of T over texts)
    entropy: np.ndarray  # (L, H) mean normalised entropy, rows with > 1 visible key
    distance: np.ndarray  # (L, H) mean attention distance in tokens
    special: np.ndarray  # (L, H) mean share of weight on special tokens
    previous: np.ndarray  # (L, H) mean weight on the previous token
    same: np.ndarray  # (L, H) mean weight on the query's own token
    next: np.ndarray  # (L, H) mean weight on the next token (NaN for causal models)
    confidence: np.ndarray  # (L, H) mean maximum weight (Voita et al. 2019)

    @property
    def n_layers(self) -> int:
        return int(self.entropy.shape[0])

    @property
    def n_heads(self) -> int:
        return int(self.entropy.shape[1])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: ``layers``, ``heads``, ``texts``, ``rows`` and each metric as L x H lists."""
        out: dict[str, Any] = {
            "layers": self.n_layers,
            "heads": self.n_heads,
            "texts": self.texts,
            "rows": self.rows,
        }
        for name in METRICS:
            out[name] = _json_grid(getattr(self, name))
        return out


def _layer_masks(visible: np.ndarray | None, n_layers: int, t: int) -> np.ndarray | None:
    """(L, T, T) bool masks from (L, T, T) or (T, T), or None."""
    if visible is None:
        return None
    mask = np.asarray(visible, dtype=bool)
    if mask.shape == (t, t):
        return np.broadcast_to(mask, (n_layers, t, t))
    if mask.shape != (n_layers, t, t):
        raise ValueError(f"visible mask {mask.shape} does not fit {n_layers} layers of {t} tokens")
    return mask


def _json_grid(a: np.ndarray) -> list[list[float | None]]:
    return [[None if math.isnan(v) else float(v) for v in row] for row in a.tolist()]


class HeadStats:
    """Streaming accumulator of head metrics over texts; state is (L, H) sums plus row counts."""

    __slots__ = ("n_layers", "n_heads", "texts", "_sums", "_rows")

    def __init__(self, n_layers: int, n_heads: int) -> None:
        self.n_layers = int(n_layers)
        self.n_heads = int(n_heads)
        self.texts = 0
        self._sums = np.zeros((len(METRICS), self.n_layers, self.n_heads))  # (M, L, H) float64
        # (M, L) rows counted per metric and layer
        self._rows = np.zeros((len(METRICS), self.n_layers), dtype=np.int64)

    def add(
        self, probs: np.ndarray, special: np.ndarray, causal: bool, visible: np.ndarray | None = None
    ) -> None:
        """Add one text's attention, probs (L, H, T, T), special (T,) bool.

        visible: (L, T, T) or (T, T) bool keys each query row sees (``Recording.key_masks()``);
        None for the causal rule alone.
        """
        probs = np.asarray(probs)
        special = np.asarray(special, dtype=bool)
        if probs.ndim != 4 or probs.shape[:2] != (self.n_layers, self.n_heads):
            raise ValueError(f"probs must be (L={self.n_layers}, H={self.n_heads}, T, T), got {probs.shape}")
        t = probs.shape[2]
        if probs.shape[3] != t or special.shape != (t,):
            raise ValueError(f"probs {probs.shape} and special {special.shape} disagree on T")
        self.texts += 1
        if t == 0:
            return
        masks = _layer_masks(visible, self.n_layers, t)
        if masks is None and causal:
            masks = np.broadcast_to(np.tril(np.ones((t, t), dtype=bool)), (self.n_layers, t, t))
        everything = slice(0, t)
        for layer in range(self.n_layers):  # one layer at a time bounds the float64 copy
            mask = None if masks is None else masks[layer]
            block = Block(
                slice(0, self.n_heads), everything, everything, probs[layer].astype(np.float64), mask
            )
            self.add_block(layer, block, special)

    def add_recording(self, rec: Any) -> None:
        """Add one recording (``viewer.core.recording.Recording``), layer by layer, block by
        block: the model's own probabilities where it kept them, else re-derived ones."""
        for layer in range(rec.n_layers):
            self.add_layer(layer, rec.layer(layer), rec.special)
        self.count_text()

    def add_layer(self, layer: int, scores: LayerScores, special: np.ndarray) -> None:
        """Add every block of one layer of one text (call ``count_text`` once per text)."""
        for block in scores.blocks(own=True):
            self.add_block(layer, block, special)

    def count_text(self) -> None:
        self.texts += 1

    def add_block(self, layer: int, block: Block, special: np.ndarray) -> None:
        """Add the rows of one block of probabilities (every metric is a sum over rows).

        Row counts are per layer, so they are taken from the block of the first heads."""
        p = block.p  # (h, b, S) float64
        h, b, span = p.shape
        rows = np.arange(block.rows.start, block.rows.stop)  # (b,) query i
        first_key = block.keys.start
        visible = np.ones((b, span), dtype=bool) if block.visible is None else block.visible  # (b, S)
        n_keys = visible.sum(axis=1)  # (b,) keys each row sees
        multi_key = n_keys > 1  # rows with a real choice
        heads = block.heads
        sums = self._sums[:, layer, heads]  # (M, h) a view: written in place
        ent = normalized_entropy(p, False, visible)  # (h, b)
        sums[0] += ent[:, multi_key].sum(axis=-1)
        keys = np.arange(first_key, block.keys.stop)  # (S,) key j
        dist = np.abs(rows[:, None] - keys[None, :]).astype(np.float64)  # (b, S) |i - j|
        sums[1] += p.reshape(h, -1) @ dist.ravel()  # sum_ij a_ij |i - j|
        sums[2] += (p @ np.asarray(special, dtype=np.float64)[block.keys]).sum(axis=-1)
        counted = []
        for m, offset in ((3, -1), (4, 0), (5, 1)):  # previous, same, next: key i + offset
            col = rows + offset - first_key  # (b,) column of that key in the span
            inside = (col >= 0) & (col < span)
            seen = np.zeros(b, dtype=bool)
            seen[inside] = visible[np.flatnonzero(inside), col[inside]]
            sums[m] += p[:, seen, col[seen]].sum(axis=-1)
            counted.append(int(seen.sum()))
        sums[6] += p.max(axis=-1, initial=0.0).sum(axis=-1)
        if heads.start == 0:
            self._rows[:, layer] += (int(multi_key.sum()), b, b, counted[0], b, counted[2], b)

    def merge(self, other: HeadStats) -> HeadStats:
        """Fold ``other`` into this accumulator (in place) and return self."""
        if (other.n_layers, other.n_heads) != (self.n_layers, self.n_heads):
            raise ValueError(
                f"cannot merge head stats of shape ({other.n_layers}, {other.n_heads}) "
                f"into ({self.n_layers}, {self.n_heads})"
            )
        self.texts += other.texts
        self._sums += other._sums
        self._rows += other._rows
        return self

    def state(self) -> dict[str, np.ndarray]:
        """The accumulator as plain arrays (no pickle needed); ``from_state`` restores it exactly."""
        return {
            "texts": np.array(self.texts, dtype=np.int64),
            "sums": self._sums.copy(),
            "rows": self._rows.copy(),
        }

    @classmethod
    def from_state(cls, state: dict[str, np.ndarray]) -> HeadStats:
        sums = np.asarray(state["sums"], dtype=np.float64)  # (M, L, H)
        rows = np.asarray(state["rows"], dtype=np.int64)  # (M, L) rows counted per layer
        if sums.ndim != 3 or sums.shape[0] != len(METRICS) or rows.shape != (len(METRICS), sums.shape[1]):
            raise ValueError(f"not a head-stats state: sums {sums.shape}, rows {rows.shape}")
        stats = cls(sums.shape[1], sums.shape[2])
        stats.texts = int(state["texts"])
        stats._sums[...] = sums
        stats._rows[...] = rows
        return stats

    @property
    def rows(self) -> int:
        """Query rows seen over all texts (sum of T)."""
        return int(self._rows[METRICS.index("same")].max(initial=0))

    def state_nbytes(self) -> int:
        """Bytes held by the accumulator's arrays; constant in the number of texts."""
        return int(self._sums.nbytes + self._rows.nbytes)

    def summary(self) -> HeadSummary:
        """Means over counted rows as a frozen ``HeadSummary`` (NaN where no row counted)."""
        means = {}
        for m, name in enumerate(METRICS):
            n = self._rows[m][:, None].astype(np.float64)  # (L, 1) rows counted per layer
            with np.errstate(invalid="ignore", divide="ignore"):
                means[name] = np.where(n > 0, self._sums[m] / np.where(n > 0, n, 1.0), np.nan)
        return HeadSummary(texts=self.texts, rows=self.rows, **means)

    def to_dict(self) -> dict[str, Any]:
        """``summary().to_dict()``: JSON-ready lists."""
        return self.summary().to_dict()
