"""``run_window``: the entry point of the ``headlight`` command's window.

Only Qt and Headlight's light modules are imported before the window is shown; matplotlib and
the figure builders load on a background thread, torch and transformers on the worker thread
when the first model opens. The window is therefore on screen before those imports finish.
"""

from __future__ import annotations

import os
import sys

from PySide6.QtCore import QTimer
from PySide6.QtWidgets import QApplication

from viewer.gui.window import MainWindow, app_icon

GIL_SWITCH_S = 0.001  # Python's default is 0.005
FULL_COLLECTION_EVERY = 1_000_000  # gen-1 collections between automatic full collections


def tune_collector() -> None:
    """Leave full garbage collections to the window's idle moments.

    A full collection stops every thread while it traverses every tracked object; with torch,
    transformers and matplotlib loaded one took up to 0.57 s in the middle of a run (measured
    with ``gc.callbacks`` in ``tests/benchmarks/bench_gui.py``). Young generations are still
    collected automatically (they are cheap); ``MainWindow`` runs the full collection itself
    when no model work and no drawing is going on (``MainWindow.collect_when_idle``).
    """
    import gc

    young, middle, _ = gc.get_threshold()
    gc.set_threshold(young, middle, FULL_COLLECTION_EVERY)


def application(argv: list[str] | None = None) -> QApplication:
    """The running QApplication, created (with our name and icon) if there is none.

    The worker and render threads run Python too; the GUI thread waits for the GIL each time
    it handles an event in Python, up to one switch interval per wait, so a shorter interval
    keeps clicks and repaints prompt while a pane is being drawn (measured in
    ``tests/benchmarks/bench_gui.py``).
    """
    sys.setswitchinterval(GIL_SWITCH_S)
    app = QApplication.instance()
    if app is None:
        app = QApplication(argv if argv is not None else sys.argv[:1])
    app.setApplicationName("Headlight")
    app.setOrganizationName("Headlight")
    app.setWindowIcon(app_icon())
    return app


def run_window(model: str | None = None, text: str | None = None) -> int:
    """Open the window (on ``model``, or the last session, or the demo model) and run Qt."""
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
    app = application()
    tune_collector()
    window = MainWindow()
    window.show()
    QTimer.singleShot(0, lambda: window.start(model=model, text=text))
    return int(app.exec())
