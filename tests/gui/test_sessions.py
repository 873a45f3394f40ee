"""Sessions: save → a new window → restore gives the same model, text and selection."""

from __future__ import annotations

import json

from tests.gui.conftest import WAIT_MS, make_window, run_and_wait, wait_ready


def wait_restored(qtbot, window, selection) -> None:
    qtbot.waitUntil(lambda: window.state.analysis is not None, timeout=WAIT_MS)
    qtbot.waitUntil(lambda: window.state.snapshot() == selection, timeout=WAIT_MS)


def test_save_then_restore_in_a_new_window(qtbot, window, tmp_path):
    run_and_wait(qtbot, window, evidence=False)
    window.state.select_head(1, None)
    window.state.select_tokens(3, 6)
    window.state.set_metric("distance")
    window.notes_edit.setPlainText("footer looks suspicious")
    path = tmp_path / "look.headlight.json"
    window.save_session(path)
    data = json.loads(path.read_text(encoding="utf-8"))
    assert data["format"] == "headlight-session" and data["version"] == 1
    assert data["selection"]["head"] is None and data["selection"]["source"] == 3

    other = make_window(qtbot, tmp_path, "second")
    other.evidence_action.setChecked(False)
    other.start(restore_last=False)
    wait_ready(qtbot, other)
    other.open_session(path)
    wait_restored(qtbot, other, window.state.snapshot())
    assert other.state.model.folder == window.state.model.folder
    assert other.state.text == window.state.text
    assert other.notes_edit.toPlainText() == "footer looks suspicious"
    assert other.head_map.metric_box.currentData() == "distance"
    assert other.pair_grid.mean_box.isChecked()
    other.close()


def test_the_last_session_is_restored_at_start(qtbot, window, tmp_path):
    run_and_wait(qtbot, window, "she fixed it", evidence=False)
    window.state.select_head(1, 2)
    selection = window.state.snapshot()
    recent = window.recent_models()
    window.close()  # writes last-session.json and the recent-models list
    assert (tmp_path / "w-config" / "last-session.json").is_file()

    again = make_window(qtbot, tmp_path, "w")  # same settings file and config folder
    again.evidence_action.setChecked(False)
    again.start()
    wait_restored(qtbot, again, selection)
    assert again.state.text == "she fixed it"
    assert again.recent_models() == recent
    again.close()


def test_an_unreadable_last_session_starts_the_window_on_the_demo(qtbot, tmp_path):
    """A last-session file with a 5000-digit integer: the window opens the demo model, says so
    in one line, and keeps the file aside."""
    from viewer.session import jobs

    config = tmp_path / "w-config"
    config.mkdir()
    (config / "last-session.json").write_text(
        '{"format": "headlight-session", "version": ' + "9" * 5000 + "}"
    )
    window = make_window(qtbot, tmp_path, "w")
    window.evidence_action.setChecked(False)
    notes: list[str] = []
    window.set_status = lambda text: notes.append(text)
    window.start()
    qtbot.waitUntil(lambda: window.state.model is not None, timeout=WAIT_MS)
    assert window.state.model.folder == str(jobs.demo_folder())
    assert any(n.startswith("last session not restored") for n in notes), notes
    assert len(list(config.glob("last-session.unreadable-*.json"))) == 1
    window.close()
