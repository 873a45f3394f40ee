"""Fixtures for driving the real window offscreen with a tiny random BERT classifier."""

from __future__ import annotations

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import pytest  # noqa: E402

TEXT = "the mechanic trued the wheel and she replaced the chain [via portal]"
WAIT_MS = 60_000


@pytest.fixture(scope="session")
def tiny_dir(tmp_path_factory) -> Path:
    from tests.model import tiny

    return tiny.save(tmp_path_factory.mktemp("tiny") / "tiny-bert", "bert")


@pytest.fixture(scope="session")
def tiny_dir_b(tmp_path_factory) -> Path:
    """A second checkpoint of the same shape and tokenizer (another seed): 'fine-tuned'."""
    from tests.model import tiny

    return tiny.save(tmp_path_factory.mktemp("tiny-b") / "tiny-bert-b", "bert", seed=7)


def make_window(qtbot, tmp_path: Path, name: str = "w"):
    from PySide6.QtCore import QSettings

    from viewer.gui.app import application
    from viewer.gui.window import MainWindow

    application()
    settings = QSettings(str(tmp_path / f"{name}.ini"), QSettings.Format.IniFormat)
    window = MainWindow(settings=settings, config_dir=tmp_path / f"{name}-config", restore_geometry=False)
    qtbot.addWidget(window)
    window.resize(1400, 900)
    window.show()
    return window


def wait_ready(qtbot, window) -> None:
    qtbot.waitUntil(lambda: window.canvases_ready, timeout=WAIT_MS)


def wait_idle(qtbot, window) -> None:
    qtbot.waitUntil(lambda: not window.worker.busy, timeout=WAIT_MS)


def run_and_wait(qtbot, window, text: str = TEXT, *, evidence: bool = True):
    """Run ``text`` and wait until the analysis (and by default the evidence) arrived."""
    window.text_edit.setPlainText(text)
    before = window.state.analysis
    window.run_current()
    qtbot.waitUntil(
        lambda: (
            window.state.analysis is not None
            and window.state.analysis is not before
            and window.state.analysis.summarised
        ),
        timeout=WAIT_MS,
    )
    if evidence:
        window.run_evidence()  # also automatic when "Evidence after every run" is on
        qtbot.waitUntil(lambda: window.state.evidence is not None, timeout=WAIT_MS)
    return window.state.analysis


def open_window(qtbot, tmp_path: Path, model: Path, name: str = "w"):
    """A window on ``model``, canvases attached, model open, nothing run yet."""
    w = make_window(qtbot, tmp_path, name)
    w.evidence_action.setChecked(False)  # evidence only where a test asks for it (speed)
    w.start(model=str(model), restore_last=False)
    wait_ready(qtbot, w)
    qtbot.waitUntil(lambda: w.state.model is not None, timeout=WAIT_MS)
    wait_idle(qtbot, w)
    return w


@pytest.fixture
def window(qtbot, tmp_path, tiny_dir):
    """A window on the tiny model, canvases attached, model open, nothing run yet."""
    w = open_window(qtbot, tmp_path, tiny_dir)
    yield w
    w.close()


def settle(qtbot, pane) -> None:
    """Let a pane's scheduled refresh happen and its frame arrive from the render thread."""
    qtbot.wait(10)
    qtbot.waitUntil(lambda: pane.idle, timeout=WAIT_MS)


def data_to_widget(pane, ax, x: float, y: float):
    """The canvas widget position (QPoint) of data point (x, y) in ``ax``."""
    from PySide6.QtCore import QPoint

    canvas = pane.canvas
    px, py = ax.transData.transform((x, y))
    ratio = canvas.device_pixel_ratio
    height = canvas.figure.bbox.height
    return QPoint(int(round(px / ratio)), int(round((height - py) / ratio)))


def click(qtbot, pane, point) -> None:
    from PySide6.QtCore import Qt

    qtbot.mouseClick(pane.canvas, Qt.MouseButton.LeftButton, pos=point)


def hover(pane, point) -> None:
    """A real mouse-move event on the canvas (mouse tracking is on, no button held)."""
    from PySide6.QtCore import QPointF, Qt
    from PySide6.QtGui import QMouseEvent
    from PySide6.QtWidgets import QApplication

    canvas = pane.canvas
    local = QPointF(point)
    event = QMouseEvent(
        QMouseEvent.Type.MouseMove,
        local,
        canvas.mapToGlobal(local),
        Qt.MouseButton.NoButton,
        Qt.MouseButton.NoButton,
        Qt.KeyboardModifier.NoModifier,
    )
    QApplication.sendEvent(canvas, event)
