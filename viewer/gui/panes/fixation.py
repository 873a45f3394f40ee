"""The fixation-plot pane: every word of the shortcut report, attention received against effect.

One point per word seen in at least 3 texts: x is the summary token's attention share on the
word (last layer; head mean, or the selected head), y the mean drop in the predicted class's
probability when it is knocked out (``viewer.figures.fixation``). Words far up and left matter
without being looked at; far right and low, they are looked at and do not matter. Hover a point
for its numbers; click it to pick the word (the text-set list then shows its texts).
"""

from __future__ import annotations

from PySide6.QtWidgets import QComboBox

from viewer.gui.panes.base import FigurePane


class FixationPane(FigurePane):
    title = "fixation plot"

    def __init__(self, state, parent=None) -> None:
        super().__init__(state, parent)
        self.artists = None
        self.rows: list[dict] = []  # the ranking rows drawn, in point order
        self.head_box = QComboBox()
        self.head_box.addItem("head mean", "mean")
        self.head_box.addItem("selected head", "head")
        self.head_box.setToolTip(
            "summary-token attention of the last layer's head mean, or of the head selected in the head map"
        )
        self.head_box.currentIndexChanged.connect(lambda _i: self.schedule())
        self.header.addWidget(self.head_box)
        self.observe("shortcuts", "word", "head")
        self.message.setText(
            "Search a text set for shortcuts to see attention beside knockout for every word."
        )

    def values(self, report, head: int | None):
        """(rows, x, y, counts) from the report's own per-word numbers."""
        import numpy as np

        rows, share = report.fixation(head)
        x = np.array(share, dtype=np.float64)
        y = np.array([r["mean_drop"] for r in rows], dtype=np.float64)
        counts = [r["count"] for r in rows]
        return rows, x, y, counts

    def focus_head(self) -> int | None:
        """The head whose attention the x axis shows (None: the head mean)."""
        if self.head_box.currentData() == "head" and self.state.head is not None:
            return self.state.head
        return None

    def render(self):
        report = self.state.shortcuts
        if report is None:
            self.set_title(self.title)
            return (
                "Search a text set for shortcuts (shortcut report) to see, for every word, "
                "the attention it receives beside what knocking it out does."
            )
        head = self.focus_head()
        rows, x, y, counts = self.values(report, head)
        if not rows:
            return "no word occurs in at least 3 texts of this set"
        where = "head mean" if head is None else f"head {head}"
        self.set_title(f"fixation plot · {len(rows)} words · last layer, {where}")
        words = [r["token"] for r in rows]
        word = self.state.word

        def build() -> None:  # render thread
            from viewer.figures.fixation import X_UNITS, fixation_into

            self.rows = rows
            self.artists = fixation_into(
                self.figure, words, x, y, counts, highlight=word, x_units=X_UNITS + f", {where}"
            )

        return build

    def _point(self, event) -> int | None:
        from viewer.figures.fixation import point_at

        if self.artists is None or event.inaxes is not self.artists.ax:
            return None
        return point_at(self.artists, event.x, event.y)

    def hover_at(self, event) -> str | None:
        i = self._point(event)
        if i is None or i >= len(self.rows):
            return None
        r = self.rows[i]
        return (
            f"'{r['token']}' in {r['count']} texts\nflip rate {r['flip_rate']:.3f} "
            f"(95% low {r['flip_low']:.3f})\nmean drop {r['mean_drop']:+.4f}\n"
            f"attention share {float(self.artists.x[i]):.4f}\nclick to list its texts"
        )

    def on_press(self, event) -> None:
        if event.button == 1:
            i = self._point(event)
            if i is not None and i < len(self.rows):
                self.state.select_word(self.rows[i]["token"])
