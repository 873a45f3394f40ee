"""``run_window``: the entry point of the ``headlight`` command's window.

Only Qt and Headlight's light modules are imported before the window is shown; matplotlib and
the figure builders load on a background thread, torch and transformers on the worker thread
when the first model opens. The window is therefore on screen before those imports finish.
"""

from __future__ import annotations

import ctypes
import os
import sys
from collections.abc import Callable

from PySide6.QtCore import QTimer
from PySide6.QtWidgets import QApplication

from viewer.errors import HeadlightError
from viewer.gui.window import MainWindow, app_icon

GIL_SWITCH_S = 0.001  # Python's default is 0.005

# What Qt's xcb platform plugin (libqxcb.so and libQt6XcbQpa.so.6 of PySide6 6.11, read with
# ``ldd``) loads beyond the C library, and the Debian/Ubuntu package that ships each.
XCB_LIBRARIES: dict[str, str] = {
    "libxcb.so.1": "libxcb1",
    "libxcb-cursor.so.0": "libxcb-cursor0",
    "libxcb-icccm.so.4": "libxcb-icccm4",
    "libxcb-image.so.0": "libxcb-image0",
    "libxcb-keysyms.so.1": "libxcb-keysyms1",
    "libxcb-randr.so.0": "libxcb-randr0",
    "libxcb-render.so.0": "libxcb-render0",
    "libxcb-render-util.so.0": "libxcb-render-util0",
    "libxcb-shape.so.0": "libxcb-shape0",
    "libxcb-shm.so.0": "libxcb-shm0",
    "libxcb-sync.so.1": "libxcb-sync1",
    "libxcb-util.so.1": "libxcb-util1",
    "libxcb-xfixes.so.0": "libxcb-xfixes0",
    "libxcb-xkb.so.1": "libxcb-xkb1",
    "libxkbcommon.so.0": "libxkbcommon0",
    "libxkbcommon-x11.so.0": "libxkbcommon-x11-0",
    "libX11.so.6": "libx11-6",
    "libX11-xcb.so.1": "libx11-xcb1",
}


def uses_xcb(environ: dict[str, str] | None = None, platform: str | None = None) -> bool:
    """Whether Qt will start its xcb (X11) platform plugin here.

    On Linux Qt takes ``QT_QPA_PLATFORM`` when set (``offscreen``, ``wayland``… need no X
    libraries) and otherwise xcb, unless the session is a Wayland one.
    """
    env = os.environ if environ is None else environ
    if not (platform or sys.platform).startswith("linux"):
        return False
    chosen = env.get("QT_QPA_PLATFORM", "").strip()
    if chosen:
        return chosen.split(";")[0].split(":")[0] == "xcb"
    return not (env.get("WAYLAND_DISPLAY") and env.get("XDG_SESSION_TYPE") == "wayland")


def _loads(name: str) -> bool:
    try:
        ctypes.CDLL(name)
    except OSError:
        return False
    return True


def missing_xcb_libraries(loads: Callable[[str], bool] = _loads) -> list[str]:
    """The shared libraries of ``XCB_LIBRARIES`` the dynamic loader cannot open."""
    return [name for name in XCB_LIBRARIES if not loads(name)]


def check_display(environ: dict[str, str] | None = None, loads: Callable[[str], bool] = _loads) -> None:
    """Refuse, in one line, to start Qt where it would abort with a core dump.

    Without this, a Linux desktop lacking one of Qt's xcb libraries gets Qt's own multi-line
    message and an abort; so does a machine with no X display at all.
    """
    env = os.environ if environ is None else environ
    if not uses_xcb(env):
        return
    missing = missing_xcb_libraries(loads)
    if missing:
        packages = " ".join(XCB_LIBRARIES[name] for name in missing)
        raise HeadlightError(
            f"the window cannot start: Qt's X11 (xcb) plugin needs {', '.join(missing)}; on "
            f"Debian or Ubuntu install them with: sudo apt install {packages}"
        )
    if not env.get("DISPLAY"):
        raise HeadlightError(
            "the window cannot start: no X display (DISPLAY is not set); run "
            "it on a desktop, or use the headless commands (headlight --help)"
        )


FULL_COLLECTION_EVERY = 1_000_000  # gen-1 collections between automatic full collections


def tune_collector() -> None:
    """Leave full garbage collections to the window's idle moments.

    A full collection stops every thread while it traverses every tracked object; with torch,
    transformers and matplotlib loaded and a model open one takes 0.3 s, more in the middle of a
    run (``tests/benchmarks/bench_collector.py``). Young generations are still
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
    keeps clicks and repaints prompt while a pane is being drawn (compare the head-switch and
    event-loop-gap lines of ``tests/benchmarks/bench_gui.py`` with and without
    ``--switch-interval 0.005``).
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
    check_display()
    app = application()
    tune_collector()
    window = MainWindow()
    window.show()
    QTimer.singleShot(0, lambda: window.start(model=model, text=text))
    return int(app.exec())
