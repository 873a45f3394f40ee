"""What the pair grid shows of a text, decided without Qt: cells, an overview, or exact cells of a
zoomed part, and what a hovered cell holds.

A text of up to ``DENSE_TOKENS`` tokens is drawn cell by cell. A longer one is drawn as the
*overview* of the selected head or head mean (``viewer.core.overview``: blocks of c × c tokens,
each showing its block max or its block mean over the visible cells). Once the view is zoomed in
so far that at most ``EXACT_CELLS`` query rows and ``EXACT_CELLS`` key columns are visible, the
exact cells of that part are computed (``exact_cells``) and drawn in place of the blocks. A
hovered cell's value is always exact: its query row is computed on demand (``describe_cell``).

Overviews and exact cells take from a fraction of a second to several seconds at 8,192 tokens, so
the pane runs ``overview_job`` and ``cells_job`` off the GUI thread (their ``ctx`` is a
``viewer.session.jobs.JobContext``: ``ctx.check()`` ends a job the user has moved on from).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from viewer.core.overview import Overview
from viewer.core.recording import Recording
from viewer.core.terms import visible_rows
from viewer.figures.style import ATTENTION_UNITS, head_name
from viewer.session.state import BLOCK_MODES

EXACT_CELLS = 512
"""A zoomed view of a long text shows exact cells once it spans at most this many query rows and
key columns. 512 rows of one head of a global layer at 8,192 tokens are 4 M scores, about 0.15 s
(the head mean twelve times that), measured on the ModernBERT-sized model of
``tests/benchmarks/bench_long.py``; and 512 cells across a pane of about 700 pixels are at least a
pixel each, so every cell is seen."""

MARGIN = 0.25
"""Exact cells are computed for the view widened by this share of its span on each side, so a
small pan stays inside what is computed."""


def view_span(lo: float, hi: float, n_tokens: int) -> slice:
    """The tokens whose cells an axis range [lo, hi] shows at least in part (token i covers
    [i − 0.5, i + 0.5] on a pair-grid axis)."""
    lo, hi = sorted((lo, hi))
    start = max(0, math.floor(lo + 0.5))
    stop = min(n_tokens, math.ceil(hi + 0.5))
    return slice(start, max(start, stop))


def _widen(span: slice, n_tokens: int) -> slice:
    more = int((span.stop - span.start) * MARGIN)
    return slice(max(0, span.start - more), min(n_tokens, span.stop + more))


def exact_region(rows: slice, cols: slice, n_tokens: int) -> tuple[slice, slice] | None:
    """The query rows and key columns to compute exactly for a view of ``rows`` × ``cols``, or
    None when the view is too large for exact cells (``EXACT_CELLS``)."""
    if rows.stop - rows.start > EXACT_CELLS or cols.stop - cols.start > EXACT_CELLS:
        return None
    return _widen(rows, n_tokens), _widen(cols, n_tokens)


def _inside(inner: slice, outer: slice) -> bool:
    return outer.start <= inner.start and inner.stop <= outer.stop


@dataclass(frozen=True, eq=False)
class ExactCells:
    """Exact attention of one head (or the head mean) over a part of a long text's grid."""

    recording: Recording
    layer: int
    head: int | None
    rows: slice  # query tokens
    cols: slice  # key tokens
    values: np.ndarray  # (rows, cols) float32
    visible: np.ndarray | None  # (rows, cols) bool, None when every cell is visible

    def covers(self, recording: Recording, layer: int, head: int | None, rows: slice, cols: slice) -> bool:
        """Whether these cells hold the whole view ``rows`` × ``cols`` of that selection."""
        return (
            recording is self.recording
            and (layer, head) == (self.layer, self.head)
            and _inside(rows, self.rows)
            and _inside(cols, self.cols)
        )


def exact_cells(analysis, layer: int, head: int | None, rows: slice, cols: slice, tick=None) -> ExactCells:
    """The exact cells of ``rows`` × ``cols`` (``TextAnalysis.cells``, by blocks of rows) and
    which of them a query sees (``TextAnalysis.visible``)."""
    values = analysis.cells(layer, head, rows, cols, tick=tick)
    return ExactCells(
        analysis.recording, layer, head, rows, cols, values, analysis.visible(layer, rows, cols)
    )


def overview_job(ctx, analysis, layer: int, head: int | None) -> Overview:
    """The overview of one head or the head mean (kept in ``analysis``), off the GUI thread."""
    return analysis.overview(layer, head, tick=ctx.check)


def cells_job(ctx, analysis, layer: int, head: int | None, rows: slice, cols: slice) -> ExactCells:
    """Exact cells of a zoomed part, off the GUI thread."""
    return exact_cells(analysis, layer, head, rows, cols, tick=ctx.check)


def block_values(overview: Overview, mode: str) -> np.ndarray:
    """(n, n) float32 the overview's block max or block mean (NaN: a block with no visible cell)."""
    return (overview.maximum if mode == "max" else overview.mean)[0]


def overview_label(overview: Overview, mode: str) -> str:
    """What a drawn overview shows, e.g. "block max over 32 × 32 tokens"."""
    c = overview.size
    return f"{BLOCK_MODES[mode]} over {c} × {c} tokens"


def overview_units(mode: str) -> str:
    """The colour bar's units for an overview."""
    return f"{ATTENTION_UNITS}, {BLOCK_MODES[mode]}"


def masked_reason(rec: Recording, layer: int, i: int, j: int) -> str | None:
    """Why query i cannot see key j in ``layer`` (causal rule or window), or None if it can."""
    seen = visible_rows(slice(i, i + 1), rec.n_tokens, rec.causal, rec.terms.layer_window(layer))
    if seen is None or seen[0, j]:
        return None
    if rec.causal and j > i:
        return "a causal query cannot see later keys"
    return "outside this layer's attention window"


def describe_cell(
    analysis, layer: int, head: int | None, i: int, j: int, overview: Overview | None = None
) -> str:
    """The hover text of cell (query i, key j): both tokens, the exact probability from query
    row i (one row, computed when asked: ``TextAnalysis.row``), and for an overview the block's
    max and mean."""
    rec = analysis.recording
    reason = masked_reason(rec, layer, i, j)
    value = f"masked ({reason})" if reason else f"{float(analysis.row(layer, head, i)[j]):.6f}"
    lines = [
        head_name(layer, head),
        f"query {i} '{rec.tokens[i]}' → key {j} '{rec.tokens[j]}'",
        f"attention probability {value}",
    ]
    if overview is not None:
        c = overview.size
        bi, bj = i // c, j // c
        top, left = bi * c, bj * c
        rows = f"queries {top}–{min(top + c, rec.n_tokens) - 1}"
        keys = f"keys {left}–{min(left + c, rec.n_tokens) - 1}"
        peak, mean = float(overview.maximum[0, bi, bj]), float(overview.mean[0, bi, bj])
        if math.isnan(peak):
            lines.append(f"block of {rows}, {keys}: no visible cell")
        else:
            lines.append(f"block of {rows}, {keys}: block max {peak:.6f} · block mean {mean:.6f}")
    return "\n".join(lines)
