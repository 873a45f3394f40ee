"""The recording: what every layer and head did on one text, as plain frozen numpy data.

A recording is produced by ``viewer.model.recorder`` and consumed by everything else (the
re-derivation check, head metrics, panes, figures, the card export). It holds no torch tensors
and no reference to the model, so it can be pickled, saved and drawn without the model.

It keeps what the re-derivation needs, not every probability: per layer the per-head queries,
keys and values, the score terms and the model's own attention output. A head's probabilities
are computed when asked for (``layer(l)``, ``viewer.core.scores``), in blocks of query rows, so a
text of 8,192 tokens never holds every head's T × T at once. The model's own probabilities are
kept only where the eager kernel gave them for a short text (``own_probs``); the check then
compares those too.

Shapes (L layers, H query heads, G key/value heads, T tokens of this text, d head size):

==============  ===============  ===========================================================
field           shape            meaning
==============  ===============  ===========================================================
q               (L, H, T, d)     queries per head, after the reshape and after rotary
k               (L, G, T, d)     keys per key/value head (not repeated), after rotary
v               (L, G, T, d)     values per key/value head
context         (L, H, T, d)     the model's own attention output per head (before the
                                 output projection)
own_probs       (L, H, T, T)     the model's own probabilities (query rows, key cols), or None
scale           (L,)             the factor applied to q·k before the softmax, per layer
logits          (C,) or (V,)     classifier logits, or a causal LM's next-token logits at the
                                 summary token; empty for other heads
terms           ScoreTerms       the score terms beyond q·k the family adds (relative-position
                                 terms, bias, soft-capping, windows; ``viewer.core.terms``)
==============  ===============  ===========================================================

Padding of a batch is removed: T is this text's own token count. Which keys a query row sees
is defined once, by ``key_mask``: keys j <= i in a causal model, and in a windowed layer only
the keys inside the layer's window. The check, the entropy normalisation and the pair grid's
hatching all use it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from viewer.core.scores import LayerScores
from viewer.core.softmax import softmax
from viewer.core.summary import summary_index
from viewer.core.terms import ScoreTerms, layer_masks, visible_mask


@dataclass(frozen=True, eq=False)
class Recording:
    text: str
    tokens: tuple[str, ...]
    offsets: np.ndarray  # (T, 2) character span of each token in `text`; (0, 0) for specials
    special: np.ndarray  # (T,) bool, True for [CLS]/[SEP]/<s>/... tokens
    token_ids: np.ndarray  # (T,) int64
    q: np.ndarray  # (L, H, T, d)
    k: np.ndarray  # (L, G, T, d)
    v: np.ndarray  # (L, G, T, d)
    context: np.ndarray  # (L, H, T, d)
    scale: np.ndarray  # (L,)
    causal: bool
    logits: np.ndarray  # (C,) classifier, (V,) causal LM at the summary token, (0,) otherwise
    head_kind: str  # "classifier" | "masked-lm" | "causal-lm" | "encoder"
    labels: tuple[str, ...] = ()  # class names for a classifier, index order
    family: str = ""
    model_name: str = ""
    truncated_from: int | None = None  # original token count when the text was cut
    notes: tuple[str, ...] = field(default_factory=tuple)
    terms: ScoreTerms = field(default_factory=ScoreTerms)
    own_probs: np.ndarray | None = None  # (L, H, T, T) the model's own, where it gave them
    kernel: str = "eager"  # the attention kernel the model ran ("eager" or "sdpa")

    # -- derived sizes -------------------------------------------------------------------
    @property
    def n_layers(self) -> int:
        return int(self.q.shape[0])

    @property
    def n_heads(self) -> int:
        return int(self.q.shape[1])

    @property
    def n_kv_heads(self) -> int:
        return int(self.k.shape[1])

    @property
    def n_tokens(self) -> int:
        return int(self.q.shape[2])

    @property
    def truncated(self) -> bool:
        return self.truncated_from is not None

    def layer(self, layer: int) -> LayerScores:
        """Layer ``layer``'s attention, computed for any rows when asked (``viewer.core.scores``);
        the model's own probabilities where the recording has them."""
        own = None if self.own_probs is None else self.own_probs[layer]
        return LayerScores(
            self.q[layer], self.k[layer], float(self.scale[layer]), self.causal, self.terms, layer, own
        )

    def query_rows(self, i: int) -> np.ndarray:
        """(L, H, T) float64 every layer's and head's attention from query row i."""
        return np.stack([self.layer(layer).row(i) for layer in range(self.n_layers)])

    def attention_matrices(self, most_tokens: int = 1024) -> np.ndarray:
        """(L, H, T, T) float64 every head's whole matrix, for short texts only (the model's own
        where kept). Raises ValueError beyond ``most_tokens``: long texts are read by rows."""
        if self.n_tokens > most_tokens:
            raise ValueError(f"{self.n_tokens} tokens: read long texts by rows, not whole matrices")
        return np.stack(
            [np.stack([self.layer(i).head(h) for h in range(self.n_heads)]) for i in range(self.n_layers)]
        )

    def key_mask(self, layer: int | None = None) -> np.ndarray:
        """(T, T) bool: True where a query row of ``layer`` may see a key column.

        Causal rows see j <= i; a windowed layer's rows only the keys inside its window. With
        no layer given, the mask every layer shares (the causal rule, without windows).
        """
        window = None if layer is None else self.terms.layer_window(layer)
        return visible_mask(self.n_tokens, self.causal, window)

    def key_masks(self) -> np.ndarray | None:
        """(L, T, T) bool visible keys per layer, or None when every row sees every key."""
        return layer_masks(self.n_tokens, self.causal, self.terms.window, self.n_layers)

    def masked(self, layer: int | None = None) -> bool:
        """Whether some query row of ``layer`` (of any layer when None) misses some key."""
        if self.causal and self.n_tokens > 1:
            return True
        layers = range(self.n_layers) if layer is None else (layer,)
        return any(self.terms.layer_window(i) is not None and not self.key_mask(i).all() for i in layers)

    def class_probabilities(self) -> np.ndarray:
        """(C,) softmax of classifier logits (float64); empty for non-classifiers."""
        if self.head_kind != "classifier":
            return np.zeros(0)
        return softmax(self.logits)

    def target_distribution(self) -> np.ndarray:
        """The distribution a prediction is read from: class probabilities of a classifier, a
        causal LM's next-token probabilities at the summary token; empty otherwise."""
        if self.head_kind not in ("classifier", "causal-lm") or self.logits.size == 0:
            return np.zeros(0)
        return softmax(self.logits)

    def predicted(self) -> int | None:
        """Index of the predicted class for a classifier, else None."""
        if self.head_kind != "classifier":
            return None
        return int(np.argmax(self.logits))

    def predicted_label(self) -> str | None:
        i = self.predicted()
        if i is None:
            return None
        return self.labels[i] if i < len(self.labels) else str(i)

    def summary_index(self) -> int:
        """Token whose representation the prediction is read from.

        Encoders classify from the first token ([CLS] / <s>); causal decoders read the last
        (``viewer.core.summary``).
        """
        return summary_index(self.n_tokens, self.causal)
