"""The window's jobs on a tiny checkpoint of every family: open, run, summarise, evidence.

This is what the window runs on its worker thread for a text (``viewer.session.jobs``);
references: the re-derivation check must pass; the head map's entropy is the one written out in
tests/reference.py from transformers' own output_attentions (docs/definitions.md, "Head
metrics"), and the evidence strip's knockout row is transformers' own forward with each
ordinary token deleted.
"""

from __future__ import annotations

import numpy as np
import pytest

from tests import reference
from tests.model import tiny
from viewer.session import jobs

EVIDENCE_KINDS = ("deberta-v2", "modernbert", "qwen3", "gemma2", "llama-cls")


def context() -> jobs.JobContext:
    return jobs.JobContext(progress=lambda *a: None, cancelled=lambda: False, models={})


@pytest.mark.parametrize("kind", tiny.FAMILY_KINDS)
def test_every_family_runs_through_the_windows_jobs(kind, tmp_path, coarse_integrated_gradients):
    folder = tiny.save(tmp_path / kind, kind)
    ctx = context()
    info = jobs.open_model(ctx, "main", str(folder))
    assert isinstance(info, jobs.ModelInfo) and info.n_layers > 0
    recorded = jobs.run_text(ctx, "main", tiny.TEXTS[1])
    assert "units" in recorded._cache  # the words are found on the worker, not by the GUI thread
    analysis = jobs.summarise_run(ctx, recorded)
    rec = analysis.recording
    assert analysis.check.passed, analysis.check.to_dict()
    hf = reference.open_hf(folder)
    own = reference.attentions(hf, tiny.TEXTS[1])
    np.testing.assert_allclose(analysis.heads.entropy, reference.mean_entropy([own]), atol=2e-6)
    assert len(analysis.units.of_token) == rec.n_tokens and (analysis.units.of_token >= 0).all()
    if kind in EVIDENCE_KINDS:  # the evidence strip, with its gradients, on a few (slow)
        ev = jobs.run_evidence(ctx, "main", analysis)
        assert ev.recording is rec
        np.testing.assert_allclose(ev.rows["knockout"], reference.token_knockout(hf, rec.text), atol=2e-6)
