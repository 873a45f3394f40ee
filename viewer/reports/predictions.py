"""Accuracy over a labelled text set (docs/definitions.md, "Accuracy"): the one rule the window's
text-set list and the card both use.

The labels are checked first (``set_labels``): a set with any label must have one on every text,
each one of the model's classes, else it is refused with a one-line error naming the line. So
no label is ever unknown when ``accuracy_data`` counts: accuracy is the share of labelled texts
whose predicted class is their label.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from viewer.model.loader import LoadedModel
from viewer.reports.heads import label_indices
from viewer.reports.textsets import TextItem


def set_labels(loaded: LoadedModel, items: Sequence[TextItem]) -> list[int] | None:
    """The class index of every item's label for a classifier's labelled set; None when the set
    has no label or the model is not a classifier (no accuracy then). HeadlightError naming the
    line for a missing or unknown label (``viewer.reports.heads.label_index``)."""
    if loaded.head_kind != "classifier":
        return None
    return label_indices(loaded, items)


def accuracy_data(labels: Sequence[str], gold: Sequence[int] | None, predicted: Sequence[int]) -> dict:
    """Accuracy overall and per class, and the confusion matrix.

    ``gold`` holds each item's class index (``set_labels``; None: an unlabelled set, then only
    ``{"labelled": 0}``), ``predicted`` each item's predicted class index, in the same order.
    ``confusion[a][b]`` counts the texts labelled ``labels[a]`` predicted ``labels[b]``.
    """
    if gold is None:
        return {"labelled": 0}
    y = np.asarray(gold, dtype=np.int64)  # (N,)
    pred = np.asarray(predicted, dtype=np.int64)  # (N,)
    if y.shape != pred.shape:
        raise ValueError(f"{y.size} labels for {pred.size} predictions")
    per_class = {}
    for k, name in enumerate(labels):
        mask = y == k
        per_class[name] = {
            "texts": int(mask.sum()),
            "correct": int((pred[mask] == k).sum()),
            "accuracy": float((pred[mask] == k).mean()) if mask.any() else None,
        }
    confusion = [
        [int(((y == a) & (pred == b)).sum()) for b in range(len(labels))] for a in range(len(labels))
    ]
    return {
        "labelled": int(len(y)),
        "correct": int((pred == y).sum()),
        "accuracy": float((pred == y).mean()),
        "per_class": per_class,
        "confusion": confusion,
        "confusion_order": list(labels),
    }
