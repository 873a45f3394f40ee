"""Panes are drawn on the render thread; the window must still show exactly the current numbers.

References: the recording's own probabilities (``Recording.own_probs``), the token strings of
``tests.figures.readers.visible_tick_labels`` (what matplotlib's locator chose for the axis), and
the selection written by a click on a head-map cell.
"""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest

from tests.figures.readers import visible_tick_labels
from tests.gui.conftest import WAIT_MS, click, data_to_widget, run_and_wait, settle
from viewer.figures import style
from viewer.gui.panes.render import MarkItem, TextItem


def _spy_builds(pane, threads: list) -> None:
    render = pane.render

    def spying():
        result = render()
        if callable(result):

            def build():
                threads.append(threading.current_thread())
                result()

            return build
        return result

    pane.render = spying


def test_panes_are_built_off_the_gui_thread_and_show_the_new_text(qtbot, window):
    threads: list = []
    _spy_builds(window.pair_grid, threads)
    first = run_and_wait(qtbot, window, evidence=False).recording
    settle(qtbot, window.pair_grid)
    second = run_and_wait(qtbot, window, "a short text", evidence=False).recording  # fewer tokens
    pane = window.pair_grid
    settle(qtbot, pane)
    assert threads and all(t is not threading.main_thread() for t in threads)
    assert second.n_tokens != first.n_tokens
    # the reused axes hold the second text: its values, its size, its token labels
    np.testing.assert_array_equal(np.ma.getdata(pane.displayed_values()), second.own_probs[0, 0])
    assert (pane.artists.n_rows, pane.artists.n_cols) == (second.n_tokens, second.n_tokens)
    labels = visible_tick_labels(pane.artists.ax, "x")
    assert labels and set(labels) <= set(style.token_labels(second.tokens))
    # the frame on screen is as large as the view, and its texts are the figure's labels
    image = pane.canvas.image
    ratio = pane.canvas.device_pixel_ratio
    assert (image.width(), image.height()) == (
        round(pane.canvas.width() * ratio),
        round(pane.canvas.height() * ratio),
    )
    painted = [t.text for t in pane.canvas.last_texts if isinstance(t, TextItem)]
    assert "key (attended to)" in painted and "query (attending)" in painted
    assert set(labels) <= set(painted)
    # one tick mark per labelled token, below the grid, as long as the style's ticks, and
    # really painted: dark pixels where matplotlib would have drawn its own tick
    marks = [m for m in pane.canvas.last_texts if isinstance(m, MarkItem)]
    x_marks = [m for m in marks if m.x0 == m.x1]
    assert len(x_marks) == len(labels)
    scale = pane.figure.dpi / 72.0
    assert all(m.y1 - m.y0 == pytest.approx(style.TICK_LENGTH_PT * scale) for m in x_marks)
    ax = pane.artists.ax
    bottom = pane.figure.bbox.height - ax.get_window_extent().y0
    assert all(m.y0 == pytest.approx(bottom) for m in x_marks)
    mark = x_marks[len(x_marks) // 2]
    pixel = image.pixelColor(int(mark.x0), int(mark.y0 + (mark.y1 - mark.y0) / 2))
    assert pixel.lightness() < 128


def test_a_click_while_a_frame_is_drawn_is_kept_and_replayed(qtbot, window):
    run_and_wait(qtbot, window, evidence=False)
    pane = window.head_map
    settle(qtbot, pane)
    point = data_to_widget(pane, pane.artists.ax, 3, 1)  # head 3, layer 1
    pane.request_draw(lambda: time.sleep(0.4))  # the render thread is busy with this pane
    assert pane.drawing
    click(qtbot, pane, point)
    assert (window.state.layer, window.state.head) == (0, 0)  # not handled yet...
    qtbot.waitUntil(lambda: (window.state.layer, window.state.head) == (1, 3), timeout=WAIT_MS)
    settle(qtbot, pane)  # ... but not lost either


def test_a_drawing_error_is_a_one_line_message_and_the_pane_recovers(qtbot, window):
    run_and_wait(qtbot, window, evidence=False)
    pane = window.pair_grid
    settle(qtbot, pane)

    def broken() -> None:
        raise ValueError("a deliberately broken build")

    pane.request_draw(broken)
    settle(qtbot, pane)
    assert not pane.showing_figure
    assert pane.message.text() == "could not draw this pane: a deliberately broken build"
    window.state.select_head(1, 2)
    settle(qtbot, pane)
    assert pane.showing_figure
    rec = window.state.analysis.recording
    np.testing.assert_array_equal(np.ma.getdata(pane.displayed_values()), rec.own_probs[1, 2])


def test_merged_builds_take_the_fast_path_only_if_every_build_allows_it():
    from types import SimpleNamespace

    from viewer.gui.panes.render import chain_builds

    def build(fast: bool):
        def run():
            order.append(fast)
            if fast:
                pane.fast = True

        return run

    for first, then, expected in (
        (True, False, False),
        (False, True, False),
        (True, True, True),
        (False, False, False),
    ):
        pane, order = SimpleNamespace(fast=False), []
        chain_builds(pane, build(first), build(then))()
        assert order == [first, then] and pane.fast is expected


def test_a_new_source_token_moves_the_evidence_marker_without_a_rebuild(qtbot, window):
    run_and_wait(qtbot, window, evidence=True)
    pane = window.evidence
    settle(qtbot, pane)
    artists, zoomed = pane.artists, pane.artists.ax.get_xlim()
    window.state.select_tokens(3, None)
    settle(qtbot, pane)
    assert pane.artists is artists  # same figure: a zoomed view stays as it is
    assert pane.artists.ax.get_xlim() == zoomed
    assert pane.artists.marker.get_visible() and pane.artists.marker.get_x() == 2.5
    assert pane.showing_figure


def test_full_garbage_collections_wait_for_an_idle_window(qtbot, window):
    # reference: the interpreter's own collector (``gc``) and a weak reference to a cycle
    import gc
    import weakref

    from viewer.gui.app import tune_collector

    class Node:
        pass

    def quiet() -> bool:  # no model work and no pane with a frame due
        return not window.worker.busy and all(pane.idle for pane in window.figure_panes)

    window.collector.stop()  # the test calls the idle check itself
    run_and_wait(qtbot, window, evidence=False)
    qtbot.waitUntil(quiet, timeout=WAIT_MS)  # the run's check and the panes' redraws are done
    thresholds = gc.get_threshold()
    tune_collector()  # as ``headlight`` does: no automatic full collections
    try:
        a, b = Node(), Node()
        a.other, b.other = b, a
        probe = weakref.ref(a)
        gc.collect(1)  # alive: the cycle moves to the oldest generation ...
        del a, b  # ... and only then becomes garbage, which a young collection cannot free
        gc.collect(1)
        assert probe() is not None
        window._busy_at = time.monotonic()
        assert not window.collect_when_idle() and probe() is not None  # busy just now
        window.worker.submit("hold", lambda ctx: time.sleep(0.3))
        window._busy_at -= 60
        assert not window.collect_when_idle() and probe() is not None  # model work running
        qtbot.waitUntil(quiet, timeout=WAIT_MS)
        window._busy_at -= 60
        assert window.collect_when_idle() and probe() is None
    finally:
        gc.set_threshold(*thresholds)


def test_a_pane_title_too_long_for_its_header_ends_in_an_ellipsis(qtbot, window):
    pane = window.head_map
    label = pane.title_label
    long_title = "head map · entropy: compared − current · " + "a rather long model name " * 12
    pane.set_title(long_title)
    qtbot.wait(10)
    shown = label.shown_text()
    assert label.width() > 0 and shown.endswith("…") and len(shown) < len(long_title)
    assert long_title.startswith(shown[:-1])
    assert label.toolTip() == long_title  # the whole title on hover
    pane.set_title("head map")
    assert label.shown_text() == "head map"
