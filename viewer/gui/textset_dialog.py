"""The "Open text set" dialog: a file of any format the commands read, or a folder saved by
``datasets``, with the text column, the label column and the split to read.

The columns and splits are read from the file's header, first object or schema
(``viewer.reports.textsets.layout_of``); the choice becomes a ``TextSource``, the same options the
commands take as ``--text-column``, ``--label-column`` and ``--split``.
"""

from __future__ import annotations

from pathlib import Path

from PySide6.QtWidgets import (
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QFileDialog,
    QFormLayout,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QPushButton,
    QVBoxLayout,
    QWidget,
)

from viewer.errors import HeadlightError
from viewer.reports.textsets import TextSource, layout_of

FILE_FILTERS = ";;".join(
    (
        "Text sets (*.txt *.jsonl *.csv *.parquet)",
        "Text, one text a line (*.txt)",
        "JSON lines (*.jsonl)",
        "CSV with a header (*.csv)",
        "Parquet (*.parquet)",
        "All files (*)",
    )
)
NO_LABEL = "(no label column)"


class TextSetDialog(QDialog):
    """Choose a text set and how to read it; ``source()`` is the choice."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Open text set")
        layout = QVBoxLayout(self)
        row = QHBoxLayout()
        self.path_edit = QLineEdit()
        self.path_edit.setPlaceholderText(".txt, .jsonl, .csv, .parquet, or a folder saved by datasets")
        self.path_edit.editingFinished.connect(lambda: self.set_path(self.path_edit.text()))
        self.file_button = QPushButton("File…")
        self.file_button.clicked.connect(self._choose_file)
        self.folder_button = QPushButton("Saved dataset folder…")
        self.folder_button.clicked.connect(self._choose_folder)
        row.addWidget(self.path_edit, 1)
        row.addWidget(self.file_button)
        row.addWidget(self.folder_button)
        layout.addLayout(row)
        form = QFormLayout()
        self.text_box = QComboBox()
        self.label_box = QComboBox()
        self.split_box = QComboBox()
        form.addRow("text column", self.text_box)
        form.addRow("label column", self.label_box)
        form.addRow("split", self.split_box)
        layout.addLayout(form)
        self.note = QLabel("")
        self.note.setWordWrap(True)
        self.note.setObjectName("paneMessage")
        layout.addWidget(self.note)
        self.buttons = QDialogButtonBox(
            QDialogButtonBox.StandardButton.Open | QDialogButtonBox.StandardButton.Cancel
        )
        self.buttons.accepted.connect(self.accept)
        self.buttons.rejected.connect(self.reject)
        layout.addWidget(self.buttons)
        self.path: Path | None = None
        self.set_path("")

    def _choose_file(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open a text set", "", FILE_FILTERS)
        if path:
            self.set_path(path)

    def _choose_folder(self) -> None:
        folder = QFileDialog.getExistingDirectory(self, "A folder saved by datasets' save_to_disk")
        if folder:
            self.set_path(folder)

    def set_path(self, path: str) -> None:
        """Read the columns and splits of ``path`` into the choosers."""
        self.path_edit.setText(path)
        for box in (self.text_box, self.label_box, self.split_box):
            box.clear()
        self.path = None
        ok = self.buttons.button(QDialogButtonBox.StandardButton.Open)
        ok.setEnabled(False)
        if not path.strip():
            self.note.setText("")
            self._enable(False, False)
            return
        try:
            layout = layout_of(path)
        except HeadlightError as exc:
            self.note.setText(str(exc))
            self._enable(False, False)
            return
        self.path = Path(path)
        columns = list(layout.columns)
        self.text_box.addItems(columns)
        # without a "label" column a set may have none; with one, it is read unless another is named
        self.label_box.addItems(columns if "label" in columns else [NO_LABEL, *columns])
        self.split_box.addItems(list(layout.splits))
        if "text" in columns:
            self.text_box.setCurrentText("text")
        if "label" in columns:
            self.label_box.setCurrentText("label")
        self._enable(bool(columns), bool(layout.splits))
        self.note.setText("" if columns else "one text a line: no columns to choose")
        ok.setEnabled(True)

    def _enable(self, columns: bool, splits: bool) -> None:
        self.text_box.setEnabled(columns)
        self.label_box.setEnabled(columns)
        self.split_box.setEnabled(splits)

    def source(self) -> TextSource | None:
        """The chosen text set and how to read it (None before a path is chosen)."""
        if self.path is None:
            return None
        columns = self.text_box.count() > 0
        label = self.label_box.currentText() if columns else NO_LABEL
        return TextSource(
            self.path,
            split=self.split_box.currentText() or None,
            text_column=self.text_box.currentText()
            if columns and self.text_box.currentText() != "text"
            else None,
            label_column=None if label in (NO_LABEL, "label") else label,
        )
