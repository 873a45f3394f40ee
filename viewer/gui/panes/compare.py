"""The compare pane: a second text or a second checkpoint, side by side with the current run.

Choose what to compare with (its inputs are the state's ``compare_target``), press "compare",
and the compared run's pair grid appears here for the same layer and head while the head map can
show the metric difference (compared − current).
"""

from __future__ import annotations

from PySide6.QtCore import QSize, Qt
from PySide6.QtGui import QAction
from PySide6.QtWidgets import (
    QButtonGroup,
    QFileDialog,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QRadioButton,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from viewer.gui.panes.pair_grid import PairGridPane
from viewer.session.state import Selection


class ComparePane(QWidget):
    title = "compare"

    def __init__(
        self,
        state: Selection,
        compare_action: QAction | None = None,
        clear_action: QAction | None = None,
        parent: QWidget | None = None,
    ) -> None:
        super().__init__(parent)
        self.state = state
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 2, 4, 2)
        row = QHBoxLayout()
        self.text_radio = QRadioButton("second text")
        self.model_radio = QRadioButton("second checkpoint")
        self.text_radio.setChecked(True)
        group = QButtonGroup(self)
        group.addButton(self.text_radio)
        group.addButton(self.model_radio)
        row.addWidget(self.text_radio)
        row.addWidget(self.model_radio)
        # one row: what to compare with, its input, and the buttons (a short dock keeps its grid)
        self.text_edit = QLineEdit()
        self.text_edit.setPlaceholderText("a second text to run through the same checkpoint")
        self.folder_edit = QLineEdit()
        self.folder_edit.setPlaceholderText(
            "a second checkpoint folder (same tokenizer), compared on the current text"
        )
        self.browse = QToolButton()
        self.browse.setText("…")
        self.browse.setToolTip("choose the second checkpoint's folder")
        self.browse.clicked.connect(self._browse)
        row.addWidget(self.text_edit, 1)
        row.addWidget(self.folder_edit, 1)
        row.addWidget(self.browse)
        for action in (compare_action, clear_action):
            if action is not None:
                button = QToolButton()
                button.setDefaultAction(action)
                row.addWidget(button)
        layout.addLayout(row)
        self.summary = QLabel("")
        self.summary.setObjectName("paneMessage")
        self.summary.setTextFormat(Qt.TextFormat.PlainText)
        self.summary.setWordWrap(True)
        self.summary.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        layout.addWidget(self.summary)
        self.grid = PairGridPane(state, slot="compare")
        self.grid.setMinimumSize(160, 130)
        layout.addWidget(self.grid, 1)
        self.text_radio.toggled.connect(self._write)
        self.text_edit.textChanged.connect(self._write)
        self.folder_edit.textChanged.connect(self._write)
        state.events.compare_target.connect(self._read)
        state.events.compare.connect(self._summarise)
        state.events.analysis.connect(self._summarise)
        self._read(state.compare_target)
        self._summarise()
        self._show_inputs()

    def sizeHint(self) -> QSize:  # noqa: N802
        return QSize(480, 150)

    def _summarise(self, *_args) -> None:
        """Both predictions and their difference, or "identical" (``viewer.session.compare``)."""
        current, compared = self.state.analysis, self.state.compare
        if current is None or compared is None:
            self.summary.setText("")
            self.summary.setVisible(False)
            return
        from viewer.session.compare import compare_summary  # numpy: not before a run

        model = self.state.model
        summary = compare_summary(current, compared, self.state.compare_target, model and model.folder)
        self.summary.setText("\n".join(summary.lines()))
        self.summary.setVisible(True)

    def detach(self) -> None:
        self.state.events.compare.disconnect(self._summarise)
        self.state.events.analysis.disconnect(self._summarise)
        self.state.events.compare_target.disconnect(self._read)
        self.grid.detach()

    def _browse(self) -> None:
        folder = QFileDialog.getExistingDirectory(self, "second checkpoint folder")
        if folder:
            self.model_radio.setChecked(True)
            self.folder_edit.setText(folder)

    def _show_inputs(self) -> None:
        by_text = self.text_radio.isChecked()
        self.text_edit.setVisible(by_text)
        self.folder_edit.setVisible(not by_text)
        self.browse.setVisible(not by_text)

    def _write(self, *_args) -> None:
        self._show_inputs()
        if self.text_radio.isChecked():
            value = self.text_edit.text()
            self.state.set_compare_target(("text", value) if value.strip() else None)
        else:
            value = self.folder_edit.text()
            self.state.set_compare_target(("model", value) if value.strip() else None)

    def _read(self, target) -> None:
        widgets = (self.text_radio, self.model_radio, self.text_edit, self.folder_edit)
        for w in widgets:
            w.blockSignals(True)
        if target is not None:
            kind, value = target
            (self.text_radio if kind == "text" else self.model_radio).setChecked(True)
            (self.text_edit if kind == "text" else self.folder_edit).setText(value)
        for w in widgets:
            w.blockSignals(False)
        self._show_inputs()
