"""Card export and figure files: formats decode, numbers are the model's own, files safe."""

from __future__ import annotations

import hashlib
import json
import os
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from matplotlib.figure import Figure
from PIL import Image
from pypdf import PdfReader

from tests import reference
from tests.conftest import refusal
from tests.model import tiny
from viewer.cli import main
from viewer.errors import HeadlightError
from viewer.figures.export import PRINT_DPI, save_figure
from viewer.files import atomic_write_text, sanitise_name

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
TEXTS = [
    ("the mechanic trued the wheel", "repair"),
    ("the invoice for the brake pads", "billing"),
    ("renewal of the membership", "membership"),
    ("the chain and the wheel", "repair"),
]


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    root = tmp_path_factory.mktemp("card")
    model = tiny.save(root / "model", "bert")
    (model / "README.md").write_text("---\nlicense: mit\n---\n\n# Co-op *test* router\n\nA tiny model.\n")
    texts = root / "texts.jsonl"
    texts.write_text("".join(json.dumps({"text": t, "label": y}) + "\n" for t, y in TEXTS))
    pairs = root / "pairs.jsonl"
    pairs.write_text("".join(json.dumps(p) + "\n" for p in PAIRS))
    return root, model, texts, pairs


def card_in(folder: Path, *argv: str) -> int:
    """Run `headlight card ... --out card` from inside `folder` (so the commands are equal)."""
    here = os.getcwd()
    os.chdir(folder)
    try:
        return main(["card", *argv, "--out", "card", "--quiet"])
    finally:
        os.chdir(here)


@pytest.fixture(scope="module")
def card(inputs):
    root, model, texts, pairs = inputs
    assert card_in(root, str(model), "--texts", str(texts), "--pairs", str(pairs)) == 0
    return root / "card"


def test_png_size_and_dpi_svg_xml_pdf_one_page(tmp_path):
    """Readers: Pillow for PNG size and dpi, ElementTree for SVG, pypdf for the PDF pages."""
    fig = Figure(figsize=(4.0, 2.5))
    fig.add_subplot().imshow(np.eye(3))
    paths = save_figure(fig, tmp_path / "grid")
    png, svg, pdf = paths
    with Image.open(png) as im:
        assert im.size == (4 * PRINT_DPI, int(2.5 * PRINT_DPI))
        assert tuple(round(d) for d in im.info["dpi"]) == (PRINT_DPI, PRINT_DPI)
    assert ET.parse(svg).getroot().tag.endswith("svg")
    assert pdf.read_bytes().startswith(b"%PDF-")
    assert len(PdfReader(pdf).pages) == 1


def test_card_files_and_image_links(card):
    md = (card / "card.md").read_text(encoding="utf-8")
    links = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md)
    assert len(links) >= 3
    for link in links:
        target = (card / link).resolve()
        assert target.is_file() and card.resolve() in target.parents, link
        with Image.open(target) as im:
            assert im.format == "PNG"
        assert ET.parse(target.with_suffix(".svg")).getroot().tag.endswith("svg")
    for words in ("not by itself an explanation", "does not certify", "review process"):
        assert words in md
    assert "SHA-256" in md and "| command |" in md


def test_card_numbers_are_the_models_own(card, inputs):
    root, model, texts, pairs = inputs
    data = json.loads((card / "card.json").read_text())
    reference.card_matches_the_models_own_numbers(data, model, TEXTS, PAIRS)
    md = (card / "card.md").read_text(encoding="utf-8")
    acc = data["accuracy"]
    assert f"- Accuracy on the labelled texts: {acc['accuracy']:.3f} ({acc['correct']} of 4)." in md
    the = data["shortcuts"]["tokens"][0]
    assert f"| the | 4 | {the['flip_rate']:.3f} | {the['flip_low']:.3f} | {the['mean_drop']:.3f} |" in md
    # the card says which search ran, with the numbers of card.json
    sc = data["shortcuts"]
    assert sc["mode"] == "screened" and sc["forwards"] > sc["texts"] == sc["backwards"]
    assert f"Screened search: {sc['screened']} words and phrases" in md
    assert f"{sc['confirmed']} candidates confirmed by knockout" in md
    assert (
        data["reproducibility"]["sha256"]["model.safetensors"]
        == hashlib.sha256((model / "model.safetensors").read_bytes()).hexdigest()
    )


def test_two_exports_differ_only_in_the_date_line(card, inputs, tmp_path):
    root, model, texts, pairs = inputs
    second = tmp_path / "again"
    second.mkdir()
    assert card_in(second, str(model), "--texts", str(texts), "--pairs", str(pairs)) == 0
    a_files = sorted(p.relative_to(card) for p in card.rglob("*") if p.is_file())
    b_files = sorted(p.relative_to(second / "card") for p in (second / "card").rglob("*") if p.is_file())
    assert a_files == b_files
    for rel in a_files:
        a, b = (card / rel).read_bytes(), (second / "card" / rel).read_bytes()
        if rel.suffix in (".md", ".json"):
            diff = [
                (x, y)
                for x, y in zip(a.decode().splitlines(), b.decode().splitlines(), strict=True)
                if x != y
            ]
            assert all("date" in x for x, _ in diff), diff
        else:
            assert a == b, rel


def test_existing_folder_is_not_overwritten_without_force(card, inputs, capsys):
    root, model, texts, pairs = inputs
    before = (card / "card.md").read_bytes()
    assert card_in(root, str(model), "--texts", str(texts)) == 2
    assert "already exists; pass --force" in capsys.readouterr().err
    assert (card / "card.md").read_bytes() == before
    assert card_in(root, str(model), "--texts", str(texts), "--force") == 0
    assert "Link pairs" not in (card / "card.md").read_text()  # replaced: this run had none


def test_missing_parent_folder_is_a_one_line_error(inputs, tmp_path, capsys):
    root, model, texts, _ = inputs
    assert (
        main(
            [
                "card",
                str(model),
                "--texts",
                str(texts),
                "--out",
                str(tmp_path / "no" / "such" / "card"),
                "--quiet",
            ]
        )
        == 2
    )
    err = capsys.readouterr().err
    assert "does not exist" in err and err.count("\n") == 1


def test_an_unwritable_folder_is_a_one_line_error(unwritable_dir, inputs, capsys, monkeypatch):
    """A folder that refuses new files (checked by the fixture, by trying): the atomic writer and
    the card command both say so in one line, and the card fails before computing anything."""
    reason = refusal(lambda: os.open(unwritable_dir / "x", os.O_CREAT | os.O_WRONLY))
    with pytest.raises(HeadlightError) as caught:
        atomic_write_text(unwritable_dir / "card.md", "hello")
    assert str(caught.value) == f"cannot write {unwritable_dir / 'card.md'}: {reason}"
    assert not (unwritable_dir / "card.md").exists()
    root, model, texts, _ = inputs
    import viewer.reports.card

    def no_reports(*_a, **_k):
        raise AssertionError("the card computed its numbers before finding it could not write them")

    monkeypatch.setattr(viewer.reports.card, "card_data", no_reports)
    capsys.readouterr()
    out = unwritable_dir / "card"
    assert main(["card", str(model), "--texts", str(texts), "--out", str(out), "--quiet"]) == 2
    captured = capsys.readouterr()
    reason = refusal(lambda: os.mkdir(unwritable_dir / "x"))  # the card's folder is a new folder
    assert captured.err == f"headlight: error: cannot write {unwritable_dir / 'card'}: {reason}\n"


def test_names_from_text_are_sanitised():
    assert sanitise_name("Héllo / ../../etc/passwd [via portal]!") == "hello-etc-passwd-via-portal"
    assert sanitise_name("///") == "text"
    assert len(sanitise_name("word " * 40)) <= 40
    assert Path(sanitise_name("a\0b\nc")).name == "a-b-c"


def test_card_md_says_what_a_model_card_author_needs(inputs, tmp_path):
    """The model's own name (its README's heading, as the window's model line shows it), the
    per-class accuracy and confusion matrix of card.json (whose accuracy is checked against
    transformers' forward above), link accuracy with its 95% Wilson interval (written out in
    tests/reference.py, Wilson 1927), the example quoted, a source for every evidence row, and
    captions that say what each mark is."""
    from viewer.model.loader import open_model
    from viewer.session.jobs import info_of

    root, model, texts, pairs = inputs
    card = tmp_path / "card"  # the module's card is rewritten by the tests above
    argv = ["card", str(model), "--texts", str(texts), "--pairs", str(pairs), "--out", str(card), "--quiet"]
    assert main(argv) == 0
    data = json.loads((card / "card.json").read_text())
    md = (card / "card.md").read_text(encoding="utf-8")
    loaded = open_model(model)
    assert data["model"]["name"] == loaded.display_name == info_of(loaded).name == "Co-op test router"
    assert f"- Model: **Co-op test router** (folder `{root.name}/model`)" in md

    acc = data["accuracy"]
    for a, label in enumerate(acc["confusion_order"]):
        pc = acc["per_class"][label]
        row = [label, str(pc["texts"]), "–" if pc["accuracy"] is None else f"{pc['accuracy']:.3f}"]
        assert "| " + " | ".join(row) + " |" in md.replace(
            " | " + " | ".join(map(str, acc["confusion"][a])), ""
        )
        assert sum(acc["confusion"][a]) == pc["texts"] == sum(y == label for _, y in TEXTS)
    assert "| label | texts | accuracy |" in md and "predicted repair" in md

    links = data["links"]
    k = round(links["best"]["accuracy"] * links["pairs"])
    lo, hi = reference.wilson(k, links["pairs"])
    assert links["best"]["wilson_95"] == pytest.approx([lo, hi], abs=1e-12)
    assert f"({k} of 2 pairs; 95% Wilson score interval {lo:.3f}–{hi:.3f}, Wilson 1927)" in md

    ex = data["example"]
    assert f"> {' '.join(ex['text'].split())}" in md
    for source in ("Abnar & Zuidema 2020", "Kobayashi et al. 2020", "Sundararajan et al. 2017"):
        assert source in md
    assert "Rows: *summary attention* — " in md and "*knockout* — " in md  # the window's row names
    assert "The dashed lines are the medians" in md
    assert "area grows with the number of texts" in md
    assert "the orange line on the colour bar marks the nearest-candidate baseline" in md
