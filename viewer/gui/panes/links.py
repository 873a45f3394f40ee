"""The links pane: where the selected source word's attention goes, and each head's link score.

Left, the words the selected head (or head mean) links the source to most strongly; right, the
link score from the source to the selected target in every head (click a cell to select that
head, click a bar to make its word the target). With a link-pairs file open, the "link-pairs
file" view shows per-head accuracy against the nearest baseline.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from PySide6.QtWidgets import QComboBox

from viewer.gui.panes.base import FigurePane

if TYPE_CHECKING:
    import numpy as np


class LinksPane(FigurePane):
    title = "links"

    def __init__(self, state, parent=None) -> None:
        super().__init__(state, parent)
        self.artists = None
        self._drawn_for = None  # (recording, source unit, target unit) the figure shows
        self.accuracy_artists = None
        self.scores: np.ndarray | None = None  # (K units,) bars' data for the selected head
        self.per_head: np.ndarray | None = None  # (L, H) link score source → target
        self.view_box = QComboBox()
        self.view_box.addItem("this text", "text")
        self.view_box.addItem("link-pairs file", "file")
        self.view_box.setToolTip("links in this text, or per-head accuracy over a link-pairs file")
        self.view_box.currentIndexChanged.connect(lambda _i: self.schedule())
        self.view_box.setVisible(False)
        self.header.addWidget(self.view_box)
        self.observe("analysis", "layer", "head", "source", "target", "link_pairs")
        self.listen("link_pairs", self._pairs_changed)
        self.message.setText("Run a text, then click a pair-grid cell to pick a source token.")

    def _pairs_changed(self, result) -> None:
        self.view_box.setVisible(result is not None)
        if result is not None:
            self.view_box.setCurrentIndex(1)

    def render(self):
        from viewer.figures.style import head_name
        from viewer.session.views import link_view

        run = self.state.link_pairs
        if run is not None and self.view_box.currentData() == "file":
            pairs = run.report  # viewer.core.links.LinkAccuracy
            self.set_title(f"links · accuracy over {pairs.pairs} pairs")
            selected = (self.state.layer, self.state.head)

            def build_accuracy() -> None:  # render thread
                from viewer.figures.links import accuracy_into

                self.scores = self.per_head = None
                self.artists = self._drawn_for = None
                self.accuracy_artists = accuracy_into(
                    self.figure,
                    pairs.accuracy,
                    nearest_baseline=pairs.nearest_baseline,
                    pairs=pairs.pairs,
                    selected=selected,
                )

            return build_accuracy
        a = self.state.analysis
        if a is None:
            return "Run a text, then click a pair-grid cell to pick a source token."
        s, t = self.state.source, self.state.target
        n = a.recording.n_tokens
        if s is None or s >= n:
            return (
                "Click a pair-grid cell: its row becomes the source token and its column "
                "the target. Links show where the source's word attends."
            )
        layer, head = self.state.layer, self.state.head
        u = a.units
        names = u.names
        source_unit = u.unit_of(s)
        target_unit = None if t is None or t >= n else u.unit_of(t)
        head_title, source_name = head_name(layer, head), names[source_unit]
        self.set_title(f"links · from '{source_name}'")

        # what the figure's layout and per-head map depend on: the same for another head
        drawn_for = (a.recording, source_unit, target_unit)

        def build() -> None:  # render thread
            from viewer.figures.links import links_into, relink

            # rows of attention from the source: every layer's for the per-head scores, which
            # at thousands of tokens take the GUI thread far over 100 ms, so they are read here
            view = link_view(a, layer, head, s, t)
            scores, per_head = view.scores, view.per_head
            same = self.artists is not None and self._drawn_for == drawn_for
            self.scores, self.per_head = scores, per_head
            self.accuracy_artists = None
            if same:  # another head: new bars and outline, the axes and ticks stay
                relink(
                    self.artists,
                    names,
                    scores,
                    per_head_to_target=per_head,
                    target=target_unit,
                    source_name=source_name,
                    head_title=head_title,
                    selected=(layer, head),
                    exclude=None,
                )
            else:
                self.artists = links_into(
                    self.figure,
                    names,
                    scores,
                    per_head_to_target=per_head,
                    target=target_unit,
                    source_name=source_name,
                    target_name=view.target_name,
                    head_title=head_title,
                    selected=(layer, head),
                    exclude=None,
                )
            self._drawn_for = drawn_for

        return build

    # -- mouse ------------------------------------------------------------------------------------
    def _map_head(self, event):
        from viewer.figures.head_map import head_at

        arts = self.artists.map_artists if self.artists is not None else self.accuracy_artists
        if arts is None or event.inaxes is not arts.ax:
            return None
        return head_at(arts, event.xdata, event.ydata)

    def _bar(self, event) -> int | None:
        if self.artists is None or event.inaxes is not self.artists.bars_ax:
            return None
        row = int(round(event.ydata))
        shown = self.artists.shown
        return shown[row] if 0 <= row < len(shown) else None

    def hover_at(self, event) -> str | None:
        cell = self._map_head(event)
        if cell is not None:
            layer, head = cell
            if self.per_head is not None:
                return f"layer {layer} · head {head}\nlink score {self.per_head[layer, head]:.6f}"
            run = self.state.link_pairs
            if run is not None:
                return (
                    f"layer {layer} · head {head}\nlink accuracy "
                    f"{run.report.accuracy[layer, head]:.3f} (nearest baseline "
                    f"{run.report.nearest_baseline:.3f})"
                )
        unit = self._bar(event)
        if unit is not None and self.scores is not None:
            name = self.state.analysis.units.names[unit]
            return f"'{name}': link score {self.scores[unit]:.6f}\nclick to make it the target"
        return None

    def on_press(self, event) -> None:
        if event.button != 1:
            return
        cell = self._map_head(event)
        if cell is not None:
            self.state.select_head(*cell)
            return
        unit = self._bar(event)
        if unit is not None:
            first = int(self.state.analysis.units.tokens[unit][0])
            self.state.select_tokens(self.state.source, first)
