"""Every score term beyond q·k, re-implemented here in torch from its published definition.

For each family that adds a term, a tiny random model's own eager probabilities
(transformers, ``output_attentions``) are compared with an independent re-implementation
written in this file from the paper's equations, at a text that crosses every window (the tiny
windows are ``tiny.WINDOW`` = 4 keys, the text has 15+ tokens), and with the recording. Then each
term is left out of the recording and the re-derivation check must FAIL: the check can fail.

Content queries and keys are the recorded ones (they are compared with the model's own
probabilities in test_families.py); the terms are built here from the model's weights and config.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import torch

from tests.model import tiny
from viewer.core.attention import check_recording
from viewer.model.loader import open_model

TEXT = tiny.TEXTS[1]


def open_tiny(tmp_path, kind: str, **overrides):
    return open_model(tiny.save(tmp_path / kind, kind, **overrides))


def own_probs(loaded, text: str = TEXT) -> np.ndarray:
    """(L, H, T, T) the model's own eager probabilities, without any of Headlight's hooks."""
    with loaded.unhooked("eager") as model, torch.no_grad():
        out = model(**loaded.tokenizer(text, return_tensors="pt"), output_attentions=True)
    return torch.stack(out.attentions, 1)[0].double().numpy()


def softmax(scores: torch.Tensor, visible: torch.Tensor | None = None) -> np.ndarray:
    if visible is not None:
        scores = scores.masked_fill(~visible, -math.inf)
    return torch.softmax(scores, dim=-1).numpy()


def content(rec, layer: int) -> tuple[torch.Tensor, torch.Tensor]:
    """(H, T, d) queries and keys of one layer, float64, K/V groups expanded."""
    q = torch.from_numpy(rec.q[layer]).double()
    k = torch.from_numpy(rec.k[layer]).double()
    return q, k.repeat_interleave(rec.n_heads // rec.n_kv_heads, dim=0)


def assert_matches(ref: np.ndarray, loaded, rec) -> None:
    np.testing.assert_allclose(ref, own_probs(loaded), atol=1e-6)  # the model's own
    np.testing.assert_allclose(ref, rec.own_probs, atol=1e-6)  # the recording's
    derived = loaded.record(rec.text, own_probs=False).attention_matrices()  # on demand
    np.testing.assert_allclose(ref, derived, atol=1e-6)


def assert_each_term_is_needed(loaded, *terms: str) -> None:
    """Leaving a term out of the recording fails the check, on both routes: with the model's
    own probabilities, and on the head outputs alone (a long text's route)."""
    for own in (True, False):
        rec = loaded.record(TEXT, own_probs=own)
        assert check_recording(rec).passed, own
        for term in terms:
            left_out = dataclasses.replace(rec, terms=dataclasses.replace(rec.terms, **{term: None}))
            result = check_recording(left_out)
            assert not result.passed and result.max_abs_error > 1e-3, (term, own)
            if not own:
                assert result.max_probability_error is None and result.max_context_error > 1e-3


# -- DeBERTa: disentangled attention ----------------------------------------------------------


def deberta_bucket(r: int, buckets: int, max_position: int) -> int:
    """The log-bucket rule of DeBERTa v2/v3 (docs/families.md): exact within ±buckets/2, then
    logarithmic up to max_position, sign kept."""
    mid = buckets // 2
    if abs(r) <= mid:
        return r
    log_pos = math.ceil(math.log(abs(r) / mid) / math.log((max_position - 1) / mid) * (mid - 1))
    return int(math.copysign(log_pos + mid, r))


def deberta_rows(t: int, config) -> np.ndarray:
    """(T, T) δ(i, j): the position-table row of the pair (He et al. 2021, §3.1 δ; with buckets)."""
    buckets, max_pos = config.position_buckets, config.max_relative_positions
    span = buckets if buckets > 0 else max_pos
    rows = np.zeros((t, t), dtype=np.int64)
    for i in range(t):
        for j in range(t):
            r = deberta_bucket(i - j, buckets, max_pos) if buckets > 0 else i - j
            rows[i, j] = min(max(r + span, 0), 2 * span - 1)
    return rows


DEBERTA_VARIANTS = {
    "v3": {},  # shared projections, 4 log buckets, c2p + p2c, layer-normed relative embeddings
    "separate-c2p-no-buckets": dict(
        share_att_key=False,
        pos_att_type=["c2p"],
        position_buckets=-1,
        max_relative_positions=8,
        norm_rel_ebd="none",
    ),
    "separate-p2c": dict(share_att_key=False, pos_att_type=["p2c"], position_buckets=8),
}


@pytest.mark.parametrize("variant", sorted(DEBERTA_VARIANTS))
def test_deberta_disentangled_attention_from_the_paper(tmp_path, variant):
    """He et al. 2021, Eq. 4: Ã_ij = Q_i·K_jᵀ + Q_i·Kʳ_δ(i,j)ᵀ + K_j·Qʳ_δᵀ, scaled by
    1/√(d·(1 + number of position terms)) (§3.1); relative embeddings projected by the
    position (or, shared, the content) projections.

    Eq. 4 writes the p2c row as δ(j, i); the released implementation, with which checkpoints
    are trained, reads δ(i, j) (docs/families.md). The model's own probabilities decide: only
    δ(i, j) agrees with them, asserted below.
    """
    loaded = open_tiny(tmp_path, "deberta-v2", **DEBERTA_VARIANTS[variant])
    rec = loaded.record(TEXT)
    cfg, encoder = loaded.config, loaded.model.deberta.encoder
    terms = [t for t in cfg.pos_att_type if t in ("c2p", "p2c")]
    rows = deberta_rows(rec.n_tokens, cfg)
    np.testing.assert_array_equal(rec.terms.rel_index, rows)
    span = cfg.position_buckets if cfg.position_buckets > 0 else cfg.max_relative_positions
    table = encoder.rel_embeddings.weight[: 2 * span]  # rows δ = 0 .. 2·span − 1
    if "layer_norm" in cfg.norm_rel_ebd:
        table = encoder.LayerNorm(table)
    idx = torch.from_numpy(rows)
    h, d = rec.n_heads, rec.q.shape[-1]
    ref, flipped = [], []
    with torch.no_grad():
        for layer, module in enumerate(encoder.layer):
            att = module.attention.self
            k_proj = att.key_proj if cfg.share_att_key else getattr(att, "pos_key_proj", None)
            q_proj = att.query_proj if cfg.share_att_key else getattr(att, "pos_query_proj", None)
            q, k = content(rec, layer)
            scores = q @ k.transpose(1, 2)  # (H, T, T) content → content
            p2c_flipped = scores.clone()
            if "c2p" in terms:
                kr = k_proj(table).double().reshape(-1, h, d).transpose(0, 1)  # (H, R, d)
                c2p = torch.einsum("hid,hijd->hij", q, kr[:, idx])
                scores, p2c_flipped = scores + c2p, p2c_flipped + c2p
            if "p2c" in terms:
                qr = q_proj(table).double().reshape(-1, h, d).transpose(0, 1)  # (H, R, d)
                scores = scores + torch.einsum("hjd,hijd->hij", k, qr[:, idx])
                p2c_flipped = p2c_flipped + torch.einsum("hjd,hijd->hij", k, qr[:, idx.T])
            scale = 1.0 / math.sqrt(d * (1 + len(terms)))
            ref.append(softmax(scores * scale))
            flipped.append(softmax(p2c_flipped * scale))
    assert_matches(np.stack(ref), loaded, rec)
    if "p2c" in terms:
        assert np.abs(np.stack(flipped) - own_probs(loaded)).max() > 1e-4
    assert check_recording(rec).passed


def test_deberta_check_fails_without_c2p_or_p2c(tmp_path):
    assert_each_term_is_needed(open_tiny(tmp_path, "deberta-v2"), "pos_key", "pos_query")


# -- MPNet: T5-style relative bias ------------------------------------------------------------


def t5_bucket(relative: int, num_buckets: int = 32, max_distance: int = 128) -> int:
    """Raffel et al. 2020, §2.1 (T5): bidirectional buckets, half for each direction; exact
    below num_buckets/4, logarithmic up to max_distance, the rest in the last bucket.
    ``relative`` = key position − query position."""
    n = -relative
    half = num_buckets // 2
    bucket = half if n < 0 else 0
    n = abs(n)
    exact = half // 2
    if n < exact:
        return bucket + n
    large = exact + int(math.log(n / exact) / math.log(max_distance / exact) * (half - exact))
    return bucket + min(large, half - 1)


def test_mpnet_relative_bias_from_t5_buckets(tmp_path):
    loaded = open_tiny(tmp_path, "mpnet")
    rec = loaded.record(TEXT)
    t = rec.n_tokens
    assert t > 9, "the text must reach the logarithmic buckets (|i − j| >= 8)"
    rows = np.array([[t5_bucket(j - i) for j in range(t)] for i in range(t)])
    np.testing.assert_array_equal(rec.terms.rel_index, rows)
    table = loaded.model.mpnet.encoder.relative_attention_bias.weight.detach().double()  # (R, H)
    bias = table[torch.from_numpy(rows)].permute(2, 0, 1)  # (H, T, T)
    ref = []
    for layer in range(rec.n_layers):
        q, k = content(rec, layer)
        ref.append(softmax(q @ k.transpose(1, 2) / math.sqrt(q.shape[-1]) + bias))
    assert_matches(np.stack(ref), loaded, rec)
    assert_each_term_is_needed(loaded, "bias")


# -- soft-capping and windows -------------------------------------------------------------------


def causal_window(t: int, w: int | None) -> torch.Tensor:
    """Causal, and with a window of w keys ending at the query: i − w < j <= i (Jiang et al.
    2023, Mistral 7B, §2 sliding-window attention; w keys including the query itself, as in
    transformers' masking_utils)."""
    i, j = torch.arange(t)[:, None], torch.arange(t)[None, :]
    visible = j <= i
    return visible & (j > i - w) if w else visible


def local_window(t: int, half: int | None) -> torch.Tensor:
    """Bidirectional local attention: |i − j| <= half (Warner et al. 2024, ModernBERT,
    alternating attention: local layers attend within a window of local_attention tokens centred
    on the query; docs/families.md §7)."""
    i, j = torch.arange(t)[:, None], torch.arange(t)[None, :]
    return (i - j).abs() <= half if half is not None else torch.ones(t, t, dtype=torch.bool)


def test_gemma2_soft_capping_and_windows(tmp_path):
    """Gemma Team 2024 (Gemma 2), logit soft-capping: cap · tanh(logits / cap); scale
    query_pre_attn_scalar^(−1/2); sliding layers alternate with global ones."""
    # the tiny random model's scores stay below 0.04: a cap of 0.02 bends them enough that
    # leaving it out must fail on the head outputs alone too
    loaded = open_tiny(tmp_path, "gemma2", attn_logit_softcapping=0.02)
    rec = loaded.record(TEXT)
    cfg = loaded.config
    cap, scale = cfg.attn_logit_softcapping, cfg.query_pre_attn_scalar**-0.5
    ref = []
    for layer in range(rec.n_layers):
        q, k = content(rec, layer)
        s = q @ k.transpose(1, 2) * scale
        w = cfg.sliding_window if cfg.layer_types[layer] == "sliding_attention" else None
        ref.append(softmax(cap * torch.tanh(s / cap), causal_window(rec.n_tokens, w)))
    assert_matches(np.stack(ref), loaded, rec)
    assert_each_term_is_needed(loaded, "softcap", "window")


WINDOWED = ["mistral", "qwen2", "qwen3", "gemma3", "phi3", "modernbert"]


@pytest.mark.parametrize("kind", WINDOWED)
def test_windows_from_their_definition(tmp_path, kind):
    loaded = open_tiny(tmp_path, kind)
    rec = loaded.record(TEXT)
    cfg, t = loaded.config, rec.n_tokens
    assert t > tiny.WINDOW + 2, "the text must cross the window"
    ref, windowed = [], 0
    for layer in range(rec.n_layers):
        q, k = content(rec, layer)
        s = q @ k.transpose(1, 2) * float(rec.scale[layer])
        sliding = getattr(cfg, "layer_types", None) is None or cfg.layer_types[layer] == "sliding_attention"
        if kind == "modernbert":
            visible = local_window(t, cfg.local_attention // 2 if sliding else None)
        else:
            visible = causal_window(t, cfg.sliding_window if sliding else None)
        windowed += int(sliding)
        ref.append(softmax(s, visible))
        np.testing.assert_array_equal(rec.key_mask(layer), visible.numpy())
    assert windowed >= 1
    assert_matches(np.stack(ref), loaded, rec)
    assert_each_term_is_needed(loaded, "window")


# -- rotary: partial, per-layer bases, scaled ---------------------------------------------------


def rope(x: torch.Tensor, positions: torch.Tensor, base: float, rotated: int) -> torch.Tensor:
    """Su et al. 2021 (RoFormer), Eq. 34, rotate-half layout, over the first ``rotated`` dims:
    the pair (x_i, x_{i + r/2}) turns by m·θ_i, θ_i = base^(−2i/r); the rest passes through."""
    inv = base ** (-torch.arange(0, rotated, 2, dtype=torch.float64) / rotated)  # (r/2,)
    angles = positions[:, None].double() * inv[None, :]  # (T, r/2)
    cos, sin = angles.cos().repeat(1, 2), angles.sin().repeat(1, 2)  # (T, r)
    part, rest = x[..., :rotated], x[..., rotated:]
    half = rotated // 2
    turned = torch.cat([-part[..., half:], part[..., :half]], dim=-1)
    return torch.cat([part * cos + turned * sin, rest], dim=-1)


def raw_queries(loaded, kind: str, text: str = TEXT) -> list[torch.Tensor]:
    """(H, T, d) queries per layer before rotary, split here from the projection outputs."""
    found, h = [], loaded.n_heads
    d = loaded.geometry.head_dim

    def keep(module, args, output):
        x = output.detach()[0].double()
        if kind == "gpt-neox":  # (T, H·3d): per head [q k v]
            found.append(x.reshape(x.shape[0], h, 3 * d)[..., :d].transpose(0, 1))
        elif kind == "gemma3":  # q_norm output (1, H, T, d)
            found.append(x)
        else:  # q first along the last axis (Phi-3 qkv_proj, ModernBERT Wqkv)
            found.append(x[:, : h * d].reshape(x.shape[0], h, d).transpose(0, 1))

    name = {"gpt-neox": "query_key_value", "phi3": "qkv_proj", "modernbert": "Wqkv", "gemma3": "q_norm"}[kind]
    with loaded.unhooked() as model:
        handles = [m.register_forward_hook(keep) for n, m in model.named_modules() if n.endswith(name)]
        with torch.no_grad():
            model(**loaded.tokenizer(text, return_tensors="pt"))
        for handle in handles:
            handle.remove()
    return found


def rotary_bases(loaded, kind: str) -> list[tuple[float, int]]:
    """(base, rotated dims) per layer, from the config."""
    cfg, d = loaded.config, loaded.geometry.head_dim
    if kind in ("gpt-neox", "phi3"):
        rope_cfg = cfg.rope_parameters
        return [(rope_cfg["rope_theta"], int(d * rope_cfg["partial_rotary_factor"]))] * loaded.n_layers
    params = cfg.rope_parameters  # one set per layer type
    return [(params[t]["rope_theta"], d) for t in cfg.layer_types]


@pytest.mark.parametrize("kind", ["gpt-neox", "phi3", "modernbert", "gemma3"])
def test_rotary_from_roformer(tmp_path, kind):
    """Partial rotary (GPT-NeoX rotary_pct, Phi-3 partial_rotary_factor) and the separate
    local/global bases of ModernBERT and Gemma 3, applied here to the raw projections."""
    loaded = open_tiny(tmp_path, kind)
    rec = loaded.record(TEXT)
    raw = raw_queries(loaded, kind)
    bases = rotary_bases(loaded, kind)
    positions = torch.arange(rec.n_tokens)
    assert len(raw) == rec.n_layers
    assert len(set(bases)) > 1 or bases[0][1] < loaded.geometry.head_dim, "a partial or mixed case"
    for layer, (base, rotated) in enumerate(bases):
        ours = rope(raw[layer], positions, base, rotated).numpy()
        np.testing.assert_allclose(rec.q[layer], ours, atol=1e-5)
    assert check_recording(rec).passed


def test_scaled_rotary_comes_from_the_models_own_tables(tmp_path):
    """Llama 3 rotary scaling (rope_type llama3) is neither refused nor re-implemented: the
    model's own (cos, sin) tables are captured, and the check passes at 1e-5."""
    scaling = {
        "rope_type": "llama3",
        "factor": 8.0,
        "low_freq_factor": 1.0,
        "high_freq_factor": 4.0,
        "original_max_position_embeddings": 8,
        "rope_theta": 500000.0,
    }
    loaded = open_tiny(tmp_path, "llama", rope_parameters=scaling)
    rec = loaded.record(TEXT)
    np.testing.assert_allclose(rec.own_probs, own_probs(loaded), atol=1e-6)
    assert check_recording(rec).passed
    plain = open_tiny(
        tmp_path / "plain", "llama", rope_parameters={"rope_type": "default", "rope_theta": 500000.0}
    )
    assert np.abs(plain.record(TEXT).own_probs - rec.own_probs).max() > 1e-4, "scaling changes attention"
