"""Insertion tests beside the shortcut report, and the fixation plot, in the real window.

On the demo model, whose footer "[via portal]" is a real shortcut. References: transformers' own
forward on the texts with "portal" appended (tests/reference.py, Wilson 1927 written out there)
and the shortcut search's ranking (what ``headlight shortcuts`` prints) on the same texts.
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
def messages(tmp_path):
    """Every third sample message (40, 21 of them with the footer), to keep the window's five
    insertion tests short."""
    import json

    lines = (SAMPLES / "coop_messages.jsonl").read_text(encoding="utf-8").splitlines()[::3]
    path = tmp_path / "half.jsonl"
    path.write_text("".join(json.dumps(json.loads(line)) + "\n" for line in lines), encoding="utf-8")
    return path


def test_insertion_column_and_fixation_plot(qtbot, demo_window, messages):
    from tests import reference
    from viewer.demo import MODEL_DIR
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
    shown = w.state.insertions["portal"]
    assert shown.target_label == "billing"
    # "portal" appended to every text the model does not predict billing, by transformers alone
    hf = reference.open_hf(MODEL_DIR)
    texts = [i.text.strip() for i in load_text_set(messages)]
    billing = hf.model.config.label2id["billing"]
    tried = [k for k, p in enumerate(reference.class_probabilities(hf, texts).argmax(axis=1)) if p != billing]
    after = reference.class_probabilities(hf, [texts[k] + " portal" for k in tried]).argmax(axis=1)
    flipped = [k for k, p in zip(tried, after, strict=True) if p == billing]
    end = shown.tally.entry("end")
    assert (end["tried"], end["flipped"]) == (len(tried), flipped)
    assert end["flip_low"] == pytest.approx(reference.wilson(len(flipped), len(tried))[0], abs=1e-12)
    row = pane.words.index("portal")
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
