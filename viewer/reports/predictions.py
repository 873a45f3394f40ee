"""Accuracy over a labelled text set, from the per-text predictions of one pass
(``viewer.reports.heads.scan_text_set`` / ``runs.predictions_data``)."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from viewer.model.loader import LoadedModel
from viewer.reports.heads import label_indices
from viewer.reports.textsets import TextItem


def accuracy_data(loaded: LoadedModel, items: Sequence[TextItem], predicted: Sequence[int]) -> dict:
    """Accuracy overall and per class over the labelled items (classifiers only).

    ``predicted`` holds the predicted class index of every item, in order.
    """
    gold = label_indices(loaded, items)
    if gold is None or loaded.head_kind != "classifier":
        return {"labelled": 0}
    pred = np.asarray(predicted)
    y = np.asarray(gold)
    per_class = {}
    for k, name in enumerate(loaded.labels):
        mask = y == k
        per_class[name] = {
            "texts": int(mask.sum()),
            "correct": int((pred[mask] == k).sum()),
            "accuracy": float((pred[mask] == k).mean()) if mask.any() else None,
        }
    confusion = [
        [int(((y == a) & (pred == b)).sum()) for b in range(len(loaded.labels))]
        for a in range(len(loaded.labels))
    ]
    return {
        "labelled": int(len(y)),
        "correct": int((pred == y).sum()),
        "accuracy": float((pred == y).mean()),
        "per_class": per_class,
        "confusion": confusion,
        "confusion_order": list(loaded.labels),
    }
