"""The core loop on the real window: run a text, click and hover the panes, check the numbers.

References: the recording's own probabilities (``Recording.own_probs``), the numeric core's link
scores (``viewer.core.links.link_scores`` on sub-tokens found with ``find_word`` /
``word_token_indices``, exactly as ``headlight links`` finds them) and the core's head metrics.
"""

from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import Qt

from tests.gui.conftest import (
    TEXT,
    WAIT_MS,
    click,
    data_to_widget,
    hover,
    run_and_wait,
    settle,
)
from viewer.core.headstats import HeadStats
from viewer.core.links import PairTokens, find_word, link_scores, word_token_indices


def test_a_run_fills_every_pane_and_the_check_badge(qtbot, window):
    analysis = run_and_wait(qtbot, window)
    rec = analysis.recording
    for pane in (window.pair_grid, window.head_map, window.evidence):
        settle(qtbot, pane)
        assert pane.showing_figure, pane.title
    np.testing.assert_array_equal(np.ma.getdata(window.pair_grid.displayed_values()), rec.own_probs[0, 0])
    stats = HeadStats(rec.n_layers, rec.n_heads)
    stats.add(rec.own_probs, rec.special, rec.causal)
    np.testing.assert_allclose(np.ma.getdata(window.head_map.displayed_values()), stats.summary().entropy)
    assert window.badge.text().startswith("check passed")
    assert analysis.check.max_abs_error < 1e-5
    ev = window.state.evidence
    labels = ev.strip_rows()[0]
    assert "knockout" in labels and "summary attention" in labels
    assert window.evidence.artists.n_tokens == rec.n_tokens


def test_clicking_a_head_map_cell_shows_that_heads_probabilities(qtbot, window):
    rec = run_and_wait(qtbot, window, evidence=False).recording
    pane = window.head_map
    settle(qtbot, pane)
    click(qtbot, pane, data_to_widget(pane, pane.artists.ax, 2, 1))  # head 2, layer 1
    assert (window.state.layer, window.state.head) == (1, 2)
    settle(qtbot, window.pair_grid)
    shown = window.pair_grid.displayed_values()
    np.testing.assert_array_equal(np.ma.getdata(shown), rec.own_probs[1, 2])
    assert "layer 1 · head 2" in window.pair_grid.title_label.text()


def test_clicking_a_row_label_selects_the_layer_mean(qtbot, window):
    rec = run_and_wait(qtbot, window, evidence=False).recording
    pane = window.head_map
    settle(qtbot, pane)
    ax = pane.artists.ax
    point = data_to_widget(pane, ax, -0.5, 1)
    point.setX(point.x() - 15)  # on the "layer 1" label, left of the grid
    click(qtbot, pane, point)
    assert (window.state.layer, window.state.head) == (1, None)
    settle(qtbot, window.pair_grid)
    np.testing.assert_allclose(
        np.ma.getdata(window.pair_grid.displayed_values()), rec.own_probs[1].mean(axis=0), rtol=1e-6
    )
    assert window.pair_grid.mean_box.isChecked()


def test_hovering_a_cell_shows_its_exact_value(qtbot, window):
    rec = run_and_wait(qtbot, window, evidence=False).recording
    window.state.select_head(1, 3)
    pane = window.pair_grid
    settle(qtbot, pane)
    hover(pane, data_to_widget(pane, pane.artists.ax, 5, 3))  # key 5, query 3
    text = pane.hover_text
    assert f"{rec.own_probs[1, 3, 3, 5]:.6f}" in text
    assert f"'{rec.tokens[3]}'" in text and f"'{rec.tokens[5]}'" in text
    assert "layer 1 · head 3" in text


def test_a_clicked_source_gives_the_cores_link_scores(qtbot, window):
    rec = run_and_wait(qtbot, window, evidence=False).recording
    pane = window.pair_grid
    settle(qtbot, pane)
    # the reference: core sub-tokens of the words "she" and "mechanic"
    she = word_token_indices(find_word(TEXT, "she"), rec.offsets)
    mechanic = word_token_indices(find_word(TEXT, "mechanic"), rec.offsets)
    expected = link_scores(rec.own_probs[:, :, she[0]], PairTokens(source=she, candidates=(mechanic,)))[0]
    click(qtbot, pane, data_to_widget(pane, pane.artists.ax, int(mechanic[-1]), int(she[0])))
    assert (window.state.source, window.state.target) == (int(she[0]), int(mechanic[-1]))
    settle(qtbot, window.links)
    assert window.links.showing_figure
    np.testing.assert_allclose(window.links.per_head, expected, rtol=0, atol=0)
    # the bars for the selected head: the same rule over every word of the text
    units = window.state.analysis.units
    target_unit = units.unit_of(int(mechanic[0]))
    layer, head = window.state.layer, window.state.head
    assert window.links.scores[target_unit] == expected[layer, head]
    # another head: the same figure with that head's bars (the core's score for each bar)
    drawn = window.links.artists
    window.state.select_head(1, 2)
    settle(qtbot, window.links)
    assert window.links.artists is drawn
    bars = drawn.bar_artists[0]
    for bar, unit in zip(bars, drawn.shown, strict=True):
        score = link_scores(
            rec.own_probs[:, :, she[0]], PairTokens(source=she, candidates=(units.tokens[unit],))
        )
        assert bar.get_width() == pytest.approx(score[0][1, 2], abs=1e-7)
    assert target_unit in drawn.shown
    # and the head map's "link score" metric is the same (L, H) grid
    window.head_map.metric_box.setCurrentIndex(window.head_map.metric_box.findData("link"))
    settle(qtbot, window.head_map)
    np.testing.assert_array_equal(np.ma.getdata(window.head_map.displayed_values()), expected)


def test_arrow_keys_move_through_heads_and_layers(qtbot, window):
    run_and_wait(qtbot, window, evidence=False)
    settle(qtbot, window.pair_grid)
    window.pair_grid.canvas.setFocus()
    window.state.select_head(0, 0)
    qtbot.keyClick(window.pair_grid.canvas, Qt.Key.Key_Right)
    assert window.state.head == 1
    qtbot.keyClick(window.pair_grid.canvas, Qt.Key.Key_Down)
    assert window.state.layer == 1
    qtbot.keyClick(window.pair_grid.canvas, Qt.Key.Key_Up)
    assert window.state.layer == 0


def test_ctrl_enter_runs_the_text_box(qtbot, window):
    window.text_edit.setPlainText("she fixed it")
    window.text_edit.setFocus()
    qtbot.keyClick(window.text_edit, Qt.Key.Key_Return, Qt.KeyboardModifier.ControlModifier)
    qtbot.waitUntil(lambda: window.state.analysis is not None, timeout=60_000)
    assert window.state.analysis.recording.text == "she fixed it"
    assert window.text_edit.toPlainText() == "she fixed it"  # no newline typed


def test_compare_mode_shows_the_metric_difference(qtbot, window, tiny_dir_b):
    current = run_and_wait(qtbot, window, evidence=False)
    window.compare_pane.model_radio.setChecked(True)
    window.compare_pane.folder_edit.setText(str(tiny_dir_b))
    assert window.state.compare_target == ("model", str(tiny_dir_b))
    window.run_compare()
    qtbot.waitUntil(lambda: window.state.compare is not None, timeout=60_000)
    other = window.state.compare
    assert other.recording.text == current.recording.text
    assert window.state.difference
    pane = window.head_map
    settle(qtbot, pane)
    expected = other.heads.entropy - current.heads.entropy
    np.testing.assert_allclose(np.ma.getdata(pane.displayed_values()), expected)
    assert pane.artists.diverging
    assert pane.artists.image.norm.vcenter == 0.0
    settle(qtbot, window.compare_pane.grid)
    np.testing.assert_array_equal(
        np.ma.getdata(window.compare_pane.grid.displayed_values()), other.recording.own_probs[0, 0]
    )
    window.clear_compare()
    settle(qtbot, pane)
    assert not pane.artists.diverging


def test_compare_with_a_second_text_shows_it_beside_the_first(qtbot, window):
    # reference: the second text's own recording and the core's per-text head metrics
    current = run_and_wait(qtbot, window, evidence=False)
    # shorter than TEXT whatever the tokenizer learnt: at most 7 + 4 pieces and two specials
    # here, at least 14 words and brackets and two specials there
    second_text = "invoice paid"
    window.compare_pane.text_radio.setChecked(True)
    window.compare_pane.text_edit.setText(second_text)
    assert window.state.compare_target == ("text", second_text)
    window.run_compare()
    qtbot.waitUntil(lambda: window.state.compare is not None, timeout=60_000)
    other = window.state.compare
    assert other.recording.text == second_text
    assert other.recording.model_name == current.recording.model_name
    grid = window.compare_pane.grid
    window.state.select_head(1, 0)
    settle(qtbot, grid)
    np.testing.assert_array_equal(np.ma.getdata(grid.displayed_values()), other.recording.own_probs[1, 0])
    assert grid.artists.n_rows == other.recording.n_tokens != current.recording.n_tokens
    stats = HeadStats(other.recording.n_layers, other.recording.n_heads)
    stats.add(other.recording.own_probs, other.recording.special, other.recording.causal)
    pane = window.head_map
    settle(qtbot, pane)
    np.testing.assert_allclose(
        np.ma.getdata(pane.displayed_values()), stats.summary().entropy - current.heads.entropy
    )
    # the main pair grid still shows the first text
    settle(qtbot, window.pair_grid)
    np.testing.assert_array_equal(
        np.ma.getdata(window.pair_grid.displayed_values()), current.recording.own_probs[1, 0]
    )


def test_dragging_across_the_evidence_strip_knocks_the_span_out(qtbot, window):
    """docs/definitions.md, "Flat knockout": a drag from token 1 to token 3 deletes tokens 1-3
    together; reference: the transformers model's own forward on the shortened ids."""
    import torch

    rec = run_and_wait(qtbot, window).recording
    pane = window.evidence
    settle(qtbot, pane)
    ax = pane.artists.ax
    qtbot.mousePress(pane.canvas, Qt.MouseButton.LeftButton, pos=data_to_widget(pane, ax, 3, 0))
    qtbot.mouseRelease(pane.canvas, Qt.MouseButton.LeftButton, pos=data_to_widget(pane, ax, 1, 0))
    qtbot.waitUntil(lambda: window.state.evidence.span is not None, timeout=WAIT_MS)
    span = window.state.evidence.span
    assert (span.first, span.last, span.deleted) == (1, 3, 3)
    loaded = window.worker.models["main"]
    keep = [i for t, i in enumerate(rec.token_ids.tolist()) if not 1 <= t <= 3]
    with torch.no_grad():
        logits = loaded.model(input_ids=torch.tensor([keep])).logits[0].double()
    expected = float(torch.softmax(logits, -1)[window.state.evidence.target])
    assert abs(span.p_after - expected) < 1e-9
    settle(qtbot, pane)
    assert "span knockout of" in pane.title_label.text()
    box = [p for p in pane.artists.ax.patches if p.get_linestyle() == "--"]  # mark_span's outline
    assert len(box) == 1 and box[0].get_x() == 0.5 and box[0].get_width() == 3
