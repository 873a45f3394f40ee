"""The insertion test over a text set (docs/definitions.md, "Insertion test").

``insertion_test(loaded, items, phrase)`` inserts ``phrase`` at the start, at the end and at a
seeded random word boundary of every text whose prediction is not the class the phrase points
to, and counts the texts whose prediction becomes that class (``viewer.core.insertion``).

The class a phrase points to is given (``target``), or found by knockout: among the texts that
contain the phrase, the originally predicted class that knocking the phrase out most often
flips away from (``pointed_class``, a view of the per-class breakdown of the phrase's
knockout tally: the shortcut search's, or one made by ``PhraseKnockoutKind``). For the demo's
footer that is ``billing``: without "[via portal]" the portal messages stop being billing.

The *mechanism check* (docs/definitions.md, "Mechanism check") runs the insertion test once
more with chosen heads knocked out (their gates at 0, ``viewer.model.gates``) and reports, per
position, the share of the intact flip rate that the heads carry.

Both passes are report kinds of the shard engine (``PhraseKnockoutKind``, ``InsertionKind``), so they
run on workers or a cluster and resume from a run folder like every set report.
``insertion_shard`` is the map step over one shard (indices are positions in the whole set, so
the random boundary of a text does not depend on the shard); shards' tallies merge in order.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, replace
from typing import Any, ClassVar

import numpy as np

from viewer.core.insertion import POSITIONS, InsertionTally, insert_at
from viewer.core.shortcuts import KnockoutTally
from viewer.core.words import Span, contains, occurrences, phrase_keys, split_words
from viewer.errors import HeadlightError
from viewer.model.loader import LoadedModel
from viewer.model.names import head_phrase
from viewer.reports.shards import SERIAL, RunOptions, Shard, State, set_runner
from viewer.reports.shortcuts import ShortcutReport, class_labels, knock_out
from viewer.reports.textsets import TextItem, TextSource


def _require_classifier(loaded: LoadedModel) -> None:
    if loaded.head_kind != "classifier":
        raise HeadlightError(
            f"the insertion test counts texts flipping into a class; {loaded.name} has "
            f"{head_phrase(loaded.head_kind)}, not a sequence classifier"
        )


def insertion_keys(phrase: str) -> tuple[str, ...]:
    """The word keys of a phrase to insert (``viewer.core.words.phrase_keys``); HeadlightError
    when it holds no word."""
    keys = phrase_keys(phrase)
    if not keys:
        raise HeadlightError(f"'{phrase}' holds no word to insert (only punctuation or blanks)")
    return keys


def surface_form(items: Iterable[TextItem], keys: Sequence[str]) -> str | None:
    """How the texts most often write the word or phrase with these keys, as whitespace words
    ("via portal" -> "[via portal]"): what knocking it out deletes, and so what to insert.

    The most frequent exact form wins, ties by first occurrence; None when no text has it.
    """
    forms: Counter[str] = Counter()
    for item in items:
        for run in occurrences(split_words(item.text), keys):
            forms[" ".join(item.text[w.start : w.end] for w in run)] += 1
    return forms.most_common(1)[0][0] if forms else None


def insertion_phrase(items: Iterable[TextItem], word: str) -> str:
    """What to insert for a word or phrase of the shortcut report: a word as it is, a phrase as
    the texts most often write it (``surface_form``), or as given when no text holds it."""
    keys = insertion_keys(word)
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


def pointed_class(labels: Sequence[str], by_class: np.ndarray, phrase: str) -> PointedClass:
    """The class knocking ``phrase`` out most often flips texts away from, read off its
    knockout tally's per-class breakdown ``by_class`` (classes, 2): per originally predicted
    class, the texts containing the phrase and how many of them flip
    (``KnockoutTally.by_class``; docs/definitions.md, "Insertion test").

    Ties go to the class with more texts containing the phrase, then to the lower index."""
    having, flips = np.asarray(by_class, dtype=np.int64).T  # (classes,), (classes,)
    if having.sum() == 0:
        raise HeadlightError(
            f"'{phrase}' occurs in no text of the set; name the class it should push texts into (--class)"
        )
    if flips.sum() == 0:
        raise HeadlightError(
            f"knocking '{phrase}' out flips no prediction in this set, so "
            "it points to no class; name one (--class)"
        )
    order = sorted(range(len(labels)), key=lambda k: (-flips[k], -having[k], k))
    return PointedClass(
        order[0],
        {labels[k]: int(flips[k]) for k in range(len(labels))},
        {labels[k]: int(having[k]) for k in range(len(labels))},
    )


def searched_by_class(report: ShortcutReport, word: str) -> np.ndarray | None:
    """The per-class knockout breakdown of a word or two-word phrase of the shortcut report
    (``KnockoutTally.by_class``), None when the search did not tally it (phrases not
    searched, a longer phrase, not a classifier)."""
    keys = phrase_keys(word)
    tally = {1: report.words, 2: report.phrases}.get(len(keys))
    key = " ".join(keys)
    if tally is None or not tally.labels or key not in tally.keys():
        return None
    return tally.by_class(key)


@dataclass(frozen=True)
class PhraseKnockoutKind:
    """Knockout of one word or phrase in the texts that contain it, over shards (a
    ``ShardKind``): the shortcut search's loop (``knock_out``) with this one key; the partial
    is its ``KnockoutTally``, whose per-class breakdown gives the class the phrase points to."""

    name: ClassVar[str] = "phrase-knockout"
    phrase: str
    batch_size: int = 32

    def options(self) -> dict:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> KnockoutTally:
        keys = insertion_keys(self.phrase)
        key = " ".join(keys)
        tally = KnockoutTally(class_labels(loaded), loaded.n_heads)

        def spans_of(text: str) -> dict[str, dict[str, list[Span]]]:
            runs = occurrences(split_words(text), keys)
            return {"phrase": {key: [w.span for run in runs for w in run]}}

        having = (i for i in shard.items if contains(i.text, self.phrase))
        knock_out(loaded, having, {"phrase": tally}, spans_of, self.batch_size, check)
        return tally

    def state(self, partial: KnockoutTally) -> State:
        return partial.state()

    def load(self, state: State) -> KnockoutTally:
        return KnockoutTally.from_state(state)


Head = tuple[int, int]  # (layer, head), counted from 0


def parse_heads(text: str, n_layers: int, n_heads: int) -> tuple[Head, ...]:
    """ "1.2,3.0" -> ((1, 2), (3, 0)); "2.*" is every head of layer 2. Sorted, no repeats; a
    HeadlightError names what does not fit the model."""
    heads: set[Head] = set()
    for part in (p.strip() for p in text.split(",")):
        layer, dot, head = part.partition(".")
        if not dot or not layer.isdigit() or not (head.isdigit() or head == "*"):
            raise HeadlightError(
                f"--knockout-heads takes LAYER.HEAD pairs counted from 0, like 1.2,3.0 (or 2.* for a "
                f"whole layer); got {part!r}"
            )
        if int(layer) >= n_layers or (head != "*" and int(head) >= n_heads):
            raise HeadlightError(
                f"no head {part} in this model: it has layers 0-{n_layers - 1} and heads 0-{n_heads - 1}"
            )
        heads.update((int(layer), h) for h in (range(n_heads) if head == "*" else (int(head),)))
    return tuple(sorted(heads))


def heads_text(heads: Sequence[Head]) -> str:
    """ "layer 1 · head 2, layer 3 · heads 0, 1" for titles and messages (one group a layer)."""
    layers: dict[int, list[int]] = {}
    for layer, head in sorted(set(heads)):
        layers.setdefault(layer, []).append(head)
    return ", ".join(
        f"layer {layer} · head {hs[0]}"
        if len(hs) == 1
        else f"layer {layer} · heads {', '.join(map(str, hs))}"
        for layer, hs in layers.items()
    )


def insertion_shard(
    loaded: LoadedModel,
    items: Sequence[tuple[int, TextItem]],
    phrase: str,
    target: int,
    *,
    seed: int = 0,
    positions: Sequence[str] = POSITIONS,
    batch_size: int = 32,
    heads: Sequence[Head] = (),
) -> InsertionTally:
    """The insertion test over one shard: ``items`` are (index in the set, text) pairs; with
    ``heads`` the model runs with those heads knocked out, before and after the insertion."""
    tally = InsertionTally(positions)
    texts = [item.text for _, item in items]
    if not texts:
        return tally
    gates = None
    if heads:
        from viewer.model.gates import knockout_gates

        gates = knockout_gates(loaded, heads)

    def predict(batch: list[str]) -> np.ndarray:
        return loaded.predict(loaded.encode(batch), gates)  # (B, C)

    before = np.concatenate(
        [predict(texts[i : i + batch_size]) for i in range(0, len(texts), batch_size)]
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
        after = predict([v[3] for v in part])  # (B, C)
        for (position, k, index, _), p in zip(part, after, strict=True):
            tally.add(position, index, bool(p.argmax() == target), float(p[target] - before[k, target]))
    return tally


@dataclass
class MechanismCheck:
    """The insertion test rerun with ``heads`` knocked out, beside the intact test's tally
    (docs/definitions.md, "Mechanism check")."""

    heads: tuple[Head, ...]
    tally: InsertionTally  # with the heads knocked out
    intact: InsertionTally

    def share_carried(self, position: str) -> float | None:
        """(intact flip rate − flip rate without the heads) / intact flip rate; None when the
        intact test flipped nothing or either test tried no text at that position."""
        a, b = self.intact.positions[position], self.tally.positions[position]
        if not a.tried or not b.tried or not a.flips:
            return None
        return (a.flips / a.tried - b.flips / b.tried) / (a.flips / a.tried)

    def to_dict(self) -> dict[str, Any]:
        rows = []
        for position in self.tally.positions:
            row = self.tally.entry(position)
            row["intact_flip_rate"] = self.intact.entry(position)["flip_rate"]
            row["share_carried"] = self.share_carried(position)
            rows.append(row)
        return {
            "heads": [[layer, head] for layer, head in self.heads],
            "texts": self.tally.texts,
            "skipped": self.tally.skipped,
            "positions": rows,
        }


@dataclass
class InsertionReport:
    phrase: str
    target: int
    target_label: str
    chosen_by: str  # "given" or "knockout"
    seed: int
    tally: InsertionTally
    pointed: PointedClass | None = None
    mechanism: MechanismCheck | None = None  # the same test with chosen heads knocked out
    cue_accuracy: dict | None = None  # the set's accuracy with the phrase removed / inserted

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
        if self.mechanism is not None:
            out["knockout_heads"] = self.mechanism.to_dict()
        return out

    def headline(self) -> str:
        """The test in one line, at the end of the texts (where a footer goes), with the
        mechanism check's share when there is one."""
        label, end = self.target_label, self.tally.entry("end")
        if not end["tried"]:
            return f"'{self.phrase}': every text is already predicted {label}"
        line = (
            f"'{self.phrase}' inserted at the end: {end['flips']} of {end['tried']} texts not "
            f"predicted {label} flip into {label} (95% low {end['flip_low']:.2f})"
        )
        if self.mechanism is not None:
            m = self.mechanism.tally.entry("end")
            share = self.mechanism.share_carried("end")
            carried = "no share to give" if share is None else f"they carry {share:.0%} of the flip rate"
            line += f"; without {heads_text(self.mechanism.heads)}: {m['flips']} of {m['tried']}, {carried}"
        if self.cue_accuracy is not None:
            g, r, i = (self.cue_accuracy[v]["accuracy"] for v in ("given", "removed", "inserted"))
            line += f"; set accuracy {g:.3f} as given, {r:.3f} with it removed, {i:.3f} with it inserted"
        return line


def lead_insertion(results: dict[str, InsertionReport], own: str | None = None) -> str | None:
    """The key of the result to state first: the user's own word or phrase when it has one,
    else the highest flip rate at the end (then more flips; the first key on a tie)."""
    if own is not None and own in results:
        return own
    if not results:
        return None

    def strength(key: str) -> tuple[float, int]:
        end = results[key].tally.entry("end")
        return (end["flip_rate"] or 0.0, end["flips"])

    return max(results, key=strength)


@dataclass(frozen=True)
class InsertionKind:
    """The insertion test over shards (a ``ShardKind``); the partial is an ``InsertionTally``."""

    name: ClassVar[str] = "insertion"
    phrase: str
    target: int
    seed: int = 0
    batch_size: int = 32
    positions: tuple[str, ...] = POSITIONS
    heads: tuple[Head, ...] = ()  # knocked out during the test (the mechanism check)

    def options(self) -> dict:
        options = asdict(self)
        if not self.heads:
            del options["heads"]  # the intact test keeps the run folders it always had
        return options

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
            heads=self.heads,
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
    by_class: np.ndarray | None = None,
    heads: Sequence[Head] = (),
) -> InsertionReport:
    """The insertion test with ``run(kind, label)`` mapping a report kind over the whole set
    (the engine call of the caller: the window's, or the command's with its progress bar).

    Without ``target`` the class is the one the phrase points to, read off ``by_class`` (its
    knockout's per-class breakdown, when the caller's shortcut search has it) or else found by
    a knockout of the phrase over the set (``PhraseKnockoutKind``). With ``heads`` the test is
    run again with those heads knocked out (``mechanism_check``)."""
    _require_classifier(loaded)
    phrase = " ".join(phrase.split())
    keys = insertion_keys(phrase)
    pointed = None
    if target is None:
        if by_class is None:
            tally = run(PhraseKnockoutKind(phrase, batch_size), f"knockout of '{phrase}'")
            by_class = tally.by_class(" ".join(keys))
        pointed = pointed_class(loaded.labels, by_class, phrase)
        index, chosen = pointed.target, "knockout"
    else:
        index = target if isinstance(target, int) else resolve_class(loaded, str(target))
        chosen = "given"
    tally = run(InsertionKind(phrase, index, seed, batch_size), f"insertion of '{phrase}'")
    report = InsertionReport(phrase, index, loaded.labels[index], chosen, seed, tally, pointed)
    if heads:
        report.mechanism = mechanism_check(report, heads, batch_size, run)
    return report


def mechanism_check(
    report: InsertionReport, heads: Sequence[Head], batch_size: int, run: Callable[[Any, str], Any]
) -> MechanismCheck:
    """``report``'s insertion test again (same phrase, class, seed and positions) with ``heads``
    knocked out, ``run`` mapping the kind over the same set."""
    heads = tuple(sorted(set(heads)))
    if not heads:
        raise HeadlightError("choose at least one head to knock out")
    kind = InsertionKind(
        report.phrase, report.target, report.seed, batch_size, tuple(report.tally.positions), heads
    )
    tally = run(kind, f"insertion of '{report.phrase}' without {heads_text(heads)}")
    return MechanismCheck(heads, tally, report.tally)


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
    by_class: np.ndarray | None = None,
    heads: Sequence[Head] = (),
) -> InsertionReport:
    """The whole insertion test over the shards of the set (``viewer.reports.shards``), with
    the mechanism check of ``heads`` when given.

    Without ``target`` or ``by_class`` the set is read twice (the knockout that finds the
    pointed class, then the insertions): a one-shot stream of items is read into a list first.
    ``progress(done, total)`` follows the insertion pass.
    """
    run = set_runner(
        loaded, items, options=options, cancelled=cancelled, progress=progress, progress_of=_is_insertion
    )
    return run_insertion(loaded, phrase, target, seed, batch_size, run, by_class, heads)


def mechanism_test(
    loaded: LoadedModel,
    items: Iterable[TextItem] | TextSource,
    report: InsertionReport,
    heads: Sequence[Head],
    *,
    batch_size: int = 32,
    progress: Callable[..., None] | None = None,
    cancelled: Callable[[], bool] | None = None,
    options: RunOptions = SERIAL,
) -> InsertionReport:
    """``report`` (an insertion test over ``items``) with its mechanism check of ``heads``: the
    intact test is not run again."""
    run = set_runner(
        loaded, items, options=options, cancelled=cancelled, progress=progress, progress_of=_is_insertion
    )
    return replace(report, mechanism=mechanism_check(report, heads, batch_size, run))


def _is_insertion(kind: Any) -> bool:
    """The passes whose progress the insertion test reports: the insertions, not the knockout
    that finds the pointed class."""
    return isinstance(kind, InsertionKind)
