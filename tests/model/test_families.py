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
from viewer.cli import main
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
    """Reference: torch.nn.functional.scaled_dot_product_attention on the recorded tensors.

    Windows go in as SDPA's boolean mask; families with additive score terms (c2p/p2c, bias,
    soft-capping) are re-implemented from their papers in test_score_terms.py instead.
    """
    rec = loaded.record(tiny.TEXTS[1])
    additive = set(rec.terms.names()) - {"window"}
    if additive:
        pytest.skip(f"{sorted(additive)} are not expressible in SDPA; see test_score_terms.py")
    for layer in range(rec.n_layers):
        q = torch.from_numpy(rec.q[layer]).double()[None]  # (1, H, T, d)
        k = torch.from_numpy(rec.k[layer]).double()[None]  # (1, G, T, d)
        v = torch.from_numpy(rec.v[layer]).double()[None]
        windowed = rec.terms.layer_window(layer) is not None
        mask = torch.from_numpy(rec.key_mask(layer)) if windowed else None
        ours = torch.nn.functional.scaled_dot_product_attention(
            q,
            k,
            v,
            attn_mask=mask,
            is_causal=rec.causal and not windowed,
            scale=float(rec.scale[layer]),
            enable_gqa=rec.n_kv_heads != rec.n_heads,
        )[0].numpy()
        np.testing.assert_allclose(rec.context[layer], ours, atol=1e-5)


def test_recording_shapes_and_tokens(family_folder, loaded):
    kind, _ = family_folder
    rec = loaded.record(tiny.TEXTS[0])
    L, H, T, d = rec.q.shape
    assert rec.probs.shape == (L, H, T, T)
    assert rec.k.shape[1] == (2 if kind in tiny.GROUPED_KINDS else H)  # K/V heads kept grouped
    assert rec.causal == (kind in tiny.CAUSAL_KINDS)
    assert len(rec.tokens) == T == len(rec.offsets) == len(rec.special)
    # Offsets point back into the text for every ordinary token. (transformers rebuilds a
    # Qwen2 tokenizer from the vocabulary with its own byte-level rules, which the tiny WordPiece
    # vocabulary does not fit: there the offsets are only checked to lie inside the text.)
    for tok, (a, b), special in zip(rec.tokens, rec.offsets, rec.special, strict=True):
        if special:
            continue
        assert 0 <= a <= b <= len(rec.text)
        if kind != "qwen2":
            assert rec.text[a:b].lower() == tok.removeprefix("##")
    if kind in (
        "bert",
        "roberta",
        "xlm-roberta",
        "albert",
        "electra",
        "deberta-v2",
        "modernbert",
        "mpnet",
        "gpt2-cls",
        "llama-cls",
        "qwen3",
    ):
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


def test_headlight_check_exits_0(family_folder, capsys):
    """The command on every family's tiny checkpoint, at a text that crosses every window."""
    assert main(["check", str(family_folder[1]), "--text", tiny.TEXTS[1]]) == 0
    assert "passed" in capsys.readouterr().out


@pytest.mark.parametrize("kind", ["llama-cls", "qwen3", "gpt2-cls"])
def test_decoder_classifier_reads_the_last_real_token(tmp_path, kind):
    """Reference: the model's own score head applied by hand to the last real token's final
    hidden state, in a right-padded batch (transformers' *ForSequenceClassification pools the
    last non-pad token)."""
    loaded = open_model(tiny.save(tmp_path / kind, kind))
    assert loaded.head_kind == "classifier" and loaded.max_batch > 1
    batch = loaded.encode(tiny.TEXTS)
    out, _ = loaded.forward(batch, output_hidden_states=True)
    head = loaded.model.score
    for i, n in enumerate(batch.lengths):
        by_hand = head(out.hidden_states[-1][i, n - 1]).detach().numpy()
        np.testing.assert_allclose(out.logits[i].detach().numpy(), by_hand, atol=1e-5)
    rec = loaded.record(tiny.TEXTS[1])
    assert rec.summary_index() == rec.n_tokens - 1
