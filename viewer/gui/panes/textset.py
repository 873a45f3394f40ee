"""The text-set pane: every text of an opened set with its prediction, label and correctness.

Select a row to inspect that text in the other panes; "mistakes only" keeps the wrong
predictions; a word picked in the shortcut report keeps only the texts containing it.
"""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtGui import QAction, QColor
from PySide6.QtWidgets import (
    QCheckBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QTableWidgetItem,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from viewer.gui.panes.base import TableDock
from viewer.session.state import Selection

COLUMNS = ("#", "text", "label", "predicted", "p", "")
WRONG = QColor("#fde2e1")


class TextSetPane(TableDock):
    title = "text set"

    def __init__(
        self, state: Selection, open_action: QAction | None = None, parent: QWidget | None = None
    ) -> None:
        super().__init__(parent)
        self.state = state
        self.rows_shown: list[int] = []  # text-set indices in table order
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 2, 4, 2)
        top = QHBoxLayout()
        if open_action is not None:
            button = QToolButton()
            button.setDefaultAction(open_action)
            top.addWidget(button)
        self.mistakes_box = QCheckBox("mistakes only")
        self.mistakes_box.setToolTip("show only texts whose prediction differs from the label")
        self.mistakes_box.toggled.connect(state.set_mistakes_only)
        top.addWidget(self.mistakes_box)
        self.word_label = QLabel("")
        self.word_label.setTextFormat(Qt.TextFormat.PlainText)
        top.addWidget(self.word_label, 1)
        self.clear_word = QToolButton()
        self.clear_word.setText("all texts")
        self.clear_word.setToolTip("stop filtering by the word picked in the shortcut report")
        self.clear_word.clicked.connect(lambda: state.select_word(None))
        top.addWidget(self.clear_word)
        layout.addLayout(top)
        self.summary = QLabel("Open a text set (.txt, .jsonl or .csv) to list its predictions.")
        self.summary.setWordWrap(True)
        layout.addWidget(self.summary)
        self.table = self.make_table(COLUMNS)
        self.table.setWordWrap(False)
        header = self.table.horizontalHeader()
        header.setSectionResizeMode(1, QHeaderView.ResizeMode.Stretch)
        for col in (0, 2, 3, 4, 5):
            header.setSectionResizeMode(col, QHeaderView.ResizeMode.ResizeToContents)
        self.table.itemSelectionChanged.connect(self._row_chosen)
        layout.addWidget(self.table, 1)
        for name in ("textset", "mistakes_only", "word"):
            self.listen(name, lambda _v: self.refresh())
        self.listen("item", lambda _v: self._select_current())
        self.refresh()

    def refresh(self) -> None:
        ts = self.state.textset
        self.mistakes_box.blockSignals(True)
        self.mistakes_box.setChecked(self.state.mistakes_only)
        self.mistakes_box.blockSignals(False)
        word = self.state.word
        self.word_label.setText(f"texts containing '{word}'" if word else "")
        self.clear_word.setVisible(word is not None)
        self.table.blockSignals(True)
        self.table.setRowCount(0)
        self.rows_shown = []
        if ts is None:
            self.summary.setText("Open a text set (.txt, .jsonl or .csv) to list its predictions.")
            self.table.blockSignals(False)
            return
        rows = ts.shown(self.state.mistakes_only, word)
        acc = ts.accuracy
        name = ts.path.replace("\\", "/").rsplit("/", 1)[-1]
        text = f"{name}: {len(ts.rows)} texts"
        if acc is not None:
            text += f" · accuracy {acc:.1%} · {len(ts.mistakes)} mistakes"
        if not ts.complete:
            text += " (cancelled: partial)"
        text += f" · showing {len(rows)}"
        self.summary.setText(text)
        self.table.setRowCount(len(rows))
        for r, row in enumerate(rows):
            mark = {True: "✓", False: "✗", None: ""}[row.correct]
            cells = (
                str(row.index),
                row.text,
                row.label or "",
                row.predicted or "",
                "" if row.confidence is None else f"{row.confidence:.2f}",
                mark,
            )
            for c, value in enumerate(cells):
                item = QTableWidgetItem(value)
                if c == 1:
                    item.setToolTip(row.text)
                if row.correct is False:
                    item.setBackground(WRONG)
                self.table.setItem(r, c, item)
            self.rows_shown.append(row.index)
        self.table.blockSignals(False)
        self._select_current()

    def _select_current(self) -> None:
        self.show_selected(self.rows_shown, self.state.item)

    def _row_chosen(self) -> None:
        item = self.chosen(self.rows_shown)
        if item is not None:
            self.state.select_item(item)
