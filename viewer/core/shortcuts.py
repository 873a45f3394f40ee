"""Shortcut search by word knockout: word and phrase spans, a per-word tally and the ranking.

docs/definitions.md, "Word knockout": a word is a whitespace-separated word, lower-cased, with
punctuation at its ends stripped (``viewer.core.words``, the one word splitter); a word that is
all punctuation has the empty key and is skipped. The model layer knocks each word of a text
out (deleting all of its sub-tokens: those of the whole whitespace word, its end punctuation
included, so that knocking out the key "portal" of "portal]" removes the "]" too) and reports,
per text and word, whether the predicted class flipped, the ``drop`` in the originally
predicted class's probability, and the ``focus`` (share of the last layer's head-mean
attention from the summary token on the word's sub-tokens,
``viewer.core.summary.summary_share``; per head too). ``KnockoutTally`` sums these per word
over the text set, with each text's flip also counted under the class the model originally
predicted for it (the per-class breakdown); ``KnockoutTally.ranking`` leaves out words seen in
fewer than 3 texts and ranks the rest by ``flip_low``, the lower end of the 95% Wilson interval
of the flip rate (Wilson 1927), then by ``mean_drop``, then by the word itself.

Two-word phrases use the same tally with the key ``"w1 w2"`` (``phrase_spans``): the two words
must be adjacent in the whitespace split and both must have a non-empty key.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from viewer.core.stats import wilson_interval
from viewer.core.words import Span, split_words

MIN_TEXTS: int = 3
"""Words seen in fewer texts than this are left out of the ranking (docs/definitions.md)."""


def word_spans(text: str) -> dict[str, list[Span]]:
    """Every word key of ``text`` with the character spans of all its occurrences.

    A span covers the whole whitespace word, end punctuation included ("portal]"): knocking the
    word out deletes every sub-token of what the text actually holds there.
    Keys are in order of first occurrence; the empty key is skipped.
    """
    out: dict[str, list[Span]] = {}
    for w in split_words(text):
        if w.key:
            out.setdefault(w.key, []).append(w.span)
    return out


def phrase_spans(text: str) -> dict[str, list[Span]]:
    """Every two-word phrase key ``"w1 w2"`` of ``text`` with both words' spans per occurrence.

    A phrase is two adjacent whitespace words whose keys are both non-empty; each occurrence
    contributes its two word spans to the list.
    """
    out: dict[str, list[Span]] = {}
    words = split_words(text)
    for a, b in zip(words, words[1:], strict=False):
        if a.key and b.key:
            out.setdefault(f"{a.key} {b.key}", []).extend([a.span, b.span])
    return out


def json_bytes(value: Any) -> np.ndarray:
    """``value`` as UTF-8 JSON in a uint8 array (a tally state holds only arrays)."""
    return np.frombuffer(json.dumps(value, ensure_ascii=False).encode("utf-8"), np.uint8)


def from_json_bytes(array: np.ndarray) -> Any:
    return json.loads(np.asarray(array, dtype=np.uint8).tobytes().decode("utf-8"))


def rows_state(
    texts: int, labels: Sequence[str], rows: Mapping[str, Sequence[float]]
) -> dict[str, np.ndarray]:
    """The part of a tally's state every per-key tally shares: the texts seen, the keys and
    labels (``json_bytes``), and per key its row of two counts (int64) and two sums (float64)."""
    values = list(rows.values())
    return {
        "texts": np.array(texts, dtype=np.int64),
        "keys": json_bytes(list(rows)),
        "labels": json_bytes(list(labels)),
        "counts": np.array([[r[0], r[1]] for r in values], dtype=np.int64).reshape(-1, 2),
        "sums": np.array([[r[2], r[3]] for r in values], dtype=np.float64).reshape(-1, 2),
    }


@dataclass(frozen=True)
class KnockoutOutcome:
    """What knocking one word out of one text did."""

    flipped: bool  # the predicted class changed
    drop: float  # probability of the originally predicted class, before minus after
    focus: float  # summary-token attention share on the word's sub-tokens (last layer, head mean)
    head_focus: Sequence[float] = ()  # the same share in each head of the last layer
    predicted: int = -1  # the originally predicted class (-1: not a classifier)


class KnockoutTally:
    """Streaming, mergeable per-word sums: texts seen, flips, sum of drop, sum of focus; with
    ``heads`` > 0 the sum of each last-layer head's focus, and with ``labels`` the texts and
    flips per originally predicted class (the per-class breakdown).

    Memory grows with the number of distinct words (or phrases) times (heads + classes), not
    with the number of texts.
    """

    __slots__ = ("texts", "labels", "heads", "_sums", "_heads", "_classes")

    def __init__(self, labels: Sequence[str] = (), heads: int = 0) -> None:
        self.texts = 0
        self.labels = tuple(labels)
        self.heads = int(heads)
        self._sums: dict[str, list[float]] = {}  # key -> [count, flips, sum_drop, sum_focus]
        self._heads: dict[str, np.ndarray] = {}  # key -> (heads,) sum of per-head focus
        self._classes: dict[str, np.ndarray] = {}  # key -> (classes, 2) texts, flips

    def _slot(self, key: str) -> list[float]:
        s = self._sums.get(key)
        if s is None:
            s = self._sums[key] = [0, 0, 0.0, 0.0]
            if self.heads:
                self._heads[key] = np.zeros(self.heads, dtype=np.float64)
            if self.labels:
                self._classes[key] = np.zeros((len(self.labels), 2), dtype=np.int64)
        return s

    def add_text(self, outcomes: Mapping[str, KnockoutOutcome]) -> None:
        """Add one text: one outcome per distinct word (or phrase) key of that text."""
        self.texts += 1
        for key, o in outcomes.items():
            if not key:
                continue
            s = self._slot(key)
            s[0] += 1
            s[1] += int(bool(o.flipped))
            s[2] += float(o.drop)
            s[3] += float(o.focus)
            if self.heads:
                if len(o.head_focus) != self.heads:
                    raise ValueError(
                        f"{len(o.head_focus)} head focus values for a tally of {self.heads} heads"
                    )
                self._heads[key] += np.asarray(o.head_focus, dtype=np.float64)
            if self.labels:
                if not 0 <= o.predicted < len(self.labels):
                    raise ValueError(
                        f"predicted class {o.predicted} is not one of {len(self.labels)} classes"
                    )
                self._classes[key][o.predicted] += (1, int(bool(o.flipped)))

    def merge(self, other: KnockoutTally) -> KnockoutTally:
        """Fold ``other`` into this tally (in place) and return self."""
        if (other.labels, other.heads) != (self.labels, self.heads):
            raise ValueError("cannot merge knockout tallies of different classes or heads")
        self.texts += other.texts
        for key, o in other._sums.items():
            s = self._slot(key)
            for i in range(4):
                s[i] += o[i]
            if self.heads:
                self._heads[key] += other._heads[key]
            if self.labels:
                self._classes[key] += other._classes[key]
        return self

    def state(self) -> dict[str, np.ndarray]:
        """The tally as plain arrays: keys and labels as UTF-8 JSON bytes, (count, flips) as
        int64, (sum of drop, sum of focus) and the per-head focus sums as float64, the per-class
        (texts, flips) as int64; ``from_state`` restores it exactly, key order included."""
        keys = list(self._sums)
        return {
            **rows_state(self.texts, self.labels, self._sums),
            "head_focus": np.array(
                [self._heads[k] for k in keys] if self.heads else [], dtype=np.float64
            ).reshape(len(keys), self.heads),
            "classes": np.array(
                [self._classes[k] for k in keys] if self.labels else [], dtype=np.int64
            ).reshape(len(keys), len(self.labels), 2),
        }

    @classmethod
    def from_state(cls, state: Mapping[str, np.ndarray]) -> KnockoutTally:
        keys = from_json_bytes(state["keys"])
        counts, sums = np.asarray(state["counts"]), np.asarray(state["sums"])
        heads, classes = np.asarray(state["head_focus"]), np.asarray(state["classes"])
        if not len(keys) == len(counts) == len(sums) == len(heads) == len(classes):
            raise ValueError(f"not a knockout-tally state: {len(keys)} keys, {len(counts)} counts")
        tally = cls(from_json_bytes(state["labels"]), heads.shape[1])
        tally.texts = int(state["texts"])
        for n, (key, (count, flips), (drop, focus)) in enumerate(
            zip(keys, counts.tolist(), sums.tolist(), strict=True)
        ):
            tally._sums[key] = [count, flips, drop, focus]
            if tally.heads:
                tally._heads[key] = heads[n].astype(np.float64, copy=True)
            if tally.labels:
                tally._classes[key] = classes[n].astype(np.int64, copy=True)
        return tally

    def __len__(self) -> int:
        return len(self._sums)

    def keys(self) -> Iterable[str]:
        return self._sums.keys()

    def knockouts(self) -> int:
        """The knockouts behind the tally: one per (text, key)."""
        return int(sum(s[0] for s in self._sums.values()))

    def head_focus(self, key: str) -> np.ndarray:
        """Mean focus of ``key`` in each head of the last layer, (heads,)."""
        if not self.heads:
            raise ValueError("this tally keeps no per-head focus")
        return self._heads[key] / self._sums[key][0]

    def by_class(self, key: str) -> np.ndarray:
        """The per-class breakdown of ``key``: (classes, 2) int64, per originally predicted
        class the texts holding the key and how many of them flip (zeros for an unseen key)."""
        if not self.labels:
            raise ValueError("this tally keeps no per-class breakdown")
        if key not in self._classes:
            return np.zeros((len(self.labels), 2), dtype=np.int64)
        return self._classes[key].copy()

    def entry(self, key: str) -> dict[str, Any]:
        """``{token, count, flip_rate, flip_low, mean_drop, focus}`` for one key, with
        ``head_focus`` (per last-layer head) and ``by_class`` ({class: {count, flips,
        flip_rate}} over the texts originally predicted as that class) when kept."""
        count, flips, drop, focus = self._sums[key]
        count, flips = int(count), int(flips)
        out: dict[str, Any] = {
            "token": key,
            "count": count,
            "flip_rate": flips / count,
            "flip_low": wilson_interval(flips, count)[0],
            "mean_drop": drop / count,
            "focus": focus / count,
        }
        if self.heads:
            out["head_focus"] = self.head_focus(key).tolist()
        if self.labels:
            out["by_class"] = {
                label: {"count": int(n), "flips": int(f), "flip_rate": f / n if n else None}
                for label, (n, f) in zip(self.labels, self._classes[key].tolist(), strict=True)
            }
        return out

    def ranking(self, min_count: int = MIN_TEXTS, limit: int | None = None) -> list[dict[str, Any]]:
        """Words seen in at least ``min_count`` texts, strongest shortcut first.

        Sorted by flip_low (lower end of the 95% Wilson score interval of flips / count,
        Wilson 1927) descending, then mean_drop descending, then the word ascending.
        """
        entries = [self.entry(k) for k, s in self._sums.items() if s[0] >= min_count]
        entries.sort(key=lambda e: (-e["flip_low"], -e["mean_drop"], e["token"]))
        return entries if limit is None else entries[:limit]

    def to_dict(self, min_count: int = MIN_TEXTS) -> dict[str, Any]:
        """JSON-ready: ``texts`` and ``tokens`` (the ranking, strongest first)."""
        return {"texts": self.texts, "tokens": self.ranking(min_count)}
