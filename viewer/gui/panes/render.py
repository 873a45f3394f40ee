"""Drawing off the GUI thread: a render thread builds and rasterises the panes' figures.

Laying out and rasterising a figure with a few hundred token labels takes matplotlib longer
than the 100 ms the event loop may be blocked (a 512-token pair grid: about 0.2 s on its own,
twice that while the worker records), so no figure is drawn on the GUI thread at all:

* a pane's ``render`` (GUI thread) reads the selection and returns a *build* function holding
  plain data; the ``Renderer`` runs the build on its thread (the figure's artists are created or
  updated there), rasterises the figure with Agg (``FigureCanvasAgg``, which touches no Qt
  object), and hands back a copy of the pixels;
* a ``PaneView`` (the widget on screen) paints the last frame it was given and translates Qt's
  mouse events into matplotlib events on the pane's Agg canvas.

A figure is only ever touched by one thread at a time: while a pane has a frame in flight its
view keeps the mouse events it receives and replays them once the frame has arrived (the
movements coalesced to the last one), and jobs submitted from inside a view's event handling are
held until that handling has finished. Several requests for a pane that has not started drawing
yet merge into one job (their builds run in order, then one draw), so a burst of selection
changes costs one draw.

Text is the slowest thing Agg rasterises (about 1.5 ms per token label in matplotlib 3.11), so
the render thread does not rasterise plain text at all: matplotlib still lays every text out
(positions, alignment, rotation, which labels fit), but the renderer records each one
(``TextItem``) instead of drawing it, and the render thread then paints them onto the frame
with Qt (a ``QPainter`` on a ``QImage`` may run on any thread), in the same font
(matplotlib's DejaVu Sans, registered with Qt on the GUI thread), size and colour. Mathtext
still goes through Agg. Exported figures never take this path.

The render thread holds the GIL only while it runs Python; the interpreter hands the GIL to the
GUI thread every few milliseconds (``sys.getswitchinterval``), so the event loop keeps turning.
"""

from __future__ import annotations

import queue
import sys
import threading
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from PySide6.QtCore import QEvent, QLineF, QObject, QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QFont, QFontDatabase, QFontMetricsF, QImage, QPainter, QPen
from PySide6.QtWidgets import QWidget

BUTTONS = {Qt.MouseButton.LeftButton: 1, Qt.MouseButton.MiddleButton: 2, Qt.MouseButton.RightButton: 3}


@dataclass
class RenderJob:
    pane: Any  # the FigurePane whose figure is drawn
    build: Callable[[], None] | None  # changes the figure's artists (render thread)
    size: tuple[float, float, float] | None  # (width px, height px, device pixel ratio)


@dataclass(frozen=True)
class TextItem:
    """One line of text as matplotlib laid it out, in the frame's pixels (y downwards)."""

    x: float  # the anchor: left end of the baseline unless ``ha``/``va`` say otherwise
    y: float
    text: str
    size_px: float  # font size in the frame's pixels
    angle: float  # degrees, counter-clockwise, about the anchor
    rgba: tuple[float, float, float, float]
    bold: bool
    italic: bool
    clip: tuple[float, float, float, float] | None  # (x0, y0, x1, y1), y downwards
    ha: str = "left"  # which end of the (unrotated) line is at the anchor
    va: str = "baseline"  # "baseline" or "center" (half-way between ascent and descent)


@dataclass(frozen=True)
class MarkItem:
    """A straight tick mark in the frame's pixels (y downwards)."""

    x0: float
    y0: float
    x1: float
    y1: float
    width_px: float
    rgba: tuple[float, float, float, float]


@dataclass
class Frame:
    pane: Any
    image: QImage | None  # premultiplied ARGB32 with the texts painted in
    ratio: float = 1.0
    error: str | None = None
    texts: list[TextItem | MarkItem] = field(default_factory=list)  # what was painted (tests)


def _capture_text(renderer, draw_text, gc, x, y, s, prop, angle, ismath=False, mtext=None):
    """``RendererAgg.draw_text`` that records plain text instead of rasterising it."""
    if ismath or not s:
        return draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
    r, g, b, *rest = gc.get_rgb()
    alpha = gc.get_alpha() if (not rest or gc.get_forced_alpha()) else rest[0]
    clip = None
    box = gc.get_clip_rectangle()
    if box is not None:
        x0, y0, x1, y1 = box.extents
        clip = (x0, renderer.height - y1, x1, renderer.height - y0)
    weight = prop.get_weight()
    bold = weight in ("bold", "heavy", "extra bold", "black", "semibold", "demibold") or (
        isinstance(weight, int | float) and weight >= 600
    )
    renderer.texts.append(
        TextItem(
            float(x),
            float(y),
            s,
            prop.get_size_in_points() * renderer.dpi / 72.0,
            float(angle),
            (float(r), float(g), float(b), float(1.0 if alpha is None else alpha)),
            bool(bold),
            prop.get_style() != "normal",
            clip,
        )
    )
    return None


def text_recording_renderer(agg) -> Any:
    """``agg``'s renderer for the current figure size, recording its plain texts."""
    renderer = agg.get_renderer()
    if not hasattr(renderer, "texts"):
        import functools

        renderer.texts = []
        renderer.draw_text = functools.partial(_capture_text, renderer, renderer.draw_text)
    return renderer


def chain_builds(
    pane: Any, first: Callable[[], None] | None, then: Callable[[], None] | None
) -> Callable[[], None] | None:
    """Both builds, in order (builds are cheap next to the draw they share); the fast path
    (``pane.fast``) only if both builds allow it."""
    if first is None or then is None:
        return first or then

    def both() -> None:
        first()
        fast, pane.fast = pane.fast, False
        then()
        pane.fast = pane.fast and fast

    return both


class Renderer(QObject):
    """The one render thread of the application (created on first use, on the GUI thread)."""

    delivered = Signal()

    def __init__(self) -> None:
        super().__init__()
        self._cond = threading.Condition()
        self._pending: dict[int, RenderJob] = {}  # by id(pane), in order of first request
        self._frames: queue.Queue[Frame] = queue.Queue()
        self._holding = 0
        self._held: list[RenderJob] = []
        self._stopped = False
        self.delivered.connect(self._drain, Qt.ConnectionType.QueuedConnection)
        self._thread = threading.Thread(target=self._loop, name="headlight-render", daemon=True)
        self._thread.start()

    # -- GUI thread ------------------------------------------------------------------------------
    def submit(
        self,
        pane: Any,
        build: Callable[[], None] | None = None,
        size: tuple[float, float, float] | None = None,
    ) -> None:
        """Ask for ``build`` (if any) and a fresh frame of ``pane``'s figure."""
        job = RenderJob(pane, build, size)
        if self._holding:
            self._held.append(job)
            pane.frames_held += 1
            return
        self._queue(job)

    def _queue(self, job: RenderJob) -> None:
        with self._cond:
            old = self._pending.get(id(job.pane))
            if old is not None:  # not started yet: one draw does both
                old.build = chain_builds(job.pane, old.build, job.build)
                old.size = job.size or old.size
                return
            self._pending[id(job.pane)] = job
            job.pane.frames_due += 1
            self._cond.notify()

    def hold(self) -> None:
        """Keep submissions back (a view is handling an event that may read its figure)."""
        self._holding += 1

    def release(self) -> None:
        self._holding -= 1
        if self._holding == 0 and self._held:
            held, self._held = self._held, []
            for job in held:
                job.pane.frames_held -= 1
                self._queue(job)

    def _drain(self) -> None:
        import shiboken6

        while True:
            try:
                frame = self._frames.get_nowait()
            except queue.Empty:
                return
            pane = frame.pane
            if shiboken6.isValid(pane):
                pane.frame_arrived(frame)

    # -- render thread ---------------------------------------------------------------------------
    def _loop(self) -> None:
        while True:
            with self._cond:
                while not self._pending and not self._stopped:
                    self._cond.wait()
                if self._stopped:
                    return
                key = next(iter(self._pending))
                job = self._pending.pop(key)
            self._frames.put(self._run(job))
            try:
                self.delivered.emit()
            except RuntimeError:  # the application is being torn down
                return

    @staticmethod
    def _run(job: RenderJob) -> Frame:
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        pane = job.pane
        agg = pane.agg
        try:
            if job.size is not None:
                width, height, ratio = job.size
                agg._set_device_pixel_ratio(ratio)
                dpi = pane.figure.dpi
                pane.figure.set_size_inches(width * ratio / dpi, height * ratio / dpi, forward=False)
            pane.fast = False
            if job.build is not None:
                job.build()
            blitter = pane.blitter
            renderer = text_recording_renderer(agg)
            if not (pane.fast and job.size is None and blitter is not None and blitter.update()):
                renderer.texts = []
                FigureCanvasAgg.draw(agg)
            width, height = agg.get_width_height(physical=True)
            pixels = agg.buffer_rgba()
            # QImage may be used off the GUI thread (QPixmap may not); converting here leaves
            # the GUI thread a plain copy of pixels when it paints
            image = QImage(pixels, width, height, width * 4, QImage.Format.Format_RGBA8888)
            image = image.convertToFormat(QImage.Format.Format_ARGB32_Premultiplied)
            texts = list(renderer.texts) + pane.overlay_texts()
            painter = QPainter(image)
            paint_texts(painter, texts, pane.font_family)
            painter.end()
            return Frame(pane, image, float(agg.device_pixel_ratio), texts=texts)
        except Exception as exc:  # noqa: BLE001 - a drawing bug must not kill the thread
            traceback.print_exc(file=sys.stderr)
            return Frame(pane, None, error=f"could not draw this pane: {exc}")

    def stop(self) -> None:
        with self._cond:
            self._stopped = True
            self._cond.notify()
        self._thread.join(timeout=5)


_RENDERER: Renderer | None = None


def renderer() -> Renderer:
    global _RENDERER
    if _RENDERER is None:
        import atexit

        _RENDERER = Renderer()
        atexit.register(_RENDERER.stop)
    return _RENDERER


_FONTS_LOADED: list[str] = []


def figure_font_family() -> str:
    """matplotlib's default face (DejaVu Sans, shipped with it), registered with Qt once."""
    if not _FONTS_LOADED:
        import matplotlib

        family = "DejaVu Sans"
        folder = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
        for name in ("DejaVuSans.ttf", "DejaVuSans-Bold.ttf", "DejaVuSans-Oblique.ttf"):
            font_id = QFontDatabase.addApplicationFont(str(folder / name))
            families = QFontDatabase.applicationFontFamilies(font_id) if font_id >= 0 else []
            family = families[0] if families else family
        _FONTS_LOADED.append(family)
    return _FONTS_LOADED[0]


def paint_texts(painter: QPainter, texts: list[TextItem | MarkItem], family: str) -> None:
    """Paint recorded texts onto the frame's image (its pixels, no device pixel ratio yet)."""
    if not texts:
        return
    dpi = painter.device().logicalDpiY() or 96
    painter.setRenderHint(QPainter.RenderHint.TextAntialiasing, True)
    fonts: dict[tuple[float, bool, bool], QFont] = {}
    for item in texts:
        if isinstance(item, MarkItem):
            _paint_mark(painter, item)
            continue
        key = (item.size_px, item.bold, item.italic)
        font = fonts.get(key)
        if font is None:
            font = QFont(family)
            font.setPointSizeF(item.size_px * 72.0 / dpi)
            font.setBold(item.bold)
            font.setItalic(item.italic)
            font.setHintingPreference(QFont.HintingPreference.PreferNoHinting)
            fonts[key] = font
        painter.save()
        if item.clip is not None:
            x0, y0, x1, y1 = item.clip
            painter.setClipRect(QRectF(x0, y0, x1 - x0, y1 - y0))
        painter.setFont(font)
        painter.setPen(QColor.fromRgbF(*item.rgba))
        painter.translate(item.x, item.y)
        if item.angle:
            painter.rotate(-item.angle)
        dx = dy = 0.0
        if item.ha != "left" or item.va != "baseline":
            metrics = QFontMetricsF(font)
            width = metrics.horizontalAdvance(item.text)
            dx = -width if item.ha == "right" else (-width / 2 if item.ha == "center" else 0.0)
            if item.va == "center":
                dy = (metrics.ascent() - metrics.descent()) / 2
        painter.drawText(QPointF(dx, dy), item.text)
        painter.restore()


def _paint_mark(painter: QPainter, item: MarkItem) -> None:
    pen = QPen(QColor.fromRgbF(*item.rgba))
    pen.setWidthF(item.width_px)
    pen.setCapStyle(Qt.PenCapStyle.FlatCap)
    painter.setPen(pen)
    painter.drawLine(QLineF(item.x0, item.y0, item.x1, item.y1))


def token_axis_items(ax, which: str) -> list[TextItem | MarkItem]:
    """The tick marks and token labels of ``ax``'s bottom (x) or left (y) axis, for
    ``paint_texts``: the ticks ``viewer.figures.style.TokenLocator`` puts in view, labelled by
    the axis' formatter, in the tick length, width, pad, label size and colours the axis' own
    ticks are styled with (a pane that paints them switches matplotlib's ticks off: a ``Line2D``
    draw and a text layout per tick were most of a pair grid's draw).

    x labels read upwards and end one tick length and pad below the axes, centred on their
    tick; y labels end as far left of the axes: where matplotlib puts tick labels."""
    import numpy as np
    from matplotlib.colors import to_rgba

    axis = ax.xaxis if which == "x" else ax.yaxis
    lo, hi = sorted(axis.get_view_interval())
    ticks = [t for t in axis.get_major_locator()() if lo <= t <= hi]
    if not ticks:
        return []
    figure = ax.figure
    height = figure.bbox.height
    scale = figure.dpi / 72.0
    box = ax.get_window_extent()
    tick = axis.get_major_ticks(1)[0]
    line, text = tick.tick1line, tick.label1
    length = float(line.get_markersize()) * scale
    width = float(line.get_markeredgewidth()) * scale
    colour = tuple(float(c) for c in to_rgba(line.get_markeredgecolor()))
    pad = length + float(tick.get_pad()) * scale
    size = float(text.get_fontsize()) * scale
    ink = tuple(float(c) for c in to_rgba(text.get_color()))
    values = np.asarray(ticks, dtype=float)
    if which == "x":
        along = ax.transData.transform(np.column_stack([values, np.zeros_like(values)]))[:, 0]
    else:
        along = height - ax.transData.transform(np.column_stack([np.zeros_like(values), values]))[:, 1]
    fmt = axis.get_major_formatter()
    marks: list[TextItem | MarkItem] = []
    labels: list[TextItem | MarkItem] = []
    for tick, at in zip(ticks, along.tolist(), strict=True):
        label = fmt(tick).replace("\\$", "$")
        if which == "x":
            y = float(height - box.y0)
            marks.append(MarkItem(at, y, at, y + length, width, colour))
            if label:
                labels.append(
                    TextItem(at, y + pad, label, size, 90.0, ink, False, False, None, "right", "center")
                )
        else:
            x = float(box.x0)
            marks.append(MarkItem(x, at, x - length, at, width, colour))
            if label:
                labels.append(
                    TextItem(x - pad, at, label, size, 0.0, ink, False, False, None, "right", "center")
                )
    return marks + labels


class PaneView(QWidget):
    """The on-screen canvas of a pane: paints frames, forwards the mouse to matplotlib."""

    def __init__(self, pane: Any) -> None:
        super().__init__()
        self.pane = pane
        self.figure = pane.figure
        self.image: QImage | None = None
        self.last_texts: list[TextItem | MarkItem] = []  # what the current frame has painted
        self._deferred: list[tuple[QEvent.Type, Any]] = []
        self.setMouseTracking(True)
        self.setAttribute(Qt.WidgetAttribute.WA_OpaquePaintEvent)

    @property
    def device_pixel_ratio(self) -> float:
        return self.pane.agg.device_pixel_ratio

    def draw_idle(self) -> None:
        """Redraw the figure as it is (after a zoom or pan) on the render thread."""
        self.pane.request_draw()

    # -- frames ----------------------------------------------------------------------------------
    def show_frame(self, frame: Frame) -> None:
        frame.image.setDevicePixelRatio(frame.ratio or 1.0)
        self.image = frame.image
        self.last_texts = frame.texts
        self.update()

    def paintEvent(self, event) -> None:  # noqa: N802 - Qt name
        painter = QPainter(self)
        painter.fillRect(self.rect(), Qt.GlobalColor.white)
        if self.image is not None:
            painter.drawImage(0, 0, self.image)
        painter.end()

    def resizeEvent(self, event) -> None:  # noqa: N802 - Qt name
        super().resizeEvent(event)
        size = event.size()
        self.pane.resized(size.width(), size.height(), self.devicePixelRatioF())

    # -- mouse -----------------------------------------------------------------------------------
    def mousePressEvent(self, event) -> None:  # noqa: N802 - Qt names below too
        self._mouse(event, "button_press_event")

    def mouseDoubleClickEvent(self, event) -> None:  # noqa: N802
        self._mouse(event, "button_press_event", dblclick=True)

    def mouseReleaseEvent(self, event) -> None:  # noqa: N802
        self._mouse(event, "button_release_event")

    def mouseMoveEvent(self, event) -> None:  # noqa: N802
        self._mouse(event, "motion_notify_event")

    def wheelEvent(self, event) -> None:  # noqa: N802
        self._mouse(event, "scroll_event")

    def leaveEvent(self, event) -> None:  # noqa: N802
        super().leaveEvent(event)
        self._dispatch("figure_leave_event", None, {})

    def _mouse(self, event, name: str, dblclick: bool = False) -> None:
        point: QPointF = event.position()
        x = point.x() * self.device_pixel_ratio
        y = self.figure.bbox.height - point.y() * self.device_pixel_ratio
        mods = event.modifiers()
        keys = [
            name
            for flag, name in (
                (Qt.KeyboardModifier.ControlModifier, "ctrl"),
                (Qt.KeyboardModifier.AltModifier, "alt"),
                (Qt.KeyboardModifier.ShiftModifier, "shift"),
            )
            if mods & flag
        ]
        info: dict[str, Any] = {"x": x, "y": y, "key": "+".join(keys) or None, "modifiers": frozenset(keys)}
        if name == "scroll_event":
            info["step"] = event.angleDelta().y() / 120
            info["button"] = "up" if info["step"] >= 0 else "down"
        elif name == "motion_notify_event":
            info["button"] = None
        else:
            info["button"] = BUTTONS.get(event.button())
            if info["button"] is None:
                return
            info["dblclick"] = dblclick
        self._dispatch(name, event, info)

    def _dispatch(self, name: str, event, info: dict[str, Any]) -> None:
        if self.pane.drawing:  # the figure is the render thread's until the frame arrives
            if name in ("motion_notify_event", "figure_leave_event"):
                self._deferred = [
                    d for d in self._deferred if d[0] not in ("motion_notify_event", "figure_leave_event")
                ]
            self._deferred.append((name, info))
            return
        self._process(name, info)

    def _process(self, name: str, info: dict[str, Any]) -> None:
        from matplotlib.backend_bases import LocationEvent, MouseEvent

        agg = self.pane.agg
        r = renderer()
        r.hold()
        try:
            if name == "figure_leave_event":
                LocationEvent(name, agg, None, None)._process()
            else:
                MouseEvent(
                    name,
                    agg,
                    info["x"],
                    info["y"],
                    info.get("button"),
                    info.get("key"),
                    step=info.get("step", 0),
                    dblclick=info.get("dblclick", False),
                    modifiers=info.get("modifiers"),
                )._process()
        finally:
            r.release()

    def replay(self) -> None:
        """Process the mouse events that arrived while a frame was being drawn."""
        while self._deferred and not self.pane.drawing:
            name, info = self._deferred.pop(0)
            self._process(name, info)
