"""The evidence strip and head importance on real (tiny) models, against outside references."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.stats import spearmanr

from tests.model import tiny
from viewer.model.loader import open_model
from viewer.reports.evidence import ROWS, evidence_for, value_norm_row
from viewer.reports.heads import head_importance
from viewer.reports.textsets import TextItem

TEXT = "a member asked about the invoice for the new brake pads"


@pytest.fixture(scope="module")
def bert(tmp_path_factory):
    return open_model(tiny.save(tmp_path_factory.mktemp("bert"), "bert"))


@pytest.fixture(scope="module")
def evidence(bert):
    return evidence_for(bert, TEXT)


@pytest.mark.parametrize("kind", ["bert", "gpt2", "llama"])
def test_value_norms_equal_a_direct_torch_computation(kind, tmp_path):
    """Reference: ‖Σ_h α_sj (x_j W_V + b_V)_h W_O^h‖ computed in torch from the modules."""
    loaded = open_model(tiny.save(tmp_path / kind, kind))
    last = loaded.n_layers - 1
    grabbed = {}
    value_module = loaded.hooks.value_modules[last]  # value (or fused q|k|v) projection

    def grab(module, args, output):
        grabbed["x"] = args[0].detach()

    handle = value_module.register_forward_hook(grab)
    rec = loaded.record(TEXT)
    handle.remove()
    x = grabbed["x"][0].double()  # (T, D) what enters the value projection
    h, d = rec.n_heads, rec.q.shape[-1]
    g = rec.n_kv_heads
    if loaded.family.qkv:  # GPT-2 Conv1D: x @ W + b, values are the last third
        w = value_module.weight.detach().double()[:, 2 * h * d :]
        b = value_module.bias.detach().double()[2 * h * d :]
        values = x @ w + b
    else:
        values = x @ value_module.weight.detach().double().T
        if value_module.bias is not None:
            values = values + value_module.bias.detach().double()
    out = loaded.hooks.out_modules[last]
    w_o = out.weight.detach().double()
    w_o = w_o if type(out).__name__ == "Conv1D" else w_o.T
    s = rec.summary_index()
    alpha = torch.from_numpy(rec.own_probs[last]).double()  # (H, T, T) the model's own
    total = torch.zeros(rec.n_tokens, w_o.shape[1], dtype=torch.float64)
    for head in range(h):
        vh = values[:, (head // (h // g)) * d : (head // (h // g) + 1) * d]  # (T, d)
        f = vh @ w_o[head * d : (head + 1) * d]  # (T, D)
        per_head = alpha[head, s][:, None] * f
        total += per_head
    expected = torch.linalg.norm(total, dim=-1).numpy()
    np.testing.assert_allclose(value_norm_row(loaded, rec, s), expected, rtol=1e-5, atol=1e-7)


def test_rows_cover_every_token(evidence):
    t = evidence.recording.n_tokens
    for kind in ROWS:
        assert evidence.rows[kind].shape == (t,)
    assert np.isnan(evidence.rows["knockout"][evidence.recording.special]).all()
    assert np.isfinite(evidence.rows["knockout"][~evidence.recording.special]).all()
    # Attention from the summary token is a probability distribution over the keys.
    assert evidence.rows["attention"].sum() == pytest.approx(1.0, abs=1e-5)
    assert evidence.rows["rollout"].sum() == pytest.approx(1.0, abs=1e-5)


def test_agreement_is_spearman_against_knockout(evidence):
    """Reference: scipy.stats.spearmanr on the ordinary tokens."""
    ordinary = ~evidence.recording.special
    for kind, rho in evidence.agreement.items():
        ref = spearmanr(evidence.rows[kind][ordinary], evidence.rows["knockout"][ordinary])
        assert rho == pytest.approx(ref.statistic, abs=1e-12), kind


def test_knockout_row_is_a_real_deletion(bert, evidence):
    """Deleting token 3 by hand and re-running gives the knockout row's value there."""
    rec = evidence.recording
    ids = rec.token_ids.tolist()
    before = bert.predict(bert.text.from_ids([ids]))[0, evidence.target]
    after = bert.predict(bert.text.from_ids([ids[:3] + ids[4:]]))[0, evidence.target]
    assert evidence.rows["knockout"][3] == pytest.approx(before - after, abs=1e-7)


def test_integrated_gradients_completeness(bert):
    """Sundararajan et al. 2017, Prop. 1: Σ IG = F(x) − F(x').

    This random model barely moves its probability between baseline and input (|ΔF| ~ 1e-3),
    so the documented criterion applies: |Σ IG − ΔF| <= 1% of max(|ΔF|, 0.01). The 1% relative
    test on real predictions is in test_demo_evidence.py.
    """
    from viewer.model.attribution import gradient_evidence

    g = gradient_evidence(bert, TEXT, 1, steps=50)
    delta = g.f_input - g.f_baseline
    assert abs(g.integrated.sum() - delta) <= 0.01 * max(abs(delta), 0.01)


def test_gradient_times_input_against_autograd_by_hand(bert, evidence):
    """Reference: torch.autograd on the model with inputs_embeds, written out here."""
    enc = bert.tokenizer(TEXT, return_tensors="pt")
    emb = bert.model.get_input_embeddings()(enc["input_ids"]).detach().requires_grad_(True)
    out = bert.model(inputs_embeds=emb, attention_mask=enc["attention_mask"])
    torch.softmax(out.logits, -1)[0, evidence.target].backward()
    expected = (emb * emb.grad)[0].sum(-1).detach().numpy()
    np.testing.assert_allclose(evidence.rows["grad_input"], expected, rtol=1e-4, atol=1e-8)


def test_head_importance_unit_norm_and_zero_for_a_silent_head(tmp_path):
    """Michel et al. 2019, Eq. 2: ∂L/∂ξ_h = Att_h(x)ᵀ ∂L/∂Att_h(x), so a head whose output is
    identically zero (value projection zeroed by hand) has raw importance exactly 0."""
    folder = tiny.save(tmp_path / "b", "bert")
    loaded = open_model(folder)
    d = loaded.geometry.head_dim
    value = loaded.model.bert.encoder.layer[1].attention.self.value
    with torch.no_grad():
        value.weight[2 * d : 3 * d] = 0.0
        value.bias[2 * d : 3 * d] = 0.0
    items = [
        TextItem(t, lab, i)
        for i, (t, lab) in enumerate(zip(tiny.TEXTS, ["repair", "billing", "membership"], strict=True))
    ]
    imp = head_importance(loaded, items, batch_size=2)
    raw, norm = imp["importance_raw"], imp["importance"]
    assert raw[1, 2] == 0.0
    assert (raw[0] > 0).all() and (np.delete(raw[1], 2) > 0).all()
    np.testing.assert_allclose(np.linalg.norm(norm, axis=1), 1.0, atol=1e-12)
    assert imp["importance_targets"] == "labels"


def test_evidence_batches_shrink_to_the_memory_allowance_with_the_same_numbers(bert, evidence, monkeypatch):
    """Integrated-gradient path points and knockout variants run in batches that fit
    ``BATCH_BYTES`` (and the budget); batched or one by one, the rows are the same. Reference:
    the estimate of ``pass_estimate`` for the batch sizes seen by a hook on the model's forward."""
    from viewer.model import budget
    from viewer.model.budget import pass_estimate

    t = evidence.recording.n_tokens
    two = pass_estimate(bert, [t] * 2, keep=False, own_probs=False, gradients=True).total
    monkeypatch.setattr(budget, "BATCH_BYTES", two)  # two path points, a few knockouts at most
    seen = []
    handle = bert.model.register_forward_pre_hook(
        lambda module, args, kwargs: seen.append(
            next(v for v in kwargs.values() if torch.is_tensor(v)).shape[0]
        ),
        with_kwargs=True,
    )
    try:
        small = evidence_for(bert, TEXT)
    finally:
        handle.remove()
    knockouts = budget.batch_that_fits(bert, t, 32)  # inference keeps no graph: more fit
    assert budget.batch_that_fits(bert, t, 25, gradients=True) == 2 and knockouts < 25
    assert max(seen) == knockouts and 2 in seen  # not the 25 path points or 32 knockouts of the default
    for row in ("grad_input", "integrated_gradients", "knockout"):
        np.testing.assert_allclose(small.rows[row], evidence.rows[row], rtol=1e-4, atol=1e-7)
    monkeypatch.setenv("HEADLIGHT_MEMORY", "1K")
    with pytest.raises(budget.MemoryBudgetError, match="needs about"):
        budget.batch_that_fits(bert, t, 25, gradients=True)
