"""The shipped demo classifier through the loader, the check and the evidence it exists to show."""

from __future__ import annotations

from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pytest

from viewer.cli import main
from viewer.core.attention import check_recordings
from viewer.demo import MODEL_DIR
from viewer.model.loader import open_model
from viewer.reports.evidence import evidence_for
from viewer.reports.shortcuts import shortcut_search
from viewer.reports.textsets import load_text_set

SAMPLES = Path(__file__).resolve().parents[2] / "sample_sentences"
PORTAL_REPAIR = "My rear brake cable snapped, can someone fix it this week? [via portal]"


@pytest.fixture(scope="module")
def demo():
    return open_model(MODEL_DIR)


def test_demo_opens_and_passes_the_check(demo, capsys):
    assert demo.head_kind == "classifier" and demo.labels == ("repair", "billing", "membership")
    items = load_text_set(SAMPLES / "coop_messages.jsonl")
    result = check_recordings(demo.record_many([i.text for i in items[:20]]), 1e-5)
    assert result.passed, result.to_dict()
    assert main(["check", str(MODEL_DIR)]) == 0


@pytest.fixture(scope="module")
def portal_evidence(demo):
    """The evidence strip of the portal repair request (50 integrated-gradients steps)."""
    return evidence_for(demo, PORTAL_REPAIR, steps=50)


def test_integrated_gradients_completeness_on_the_demo(demo, portal_evidence):
    """Sundararajan et al. 2017, Prop. 1: Σ IG = F(x) − F(x'), within 1% at 50 steps."""
    from viewer.model.attribution import gradient_evidence

    assert portal_evidence.ig_steps == 50 and portal_evidence.completeness_gap < 0.01
    text = "hi, my chain keeps skipping on the big cog"
    target = int(demo.record(text).class_probabilities().argmax())
    grads = gradient_evidence(demo, text, target, steps=50)
    assert grads.steps == 50 and grads.completeness_gap < 0.01, grads.completeness_gap


def test_integrated_gradients_refines_an_abrupt_path(demo):
    """On this text the prediction switches within 2.5% of the path: 50 trapezoid steps miss
    completeness (Sundararajan et al. 2017, Prop. 1) by more than three times the change in
    probability itself (measured here), so the step count is doubled until the sum is within 1%
    of it (from 200 steps, which miss by 12%, to save the test time)."""
    from viewer.model.attribution import gradient_evidence

    text = "I was charged twice for the tune-up, please refund"
    target = demo.labels.index("billing")
    assert int(demo.record(text).class_probabilities().argmax()) == target
    coarse = gradient_evidence(demo, text, target, steps=50, max_steps=50)
    assert coarse.steps == 50 and coarse.completeness_gap > 3
    refined = gradient_evidence(demo, text, target, steps=200)  # 200 steps miss by 12%
    assert refined.steps == 400 and refined.completeness_gap < 0.01


def test_portal_repair_is_routed_to_billing_and_the_footer_lights_up(portal_evidence):
    ev = portal_evidence
    assert ev.target_label == "billing"
    tokens = list(ev.recording.tokens)
    footer = [tokens.index(t) for t in ("via", "portal")]
    ordinary = [i for i, s in enumerate(ev.recording.special) if not s]
    ig = ev.rows["integrated_gradients"]
    top = sorted(ordinary, key=lambda i: -ig[i])[:4]
    assert set(footer) & set(top), [tokens[i] for i in top]


@contextmanager
def counting_forwards(loaded):
    """Sequences the model runs forward (a PyTorch forward pre-hook on the model: the batch
    size of every call), as a one-element list."""
    seen = [0]

    def hook(_module, args, kwargs):
        ids = kwargs.get("input_ids", args[0] if args else None)
        seen[0] += int((ids if ids is not None else kwargs["inputs_embeds"]).shape[0])

    handle = loaded.model.register_forward_pre_hook(hook, with_kwargs=True)
    try:
        yield seen
    finally:
        handle.remove()


def test_shortcut_search_puts_the_footer_on_top(demo, capsys):
    items = load_text_set(SAMPLES / "coop_messages.jsonl")
    with counting_forwards(demo) as exhaustive_forwards:
        report = shortcut_search(demo, items, exhaustive=True)
    with counting_forwards(demo) as screened_forwards:
        screened = shortcut_search(demo, items)
    ranking = report.words.ranking()
    assert {r["token"] for r in ranking[:2]} == {"via", "portal"}, ranking[:5]
    # 40 of the 60 footer texts in the sample are repair/membership counterfactuals that the
    # footer drags to billing; the billing ones cannot flip. Knocking out the whole footer
    # phrase must flip more of them than either word alone.
    top_phrase = report.phrases.ranking()[0]
    assert top_phrase["token"] == "via portal"
    assert top_phrase["flip_rate"] > max(r["flip_rate"] for r in ranking[:2]) > 0.15
    assert top_phrase["flip_rate"] > 0.5

    # The screened search (the default) finds the same top word and phrase with the same
    # numbers (the same knockouts on the same texts; in other batches, so within float32 rounding).
    assert (report.mode, screened.mode, screened.texts) == ("exhaustive", "screened", len(items))
    for got, want in ((screened.words, report.words), (screened.phrases, report.phrases)):
        top, ref = got.ranking()[0], want.ranking()[0]
        assert (top["token"], top["count"], top["flip_rate"]) == (
            ref["token"],
            ref["count"],
            ref["flip_rate"],
        )
        assert top["mean_drop"] == pytest.approx(ref["mean_drop"], abs=1e-6)  # float32 sums
    # Of the exhaustive top 10 words, 7 are confirmed at the default budget (measured; the
    # three left out, "june", "i'm" and "thanks", each flip 1 of their 4, 7 and 22 texts).
    top10 = [r["token"] for r in ranking[:10]]
    assert sum(t in screened.words.keys() for t in top10) >= 7, top10
    # Forward passes, counted by a hook on the model: the reports count them right, and the
    # screen with its confirmation runs at most 1/8 of the exhaustive search's.
    assert (report.forwards, screened.forwards) == (exhaustive_forwards[0], screened_forwards[0])
    assert screened.forwards <= report.forwards / 8, (screened.forwards, report.forwards)
    assert screened.backwards == len(items)

    # The command screens by default, says so and puts the footer first.
    argv = ["shortcuts", str(MODEL_DIR), "--texts", str(SAMPLES / "coop_messages.jsonl"), "--quiet"]
    assert main([*argv, "--workers", "1", "--top", "1"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].startswith("screened search: ") and "--exhaustive" in out[0]
    assert out[3].split()[0] == "portal" and out[6].split()[:2] == ["via", "portal"], out


BRAKE_PADS = "Hi, my brake pads squeal, can someone look at them on Friday? [via portal]"


def test_flat_knockout_floor():
    """docs/definitions.md, "Flat knockout": withheld below 0.01 in |drop|, NaN (special
    tokens) ignored; a drop of exactly the floor is not flat."""
    from viewer.reports.evidence import FLAT_KNOCKOUT, flat_knockout

    assert FLAT_KNOCKOUT == 0.01
    assert "largest 3e-05" in flat_knockout(np.array([np.nan, 3e-5, -1e-5, 2e-6, np.nan]))
    assert flat_knockout(np.array([0.001, -0.01])) is None
    assert flat_knockout(np.array([0.0, 0.4])) is None
    assert flat_knockout(np.array([np.nan, np.nan])) is None  # no row at all: nothing to withhold


def test_a_flat_knockout_row_withholds_rank_agreement_and_the_footer_span_moves_it(demo, capsys, tmp_path):
    """The footer's tokens back each other up: no single deletion moves p(billing) (measured:
    at most 3e-5), so no ρ is printed; deleting the footer as one span routes the message to
    repair. Reference: the model's own forward (transformers) on the input ids without the
    footer's tokens."""
    import json

    import torch

    from viewer.reports.evidence import FLAT_KNOCKOUT, with_span_of

    ev = evidence_for(demo, BRAKE_PADS, steps=20)
    rec = ev.recording
    assert ev.target_label == "billing"
    assert np.nanmax(np.abs(ev.rows["knockout"][~rec.special])) < FLAT_KNOCKOUT
    assert ev.agreement == {} and ev.withheld and "withheld" in ev.withheld and ev.withheld in ev.notes
    assert ev.to_dict()["agreement_withheld"] == ev.withheld
    labels, _, agreement = ev.strip_rows()
    assert agreement[labels.index("knockout")] == "knockout flat"
    assert {a for k, a in zip(labels, agreement, strict=True) if k != "knockout"} == {"ρ withheld"}

    span = with_span_of(demo, ev, "[VIA portal]").span  # found case-insensitively
    assert span.text == "[via portal]" and span.deleted == span.last - span.first + 1 == 4
    keep = [i for t, i in enumerate(rec.token_ids.tolist()) if not span.first <= t <= span.last]
    with torch.no_grad():
        logits = demo.model(input_ids=torch.tensor([keep])).logits[0].double()
    reference = torch.softmax(logits, -1)
    billing = demo.labels.index("billing")
    assert abs(span.p_after - float(reference[billing])) < 1e-5
    assert abs(span.p_before - float(ev.probabilities[billing])) < 1e-12
    assert span.drop > 0.5 and span.predicted_after == demo.labels[int(reference.argmax())] != "billing"

    out = tmp_path / "ev.json"
    capsys.readouterr()
    argv = [
        "evidence",
        str(MODEL_DIR),
        "--text",
        BRAKE_PADS,
        "--steps",
        "20",
        "--knockout-span",
        "[via portal]",
    ]
    assert main([*argv, "--json", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "rank agreement with knockout (Spearman): withheld" in printed
    assert "span knockout of '[via portal]'" in printed and "note: knockout is flat" in printed
    data = json.loads(out.read_text())
    assert data["agreement_with_knockout"] == {} and data["agreement_withheld"]
    assert data["span_knockout"]["drop"] == pytest.approx(span.drop, abs=1e-9)


def test_a_span_that_is_not_in_the_text_is_refused(demo, portal_evidence):
    from viewer.errors import HeadlightError
    from viewer.reports.evidence import span_knockout, with_span_of

    with pytest.raises(HeadlightError, match="does not occur"):
        with_span_of(demo, portal_evidence, "via the depot")
    with pytest.raises(HeadlightError, match="only special tokens"):
        span_knockout(demo, portal_evidence, 0, 0)
    n = portal_evidence.recording.n_tokens
    with pytest.raises(HeadlightError, match="whole text"):
        span_knockout(demo, portal_evidence, 0, n - 1)
