"""The pair grid's drawn title follows every selection change.

The title is read from the texts painted into the pane's last frame (``PaneView.last_texts``),
so it is what a user (or a screenshot) sees, whichever path drew the frame: a full draw, or the
fast redraw of the few artists that change on a head switch.
"""

from __future__ import annotations

from PySide6.QtCore import Qt

from tests.gui.conftest import click, data_to_widget, run_and_wait, settle
from tests.gui.test_long_grid import drawn_titles


def test_the_drawn_title_follows_arrow_keys_and_head_map_clicks(qtbot, window):
    run_and_wait(qtbot, window, evidence=False)
    pane, heads = window.pair_grid, window.head_map
    settle(qtbot, pane)
    model = window.state.model.name
    assert drawn_titles(pane) == [f"{model} · layer 0 · head 0"]
    pane.canvas.setFocus()
    steps = [
        (lambda: qtbot.keyClick(pane.canvas, Qt.Key.Key_Right), "layer 0 · head 1"),
        (lambda: qtbot.keyClick(pane.canvas, Qt.Key.Key_Down), "layer 1 · head 1"),
        (lambda: qtbot.keyClick(pane.canvas, Qt.Key.Key_Right), "layer 1 · head 2"),
        (lambda: qtbot.keyClick(pane.canvas, Qt.Key.Key_Up), "layer 0 · head 2"),
        (lambda: click(qtbot, heads, data_to_widget(heads, heads.artists.ax, 3, 1)), "layer 1 · head 3"),
        (lambda: click(qtbot, heads, data_to_widget(heads, heads.artists.ax, 0, 0)), "layer 0 · head 0"),
    ]
    for act, name in steps:
        settle(qtbot, heads)
        act()
        settle(qtbot, pane)
        assert drawn_titles(pane) == [f"{model} · {name}"], name
        assert name in pane.title_label.text()
    # a row label of the head map: the layer's head mean
    settle(qtbot, heads)
    point = data_to_widget(heads, heads.artists.ax, -0.5, 1)
    point.setX(point.x() - 15)
    click(qtbot, heads, point)
    settle(qtbot, pane)
    assert drawn_titles(pane) == [f"{model} · layer 1 · head mean"]
