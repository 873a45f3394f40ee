"""Run ``viewer.reports.shortcuts.shortcut_search`` for the window (worker thread, no Qt)."""

from __future__ import annotations

from typing import Any

from viewer.core.shortcuts import MIN_TEXTS
from viewer.gui.jobs import JobContext, TextSetResult
from viewer.gui.shortcut_source import ShortcutResult


def run(ctx: JobContext, loaded: Any, textset: TextSetResult) -> ShortcutResult:
    from viewer.reports.shortcuts import shortcut_search
    from viewer.reports.textsets import TextItem

    items = [TextItem(r.text, r.label, r.index + 1) for r in textset.rows]
    done = [0]

    def tick(n: int) -> None:
        done[0] += n
        ctx.progress(done[0], len(items), f"shortcut search: {done[0]} of {len(items)} texts")
        ctx.check()

    ctx.progress(0, len(items), "shortcut search: knocking out every word…")
    report = shortcut_search(loaded, items, progress=tick, phrases=False)
    return ShortcutResult(texts=report.texts, min_count=MIN_TEXTS,
                          rows=tuple(report.words.ranking()))
