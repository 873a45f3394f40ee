"""The pair-grid pane: the selected head's (or head mean's) attention over token pairs.

Hover a cell for its exact probability with both tokens and the head; click a cell to select
its query as the source token and its key as the target token; wheel to zoom, right-drag (or
Shift-drag) to pan, "fit" to see the whole text again.
"""

from __future__ import annotations

from PySide6.QtWidgets import QCheckBox, QPushButton

from viewer.figures.blit import Blitter
from viewer.figures.zoom import Extent, ZoomPan
from viewer.gui.panes.base import FigurePane


def _head_name(layer: int, head: int | None) -> str:
    return f"layer {layer} · head mean" if head is None else f"layer {layer} · head {head}"


class PairGridPane(FigurePane):
    title = "pair grid"
    schedule_delay_ms = 0

    def __init__(self, state, parent=None, *, slot: str = "analysis") -> None:
        super().__init__(state, parent)
        self.slot = slot  # "analysis" (the current run) or "compare"
        self.artists = None
        self._drawn_for = None  # the recording the axes were laid out for
        self.zoom = ZoomPan(both=True)
        self.mean_box = QCheckBox("head mean")
        self.mean_box.setToolTip("show the mean over all heads of the selected layer")
        self.mean_box.toggled.connect(self._mean_toggled)
        self.fit_button = QPushButton("fit")
        self.fit_button.setToolTip("show the whole text again after zooming (wheel) or panning")
        self.fit_button.clicked.connect(self._fit)
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
        self.request_draw(self.zoom.reset)

    # -- drawing --------------------------------------------------------------------------------
    def current_grid(self):
        a = self.analysis
        layer = min(self.state.layer, a.recording.n_layers - 1)
        head = self.state.head
        if head is not None:
            head = min(head, a.recording.n_heads - 1)
        return a.grid(layer, head), layer, head

    def render(self):
        a = self.analysis
        if a is None:
            self.set_title(self.title)
            return self._empty_text()
        rec = a.recording
        grid, layer, head = self.current_grid()
        name = _head_name(layer, head)
        model = self.state.model.name if self.state.model is not None else rec.model_name
        who = "compared: " + (a.origin or "second text") if self.slot == "compare" else model
        title = f"{who} · {name}"
        self.set_title(f"pair grid · {name} · {rec.n_tokens} tokens")
        source, target = self.state.source, self.state.target
        if source is None or source >= rec.n_tokens:
            source = target = None
        elif target is not None and target >= rec.n_tokens:
            target = None

        def build() -> None:  # render thread
            from viewer.figures.pair_grid import mark_cell, update_pair_grid, visible_cells

            visible = visible_cells(rec, layer)
            if self.artists is not None and self._drawn_for is rec:
                # same tokens: only image, title, colour bar and outline change — unless the
                # hatching behind masked cells appears or goes (a windowed layer next to a
                # global one): the background the blitter keeps has it or not
                hatched = self.artists.background.get_visible()
                update_pair_grid(self.artists, grid, visible=visible, title=title)
                self.fast = self.artists.background.get_visible() == hatched
            else:
                self._lay_out(rec.tokens, grid, visible, title)
            self._drawn_for = rec
            mark_cell(self.artists, source, target)

        return build

    def _lay_out(self, tokens, grid, visible, title) -> None:
        """Put ``tokens`` on the axes (render thread): reuse the axes when there are some."""
        from viewer.figures.pair_grid import pair_grid_into, retoken_pair_grid

        if self.artists is not None:  # laid out on this pane's one figure before
            retoken_pair_grid(self.artists, grid, tokens, visible=visible, title=title)
        else:
            if self.blitter is not None:
                self.blitter.detach()
            self.artists = pair_grid_into(self.figure, grid, tokens, visible=visible, title=title)
            # token labels and tick marks are painted by ``overlay_texts``: the same labels
            # and marks, in a fraction of the time matplotlib takes to lay out and draw ticks
            self.artists.ax.tick_params(labelbottom=False, labelleft=False, bottom=False, left=False)
            arts = self.artists
            self.blitter = Blitter(
                self.agg,
                [arts.image, arts.marker, arts.ax.title, arts.colorbar.ax if arts.colorbar else None],
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
        """The values the image currently holds (masked array), for tests and export."""
        return None if self.artists is None else self.artists.image.get_array()

    # -- mouse ------------------------------------------------------------------------------------
    def _cell(self, event):
        from viewer.figures.pair_grid import cell_at

        if self.artists is None or event.inaxes is not self.artists.ax:
            return None
        return cell_at(self.artists, event.xdata, event.ydata)

    def hover_at(self, event) -> str | None:
        cell = self._cell(event)
        if cell is None or self.analysis is None:
            return None
        row, col = cell
        rec = self.analysis.recording
        grid, layer, head = self.current_grid()
        if not rec.key_mask(layer)[row, col]:
            why = (
                "a causal query cannot see later keys"
                if rec.causal and col > row
                else "outside this layer's attention window"
            )
            value = f"masked ({why})"
        else:
            value = f"{float(grid[row, col]):.6f}"
        return (
            f"{_head_name(layer, head)}\nquery {row} '{rec.tokens[row]}' → "
            f"key {col} '{rec.tokens[col]}'\nattention probability {value}"
        )

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
            self.canvas.draw_idle()

    def on_release(self, event) -> None:
        self.zoom.end_drag()

    def on_scroll(self, event) -> None:
        if self.artists is None or event.inaxes is not self.artists.ax:
            return
        if self.zoom.zoom(event.xdata, event.ydata, event.step):
            self.canvas.draw_idle()
