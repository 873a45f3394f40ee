"""The text box: the text to run, shown in part when it is too long to lay out quickly.

``QPlainTextEdit`` lays a paragraph out whole: a text of 11 MB on one line held the GUI thread for
8 s. Up to ``SHOWN_CHARS`` characters are laid out in about 26 ms (measured offscreen for one line
of 50,000 characters; an 8,192-token text is usually 30,000–45,000 characters), so a longer text
is kept whole in the box's ``text()`` while the box shows its first ``SHOWN_CHARS`` characters,
read-only, with a note saying so. Running uses the whole text (the model then reads as many
tokens as it can, and the recording's note says where it was cut). Pasting or dropping a long
text goes the same way; "clear" empties the box for typing again.
"""

from __future__ import annotations

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import QLabel, QPlainTextEdit

SHOWN_CHARS = 50_000


class TextBox(QPlainTextEdit):
    """A plain-text box whose ``text()`` may be longer than what it shows (``SHOWN_CHARS``)."""

    shortened = Signal(str)  # the note to show beside the box ("" when the text is whole)

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self._whole: str | None = None  # the whole text while only its start is shown

    @property
    def partial(self) -> bool:
        """Whether the box shows only the start of its text."""
        return self._whole is not None

    def text(self) -> str:
        """The whole text (what a run reads), not only the part shown."""
        return self._whole if self._whole is not None else self.toPlainText()

    def setPlainText(self, text: str) -> None:  # noqa: N802 - Qt name
        """Show ``text``, or its first ``SHOWN_CHARS`` characters read-only when it is longer."""
        if len(text) <= SHOWN_CHARS:
            self._whole = None
            self.setReadOnly(False)
            super().setPlainText(text)
            self.shortened.emit("")
            return
        self._whole = text
        super().setPlainText(text[:SHOWN_CHARS])
        self.setReadOnly(True)
        self.shortened.emit(
            f"showing the first {SHOWN_CHARS:,} of {len(text):,} characters; "
            "Run reads the whole text (as many tokens as the model takes)"
        )

    def clear_text(self) -> None:
        """Empty the box for typing (drops a text shown in part)."""
        self.setPlainText("")
        self.setFocus()

    def insertFromMimeData(self, source) -> None:  # noqa: N802 - Qt name
        """A paste or drop: a text that would make the box too long goes through
        ``setPlainText`` (shown in part) instead of being laid out whole."""
        if source.hasText() and not self.isReadOnly():
            pasted = source.text()
            current = self.toPlainText()
            if len(current) + len(pasted) > SHOWN_CHARS:
                cursor = self.textCursor()
                start, end = cursor.selectionStart(), cursor.selectionEnd()
                self.setPlainText(current[:start] + pasted + current[end:])
                return
        super().insertFromMimeData(source)


def note_label(box: TextBox) -> QLabel:
    """The note beside a ``TextBox``: hidden while the text is shown whole; "clear" empties it."""
    label = QLabel()
    label.setObjectName("textNote")
    label.setTextFormat(Qt.TextFormat.RichText)
    label.setWordWrap(True)
    label.setVisible(False)

    def show(note: str) -> None:
        label.setText(f"{note} · <a href='clear'>clear</a>" if note else "")
        label.setToolTip(note)
        label.setVisible(bool(note))

    label.linkActivated.connect(lambda _link: box.clear_text())
    box.shortened.connect(show)
    return label
