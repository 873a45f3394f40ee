"""What the compare pane says beside the compared grid: both predictions, their class
probabilities and the difference, or that the two runs are identical.

Two runs are **identical inputs** when they read the same token ids through the same checkpoint:
a second text equal to the first (after tokenizing), or a second checkpoint folder that is the
open one. Their numbers are then the same by construction, and the compare pane says so instead
of showing differences of zero.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from viewer.session.analysis import TextAnalysis

PROBABILITY_FORMAT = "{:.3f}"  # one format for every probability the pane writes
DIFFERENCE_FORMAT = "{:+.3f}"


@dataclass(frozen=True)
class CompareSummary:
    identical: bool
    current: str  # "this run: predicted billing · billing 0.912, repair 0.061, ..."
    compared: str
    difference: str  # "compared − current: billing −0.850, repair +0.800, ..." or the identity

    def lines(self) -> tuple[str, str, str]:
        return self.current, self.compared, self.difference


def same_folder(a: str, b: str) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.abspath(a) == os.path.abspath(b)


def identical_inputs(
    current: TextAnalysis, compared: TextAnalysis, target: tuple[str, str] | None, model_folder: str | None
) -> bool:
    """Whether the compared run read the same token ids through the same checkpoint."""
    a, b = current.recording, compared.recording
    if a.token_ids.shape != b.token_ids.shape or not np.array_equal(a.token_ids, b.token_ids):
        return False
    if target is None:
        return False
    kind, value = target
    if kind == "text":
        return True  # the second text runs through the open checkpoint
    return model_folder is not None and same_folder(value, model_folder)


def prediction_text(analysis: TextAnalysis) -> str:
    """``predicted billing · billing 0.912, repair 0.061, membership 0.027`` (classes in the
    model's order), or what there is instead of a class prediction."""
    rec = analysis.recording
    p = rec.class_probabilities()
    if not p.size:
        return "no classifier head: no class prediction"
    names = [rec.labels[i] if i < len(rec.labels) else str(i) for i in range(p.size)]
    classes = ", ".join(f"{name} {PROBABILITY_FORMAT.format(v)}" for name, v in zip(names, p, strict=True))
    return f"predicted {rec.predicted_label()} · {classes}"


def compare_summary(
    current: TextAnalysis, compared: TextAnalysis, target: tuple[str, str] | None, model_folder: str | None
) -> CompareSummary:
    """Both predictions and the difference of their class probabilities (compared − current)."""
    what = "second checkpoint" if target is not None and target[0] == "model" else "second text"
    this = f"this run: {prediction_text(current)}"
    other = f"compared ({what}): {prediction_text(compared)}"
    if identical_inputs(current, compared, target, model_folder):
        return CompareSummary(
            True, this, other, "identical: the same tokens through the same checkpoint, so no difference"
        )
    a, b = current.recording, compared.recording
    p, q = a.class_probabilities(), b.class_probabilities()
    if not p.size or p.shape != q.shape:
        return CompareSummary(False, this, other, "compared − current: the two runs have different classes")
    names = [a.labels[i] if i < len(a.labels) else str(i) for i in range(p.size)]
    parts = ", ".join(
        f"{name} {DIFFERENCE_FORMAT.format(d).replace('-', '−')}"
        for name, d in zip(names, q - p, strict=True)
    )
    flipped = "" if a.predicted() == b.predicted() else " · the prediction changes"
    return CompareSummary(False, this, other, f"compared − current: {parts}{flipped}")
