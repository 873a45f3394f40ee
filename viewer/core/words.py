"""Words of a text: the one word splitter and the one "contains" rule.

docs/definitions.md, "Word knockout": a *word* is a whitespace-separated word; its *key* is the
word lower-cased with the punctuation at its ends stripped ("Portal]" -> "portal"); a word that
is all punctuation has the empty key. A word's span covers the whole whitespace word, end
punctuation included, since that is what knocking it out deletes.

A text *contains* a word or phrase (docs/definitions.md, "Contains") when its whitespace words
hold the phrase's keys as consecutive words: "[via portal]" contains "via portal" and "portal",
"via -- portal" contains neither "via portal" nor "-- portal" (a word of empty key is never part
of a phrase). The shortcut search, the insertion test, link pairs, the window's text-set filter
and the card all split and match with these functions.
"""

from __future__ import annotations

import string
import unicodedata
from collections.abc import Sequence
from dataclasses import dataclass

Span = tuple[int, int]

_ASCII_PUNCTUATION = frozenset(string.punctuation)


def _is_punctuation(ch: str) -> bool:
    """ASCII punctuation (string.punctuation) or any Unicode punctuation category P*."""
    return ch in _ASCII_PUNCTUATION or unicodedata.category(ch).startswith("P")


def _key_bounds(word: str) -> Span:
    """Where the key of a whitespace word starts and ends inside it."""
    start, end = 0, len(word)
    while start < end and _is_punctuation(word[start]):
        start += 1
    while end > start and _is_punctuation(word[end - 1]):
        end -= 1
    return start, end


def word_key(word: str) -> str:
    """The key of a whitespace word: lower-cased, punctuation stripped from both ends.

    "Portal]" -> "portal", "co-op's," -> "co-op's", "--" -> "" (skipped). Punctuation is ASCII
    ``string.punctuation`` plus every Unicode punctuation character (categories P*).
    """
    w = word.strip()
    start, end = _key_bounds(w)
    return w[start:end].lower()


@dataclass(frozen=True)
class Word:
    """One whitespace word of a text: its span [start, end) in the text and its key."""

    start: int
    end: int
    key: str  # "" for a word that is all punctuation
    key_start: int  # the characters the key is made of: [key_start, key_end) of the text
    key_end: int

    @property
    def span(self) -> Span:
        return self.start, self.end


def split_words(text: str) -> list[Word]:
    """Every whitespace word of ``text`` in order, empty keys included (they break phrases)."""
    words = []
    pos = 0
    for raw in text.split():
        begin = text.index(raw, pos)
        pos = begin + len(raw)
        a, b = _key_bounds(raw)
        words.append(Word(begin, pos, raw[a:b].lower(), begin + a, begin + b))
    return words


def phrase_keys(phrase: str) -> tuple[str, ...]:
    """The keys of a word or phrase as written ("[via portal]" -> ("via", "portal")); words
    of empty key are dropped, so a phrase of punctuation only has no keys."""
    return tuple(k for k in (word_key(w) for w in phrase.split()) if k)


def occurrences(words: Sequence[Word], keys: Sequence[str]) -> list[tuple[Word, ...]]:
    """Every run of consecutive ``words`` whose keys equal ``keys``, in order (overlapping
    runs included: "a a a" holds "a a" twice)."""
    n = len(keys)
    if n == 0:
        return []
    want = tuple(keys)
    return [
        tuple(words[i : i + n])
        for i in range(len(words) - n + 1)
        if tuple(w.key for w in words[i : i + n]) == want
    ]


def contains(text: str, phrase: str) -> bool:
    """Whether ``text`` contains the word or phrase ``phrase`` (docs/definitions.md, "Contains")."""
    return bool(occurrences(split_words(text), phrase_keys(phrase)))
