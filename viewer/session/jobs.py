"""The work the window hands to its worker thread, as plain functions (no Qt in here).

Each job takes a ``JobContext`` first: it reports progress through ``ctx.progress``, calls
``ctx.check()`` between steps so a cancel takes effect, and finds the open checkpoints in
``ctx.models`` (touched only on the worker thread). Jobs return plain data (``ModelInfo``,
``TextAnalysis``, ...) that the worker posts back to the GUI thread. A ``HeadlightError`` raised
here becomes a dialog with its one-line message.

Heavy modules (torch, transformers, the reports layer) are imported inside the jobs, so the
window can be on screen before they have loaded.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from viewer.errors import Cancelled, HeadlightError
from viewer.session.state import ModelInfo

if TYPE_CHECKING:
    from viewer.session.analysis import TextAnalysis


@dataclass
class JobContext:
    progress: Callable[[int, int, str], None]
    cancelled: Callable[[], bool]
    models: dict[str, Any]  # slot ("main", "compare") -> LoadedModel, worker thread only

    def check(self) -> None:
        """Raise ``Cancelled`` (the shard engine's, so one exception ends every job) once the
        user cancelled."""
        if self.cancelled():
            raise Cancelled("cancelled")

    def counter(self, what: str) -> Callable[[int, int | None], None]:
        """A set report's ``progress(done, total)``, shown as "{what}: done of total"."""

        def progress(done: int, total: int | None) -> None:
            self.progress(done, total or 0, f"{what}: {done} of {total or '?'}")

        return progress

    def model(self, slot: str) -> Any:
        loaded = self.models.get(slot)
        if loaded is None:
            raise HeadlightError("no model is open yet; open a model folder first (Ctrl+O)")
        return loaded


def demo_folder() -> Path:
    """Where the shipped demo model lives (it may not have been built yet)."""
    import viewer.demo

    return Path(viewer.demo.__file__).parent / "model"


# -- opening and recording ------------------------------------------------------------------------


def settle_imports() -> None:
    """Move everything alive now (after the heavy imports) out of the garbage collector's view.

    The collector's full passes stop every thread for as long as it takes to traverse every
    tracked object: with torch, transformers and matplotlib loaded and the demo model open that
    is 0.3 s (``tests/benchmarks/bench_collector.py``; more in the middle of a run), far over the
    100 ms the window may stall.
    Modules, classes and functions never become garbage, so ``gc.freeze`` (made for this) loses
    nothing; objects created later (models, figures, recordings) are collected as usual.
    """
    import gc

    gc.freeze()


def info_of(loaded: Any) -> ModelInfo:
    return ModelInfo(
        folder=str(loaded.folder),
        name=loaded.display_name,  # what the model's own card calls it, as the card export does
        family=loaded.family.name,
        n_layers=int(loaded.n_layers),
        n_heads=int(loaded.n_heads),
        labels=tuple(loaded.labels),
        head_kind=loaded.head_kind,
        max_tokens=int(loaded.max_tokens),
        notes=tuple(loaded.notes),
        base=None if loaded.base_folder is None else str(loaded.base_folder),
    )


@dataclass(frozen=True)
class BaseNeeded:
    """``open_model``'s answer for an adapter folder whose base model is not a local folder:
    the window asks the user for the base and opens the adapter again with it."""

    folder: str
    message: str


def open_model(ctx: JobContext, slot: str, folder: str, base: str | None = None) -> ModelInfo | BaseNeeded:
    """Open ``folder`` (an adapter folder on ``base``) into ``slot``, importing torch and
    transformers the first time; ``BaseNeeded`` when an adapter's base must be chosen."""
    ctx.progress(0, 0, "loading torch and transformers…")
    from viewer.model.folders import NeedsBaseModel
    from viewer.model.loader import open_model as open_folder

    settle_imports()
    ctx.check()
    ctx.progress(0, 0, f"opening {Path(folder).name}…")
    try:
        loaded = open_folder(folder, base=base)
    except NeedsBaseModel as exc:
        return BaseNeeded(str(folder), str(exc))
    ctx.check()
    old = ctx.models.get(slot)
    if old is not None and hasattr(old, "hooks"):
        old.hooks.remove()
    ctx.models[slot] = loaded
    return info_of(loaded)


def run_text(
    ctx: JobContext,
    slot: str,
    text: str,
    label: str | None = None,
    origin: str = "",
    summarised: bool = False,
) -> TextAnalysis:
    """Record one text (with ``summarised`` also the check and head metrics; otherwise
    ``summarise_run`` adds them in a second job)."""
    if not text.strip():
        raise HeadlightError("the text is empty; type or paste a text first")
    loaded = ctx.model(slot)
    ctx.progress(0, 2, "recording…")
    start = time.perf_counter()
    rec = loaded.record(text)
    seconds = time.perf_counter() - start
    ctx.check()
    from viewer.session.analysis import analyse

    result = analyse(
        rec,
        label=label,
        seconds=seconds,
        summarised=summarised,
        origin=origin or (loaded.name if slot != "main" else "text"),
    )
    result.units  # noqa: B018 - the text's words, here: 8,192 tokens' took the GUI thread 157 ms
    ctx.progress(2, 2, "recorded")
    return result


def summarise_run(ctx: JobContext, analysis: TextAnalysis) -> TextAnalysis:
    """Second step of a run: the re-derivation check and this text's head metrics."""
    from viewer.session.analysis import summarise

    ctx.progress(0, 0, "re-derivation check and head metrics…")
    return summarise(analysis, threads=1)  # the other core draws the run meanwhile


# -- text sets ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TextSetRow:
    index: int
    text: str
    label: str | None
    predicted: str | None
    confidence: float | None
    tokens: int

    @property
    def correct(self) -> bool | None:
        """Whether the prediction is the label; None without either (docs/definitions.md,
        "Accuracy": a set's labels are checked before its rows exist, so none is unknown)."""
        if self.label is None or self.predicted is None:
            return None
        return self.label == self.predicted


@dataclass(frozen=True, eq=False)
class TextSetResult:
    path: str
    rows: tuple[TextSetRow, ...]
    heads: Any  # HeadSummary over the whole set
    complete: bool = True
    scores: dict = field(default_factory=lambda: {"labelled": 0})  # reports' ``accuracy_data``
    source: Any = None  # the ``TextSource`` read (columns, split), when not the file's defaults
    _containing: dict[str, frozenset[int]] = field(default_factory=dict, init=False, repr=False)

    @property
    def mistakes(self) -> tuple[TextSetRow, ...]:
        return tuple(r for r in self.rows if r.correct is False)

    def items(self) -> list[Any]:
        """The set's texts as the reports read them (``TextItem``, numbered from 1)."""
        from viewer.reports.textsets import TextItem

        return [TextItem(r.text, r.label, r.index + 1) for r in self.rows]

    @property
    def accuracy(self) -> float | None:
        """The set's accuracy by the reports' one rule (``viewer.reports.predictions``), None
        for an unlabelled set or a model that is not a classifier."""
        return self.scores.get("accuracy")

    def containing(self, word: str) -> frozenset[int]:
        """Indices of the rows whose text contains ``word``, a word or phrase of the shortcut
        report (``viewer.core.words.contains``), kept for the next call."""
        found = self._containing.get(word)
        if found is None:
            from viewer.core.words import contains

            found = self._containing[word] = frozenset(r.index for r in self.rows if contains(r.text, word))
        return found

    def shown(self, mistakes_only: bool, word: str | None) -> list[TextSetRow]:
        """The rows the text-set list shows: all, or only the mistakes, or only the texts
        containing ``word``, or both."""
        having = None if word is None else self.containing(word)
        return [
            r
            for r in self.rows
            if (not mistakes_only or r.correct is False) and (having is None or r.index in having)
        ]


def run_textset(ctx: JobContext, slot: str, path: Any) -> TextSetResult:
    """Every text of a text-set file: prediction, correctness, and set-wide head metrics.

    One pass of the reports' own ``scan_text_set``: the head map's "text set" scope shows the
    numbers ``headlight heads`` prints for the same file, to the last bit. The labels are
    checked before the pass and the accuracy is the card's (``viewer.reports.predictions``).
    """
    from viewer.reports.heads import scan_text_set
    from viewer.reports.predictions import accuracy_data, set_labels
    from viewer.reports.textsets import as_source, load_text_set

    source = as_source(path)  # a path, or a TextSource naming its columns and split
    items = load_text_set(source)
    loaded = ctx.model(slot)
    gold = set_labels(loaded, items)  # a missing or unknown label is refused here, at once
    total = len(items)
    ctx.progress(0, total, f"recording {total} texts…")
    scan = scan_text_set(loaded, items, progress=ctx.counter("recorded texts"), cancelled=ctx.cancelled)
    classifier = loaded.head_kind == "classifier"
    rows = tuple(
        TextSetRow(
            index=p.index,
            text=item.text,
            label=item.label,
            predicted=p.label if classifier else None,
            confidence=p.confidence if classifier else None,
            tokens=p.tokens,
        )
        for p, item in zip(scan.rows, items, strict=True)
    )
    scores = accuracy_data(loaded.labels, gold, [p.predicted for p in scan.rows])
    return TextSetResult(str(source.path), rows, scan.heads, scores=scores, source=source)


# -- link pairs ---------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class LinkPairsRun:
    """An opened link-pairs file and the reports' own per-head accuracy over it."""

    path: str
    report: Any  # viewer.core.links.LinkAccuracy


def run_link_pairs(ctx: JobContext, slot: str, path: str) -> LinkPairsRun:
    """Per-head link accuracy and the nearest baseline over a link-pairs file."""
    from viewer.core.links import read_link_pairs
    from viewer.reports.links import link_report

    pairs = read_link_pairs(path)
    loaded = ctx.model(slot)
    return LinkPairsRun(
        str(path),
        link_report(loaded, pairs, progress=ctx.counter("scored link pairs"), cancelled=ctx.cancelled),
    )


# -- evidence -------------------------------------------------------------------------------------


def run_evidence(ctx: JobContext, slot: str, analysis: TextAnalysis) -> Any:
    """The evidence strip for the run of ``analysis`` (``viewer.reports.evidence.Evidence``),
    with this text's per-head importance and knockout effect, which the head map offers as
    metrics. Runs in stages so that a cancel takes effect between them."""
    import dataclasses

    from viewer.reports.evidence import HEAD_EVIDENCE_TOKENS, evidence_for, head_evidence

    loaded = ctx.model(slot)
    rec = analysis.recording
    ctx.progress(0, 3, "evidence: gradients, integrated gradients and knockout…")
    ev = evidence_for(loaded, rec.text, recording=rec)
    ctx.check()
    if ev.target is None:
        return ev
    if rec.n_tokens > HEAD_EVIDENCE_TOKENS:
        return dataclasses.replace(
            ev,
            notes=(
                *ev.notes,
                f"head importance and knockout are computed up to {HEAD_EVIDENCE_TOKENS} tokens",
            ),
        )
    ctx.progress(1, 3, f"head importance and knockout ({loaded.n_layers * loaded.n_heads} heads)…")
    importance, knockout = head_evidence(loaded, rec.text, tick=lambda _n=1: ctx.check())
    ctx.progress(3, 3, "evidence done")
    return dataclasses.replace(ev, head_importance=importance, head_knockout=knockout)


# -- shortcut search ------------------------------------------------------------------------------


def run_shortcuts(
    ctx: JobContext, slot: str, textset: TextSetResult, phrases: bool = True, exhaustive: bool = False
) -> Any:
    """The shortcut search (with ``phrases`` also two-word phrases) over the open text set, by
    the reports' own search (``viewer.reports.shortcuts.ShortcutReport``): screened, or every
    word knocked out with ``exhaustive``."""
    from viewer.reports.shortcuts import shortcut_search

    loaded = ctx.model(slot)
    items = textset.items()
    what = "word and two-word phrase" if phrases else "word"
    how = (
        f"knocking out every {what}" if exhaustive else f"screening every {what}, then confirming candidates"
    )
    ctx.progress(0, len(items), f"shortcut search: {how}…")
    return shortcut_search(
        loaded,
        items,
        progress=ctx.counter("shortcut search, texts"),
        cancelled=ctx.cancelled,
        phrases=phrases,
        exhaustive=exhaustive,
    )


def run_span_knockout(ctx: JobContext, slot: str, evidence: Any, first: int, last: int) -> Any:
    """``evidence`` with tokens ``first``..``last`` knocked out together
    (``viewer.reports.evidence.span_knockout``)."""
    import dataclasses

    from viewer.reports.evidence import span_knockout

    ctx.progress(0, 0, f"knocking out tokens {min(first, last)}–{max(first, last)} together…")
    return dataclasses.replace(evidence, span=span_knockout(ctx.model(slot), evidence, first, last))


def run_insertions(
    ctx: JobContext,
    slot: str,
    textset: TextSetResult,
    report: Any,
    words: tuple[str, ...],
    own: str | None = None,
) -> tuple[Any, dict[str, Any], str | None, str | None]:
    """The insertion test (``viewer.reports.insertion``) for each of ``words`` over the open
    text set, into the class knocking it out flips texts away from (read off the shortcut
    report's own per-class breakdown when it has the word, else found by its knockout); a phrase
    is inserted as the texts most often write it (``insertion_phrase``: "via portal" as "[via
    portal]"). A report word that points to no class is left out; ``own``, the user's own word
    or phrase (one of ``words``), is not: why it gives no result is returned. Returns
    (``report``, {word: InsertionReport}, ``own``, why ``own`` has no result or None): the
    shortcut report the words came from (None without a search), so that results of an older
    search are not shown beside a newer one."""
    from viewer.errors import HeadlightError
    from viewer.reports.insertion import insertion_phrase, insertion_test, searched_by_class

    loaded = ctx.model(slot)
    items = textset.items()
    results: dict[str, Any] = {}
    failed = None
    for k, word in enumerate(words):
        ctx.check()
        ctx.progress(k, len(words), f"insertion test: '{word}' ({k + 1} of {len(words)})")
        try:
            results[word] = insertion_test(
                loaded,
                items,
                insertion_phrase(items, word),
                cancelled=ctx.cancelled,
                by_class=None if report is None else searched_by_class(report, word),
            )
        except HeadlightError as exc:
            if word == own:
                failed = f"insertion test of '{own}': {exc}"
            continue  # e.g. knocking it out flips nothing: it points to no class
    lead = own if own in results else _strongest(report, results)
    if lead is not None and textset.scores.get("labelled"):
        ctx.progress(len(words), len(words), f"set accuracy without and with '{results[lead].phrase}'…")
        results[lead] = _with_cue_accuracy(loaded, items, results[lead], ctx)
    ctx.progress(len(words), len(words), "insertion tests done")
    return report, results, own, failed


def _strongest(report: Any, results: dict[str, Any]) -> str | None:
    """The shortcut report's strongest candidate (the card's rule,
    ``viewer.reports.card.strongest_candidate``) when it has an insertion result."""
    from viewer.reports.cue import strongest_candidate

    if report is None:
        return None
    best = strongest_candidate(report.to_dict(limit=1))
    return best["token"] if best is not None and best["token"] in results else None


def _with_cue_accuracy(loaded: Any, items: list, result: Any, ctx: JobContext) -> Any:
    """``result`` with the set's accuracy with its phrase removed and inserted
    (``viewer.reports.cue``, docs/definitions.md "Cue accuracy")."""
    import dataclasses

    from viewer.reports.cue import CueAccuracyKind, cue_accuracy_data
    from viewer.reports.shards import run_report

    counts = run_report(CueAccuracyKind(result.phrase), loaded, items, cancelled=ctx.cancelled)
    return dataclasses.replace(result, cue_accuracy=cue_accuracy_data(loaded.labels, result.phrase, counts))


def run_mechanism(
    ctx: JobContext, slot: str, textset: TextSetResult, report: Any, word: str, result: Any, heads: tuple
) -> tuple[Any, str, Any]:
    """The mechanism check (``viewer.reports.insertion.mechanism_test``): ``word``'s insertion
    test ``result`` rerun with ``heads`` knocked out. Returns (``report``, ``word``, the result
    with its check)."""
    from viewer.reports.insertion import heads_text, mechanism_test

    ctx.progress(0, 0, f"mechanism check: '{result.phrase}' without {heads_text(heads)}…")
    checked = mechanism_test(ctx.model(slot), textset.items(), result, heads, cancelled=ctx.cancelled)
    return report, word, checked


# -- card export ----------------------------------------------------------------------------------


def card_command(folder: str, texts: str, pairs: str | None, out: str, force: bool) -> tuple[str, ...]:
    """The ``headlight card`` command that writes the same folder as the window's export."""
    cmd = ["headlight", "card", folder, "--texts", texts]
    if pairs:
        cmd += ["--pairs", pairs]
    cmd += ["--out", out]
    if force:
        cmd.append("--force")
    return tuple(cmd)


def card_job(ctx: JobContext, slot: str, texts: str, pairs: str | None, out: str, force: bool) -> str:
    """``export_card`` with the window's open model; returns the folder written."""
    loaded = ctx.model(slot)
    ctx.progress(0, 0, "writing the model-card folder (check, heads, links, shortcuts)…")
    from viewer.session.exports import export_card

    command = card_command(str(loaded.folder), texts, pairs, out, force)
    path = export_card(loaded, texts, out, pairs_path=pairs, force=force, command=command, quiet=True)
    return str(path)
