"""The shortcut-report pane: words whose knockout flips the prediction, strongest first.

Columns follow docs/definitions.md ("Word knockout"): texts containing the word, flip rate, the lower end
of its 95% Wilson interval (the ranking key), mean drop in the predicted class's probability,
and focus (summary-token attention share); then, per class the model originally predicted, the
texts of that class holding the word and how many of them flip ("flips/texts"), so a word that
flips only one class's texts stands out. Clicking a word lists the texts that contain it.
With "two-word phrases" ticked before a search (it is ticked at start), the report also ranks
adjacent word pairs knocked out together (a shortcut such as a footer is often a phrase), shown
by "phrases"; the summary line names the top phrase as the texts write it. The search is
screened unless "every word" is ticked (docs/definitions.md, "Screen and confirmation"). The
insertion test takes the report's top words, the strongest of the other view (the top phrase
when words are shown), and the user's own word or phrase typed in the field beside it; the line
under the buttons states the lead result (``lead_insertion``) and, after a mechanism check, the
share of its flip rate the selected heads carry.
"""

from __future__ import annotations

from PySide6.QtGui import QAction
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QTableWidgetItem,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from viewer.gui.panes.base import TableDock
from viewer.session.state import Selection

COLUMNS = ("word", "texts", "flip rate", "flip low", "mean drop", "focus")
INSERTION_COLUMN = "inserted → flips into"
KEYS = ("token", "count", "flip_rate", "flip_low", "mean_drop", "focus")
TOP_INSERTIONS = 5  # words of the report the insertion test runs for, strongest first


def insertion_cell(report) -> tuple[str, str]:
    """(cell text, tooltip) of one word's insertion test: the rate at the end of the texts,
    with its 95% Wilson low end; the tooltip has every position."""
    end = report.tally.entry("end")
    if not end["tried"]:
        return "no text to try", "every text is already predicted as " + report.target_label
    text = f"{report.target_label} {end['flip_rate']:.0%} (low {end['flip_low']:.2f})"
    lines = [f"inserting '{report.phrase}' into texts not predicted {report.target_label}:"]
    for position in report.tally.positions:
        e = report.tally.entry(position)
        lines.append(
            f"  {position}: {e['flips']} of {e['tried']} flip "
            f"({e['flip_rate']:.0%}, 95% low {e['flip_low']:.2f}), "
            f"mean gain {e['mean_gain']:+.3f}"
        )
    if report.mechanism is not None:
        lines.append(report.headline().split("; ", 1)[-1])
    return text, "\n".join(lines)


def search_note(report) -> str:
    """Which search made ``report``, for the pane's summary line."""
    if report.mode == "exhaustive":
        return "every word knocked out: "
    return f"screened, {report.confirmed} of {report.screened} confirmed by knockout: "


class ShortcutPane(TableDock):
    title = "shortcut report"

    def __init__(
        self,
        state: Selection,
        search_action: QAction | None = None,
        insert_action: QAction | None = None,
        parent: QWidget | None = None,
        mechanism_action: QAction | None = None,
    ) -> None:
        super().__init__(parent)
        self.state = state
        self.words: list[str] = []
        self._ranked: tuple | None = None  # (report, {phrases: rows}) for the report shown
        self._written: tuple | None = None  # (report, its top phrase as the texts write it)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 2, 4, 2)
        top = QHBoxLayout()
        if search_action is not None:
            button = QToolButton()
            button.setDefaultAction(search_action)
            top.addWidget(button)
        self.own_edit = QLineEdit()
        self.own_edit.setPlaceholderText("your word or phrase")
        self.own_edit.setToolTip(
            "a word or phrase of your own for the insertion test, inserted as you write it "
            "(tested first, beside the report's top words; no search needed)"
        )
        self.own_edit.setMaximumWidth(200)
        if insert_action is not None:
            button = QToolButton()
            button.setDefaultAction(insert_action)
            top.addWidget(button)
            top.addWidget(self.own_edit)
            self.own_edit.returnPressed.connect(insert_action.trigger)
        if mechanism_action is not None:
            button = QToolButton()
            button.setDefaultAction(mechanism_action)
            top.addWidget(button)
        self.phrases_box = QCheckBox("two-word phrases")
        self.phrases_box.setChecked(True)  # a footer is a phrase: its insertion is the headline
        self.phrases_box.setToolTip(
            "also rank every pair of adjacent words (a footer is often a phrase); "
            "takes effect at the next search"
        )
        top.addWidget(self.phrases_box)
        self.every_box = QCheckBox("every word")
        self.every_box.setToolTip(
            "knock out every word and phrase of every text (10 to 30 times the work); otherwise a "
            "screen (gradient × input, association, focus) picks the candidates the knockout "
            "confirms; takes effect at the next search"
        )
        top.addWidget(self.every_box)
        self.view_box = QComboBox()
        self.view_box.addItem("words", "words")
        self.view_box.addItem("phrases", "phrases")
        self.view_box.setToolTip("rank single words or two-word phrases")
        self.view_box.currentIndexChanged.connect(lambda _i: self.refresh())
        top.addWidget(self.view_box)
        self.summary = QLabel("")
        self.summary.setWordWrap(True)
        top.addWidget(self.summary, 1)
        layout.addLayout(top)
        self.insertion_line = QLabel("")
        self.insertion_line.setWordWrap(True)
        self.insertion_line.setVisible(False)
        layout.addWidget(self.insertion_line)
        self.table = self.make_table((*COLUMNS, INSERTION_COLUMN))
        self.table.horizontalHeader().setSectionResizeMode(0, QHeaderView.ResizeMode.Stretch)
        self.table.itemSelectionChanged.connect(self._word_chosen)
        layout.addWidget(self.table, 1)
        self.listen("shortcuts", lambda _v: self.refresh())
        self.listen("insertions", lambda _v: self.refresh())
        self.listen("textset", lambda _v: self.refresh())
        self.listen("word", lambda _v: self._select_current())
        self.refresh()

    def refresh(self) -> None:
        self._state_lead()
        report = self.state.shortcuts  # viewer.reports.shortcuts.ShortcutReport
        has_phrases = report is not None and report.phrases.texts > 0
        self.view_box.setVisible(has_phrases)
        phrases = has_phrases and self.view_box.currentData() == "phrases"
        classes = list(report.words.labels) if report is not None else []
        self.table.setColumnCount(len(COLUMNS) + len(classes) + 1)
        self.table.setHorizontalHeaderLabels(
            [
                "phrase" if phrases else "word",
                *COLUMNS[1:],
                *(f"flips · {c}" for c in classes),
                INSERTION_COLUMN,
            ]
        )
        self.table.blockSignals(True)
        self.table.setRowCount(0)
        self.words = []
        if report is None:
            if self.state.textset is None:
                self.summary.setText("Open a text set, then search it for shortcut words.")
            else:
                self.summary.setText(
                    "Search the open text set for words the prediction depends on too much (word knockout)."
                )
            self.table.blockSignals(False)
            return
        from viewer.core.shortcuts import MIN_TEXTS  # not at start-up: it brings numpy

        rows = self._ranking(report, phrases)
        what = "phrases" if phrases else "words"
        self.summary.setText(
            f"{search_note(report)}{len(rows)} {what} seen in at least {MIN_TEXTS} of "
            f"{report.texts} texts, ranked by flip low (Wilson 95%){self._top_phrase(report)}"
        )
        self.table.setRowCount(len(rows))
        insertions = self.state.insertions or {}
        for r, row in enumerate(rows):
            for c, key in enumerate(KEYS):
                value = row[key]
                text = (
                    value
                    if isinstance(value, str)
                    else (str(value) if isinstance(value, int) else f"{value:.3f}")
                )
                self.table.setItem(r, c, QTableWidgetItem(text))
            for c, label in enumerate(classes, start=len(KEYS)):
                part = row["by_class"][label]
                cell = QTableWidgetItem(f"{part['flips']}/{part['count']}" if part["count"] else "–")
                if part["count"]:
                    cell.setToolTip(
                        f"of {part['count']} texts predicted {label} holding "
                        f"'{row['token']}', knocking it out flips {part['flips']} "
                        f"({part['flip_rate']:.0%})"
                    )
                self.table.setItem(r, c, cell)
            result = insertions.get(row["token"])
            cell = QTableWidgetItem("")
            if result is not None:
                text, tip = insertion_cell(result)
                cell.setText(text)
                cell.setToolTip(tip)
            self.table.setItem(r, len(KEYS) + len(classes), cell)
            self.words.append(row["token"])
        self.table.resizeColumnsToContents()
        self.table.horizontalHeader().setSectionResizeMode(0, QHeaderView.ResizeMode.Stretch)
        self.table.blockSignals(False)
        self._select_current()

    def top_words(self, n: int = TOP_INSERTIONS) -> list[str]:
        """The ``n`` strongest rows of the view shown (words or phrases)."""
        return list(self.words[:n])

    def own_word(self) -> str | None:
        """The user's own word or phrase for the insertion test, or None."""
        return " ".join(self.own_edit.text().split()) or None

    def insertion_words(self, n: int = TOP_INSERTIONS) -> list[str]:
        """What the insertion test runs for: the ``n`` strongest rows of the view shown, then
        the strongest row of the other view (the top phrase beside the words), once each."""
        report = self.state.shortcuts
        words = self.top_words(n)
        if report is not None and report.phrases.texts > 0:
            other = self._ranking(report, self.view_box.currentData() != "phrases")
            if other:
                words.append(other[0]["token"])
        return list(dict.fromkeys(words))

    def _state_lead(self) -> None:
        """The lead insertion result in one line under the buttons (hidden without one)."""
        results = self.state.insertions or {}
        lead = None
        if results:  # results come after torch is imported: not at start-up
            from viewer.reports.insertion import lead_insertion

            lead = lead_insertion(results, self.own_word())
        self.insertion_line.setText("" if lead is None else f"insertion test: {results[lead].headline()}")
        self.insertion_line.setVisible(lead is not None)

    def _ranking(self, report, phrases: bool) -> list[dict]:
        """The report's own ranking (``KnockoutTally.ranking``) of words or of phrases, each
        computed once per report (a refresh asks for both views)."""
        if self._ranked is None or self._ranked[0] is not report:
            self._ranked = (report, {})
        views = self._ranked[1]
        if phrases not in views:
            views[phrases] = (report.phrases if phrases else report.words).ranking()
        return views[phrases]

    def _top_phrase(self, report) -> str:
        """ "; top phrase “[via portal]” …": the strongest phrase, as the texts write it."""
        rows = self._ranking(report, True) if report.phrases.texts else []
        if not rows or not rows[0]["flip_rate"] or self.state.textset is None:
            return ""
        from viewer.reports.insertion import insertion_phrase

        top = rows[0]
        if self._written is None or self._written[0] is not report:
            self._written = (report, insertion_phrase(self.state.textset.items(), top["token"]))
        return (
            f"; top phrase “{self._written[1]}”: knocking it out flips "
            f"{round(top['flip_rate'] * top['count'])} of {top['count']} texts"
        )

    def _select_current(self) -> None:
        self.show_selected(self.words, self.state.word)

    def _word_chosen(self) -> None:
        word = self.chosen(self.words)
        if word is not None:
            self.state.select_word(word)
