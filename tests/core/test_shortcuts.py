"""Word-knockout tally and ranking (viewer.core.shortcuts)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from viewer.core.shortcuts import KnockoutOutcome, KnockoutTally, phrase_spans, word_spans
from viewer.core.summary import summary_share
from viewer.core.words import word_key


def test_word_key_follows_design():
    # docs/definitions.md, "Word knockout": whitespace word, lower-cased, end punctuation stripped
    assert word_key("Portal]") == "portal"
    assert word_key("[via") == "via"
    assert word_key("co-op's,") == "co-op's"
    assert word_key("«Brake»") == "brake"
    assert word_key("—") == ""
    assert word_key("...") == ""


def test_word_and_phrase_spans():
    text = "Fix my brake. [via portal]  -- Brake!"
    spans = word_spans(text)
    assert list(spans) == ["fix", "my", "brake", "via", "portal"]
    assert [text[s:e] for s, e in spans["brake"]] == ["brake.", "Brake!"]
    assert [text[s:e] for s, e in spans["portal"]] == ["portal]"]  # the whole whitespace word
    phrases = phrase_spans(text)
    assert "via portal" in phrases and "my brake" in phrases
    assert [text[s:e] for s, e in phrases["via portal"]] == ["[via", "portal]"]
    assert not any("--" in p for p in phrases)  # a pure-punctuation word breaks the chain
    assert "portal brake" not in phrases


def _add(tally, word, flips, count, drop=0.1, focus=0.0):
    for i in range(count):
        tally.add_text({word: KnockoutOutcome(flipped=i < flips, drop=drop, focus=focus)})


def test_rare_word_does_not_outrank_frequent_one():
    # docs/definitions.md, "Word knockout": 2 flips in 3 texts (rate 0.67) must not outrank
    # 40 in 90 (rate 0.44); Wilson
    # lower ends 0.208 vs 0.346 (Wilson 1927 by hand for 40 of 90, z = 1.95996: p = 0.44444,
    # z²/n = 0.042684; centre 0.46579 / 1.042684 = 0.44672, half 1.87970 · sqrt(0.0027435 +
    # 0.0001186) = 0.10056; 2 of 3 in test_stats.py)
    tally = KnockoutTally()
    _add(tally, "rare", 2, 3)
    _add(tally, "common", 40, 90)
    ranked = tally.ranking()
    assert [e["token"] for e in ranked] == ["common", "rare"]
    assert ranked[0]["flip_low"] == pytest.approx(0.34616, abs=1e-5)
    assert ranked[1]["flip_low"] == pytest.approx(0.20766, abs=1e-5)
    assert ranked[1]["flip_rate"] == pytest.approx(2 / 3)


def test_words_in_fewer_than_three_texts_are_left_out():
    tally = KnockoutTally()
    _add(tally, "twice", 2, 2)
    _add(tally, "thrice", 0, 3)
    assert [e["token"] for e in tally.ranking()] == ["thrice"]


def test_ties_by_mean_drop_then_word():
    tally = KnockoutTally()
    _add(tally, "b", 1, 4, drop=0.2)
    _add(tally, "a", 1, 4, drop=0.2)
    _add(tally, "c", 1, 4, drop=0.5)
    assert [e["token"] for e in tally.ranking()] == ["c", "a", "b"]


def test_entry_values_and_keys():
    tally = KnockoutTally()
    tally.add_text({"via portal": KnockoutOutcome(True, 0.6, 0.3)})
    tally.add_text({"via portal": KnockoutOutcome(False, 0.2, 0.1)})
    tally.add_text({"via portal": KnockoutOutcome(True, 0.4, 0.2), "": KnockoutOutcome(True, 1, 1)})
    (entry,) = tally.ranking()
    assert set(entry) == {"token", "count", "flip_rate", "flip_low", "mean_drop", "focus"}
    assert entry["token"] == "via portal" and entry["count"] == 3
    assert entry["flip_rate"] == pytest.approx(2 / 3)
    assert entry["mean_drop"] == pytest.approx(0.4)
    assert entry["focus"] == pytest.approx(0.2)
    assert tally.texts == 3 and len(tally) == 1  # the empty key is skipped
    assert tally.to_dict() == {"texts": 3, "tokens": [entry]}


@settings(max_examples=30, deadline=None, database=None)
@given(
    texts=st.lists(
        st.dictionaries(
            st.sampled_from(["a", "b", "c", "d"]),
            st.tuples(st.booleans(), st.floats(-1, 1), st.floats(0, 1)),
            min_size=1,
        ),
        max_size=20,
    ),
    split=st.integers(0, 20),
)
def test_merge_equals_one_pass(texts, split):
    def fill(chunk):
        t = KnockoutTally()
        for d in chunk:
            t.add_text({k: KnockoutOutcome(*v) for k, v in d.items()})
        return t

    merged = fill(texts[:split]).merge(fill(texts[split:]))
    one = fill(texts)
    assert merged.texts == one.texts
    a, b = merged.ranking(min_count=1), one.ranking(min_count=1)
    assert [e["token"] for e in a] == [e["token"] for e in b]
    for x, y in zip(a, b, strict=True):
        assert x["count"] == y["count"]
        for key in ("flip_rate", "flip_low", "mean_drop", "focus"):
            assert x[key] == pytest.approx(y[key], abs=1e-12)


def test_summary_share():
    # by hand: head mean of row 0 is [0.25, 0.5, 0.25]; tokens 1 and 2 get 0.75
    row = np.zeros((2, 3))  # (H, T) the summary token's row in two heads
    row[0] = [0.5, 0.5, 0.0]
    row[1] = [0.0, 0.5, 0.5]
    assert summary_share(row, np.array([1, 2])) == pytest.approx(0.75)
    assert summary_share(row, np.array([], dtype=int)) == 0.0


def test_per_class_breakdown_counts_flips_under_the_originally_predicted_class():
    """Worked example: 'portal' in 3 texts predicted billing (2 flip) and 1 predicted repair
    (no flip): by_class billing 2/3, repair 0/1, membership no texts; the totals are their sums."""
    tally = KnockoutTally(("repair", "billing", "membership"))
    for flipped, predicted in ((True, 1), (True, 1), (False, 1), (False, 0)):
        tally.add_text({"portal": KnockoutOutcome(flipped, 0.1, 0.2, predicted=predicted)})
    e = tally.entry("portal")
    assert e["by_class"] == {
        "repair": {"count": 1, "flips": 0, "flip_rate": 0.0},
        "billing": {"count": 3, "flips": 2, "flip_rate": 2 / 3},
        "membership": {"count": 0, "flips": 0, "flip_rate": None},
    }
    assert e["count"] == 4 and e["flip_rate"] == 0.5
    other = KnockoutTally(("repair", "billing", "membership"))
    other.add_text({"portal": KnockoutOutcome(True, 0.1, 0.2, predicted=2)})
    tally.merge(other)
    assert tally.entry("portal")["by_class"]["membership"] == {"count": 1, "flips": 1, "flip_rate": 1.0}
    with pytest.raises(ValueError):
        tally.merge(KnockoutTally(("repair", "billing")))
    with pytest.raises(ValueError):
        tally.add_text({"portal": KnockoutOutcome(True, 0.1, 0.2, predicted=3)})
