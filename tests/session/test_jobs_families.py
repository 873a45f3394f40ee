"""The window's jobs on a tiny checkpoint of every family: open, run, summarise, evidence.

This is what the window runs on its worker thread for a text (``viewer.session.jobs``);
references: the re-derivation check must pass, and the per-text head metrics must equal
``HeadStats`` fed the recording's own visible-key masks (``Recording.key_masks``).
"""

from __future__ import annotations

import numpy as np
import pytest

from tests.model import tiny
from viewer.core.headstats import HeadStats
from viewer.session import jobs

EVIDENCE_KINDS = ("deberta-v2", "modernbert", "qwen3", "gemma2", "llama-cls")


def context() -> jobs.JobContext:
    return jobs.JobContext(progress=lambda *a: None, cancelled=lambda: False, models={})


@pytest.mark.parametrize("kind", tiny.FAMILY_KINDS)
def test_every_family_runs_through_the_windows_jobs(kind, tmp_path):
    folder = tiny.save(tmp_path / kind, kind)
    ctx = context()
    info = jobs.open_model(ctx, "main", str(folder))
    assert isinstance(info, jobs.ModelInfo) and info.n_layers > 0
    analysis = jobs.summarise_run(ctx, jobs.run_text(ctx, "main", tiny.TEXTS[1]))
    rec = analysis.recording
    assert analysis.check.passed, analysis.check.to_dict()
    stats = HeadStats(rec.n_layers, rec.n_heads)
    stats.add(rec.own_probs, rec.special, rec.causal, visible=rec.key_masks())
    np.testing.assert_allclose(analysis.heads.entropy, stats.summary().entropy, rtol=0, atol=1e-12)
    assert len(analysis.units.of_token) == rec.n_tokens and (analysis.units.of_token >= 0).all()
    if kind in EVIDENCE_KINDS:  # the evidence strip, with its gradients, on a few (slow)
        ev = jobs.run_evidence(ctx, "main", analysis)
        assert ev.recording is rec and np.isfinite(ev.rows["knockout"][~rec.special]).all()
