"""Every family: tiny random checkpoint → loader → recording, checked three ways.

1. The re-derivation check (our own float64 numpy softmax) passes at 1e-5.
2. Recorded probabilities equal the library's own ``output_attentions`` from a separately
   loaded copy of the same folder (reference: transformers).
3. PyTorch's ``scaled_dot_product_attention`` on the recorded Q/K/V and mask gives the recorded
   head outputs (reference: PyTorch; grouped K/V through its ``enable_gqa``).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from transformers import AutoModel

from tests.model import tiny
from viewer.core.attention import check_recording
from viewer.model.loader import open_model


@pytest.fixture(scope="module", params=tiny.FAMILY_KINDS)
def family_folder(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp(request.param)
    return request.param, tiny.save(folder, request.param)


@pytest.fixture(scope="module")
def loaded(family_folder):
    return open_model(family_folder[1])


def test_check_passes_on_a_padded_batch(loaded):
    recs = list(loaded.record_many(tiny.TEXTS, batch_size=3))
    assert len({r.n_tokens for r in recs}) == 3, "texts of different lengths force padding"
    for rec in recs:
        result = check_recording(rec, 1e-5)
        assert result.passed, result.to_dict()
        assert result.context_errors.max() < 1e-5


def test_batch_equals_one_at_a_time(loaded):
    """Padding must not change anything a text's own recording holds."""
    batched = list(loaded.record_many(tiny.TEXTS, batch_size=3))
    for text, rec in zip(tiny.TEXTS, batched, strict=True):
        alone = loaded.record(text)
        assert alone.tokens == rec.tokens
        np.testing.assert_allclose(rec.probs, alone.probs, atol=1e-6)
        np.testing.assert_allclose(rec.q, alone.q, atol=1e-5)
        np.testing.assert_allclose(rec.context, alone.context, atol=1e-5)
        np.testing.assert_allclose(rec.logits, alone.logits, atol=1e-4)


def test_probabilities_equal_library_output_attentions(family_folder, loaded):
    """Reference: transformers' own output_attentions on an independently loaded copy."""
    _, folder = family_folder
    ref = AutoModel.from_pretrained(folder, attn_implementation="eager", local_files_only=True)
    ref.eval()
    for text in tiny.TEXTS:
        rec = loaded.record(text)
        enc = loaded.tokenizer(text, return_tensors="pt")
        with torch.no_grad():
            out = ref(**enc, output_attentions=True)
        theirs = torch.stack(out.attentions, dim=1)[0].numpy()  # (L, H, T, T)
        assert theirs.shape == rec.probs.shape
        np.testing.assert_allclose(rec.probs, theirs, atol=1e-6)


def test_sdpa_gives_the_recorded_head_outputs(loaded):
    """Reference: torch.nn.functional.scaled_dot_product_attention on the recorded tensors."""
    rec = loaded.record(tiny.TEXTS[1])
    for layer in range(rec.n_layers):
        q = torch.from_numpy(rec.q[layer]).double()[None]  # (1, H, T, d)
        k = torch.from_numpy(rec.k[layer]).double()[None]  # (1, G, T, d)
        v = torch.from_numpy(rec.v[layer]).double()[None]
        ours = torch.nn.functional.scaled_dot_product_attention(
            q, k, v, is_causal=rec.causal, scale=float(rec.scale[layer]),
            enable_gqa=rec.n_kv_heads != rec.n_heads,
        )[0].numpy()
        np.testing.assert_allclose(rec.context[layer], ours, atol=1e-5)


def test_recording_shapes_and_tokens(family_folder, loaded):
    kind, _ = family_folder
    rec = loaded.record(tiny.TEXTS[0])
    L, H, T, d = rec.q.shape
    assert rec.probs.shape == (L, H, T, T)
    assert rec.k.shape[1] == (2 if kind == "llama" else H)  # grouped K/V heads kept grouped
    assert rec.causal == (kind in ("gpt2", "llama"))
    assert len(rec.tokens) == T == len(rec.offsets) == len(rec.special)
    # Offsets point back into the text for every ordinary token.
    for tok, (a, b), special in zip(rec.tokens, rec.offsets, rec.special, strict=True):
        if not special:
            assert rec.text[a:b].lower() == tok.removeprefix("##")
    if kind in ("bert", "roberta", "albert", "electra"):
        assert rec.head_kind == "classifier"
        assert rec.labels == ("repair", "billing", "membership")
        assert rec.logits.shape == (3,)
    if kind == "albert":
        assert L == 3  # the one shared layer ran three times
    if rec.causal:
        upper = np.triu(np.ones((T, T), dtype=bool), k=1)
        assert np.all(rec.probs[:, :, upper] == 0)


def test_gpt2_inverse_layer_scale_is_modelled(tmp_path):
    """GPT-2's scale_attn_by_inverse_layer_idx divides layer l's scores by l + 1."""
    folder = tiny.save(tmp_path / "g", "gpt2", scale_attn_by_inverse_layer_idx=True)
    loaded = open_model(folder)
    rec = loaded.record(tiny.TEXTS[1])
    assert rec.scale[1] == pytest.approx(rec.scale[0] / 2)
    assert check_recording(rec).passed


def test_a_wrong_scale_would_fail_the_check(loaded):
    """The check is not vacuous: a recording with the wrong scale fails it."""
    import dataclasses

    rec = loaded.record(tiny.TEXTS[1])
    wrong = dataclasses.replace(rec, scale=rec.scale * 1.5)
    assert not check_recording(wrong).passed
    swapped = dataclasses.replace(rec, q=rec.q[:, ::-1].copy())  # heads out of order
    assert not check_recording(swapped).passed
