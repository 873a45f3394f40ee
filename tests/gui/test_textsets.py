"""Text sets and the shortcut report in the real window.

References: the text-set file's own labels, transformers' own predictions for the same texts,
``viewer.reports.shortcuts.shortcut_search`` (what ``headlight shortcuts`` prints) for the
shortcut report's numbers, and the texts holding a word, read off ``TEXTS`` by hand.
"""

from __future__ import annotations

import json

import pytest

from tests.gui.conftest import WAIT_MS

TEXTS = [
    ("the mechanic trued the wheel [via portal]", "repair"),
    ("a member asked about the invoice [via portal]", "billing"),
    ("membership renewal is due next month", "membership"),
    ("he fixed the puncture but the tyre was flat", "repair"),
    ("billing question about the overcharge [via portal]", "billing"),
    ("the courier left the frame at the workshop", "repair"),
    ("please call me back about the gears [via portal]", "membership"),
    ("the chain is loose again", "billing"),
]


@pytest.fixture
def textset_file(tmp_path):
    path = tmp_path / "messages.jsonl"
    path.write_text("".join(json.dumps({"text": t, "label": y}) + "\n" for t, y in TEXTS), encoding="utf-8")
    return path


def open_set(qtbot, window, path):
    old = window.state.textset
    window.open_textset(path if hasattr(path, "split") else str(path))
    qtbot.waitUntil(lambda: window.state.textset not in (None, old) or bool(window.errors), timeout=WAIT_MS)
    assert not window.errors, window.errors
    return window.state.textset


def reference_predictions(folder) -> list[str]:
    """The classes plain transformers predicts for TEXTS (not the project's loader)."""
    import torch
    from transformers import AutoModelForSequenceClassification, AutoTokenizer

    tok = AutoTokenizer.from_pretrained(folder, local_files_only=True)
    model = AutoModelForSequenceClassification.from_pretrained(folder, local_files_only=True)
    model.eval()
    with torch.no_grad():
        logits = model(**tok([t for t, _ in TEXTS], padding=True, return_tensors="pt")).logits
    return [model.config.id2label[int(k)] for k in logits.argmax(-1)]


def test_a_text_set_lists_predictions_and_filters_to_mistakes(qtbot, window, textset_file):
    result = open_set(qtbot, window, textset_file)
    assert [r.text for r in result.rows] == [t for t, _ in TEXTS]
    assert [r.label for r in result.rows] == [y for _, y in TEXTS]
    predicted = reference_predictions(window.state.model.folder)
    assert [r.predicted for r in result.rows] == predicted
    pane = window.textset_pane
    assert pane.table.rowCount() == len(TEXTS)
    # mistakes from the file's labels against transformers' own predictions
    mistakes = [i for i, ((_, label), p) in enumerate(zip(TEXTS, predicted, strict=True)) if p != label]
    assert mistakes, "the random tiny model should get some of these wrong"
    # docs/definitions.md, "Accuracy": right predictions over labelled texts
    assert result.accuracy == pytest.approx(1 - len(mistakes) / len(TEXTS), abs=1e-12)
    assert f"accuracy {1 - len(mistakes) / len(TEXTS):.1%}" in window.textset_pane.summary.text()
    pane.mistakes_box.click()
    assert window.state.mistakes_only
    assert pane.rows_shown == mistakes
    assert pane.table.rowCount() == len(mistakes)
    for r in range(pane.table.rowCount()):
        assert pane.table.item(r, 2).text() != pane.table.item(r, 3).text()  # label ≠ predicted
        assert pane.table.item(r, 5).text() == "✗"
    # choosing a row runs that text, with its label shown by the evidence strip
    pane.table.selectRow(0)
    qtbot.waitUntil(lambda: window.state.analysis is not None, timeout=WAIT_MS)
    first = result.rows[mistakes[0]]
    assert window.state.analysis.recording.text == first.text
    assert window.state.analysis.label == first.label
    # the head map can show the whole set (HeadStats over every text, as `headlight heads`)
    window.head_map.scope_box.setCurrentIndex(1)
    assert window.state.scope == "set"


def test_the_shortcut_report_matches_the_search_and_lists_a_words_texts(qtbot, window, textset_file):
    from viewer.model.loader import open_model
    from viewer.reports.shortcuts import shortcut_search
    from viewer.reports.textsets import load_text_set

    open_set(qtbot, window, textset_file)
    window.search_shortcuts()
    qtbot.waitUntil(lambda: window.state.shortcuts is not None, timeout=WAIT_MS)
    reference = shortcut_search(
        open_model(window.state.model.folder), load_text_set(textset_file)
    ).words.ranking()
    pane = window.shortcut_pane
    assert pane.words == [row["token"] for row in reference]
    assert pane.table.rowCount() == len(reference)
    for r, row in enumerate(reference):
        assert pane.table.item(r, 1).text() == str(row["count"])
        assert float(pane.table.item(r, 2).text()) == pytest.approx(row["flip_rate"], abs=5e-4)
        assert float(pane.table.item(r, 4).text()) == pytest.approx(row["mean_drop"], abs=5e-4)
    pane.table.selectRow(pane.words.index("portal"))
    assert window.state.word == "portal"
    assert window.textset_pane.rows_shown == [0, 1, 4, 6]  # the texts ending "[via portal]"
    window.textset_pane.clear_word.click()
    assert len(window.textset_pane.rows_shown) == len(TEXTS)


def test_a_phrase_search_ranks_word_pairs_as_the_command_does(qtbot, window, textset_file):
    # reference: ``shortcut_search(..., phrases=True).phrases`` (what ``headlight shortcuts``
    # prints under "phrases"); the texts holding "via portal" read off TEXTS by hand
    from viewer.model.loader import open_model
    from viewer.reports.shortcuts import shortcut_search
    from viewer.reports.textsets import load_text_set

    open_set(qtbot, window, textset_file)
    pane = window.shortcut_pane
    pane.phrases_box.setChecked(True)
    window.search_shortcuts()
    qtbot.waitUntil(lambda: window.state.shortcuts is not None, timeout=WAIT_MS)
    reference = shortcut_search(
        open_model(window.state.model.folder), load_text_set(textset_file), phrases=True
    ).phrases.ranking()
    assert pane.view_box.isVisibleTo(pane)
    pane.view_box.setCurrentIndex(pane.view_box.findData("phrases"))
    assert pane.table.horizontalHeaderItem(0).text() == "phrase"
    assert pane.words == [row["token"] for row in reference] and reference
    for r, row in enumerate(reference):
        assert float(pane.table.item(r, 2).text()) == pytest.approx(row["flip_rate"], abs=5e-4)
    pane.table.selectRow(pane.words.index("via portal"))  # in 4 texts: ranked (>= 3)
    assert window.state.word == "via portal"
    assert window.textset_pane.rows_shown == [0, 1, 4, 6]
    pane.view_box.setCurrentIndex(pane.view_box.findData("words"))
    assert pane.table.horizontalHeaderItem(0).text() == "word"
    assert "portal" in pane.words
    # the summary names the search; no phrase flips a text here, so it names no top phrase
    assert pane.summary.text().startswith("screened, ") and "top phrase" not in pane.summary.text()
    # a report whose top phrase flips 2 of its 4 texts: named as TEXTS write it (by hand)
    from viewer.core.shortcuts import KnockoutOutcome, KnockoutTally
    from viewer.reports.shortcuts import ShortcutReport

    phrases = KnockoutTally(window.state.shortcuts.words.labels)
    for n in range(4):
        phrases.add_text({"via portal": KnockoutOutcome(n < 2, 0.5, 0.1, (), 0)})
    words = KnockoutTally(window.state.shortcuts.words.labels)
    window.state.set_shortcuts(ShortcutReport(words, phrases, 8, "screened", 10, 1, 20, 8))
    assert "top phrase “[via portal]”: knocking it out flips 2 of 4 texts" in pane.summary.text()

    # "every word": the exhaustive search, as `headlight shortcuts --exhaustive`
    pane.every_box.setChecked(True)
    window.state.set_shortcuts(None)
    window.search_shortcuts()
    qtbot.waitUntil(lambda: window.state.shortcuts is not None, timeout=WAIT_MS)
    every = shortcut_search(
        open_model(window.state.model.folder), load_text_set(textset_file), exhaustive=True
    ).words.ranking()
    assert window.state.shortcuts.mode == "exhaustive" and pane.summary.text().startswith("every word")
    assert pane.words == [row["token"] for row in every]


def test_a_second_text_set_replaces_the_first_ones_report_and_filter(qtbot, window, textset_file, tmp_path):
    open_set(qtbot, window, textset_file)
    window.search_shortcuts()
    qtbot.waitUntil(lambda: window.state.shortcuts is not None, timeout=WAIT_MS)
    window.shortcut_pane.table.selectRow(window.shortcut_pane.words.index("portal"))
    assert window.state.word == "portal"
    other = tmp_path / "other.txt"
    other.write_text("the wheel wobbles\nmy invoice is wrong\n", encoding="utf-8")
    first = window.state.textset
    window.open_textset(str(other))
    qtbot.waitUntil(lambda: window.state.textset is not first, timeout=WAIT_MS)
    assert window.state.shortcuts is None and window.state.word is None
    assert window.shortcut_pane.table.rowCount() == 0
    assert window.textset_pane.rows_shown == [0, 1]


@pytest.mark.parametrize(
    "metric", ["entropy", "distance", "special", "previous", "same", "next", "confidence"]
)
def test_the_set_scope_head_map_equals_headlight_heads(qtbot, window, textset_file, tmp_path, metric):
    """Reference: ``headlight heads --json`` on the same folder and file."""
    import numpy as np

    from tests.gui.conftest import settle
    from viewer.cli import main

    out = tmp_path / "heads.json"
    assert (
        main(
            [
                "heads",
                window.state.model.folder,
                "--texts",
                str(textset_file),
                "--skip-importance",
                "--quiet",
                "--json",
                str(out),
            ]
        )
        == 0
    )
    expected = np.array(json.loads(out.read_text(encoding="utf-8"))[metric], dtype=float)
    open_set(qtbot, window, textset_file)
    pane = window.head_map
    pane.metric_box.setCurrentIndex(pane.metric_box.findData(metric))
    pane.scope_box.setCurrentIndex(1)
    assert window.state.scope == "set"
    settle(qtbot, pane)
    assert "over the text set" in pane.title_label.text()
    np.testing.assert_allclose(
        np.ma.getdata(pane.displayed_values()), expected, rtol=1e-12, atol=1e-15, equal_nan=True
    )


def test_the_text_set_dialog_reads_every_format_with_its_columns_and_split(qtbot, window, tmp_path):
    """Reference: the CSV's own column as the standard library reads it, and the saved
    dataset's chosen split as datasets loads it."""
    import csv

    import datasets

    from viewer.gui.textset_dialog import FILE_FILTERS, TextSetDialog

    for pattern in ("*.txt", "*.jsonl", "*.csv", "*.parquet", "All files (*)"):
        assert pattern in FILE_FILTERS
    dialog = TextSetDialog(window)
    qtbot.addWidget(dialog)
    assert dialog.folder_button.text() == "Saved dataset folder…"
    path = tmp_path / "routed.csv"
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["id", "message", "route"])
        w.writerows([i, t, y] for i, (t, y) in enumerate(TEXTS))
    dialog.set_path(str(path))
    assert [dialog.text_box.itemText(i) for i in range(dialog.text_box.count())] == ["id", "message", "route"]
    assert not dialog.split_box.isEnabled()
    dialog.text_box.setCurrentText("message")
    dialog.label_box.setCurrentText("route")
    source = dialog.source()
    assert (source.text_column, source.label_column, source.split) == ("message", "route", None)
    ts = open_set(qtbot, window, source)
    with path.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert [(r.text, r.label) for r in ts.rows] == [(r["message"], r["route"]) for r in rows]
    # a saved DatasetDict: the split chooser lists its splits
    folder = tmp_path / "saved"
    part = datasets.Dataset.from_dict({"body": [t for t, _ in TEXTS], "gold": [y for _, y in TEXTS]})
    datasets.DatasetDict({"train": part.select(range(3)), "test": part.select(range(3, 8))}).save_to_disk(
        str(folder)
    )
    dialog.set_path(str(folder))
    assert [dialog.split_box.itemText(i) for i in range(dialog.split_box.count())] == ["train", "test"]
    dialog.split_box.setCurrentText("test")
    dialog.text_box.setCurrentText("body")
    dialog.label_box.setCurrentText("gold")
    ts = open_set(qtbot, window, dialog.source())
    expected = datasets.load_from_disk(str(folder))["test"]
    assert [(r.text, r.label) for r in ts.rows] == list(zip(expected["body"], expected["gold"], strict=True))
    # a file the commands cannot read says so in the dialog, and cannot be opened
    bad = tmp_path / "notes.parquet"
    bad.write_text("not parquet", encoding="utf-8")
    dialog.set_path(str(bad))
    assert "is not a readable Parquet file" in dialog.note.text() and dialog.source() is None
