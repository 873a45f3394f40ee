"""The insertion test: does a suspect word or phrase alone move texts into its class?

Knockout shows that a prediction *depends* on a word; insertion asks whether the word is
*sufficient*: it is inserted into every text of a set whose prediction is not the class C the
word points to, and the texts whose prediction becomes C are counted (docs/definitions.md,
"Insertion test"). Three insertion points are tried, each on its own copy of the text:

- ``start``: before the first word;
- ``end``: after the last word;
- ``random``: at a word boundary drawn for that text by a generator seeded with the run's seed
  and the text's index in the set, so the same text gets the same boundary however the set is
  cut into shards.

Per position, ``InsertionTally`` keeps the texts tried, the flips into C (with the 95% Wilson
score interval of their rate, Wilson 1927), the summed gain in p(C), and the indices of the
texts that flipped. Tallies of different shards merge into the tally of the whole set.
"""

from __future__ import annotations

import random
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from viewer.core.stats import wilson_interval
from viewer.core.words import split_words

POSITIONS: tuple[str, ...] = ("start", "end", "random")
POSITION_NAMES: dict[str, str] = {
    "start": "at the start",
    "end": "at the end",
    "random": "at a random word boundary",
}


def word_boundaries(text: str) -> list[int]:
    """Character positions between the whitespace words of a stripped text, ends included.

    For "a bc d" these are [0, 1, 4, 6] (before "a", after "a", after "bc", after "d").
    """
    return [0, *(w.end for w in split_words(text))]


def random_boundary(text: str, seed: int, index: int) -> int:
    """The boundary the ``random`` position uses for text number ``index`` of a set."""
    points = word_boundaries(text)
    rng = random.Random(f"{int(seed)}:{int(index)}")  # a str seed hashes deterministically
    return points[rng.randrange(len(points))]


def insert_at(text: str, phrase: str, position: str, *, seed: int = 0, index: int = 0) -> str:
    """``text`` with ``phrase`` inserted at ``position`` (one of ``POSITIONS``), with single
    spaces around it and the text's own spacing kept elsewhere."""
    phrase = " ".join(phrase.split())
    if not phrase:
        raise ValueError("nothing to insert")
    body = text.strip()
    if position == "start":
        return f"{phrase} {body}" if body else phrase
    if position == "end":
        return f"{body} {phrase}" if body else phrase
    if position != "random":
        raise ValueError(f"unknown insertion position {position!r}; use one of {POSITIONS}")
    at = random_boundary(body, seed, index)
    before, after = body[:at].rstrip(), body[at:].lstrip()
    return " ".join(part for part in (before, phrase, after) if part)


@dataclass
class PositionTally:
    tried: int = 0
    flips: int = 0
    gain: float = 0.0  # Σ p(C | with insertion) − p(C | text)
    flipped: list[int] = field(default_factory=list)  # text indices in the set, ascending

    def merge(self, other: PositionTally) -> None:
        self.tried += other.tried
        self.flips += other.flips
        self.gain += other.gain
        self.flipped = sorted(self.flipped + other.flipped)


class InsertionTally:
    """Streaming, mergeable tally of one insertion test, per position."""

    def __init__(self, positions: Iterable[str] = POSITIONS) -> None:
        self.positions = {p: PositionTally() for p in positions}
        self.texts = 0  # texts of the set seen (tried or not)
        self.skipped = 0  # texts already predicted as the target class (not tried)

    def add(self, position: str, index: int, flipped: bool, gain: float) -> None:
        t = self.positions[position]
        t.tried += 1
        if flipped:
            t.flips += 1
            t.flipped.append(int(index))
        t.gain += float(gain)

    def merge(self, other: InsertionTally) -> InsertionTally:
        if set(other.positions) != set(self.positions):
            raise ValueError("cannot merge insertion tallies of different positions")
        for name, t in other.positions.items():
            self.positions[name].merge(t)
        self.texts += other.texts
        self.skipped += other.skipped
        return self

    def entry(self, position: str) -> dict[str, Any]:
        """``{position, tried, flips, flip_rate, flip_low, flip_high, mean_gain, flipped}``."""
        t = self.positions[position]
        low, high = wilson_interval(t.flips, t.tried)
        return {
            "position": position,
            "tried": t.tried,
            "flips": t.flips,
            "flip_rate": t.flips / t.tried if t.tried else None,
            "flip_low": low if t.tried else None,
            "flip_high": high if t.tried else None,
            "mean_gain": t.gain / t.tried if t.tried else None,
            "flipped": list(t.flipped),
        }

    def state(self) -> dict[str, np.ndarray]:
        """The tally as plain arrays (positions as UTF-8 bytes, one row of (tried, flips) and one
        gain per position, the flipped indices with their position); ``from_state`` restores it
        exactly."""
        names = list(self.positions)
        tallies = list(self.positions.values())
        return {
            "positions": np.frombuffer("\n".join(names).encode("utf-8"), np.uint8),
            "texts": np.array([self.texts, self.skipped], dtype=np.int64),
            "counts": np.array([[t.tried, t.flips] for t in tallies], np.int64).reshape(-1, 2),
            "gain": np.array([t.gain for t in tallies], dtype=np.float64),
            "flipped": np.array(
                [[k, i] for k, t in enumerate(tallies) for i in t.flipped], dtype=np.int64
            ).reshape(-1, 2),
        }

    @classmethod
    def from_state(cls, state: dict[str, np.ndarray]) -> InsertionTally:
        names = np.asarray(state["positions"], np.uint8).tobytes().decode("utf-8").split("\n")
        tally = cls(names)
        tally.texts, tally.skipped = (int(v) for v in state["texts"])
        tallies = list(tally.positions.values())
        for t, (tried, flips), gain in zip(
            tallies, np.asarray(state["counts"]).tolist(), np.asarray(state["gain"]).tolist(), strict=True
        ):
            t.tried, t.flips, t.gain = tried, flips, gain
        for k, index in np.asarray(state["flipped"]).tolist():
            tallies[k].flipped.append(index)
        return tally

    def to_dict(self) -> dict[str, Any]:
        return {
            "texts": self.texts,
            "skipped": self.skipped,
            "positions": [self.entry(p) for p in self.positions],
        }
