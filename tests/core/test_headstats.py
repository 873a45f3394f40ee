"""Streaming head summaries (viewer.core.headstats)."""

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import entropy as scipy_entropy

from viewer.core.headstats import METRICS, HeadStats

L, H = 2, 3


def _text(rng: np.random.Generator, t: int, causal: bool) -> tuple[np.ndarray, np.ndarray]:
    a = rng.random((L, H, t, t)) ** 2
    if causal:
        a = a * np.tril(np.ones((t, t)))
    probs = (a / a.sum(axis=-1, keepdims=True)).astype(np.float32)
    special = rng.random(t) < 0.3
    return probs, special


def _reference(texts, causal: bool) -> dict[str, np.ndarray]:
    """One-shot computation over the concatenated query rows, row by row in plain Python.

    Entropy reference: scipy.stats.entropy with base = visible key count (rows with one visible
    key excluded); the other metrics straight from their per-row definitions.
    """
    rows = {m: [[[] for _ in range(H)] for _ in range(L)] for m in METRICS}
    for probs, special in texts:
        t = probs.shape[-1]
        for layer in range(L):
            for head in range(H):
                for i in range(t):
                    row = probs[layer, head, i].astype(np.float64)
                    n_visible = i + 1 if causal else t

                    def cell(m, layer=layer, head=head):
                        return rows[m][layer][head]

                    if n_visible > 1:
                        cell("entropy").append(scipy_entropy(row[:n_visible], base=n_visible))
                    cell("distance").append(sum(row[j] * abs(i - j) for j in range(t)))
                    cell("special").append(sum(row[j] for j in range(t) if special[j]))
                    if i >= 1:
                        cell("previous").append(row[i - 1])
                    cell("same").append(row[i])
                    if i + 1 < t and not causal:
                        cell("next").append(row[i + 1])
                    cell("confidence").append(max(row))
    return {m: np.array([[np.mean(c) if c else np.nan for c in r] for r in rows[m]]) for m in METRICS}


@settings(max_examples=25, deadline=None, database=None)
@given(
    lengths=st.lists(st.integers(1, 6), min_size=1, max_size=6),
    split=st.integers(0, 6),
    causal=st.booleans(),
    seed=st.integers(0, 2**31 - 1),
)
def test_streaming_then_merge_equals_one_shot(lengths, split, causal, seed):
    rng = np.random.default_rng(seed)
    texts = [_text(rng, t, causal) for t in lengths]
    first, second = HeadStats(L, H), HeadStats(L, H)
    for probs, special in texts[:split]:
        first.add(probs, special, causal)
    for probs, special in texts[split:]:
        second.add(probs, special, causal)
    summary = first.merge(second).summary()
    ref = _reference(texts, causal)
    assert summary.texts == len(texts)
    assert summary.rows == sum(lengths)
    for m in METRICS:
        np.testing.assert_allclose(getattr(summary, m), ref[m], rtol=1e-6, atol=1e-7, err_msg=m)


def test_hand_made_encoder_text():
    # worked by hand: T = 3, special = [True, False, False], every head the same matrix
    a = np.array([[0.5, 0.5, 0.0], [0.0, 1.0, 0.0], [0.25, 0.25, 0.5]])
    stats = HeadStats(1, 1)
    stats.add(a[None, None], np.array([True, False, False]), causal=False)
    s = stats.summary()
    ent = (math.log(2) / math.log(3) + 0.0 + (1.5 * math.log(2)) / math.log(3)) / 3
    assert s.entropy[0, 0] == pytest.approx(ent)
    assert s.distance[0, 0] == pytest.approx((0.5 + 0.0 + (0.5 + 0.25)) / 3)
    assert s.special[0, 0] == pytest.approx((0.5 + 0.0 + 0.25) / 3)
    assert s.previous[0, 0] == pytest.approx((0.0 + 0.25) / 2)
    assert s.same[0, 0] == pytest.approx((0.5 + 1.0 + 0.5) / 3)
    assert s.next[0, 0] == pytest.approx((0.5 + 0.0) / 2)
    assert s.confidence[0, 0] == pytest.approx((0.5 + 1.0 + 0.5) / 3)


def test_causal_first_row_left_out_of_entropy_and_next_undefined():
    # causal equal scores: uniform over i + 1 keys, normalised entropy 1.0 for rows i >= 1;
    # a fake 0 from row 0 would pull the mean below 1
    t = 5
    probs = np.tril(np.ones((t, t))) / np.arange(1, t + 1)[:, None]
    stats = HeadStats(1, 2)
    stats.add(np.broadcast_to(probs, (1, 2, t, t)), np.zeros(t, bool), causal=True)
    s = stats.summary()
    np.testing.assert_allclose(s.entropy, 1.0)
    assert np.isnan(s.next).all()
    d = s.to_dict()
    assert d["next"] == [[None, None]]
    json.dumps(d, allow_nan=False)  # valid JSON without NaN


def test_to_dict_has_contract_keys():
    stats = HeadStats(L, H)
    rng = np.random.default_rng(3)
    stats.add(*_text(rng, 4, False), causal=False)
    d = stats.to_dict()
    assert d["layers"] == L and d["heads"] == H and d["texts"] == 1
    for m in METRICS:
        assert np.asarray(d[m]).shape == (L, H)
    json.dumps(d, allow_nan=False)


def test_state_size_independent_of_number_of_texts():
    rng = np.random.default_rng(4)
    stats = HeadStats(L, H)
    stats.add(*_text(rng, 3, False), causal=False)
    size_one = stats.state_nbytes()
    state_one = {name: type(getattr(stats, name)) for name in HeadStats.__slots__}
    for _ in range(200):
        stats.add(*_text(rng, int(rng.integers(1, 9)), False), causal=False)
    assert stats.texts == 201
    assert stats.state_nbytes() == size_one
    assert {name: type(getattr(stats, name)) for name in HeadStats.__slots__} == state_one
    assert not hasattr(stats, "__dict__")  # no room for per-text lists to hide in


def test_shape_mismatch_rejected():
    stats = HeadStats(L, H)
    with pytest.raises(ValueError):
        stats.add(np.ones((L, H + 1, 2, 2)) / 2, np.zeros(2, bool), causal=False)
    with pytest.raises(ValueError):
        stats.merge(HeadStats(L + 1, H))


def test_windowed_rows_are_normalised_by_the_keys_they_see():
    """Worked example: uniform weight over the n keys a row sees has entropy ln n (Shannon 1948),
    so normalised by the visible keys it is 1; normalised by all T keys it would be below 1."""
    from viewer.core.terms import layer_masks

    t, window = 9, np.array([[2, 2], [-1, -1]])  # layer 0: |i - j| <= 2; layer 1: global
    masks = layer_masks(t, False, window, 2)  # (2, T, T)
    probs = masks / masks.sum(axis=-1, keepdims=True)  # uniform over the visible keys
    probs = np.broadcast_to(probs[:, None], (2, 3, t, t))  # (L, H, T, T)
    stats = HeadStats(2, 3)
    stats.add(probs, np.zeros(t, bool), False, visible=masks)
    summary = stats.summary()
    np.testing.assert_allclose(summary.entropy, 1.0, rtol=1e-12)
    blind = HeadStats(2, 3)
    blind.add(probs, np.zeros(t, bool), False)
    assert (blind.summary().entropy[0] < 0.9).all()
    np.testing.assert_allclose(blind.summary().entropy[1], 1.0, rtol=1e-12)
    # rows 1..8 see their previous key; rows 1 and 7 see 4 keys, 2..6 see 5, row 8 sees 3
    np.testing.assert_allclose(summary.previous[0], (2 / 4 + 5 / 5 + 1 / 3) / 8)


def test_a_window_of_one_key_drops_the_neighbours_from_the_counts():
    t = 5
    mask = np.eye(t, dtype=bool)  # each row sees only itself
    stats = HeadStats(1, 1)
    stats.add(np.eye(t)[None, None], np.zeros(t, bool), False, visible=mask[None])
    summary = stats.summary()
    assert np.isnan(summary.entropy).all() and np.isnan(summary.previous).all()
    assert np.isnan(summary.next).all() and summary.same[0, 0] == 1.0
