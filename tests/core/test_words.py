"""The word splitter and the "contains" rule (viewer.core.words).

References: docs/definitions.md, "Word knockout" and "Contains", worked by hand below; and a
plain second implementation of "contains" written here (keys joined into one string, searched
as a substring), checked against the module on generated texts.
"""

from hypothesis import given, settings
from hypothesis import strategies as st

from viewer.core.words import contains, occurrences, phrase_keys, split_words, word_key


def test_split_words_by_hand():
    text = "  Fix my Bike [via portal]!  -- ok"
    words = split_words(text)
    # whitespace words at 2-5, 6-8, 9-13, 14-18, 19-27, 29-31, 32-34 (counted by hand)
    assert [(w.start, w.end) for w in words] == [
        (2, 5),
        (6, 8),
        (9, 13),
        (14, 18),
        (19, 27),
        (29, 31),
        (32, 34),
    ]
    assert [w.key for w in words] == ["fix", "my", "bike", "via", "portal", "", "ok"]
    portal = words[4]
    assert (
        text[portal.start : portal.end] == "portal]!" and text[portal.key_start : portal.key_end] == "portal"
    )
    assert split_words("") == [] and split_words(" \n\t ") == []


def test_word_key_and_phrase_keys():
    assert word_key("«Brake»,") == "brake" and word_key("—") == ""
    assert phrase_keys("[via portal]") == ("via", "portal")
    assert phrase_keys("-- !!") == ()


def test_contains_follows_the_definition():
    # docs/definitions.md, "Contains": the examples written there
    text = "Repair [via portal]"
    for phrase in ("portal", "via portal", "[via portal]", "VIA Portal"):
        assert contains(text, phrase), phrase
    assert not contains("via -- portal", "via portal")
    assert not contains("via -- portal", "--")
    assert not contains("the portals", "portal")  # whole words only
    assert not contains("portal via", "via portal")  # in order


def test_overlapping_occurrences_are_all_found():
    words = split_words("a a a")
    runs = occurrences(words, ("a", "a"))
    assert [(r[0].start, r[1].end) for r in runs] == [(0, 3), (2, 5)]
    assert occurrences(words, ()) == []


def _plain_contains(text: str, phrase: str) -> bool:
    """A second implementation: every whitespace word becomes its key (or a marker that matches
    nothing), the keys are joined with single spaces, and the phrase's keys are searched as a
    whole-word substring."""
    strip = "!\"#$%&'()*+,-./:;<=>?@[\\]^_`{|}~«»—"
    keys = [w.strip(strip).lower() or "\x00" for w in text.split()]
    want = [w.strip(strip).lower() for w in phrase.split()]
    want = [w for w in want if w]
    if not want:
        return False
    return f" {' '.join(want)} " in f" {' '.join(keys)} "


WORDS = st.sampled_from(["via", "Portal]", "[via", "portal", "--", "bike", "«Bike»", "a", "A,"])


@settings(max_examples=300, deadline=None)
@given(
    st.lists(WORDS, max_size=8), st.lists(WORDS, min_size=1, max_size=3), st.sampled_from([" ", "  ", "\t"])
)
def test_contains_equals_a_plain_second_implementation(text_words, phrase_words, sep):
    text, phrase = sep.join(text_words), " ".join(phrase_words)
    assert contains(text, phrase) == _plain_contains(text, phrase)
