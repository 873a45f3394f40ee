"""The evidence strip's rows from ``viewer.reports.evidence``, plus this text's head metrics.

Runs on the worker thread in stages so a cancel takes effect between them: the evidence rows
(``evidence_for``, reusing the recording already made), then per-head importance (Michel et al.
2019) and per-head knockout effect for this one text (``viewer.reports.heads``), which the head
map offers as metrics.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from viewer.errors import HeadlightError
from viewer.gui.analysis import TextAnalysis
from viewer.gui.jobs import EvidenceResult, JobContext

# Row labels on the strip (short, so the strip keeps its width); the reports' own titles go to
# the tooltips.
ROW_LABELS = {
    "attention": "summary attention",
    "rollout": "rollout",
    "flow": "flow",
    "value_norm": "value norm",
    "grad_input": "grad × input",
    "integrated_gradients": "integrated gradients",
    "knockout": "knockout",
}
HEAD_METRIC_TOKENS = 256  # per-head importance and knockout only up to this many tokens


def compute(ctx: JobContext, loaded: Any, analysis: TextAnalysis) -> EvidenceResult:
    from viewer.reports.evidence import KINDS, evidence_for

    rec = analysis.recording
    ctx.progress(0, 3, "evidence: gradients, integrated gradients and knockout…")
    ev = evidence_for(loaded, rec.text, recording=rec)
    ctx.check()
    kinds, rows, agreement = [], [], []
    for kind in KINDS:
        row = np.asarray(ev.rows[kind], dtype=np.float64)
        if not np.isfinite(row).any():
            continue
        kinds.append(ROW_LABELS.get(kind, kind))
        rows.append(row)
        if kind == "knockout":
            agreement.append("reference")
        else:
            agreement.append(ev.agreement.get(kind))
    notes = list(ev.notes)
    importance = knockout = None
    if ev.target is not None and rec.n_tokens <= HEAD_METRIC_TOKENS:
        importance, knockout = head_metrics(ctx, loaded, rec.text)
    elif ev.target is not None:
        notes.append(f"head importance and knockout are computed up to {HEAD_METRIC_TOKENS} "
                     "tokens")
    ctx.progress(3, 3, "evidence done")
    return EvidenceResult(analysis, tuple(kinds), np.stack(rows), tuple(agreement), importance,
                          knockout, tuple(notes))


def head_metrics(ctx: JobContext, loaded: Any, text: str) -> tuple[np.ndarray | None,
                                                                   np.ndarray | None]:
    """(L, H) head importance and knockout effect (drop in predicted-class probability)."""
    from viewer.reports.heads import head_importance, head_knockout
    from viewer.reports.textsets import TextItem

    item = [TextItem(text, None, 1)]
    total = loaded.n_layers * loaded.n_heads

    def tick(_n: int = 1) -> None:
        ctx.check()

    ctx.progress(1, 3, "head importance…")
    try:
        importance = head_importance(loaded, item, progress=tick)["importance"]
    except HeadlightError:
        importance = None
    ctx.check()
    ctx.progress(2, 3, f"head knockout ({total} heads)…")
    try:
        knockout = head_knockout(loaded, item, progress=tick)["prob_drop"]
    except HeadlightError:
        knockout = None
    return importance, knockout
