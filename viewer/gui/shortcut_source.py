"""The shortcut search for the shortcut-report pane (worker thread, no Qt).

The search itself (word knockout over a text set, DESIGN.md "Word knockout") belongs to the
reports layer, shared with ``headlight shortcuts``; this module only calls it and packs the
ranking for the pane.
"""

from __future__ import annotations

import importlib.util
from dataclasses import dataclass
from typing import Any

from viewer.errors import HeadlightError
from viewer.gui.jobs import JobContext, TextSetResult


@dataclass(frozen=True, eq=False)
class ShortcutResult:
    texts: int
    min_count: int
    rows: tuple[dict[str, Any], ...]  # {token, count, flip_rate, flip_low, mean_drop, focus}
    phrase_rows: tuple[dict[str, Any], ...] = ()  # the same for two-word phrases, if searched
    phrases: bool = False  # whether phrases were searched


def available() -> bool:
    return importlib.util.find_spec("viewer.reports.shortcuts") is not None


def run(ctx: JobContext, slot: str, textset: TextSetResult,
        phrases: bool = False) -> ShortcutResult:
    if not available():
        raise HeadlightError("the shortcut search is not part of this build yet")
    from viewer.gui import shortcut_reports

    return shortcut_reports.run(ctx, ctx.model(slot), textset, phrases=phrases)
