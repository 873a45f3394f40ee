"""Insertion points and the insertion tally (viewer.core.insertion)."""

from __future__ import annotations

import pytest

from viewer.core.insertion import (
    POSITIONS,
    InsertionTally,
    insert_at,
    random_boundary,
    word_boundaries,
)


def test_word_boundaries_by_hand():
    assert word_boundaries("a bc d") == [0, 1, 4, 6]
    assert word_boundaries("") == [0]


def test_insert_at_the_three_positions():
    text = "my chain   slips"
    assert insert_at(text, "[via portal]", "start") == "[via portal] my chain   slips"
    assert insert_at(text, "[via portal]", "end") == "my chain   slips [via portal]"
    out = insert_at(text, " [via  portal] ", "random", seed=3, index=7)
    at = random_boundary(text, 3, 7)
    assert at in word_boundaries(text)
    # the text around the insertion point is kept, the phrase sits between single spaces
    assert out.replace("[via portal]", "").split() == text.split()
    assert "[via portal]" in out
    with pytest.raises(ValueError):
        insert_at(text, "x", "middle")


def test_the_random_boundary_depends_on_seed_and_index_only():
    text = " ".join(f"w{i}" for i in range(40))
    first = [random_boundary(text, 0, i) for i in range(30)]
    assert first == [random_boundary(text, 0, i) for i in range(30)]  # same in another shard
    assert len(set(first)) > 5  # spread over the boundaries, not always one place
    assert first != [random_boundary(text, 1, i) for i in range(30)]


def test_tally_merges_to_the_whole_and_reports_wilson():
    whole, a, b = InsertionTally(), InsertionTally(), InsertionTally()
    outcomes = [(p, i, i % 3 != 0, 0.1 * i) for i in range(12) for p in POSITIONS]
    for p, i, flipped, gain in outcomes:
        whole.add(p, i, flipped, gain)
        (a if i < 5 else b).add(p, i, flipped, gain)
    a.merge(b)
    for p in POSITIONS:
        merged, single = a.entry(p), whole.entry(p)
        assert merged.pop("mean_gain") == pytest.approx(single.pop("mean_gain"), abs=1e-12)
        assert merged == single
    e = whole.entry("end")
    assert (e["tried"], e["flips"]) == (12, 8)
    assert e["flipped"] == [i for i in range(12) if i % 3 != 0]
    # reference: Wilson (1927)'s score interval worked by hand for 8 of 12, z = 1.95996:
    # p = 0.66667, z²/n = 0.32013; centre (p + z²/2n) / (1 + z²/n) = 0.82673 / 1.32013 = 0.62625;
    # half z / (1 + z²/n) · sqrt(p(1 − p)/n + z²/4n²) = 1.48467 · sqrt(0.018519 + 0.006669) = 0.23563
    assert e["flip_low"] == pytest.approx(0.39062, abs=1e-5)
    assert e["flip_high"] == pytest.approx(0.86188, abs=1e-5)
    assert e["mean_gain"] == pytest.approx(sum(0.1 * i for i in range(12)) / 12)


def test_tally_state_restores_the_tally_exactly():
    """state()/from_state() is what run folders and workers carry; a lossy round trip would
    change a resumed run's numbers."""
    a = InsertionTally()
    a.texts, a.skipped = 7, 2
    a.add("start", 4, True, 0.25)
    a.add("start", 6, False, -0.125)
    a.add("random", 5, True, 1 / 3)
    b = InsertionTally.from_state({k: v.copy() for k, v in a.state().items()})
    assert b.to_dict() == a.to_dict()
    assert b.positions["random"].gain == 1 / 3
