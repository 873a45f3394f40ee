"""Where the evidence strip's rows come from (worker thread, no Qt).

The full set of kinds (gradient × input, integrated gradients, knockout, value-weighted norms and
the rank agreement with knockout) is computed by ``viewer.reports.evidence`` when that module is
present. Without it, the strip still shows the kinds the numeric core derives from the recording
alone: summary-token attention in the last layer, attention rollout and attention flow
(Abnar & Zuidema 2020), with no knockout to rank them against.
"""

from __future__ import annotations

import importlib.util
from typing import Any

import numpy as np

from viewer.core.rollout import FLOW_MAX_TOKENS, attention_flow, attention_rollout
from viewer.gui.analysis import TextAnalysis
from viewer.gui.jobs import EvidenceResult, JobContext

FLOW_LIMIT = min(FLOW_MAX_TOKENS, 128)  # tokens; flow solves one max-flow problem per token


def reports_available() -> bool:
    return importlib.util.find_spec("viewer.reports.evidence") is not None


def compute(ctx: JobContext, loaded: Any, analysis: TextAnalysis) -> EvidenceResult:
    if loaded is not None and reports_available():
        from viewer.gui import evidence_reports

        return evidence_reports.compute(ctx, loaded, analysis)
    return from_recording(ctx, analysis)


def from_recording(ctx: JobContext, analysis: TextAnalysis) -> EvidenceResult:
    """The kinds that need only the recording: summary attention, rollout, flow."""
    rec = analysis.recording
    s = rec.summary_index()
    kinds = ["summary attention", "rollout"]
    rows = [analysis.head_means[-1][s].astype(np.float64),  # (T,) last layer, head mean
            attention_rollout(rec.probs)[s]]  # (T,)
    notes = []
    ctx.progress(1, 3, "attention rollout done")
    ctx.check()
    if rec.n_tokens <= FLOW_LIMIT:
        kinds.append("flow")
        rows.append(attention_flow(rec.probs, s, max_tokens=FLOW_LIMIT))
    else:
        notes.append(f"attention flow is left out above {FLOW_LIMIT} tokens")
    ctx.progress(3, 3, "evidence done")
    return EvidenceResult(analysis, tuple(kinds), np.stack(rows), tuple(None for _ in kinds),
                          notes=tuple(notes))
