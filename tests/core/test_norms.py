"""Value-weighted norms (viewer.core.norms)."""

import numpy as np
import pytest

from viewer.core.norms import head_sum_norms, transformed_vectors, value_weighted_norms


def _brute_force(x, w_v, b_v, w_o, alpha, n_heads, n_kv_heads):
    """Outside reference: direct loops over heads, queries and keys computing
    ‖α^h_ij (x_j W_V^h + b_V^h) W_O^h‖ (Kobayashi et al. 2020) and the norm of the head sum."""
    d = w_o.shape[0] // n_heads
    per_head = np.zeros(alpha.shape)
    t = x.shape[0]
    head_sum = np.zeros((t, t))
    per_group = n_heads // n_kv_heads
    for i in range(t):
        for j in range(t):
            total = np.zeros(w_o.shape[1])
            for h in range(n_heads):
                g = h // per_group
                v = x[j] @ w_v[:, g * d : (g + 1) * d]
                if b_v is not None:
                    v = v + b_v[g * d : (g + 1) * d]
                vec = alpha[h, i, j] * (v @ w_o[h * d : (h + 1) * d, :])
                per_head[h, i, j] = np.linalg.norm(vec)
                total += vec
            head_sum[i, j] = np.linalg.norm(total)
    return per_head, head_sum


@pytest.mark.parametrize("n_heads,n_kv_heads,bias", [(3, 3, True), (4, 2, False), (2, 1, True)])
def test_against_brute_force(n_heads, n_kv_heads, bias):
    rng = np.random.default_rng(n_heads * 10 + n_kv_heads)
    t, d_in, d, d_out = 5, 7, 3, 6
    x = rng.normal(size=(t, d_in))
    w_v = rng.normal(size=(d_in, n_kv_heads * d))
    b_v = rng.normal(size=n_kv_heads * d) if bias else None
    w_o = rng.normal(size=(n_heads * d, d_out))
    alpha = rng.random((n_heads, t, t))
    alpha /= alpha.sum(axis=-1, keepdims=True)

    f = transformed_vectors(x, w_v, b_v, w_o, n_heads, n_kv_heads)
    assert f.shape == (n_heads, t, d_out)
    norms = value_weighted_norms(alpha, f)
    ref_per_head, ref_sum = _brute_force(x, w_v, b_v, w_o, alpha, n_heads, n_kv_heads)
    assert norms.per_head.shape == (n_heads, t, t)
    assert norms.head_sum.shape == (t, t)
    np.testing.assert_allclose(norms.per_head, ref_per_head, rtol=1e-10)
    np.testing.assert_allclose(norms.head_sum, ref_sum, rtol=1e-8, atol=1e-10)


def test_cancelling_heads_give_zero_sum():
    # hand-made: two heads with opposite vectors and equal weights cancel exactly in the sum
    f = np.stack([np.ones((2, 3)), -np.ones((2, 3))])  # (H=2, T=2, D=3)
    alpha = np.full((2, 2, 2), 0.5)
    norms = value_weighted_norms(alpha, f)
    np.testing.assert_allclose(norms.per_head, 0.5 * np.sqrt(3))
    np.testing.assert_allclose(norms.head_sum, 0.0, atol=1e-7)


def test_torch_layout_is_rejected_with_a_hint():
    rng = np.random.default_rng(0)
    x = rng.normal(size=(4, 6))
    w_v = rng.normal(size=(6, 6))  # square: cannot tell, accepted
    transformed_vectors(x, w_v, None, rng.normal(size=(6, 5)), n_heads=2)
    with pytest.raises(ValueError, match="transpose"):
        transformed_vectors(x, rng.normal(size=(4, 6)), None, rng.normal(size=(4, 5)), n_heads=2)


@pytest.mark.parametrize("n_heads,n_kv_heads,tokens", [(3, 3, 2), (4, 2, 5), (4, 1, 100)])
def test_head_sum_by_blocks_against_brute_force(n_heads, n_kv_heads, tokens):
    """The streaming head sum for a few query rows equals the direct loops (Kobayashi et al.
    2020), whatever the block of key tokens, with grouped values read by h // (H / G)."""
    rng = np.random.default_rng(7 * n_heads + n_kv_heads)
    t, d_in, d, d_out = 7, 5, 3, 4
    x = rng.normal(size=(t, d_in))
    w_v = rng.normal(size=(d_in, n_kv_heads * d))
    b_v = rng.normal(size=n_kv_heads * d)
    w_o = rng.normal(size=(n_heads * d, d_out))
    alpha = rng.random((n_heads, t, t))
    alpha /= alpha.sum(axis=-1, keepdims=True)
    _, ref_sum = _brute_force(x, w_v, b_v, w_o, alpha, n_heads, n_kv_heads)
    values = (x @ w_v + b_v).reshape(t, n_kv_heads, d).transpose(1, 0, 2)  # (G, T, d) as captured
    rows = [0, 4]
    got = head_sum_norms(alpha[:, rows], values.astype(np.float32), w_o.reshape(n_heads, d, d_out), tokens)
    np.testing.assert_allclose(got, ref_sum[rows], rtol=1e-6)  # float32 values given
    with pytest.raises(ValueError, match="disagree"):
        head_sum_norms(alpha[:, rows], values[:, :-1], w_o.reshape(n_heads, d, d_out))
