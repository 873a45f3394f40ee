"""Insertion tests beside the shortcut report, and the fixation plot, in the real window.

On the demo model, whose footer "[via portal]" is a real shortcut. References: the reports'
own ``insertion_test`` (what ``headlight insert`` prints) and the shortcut search's ranking
(what ``headlight shortcuts`` prints) on the same texts.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from tests.gui.conftest import WAIT_MS, open_window, settle

SAMPLES = Path(__file__).resolve().parents[2] / "sample_sentences"


@pytest.fixture
def demo_window(qtbot, tmp_path):
    from viewer.demo import MODEL_DIR

    w = open_window(qtbot, tmp_path, MODEL_DIR, "demo")
    yield w
    w.close()


@pytest.fixture
def messages():
    return SAMPLES / "coop_messages.jsonl"


def test_insertion_column_and_fixation_plot(qtbot, demo_window, messages):
    from viewer.model.loader import open_model
    from viewer.reports.insertion import insertion_test
    from viewer.reports.textsets import load_text_set

    w = demo_window
    w.open_textset(str(messages))
    qtbot.waitUntil(lambda: w.state.textset is not None, timeout=WAIT_MS)
    w.search_shortcuts()
    qtbot.waitUntil(lambda: w.state.shortcuts is not None, timeout=WAIT_MS)
    pane = w.shortcut_pane
    top = pane.top_words()
    assert "portal" in top
    w.insert_action.trigger()
    qtbot.waitUntil(lambda: w.state.insertions is not None, timeout=WAIT_MS)
    loaded = open_model(w.state.model.folder)
    items = load_text_set(messages)
    reference = insertion_test(loaded, items, "portal")
    shown = w.state.insertions["portal"]
    assert shown.target_label == reference.target_label == "billing"
    assert shown.tally.to_dict() == reference.tally.to_dict()
    row = pane.words.index("portal")
    end = reference.tally.entry("end")
    header = [pane.table.horizontalHeaderItem(c).text() for c in range(pane.table.columnCount())]
    assert header[6:] == ["flips · repair", "flips · billing", "flips · membership", "inserted → flips into"]
    by_class = w.state.shortcuts.words.entry("portal")["by_class"]
    assert pane.table.item(row, 7).text() == (
        f"{by_class['billing']['flips']}/{by_class['billing']['count']}"
    )
    assert by_class["billing"]["count"] > 0  # the footer's texts are predicted billing
    cell = pane.table.item(row, 9)
    assert cell.text() == f"billing {end['flip_rate']:.0%} (low {end['flip_low']:.2f})"
    assert "random" in cell.toolTip() and "start" in cell.toolTip()

    # the fixation plot: one point per ranked word, at (focus, mean drop)
    plot = w.fixation
    w.fixation_dock.raise_()
    settle(qtbot, plot)
    ranking = w.state.shortcuts.words.ranking()
    offsets = np.asarray(plot.artists.points.get_offsets())
    assert offsets.shape == (len(ranking), 2)
    np.testing.assert_array_equal(offsets[:, 0], [r["focus"] for r in ranking])
    np.testing.assert_array_equal(offsets[:, 1], [r["mean_drop"] for r in ranking])
    # the selected head's attention instead of the head mean: x is that head's share
    w.state.select_head(w.state.layer if w.state.layer is not None else 0, 1)
    plot.head_box.setCurrentIndex(plot.head_box.findData("head"))
    settle(qtbot, plot)
    offsets = np.asarray(plot.artists.points.get_offsets())
    np.testing.assert_array_equal(offsets[:, 0], [r["head_focus"][1] for r in ranking])
    assert not np.array_equal(offsets[:, 0], [r["focus"] for r in ranking])
    # clicking a point picks its word
    from tests.gui.conftest import click, data_to_widget

    i = pane.words.index("portal")
    click(qtbot, plot, data_to_widget(plot, plot.artists.ax, *offsets[i]))
    assert w.state.word == "portal"
