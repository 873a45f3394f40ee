"""Accumulator state: plain arrays out, the same accumulator back, bit for bit.

Reference: the accumulator itself (``merge`` of a restored copy must equal ``merge`` of the
original, and ``np.load(..., allow_pickle=False)`` must read the state: no object arrays).
"""

from __future__ import annotations

import io

import numpy as np

from viewer.core.headstats import HeadStats
from viewer.core.links import LinkAccuracy, PairResult
from viewer.core.shortcuts import KnockoutOutcome, KnockoutTally


def through_npz(state):
    buf = io.BytesIO()
    np.savez(buf, **state)
    buf.seek(0)
    with np.load(buf, allow_pickle=False) as npz:
        return {k: npz[k] for k in npz.files}


def test_head_stats_state_round_trip():
    rng = np.random.default_rng(0)
    stats = HeadStats(2, 3)
    for t in (4, 7):
        p = rng.random((2, 3, t, t))
        stats.add(p / p.sum(-1, keepdims=True), np.arange(t) == 0, causal=False)
    back = HeadStats.from_state(through_npz(stats.state()))
    assert back.texts == 2 and back.rows == stats.rows
    for name in ("entropy", "distance", "next", "confidence"):
        assert np.array_equal(getattr(back.summary(), name), getattr(stats.summary(), name))


def test_knockout_tally_state_round_trip_keeps_odd_keys_and_order():
    tally = KnockoutTally()
    tally.add_text(
        {"portal": KnockoutOutcome(True, 0.1 + 0.2, 1 / 3), "naïve\x00": KnockoutOutcome(False, -1e-17, 0.0)}
    )
    tally.add_text({"portal": KnockoutOutcome(False, 0.7, 0.25)})
    back = KnockoutTally.from_state(through_npz(tally.state()))
    assert list(back.keys()) == ["portal", "naïve\x00"]
    assert [back.entry(k) for k in back.keys()] == [tally.entry(k) for k in tally.keys()] and back.texts == 2
    assert KnockoutTally.from_state(through_npz(KnockoutTally().state())).texts == 0


def test_knockout_tally_state_keeps_head_focus_and_the_class_breakdown():
    tally = KnockoutTally(("repair", "billing"), heads=2)
    tally.add_text({"portal": KnockoutOutcome(True, 0.5, 0.3, (0.1, 0.5), predicted=0)})
    tally.add_text({"portal": KnockoutOutcome(False, 0.25, 0.2, (1 / 3, 0.0), predicted=1)})
    back = KnockoutTally.from_state(through_npz(tally.state()))
    assert back.labels == ("repair", "billing") and back.heads == 2
    assert back.entry("portal") == tally.entry("portal")
    assert np.array_equal(back.head_focus("portal"), [(0.1 + 1 / 3) / 2, 0.25])
    empty = KnockoutTally.from_state(through_npz(KnockoutTally(("a",), 3).state()))
    assert (empty.labels, empty.heads, len(empty)) == (("a",), 3, 0)


def test_link_accuracy_state_round_trip():
    acc = LinkAccuracy(2, 2)
    acc.add(PairResult(np.zeros((2, 2, 2)), np.array([[True, False], [True, True]]), True))
    back = LinkAccuracy.from_state(through_npz(acc.state()))
    assert np.array_equal(back.accuracy, acc.accuracy) and back.nearest_baseline == 1.0
