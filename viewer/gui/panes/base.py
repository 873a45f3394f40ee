"""The common frame of a figure pane: a header, a message page, and a matplotlib canvas.

A pane receives the shared ``Selection`` in its constructor, connects to the fields it draws,
and writes user input back to the state only. Drawing goes through a builder of
``viewer.figures`` onto the pane's own figure; the pane then calls ``draw_idle()``.

matplotlib takes about a second to import, longer than the window may take to appear, so a pane
starts with a message page and gets its canvas from ``attach_canvas`` once the window has loaded
matplotlib in the background. Until then (and whenever there is nothing to draw) the message
page says what the pane will show and how to get there.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from PySide6.QtCore import QSize, Qt, QTimer
from PySide6.QtGui import QCursor
from PySide6.QtWidgets import (
    QAbstractItemView,
    QHBoxLayout,
    QLabel,
    QSizePolicy,
    QStackedWidget,
    QTableWidget,
    QToolTip,
    QVBoxLayout,
    QWidget,
)

from viewer.gui.state import Selection


class StateListener:
    """Connections of a widget to the shared selection state, undone when it closes."""

    state: Selection

    def listen(self, field: str, callback: Callable[[Any], None]) -> None:
        event = getattr(self.state.events, field)
        event.connect(callback)
        self.__dict__.setdefault("_connections", []).append((event, callback))

    def detach(self) -> None:
        """Disconnect from the state (the widget is being closed)."""
        for event, callback in self.__dict__.get("_connections", []):
            event.disconnect(callback)
        self.__dict__.get("_connections", []).clear()

    def closeEvent(self, event) -> None:  # noqa: N802 - Qt name
        self.detach()
        super().closeEvent(event)


class TableDock(StateListener, QWidget):
    """A short dock holding a read-only table with whole-row, single selection."""

    def sizeHint(self) -> QSize:  # noqa: N802 - a short dock leaves room for the panes
        return QSize(480, 150)

    @staticmethod
    def make_table(columns: Sequence[str]) -> QTableWidget:
        table = QTableWidget(0, len(columns))
        table.setHorizontalHeaderLabels(list(columns))
        table.verticalHeader().setVisible(False)
        table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        return table


class FigurePane(StateListener, QWidget):
    """Base class: subclasses implement ``render`` (draw or return a message)."""

    title = "pane"
    waiting_text = "loading the drawing library…"
    schedule_delay_ms = 20  # the pair grid (0) repaints first after a selection change
    draw_at_once = False  # draw in ``refresh`` instead of at the next idle moment

    def __init__(self, state: Selection, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.state = state
        self.figure: Any = None
        self.canvas: Any = None
        self.hover_text = ""
        self.blitter: Any = None  # set by panes that redraw only a few artists on selection
        self.fast = False  # set by ``render``: only the blitter's artists changed
        self._scheduled = False

        outer = QVBoxLayout(self)
        outer.setContentsMargins(4, 2, 4, 2)
        outer.setSpacing(2)
        self.header = QHBoxLayout()
        self.header.setSpacing(6)
        self.title_label = QLabel(self.title)
        self.title_label.setObjectName("paneTitle")
        self.title_label.setTextFormat(Qt.TextFormat.PlainText)
        self.title_label.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
        self.title_label.setMinimumWidth(60)
        self.header.addWidget(self.title_label, 1)
        outer.addLayout(self.header)
        self.stack = QStackedWidget()
        self.message = QLabel(self.waiting_text)
        self.message.setObjectName("paneMessage")
        self.message.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.message.setWordWrap(True)
        self.message.setMargin(12)
        self.stack.addWidget(self.message)
        outer.addWidget(self.stack, 1)
        self.setMinimumSize(220, 160)

    # -- state wiring --------------------------------------------------------------------------
    def observe(self, *fields: str) -> None:
        """Redraw (coalesced) whenever one of ``fields`` changes."""
        for name in fields:
            self.listen(name, lambda _value: self.schedule())

    # -- canvas --------------------------------------------------------------------------------
    def attach_canvas(self) -> None:
        """Create the figure and canvas (matplotlib must already be importable quickly)."""
        if self.canvas is not None:
            return
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
        from matplotlib.figure import Figure

        self.figure = Figure(figsize=(5, 4), dpi=100)
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.canvas.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Expanding)
        self.canvas.setMinimumSize(120, 100)
        self.canvas.setFocusPolicy(Qt.FocusPolicy.ClickFocus)
        self.stack.addWidget(self.canvas)
        self.canvas.mpl_connect("button_press_event", self._press)
        self.canvas.mpl_connect("button_release_event", self._release)
        self.canvas.mpl_connect("motion_notify_event", self._motion)
        self.canvas.mpl_connect("scroll_event", self._scroll)
        self.canvas.mpl_connect("figure_leave_event", lambda _e: self._set_hover(""))
        self.canvas_attached()
        self.refresh()

    def canvas_attached(self) -> None:
        """Hook for subclasses that need the figure once (e.g. to keep artists)."""

    @property
    def ready(self) -> bool:
        return self.canvas is not None

    def schedule(self) -> None:
        """Ask for a refresh on the next turn of the event loop (several changes, one redraw)."""
        if not self._scheduled:
            self._scheduled = True
            QTimer.singleShot(self.schedule_delay_ms, self._flush)

    def _flush(self) -> None:
        self._scheduled = False
        self.refresh()

    def refresh(self) -> None:
        """Redraw now: ``render`` returns None after drawing, or a message to show instead."""
        self._scheduled = False
        if self.canvas is None:
            self.show_message(self.waiting_text)
            return
        self.fast = False
        message = self.render()
        if message is not None:
            self.show_message(message)
            return
        showing = self.stack.currentWidget() is self.canvas
        self.stack.setCurrentWidget(self.canvas)
        if self.fast and showing and self.blitter is not None and self.blitter.update():
            return
        if self.draw_at_once and showing:
            self.canvas.draw()  # now, before the panes scheduled after this one
            self.canvas.update()
        else:
            self.canvas.draw_idle()

    def show_message(self, text: str) -> None:
        self.message.setText(text)
        self.stack.setCurrentWidget(self.message)

    @property
    def showing_figure(self) -> bool:
        return self.canvas is not None and self.stack.currentWidget() is self.canvas

    def render(self) -> str | None:  # pragma: no cover - abstract
        raise NotImplementedError

    def set_title(self, text: str) -> None:
        self.title_label.setText(text)
        self.title_label.setToolTip(text)

    # -- mouse (matplotlib events); subclasses override the on_* hooks ---------------------------
    def _press(self, event) -> None:
        self.on_press(event)

    def _release(self, event) -> None:
        self.on_release(event)

    def _motion(self, event) -> None:
        self.on_motion(event)
        self._set_hover(self.hover_at(event) or "")

    def _scroll(self, event) -> None:
        self.on_scroll(event)

    def on_press(self, event) -> None:
        pass

    def on_release(self, event) -> None:
        pass

    def on_motion(self, event) -> None:
        pass

    def on_scroll(self, event) -> None:
        pass

    def hover_at(self, event) -> str | None:
        return None

    def _set_hover(self, text: str) -> None:
        if text == self.hover_text:
            return
        self.hover_text = text
        if self.canvas is None:
            return
        if text:
            QToolTip.showText(QCursor.pos(), text, self.canvas)
        else:
            QToolTip.hideText()
