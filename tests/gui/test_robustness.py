"""Errors a user can cause end in a dialog with the one-line message; the window keeps working.
Cancel stops the worker; the window is on screen before torch, transformers or matplotlib load.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pytest

from tests.gui.conftest import WAIT_MS, run_and_wait


def wait_error(qtbot, window, count: int) -> str:
    qtbot.waitUntil(lambda: len(window.errors) >= count, timeout=WAIT_MS)
    assert window.error_dialog is not None and window.error_dialog.isVisible()
    assert "\n" not in window.errors[-1]
    return window.errors[-1]


def test_a_bad_folder_gives_a_dialog_and_the_window_still_runs(qtbot, window, tmp_path):
    model = window.state.model
    label = window.model_label.text()
    window.open_model(str(tmp_path / "no-such-model"))
    assert window.model_label.text() == "opening no-such-model…"
    message = wait_error(qtbot, window, 1)
    assert message.startswith("model folder not found")
    assert window.model_label.text() == label  # the model still open, not "opening …" for ever
    broken = tmp_path / "broken"
    broken.mkdir()
    (broken / "config.json").write_text("{not json", encoding="utf-8")
    window.open_model(str(broken))
    assert "not valid JSON" in wait_error(qtbot, window, 2)
    window.error_dialog.accept()
    assert window.state.model is model  # the open model is untouched
    analysis = run_and_wait(qtbot, window, "she fixed it", evidence=False)
    assert analysis.recording.text == "she fixed it"


def test_unreadable_files_give_dialogs(qtbot, window, tmp_path):
    bad = tmp_path / "texts.xml"
    bad.write_text("<texts/>", encoding="utf-8")
    window.open_textset(str(bad))
    assert "unknown text-set format" in wait_error(qtbot, window, 1)
    session = tmp_path / "s.json"
    session.write_text('{"format": "something-else"}', encoding="utf-8")
    window.open_session(session)
    assert "not a Headlight session" in wait_error(qtbot, window, 2)
    window.text_edit.setPlainText("   ")
    window.run_current()
    assert "empty" in wait_error(qtbot, window, 3)
    assert window.state.textset is None


def test_cancel_during_a_long_run_leaves_no_worker_running(qtbot, window, tmp_path):
    path = tmp_path / "many.txt"
    path.write_text(
        "\n".join(f"the mechanic trued wheel number {i} and she replaced the chain" for i in range(3000)),
        encoding="utf-8",
    )
    progress = []
    window.worker.progress.connect(lambda kind, done, total, msg: progress.append(done))
    window.open_textset(str(path))
    qtbot.waitUntil(lambda: any(d > 0 for d in progress), timeout=WAIT_MS)
    window.cancel_action.trigger()
    qtbot.waitUntil(lambda: not window.worker.busy, timeout=WAIT_MS)
    assert window.worker.wait(5000)
    assert window.worker.pool.activeThreadCount() == 0
    assert window.state.textset is None
    assert "cancelled" in window.status_label.text()
    assert not window.cancel_action.isEnabled()
    # and the worker takes new work afterwards
    assert run_and_wait(qtbot, window, "she fixed it", evidence=False) is not None


def test_the_window_is_visible_before_torch_and_matplotlib_are_imported(tmp_path):
    code = textwrap.dedent(f"""
        import os, sys
        os.environ["QT_QPA_PLATFORM"] = "offscreen"
        from pathlib import Path
        from PySide6.QtCore import QSettings
        from viewer.gui.app import application
        from viewer.gui.window import MainWindow
        app = application()
        w = MainWindow(settings=QSettings(r"{tmp_path}/s.ini", QSettings.Format.IniFormat),
                       config_dir=Path(r"{tmp_path}"), restore_geometry=False)
        w.show()
        app.processEvents()
        heavy = [m for m in ("torch", "transformers", "matplotlib") if m in sys.modules]
        print(w.isVisible(), heavy)
    """)
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True
    )
    assert out.stdout.strip().splitlines()[-1] == "True []"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="per-thread niceness is Linux's")
def test_the_worker_runs_below_the_gui_threads_priority(qtbot, window):
    """The worker thread and the threads it starts yield the CPU to the event loop: their
    niceness (os.getpriority of the thread, Linux) is WORKER_NICENESS, the GUI thread's is not
    raised."""
    import os
    import threading
    from concurrent.futures import ThreadPoolExecutor

    from viewer.gui.worker import WORKER_NICENESS

    def niceness() -> int:
        return os.getpriority(os.PRIO_PROCESS, threading.get_native_id())

    def job(ctx):
        with ThreadPoolExecutor(1) as pool:  # a thread the job starts, as numpy's blocks do
            return niceness(), pool.submit(niceness).result()

    got = []
    window.worker.finished.connect(lambda name, result: got.append(result) if name == "nice" else None)
    gui = niceness()
    window.worker.submit("nice", job)
    qtbot.waitUntil(lambda: bool(got), timeout=WAIT_MS)
    assert got[0] == (max(gui, WORKER_NICENESS), max(gui, WORKER_NICENESS))
    assert niceness() == gui
