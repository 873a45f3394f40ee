"""Pane export and the window's card export, on the real window with the tiny model.

References: transformers' own forward and the definitions written out in tests/reference.py,
and readers that are not ours (Pillow, ElementTree, pypdf, csv, json).
"""

from __future__ import annotations

import csv
import json
import os
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from pypdf import PdfReader

from tests.conftest import refusal
from tests.gui.conftest import WAIT_MS, run_and_wait, settle, wait_idle
from viewer.figures.export import PRINT_DPI, PRINT_SIZE
from viewer.gui import export as gui_export

TEXTS = [
    ("the mechanic trued the wheel", "repair"),
    ("the invoice for the brake pads", "billing"),
    ("renewal of the membership", "membership"),
    ("the chain and the wheel", "repair"),
]
PAIRS = [
    {
        "text": "the mechanic told the courier that she replaced the chain",
        "source": "she",
        "target": "mechanic",
        "distractors": ["courier"],
    },
    {
        "text": "a member asked the mechanic about the invoice and she paid it",
        "source": "she",
        "target": "member",
        "distractors": ["mechanic"],
    },
]


def read_csv(path: Path) -> list[list[str]]:
    with path.open(newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


def test_pair_grid_export_writes_all_five_files(qtbot, window, tmp_path, tiny_dir):
    """The five files decode with readers that are not ours, and the numbers in them are the
    model's own attention (transformers' output_attentions, layer 1 · head 2)."""
    from tests import reference

    rec = run_and_wait(qtbot, window, evidence=False).recording
    own = reference.attentions(reference.open_hf(tiny_dir), rec.text)[1, 2]  # (T, T)
    window.state.select_head(1, 2)
    settle(qtbot, window.pair_grid)
    stem = tmp_path / "grid"
    written = window.exporter.export_to(window.pair_grid, stem)
    assert sorted(p.suffix for p in written) == [".csv", ".json", ".pdf", ".png", ".svg"]
    with Image.open(stem.with_suffix(".png")) as im:
        assert tuple(round(d) for d in im.info["dpi"]) == (PRINT_DPI, PRINT_DPI)
        assert im.size == (round(PRINT_SIZE[0] * PRINT_DPI), round(PRINT_SIZE[1] * PRINT_DPI))
    assert ET.parse(stem.with_suffix(".svg")).getroot().tag.endswith("svg")
    assert len(PdfReader(stem.with_suffix(".pdf")).pages) == 1
    data = json.loads(stem.with_suffix(".json").read_text(encoding="utf-8"))
    assert (data["layer"], data["head"]) == (1, 2)
    assert data["tokens"] == list(rec.tokens)
    np.testing.assert_allclose(np.array(data["values"]), own, atol=1e-6)
    rows = read_csv(stem.with_suffix(".csv"))
    assert rows[0][:5] == ["query", "query_token", "key", "key_token", "attention_probability"]
    got = np.zeros_like(rec.own_probs[1, 2], dtype=np.float64)
    for q, _qt, k, _kt, p, _vis in rows[1:]:
        got[int(q), int(k)] = float(p)
    assert len(rows) - 1 == rec.n_tokens**2
    np.testing.assert_allclose(got, own, atol=1e-6)


def test_export_figure_is_print_size_with_heading_and_units(qtbot, window):
    run_and_wait(qtbot, window, evidence=False)
    window.state.select_head(0, 1)
    export = gui_export.build_export(window.pair_grid)
    fig = export.figure
    assert tuple(fig.get_size_inches()) == pytest.approx(PRINT_SIZE)
    assert fig is not window.pair_grid.figure
    heading = export.heading[0]
    assert window.state.model.name in heading and "layer 0 · head 1" in heading
    assert "attention probability" in heading
    assert "the mechanic trued" in export.heading[1]
    units = [t.get_text() for ax in fig.axes for t in ax.texts]
    assert "attention probability" in units  # the colour bar's units label
    assert export.stem.endswith("-pair-grid")
    assert export.stem.startswith("the-mechanic-trued")


def test_head_map_export_data_equals_the_shown_metric(qtbot, window, tmp_path, tiny_dir):
    """The exported distances are what the pane shows and what transformers' own attention
    gives: mean over query rows of Σ_j p_ij |i − j| (docs/definitions.md, "Head metrics")."""
    from tests import reference

    rec = run_and_wait(qtbot, window, evidence=False).recording
    pane = window.head_map
    pane.metric_box.setCurrentIndex(pane.metric_box.findData("distance"))
    settle(qtbot, pane)
    shown = np.ma.getdata(pane.displayed_values())
    own = reference.mean_distance([reference.attentions(reference.open_hf(tiny_dir), rec.text)])
    np.testing.assert_allclose(shown, own, atol=1e-5)
    stem = tmp_path / "map"
    window.exporter.export_to(pane, stem.with_suffix(".png"))  # a chosen suffix is dropped
    data = json.loads(stem.with_suffix(".json").read_text(encoding="utf-8"))
    assert data["metric"] == "distance"
    np.testing.assert_array_equal(np.array(data["values"], dtype=float), shown)
    rows = read_csv(stem.with_suffix(".csv"))
    assert rows[0] == ["layer", "head", "distance"]
    for layer, head, value in rows[1:]:
        assert float(value) == shown[int(layer), int(head)]
    assert len(PdfReader(stem.with_suffix(".pdf")).pages) == 1


def test_links_and_evidence_exports(qtbot, window, tmp_path, tiny_dir):
    """Link scores and evidence rows in the exported files against transformers' own forward:
    docs/definitions.md, "Link pairs" (attention from the source word's first sub-token summed
    over a word's sub-tokens), the summary-token attention row (last layer, head mean, from
    [CLS]) and knockout (each ordinary token deleted alone); the words are grouped by hand."""
    from tests import reference

    hf = reference.open_hf(tiny_dir)
    rec = run_and_wait(qtbot, window, evidence=True).recording
    own = reference.attentions(hf, rec.text)  # (L, H, T, T)
    # TEXT's tokens: [CLS] the mecha ##nic tru ##ed the whe ##el and she replac ##ed the chain
    # [ via por ##tal ] [SEP]; token 3 is in "mechanic" (first sub-token 2), 5 in "trued" (4, 5)
    window.state.select_tokens(3, 5)
    settle(qtbot, window.links)
    links = window.exporter.export_to(window.links, tmp_path / "links")
    assert links and len(links) == 5
    data = json.loads((tmp_path / "links.json").read_text(encoding="utf-8"))
    units = [
        [0],
        [1],
        [2, 3],
        [4, 5],
        [6],
        [7, 8],
        [9],
        [10],
        [11, 12],
        [13],
        [14],
        [15],
        [16],
        [17, 18],
        [19],
        [20],
    ]
    assert data["word_tokens"] == units
    head = data["head"]
    row = own[data["layer"]].mean(axis=0)[2] if head is None else own[data["layer"], head, 2]  # (T,)
    np.testing.assert_allclose(data["scores"], [row[u].sum() for u in units], atol=1e-6)
    np.testing.assert_allclose(data["per_head_to_target"], own[:, :, 2, [4, 5]].sum(axis=-1), atol=1e-6)

    window.exporter.export_to(window.evidence, tmp_path / "evidence")
    data = json.loads((tmp_path / "evidence.json").read_text(encoding="utf-8"))
    rows = {
        k: np.array([np.nan if v is None else v for v in r], dtype=np.float64)
        for k, r in data["rows"].items()
    }
    np.testing.assert_allclose(rows["attention"], own[-1].mean(axis=0)[0], atol=1e-6)
    np.testing.assert_allclose(rows["knockout"], reference.token_knockout(hf, rec.text), atol=1e-6)
    assert ET.parse(tmp_path / "evidence.svg").getroot().tag.endswith("svg")
    # ``headlight evidence --json`` on the same folder and text gives the same keys and rows
    from viewer.cli import main

    assert main(["evidence", str(tiny_dir), "--text", rec.text, "--json", str(tmp_path / "cli.json")]) == 0
    cli = json.loads((tmp_path / "cli.json").read_text(encoding="utf-8"))
    assert set(cli) - {"model"} <= set(data)
    for name in ("attention", "knockout"):
        theirs = np.array([np.nan if v is None else v for v in cli["rows"][name]], dtype=float)
        np.testing.assert_allclose(theirs, rows[name], atol=1e-6, err_msg=name)


def test_overwrite_asks_and_no_leaves_the_file_untouched(qtbot, window, tmp_path, monkeypatch):
    run_and_wait(qtbot, window, evidence=False)
    stem = tmp_path / "grid"
    png = stem.with_suffix(".png")
    png.write_bytes(b"keep me")
    asked: list[list[Path]] = []

    def no(_parent, paths):
        asked.append(list(paths))
        return False

    monkeypatch.setattr(gui_export, "confirm_overwrite", no)
    assert window.exporter.export_to(window.pair_grid, stem) is None
    assert asked == [[png]]
    assert png.read_bytes() == b"keep me"
    assert not stem.with_suffix(".svg").exists()  # nothing at all was written
    monkeypatch.setattr(gui_export, "confirm_overwrite", lambda _p, _paths: True)
    assert window.exporter.export_to(window.pair_grid, stem)
    with Image.open(png) as im:
        assert im.format == "PNG"


def test_nothing_to_export_is_a_one_line_error(qtbot, window, tmp_path):
    folder = tmp_path / "out"
    folder.mkdir()
    assert window.exporter.export_to(window.pair_grid, folder / "x") is None
    assert window.errors and "\n" not in window.errors[-1]
    assert "run a text first" in window.errors[-1]
    assert not list(folder.iterdir())


def test_copy_figure_puts_the_png_on_the_clipboard(qtbot, window):
    from PySide6.QtWidgets import QApplication

    run_and_wait(qtbot, window, evidence=False)
    assert window.exporter.copy_figure(window.head_map)
    image = QApplication.clipboard().image()
    assert not image.isNull()
    assert (image.width(), image.height()) == (
        round(PRINT_SIZE[0] * PRINT_DPI),
        round(PRINT_SIZE[1] * PRINT_DPI),
    )


def test_menus_and_context_menu_have_the_export_actions(qtbot, window):
    file_menu = window.menuBar().actions()[0].menu()
    names = [a.text() for a in file_menu.actions()]
    assert "Export pane" in names and "Export model-card folder…" in names
    sub = next(a.menu() for a in file_menu.actions() if a.text() == "Export pane")
    panes = [a.text() for a in sub.actions() if a.menu() is not None]
    assert panes == ["pair grid", "head map", "links", "evidence strip", "compare grid", "fixation plot"]
    menu = window.exporter.context_menu(window.head_map)
    assert [a.text() for a in menu.actions()] == ["Export head map figure and data…", "Copy figure"]
    menu.close()


def test_a_right_click_on_a_canvas_opens_its_export_menu(qtbot, window):
    from PySide6.QtCore import QPoint, Qt
    from PySide6.QtWidgets import QApplication, QMenu

    run_and_wait(qtbot, window, evidence=False)
    pane = window.head_map
    settle(qtbot, pane)
    qtbot.mouseClick(pane.canvas, Qt.MouseButton.RightButton, pos=QPoint(30, 30))
    qtbot.waitUntil(lambda: isinstance(QApplication.activePopupWidget(), QMenu), timeout=5000)
    menu = QApplication.activePopupWidget()
    assert menu.actions()[0].text() == "Export head map figure and data…"
    assert window.exporter.current is pane  # File → Export pane acts on it now
    menu.close()


@pytest.fixture
def card_inputs(tmp_path):
    texts = tmp_path / "texts.jsonl"
    texts.write_text("".join(json.dumps({"text": t, "label": y}) + "\n" for t, y in TEXTS), encoding="utf-8")
    pairs = tmp_path / "pairs.jsonl"
    pairs.write_text("".join(json.dumps(p) + "\n" for p in PAIRS), encoding="utf-8")
    return texts, pairs


def test_the_windows_card_export_holds_the_models_own_numbers(
    qtbot, window, tmp_path, tiny_dir, card_inputs, monkeypatch
):
    """The folder the window writes: its card.json against transformers' own forward
    (``tests.reference.card_matches_the_models_own_numbers``), its command line is the
    ``headlight card`` that writes the same folder, and its figures are inside it."""
    from tests import reference

    texts, pairs = card_inputs
    out = tmp_path / "card"
    assert window.exporter.export_card(str(texts), str(pairs), str(out))
    qtbot.waitUntil(lambda: window.exporter.last_card is not None or bool(window.errors), timeout=WAIT_MS)
    assert not window.errors, window.errors
    assert window.exporter.last_card == str(out)
    assert "model-card folder written" in window.status_label.text()
    got = json.loads((out / "card.json").read_text(encoding="utf-8"))
    reference.card_matches_the_models_own_numbers(got, tiny_dir, TEXTS, PAIRS)
    assert (
        got["reproducibility"]["command"]
        == f"headlight card {tiny_dir} --texts {texts} --pairs {pairs} --out {out}"
    )
    md = (out / "card.md").read_text(encoding="utf-8")
    links = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md)
    assert links
    for link in links:
        target = (out / link).resolve()
        assert target.is_file() and out.resolve() in target.parents, link
    # a second export into the same folder asks first; "No" leaves the folder as it was
    before = (out / "card.json").read_bytes()
    monkeypatch.setattr(gui_export, "confirm_overwrite", lambda _p, _paths: False)
    assert not window.exporter.export_card(str(texts), str(pairs), str(out))
    wait_idle(qtbot, window)
    assert (out / "card.json").read_bytes() == before


def test_card_export_errors_are_one_line(qtbot, window, tmp_path, card_inputs, unwritable_dir):
    texts, _pairs = card_inputs
    assert not window.exporter.export_card(str(tmp_path / "missing.txt"), None, str(tmp_path / "c"))
    assert "does not exist" in window.errors[-1]
    # a folder that refuses new files (the fixture checked it by trying) fails on the worker
    out = unwritable_dir / "c"
    assert window.exporter.export_card(str(texts), None, str(out))
    qtbot.waitUntil(lambda: len(window.errors) >= 2, timeout=WAIT_MS)
    reason = refusal(lambda: os.mkdir(unwritable_dir / "x"))  # the operating system's own words
    assert window.errors[-1] == f"cannot write {out}: {reason}"
    # and so does a folder that does not exist
    assert window.exporter.export_card(str(texts), None, str(tmp_path / "no" / "such" / "c"))
    qtbot.waitUntil(lambda: len(window.errors) >= 3, timeout=WAIT_MS)
    assert (
        window.errors[-1]
        == f"cannot write {tmp_path / 'no' / 'such' / 'c'}: folder {tmp_path / 'no' / 'such'} does not exist"
    )
