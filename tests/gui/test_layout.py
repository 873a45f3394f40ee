"""The window on a laptop screen: its default size fits the available screen, and no two texts
painted in any pane overlap, at 1366 × 768 and 1920 × 1080, with and without the compare dock.

Reference: matplotlib's own text layout (``Text.get_window_extent``, the box matplotlib computes
for a text's font, size, rotation and alignment) of every text painted into a pane's last frame
(``PaneView.last_texts``: the texts matplotlib laid out and the token labels the pair grid
places itself), on the demo model and its demo text.
"""

from __future__ import annotations

import itertools

import pytest
from PySide6.QtCore import QRect, QSettings, QSize

from tests.gui.conftest import WAIT_MS, settle
from viewer.gui import window as window_module
from viewer.gui.panes.render import TextItem

SCREENS = [(1366, 768), (1920, 1080)]
WITHOUT_FOOTER = "Hi, my brake pads squeal, can someone look at them on Friday?"


def text_boxes(pane) -> list[tuple[str, object]]:
    """(text, matplotlib Bbox in the frame's pixels, y up) of every text in the pane's last frame."""
    from matplotlib.backends.backend_agg import RendererAgg
    from matplotlib.figure import Figure
    from matplotlib.text import Text

    width, height = pane.canvas.image.width(), pane.canvas.image.height()
    figure = Figure(figsize=(width / 72, height / 72), dpi=72)  # 1 point = 1 pixel
    renderer = RendererAgg(width, height, 72)
    boxes = []
    for item in pane.canvas.last_texts:
        if not isinstance(item, TextItem) or not item.text.strip():
            continue
        text = Text(
            item.x,
            height - item.y,
            item.text,
            fontsize=item.size_px,
            fontfamily="DejaVu Sans",
            fontweight="bold" if item.bold else "normal",
            fontstyle="italic" if item.italic else "normal",
            rotation=item.angle,
            rotation_mode="anchor",
            ha=item.ha,
            va=item.va,
        )
        text.set_figure(figure)
        box = text.get_window_extent(renderer)
        if item.clip is not None:  # the part the painter's clip leaves visible
            x0, y0, x1, y1 = item.clip
            from matplotlib.transforms import Bbox

            clip = Bbox.from_extents(x0, height - y1, x1, height - y0)
            box = Bbox.intersection(box, clip)
            if box is None:
                continue
        boxes.append((item.text, box))
    return boxes


def outside(pane, slack: float = 1.0) -> list[str]:
    """Painted texts that reach beyond the pane's frame (cut off at its edge)."""
    width, height = pane.canvas.image.width(), pane.canvas.image.height()
    return [
        text
        for text, box in text_boxes(pane)
        if box.x0 < -slack or box.y0 < -slack or box.x1 > width + slack or box.y1 > height + slack
    ]


def overlaps(pane, slack: float = 0.5) -> list[tuple[str, str]]:
    """Pairs of painted texts whose boxes overlap by more than ``slack`` pixels each way."""
    found = []
    for (a, box_a), (b, box_b) in itertools.combinations(text_boxes(pane), 2):
        dx = min(box_a.x1, box_b.x1) - max(box_a.x0, box_b.x0)
        dy = min(box_a.y1, box_b.y1) - max(box_a.y0, box_b.y0)
        if dx > slack and dy > slack:
            found.append((a, b))
    return found


@pytest.fixture(scope="module")
def demo_window(tmp_path_factory):
    from PySide6.QtWidgets import QApplication

    from viewer.gui.app import application
    from viewer.gui.window import MainWindow

    application()
    tmp = tmp_path_factory.mktemp("layout")
    settings = QSettings(str(tmp / "w.ini"), QSettings.Format.IniFormat)
    window = MainWindow(settings=settings, config_dir=tmp / "config", restore_geometry=False)
    window.show()
    window.start(restore_last=False)  # the demo model and text, with its evidence

    def wait(condition, timeout_ms=WAIT_MS):
        import time

        end = time.monotonic() + timeout_ms / 1000
        while not condition():
            QApplication.processEvents()
            time.sleep(0.01)
            assert time.monotonic() < end, window.status_label.text()

    wait(lambda: window.canvases_ready and window.state.evidence is not None)
    window.wait = wait
    yield window
    window.close()


def settle_all(qtbot, window) -> None:
    qtbot.wait(300)
    for pane in window.figure_panes:
        if pane.isVisible():
            settle(qtbot, pane)


@pytest.mark.parametrize("compare", [False, True], ids=["alone", "compare"])
@pytest.mark.parametrize("screen", SCREENS, ids=["1366x768", "1920x1080"])
def test_no_two_painted_texts_overlap(qtbot, demo_window, screen, compare):
    w = demo_window
    w.resize(*screen)
    if compare:
        w.compare_pane.text_edit.setText(WITHOUT_FOOTER)
        w.show_panel("compare")
        if w.state.compare is None:
            w.run_compare()
            w.wait(lambda: w.state.compare is not None and not w.worker.busy)
    else:
        w.textset_dock.raise_()
    settle_all(qtbot, w)
    panes = [p for p in w.figure_panes if p.isVisible() and p.showing_figure]
    assert len(panes) >= 4 + compare
    # the main pair grid keeps several query rows labelled (it collapsed to one beside compare)
    rows = [
        t
        for t in w.pair_grid.canvas.last_texts
        if isinstance(t, TextItem) and t.ha == "right" and not t.angle
    ]
    assert len(rows) >= 3, [t.text for t in rows]
    for pane in panes:
        assert pane.canvas.last_texts, pane.title
        assert overlaps(pane) == [], f"{type(pane).__name__} at {screen}"
        assert outside(pane) == [], f"{type(pane).__name__} at {screen}"


@pytest.mark.parametrize("screen", SCREENS, ids=["1366x768", "1920x1080"])
def test_the_default_size_fits_the_available_screen(qtbot, tmp_path, monkeypatch, screen):
    """A desktop panel of 40 pixels takes part of the screen (common practice for a laptop's
    task bar); the window and its frame fit the rest, and its minimum size too, also with the
    compare dock open, so the window manager never has to push it off the screen."""
    from viewer.gui.window import FRAME_ROOM, MainWindow

    available = QRect(0, 40, screen[0], screen[1] - 40)
    monkeypatch.setattr(window_module, "available_geometry", lambda: available)
    settings = QSettings(str(tmp_path / "w.ini"), QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, config_dir=tmp_path / "config", restore_geometry=False)
    qtbot.addWidget(w)
    room = available.adjusted(0, 0, -FRAME_ROOM.width(), -FRAME_ROOM.height()).size()
    geometry = w.geometry()
    assert geometry.width() <= room.width() and geometry.height() <= room.height()
    assert available.contains(geometry)
    if screen == (1920, 1080):
        assert geometry.size() == QSize(1440, 900)  # the full default where it fits
    w.show()
    w.show_panel("compare")
    qtbot.wait(50)
    least = w.minimumSizeHint()
    assert least.width() <= room.width() and least.height() <= room.height(), least
    w.close()


def test_dock_tables_have_rows_one_line_high(qtbot):
    """Reference: Qt's own metrics of the table's font (a row was about two lines high, so a
    short dock showed three or four rows of the shortcut report)."""
    from viewer.gui.panes.base import TableDock

    table = TableDock.make_table(["word", "texts"])
    qtbot.addWidget(table)
    table.setRowCount(3)
    line = table.fontMetrics().height()
    assert all(table.rowHeight(row) <= line + 6 for row in range(3))
    table.resizeRowsToContents()  # stays fixed: nothing grows a row back
    assert all(table.rowHeight(row) <= line + 6 for row in range(3))


def test_a_long_status_message_ends_in_an_ellipsis_left_of_the_status_widgets(qtbot, tmp_path, monkeypatch):
    """At 1366 × 768 the insertion test's status line is wider than the bar: it is elided with
    "…" (Qt's own ``QFontMetrics.elidedText``) and kept left of the cancel button and the
    check badge, the whole message in the tooltip; the window does not widen for it."""
    from viewer.gui.window import MainWindow

    monkeypatch.setattr(window_module, "available_geometry", lambda: QRect(0, 40, 1366, 728))
    settings = QSettings(str(tmp_path / "w.ini"), QSettings.Format.IniFormat)
    w = MainWindow(settings=settings, config_dir=tmp_path / "config", restore_geometry=False)
    qtbot.addWidget(w)
    w.show()
    width = w.width()
    message = (
        "insertion test: '[via portal]' inserted at the end: 55 of 56 texts not predicted billing flip into "
        "billing (95% low 0.91); set accuracy 0.675 as given, 1.000 with it removed, 0.225 with it inserted"
    )
    w.set_status(message)
    qtbot.wait(50)
    label = w.status_label
    shown = label.shown_text()
    assert label.fontMetrics().horizontalAdvance(message) > label.contentsRect().width()
    assert shown.endswith("…") and message.startswith(shown[:-1]) and label.toolTip() == message
    assert label.geometry().right() < w.cancel_button.geometry().left()
    assert w.width() == width
    w.close()
