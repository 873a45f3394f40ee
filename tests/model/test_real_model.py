"""Real pretrained weights: all-MiniLM-L6-v2 (6 layers × 12 heads, BERT family)."""

from __future__ import annotations

import json

import numpy as np
import torch

from viewer.cli import main
from viewer.core.attention import check_recordings
from viewer.core.rotary import apply_rotary

LONG = " ".join(f"member {i} asked the workshop about wheel truing and chain wear" for i in range(80))


def test_check_passes_on_three_texts_including_512_tokens(minilm):
    texts = ["The co-op mechanic trued the wheel.", "Is my invoice for the brake pads paid?", LONG]
    recs = list(minilm.record_many(texts, batch_size=3))
    assert recs[2].n_tokens == 512 and recs[2].truncated
    assert (recs[0].n_layers, recs[0].n_heads) == (6, 12)
    result = check_recordings(recs, 1e-5)
    assert result.passed, result.to_dict()
    assert result.texts == 3


def test_probabilities_equal_output_attentions_on_real_weights(minilm):
    """Reference: the model's own output_attentions (transformers), without our hooks."""
    text = "She returned the tandem because its gears slipped."
    rec = minilm.record(text)
    with minilm.unhooked("eager") as model, torch.no_grad():
        out = model(**minilm.tokenizer(text, return_tensors="pt"), output_attentions=True)
    theirs = torch.stack(out.attentions, 1)[0].numpy()
    np.testing.assert_allclose(rec.own_probs, theirs, atol=1e-7)
    derived = minilm.record(text, own_probs=False)  # the memory-efficient kernel, on demand
    np.testing.assert_allclose(derived.attention_matrices(), theirs, atol=1e-6)


def test_headlight_check_json_contract(minilm_dir, tmp_path, capsys):
    out = tmp_path / "out.json"
    assert main(["check", str(minilm_dir), "--json", str(out)]) == 0
    data = json.loads(out.read_text())
    assert data["passed"] is True and data["max_abs_error"] <= 1e-5
    assert data["tolerance"] == 1e-5
    assert len(data["layers"]) == 6 and all(r["max_abs_error"] <= 1e-5 for r in data["layers"])


def test_rotation_equals_transformers_own_with_a_llama_models_tables():
    """Reference: transformers' ``apply_rotary_pos_emb`` (Llama) on the tables of
    ``LlamaRotaryEmbedding``; the project's ``apply_rotary`` gets the same tables, as the
    recorder hands it the model's own; partial rotary leaves the other dimensions alone."""
    from transformers import LlamaConfig
    from transformers.models.llama.modeling_llama import LlamaRotaryEmbedding, apply_rotary_pos_emb

    cfg = LlamaConfig(hidden_size=64, num_attention_heads=4, max_position_embeddings=128)
    x = torch.randn(1, 4, 100, 16, generator=torch.Generator().manual_seed(0))  # (B, H, T, d)
    cos, sin = LlamaRotaryEmbedding(cfg)(x, torch.arange(100)[None])  # (1, T, d)
    want, _ = apply_rotary_pos_emb(x, x, cos, sin)
    got = apply_rotary(x[0].numpy(), cos[0].numpy(), sin[0].numpy())
    np.testing.assert_allclose(got, want[0].numpy(), atol=1e-6)
    half = apply_rotary(x[0].numpy(), cos[0, :, :8].numpy(), sin[0, :, :8].numpy())
    np.testing.assert_array_equal(half[..., 8:], x[0, ..., 8:].numpy())
