"""Shortcut search by word knockout over a text set (docs/definitions.md, "Word knockout").

For every text, every distinct word (and, separately, every two-word phrase) is knocked out
by deleting all of its sub-tokens from the input; the change in the probability of the
originally predicted class is its ``drop``, a change of the predicted class a ``flip``. Over the
text set each word gets ``count``, ``flip_rate``, ``mean_drop`` and ``focus`` (with the focus in
each head of the last layer, ``head_focus``, and for a classifier the texts and flips per
originally predicted class, ``by_class``), and words seen in at least 3 texts are ranked by the
lower end of the Wilson interval of their flip rate.

Cost of the exhaustive search (``ShortcutKind``): one forward per (text, word) plus one per
(text, phrase), batched across the texts of a shard, so the work grows linearly with the total
number of words. The default, screened search (docs/definitions.md, "Screen and
confirmation") first scores every word with one forward and one backward per text
(``ScreenKind``), then runs the same knockout loop for the candidates only (``ConfirmKind``),
within 1/16 of the exhaustive knockouts. Each is a report kind mapped over shards
(``viewer.reports.shards``): each shard folds into its own pair of tallies; the tallies merge
in shard order.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import asdict, dataclass
from typing import Any, ClassVar

import numpy as np

from viewer.core import screen as screening
from viewer.core.links import word_token_indices
from viewer.core.screen import ScreenScore, ScreenTally
from viewer.core.shortcuts import (
    KnockoutOutcome,
    KnockoutTally,
    phrase_spans,
    word_spans,
)
from viewer.core.summary import summary_head_shares, summary_index, summary_share
from viewer.core.words import Span
from viewer.model.attribution import predict_without
from viewer.model.loader import LoadedModel
from viewer.model.runs import TextAttention, attentions
from viewer.reports.heads import require_prediction
from viewer.reports.shards import SERIAL, RunOptions, Shard, State, set_runner
from viewer.reports.textsets import TextItem, chunks

TEXTS_PER_FORWARD_GROUP = 16  # texts whose knockouts are batched together


@dataclass
class ShortcutReport:
    words: KnockoutTally
    phrases: KnockoutTally
    texts: int
    mode: str = "exhaustive"  # or "screened": knockout only for the screen's candidates
    screened: int | None = None  # keys (words and phrases) seen in >= 3 texts that were screened
    confirmed: int | None = None  # keys knocked out (every key of every text when exhaustive)
    forwards: int | None = None  # sequences the model ran forward (screen and knockout)
    backwards: int = 0  # backward passes (the screen's gradient × input)

    def merge(self, other: ShortcutReport) -> ShortcutReport:
        self.words.merge(other.words)
        self.phrases.merge(other.phrases)
        self.texts += other.texts
        return self

    def fixation(self, head: int | None = None) -> tuple[list[dict], list[float]]:
        """The fixation plot's numbers: the word ranking and each ranked word's attention share
        (last layer; the head mean, or head ``head``). Its y is each row's ``mean_drop``."""
        rows = self.words.ranking()
        share = [r["focus"] if head is None else r["head_focus"][head] for r in rows]
        return rows, share

    def to_dict(self, limit: int | None = None) -> dict:
        return {
            "texts": self.texts,
            "mode": self.mode,
            "screened": self.screened,
            "confirmed": self.confirmed,
            "forwards": self.forwards,
            "backwards": self.backwards,
            "classes": list(self.words.labels),
            "tokens": self.words.ranking(limit=limit),
            "phrases": self.phrases.ranking(limit=limit),
        }


def knockout_tokens(att: TextAttention, spans: dict[str, list[tuple[int, int]]]) -> dict[str, np.ndarray]:
    """Key -> sorted sub-token indices of all its occurrences' spans, special tokens left out:
    what knocking it out deletes. Keys with nothing to delete, or with every token, are dropped."""
    out = {}
    for key, key_spans in spans.items():
        idx = np.unique(
            np.concatenate([word_token_indices(s, att.offsets) for s in key_spans] or [np.zeros(0, np.int64)])
        )
        idx = idx[~att.special[idx]] if idx.size else idx
        if idx.size and idx.size < len(att.token_ids):
            out[key] = idx
    return out


SpansOf = Callable[[str], dict[str, dict[str, list[Span]]]]
"""A text -> {tally name: {key: spans of its occurrences}}: what to knock out of it, per tally."""


def knock_out(
    loaded: LoadedModel,
    items: Iterable[TextItem],
    tallies: Mapping[str, KnockoutTally],
    spans_of: SpansOf,
    batch_size: int,
    check: Callable[[], None],
) -> None:
    """The knockout loop: every key ``spans_of`` gives for a text is knocked out of it, each on
    its own copy (all of the key's sub-tokens deleted, docs/definitions.md "Word knockout"),
    and each text's outcomes are added to the tally of their name.

    The knockouts of ``TEXTS_PER_FORWARD_GROUP`` texts are batched together; ``check()`` is
    called before each group (a cancel ends the run there).
    """
    labels = next(iter(tallies.values())).labels if tallies else ()
    for chunk in chunks(items, TEXTS_PER_FORWARD_GROUP):
        check()
        atts = list(attentions(loaded, [i.text for i in chunk], batch_size))
        plans = []  # per text: [(tally name, key, token indices)] in the order of `cases`
        cases = []  # (token ids, sub-tokens to delete), one per knockout
        for att in atts:
            plan = [
                (name, key, idx)
                for name, spans in spans_of(att.text).items()
                for key, idx in knockout_tokens(att, spans).items()
            ]
            cases.extend((att.token_ids, idx) for _, _, idx in plan)
            plans.append(plan)
        after = predict_without(loaded, cases, batch_size) if cases else None
        row = 0
        for att, plan in zip(atts, plans, strict=True):
            pred = int(np.argmax(att.target))
            p0 = float(att.target[pred])
            summary = att.attention_from(summary_index(len(att.token_ids), loaded.family.causal))[
                -1
            ]  # (H, T)
            outcomes: dict[str, dict[str, KnockoutOutcome]] = {name: {} for name in tallies}
            for name, key, idx in plan:
                p = after[row]
                row += 1
                outcomes[name][key] = KnockoutOutcome(
                    flipped=bool(int(np.argmax(p)) != pred),
                    drop=p0 - float(p[pred]),
                    focus=summary_share(summary, idx),
                    head_focus=summary_head_shares(summary, idx),
                    predicted=pred if labels else -1,
                )
            for name, tally in tallies.items():
                tally.add_text(outcomes[name])


def joined_state(words: Any, phrases: Any) -> State:
    """A words tally's and a phrases tally's states as one, their keys prefixed."""
    return {
        **{f"words.{k}": v for k, v in words.state().items()},
        **{f"phrases.{k}": v for k, v in phrases.state().items()},
    }


def split_state(tally: Any, state: State) -> tuple[Any, Any]:
    """The words and phrases tallies (of class ``tally``) of a ``joined_state``; the exhaustive
    search's states are read as they always were."""
    words = tally.from_state({k[6:]: v for k, v in state.items() if k.startswith("words.")})
    phrases = tally.from_state({k[8:]: v for k, v in state.items() if k.startswith("phrases.")})
    return words, phrases


def class_labels(loaded: LoadedModel) -> tuple[str, ...]:
    """The classes a knockout tally breaks its flips down by: a classifier's, else none."""
    return tuple(loaded.labels) if loaded.head_kind == "classifier" else ()


@dataclass(frozen=True)
class ShortcutKind:
    """Word (and phrase) knockout over shards; the partial is a ``ShortcutReport``."""

    name: ClassVar[str] = "shortcuts"
    batch_size: int = 32
    phrases: bool = True

    def options(self) -> dict:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> ShortcutReport:
        words = KnockoutTally(class_labels(loaded), loaded.n_heads)
        pairs = KnockoutTally(class_labels(loaded), loaded.n_heads)
        if self.phrases:
            tallies = {"words": words, "phrases": pairs}

            def spans_of(text: str) -> dict[str, dict[str, list[Span]]]:
                return {"words": word_spans(text), "phrases": phrase_spans(text)}
        else:
            tallies = {"words": words}

            def spans_of(text: str) -> dict[str, dict[str, list[Span]]]:
                return {"words": word_spans(text)}

        knock_out(loaded, shard.items, tallies, spans_of, self.batch_size, check)
        return ShortcutReport(words, pairs, words.texts)

    def state(self, partial: ShortcutReport) -> State:
        return joined_state(partial.words, partial.phrases)

    def load(self, state: State) -> ShortcutReport:
        words, pairs = split_state(KnockoutTally, state)
        return ShortcutReport(words, pairs, words.texts)


@dataclass
class ScreenReport:
    """The screen's partial: a ``ScreenTally`` of words and one of phrases."""

    words: ScreenTally
    phrases: ScreenTally

    def merge(self, other: ScreenReport) -> ScreenReport:
        self.words.merge(other.words)
        self.phrases.merge(other.phrases)
        return self


def gold_index(loaded: LoadedModel, item: TextItem) -> int:
    """The class index of an item's label, -1 when it has none the model knows."""
    labels = class_labels(loaded)
    return labels.index(item.label) if item.label in labels else -1


@dataclass(frozen=True)
class ScreenKind:
    """The screen over shards (docs/definitions.md, "Screen and confirmation"): per text one
    forward and one backward (gradient × input toward the predicted class), the summary
    token's attention kept from the same forward; per word and phrase, a ``ScreenScore``."""

    name: ClassVar[str] = "shortcut-screen"
    batch_size: int = 32
    phrases: bool = True

    def options(self) -> dict:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> ScreenReport:
        labels = class_labels(loaded)
        words, pairs = ScreenTally(labels), ScreenTally(labels)
        for chunk in chunks(shard.items, TEXTS_PER_FORWARD_GROUP):
            check()
            texts = [i.text for i in chunk]
            for item, att in zip(
                chunk, attentions(loaded, texts, self.batch_size, gradients=True), strict=True
            ):
                top = int(np.argmax(att.target))
                pred, margin = top if labels else -1, screening.log_odds(att.target, top)
                summary = att.attention_from(summary_index(len(att.token_ids), loaded.family.causal))[
                    -1
                ]  # (H, T)
                kinds = [(words, word_spans(att.text))]
                if self.phrases:
                    kinds.append((pairs, phrase_spans(att.text)))
                for tally, spans in kinds:
                    scores = {
                        key: ScreenScore(float(att.grad_input[idx].sum()), summary_share(summary, idx))
                        for key, idx in knockout_tokens(att, spans).items()
                    }
                    tally.add_text(scores, margin, pred, gold_index(loaded, item))
        return ScreenReport(words, pairs)

    def state(self, partial: ScreenReport) -> State:
        return joined_state(partial.words, partial.phrases)

    def load(self, state: State) -> ScreenReport:
        return ScreenReport(*split_state(ScreenTally, state))


@dataclass(frozen=True)
class ConfirmKind(ShortcutKind):
    """The confirmation over shards: the knockout loop (``knock_out``) for the candidate words
    and phrases only, on the texts that hold one; the partial is a ``ShortcutReport``."""

    name: ClassVar[str] = "shortcut-confirm"
    words: tuple[str, ...] = ()
    phrase_keys: tuple[str, ...] = ()

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> ShortcutReport:
        words = KnockoutTally(class_labels(loaded), loaded.n_heads)
        pairs = KnockoutTally(class_labels(loaded), loaded.n_heads)
        wanted_words, wanted_phrases = set(self.words), set(self.phrase_keys)

        def spans_of(text: str) -> dict[str, dict[str, list[Span]]]:
            out = {"words": {k: v for k, v in word_spans(text).items() if k in wanted_words}}
            if self.phrases:
                out["phrases"] = {k: v for k, v in phrase_spans(text).items() if k in wanted_phrases}
            return out

        holding = [i for i in shard.items if any(spans_of(i.text).values())]
        tallies = {"words": words, "phrases": pairs} if self.phrases else {"words": words}
        knock_out(loaded, holding, tallies, spans_of, self.batch_size, check)
        return ShortcutReport(words, pairs, words.texts)


ReportRun = Callable[[Any, str], Any]
"""(report kind, label) -> the merged partial of that kind over the whole set."""


def run_search(
    loaded: LoadedModel,
    run: ReportRun,
    *,
    batch_size: int,
    phrases: bool,
    exhaustive: bool,
    share: float = screening.SHARE,
) -> ShortcutReport:
    """The shortcut search through ``run``: exhaustive (every word and phrase of every text
    knocked out, ``ShortcutKind``) or screened (``ScreenKind`` over the set, then
    ``ConfirmKind`` for the candidates of ``viewer.core.screen.candidates``, within
    ``share`` of the knockouts of an exhaustive search, ``viewer.core.screen.budget``).

    A screened report ranks the confirmed keys with the very numbers an exhaustive search gives
    them (the same knockouts on the same texts); ``texts`` is the whole set's."""
    if exhaustive:
        report = run(ShortcutKind(batch_size=batch_size, phrases=phrases), "word knockout")
        keys = len(report.words) + len(report.phrases)
        report.confirmed = keys
        report.forwards = report.texts + report.words.knockouts() + report.phrases.knockouts()
        return report
    screen = run(ScreenKind(batch_size=batch_size, phrases=phrases), "shortcut screen")
    budget = screening.budget(screen.words, screen.phrases, share)
    word_budget = budget * (2 / 3 if phrases else 1)
    words = screening.candidates(screen.words, screening.WORDS, word_budget)
    pairs = screening.candidates(screen.phrases, screening.PHRASES, budget - word_budget) if phrases else []
    texts = screen.words.texts
    if words or pairs:
        kind = ConfirmKind(
            batch_size=batch_size, phrases=phrases, words=tuple(words), phrase_keys=tuple(pairs)
        )
        report = run(kind, "word knockout")
    else:
        labels = class_labels(loaded)
        report = ShortcutReport(
            KnockoutTally(labels, loaded.n_heads), KnockoutTally(labels, loaded.n_heads), 0
        )
    knocked = report.words.texts + report.words.knockouts() + report.phrases.knockouts()
    report.words.texts = report.phrases.texts = report.texts = texts
    report.mode = "screened"
    report.screened = len(screen.words.eligible()) + len(screen.phrases.eligible())
    report.confirmed = len(words) + len(pairs)
    report.forwards = texts + knocked
    report.backwards = texts
    return report


def shortcut_search(
    loaded: LoadedModel,
    items: Iterable[TextItem],
    *,
    batch_size: int = 32,
    phrases: bool = True,
    exhaustive: bool = False,
    share: float = screening.SHARE,
    progress: Callable[..., None] | None = None,
    cancelled: Callable[[], bool] | None = None,
    options: RunOptions = SERIAL,
) -> ShortcutReport:
    """The shortcut search over a text set; the window's search (the command's is
    ``viewer.reports.runs.shortcuts_data``, the same ``run_search``).

    Screened by default, every word knocked out with ``exhaustive`` (``run_search``). Streams
    the texts shard by shard, in this process unless ``options`` say otherwise, and returns the
    merged ``ShortcutReport`` (``.words`` and ``.phrases`` are ``KnockoutTally``, ``.texts`` the
    number of texts, ``to_dict()`` the command's JSON). ``progress(done, total)`` is called
    after every shard with the texts done so far in the pass running (the screened search makes
    two passes; total None for a stream of unknown length); ``cancelled()`` is asked between
    shards and batches and ends the run with ``viewer.reports.shards.Cancelled``.
    """
    require_prediction(loaded, "shortcut search")

    # the screened search reads the set twice (screen, then confirmation)
    run = set_runner(loaded, items, options=options, cancelled=cancelled, progress=progress)
    return run_search(loaded, run, batch_size=batch_size, phrases=phrases, exhaustive=exhaustive, share=share)
