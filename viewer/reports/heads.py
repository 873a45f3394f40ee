"""Head summaries over a text set: streaming head metrics, head importance, head knockout."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence

import numpy as np

from viewer.core.headstats import HeadStats, HeadSummary
from viewer.errors import HeadlightError
from viewer.model.attribution import head_importance_sums, head_knockout_effects
from viewer.model.loader import LoadedModel
from viewer.reports.textsets import TextItem, chunks


def head_summary(loaded: LoadedModel, items: Iterable[TextItem], batch_size: int = 16,
                 progress: Callable[[int], None] | None = None) -> HeadSummary:
    """Entropy, distance, special share, previous/same/next share and confidence per head.

    The texts are streamed: memory depends on the batch size and the model, not on the number of
    texts (the accumulator holds a few (L, H) sums).
    """
    stats = HeadStats(loaded.n_layers, loaded.n_heads)
    for chunk in chunks(items, batch_size * 4):
        for att in loaded.attentions([i.text for i in chunk], batch_size=batch_size):
            stats.add(att.probs, att.special, att.causal, visible=att.key_masks())
        if progress:
            progress(len(chunk))
    if stats.texts == 0:
        raise HeadlightError("the text set holds no texts")
    return stats.summary()


def label_indices(loaded: LoadedModel, items: Sequence[TextItem]) -> list[int] | None:
    """Class indices of the items' labels, None when no item has a label."""
    if all(i.label is None for i in items):
        return None
    index = {name: k for k, name in enumerate(loaded.labels)}
    out = []
    for item in items:
        if item.label is None:
            raise HeadlightError(f"line {item.line} has no label while others do")
        if item.label not in index:
            known = ", ".join(loaded.labels)
            raise HeadlightError(f"line {item.line}: label {item.label!r} is not one of {known}")
        out.append(index[item.label])
    return out


def _require_prediction(loaded: LoadedModel, what: str) -> None:
    if loaded.head_kind not in ("classifier", "causal-lm"):
        raise HeadlightError(
            f"{what} needs a prediction to knock out; {loaded.name} has no classifier or "
            f"language-model head (head kind: {loaded.head_kind}); use a sequence classifier "
            "or a causal LM"
        )


def head_importance(loaded: LoadedModel, items: Sequence[TextItem], batch_size: int = 16,
                    progress: Callable[[int], None] | None = None) -> dict[str, np.ndarray]:
    """Head importance (Michel et al. 2019, Eq. 2), ℓ2-normalised per layer as in their §4.

    Targets are the file's labels when present, else the model's own predictions.
    """
    _require_prediction(loaded, "head importance")
    texts = [i.text for i in items]
    targets = label_indices(loaded, items) if loaded.head_kind == "classifier" else None
    source = "labels"
    if targets is None:
        source = "predictions"
        targets = []
        for start in range(0, len(texts), batch_size):
            targets.extend(loaded.predict(loaded.encode(texts[start:start + batch_size]))
                           .argmax(axis=1).tolist())
    raw = head_importance_sums(loaded, texts, targets, batch_size, progress) / len(texts)
    norms = np.linalg.norm(raw, axis=1, keepdims=True)
    normalised = np.divide(raw, norms, out=np.zeros_like(raw), where=norms > 0)
    return {"importance": normalised, "importance_raw": raw, "importance_targets": source}


def head_knockout(loaded: LoadedModel, items: Sequence[TextItem], batch_size: int = 16,
                  progress: Callable[[int], None] | None = None) -> dict[str, np.ndarray]:
    """Each head knocked out alone: mean drop of the predicted-class probability, accuracy."""
    _require_prediction(loaded, "head knockout")
    labels = label_indices(loaded, items) if loaded.head_kind == "classifier" else None
    return head_knockout_effects(loaded, [i.text for i in items], labels, batch_size, progress)
