"""The shortcut screen's tally, its association test and the candidate rule."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import false_discovery_control, fisher_exact

from viewer.core.screen import ScreenScore, ScreenTally, budget, candidates, log_odds, reaching


def tally_of(texts: list[tuple[dict[str, float], int, int]], labels=("repair", "billing")) -> ScreenTally:
    """texts: ({key: gradient × input}, predicted, gold); every text's log-odds is 1."""
    t = ScreenTally(labels)
    for scores, predicted, gold in texts:
        t.add_text({k: ScreenScore(g, 0.1) for k, g in scores.items()}, 1.0, predicted, gold)
    return t


def test_association_is_fishers_exact_test_with_benjamini_hochberg():
    """A worked 2×2 example: 16 texts, 9 predicted billing; "portal" is held by 10 texts, 8 of
    them billing. Reference: scipy.stats.fisher_exact(alternative="greater") and, by hand, the
    hypergeometric tail P(X >= 8) = [C(9,8)·C(7,2) + C(9,9)·C(7,1)] / C(16,10) (Fisher 1922)."""
    texts = []
    for n in range(16):
        billing = n < 9
        holds = (n < 8) or (n in (9, 10))  # 8 billing texts and 2 repair texts hold it
        keys = {"portal": 0.0} if holds else {}
        keys["thanks"] = 0.0  # every text: no association at all
        if n in (0, 9, 10):
            keys["chain"] = 0.0  # 1 billing, 2 repair texts
        texts.append((keys, int(billing), -1))
    t = tally_of(texts)
    a, b, c, d = 8, 2, 1, 5  # portal: billing / repair; no portal: billing / repair
    p_billing = fisher_exact([[a, b], [c, d]], alternative="greater").pvalue
    by_hand = (math.comb(9, 8) * math.comb(7, 2) + math.comb(9, 9) * math.comb(7, 1)) / math.comb(16, 10)
    assert p_billing == pytest.approx(by_hand, rel=1e-12)
    p_repair = fisher_exact([[b, a], [d, c]], alternative="greater").pvalue
    p_chain = min(
        fisher_exact([[1, 2], [8, 5]], alternative="greater").pvalue,
        fisher_exact([[2, 1], [5, 8]], alternative="greater").pvalue,
    )
    # Bonferroni over the 2 classes, then Benjamini–Hochberg over the 3 keys
    want = false_discovery_control([min(1, 2 * min(p_billing, p_repair)), 1.0, min(1, 2 * p_chain)])
    got = t.association(["portal", "thanks", "chain"])
    np.testing.assert_allclose(got, want, rtol=1e-10)
    # no labels in this set: the gold association knows nothing
    np.testing.assert_array_equal(t.association(["portal"], "gold"), [1.0])


def test_reach_and_log_odds():
    """log-odds against the textbook formula log(p / (1 − p)); near p = 1 from the other
    classes' probabilities, where 1 − p would cancel."""
    p = np.array([0.7, 0.2, 0.1])
    assert log_odds(p, 0) == pytest.approx(math.log(0.7 / 0.3), rel=1e-12)
    tiny = np.array([1 - 3e-17, 1e-17, 2e-17])  # 1 − p[0] is 0 in float64
    assert log_odds(tiny, 0) == pytest.approx(-math.log(3e-17), rel=1e-9)
    assert log_odds(np.array([1.0, 0.0]), 0) == math.inf
    scores = {"a": ScreenScore(0.5, 0), "b": ScreenScore(0.09, 0), "c": ScreenScore(-2, 0)}
    assert reaching(scores, 1.0) == {"a"}  # 0.1 of the log-odds at least, and positive
    assert reaching(scores, -1.0) == {"a", "b"}  # a text predicted against the odds


def test_state_round_trip_and_merge_equal_one_tally():
    texts = [({"a": 0.5, "b": -0.1}, 0, 1), ({"a": 0.2}, 1, 1), ({"b": 0.3, "c": 0.0}, 1, 0)]
    whole = tally_of(texts)
    parts = tally_of(texts[:1]).merge(tally_of(texts[1:]))
    for got in (parts, ScreenTally.from_state(whole.state())):
        state, want = got.state(), whole.state()
        assert set(state) == set(want) and all(np.array_equal(state[k], want[k]) for k in want)
    # a causal LM's tally keeps no classes
    plain = tally_of(texts, labels=())
    assert ScreenTally.from_state(plain.state()).rows(["a"]) == plain.rows(["a"])
    rows = whole.rows(["a"])["a"]
    assert (rows["count"], rows["reaches"], rows["grad_input"]) == (2, 2, pytest.approx(0.35))
    assert whole.knockouts() == 5 and whole.texts == 3
    with pytest.raises(ValueError):
        whole.merge(ScreenTally(("x",)))


def test_candidates_take_reached_keys_first_within_the_budget():
    # 12 texts; "cue" reaches 6 of its 6, "rare" 1 of its 3, "the" none of its 12
    texts = []
    for n in range(12):
        keys = {"the": 0.01}
        if n < 6:
            keys["cue"] = 0.9
        if n in (6, 7, 8):
            keys["rare"] = 0.5 if n == 6 else 0.0
        if n < 2:
            keys["once"] = 5.0  # seen in 2 texts: never a candidate
        texts.append((keys, int(n < 6), -1))
    t = tally_of(texts)
    assert candidates(t, most=10, budget=100)[:2] == ["cue", "rare"]
    assert set(candidates(t, most=10, budget=100)) == {"cue", "rare", "the"}
    assert candidates(t, most=1, budget=100) == ["cue"]
    assert candidates(t, most=10, budget=9) == ["cue", "rare"]  # "the" costs 12 knockouts
    assert candidates(t, most=10, budget=5) == ["rare"]  # "cue" costs 6
    # 1/16 of the exhaustive search's knockouts, at least 256
    assert budget(t, ScreenTally(("repair", "billing"))) == 256
    assert budget(t, t, share=8.0) == 16 * t.knockouts() > 256
