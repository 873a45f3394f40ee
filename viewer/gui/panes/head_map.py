"""The head-map pane: every layer × head coloured by the chosen metric.

Click a cell to select that head; click a row's "layer n" label to select the layer's head mean.
The metric chooser lists every metric; those that cannot be shown yet say why in the pane.
"""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QCheckBox, QComboBox

from viewer.figures.blit import Blitter
from viewer.gui.panes.base import FigurePane
from viewer.session.state import HEAD_MAP_METRICS

ANNOTATE_CELLS = 48  # write values into the cells of small head maps only


class HeadMapPane(FigurePane):
    title = "head map"

    def __init__(self, state, parent=None) -> None:
        super().__init__(state, parent)
        self.artists = None
        self.shown = None  # the HeadValues drawn last
        self._key = None
        self.metric_box = QComboBox()
        for name, (label, _units, explanation) in HEAD_MAP_METRICS.items():
            self.metric_box.addItem(label, name)
            self.metric_box.setItemData(self.metric_box.count() - 1, explanation, Qt.ItemDataRole.ToolTipRole)
        self.metric_box.setToolTip("metric that colours the head map")
        self.metric_box.currentIndexChanged.connect(self._metric_chosen)
        self.scope_box = QComboBox()
        self.scope_box.addItem("this text", "text")
        self.scope_box.addItem("text set", "set")
        self.scope_box.setToolTip("this text, or the mean over every text of the open text set")
        self.scope_box.currentIndexChanged.connect(self._scope_chosen)
        self.diff_box = QCheckBox("compared − current")
        self.diff_box.setToolTip("show the metric of the compared run minus this run")
        self.diff_box.toggled.connect(self.state.set_difference)
        for box in (self.metric_box, self.scope_box):
            box.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToContents)
        self.header.addWidget(self.metric_box)
        self.header.addWidget(self.scope_box)
        self.header.addWidget(self.diff_box)
        self.observe("analysis", "evidence", "layer", "head", "source", "target", "textset", "compare")
        for name in ("metric", "scope", "difference", "textset", "compare"):
            self.listen(name, lambda _v: self._sync_controls())
            self.listen(name, lambda _v: self.schedule())
        self._sync_controls()
        self.message.setText("Run a text (Ctrl+Enter) to see a metric for every head.")

    def resized(self, width: int, height: int, ratio: float) -> None:
        super().resized(width, height, ratio)
        self.schedule()  # whether values fit into the cells depends on the size

    def _metric_chosen(self, index: int) -> None:
        self.state.set_metric(self.metric_box.itemData(index))

    def _scope_chosen(self, index: int) -> None:
        self.state.set_scope(self.scope_box.itemData(index))

    def _sync_controls(self) -> None:
        for box, value in ((self.metric_box, self.state.metric), (self.scope_box, self.state.scope)):
            box.blockSignals(True)
            box.setCurrentIndex(max(0, box.findData(value)))
            box.blockSignals(False)
        has_set = self.state.textset is not None
        self.scope_box.setEnabled(has_set)
        if has_set:
            self.scope_box.setItemText(1, f"text set ({len(self.state.textset.rows)})")
        self.diff_box.blockSignals(True)
        self.diff_box.setChecked(self.state.difference)
        self.diff_box.blockSignals(False)
        self.diff_box.setVisible(self.state.compare is not None)

    def render(self):
        from viewer.session.metrics import head_values

        result = head_values(self.state)
        if isinstance(result, str):
            # the figure keeps its artists (and ``shown``) for the next values of this kind
            self.set_title(self.title)
            return result
        selected = (self.state.layer, self.state.head)
        width, height = self.size_inches
        n_layers, n_heads = result.values.shape
        annotate = (
            n_layers * n_heads <= ANNOTATE_CELLS
            and (width - 1.6) / n_heads >= 0.36
            and (height - 0.6) / n_layers >= 0.2
        )
        key = (result.label, result.diverging, annotate)
        self.set_title(f"head map · {result.title}")

        def build() -> None:  # render thread
            import numpy as np

            from viewer.figures.head_map import head_map_into, mark_head, update_head_map

            same_kind = (
                self.shown is not None
                and self.artists is not None
                and self._key == key
                and self.shown.values.shape == result.values.shape
            )
            if same_kind and np.array_equal(self.shown.values, result.values, equal_nan=True):
                mark_head(self.artists, selected)  # only the selection moved
                self.fast = True
                return
            self.shown = result
            if same_kind:  # another text or metric of the same kind: new values in place
                update_head_map(self.artists, result.values)
                mark_head(self.artists, selected)
                return
            self._key = key
            if self.blitter is not None:
                self.blitter.detach()
            self.artists = head_map_into(
                self.figure,
                result.values,
                label=result.label,
                diverging=result.diverging,
                selected=selected,
                annotate=annotate,
            )
            self.blitter = Blitter(self.agg, [self.artists.marker])

        return build

    def displayed_values(self):
        return None if self.artists is None else self.artists.image.get_array()

    # -- mouse ------------------------------------------------------------------------------------
    def _head(self, event):
        from viewer.figures.head_map import head_at

        if self.artists is None or event.inaxes is not self.artists.ax:
            return None
        return head_at(self.artists, event.xdata, event.ydata)

    def _row_label(self, event) -> int | None:
        """Layer whose row label lies under the cursor (left of the grid), or None."""
        if self.artists is None or event.inaxes is not None:
            return None
        bbox = self.artists.ax.get_window_extent()
        if not (event.x < bbox.x0 and bbox.y0 <= event.y <= bbox.y1):
            return None
        _, y = self.artists.ax.transData.inverted().transform((bbox.x0, event.y))
        layer = int(round(y))
        return layer if 0 <= layer < self.artists.n_layers else None

    def hover_at(self, event) -> str | None:
        if self.shown is None:
            return None
        cell = self._head(event)
        if cell is not None:
            layer, head = cell
            value = float(self.shown.values[layer, head])
            return f"layer {layer} · head {head}\n{self.shown.label}: {value:.6g}"
        layer = self._row_label(event)
        if layer is not None:
            return f"layer {layer}: click to select the head mean of this layer"
        return None

    def on_press(self, event) -> None:
        if event.button != 1:
            return
        cell = self._head(event)
        if cell is not None:
            self.state.select_head(*cell)
            return
        layer = self._row_label(event)
        if layer is not None:
            self.state.select_head(layer, None)
