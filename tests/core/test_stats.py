"""Wilson score interval and Spearman rank correlation (viewer.core.stats)."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binomtest, norm, spearmanr

from viewer.core.stats import Z95, average_ranks, spearman, wilson_interval


def test_z95_is_the_normal_quantile():
    # outside reference: scipy.stats.norm.ppf
    assert Z95 == pytest.approx(norm.ppf(0.975), abs=1e-15)


@pytest.mark.parametrize(
    "k,n,low,high",
    [
        # Newcombe (1998), Statistics in Medicine 17:857-872, worked examples for the Wilson
        # score method without continuity correction (four decimals)
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0, 0.1611),
        (1, 29, 0.0061, 0.1718),
        # by hand from the formula: p = 2/3, n = 3, z² = 3.8415: centre 1.30691 / 2.28049 =
        # 0.57308, half 0.85944 · sqrt(0.074074 + 0.106708) = 0.36542
        (2, 3, 0.2077, 0.9385),
    ],
)
def test_wilson_worked_examples(k, n, low, high):
    lo, hi = wilson_interval(k, n)
    assert lo == pytest.approx(low, abs=5e-5)
    assert hi == pytest.approx(high, abs=5e-5)


@settings(max_examples=60, deadline=None, database=None)
@given(n=st.integers(1, 400), frac=st.floats(0, 1))
def test_wilson_matches_scipy(n, frac):
    # outside reference: scipy.stats.binomtest(k, n).proportion_ci(method="wilson")
    k = round(frac * n)
    ci = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    lo, hi = wilson_interval(k, n)
    assert lo == pytest.approx(ci.low, abs=1e-12)
    assert hi == pytest.approx(ci.high, abs=1e-12)


def test_wilson_edges():
    assert wilson_interval(0, 0) == (0.0, 1.0)
    with pytest.raises(ValueError):
        wilson_interval(4, 3)


def test_average_ranks_hand_made():
    # mid-ranks by hand: 10 -> 1, the two 20s share (2 + 3)/2, 30 -> 4; three equal values share 2
    np.testing.assert_array_equal(average_ranks([20, 10, 20, 30]), [2.5, 1, 2.5, 4])
    np.testing.assert_array_equal(average_ranks([5, 5, 5]), [2, 2, 2])


@settings(max_examples=80, deadline=None, database=None)
@given(pairs=st.lists(st.tuples(st.integers(0, 4), st.integers(-3, 3)), min_size=2, max_size=30))
def test_spearman_matches_scipy_with_ties(pairs):
    # outside reference: scipy.stats.spearmanr; small integer ranges force many ties
    x = np.array([p[0] for p in pairs], dtype=float)
    y = np.array([p[1] for p in pairs], dtype=float)
    ours = spearman(x, y)
    if np.ptp(x) == 0 or np.ptp(y) == 0:
        assert math.isnan(ours)  # documented: constant side -> NaN
        return
    ref = spearmanr(x, y).statistic
    assert ours == pytest.approx(ref, abs=1e-12)


def test_spearman_known_values():
    # textbook: a monotone map gives 1, a reversal -1
    x = np.array([0.1, 0.5, 0.3, 2.0])
    assert spearman(x, np.exp(x)) == pytest.approx(1.0)
    assert spearman(x, -x) == pytest.approx(-1.0)
    assert math.isnan(spearman([1.0], [2.0]))
    with pytest.raises(ValueError):
        spearman([1, 2], [1, 2, 3])
