"""The pair-grid pane: the selected head's (or head mean's) attention over token pairs.

Hover a cell for its exact probability with both tokens and the head; click a cell to select
its query as the source token and its key as the target token; wheel to zoom, right-drag (or
Shift-drag) to pan, "fit" to see the whole text again.

A text longer than ``DENSE_TOKENS`` tokens is shown as an overview (``viewer.session.pair_view``):
blocks of c × c tokens, each its block max or block mean (the chooser in the header), named in
the header and the figure's title. Zoomed in to at most ``EXACT_CELLS`` rows and columns, the
view shows the exact cells instead. Overviews that the summary pass has not stored yet and exact
cells are computed by the pane's own worker thread (``computer``), never on the GUI thread; the
pane keeps showing what it drew until they arrive, and says in its header what it is computing.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from PySide6.QtWidgets import QCheckBox, QComboBox, QPushButton

from viewer.figures.blit import Blitter
from viewer.figures.zoom import Extent, ZoomPan
from viewer.gui.panes.base import FigurePane
from viewer.session.state import BLOCK_MODES


def _head_name(layer: int, head: int | None) -> str:
    return f"layer {layer} · head mean" if head is None else f"layer {layer} · head {head}"


@dataclass(frozen=True, eq=False)
class Shown:
    """What the figure shows (set on the render thread, read by hover on the GUI thread)."""

    analysis: Any  # TextAnalysis
    layer: int
    head: int | None
    overview: Any  # Overview of a long text whose blocks are shown, else None


class PairGridPane(FigurePane):
    title = "pair grid"
    schedule_delay_ms = 0

    def __init__(self, state, parent=None, *, slot: str = "analysis") -> None:
        super().__init__(state, parent)
        self.slot = slot  # "analysis" (the current run) or "compare"
        self.artists = None
        self._drawn_for = None  # the recording the axes were laid out for
        self._drawn_view = None  # the view (rows, cols) of the last full draw
        self.shown: Shown | None = None
        self.zoom = ZoomPan(both=True)
        self.computer = None  # Worker for overviews and exact cells of long texts (first use)
        self.exact = None  # the last ExactCells computed
        self._asked: dict[str, tuple] = {}  # kind -> what is being computed
        self._view = None  # (rows, cols) of tokens in view when zoomed; the GUI thread's copy
        self._view_for = None  # the recording ``_view`` belongs to
        self._fit_pending = False
        self.block_box = QComboBox()
        for mode, label in BLOCK_MODES.items():
            self.block_box.addItem(label, mode)
        self.block_box.setToolTip(
            "a long text is shown in blocks of tokens: each block's largest probability (block "
            "max: a single strong link stays visible) or the mean over its visible cells "
            "(block mean: where the attention goes); zoom in for exact cells"
        )
        self.block_box.currentIndexChanged.connect(lambda _i: self.schedule())
        self.block_box.setVisible(False)
        self.mean_box = QCheckBox("head mean")
        self.mean_box.setToolTip("show the mean over all heads of the selected layer")
        self.mean_box.toggled.connect(self._mean_toggled)
        self.fit_button = QPushButton("fit")
        self.fit_button.setToolTip("show the whole text again after zooming (wheel) or panning")
        self.fit_button.clicked.connect(self._fit)
        self.header.addWidget(self.block_box)
        self.header.addWidget(self.mean_box)
        self.header.addWidget(self.fit_button)
        self.observe(slot, "layer", "head", "source", "target")
        self.listen("head", self._sync_mean_box)
        self.message.setText(self._empty_text())

    def _empty_text(self) -> str:
        if self.slot == "compare":
            return "Nothing to compare yet: give a second text or checkpoint above."
        return "Run a text (Ctrl+Enter) to see which tokens each head attends to."

    @property
    def analysis(self):
        return getattr(self.state, self.slot)

    @property
    def block_mode(self) -> str:
        """ "max" or "mean": what an overview's blocks show."""
        return self.block_box.currentData()

    def _sync_mean_box(self, head) -> None:
        self.mean_box.blockSignals(True)
        self.mean_box.setChecked(head is None)
        self.mean_box.blockSignals(False)

    # -- writes to the state ---------------------------------------------------------------------
    def _mean_toggled(self, checked: bool) -> None:
        if checked and self.state.head is not None:
            self.state.select_head(self.state.layer, None)
        elif not checked and self.state.head is None:
            self.state.select_head(self.state.layer, 0)

    def _fit(self) -> None:
        self._view = None
        self._fit_pending = True
        self.schedule()

    # -- computing off the GUI thread -------------------------------------------------------------
    @property
    def idle(self) -> bool:
        """Nothing scheduled, drawn or computed: the view shows the current selection."""
        return super().idle and not self._asked

    def _compute(self, kind: str, fn, *args) -> None:
        """Have the pane's worker run ``fn(ctx, *args)`` unless it is at it already; a new job
        of the same kind replaces (cancels) the one in progress."""
        if self._asked.get(kind) == args:
            return
        if self.computer is None:
            from viewer.gui.worker import Worker

            self.computer = Worker(self)
            self.computer.finished.connect(self._computed)
            self.computer.failed.connect(self._compute_failed)
            self.computer.cancelled.connect(lambda kind: None)
        self._asked[kind] = args
        self.computer.submit(kind, fn, *args)

    def _computed(self, kind: str, result) -> None:
        self._asked.pop(kind, None)
        if kind == "cells":
            self.exact = result
        self.schedule()

    def _compute_failed(self, kind: str, message: str) -> None:
        self._asked.pop(kind, None)
        self.show_message(
            f"could not compute the {'overview' if kind == 'overview' else 'exact cells'}: {message}"
        )

    def detach(self) -> None:
        if self.computer is not None:
            self.computer.cancel()
        super().detach()

    # -- drawing --------------------------------------------------------------------------------
    def selected(self) -> tuple[int, int | None]:
        """(layer, head) of the selection, within the current recording's size."""
        rec = self.analysis.recording
        layer = min(self.state.layer, rec.n_layers - 1)
        head = self.state.head
        if head is not None:
            head = min(head, rec.n_heads - 1)
        return layer, head

    def render(self):
        a = self.analysis
        if a is None:
            self.set_title(self.title)
            self.block_box.setVisible(False)
            return self._empty_text()
        rec = a.recording
        layer, head = self.selected()
        name = _head_name(layer, head)
        model = self.state.model.name if self.state.model is not None else rec.model_name
        who = "compared: " + (a.origin or "second text") if self.slot == "compare" else model
        source, target = self.state.source, self.state.target
        if source is None or source >= rec.n_tokens:
            source = target = None
        elif target is not None and target >= rec.n_tokens:
            target = None
        if self._view_for is not rec:  # a new text is shown whole
            self._view, self._view_for, self.exact = None, rec, None
        view = self._view
        reset, self._fit_pending = self._fit_pending, False
        self.block_box.setVisible(not a.dense)
        if a.dense:
            return self._render_cells(a, layer, head, name, who, source, target, view, reset)
        return self._render_overview(a, layer, head, name, who, source, target, view, reset)

    def _render_cells(self, a, layer, head, name, who, source, target, view, reset):
        from viewer.figures.style import ATTENTION_UNITS

        rec = a.recording
        title = f"{who} · {name}"
        self.set_title(f"pair grid · {name} · {rec.n_tokens} tokens")

        def build() -> None:  # render thread
            from viewer.figures.pair_grid import visible_cells

            grid = a.grid(layer, head)  # computed here (render thread) when first asked for
            self._draw(rec, grid, visible_cells(rec, layer), title, ATTENTION_UNITS, 1, view, reset)
            self.shown = Shown(a, layer, head, None)
            self._mark(source, target)

        return build

    def _render_overview(self, a, layer, head, name, who, source, target, view, reset):
        import numpy as np

        from viewer.figures.style import ATTENTION_UNITS
        from viewer.session import pair_view

        rec = a.recording
        t = rec.n_tokens
        overview = a.cached_overview(layer, head)
        if overview is None:  # the summary pass has not reached this layer: compute it now
            self._compute("overview", pair_view.overview_job, a, layer, head)
            self.set_title(f"pair grid · {name} · {t:,} tokens · computing the overview…")
            if self._drawn_for is not rec:
                return f"computing the overview of {name} ({t:,} tokens)…"
            return None  # the figure keeps what it shows (its own title says what) until then
        mode = self.block_mode
        exact = None
        region = None if view is None else pair_view.exact_region(*view, t)
        if region is not None:
            e = self.exact
            if e is not None and e.covers(rec, layer, head, *view):
                exact = e
            else:
                self._compute("cells", pair_view.cells_job, a, layer, head, *region)
        else:
            self._asked.pop("cells", None)
            if self.computer is not None:
                self.computer.cancel("cells")
        if exact is not None:
            what, units = "exact cells", ATTENTION_UNITS
        else:
            what, units = pair_view.overview_label(overview, mode), pair_view.overview_units(mode)
        waiting = " · computing exact cells…" if region is not None and exact is None else ""
        self.set_title(f"pair grid · {name} · {t:,} tokens · {what}{waiting}")
        title = f"{who} · {name} · {what}"
        values = pair_view.block_values(overview, mode)
        visible = np.isfinite(values)
        visible = None if visible.all() else visible

        def build() -> None:  # render thread
            from viewer.figures.pair_grid import show_exact

            self._draw(rec, values, visible, title, units, overview.size, view, reset)
            if exact is not None:
                hatched = self.artists.background.get_visible()
                show_exact(self.artists, exact.values, exact.rows, exact.cols, visible=exact.visible)
                self.fast = self.fast and self.artists.background.get_visible() == hatched
            self.shown = Shown(a, layer, head, None if exact is not None else overview)
            self._mark(source, target)

        return build

    def _draw(self, rec, values, visible, title, units, block, view, reset) -> None:
        """Show ``values`` (render thread): in place when the same text is laid out, else lay
        it out; sets ``fast`` when only the blitter's artists changed."""
        from viewer.figures.pair_grid import update_pair_grid

        if reset:
            self.zoom.reset()
        if self.artists is not None and self._drawn_for is rec:
            # same tokens: only image, title, colour bar and outline change — unless the
            # hatching behind masked cells appears or goes (a windowed layer next to a
            # global one): the background the blitter keeps has it or not; or the view moved
            hatched = self.artists.background.get_visible()
            update_pair_grid(self.artists, values, visible=visible, title=title, units=units)
            self.fast = (
                self.artists.background.get_visible() == hatched and view == self._drawn_view and not reset
            )
        else:
            self._lay_out(rec.tokens, values, visible, title, units, block)
        self._drawn_for = rec
        self._drawn_view = view

    def _mark(self, source, target) -> None:
        from viewer.figures.pair_grid import mark_cell

        mark_cell(self.artists, source, target)

    def _lay_out(self, tokens, grid, visible, title, units, block) -> None:
        """Put ``tokens`` on the axes (render thread): reuse the axes when there are some."""
        from viewer.figures.pair_grid import pair_grid_into, retoken_pair_grid

        numbered = block > 1  # a long text: positions before the tokens on the axes
        kwargs = {"visible": visible, "title": title, "units": units, "block": block, "numbered": numbered}
        if self.artists is not None:  # laid out on this pane's one figure before
            retoken_pair_grid(self.artists, grid, tokens, **kwargs)
        else:
            if self.blitter is not None:
                self.blitter.detach()
            self.artists = pair_grid_into(self.figure, grid, tokens, **kwargs)
            # token labels and tick marks are painted by ``overlay_texts``: the same labels
            # and marks, in a fraction of the time matplotlib takes to lay out and draw ticks
            self.artists.ax.tick_params(labelbottom=False, labelleft=False, bottom=False, left=False)
            arts = self.artists
            self.blitter = Blitter(
                self.agg,
                [
                    arts.image,
                    arts.exact,
                    arts.marker,
                    arts.title,
                    arts.colorbar.ax if arts.colorbar else None,
                ],
            )
        n = len(tokens)
        self.zoom.attach(self.artists.ax, Extent(-0.5, n - 0.5, -0.5, n - 0.5))

    def overlay_texts(self) -> list:
        from viewer.gui.panes.render import token_axis_items

        if self.artists is None:
            return []
        return token_axis_items(self.artists.ax, "x") + token_axis_items(self.artists.ax, "y")

    @property
    def drawn_recording(self):
        """The recording the figure shows (read on the GUI thread once the pane is idle)."""
        return self._drawn_for

    def displayed_values(self):
        """The values the image currently holds (masked array), for tests and export: the cells,
        an overview's blocks, or the exact cells shown in their place."""
        if self.artists is None:
            return None
        if self.artists.exact_span is not None:
            return self.artists.exact.get_array()
        return self.artists.image.get_array()

    # -- mouse ------------------------------------------------------------------------------------
    def _cell(self, event):
        from viewer.figures.pair_grid import cell_at

        if self.artists is None or event.inaxes is not self.artists.ax:
            return None
        return cell_at(self.artists, event.xdata, event.ydata)

    def hover_at(self, event) -> str | None:
        from viewer.session.pair_view import describe_cell

        cell = self._cell(event)
        shown = self.shown
        if cell is None or shown is None or shown.analysis.recording is not self._drawn_for:
            return None
        return describe_cell(shown.analysis, shown.layer, shown.head, *cell, overview=shown.overview)

    def on_press(self, event) -> None:
        shift = bool(event.key and "shift" in str(event.key))
        if event.button in (2, 3) or (event.button == 1 and shift):
            if self.artists is not None and event.inaxes is self.artists.ax:
                self.zoom.start_drag(event.x, event.y)
            return
        if event.button == 1 and self.slot == "analysis":
            cell = self._cell(event)
            if cell is not None:
                self.state.select_tokens(cell[0], cell[1])

    def on_motion(self, event) -> None:
        if self.zoom.dragging and self.zoom.drag_to(event.x, event.y):
            self._view_changed()

    def on_release(self, event) -> None:
        self.zoom.end_drag()

    def on_scroll(self, event) -> None:
        if self.artists is None or event.inaxes is not self.artists.ax:
            return
        if self.zoom.zoom(event.xdata, event.ydata, event.step):
            self._view_changed()

    def _view_changed(self) -> None:
        """The axes' limits moved (wheel or drag, GUI thread, between frames): keep the tokens
        in view, and redraw — with exact cells when a long text's view is small enough."""
        from viewer.session.pair_view import view_span

        arts = self.artists
        if self.zoom.zoomed:
            x0, x1 = arts.ax.get_xlim()
            y0, y1 = arts.ax.get_ylim()
            self._view = (view_span(y0, y1, arts.n_rows), view_span(x0, x1, arts.n_cols))
        else:
            self._view = None
        self.schedule()
