"""Set accuracy with a suspected cue removed and with it inserted (docs/definitions.md, "Cue
accuracy"), beside the accuracy as given.

The shortcut search says a word or phrase moves predictions; these two numbers say what it does to
the accuracy a model card reports. Each labelled text is predicted three times:

- *given*: as it is;
- *removed*: a text that contains the cue (docs/definitions.md, "Contains") with every occurrence
  knocked out — all of its sub-tokens deleted from the input, as the shortcut search does
  ("Word knockout"); a text without it as given;
- *inserted*: a text that does not contain the cue with it appended at the end, as the
  insertion test's end position writes it (separated by one space); a text with it as given.

The partial is a (3, C, C) count of (variant, label, prediction), a sum over texts, so shards
merge in any order and the numbers do not depend on workers (``viewer.reports.shards``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass
from typing import ClassVar

import numpy as np

from viewer.core.links import word_token_indices
from viewer.core.words import occurrences, phrase_keys, split_words
from viewer.model.attribution import predict_without
from viewer.model.loader import LoadedModel
from viewer.model.runs import attentions
from viewer.reports.heads import label_index
from viewer.reports.predictions import accuracy_data
from viewer.reports.shards import Shard, State

VARIANTS = ("given", "removed", "inserted")


@dataclass
class CueCounts:
    """(3, C, C) texts by (variant of ``VARIANTS``, label, prediction); ``with_cue`` counts the
    texts that contain the cue."""

    counts: np.ndarray
    with_cue: int = 0

    @classmethod
    def empty(cls, classes: int) -> CueCounts:
        return cls(np.zeros((len(VARIANTS), classes, classes), np.int64))

    def merge(self, other: CueCounts) -> CueCounts:
        return CueCounts(self.counts + other.counts, self.with_cue + other.with_cue)

    def state(self) -> State:
        return {"counts": self.counts, "with_cue": np.array([self.with_cue], np.int64)}

    @classmethod
    def from_state(cls, state: State) -> CueCounts:
        return cls(np.asarray(state["counts"], np.int64), int(np.asarray(state["with_cue"])[0]))

    def accuracy(self, labels: Sequence[str], variant: str) -> dict:
        """``accuracy_data`` of one variant (overall, per class, confusion matrix)."""
        m = self.counts[VARIANTS.index(variant)]  # (C, C)
        gold = np.repeat(np.arange(len(labels)), m.sum(axis=1))
        predicted = np.concatenate([np.repeat(np.arange(len(labels)), row) for row in m] or [gold[:0]])
        return accuracy_data(labels, gold.tolist(), predicted.tolist())


def strongest_candidate(shortcuts: dict) -> dict | None:
    """The top word or the top two-word phrase, whichever ranks higher (flip low, then mean
    drop; the word on a tie); None when knocking out neither flips anything."""
    candidates = [
        rows[0]
        for rows in (shortcuts["tokens"], shortcuts.get("phrases") or [])
        if rows and rows[0]["flip_rate"] > 0
    ]
    return max(candidates, key=lambda r: (r["flip_low"], r["mean_drop"]), default=None)


def cue_shard(
    loaded: LoadedModel, texts: Sequence[str], gold: Sequence[int], cue: str, batch_size: int = 16
) -> CueCounts:
    """The three predictions of every text of one shard, counted."""
    keys = phrase_keys(cue)
    out = CueCounts.empty(len(loaded.labels))
    removals = []  # (text index, case)
    given = np.zeros(len(texts), np.int64)
    for k, att in enumerate(attentions(loaded, list(texts), batch_size, attention=False)):
        given[k] = int(np.argmax(att.target))
        runs = occurrences(split_words(att.text), keys)
        if runs:
            idx = np.unique(
                np.concatenate([word_token_indices(w.span, att.offsets) for run in runs for w in run])
            )
            idx = idx[~att.special[idx]]
            removals.append((k, (att.token_ids, idx)))
    removed, inserted = given.copy(), given.copy()
    if removals:
        p = predict_without(loaded, [case for _, case in removals], batch_size)  # (R, C)
        removed[[k for k, _ in removals]] = p.argmax(axis=1)
    having = {k for k, _ in removals}
    insertions = [k for k in range(len(texts)) if k not in having]
    for start in range(0, len(insertions), batch_size):
        part = insertions[start : start + batch_size]
        p = loaded.predict(loaded.encode([texts[k].strip() + " " + cue for k in part]))  # (B, C)
        inserted[part] = p.argmax(axis=1)
    for v, pred in enumerate((given, removed, inserted)):
        np.add.at(out.counts[v], (np.asarray(gold, np.int64), pred), 1)
    out.with_cue = len(removals)
    return out


@dataclass(frozen=True)
class CueAccuracyKind:
    """Cue accuracy over shards (a ``ShardKind``); the partial is a ``CueCounts``. The set must
    be labelled with the model's classes (``viewer.reports.predictions.set_labels``)."""

    name: ClassVar[str] = "cue-accuracy"
    cue: str
    batch_size: int = 16

    def options(self) -> dict:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> CueCounts:
        check()
        gold = [label_index(loaded, item) for item in shard.items]  # one-line error naming the line
        return cue_shard(loaded, [i.text for i in shard.items], gold, self.cue, self.batch_size)

    def state(self, partial: CueCounts) -> State:
        return partial.state()

    def load(self, state: State) -> CueCounts:
        return CueCounts.from_state(state)


def cue_accuracy_data(labels: Sequence[str], cue: str, counts: CueCounts) -> dict:
    """The JSON part: the cue as inserted, the texts holding it, and each variant's accuracy."""
    return {
        "cue": cue,
        "texts_with_cue": counts.with_cue,
        **{variant: counts.accuracy(labels, variant) for variant in VARIANTS},
    }


def cue_line(data: dict) -> str:
    """One line: the accuracy as given, with the cue removed, with it inserted."""
    g, r, i = (data[v] for v in VARIANTS)
    return (
        f"accuracy {g['accuracy']:.3f} as given ({g['correct']} of {g['labelled']}); "
        f"with “{data['cue']}” removed from the {data['texts_with_cue']} texts holding it "
        f"{r['accuracy']:.3f}; with it inserted into the other "
        f"{g['labelled'] - data['texts_with_cue']} {i['accuracy']:.3f}"
    )
