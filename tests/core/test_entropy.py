"""Attention entropy per row (viewer.core.entropy)."""

import numpy as np
import pytest
from scipy.stats import entropy as scipy_entropy

from viewer.core.entropy import normalized_entropy, row_entropy, visible_keys


def _random_rows(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    a = rng.random(shape) ** 3  # skewed, with near-zero entries
    return a / a.sum(axis=-1, keepdims=True)


def test_row_entropy_matches_scipy():
    # outside reference: scipy.stats.entropy (natural log) applied row by row
    rng = np.random.default_rng(0)
    probs = _random_rows(rng, (2, 3, 7, 7))
    probs[0, 0, 2] = 0.0
    probs[0, 0, 2, 4] = 1.0  # one-hot row with exact zeros
    ours = row_entropy(probs)
    ref = np.apply_along_axis(scipy_entropy, -1, probs)
    assert ours.shape == (2, 3, 7)
    np.testing.assert_allclose(ours, ref, rtol=1e-12, atol=1e-15)


def test_normalized_entropy_matches_scipy_with_base():
    # outside reference: scipy.stats.entropy(p, base=n) is entropy / ln n
    rng = np.random.default_rng(1)
    probs = _random_rows(rng, (5, 6))
    ours = normalized_entropy(probs, causal=False)
    ref = [scipy_entropy(row, base=6) for row in probs]
    np.testing.assert_allclose(ours, ref, rtol=1e-12)


def test_uniform_rows_give_one_and_one_hot_rows_zero():
    # closed form: uniform over n keys has entropy ln n (maximum), one-hot has 0
    uniform = np.full((4, 4), 0.25)
    np.testing.assert_allclose(normalized_entropy(uniform, causal=False), 1.0, rtol=1e-12)
    one_hot = np.eye(4)[[2, 0, 3, 1]]
    np.testing.assert_array_equal(normalized_entropy(one_hot, causal=False), 0.0)


def test_causal_rows_of_equal_scores():
    # closed form: causal softmax of equal scores is uniform over i + 1 keys -> ln(i + 1) raw, 1.0
    # normalised; row 0 sees one key and is 0 by the documented definition
    t = 6
    scores = np.where(np.tril(np.ones((t, t), bool)), 0.0, -np.inf)
    probs = np.exp(scores) / np.exp(scores).sum(axis=-1, keepdims=True)
    np.testing.assert_allclose(row_entropy(probs), np.log(np.arange(1, t + 1)), atol=1e-12)
    norm = normalized_entropy(probs, causal=True)
    assert norm[0] == 0.0
    np.testing.assert_allclose(norm[1:], 1.0, rtol=1e-12)
    # the same rows judged as an encoder (T visible keys) are not uniform: below 1
    assert (normalized_entropy(probs, causal=False)[:-1] < 1.0 - 1e-9).all()


def test_visible_keys():
    np.testing.assert_array_equal(visible_keys(4, causal=True), [1, 2, 3, 4])
    np.testing.assert_array_equal(visible_keys(4, causal=False), [4, 4, 4, 4])


@pytest.mark.parametrize("causal", [False, True])
def test_single_token_text_is_zero(causal):
    assert normalized_entropy(np.ones((2, 1, 1)), causal=causal).tolist() == [[0.0], [0.0]]
