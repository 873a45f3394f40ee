"""Run ``viewer.reports.shortcuts.shortcut_search`` for the window (worker thread, no Qt)."""

from __future__ import annotations

from typing import Any

from viewer.core.shortcuts import MIN_TEXTS
from viewer.gui.jobs import JobContext, TextSetResult
from viewer.gui.shortcut_source import ShortcutResult


def run(ctx: JobContext, loaded: Any, textset: TextSetResult,
        phrases: bool = False) -> ShortcutResult:
    """Word knockout (and with ``phrases`` two-word phrase knockout) over the text set."""
    from viewer.reports.shortcuts import shortcut_search
    from viewer.reports.textsets import TextItem

    items = [TextItem(r.text, r.label, r.index + 1) for r in textset.rows]
    done = [0]

    def tick(n: int) -> None:
        done[0] += n
        ctx.progress(done[0], len(items), f"shortcut search: {done[0]} of {len(items)} texts")
        ctx.check()

    what = "word and two-word phrase" if phrases else "word"
    ctx.progress(0, len(items), f"shortcut search: knocking out every {what}…")
    report = shortcut_search(loaded, items, progress=tick, phrases=phrases)
    return ShortcutResult(texts=report.texts, min_count=MIN_TEXTS,
                          rows=tuple(report.words.ranking()),
                          phrase_rows=tuple(report.phrases.ranking()) if phrases else (),
                          phrases=phrases)
