"""Insertion tests beside the shortcut report, and the fixation plot, in the real window.

On the demo model, whose footer "[via portal]" is a real shortcut. References: transformers' own
forward on the texts with "portal" appended (tests/reference.py, Wilson 1927 written out there)
and the shortcut search's ranking (what ``headlight shortcuts`` prints) on the same texts.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from tests.gui.conftest import WAIT_MS, open_window, settle, wait_idle

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


def test_the_footer_headline_after_search_and_insertion_test_then_its_mechanism(qtbot, demo_window, messages):
    """ "Search shortcuts", then "Insertion test", and nothing else: the top phrase is tried as
    the texts write it, "[via portal]", and the line under the buttons states its numbers, which
    transformers' own forward gives with the footer appended (tests/reports/test_insertion.py).
    Then the user's own phrase, and the mechanism check on the selected layer's heads, against
    the same forward with those heads masked by the test's own hook."""
    from tests.reports.test_insertion import FOOTER, footer_at_the_end_of
    from viewer.reports.textsets import load_text_set

    w = demo_window
    w.open_textset(str(messages))
    qtbot.waitUntil(lambda: w.state.textset is not None, timeout=WAIT_MS)
    w.shortcuts_action.trigger()
    qtbot.waitUntil(lambda: w.state.shortcuts is not None, timeout=WAIT_MS)
    pane = w.shortcut_pane
    assert "via portal" in pane.insertion_words()  # the top phrase beside the top words
    w.insert_action.trigger()
    qtbot.waitUntil(lambda: w.state.insertions is not None, timeout=WAIT_MS)
    footer = w.state.insertions["via portal"]
    assert footer.phrase == FOOTER and footer.target_label == "billing"
    items = load_text_set(messages)
    tried, flipped = footer_at_the_end_of(items)
    end = footer.tally.entry("end")
    assert (end["tried"], end["flipped"]) == (len(tried), flipped)
    headline = f"'{FOOTER}' inserted at the end: {len(flipped)} of {len(tried)} texts not predicted billing"
    assert pane.insertion_line.isVisible() and headline in pane.insertion_line.text()
    assert headline in w.status_label.text()
    # beside it, the set's accuracy with the footer removed and inserted (docs/definitions.md,
    # "Cue accuracy"), against transformers' own forward (tests/reports/test_cue_accuracy.py)
    from tests.reports.test_cue_accuracy import reference_predictions

    expected = reference_predictions(items)
    gold = [w.state.model.labels.index(i.label) for i in items]
    shares = {v: sum(p == y for p, y in zip(expected[v], gold, strict=True)) / len(gold) for v in expected}
    for variant, share in shares.items():
        assert footer.cue_accuracy[variant]["accuracy"] == pytest.approx(share), variant
    assert (
        f"set accuracy {shares['given']:.3f} as given, {shares['removed']:.3f} with it removed, "
        f"{shares['inserted']:.3f} with it inserted"
    ) in pane.insertion_line.text()

    # the user's own word: tested first and stated first; one that points to no class says why
    pane.own_edit.setText("  portal ")
    w.state.set_insertions(None)
    w.controller.run_insertions([], own=pane.own_word())
    qtbot.waitUntil(lambda: w.state.insertions is not None, timeout=WAIT_MS)
    assert list(w.state.insertions) == ["portal"]
    assert pane.insertion_line.text().startswith("insertion test: 'portal' inserted at the end")
    errors = len(w.errors)
    pane.own_edit.setText("zeppelin")
    w.insert_action.trigger()
    qtbot.waitUntil(lambda: len(w.errors) > errors, timeout=WAIT_MS)
    assert w.errors[-1].startswith("insertion test of 'zeppelin': ") and "no text" in w.errors[-1]
    w.error_dialog.accept()
    pane.own_edit.setText("")
    wait_idle(qtbot, w)  # the report's words were tested again beside it
    assert "via portal" in w.state.insertions and "zeppelin" not in w.state.insertions

    # the mechanism check on layer 1's heads (the head mean of layer 1 selected)
    w.state.select_head(1, None)
    w.mechanism_action.trigger()
    qtbot.waitUntil(lambda: w.state.insertions["via portal"].mechanism is not None, timeout=WAIT_MS)
    mech = w.state.insertions["via portal"].mechanism
    assert mech.heads == ((1, 0), (1, 1), (1, 2), (1, 3))
    tried2, flipped2 = footer_at_the_end_of(items, mech.heads)
    m = mech.tally.entry("end")
    assert (m["tried"], m["flipped"]) == (len(tried2), flipped2)
    share = (len(flipped) / len(tried) - len(flipped2) / len(tried2)) / (len(flipped) / len(tried))
    assert mech.share_carried("end") == pytest.approx(share, abs=1e-12)
    assert f"they carry {share:.0%} of the flip rate" in pane.insertion_line.text()
