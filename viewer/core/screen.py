"""The shortcut search's screen: cheap per-word scores over a text set, and the candidate rule.

docs/definitions.md, "Screen and confirmation". One pass per text (one forward, one backward)
scores every word and two-word phrase of the text without knocking anything out:

- **gradient reach**: gradient × input (Baehrens et al. 2010; Shrikumar et al. 2017) of the
  log-odds of the predicted class, summed over the key's sub-tokens, is the first-order
  estimate of how much knocking the key out lowers that log-odds (a flip needs it to fall to
  about 0). The key *reaches* a text when the estimate is at least ``REACH`` times the text's
  log-odds; over the set, ``reach_low`` is the lower end of the 95% Wilson interval of the
  share of its texts it reaches (Wilson 1927): the knockout ranking's own statistic, with the
  estimated flip in place of the flip;
- **association** of holding the key with the predicted class, and with the gold label where
  the set has labels: Fisher's exact test, one-sided (Fisher 1922; ``scipy.stats.fisher_exact``
  with ``alternative="greater"``, computed as the hypergeometric tail
  ``scipy.stats.hypergeom.sf``), on the 2×2 table key held / not held × class c / not c, the
  smallest p over the classes times their number (Bonferroni over classes), then the
  Benjamini–Hochberg adjustment over the keys (Benjamini & Hochberg 1995;
  ``scipy.stats.false_discovery_control``);
- **focus**: the summary token's attention share on the key (the knockout search's ``focus``).

``ScreenTally`` sums these per key, mergeable like ``KnockoutTally``; ``candidates`` applies the
rule that picks what the knockout confirmation runs for.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from viewer.core.shortcuts import MIN_TEXTS, from_json_bytes, rows_state
from viewer.core.stats import wilson_interval

REACH = 0.1
"""A key *reaches* a text when its gradient × input is at least this share of the text's
log-odds of the predicted class (measured on the demo set: 28 of the 36 (text, word) pairs that
reach it flip when knocked out, against 61 flips in 1,935 pairs)."""

WORDS = 64
PHRASES = 32
"""At most this many words and two-word phrases are confirmed by knockout."""

SHARE = 1 / 16
"""The confirmation runs at most this share of the knockouts an exhaustive search would run
(two thirds of it for words, one third for phrases; all of it for words when there are none)"""

LEAST = 256
"""... and never fewer knockouts than this: a small set is confirmed whole (a demo-sized set of
120 texts would get 240 from the share alone)."""

LEVEL = 0.05
"""Benjamini–Hochberg false-discovery level at which an association counts as significant."""


@dataclass(frozen=True)
class ScreenScore:
    """What the screen says about one key in one text."""

    grad_input: float  # gradient × input toward the predicted class, summed over its sub-tokens
    focus: float  # summary-token attention share on its sub-tokens (last layer, head mean)


def log_odds(probabilities: np.ndarray, c: int) -> float:
    """log p_c / (1 − p_c) of class ``c`` of a (C,) distribution, 1 − p_c summed from the
    other classes (no cancellation near p_c = 1); +inf when they are all 0."""
    p = np.asarray(probabilities, dtype=np.float64)
    rest = float(np.delete(p, c).sum())
    return math.inf if rest <= 0 else math.log(float(p[c])) - math.log(rest)


def reaching(scores: Mapping[str, ScreenScore], margin: float, reach: float = REACH) -> set[str]:
    """The keys of one text whose gradient × input is positive and at least ``reach`` times the
    text's log-odds ``margin``."""
    return {k for k, s in scores.items() if s.grad_input > 0 and s.grad_input >= reach * margin}


class ScreenTally:
    """Streaming, mergeable per-key sums of the screen over a text set: texts holding the key,
    texts it reaches, sum of gradient × input, sum of focus, and per class the texts holding it
    that were predicted as (``predicted``) or labelled (``gold``) that class; with the set's
    texts per predicted class and per label. Memory grows with the keys, not the texts."""

    __slots__ = ("texts", "labels", "_rows", "_predicted", "_gold", "totals")

    def __init__(self, labels: Sequence[str] = ()) -> None:
        self.texts = 0
        self.labels = tuple(labels)
        c = len(self.labels)
        self._rows: dict[str, list[float]] = {}  # key -> [count, reaches, sum grad×input, sum focus]
        self._predicted: dict[str, np.ndarray] = {}  # key -> (C,) texts predicted as each class
        self._gold: dict[str, np.ndarray] = {}  # key -> (C,) texts labelled as each class
        self.totals = np.zeros((2, c), dtype=np.int64)  # texts per predicted class, per label

    def _slot(self, key: str) -> list[float]:
        row = self._rows.get(key)
        if row is None:
            row = self._rows[key] = [0, 0, 0.0, 0.0]
            self._predicted[key] = np.zeros(len(self.labels), dtype=np.int64)
            self._gold[key] = np.zeros(len(self.labels), dtype=np.int64)
        return row

    def add_text(
        self, scores: Mapping[str, ScreenScore], margin: float, predicted: int = -1, gold: int = -1
    ) -> None:
        """Add one text: one score per distinct key of the text; ``margin`` the text's log-odds
        of its predicted class (``log_odds``); ``predicted`` and ``gold`` the class indices
        (-1: none, e.g. no label or not a classifier)."""
        self.texts += 1
        c = len(self.labels)
        if 0 <= predicted < c:
            self.totals[0, predicted] += 1
        if 0 <= gold < c:
            self.totals[1, gold] += 1
        led = reaching(scores, margin)
        for key, s in scores.items():
            row = self._slot(key)
            row[0] += 1
            row[1] += int(key in led)
            row[2] += float(s.grad_input)
            row[3] += float(s.focus)
            if 0 <= predicted < c:
                self._predicted[key][predicted] += 1
            if 0 <= gold < c:
                self._gold[key][gold] += 1

    def merge(self, other: ScreenTally) -> ScreenTally:
        if other.labels != self.labels:
            raise ValueError("cannot merge screen tallies of different classes")
        self.texts += other.texts
        self.totals += other.totals
        for key, o in other._rows.items():
            row = self._slot(key)
            for i in range(4):
                row[i] += o[i]
            self._predicted[key] += other._predicted[key]
            self._gold[key] += other._gold[key]
        return self

    def state(self) -> dict[str, np.ndarray]:
        keys = list(self._rows)
        c = len(self.labels)
        return {
            **rows_state(self.texts, self.labels, self._rows),
            "predicted": np.array([self._predicted[k] for k in keys], dtype=np.int64).reshape(len(keys), c),
            "gold": np.array([self._gold[k] for k in keys], dtype=np.int64).reshape(len(keys), c),
            "totals": self.totals.copy(),
        }

    @classmethod
    def from_state(cls, state: Mapping[str, np.ndarray]) -> ScreenTally:
        keys = from_json_bytes(state["keys"])
        tally = cls(from_json_bytes(state["labels"]))
        tally.texts = int(state["texts"])
        tally.totals = np.asarray(state["totals"], dtype=np.int64).reshape(2, len(tally.labels)).copy()
        counts, sums = np.asarray(state["counts"]), np.asarray(state["sums"])
        predicted, gold = np.asarray(state["predicted"]), np.asarray(state["gold"])
        if not len(keys) == len(counts) == len(sums) == len(predicted) == len(gold):
            raise ValueError(f"not a screen-tally state: {len(keys)} keys, {len(counts)} counts")
        for n, key in enumerate(keys):
            tally._rows[key] = [int(counts[n, 0]), int(counts[n, 1]), float(sums[n, 0]), float(sums[n, 1])]
            tally._predicted[key] = predicted[n].astype(np.int64, copy=True)
            tally._gold[key] = gold[n].astype(np.int64, copy=True)
        return tally

    def __len__(self) -> int:
        return len(self._rows)

    def count(self, key: str) -> int:
        return int(self._rows[key][0])

    def knockouts(self) -> int:
        """The knockouts an exhaustive search runs for these keys: one per (text, key)."""
        return int(sum(r[0] for r in self._rows.values()))

    def eligible(self, min_count: int = MIN_TEXTS) -> list[str]:
        """Keys seen in at least ``min_count`` texts (the only ones a ranking can hold)."""
        return [k for k, r in self._rows.items() if r[0] >= min_count]

    def association(self, keys: Sequence[str], which: str = "predicted") -> np.ndarray:
        """(len(keys),) Benjamini–Hochberg adjusted p-values (q) of the association of holding
        each key with the predicted class (``which="predicted"``) or the gold label ("gold").

        Per key and class c, Fisher's exact test, one-sided (more texts of class c hold the key
        than chance would give): with N texts (labelled texts for "gold"), K of class c, n
        holding the key and a of those of class c, p = P(X ≥ a) for X hypergeometric(N, K, n)
        (Fisher 1922), the p-value of ``scipy.stats.fisher_exact([[a, n − a], [K − a,
        N − K − n + a]], alternative="greater")``. A key's p is the smallest over the classes
        times the number of classes (Bonferroni), at most 1; the q-values are
        ``scipy.stats.false_discovery_control`` of those p (Benjamini & Hochberg 1995). All ones
        when there are no classes or no such texts."""
        row = 0 if which == "predicted" else 1
        per_class = self._predicted if which == "predicted" else self._gold
        totals = self.totals[row]  # (C,)
        big_n = int(totals.sum())
        if not keys or not len(self.labels) or big_n == 0:
            return np.ones(len(keys))
        from scipy.stats import false_discovery_control, hypergeom

        a = np.array([per_class[k] for k in keys], dtype=np.int64)  # (K, C)
        n = a.sum(axis=1, keepdims=True)  # (K, 1) texts holding the key (with a class)
        p = hypergeom.sf(a - 1, big_n, totals[None, :], n)  # (K, C) P(X >= a)
        p = np.where(n > 0, p, 1.0)
        best = np.minimum(1.0, p.min(axis=1) * len(self.labels))
        return np.asarray(false_discovery_control(best), dtype=np.float64)

    def rows(self, keys: Sequence[str]) -> dict[str, dict[str, Any]]:
        """Each key's screen numbers: count, reaches, reach_low, mean gradient × input, focus."""
        out = {}
        for k in keys:
            count, leads, gxi, focus = self._rows[k]
            out[k] = {
                "count": int(count),
                "reaches": int(leads),
                "reach_low": wilson_interval(int(leads), int(count))[0],
                "grad_input": gxi / count,
                "focus": focus / count,
            }
        return out

    def rankings(self, min_count: int = MIN_TEXTS, level: float = LEVEL) -> dict[str, list[str]]:
        """The eligible keys in each screen's order, strongest first: ``gradient`` (reach_low,
        then mean gradient × input), ``predicted`` and ``gold`` (only the keys whose
        association is significant at false-discovery ``level``, by q-value) and ``focus``
        (mean focus); ties by the key."""
        keys = sorted(self.eligible(min_count))
        rows = self.rows(keys)
        out = {
            "gradient": sorted(keys, key=lambda k: (-rows[k]["reach_low"], -rows[k]["grad_input"], k)),
        }
        for which in ("predicted", "gold"):
            q = self.association(keys, which)
            out[which] = [k for qk, k in sorted(zip(q.tolist(), keys, strict=True)) if qk < level]
        out["focus"] = sorted(keys, key=lambda k: (-rows[k]["focus"], k))
        return out


def candidates(tally: ScreenTally, most: int, budget: float, min_count: int = MIN_TEXTS) -> list[str]:
    """The candidate rule (docs/definitions.md, "Screen and confirmation"): first, in the
    gradient ranking's order, every key that reaches at least one text; then the rankings of
    association with the prediction, association with the label, focus and the rest of the
    gradient ranking in turn, one key from each. Keys already taken are skipped, and so are
    keys whose knockouts (one per text holding them) would take the total above ``budget``;
    at most ``most`` keys in all, returned in the order taken."""
    ranked = tally.rankings(min_count)
    rows = tally.rows(ranked["gradient"])
    reached = [k for k in ranked["gradient"] if rows[k]["reaches"] > 0]
    taken: list[str] = []
    seen: set[str] = set()
    spent = 0

    def take(key: str) -> bool:
        nonlocal spent
        if key in seen or len(taken) >= most:
            return False
        seen.add(key)
        cost = tally.count(key)
        if spent + cost > budget:
            return False
        taken.append(key)
        spent += cost
        return True

    for key in reached:
        take(key)
    lists = [ranked["predicted"], ranked["gold"], ranked["focus"], ranked["gradient"]]
    place = [0] * len(lists)
    while len(taken) < most and any(p < len(r) for p, r in zip(place, lists, strict=True)):
        for n, ranking in enumerate(lists):
            while place[n] < len(ranking):
                place[n] += 1
                if take(ranking[place[n] - 1]):
                    break
    return taken


def budget(words: ScreenTally, phrases: ScreenTally, share: float = SHARE) -> float:
    """The confirmation's knockouts at most: ``share`` of an exhaustive search's (one per text
    and key of ``words`` and ``phrases``), at least ``LEAST``."""
    return max(share * (words.knockouts() + phrases.knockouts()), LEAST)
