"""Every family: tiny random checkpoint → loader → recording, checked against outside references.

1. The re-derivation check (our own float64 numpy softmax) passes at 1e-5, on both routes: the
   eager kernel with the model's own probabilities, and the memory-efficient kernel (sdpa)
   without them, where only the head outputs can be compared.
2. The model's own probabilities kept in a recording, the probabilities re-derived on demand
   from an sdpa recording, and the head metrics accumulated block by block from them, all equal
   the library's own ``output_attentions`` from a separately loaded copy of the same folder
   (reference: transformers; the metrics recomputed from it in plain numpy here).
3. PyTorch's ``scaled_dot_product_attention`` on the recorded Q/K/V and mask gives the recorded
   head outputs (reference: PyTorch; grouped K/V through its ``enable_gqa``), and the head
   outputs an sdpa recording captured equal what the unhooked sdpa model feeds its output
   projection (reference: transformers, read with a hook of this test's own).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from transformers import AutoModel

from tests.model import tiny
from viewer.cli import main
from viewer.core.attention import check_recording
from viewer.core.headstats import HeadStats
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
        np.testing.assert_allclose(rec.own_probs, alone.own_probs, atol=1e-6)
        np.testing.assert_allclose(rec.q, alone.q, atol=1e-5)
        np.testing.assert_allclose(rec.context, alone.context, atol=1e-5)
        np.testing.assert_allclose(rec.logits, alone.logits, atol=1e-4)


def library_attentions(folder, loaded, text: str) -> np.ndarray:
    """(L, H, T, T) transformers' own eager output_attentions, from a copy loaded here."""
    ref = AutoModel.from_pretrained(folder, attn_implementation="eager", local_files_only=True)
    ref.eval()
    enc = loaded.tokenizer(text, return_tensors="pt")
    with torch.no_grad():
        out = ref(**enc, output_attentions=True)
    return torch.stack(out.attentions, dim=1)[0].double().numpy()


def test_probabilities_equal_library_output_attentions(family_folder, loaded):
    """Reference: transformers' own output_attentions on an independently loaded copy, against
    the probabilities a recording kept (eager) and those re-derived on demand (sdpa route)."""
    _, folder = family_folder
    for text in tiny.TEXTS:
        theirs = library_attentions(folder, loaded, text)
        kept = loaded.record(text, own_probs=True)
        assert kept.own_probs is not None and theirs.shape == kept.own_probs.shape
        np.testing.assert_allclose(kept.own_probs, theirs, atol=1e-6)
        derived = loaded.record(text, own_probs=False)
        assert derived.own_probs is None
        assert derived.kernel == loaded.kernel
        np.testing.assert_allclose(derived.attention_matrices(), theirs, atol=1e-6)


def plain_metrics(probs: np.ndarray, special: np.ndarray, causal: bool, window) -> dict:
    """Entropy, distance, special share and confidence of one text, written out row by row
    (Shannon 1948 entropy over the visible keys / ln of their number; Voita et al. 2019
    confidence), as the independent reference for the block-by-block accumulator."""
    n_layers, n_heads, t, _ = probs.shape
    out = {k: np.zeros((n_layers, n_heads)) for k in ("entropy", "distance", "special", "confidence")}
    for layer in range(n_layers):
        before, after = (-1, -1) if window is None else window[layer]
        for head in range(n_heads):
            ent, rows = [], 0
            for i in range(t):
                seen = [
                    j
                    for j in range(t)
                    if (not causal or j <= i)
                    and (before < 0 or i - j <= before)
                    and (after < 0 or j - i <= after)
                ]
                p = probs[layer, head, i, seen]
                if len(seen) > 1:
                    q = p[p > 0]
                    ent.append(-(q * np.log(q)).sum() / np.log(len(seen)))
                out["distance"][layer, head] += sum(probs[layer, head, i, j] * abs(i - j) for j in range(t))
                out["special"][layer, head] += probs[layer, head, i, special].sum()
                out["confidence"][layer, head] += p.max()
                rows += 1
            out["entropy"][layer, head] = np.mean(ent)
            for key in ("distance", "special", "confidence"):
                out[key][layer, head] /= rows
    return out


def test_blockwise_metrics_of_an_sdpa_recording_equal_the_library_attentions(family_folder, loaded):
    """Head metrics accumulated block by block from probabilities re-derived on demand equal
    the same metrics written out over transformers' own output_attentions."""
    _, folder = family_folder
    text = tiny.TEXTS[1]
    rec = loaded.record(text, own_probs=False)
    stats = HeadStats(rec.n_layers, rec.n_heads)
    stats.add_recording(rec)
    ours = stats.summary()
    ref = plain_metrics(library_attentions(folder, loaded, text), rec.special, rec.causal, rec.terms.window)
    for key, value in ref.items():
        np.testing.assert_allclose(getattr(ours, key), value, atol=1e-6, err_msg=key)


def test_sdpa_and_eager_recordings_agree(loaded):
    """The two routes record the same queries, keys, values and head outputs."""
    for text in tiny.TEXTS:
        eager, sdpa = loaded.record(text, own_probs=True), loaded.record(text, own_probs=False)
        for name in ("q", "k", "v", "context"):
            np.testing.assert_allclose(getattr(sdpa, name), getattr(eager, name), atol=1e-5, err_msg=name)
        np.testing.assert_allclose(sdpa.logits, eager.logits, atol=1e-5)


def test_captured_head_outputs_equal_the_unhooked_models_own(loaded):
    """Reference: what the unhooked model (its default kernel, sdpa where offered) feeds each
    output projection, read by a forward pre-hook of this test's own."""
    text = tiny.TEXTS[1]
    rec = loaded.record(text, own_probs=False)
    seen = []
    with loaded.unhooked() as model, torch.no_grad():
        handles = [
            m.register_forward_pre_hook(lambda module, args: seen.append(args[0][0].clone()))
            for m in loaded.hooks.out_modules
        ]
        try:
            model(**loaded.tokenizer(text, return_tensors="pt"))
        finally:
            for h in handles:
                h.remove()
    assert len(seen) == rec.n_layers
    for layer, x in enumerate(seen):  # (T, H·d) heads side by side
        theirs = x.reshape(rec.n_tokens, rec.n_heads, -1).transpose(0, 1).numpy()
        np.testing.assert_allclose(rec.context[layer], theirs, atol=1e-6)


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
    assert rec.own_probs.shape == (L, H, T, T)
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
        assert np.all(rec.own_probs[:, :, upper] == 0)


def test_gpt2_inverse_layer_scale_is_modelled(tmp_path):
    """GPT-2's scale_attn_by_inverse_layer_idx divides layer l's scores by l + 1."""
    folder = tiny.save(tmp_path / "g", "gpt2", scale_attn_by_inverse_layer_idx=True)
    loaded = open_model(folder)
    rec = loaded.record(tiny.TEXTS[1])
    assert rec.scale[1] == pytest.approx(rec.scale[0] / 2)
    assert check_recording(rec).passed


@pytest.mark.parametrize("own", [True, False])
def test_a_wrong_scale_would_fail_the_check(loaded, own):
    """The check is not vacuous, with or without the model's own probabilities: a recording
    with the wrong scale, or its heads out of order, fails it."""
    import dataclasses

    rec = loaded.record(tiny.TEXTS[1], own_probs=own)
    assert check_recording(rec).passed
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
    out = loaded.forward(batch, output_hidden_states=True)
    head = loaded.model.score
    for i, n in enumerate(batch.lengths):
        by_hand = head(out.hidden_states[-1][i, n - 1]).detach().numpy()
        np.testing.assert_allclose(out.logits[i].detach().numpy(), by_hand, atol=1e-5)
    rec = loaded.record(tiny.TEXTS[1])
    assert rec.summary_index() == rec.n_tokens - 1
