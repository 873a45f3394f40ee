"""Wilson score interval and Spearman rank correlation (viewer.core.stats, thin SciPy wrappers).

The arithmetic is SciPy's; these tests pin the conventions the wrappers add (n = 0, the NaN
rule for constant inputs, input checks) and compare with published worked examples.
"""

import math

import numpy as np
import pytest

from viewer.core.stats import spearman, wilson_interval


@pytest.mark.parametrize(
    "k,n,low,high",
    [
        # Newcombe (1998), Statistics in Medicine 17:857-872, Table I, method 3 (Wilson score
        # without continuity correction), four decimals
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0, 0.1611),
        (1, 29, 0.0061, 0.1718),
        # by hand from Wilson's formula: p = 2/3, n = 3, z² = 3.8415: centre 1.30691 / 2.28049 =
        # 0.57308, half 0.85944 · sqrt(0.074074 + 0.106708) = 0.36542
        (2, 3, 0.2077, 0.9385),
    ],
)
def test_wilson_worked_examples(k, n, low, high):
    lo, hi = wilson_interval(k, n)
    assert lo == pytest.approx(low, abs=5e-5)
    assert hi == pytest.approx(high, abs=5e-5)


def test_wilson_edges():
    assert wilson_interval(0, 0) == (0.0, 1.0)  # nothing seen: nothing known
    lo, hi = wilson_interval(40, 40)
    assert hi == 1.0 and 0.9 < lo < 1.0
    with pytest.raises(ValueError):
        wilson_interval(4, 3)
    with pytest.raises(ValueError):
        wilson_interval(-1, 3)


def test_wilson_ranks_evidence_over_luck():
    """The ranking rule of the shortcut search: 2 of 3 must not outrank 40 of 90."""
    assert wilson_interval(2, 3)[0] < wilson_interval(40, 90)[0]


def test_spearman_worked_example_with_ties():
    # by hand: x = (1, 2, 2, 3) has mid-ranks (1, 2.5, 2.5, 4); y = (1, 3, 2, 4) ranks (1, 3, 2, 4).
    # Centred: r = (-1.5, 0, 0, 1.5), s = (-1.5, 0.5, -0.5, 1.5); r·s = 4.5, |r|² = 4.5, |s|² = 5
    # -> rho = 4.5 / sqrt(22.5) = 0.948683
    assert spearman([1, 2, 2, 3], [1, 3, 2, 4]) == pytest.approx(4.5 / math.sqrt(22.5), abs=1e-12)


def test_spearman_known_values():
    # a monotone map gives 1, a reversal -1 (Spearman 1904: a correlation of ranks)
    x = np.array([0.1, 0.5, 0.3, 2.0])
    assert spearman(x, np.exp(x)) == pytest.approx(1.0)
    assert spearman(x, -x) == pytest.approx(-1.0)


def test_spearman_conventions():
    assert math.isnan(spearman([1.0], [2.0]))  # fewer than two values
    assert math.isnan(spearman([1.0, 1.0, 1.0], [1.0, 2.0, 3.0]))  # a constant side
    with pytest.raises(ValueError):
        spearman([1, 2], [1, 2, 3])
    with pytest.raises(ValueError):
        spearman([1, np.nan], [1, 2])
