"""The common frame of a figure pane: a header, a message page, and a view of a matplotlib figure.

A pane receives the shared ``Selection`` in its constructor, connects to the fields it draws,
and writes user input back to the state only. Drawing goes through a builder of
``viewer.figures`` onto the pane's own figure, on the render thread of
``viewer.gui.panes.render``; the view on screen paints the frames it sends back.

matplotlib takes about a second to import, longer than the window may take to appear, so a pane
starts with a message page and gets its canvas from ``attach_canvas`` once the window has loaded
matplotlib in the background. Until then (and whenever there is nothing to draw) the message
page says what the pane will show and how to get there.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from PySide6.QtCore import QSize, Qt, QTimer, Signal
from PySide6.QtGui import QCursor, QPainter, QPalette
from PySide6.QtWidgets import (
    QAbstractItemView,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QSizePolicy,
    QStackedWidget,
    QTableWidget,
    QToolTip,
    QVBoxLayout,
    QWidget,
)

from viewer.session.state import Selection


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


class ElidedLabel(QLabel):
    """A one-line label that ends in "…" when it is too narrow for its text (the tooltip keeps
    the whole text), instead of cutting it off mid-word. Plain text; it takes the width its
    layout gives it rather than asking for its text's."""

    def __init__(self, text: str = "", parent=None) -> None:
        super().__init__(text, parent)
        self.setTextFormat(Qt.TextFormat.PlainText)
        self.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
        self.setToolTip(text)

    def setText(self, text: str) -> None:  # noqa: N802 - Qt name
        super().setText(text)
        self.setToolTip(text)

    def shown_text(self) -> str:
        """The text as painted at the label's current width."""
        return self.fontMetrics().elidedText(
            self.text(), Qt.TextElideMode.ElideRight, max(0, self.contentsRect().width())
        )

    def paintEvent(self, event) -> None:  # noqa: N802 - Qt name
        painter = QPainter(self)
        align = self.alignment() | Qt.AlignmentFlag.AlignVCenter
        self.style().drawItemText(
            painter,
            self.contentsRect(),
            int(align),
            self.palette(),
            self.isEnabled(),
            self.shown_text(),
            QPalette.ColorRole.WindowText,
        )
        painter.end()


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
        # rows one line of text high (Qt's default is about 30 pixels): a short dock shows twice
        # as many of them
        rows = table.verticalHeader()
        rows.setSectionResizeMode(QHeaderView.ResizeMode.Fixed)
        rows.setDefaultSectionSize(table.fontMetrics().height() + 6)
        return table

    def show_selected(self, shown: Sequence, current) -> None:
        """Select the row whose value is ``current`` (``shown``: each row's value, in table
        order), or no row, without the table announcing it as the user's choice."""
        self.table.blockSignals(True)
        if current in shown:
            self.table.selectRow(list(shown).index(current))
        else:
            self.table.clearSelection()
        self.table.blockSignals(False)

    def chosen(self, shown: Sequence):
        """The value of the row the user selected, or None."""
        rows = self.table.selectionModel().selectedRows()
        return shown[rows[0].row()] if rows else None


class FigurePane(StateListener, QWidget):
    """Base class: subclasses implement ``render`` (a build function, or a message).

    ``render`` runs on the GUI thread and must not touch the figure: it reads the selection,
    sets the title and returns a function that creates or updates the artists; that function
    runs on the render thread (``viewer.gui.panes.render``), where it may set ``self.fast``
    when only the blitter's artists changed. Everything it needs from the selection it takes
    from the enclosing ``render`` call, never from the state directly.
    """

    painted = Signal()  # a frame arrived and nothing else is being drawn for this pane

    title = "pane"
    waiting_text = "loading the drawing library…"
    schedule_delay_ms = 20  # the pair grid (0) repaints first after a selection change
    waits_for: FigurePane | None = None  # a pane whose new frame goes before this one's

    def __init__(self, state: Selection, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.state = state
        self.figure: Any = None
        self.agg: Any = None  # the figure's matplotlib (Agg) canvas, drawn on the render thread
        self.canvas: Any = None  # the ``PaneView`` on screen
        self.hover_text = ""
        self.blitter: Any = None  # set by panes that redraw only a few artists on selection
        self.fast = False  # set by a build: only the blitter's artists changed
        self.size_px: tuple[int, int] = (500, 400)  # the view's size (GUI thread's copy)
        self._scheduled = False
        self.frames_due = 0  # frames requested from the render thread, not yet arrived
        self.frames_held = 0  # requests held back while a view handled an event
        self._want_figure = False  # False while a message is shown instead

        outer = QVBoxLayout(self)
        outer.setContentsMargins(4, 2, 4, 2)
        outer.setSpacing(2)
        self.header = QHBoxLayout()
        self.header.setSpacing(6)
        self.title_label = ElidedLabel(self.title)
        self.title_label.setObjectName("paneTitle")
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
        """Create the figure and its view (matplotlib must already be importable quickly)."""
        if self.canvas is not None:
            return
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        from viewer.gui.panes.render import PaneView, figure_font_family

        self.font_family = figure_font_family()  # Qt's fonts are registered on this thread
        self.figure = Figure(figsize=(5, 4), dpi=100)
        self.agg = FigureCanvasAgg(self.figure)
        self.canvas = PaneView(self)
        self.canvas.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Expanding)
        self.canvas.setMinimumSize(120, 100)
        self.canvas.setFocusPolicy(Qt.FocusPolicy.ClickFocus)
        self.stack.addWidget(self.canvas)
        self.agg.mpl_connect("button_press_event", self._press)
        self.agg.mpl_connect("button_release_event", self._release)
        self.agg.mpl_connect("motion_notify_event", self._motion)
        self.agg.mpl_connect("scroll_event", self._scroll)
        self.agg.mpl_connect("figure_leave_event", lambda _e: self._set_hover(""))
        self.canvas_attached()
        self.refresh()

    def canvas_attached(self) -> None:
        """Hook for subclasses that need the figure once (e.g. to keep artists)."""

    def overlay_texts(self) -> list:
        """Texts and marks to paint over the drawn figure (render thread, after the draw):
        labels and ticks the pane paints itself instead of letting matplotlib draw them."""
        return []

    @property
    def ready(self) -> bool:
        return self.canvas is not None

    @property
    def drawing(self) -> bool:
        """A frame is being drawn: the figure belongs to the render thread until it arrives."""
        return self.frames_due > 0 or self.frames_held > 0

    @property
    def idle(self) -> bool:
        """Nothing scheduled and nothing being drawn: the view shows the current selection."""
        return not self._scheduled and not self.drawing

    def schedule(self) -> None:
        """Ask for a refresh on the next turn of the event loop (several changes, one redraw)."""
        if not self._scheduled:
            self._scheduled = True
            QTimer.singleShot(self.schedule_delay_ms, self._flush)

    def _flush(self) -> None:
        if not self._scheduled:
            return
        first = self.waits_for
        if first is not None and (first._scheduled or first.drawing):
            # the pane the user looks at first is being drawn: drawing this one now would take
            # the render thread's time and the GIL from it; try again shortly
            QTimer.singleShot(self.schedule_delay_ms, self._flush)
            return
        self.refresh()

    def refresh(self) -> None:
        """Render now: ``render`` returns a build for the render thread, a message, or None
        to keep the frame on screen (what it needs is still being computed)."""
        self._scheduled = False
        if self.canvas is None:
            self.show_message(self.waiting_text)
            return
        result = self.render()
        if result is None:
            return
        if isinstance(result, str):
            self.show_message(result)
            return
        self._want_figure = True
        self.request_draw(result)

    def request_draw(self, build=None, size=None) -> None:
        """Have the render thread run ``build`` (if given) and draw a new frame."""
        if self.canvas is None:
            return
        from viewer.gui.panes.render import renderer

        renderer().submit(self, build, size)

    def resized(self, width: int, height: int, ratio: float) -> None:
        """The view changed size (GUI thread): the figure follows on the render thread."""
        self.size_px = (width, height)
        self.request_draw(size=(float(width), float(height), float(ratio)))

    @property
    def size_inches(self) -> tuple[float, float]:
        """The figure's size once the pending resize is applied (safe on the GUI thread)."""
        dpi = self.figure.dpi if self.figure is not None else 100.0
        return self.size_px[0] / dpi, self.size_px[1] / dpi

    def frame_arrived(self, frame) -> None:
        """A frame from the render thread (GUI thread)."""
        self.frames_due -= 1
        if frame.error is not None:
            if not self.drawing:
                self.show_message(frame.error)
        else:
            self.canvas.show_frame(frame)
            if self._want_figure and self.stack.currentWidget() is not self.canvas:
                self.stack.setCurrentWidget(self.canvas)
        if not self.drawing:
            self.canvas.replay()
            if frame.image is not None:
                self.painted.emit()

    def show_message(self, text: str) -> None:
        self._want_figure = False
        self.message.setText(text)
        self.stack.setCurrentWidget(self.message)

    @property
    def showing_figure(self) -> bool:
        return self.canvas is not None and self.stack.currentWidget() is self.canvas

    def render(self) -> str | Callable[[], None] | None:  # pragma: no cover - abstract
        raise NotImplementedError

    def set_title(self, text: str) -> None:
        self.title_label.setText(text)

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
