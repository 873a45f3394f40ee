"""The window on a text longer than DENSE_TOKENS: the pair grid's overview, its block max / block
mean toggle, zoomed exact cells, hover, hatched blocks; the memory budget's refusal as a dialog;
a huge text in the text box.

Reference: transformers' own eager ``output_attentions`` of the recording's token ids on a
separately loaded copy of a tiny ModernBERT with 2,048 positions (layers 0 and 2 global, layer 1
local, seeing keys |i − j| <= local_attention / 2 as transformers' ModernBERT masks them), pooled
into blocks by ``pooled`` of tests/session/test_pair_view.py (numpy reshapes following
docs/definitions.md, "Overview").
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from PySide6.QtCore import QMimeData, QPoint, QPointF, Qt
from PySide6.QtGui import QWheelEvent
from PySide6.QtWidgets import QApplication
from transformers import AutoModel

from tests.benchmarks.bench_long import text_of
from tests.gui.conftest import WAIT_MS, click, data_to_widget, hover, open_window, run_and_wait, settle
from tests.model import tiny
from tests.session.test_pair_view import LONG_WORDS, pooled
from viewer.core.overview import DENSE_TOKENS, block_size
from viewer.gui.panes.render import TextItem
from viewer.gui.textbox import SHOWN_CHARS
from viewer.session.exports import Source, pair_grid_export


@pytest.fixture(scope="module")
def long_folder(tmp_path_factory):
    return tiny.save(
        tmp_path_factory.mktemp("long") / "modernbert", "modernbert", max_position_embeddings=2048
    )


def library_attentions(folder, token_ids: np.ndarray) -> np.ndarray:
    """(L, H, T, T) transformers' eager output_attentions of ``token_ids``, from a copy loaded here."""
    ref = AutoModel.from_pretrained(folder, attn_implementation="eager", local_files_only=True)
    ref.eval()
    with torch.no_grad():
        out = ref(input_ids=torch.from_numpy(token_ids)[None], output_attentions=True)
    return torch.stack(out.attentions, dim=1)[0].double().numpy()


def drawn_titles(pane) -> list[str]:
    """The titles painted in the pane's last frame (read from the frame's texts)."""
    return [t.text for t in pane.canvas.last_texts if isinstance(t, TextItem) and "layer " in t.text]


def wheel(pane, point: QPoint, steps: float) -> None:
    """A real wheel event on the canvas (``steps`` notches, positive zooms in)."""
    local = QPointF(point)
    event = QWheelEvent(
        local,
        pane.canvas.mapToGlobal(local),
        QPoint(0, 0),
        QPoint(0, int(120 * steps)),
        Qt.MouseButton.NoButton,
        Qt.KeyboardModifier.NoModifier,
        Qt.ScrollPhase.NoScrollPhase,
        False,
    )
    QApplication.sendEvent(pane.canvas, event)


def hovered(text: str) -> tuple[int, int, float]:
    """(query, key, probability) of a hover text."""
    query = int(text.split("query ")[1].split(" ")[0])
    key = int(text.split("key ")[1].split(" ")[0])
    return query, key, float(text.split("attention probability ")[1].split("\n")[0])


def test_a_long_text_is_an_overview_with_exact_cells_when_zoomed(qtbot, tmp_path, long_folder):
    w = open_window(qtbot, tmp_path, long_folder)
    rec = run_and_wait(qtbot, w, text_of(LONG_WORDS), evidence=False).recording
    t = rec.n_tokens
    assert t > DENSE_TOKENS
    theirs = library_attentions(long_folder, rec.token_ids)
    c = block_size(t)
    i, j = np.indices((t, t))
    half = json.loads((long_folder / "config.json").read_text())["local_attention"] // 2
    local = np.abs(i - j) <= half
    everything = np.ones((t, t), dtype=bool)
    model = w.state.model.name
    pane = w.pair_grid

    # a global layer's head: block max, named in the header and the drawn title
    w.state.select_head(0, 1)
    settle(qtbot, pane)
    peak, mean = pooled(theirs[0, 1], everything, c)
    np.testing.assert_allclose(np.ma.getdata(pane.displayed_values()), peak, atol=1e-6)
    what = f"block max over {c} × {c} tokens"
    assert what in pane.title_label.text()
    assert drawn_titles(pane) == [f"{model} · layer 0 · head 1 · {what}"]
    assert pane.block_box.isVisible()

    # the toggle: block mean, in the header, the title and the colour bar's units
    pane.block_box.setCurrentIndex(pane.block_box.findData("mean"))
    settle(qtbot, pane)
    np.testing.assert_allclose(np.ma.getdata(pane.displayed_values()), mean, atol=1e-6)
    assert drawn_titles(pane) == [f"{model} · layer 0 · head 1 · block mean over {c} × {c} tokens"]
    assert pane.artists.colorbar.units.get_text() == "attention probability, block mean"

    # the local layer: blocks outside the window see nothing and are hatched
    w.state.select_head(1, 2)
    settle(qtbot, pane)
    peak, mean = pooled(theirs[1, 2], local, c)
    shown = pane.displayed_values()
    np.testing.assert_array_equal(np.ma.getmaskarray(shown), np.isnan(mean))
    np.testing.assert_allclose(np.ma.getdata(shown)[~np.isnan(mean)], mean[~np.isnan(mean)], atol=1e-6)
    assert pane.artists.background.get_visible()

    # hover: the exact value of the cell, one row computed on demand, and its block's numbers
    ax = pane.artists.ax
    hover(pane, data_to_widget(pane, ax, 700, 702))
    row, col, value = hovered(pane.hover_text)
    assert abs(row - 702) <= c and abs(col - 700) <= c  # the cell under the pointer, a pixel is c tokens
    assert value == pytest.approx(theirs[1, 2, row, col], abs=1e-6)
    assert f"block mean {mean[row // c, col // c]:.6f}" in pane.hover_text

    # zoomed in below EXACT_CELLS a side: exact cells, equal to the library's, masked outside the window
    wheel(pane, data_to_widget(pane, ax, 700, 700), 6)
    settle(qtbot, pane)
    rows, cols = pane.artists.exact_span
    assert "exact cells" in pane.title_label.text()
    assert drawn_titles(pane) == [f"{model} · layer 1 · head 2 · exact cells"]
    exact = pane.displayed_values()
    seen = local[rows, cols]
    np.testing.assert_array_equal(np.ma.getmaskarray(exact), ~seen)
    np.testing.assert_allclose(np.ma.getdata(exact)[seen], theirs[1, 2, rows, cols][seen], atol=1e-6)
    x0, x1 = ax.get_xlim()
    assert cols.start <= x0 and x1 <= cols.stop and (x1 - x0) < 512
    # deeper: the cells computed already hold the view; a cell is a few pixels now
    wheel(pane, data_to_widget(pane, ax, 700, 700), 6)
    settle(qtbot, pane)
    assert pane.artists.exact_span == (rows, cols)
    hover(pane, data_to_widget(pane, ax, 701, 703))
    row, col, value = hovered(pane.hover_text)
    assert (row, col) == (703, 701)
    assert value == pytest.approx(theirs[1, 2, row, col], abs=1e-6)

    # a click still picks the source (query) and target (key) tokens
    click(qtbot, pane, data_to_widget(pane, ax, 705, 703))
    assert (w.state.source, w.state.target) == (703, 705)

    # another head keeps the view and computes its exact cells
    w.state.select_head(1, 3)
    settle(qtbot, pane)
    rows, cols = pane.artists.exact_span
    seen = local[rows, cols]
    np.testing.assert_allclose(
        np.ma.getdata(pane.displayed_values())[seen], theirs[1, 3, rows, cols][seen], atol=1e-6
    )

    # "fit" shows the blocks again; the export holds what the pane draws: the overview
    pane.fit_button.click()
    settle(qtbot, pane)
    assert pane.artists.exact_span is None and pane.displayed_values().shape == mean.shape
    export = pair_grid_export(w.state.analysis, Source("tiny"), layer=1, head=3, block="mean")
    want = pooled(theirs[1, 3], local, c)[1]
    got = np.array([[np.nan if v is None else v for v in r] for r in export.data["values"]])
    np.testing.assert_allclose(got, want, atol=1e-6)
    assert export.data["overview"] == {"block": c, "pooling": "mean", "tokens": t}
    assert len(export.rows) == want.size
    w.close()


def test_a_text_over_the_memory_budget_is_refused_in_a_dialog(qtbot, tmp_path, long_folder, monkeypatch):
    """A budget made for 600 tokens (``HEADLIGHT_MEMORY`` set to the estimate of a 600-token
    recording without the model's own probabilities, which a long text never asks for, with the
    overview a long text keeps): the 2,000-token text is refused in a dialog of one line naming
    the estimate and the longest length that fits; the previous text's recording stays on
    screen, the refused text stays in the box, and the window goes on working (heads, runs)."""
    from viewer.model.budget import pass_estimate
    from viewer.model.loader import open_model

    loaded = open_model(long_folder)
    monkeypatch.setenv(
        "HEADLIGHT_MEMORY", str(pass_estimate(loaded, [600], keep=True, own_probs=False, overview=True).total)
    )
    w = open_window(qtbot, tmp_path, long_folder)
    previous = run_and_wait(qtbot, w, "she fixed the brake", evidence=False)
    settle(qtbot, w.pair_grid)
    assert w.pair_grid.drawn_recording is previous.recording
    long_text = text_of(LONG_WORDS)
    w.text_edit.setPlainText(long_text)
    w.run_current()
    qtbot.waitUntil(lambda: bool(w.errors), timeout=WAIT_MS)
    message = w.errors[-1]
    assert w.error_dialog is not None and w.error_dialog.isVisible() and w.error_dialog.text() == message
    assert "\n" not in message and "needs about" in message and "is free" in message
    assert message.startswith("recording ") and " tokens needs about " in message
    most = int(message.split("at most ")[1].split(" tokens")[0].replace(",", ""))
    assert 500 <= most < 1000  # the longest length that fits, near the 600 the budget was made for
    assert f"--max-tokens {most}" in message
    qtbot.waitUntil(lambda: not w.worker.busy, timeout=WAIT_MS)
    # the previous text stays: its analysis, its drawn grid; the refused text is not lost
    assert w.state.analysis is previous
    assert w.pair_grid.drawn_recording is previous.recording
    assert w.editor_text() == long_text
    assert "error:" in w.status_label.text() and not w.progress.isVisible()
    w.error_dialog.accept()
    # still usable: another head is drawn, another text runs
    w.state.select_head(1, 2)
    settle(qtbot, w.pair_grid)
    assert any("layer 1 · head 2" in t for t in drawn_titles(w.pair_grid))
    assert run_and_wait(qtbot, w, "she fixed it", evidence=False).recording.n_tokens < 10
    w.close()


def test_a_huge_text_is_shown_in_part_and_run_whole(qtbot, window):
    box = window.text_edit
    huge = "the mechanic trued the wheel and she replaced the chain " * 40_000  # 2.2 MB, one line
    box.setPlainText(huge)
    assert box.partial and box.isReadOnly() and len(box.toPlainText()) == SHOWN_CHARS
    assert box.text() == huge and window.editor_text() == huge
    assert window.text_note.isVisible() and f"{len(huge):,} characters" in window.text_note.text()
    analysis = run_and_wait(qtbot, window, huge, evidence=False)
    assert analysis.recording.text == huge and analysis.recording.truncated
    assert box.partial and box.text() == huge  # running it kept the box as it was
    # "clear" empties the box for typing; a long paste is shown in part again
    window.text_note.linkActivated.emit("clear")
    assert box.text() == "" and not box.isReadOnly() and not window.text_note.isVisible()
    mime = QMimeData()
    mime.setText(huge)
    box.insertFromMimeData(mime)
    assert box.partial and box.text() == huge
    box.setPlainText("she fixed")
    mime.setText(" it")
    box.moveCursor(box.textCursor().MoveOperation.End)
    box.insertFromMimeData(mime)
    assert not box.partial and box.text() == "she fixed it"
