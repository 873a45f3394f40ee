"""The insertion test over a text set (docs/definitions.md, "Insertion test").

``insertion_test(loaded, items, phrase)`` inserts ``phrase`` at the start, at the end and at a
seeded random word boundary of every text whose prediction is not the class the phrase points
to, and counts the texts whose prediction becomes that class (``viewer.core.insertion``).

The class a phrase points to is given (``target``), or found by knockout: among the texts that
contain the phrase, the originally predicted class that knocking the phrase out most often
flips away from (``pointed_class``). For the demo's footer that is ``billing``: without
"[via portal]" the portal messages stop being billing.

Both passes are report kinds of the shard engine (``PointedKind``, ``InsertionKind``), so they
run on workers or a cluster and resume from a run folder like every set report.
``insertion_shard`` is the map step over one shard (indices are positions in the whole set, so
the random boundary of a text does not depend on the shard); shards' tallies merge in order.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass
from typing import Any, ClassVar

import numpy as np

from viewer.core.insertion import POSITIONS, InsertionTally, insert_at
from viewer.core.shortcuts import word_key
from viewer.errors import HeadlightError
from viewer.model.attribution import predict_without
from viewer.model.loader import LoadedModel
from viewer.model.runs import attentions
from viewer.reports.shards import SERIAL, RunOptions, Shard, State, run_report
from viewer.reports.shortcuts import knockout_tokens
from viewer.reports.textsets import TextItem, TextSource, chunks


def _require_classifier(loaded: LoadedModel) -> None:
    if loaded.head_kind != "classifier":
        raise HeadlightError(
            f"the insertion test counts texts flipping into a class; {loaded.name} has a "
            f"{loaded.head_kind} head, not a sequence classifier"
        )


def phrase_keys(phrase: str) -> tuple[str, ...]:
    """The word keys of a phrase ("[via portal]" -> ("via", "portal")); empty keys dropped."""
    keys = tuple(k for k in (word_key(w) for w in phrase.split()) if k)
    if not keys:
        raise HeadlightError(f"'{phrase}' holds no word to insert (only punctuation or blanks)")
    return keys


def phrase_occurrences(text: str, keys: Sequence[str]) -> list[tuple[int, int]]:
    """Character spans of the whitespace words of every occurrence of ``keys`` in ``text``.

    An occurrence is a run of consecutive whitespace words whose keys equal ``keys``; its
    spans cover the whole whitespace words (end punctuation included), as word knockout
    deletes them (docs/definitions.md, "Word knockout").
    """
    words = []
    pos = 0
    for raw in text.split():
        begin = text.index(raw, pos)
        pos = begin + len(raw)
        words.append((begin, pos, word_key(raw)))
    n = len(keys)
    spans: list[tuple[int, int]] = []
    for i in range(len(words) - n + 1):
        if tuple(w[2] for w in words[i : i + n]) == tuple(keys):
            spans.extend((a, b) for a, b, _ in words[i : i + n])
    return spans


def surface_form(items: Iterable[TextItem], keys: Sequence[str]) -> str | None:
    """How the texts most often write the word or phrase with these keys, as whitespace words
    ("via portal" -> "[via portal]"): what knocking it out deletes, and so what to insert.

    The most frequent exact form wins, ties by first occurrence; None when no text has it.
    """
    from collections import Counter

    forms: Counter[str] = Counter()
    n = len(keys)
    for item in items:
        spans = phrase_occurrences(item.text, keys)
        for k in range(0, len(spans), n):
            forms[" ".join(item.text[a:b] for a, b in spans[k : k + n])] += 1
    return forms.most_common(1)[0][0] if forms else None


def insertion_phrase(items: Iterable[TextItem], word: str) -> str:
    """What to insert for a word or phrase of the shortcut report: a word as it is, a phrase as
    the texts most often write it (``surface_form``), or as given when no text holds it."""
    keys = phrase_keys(word)
    return (surface_form(items, keys) or word) if len(keys) > 1 else word


def resolve_class(loaded: LoadedModel, name: str) -> int:
    """The index of class ``name`` (a label of the model, or its index)."""
    labels = list(loaded.labels)
    if name in labels:
        return labels.index(name)
    if name.isdigit() and int(name) < len(labels):
        return int(name)
    raise HeadlightError(f"class {name!r} is not one of {', '.join(labels)}")


@dataclass(frozen=True)
class PointedClass:
    target: int  # the class the phrase points to
    flips_from: dict[str, int]  # originally predicted class -> flips under knockout
    texts_with: dict[str, int]  # originally predicted class -> texts containing the phrase


@dataclass
class PointedTally:
    """Per originally predicted class: texts containing the phrase, and flips when knocked out."""

    having: np.ndarray
    flips: np.ndarray

    def merge(self, other: PointedTally) -> PointedTally:
        self.having = self.having + other.having
        self.flips = self.flips + other.flips
        return self

    def pointed(self, labels: Sequence[str], phrase: str) -> PointedClass:
        """The class knocking the phrase out most often flips texts away from.

        Ties go to the class with more texts containing the phrase, then to the lower index."""
        if self.having.sum() == 0:
            raise HeadlightError(
                f"'{phrase}' occurs in no text of the set; name the class it should push texts into (--class)"
            )
        if self.flips.sum() == 0:
            raise HeadlightError(
                f"knocking '{phrase}' out flips no prediction in this set, so "
                "it points to no class; name one (--class)"
            )
        order = sorted(range(len(labels)), key=lambda k: (-self.flips[k], -self.having[k], k))
        return PointedClass(
            order[0],
            {labels[k]: int(self.flips[k]) for k in range(len(labels))},
            {labels[k]: int(self.having[k]) for k in range(len(labels))},
        )


@dataclass(frozen=True)
class PointedKind:
    """Knockout of one phrase in the texts containing it, over shards (a ``ShardKind``)."""

    name: ClassVar[str] = "pointed-class"
    phrase: str
    batch_size: int = 32

    def options(self) -> dict:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> PointedTally:
        keys = phrase_keys(self.phrase)
        n = len(loaded.labels)
        tally = PointedTally(np.zeros(n, np.int64), np.zeros(n, np.int64))
        for chunk in chunks((i for i in shard.items if phrase_occurrences(i.text, keys)), 64):
            check()
            atts = list(attentions(loaded, [i.text for i in chunk], self.batch_size, attention=False))
            cases, preds = [], []
            for att in atts:
                idx = knockout_tokens(att, {"": phrase_occurrences(att.text, keys)}).get("")
                if idx is None:
                    continue
                cases.append((att.token_ids, idx))
                preds.append(int(np.argmax(att.target)))
            if not cases:
                continue
            after = predict_without(loaded, cases, self.batch_size).argmax(axis=1)
            for before, now in zip(preds, after, strict=True):
                tally.having[before] += 1
                tally.flips[before] += int(now != before)
        return tally

    def state(self, partial: PointedTally) -> State:
        return {"having": partial.having, "flips": partial.flips}

    def load(self, state: State) -> PointedTally:
        return PointedTally(np.asarray(state["having"], np.int64), np.asarray(state["flips"], np.int64))


def pointed_class(
    loaded: LoadedModel,
    items: Iterable[TextItem],
    phrase: str,
    batch_size: int = 32,
    *,
    options: RunOptions = SERIAL,
    cancelled: Callable[[], bool] | None = None,
) -> PointedClass:
    """The class that knocking ``phrase`` out most often flips texts away from (``PointedTally``)."""
    _require_classifier(loaded)
    phrase_keys(phrase)
    tally = run_report(PointedKind(phrase, batch_size), loaded, items, options=options, cancelled=cancelled)
    return tally.pointed(list(loaded.labels), phrase)


def insertion_shard(
    loaded: LoadedModel,
    items: Sequence[tuple[int, TextItem]],
    phrase: str,
    target: int,
    *,
    seed: int = 0,
    positions: Sequence[str] = POSITIONS,
    batch_size: int = 32,
) -> InsertionTally:
    """The insertion test over one shard: ``items`` are (index in the set, text) pairs."""
    tally = InsertionTally(positions)
    texts = [item.text for _, item in items]
    if not texts:
        return tally
    before = np.concatenate(
        [loaded.predict(loaded.encode(texts[i : i + batch_size])) for i in range(0, len(texts), batch_size)]
    )  # (N, C)
    tally.texts = len(texts)
    todo = [(k, index) for k, (index, _) in enumerate(items) if before[k].argmax() != target]
    tally.skipped = len(texts) - len(todo)
    variants = [
        (position, k, index, insert_at(texts[k], phrase, position, seed=seed, index=index))
        for position in positions
        for k, index in todo
    ]
    for start in range(0, len(variants), batch_size):
        part = variants[start : start + batch_size]
        after = loaded.predict(loaded.encode([v[3] for v in part]))  # (B, C)
        for (position, k, index, _), p in zip(part, after, strict=True):
            tally.add(position, index, bool(p.argmax() == target), float(p[target] - before[k, target]))
    return tally


@dataclass
class InsertionReport:
    phrase: str
    target: int
    target_label: str
    chosen_by: str  # "given" or "knockout"
    seed: int
    tally: InsertionTally
    pointed: PointedClass | None = None

    def to_dict(self) -> dict[str, Any]:
        out = {
            "phrase": self.phrase,
            "class": self.target_label,
            "class_index": self.target,
            "class_chosen_by": self.chosen_by,
            "seed": self.seed,
            **self.tally.to_dict(),
        }
        if self.pointed is not None:
            out["knockout_flips_from"] = dict(self.pointed.flips_from)
            out["texts_with_phrase"] = dict(self.pointed.texts_with)
        return out


@dataclass(frozen=True)
class InsertionKind:
    """The insertion test over shards (a ``ShardKind``); the partial is an ``InsertionTally``."""

    name: ClassVar[str] = "insertion"
    phrase: str
    target: int
    seed: int = 0
    batch_size: int = 32
    positions: tuple[str, ...] = POSITIONS

    def options(self) -> dict:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> InsertionTally:
        check()
        return insertion_shard(
            loaded,
            list(shard.indexed()),
            self.phrase,
            self.target,
            seed=self.seed,
            positions=self.positions,
            batch_size=self.batch_size,
        )

    def state(self, partial: InsertionTally) -> State:
        return partial.state()

    def load(self, state: State) -> InsertionTally:
        return InsertionTally.from_state(state)


def run_insertion(
    loaded: LoadedModel,
    phrase: str,
    target: str | int | None,
    seed: int,
    batch_size: int,
    run: Callable[[Any, str], Any],
) -> InsertionReport:
    """The insertion test with ``run(kind, label)`` mapping a report kind over the whole set
    (the engine call of the caller: the window's, or the command's with its progress bar)."""
    _require_classifier(loaded)
    phrase = " ".join(phrase.split())
    phrase_keys(phrase)
    pointed = None
    if target is None:
        tally = run(PointedKind(phrase, batch_size), f"knockout of '{phrase}'")
        pointed = tally.pointed(list(loaded.labels), phrase)
        index, chosen = pointed.target, "knockout"
    else:
        index = target if isinstance(target, int) else resolve_class(loaded, str(target))
        chosen = "given"
    tally = run(InsertionKind(phrase, index, seed, batch_size), f"insertion of '{phrase}'")
    return InsertionReport(phrase, index, loaded.labels[index], chosen, seed, tally, pointed)


def insertion_test(
    loaded: LoadedModel,
    items: Iterable[TextItem] | TextSource,
    phrase: str,
    target: str | int | None = None,
    *,
    seed: int = 0,
    batch_size: int = 32,
    progress: Callable[..., None] | None = None,
    cancelled: Callable[[], bool] | None = None,
    options: RunOptions = SERIAL,
) -> InsertionReport:
    """The whole insertion test over the shards of the set (``viewer.reports.shards``).

    Without ``target`` the set is read twice (the knockout that finds the pointed class, then
    the insertions): a one-shot stream of items is read into a list first.
    ``progress(done, total)`` follows the insertion pass.
    """
    if not isinstance(items, TextSource):
        items = list(items)

    def run(kind: Any, _label: str) -> Any:
        return run_report(
            kind,
            loaded,
            items.items() if isinstance(items, TextSource) else items,
            options=options,
            cancelled=cancelled,
            progress=progress if isinstance(kind, InsertionKind) else None,
        )

    return run_insertion(loaded, phrase, target, seed, batch_size, run)
