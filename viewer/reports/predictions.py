"""Predictions over a text set, and accuracy where the set carries labels."""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from viewer.model.loader import LoadedModel
from viewer.reports.heads import label_indices
from viewer.reports.textsets import TextItem


def predict_items(loaded: LoadedModel, items: Sequence[TextItem], batch_size: int = 32,
                  progress: Callable[[int], None] | None = None) -> np.ndarray:
    """(N, C) class probabilities (or next-token distributions) for every item, in order."""
    out = []
    for start in range(0, len(items), batch_size):
        chunk = items[start:start + batch_size]
        out.append(loaded.predict(loaded.encode([i.text for i in chunk])))
        if progress:
            progress(len(chunk))
    return np.concatenate(out, axis=0)


def accuracy_data(loaded: LoadedModel, items: Sequence[TextItem],
                  probabilities: np.ndarray) -> dict:
    """Accuracy overall and per class over the labelled items (classifiers only)."""
    gold = label_indices(loaded, items)
    if gold is None or loaded.head_kind != "classifier":
        return {"labelled": 0}
    pred = probabilities.argmax(axis=1)
    y = np.asarray(gold)
    per_class = {}
    for k, name in enumerate(loaded.labels):
        mask = y == k
        per_class[name] = {"texts": int(mask.sum()),
                           "correct": int((pred[mask] == k).sum()),
                           "accuracy": float((pred[mask] == k).mean()) if mask.any() else None}
    confusion = [[int(((y == a) & (pred == b)).sum()) for b in range(len(loaded.labels))]
                 for a in range(len(loaded.labels))]
    return {"labelled": int(len(y)), "correct": int((pred == y).sum()),
            "accuracy": float((pred == y).mean()), "per_class": per_class,
            "confusion": confusion, "confusion_order": list(loaded.labels)}
