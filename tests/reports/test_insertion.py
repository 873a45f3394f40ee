"""The insertion test on the demo model: the footer alone routes messages to billing.

References: transformers' own forward pass (``AutoModelForSequenceClassification``, not the
project's loader) recomputes which texts the footer flips; Wilson's score interval (Wilson 1927)
is written out in tests/reference.py; the neutral word is chosen by the test from the shortcut search's
own numbers.
"""

from __future__ import annotations

import functools
from pathlib import Path

import numpy as np
import pytest
import torch
from transformers import AutoModelForSequenceClassification, AutoTokenizer

from tests import reference
from viewer.demo import MODEL_DIR
from viewer.errors import HeadlightError
from viewer.model.loader import open_model
from viewer.reports.insertion import PhraseKnockoutKind, insertion_test, pointed_class
from viewer.reports.shards import run_report
from viewer.reports.shortcuts import shortcut_search
from viewer.reports.textsets import load_text_set

SAMPLES = Path(__file__).resolve().parents[2] / "sample_sentences"
FOOTER = "[via portal]"


@pytest.fixture(scope="module")
def demo():
    return open_model(MODEL_DIR)


@pytest.fixture(scope="module")
def others():
    """The sample repair and membership messages without the footer."""
    return [
        i
        for i in load_text_set(SAMPLES / "coop_messages.jsonl")
        if i.label in ("repair", "membership") and "portal" not in i.text
    ]


@functools.cache
def demo_hf():
    """The demo checkpoint through transformers alone (its tokenizer, its classifier), once."""
    tok = AutoTokenizer.from_pretrained(MODEL_DIR, local_files_only=True)
    model = AutoModelForSequenceClassification.from_pretrained(MODEL_DIR, local_files_only=True)
    return tok, model.eval()


def transformers_predict(texts: list[str], heads=()) -> list[str]:
    """transformers' own predicted class names (``transformers_probabilities``)."""
    labels = demo_hf()[1].config.id2label
    return [labels[int(k)] for k in transformers_probabilities(texts, heads).argmax(axis=1)]


def transformers_probabilities(texts: list[str], heads=()) -> np.ndarray:
    """transformers' own forward, softmax of the logits (N, C) float64, with ``heads`` (layer,
    head) knocked out by the test's own hook (``tests.reference.heads_masked``)."""
    tok, model = demo_hf()
    out = []
    with torch.no_grad(), reference.heads_masked(model, heads):
        for i in range(0, len(texts), 32):
            batch = tok(texts[i : i + 32], padding=True, truncation=True, return_tensors="pt")
            out.append(torch.softmax(model(**batch).logits.double(), -1).numpy())
    return np.concatenate(out)


def test_the_footer_points_to_billing_by_knockout(demo):
    items = load_text_set(SAMPLES / "coop_messages.jsonl")
    tally = run_report(PhraseKnockoutKind(FOOTER), demo, items)
    pointed = pointed_class(demo.labels, tally.by_class("via portal"), FOOTER)
    assert demo.labels[pointed.target] == "billing"
    assert pointed.flips_from["billing"] > 0 and pointed.flips_from["repair"] == 0


def footer_at_the_end_of(items, heads=()) -> tuple[list[int], list[int]]:
    """transformers' own forward on ``items`` (with ``heads`` knocked out), then on those not
    predicted billing with the footer appended: (texts tried, texts flipped into billing)."""
    before = transformers_predict([i.text for i in items], heads)
    tried = [k for k, p in enumerate(before) if p != "billing"]
    after = transformers_predict([items[k].text.strip() + " " + FOOTER for k in tried], heads)
    return tried, [k for k, p in zip(tried, after, strict=True) if p == "billing"]


@pytest.fixture(scope="module")
def footer_at_the_end():
    """``footer_at_the_end_of`` the sample messages."""
    return footer_at_the_end_of(load_text_set(SAMPLES / "coop_messages.jsonl"))


def assert_end_position(end: dict, footer_at_the_end) -> None:
    tried, flipped = footer_at_the_end
    assert end["tried"] == len(tried) >= 15 and end["flipped"] == flipped
    assert end["flips"] == len(flipped) and end["flip_rate"] == pytest.approx(len(flipped) / len(tried))
    low, high = reference.wilson(len(flipped), len(tried))
    assert end["flip_low"] == pytest.approx(low, abs=1e-12)
    assert end["flip_high"] == pytest.approx(high, abs=1e-12)


def test_inserting_the_footer_flips_nine_in_ten_into_billing(demo, footer_at_the_end):
    items = load_text_set(SAMPLES / "coop_messages.jsonl")
    report = insertion_test(demo, items, FOOTER)
    assert report.target_label == "billing" and report.chosen_by == "knockout"
    end = report.tally.entry("end")
    assert_end_position(end, footer_at_the_end)
    assert end["tried"] >= 40 and end["flip_rate"] >= 0.9
    for position in ("start", "random"):
        assert report.tally.entry(position)["flip_rate"] >= 0.9
        assert report.tally.entry(position)["mean_gain"] > 0.5


def test_a_neutral_word_flips_almost_nothing(demo, others):
    items = load_text_set(SAMPLES / "coop_messages.jsonl")
    ranking = shortcut_search(demo, items, phrases=False, exhaustive=True).words.ranking()
    common = [r for r in ranking if r["count"] >= 10 and r["flip_rate"] == 0]
    neutral = min(common, key=lambda r: abs(r["mean_drop"]))["token"]
    report = insertion_test(demo, others, neutral, target="billing")
    assert report.chosen_by == "given"
    for position in ("start", "end", "random"):
        assert report.tally.entry(position)["flip_rate"] < 0.1, (neutral, position)


def test_refusals_are_one_line(demo, others):
    with pytest.raises(HeadlightError, match="not one of"):
        insertion_test(demo, others, FOOTER, target="parking")
    with pytest.raises(HeadlightError, match="no word"):
        insertion_test(demo, others, "-- !!", target="billing")
    with pytest.raises(HeadlightError, match="occurs in no text"):
        insertion_test(demo, others[:5], "zeppelin")


def test_headlight_insert_prints_the_numbers_of_the_models_own_forward(tmp_path, capsys, footer_at_the_end):
    import json

    from viewer.cli import main

    out = tmp_path / "insert.json"
    assert (
        main(
            [
                "insert",
                str(MODEL_DIR),
                "--texts",
                str(SAMPLES / "coop_messages.jsonl"),
                "--word",
                FOOTER,
                "--quiet",
                "--workers",
                "1",
                "--json",
                str(out),
            ]
        )
        == 0
    )
    data = json.loads(out.read_text(encoding="utf-8"))
    assert (data["class"], data["class_chosen_by"], data["phrase"]) == ("billing", "knockout", FOOTER)
    end = next(r for r in data["positions"] if r["position"] == "end")
    assert_end_position(end, footer_at_the_end)
    # mean gain: p(billing) with the footer appended minus without, over the texts tried
    tried = footer_at_the_end[0]
    texts = [i.text for i in load_text_set(SAMPLES / "coop_messages.jsonl")]
    billing = demo_hf()[1].config.label2id["billing"]
    before = transformers_probabilities([texts[k] for k in tried])[:, billing]
    after = transformers_probabilities([texts[k].strip() + " " + FOOTER for k in tried])[:, billing]
    assert end["mean_gain"] == pytest.approx(float(np.mean(after - before)), abs=1e-5)
    printed = capsys.readouterr().out
    assert f"{'end':<9} {end['tried']:>6} {end['flips']:>6} {end['flip_rate']:>9.3f}" in printed
    assert (
        main(
            [
                "insert",
                str(MODEL_DIR),
                "--texts",
                str(SAMPLES / "coop_messages.jsonl"),
                "--word",
                FOOTER,
                "--class",
                "parking",
                "--quiet",
                "--workers",
                "1",
            ]
        )
        == 2
    )


def test_surface_form_is_how_the_texts_write_it():
    from viewer.core.words import phrase_keys
    from viewer.reports.insertion import surface_form
    from viewer.reports.textsets import TextItem

    items = [
        TextItem("fix my bike [via portal]", None, 1),
        TextItem("thanks [via portal]", None, 2),
        TextItem("sent via portal, thanks", None, 3),
    ]
    assert surface_form(items, phrase_keys("via portal")) == "[via portal]"
    assert surface_form(items, phrase_keys("thanks")) == "thanks"
    assert surface_form(items, phrase_keys("zeppelin")) is None


def test_the_card_states_the_insertion_result_of_the_strongest_candidate(tmp_path):
    """card.json's insertion part is the insertion test of the strongest candidate, inserted as
    the texts write it (the footer "[via portal]"), into the class knocking it out flips texts
    away from; its end position holds the numbers of transformers' own forward, and card.md
    says them in words beside its figure. Every other sample message (60, 30 with the footer)
    keeps the test short."""
    import json

    from viewer.cli import main

    items = load_text_set(SAMPLES / "coop_messages.jsonl")[::2]
    texts = tmp_path / "half.jsonl"
    texts.write_text("".join(json.dumps({"text": i.text, "label": i.label}) + "\n" for i in items), "utf-8")
    argv = [
        "card",
        str(MODEL_DIR),
        "--texts",
        str(texts),
        "--out",
        str(tmp_path / "card"),
        "--quiet",
        "--workers",
        "1",
    ]
    assert main(argv) == 0
    card = json.loads((tmp_path / "card" / "card.json").read_text(encoding="utf-8"))
    insert = card["insertion"]
    assert (insert["phrase"], insert["class"], insert["class_chosen_by"]) == (FOOTER, "billing", "knockout")
    end = next(r for r in insert["positions"] if r["position"] == "end")
    assert_end_position(end, footer_at_the_end_of(items))
    md = (tmp_path / "card" / "card.md").read_text(encoding="utf-8")
    assert (
        f"inserting “{FOOTER}” at the end of the {end['tried']} texts not predicted billing "
        f"flips {end['flips']} to billing (95% Wilson low {end['flip_low']:.3f})"
    ) in md
    assert "![Insertion test](figures/insertion.png)" in md
    assert "the line across its end the 95% Wilson score interval (Wilson 1927)" in md
    cue = card["shortcuts"]["cue_accuracy"]  # docs/definitions.md, "Cue accuracy"
    assert cue["cue"] == FOOTER and cue["given"]["accuracy"] == card["accuracy"]["accuracy"]
    assert (
        f"Accuracy with the cue “{FOOTER}” removed from the 30 texts holding it: "
        f"{cue['removed']['accuracy']:.3f} ({cue['removed']['correct']} of 60)"
    ) in md
    assert "![Fixation plot](figures/fixation.png)" in md
    assert (tmp_path / "card" / "figures" / "insertion.svg").is_file()


def test_parse_heads():
    from viewer.reports.insertion import parse_heads

    assert parse_heads("1.2, 3.0,1.2", 4, 4) == ((1, 2), (3, 0))
    assert parse_heads("2.*", 4, 3) == ((2, 0), (2, 1), (2, 2))
    for bad, words in (
        ("1", "LAYER.HEAD"),
        ("a.b", "LAYER.HEAD"),
        ("4.0", "layers 0-3"),
        ("0.4", "heads 0-3"),
    ):
        with pytest.raises(HeadlightError, match=words):
            parse_heads(bad, 4, 4)


def test_the_mechanism_check_reruns_the_test_without_the_heads(tmp_path, capsys):
    """``headlight insert --knockout-heads``: the knocked-out test's end position holds the
    numbers of transformers' own forward with the heads masked by a hook of this test, and the
    share carried is (r − r′)/r (docs/definitions.md, "Mechanism check"). Layer 1's heads carry
    a part of the footer's effect on the demo (measured: about 10%), layer 3's none."""
    import json

    from viewer.cli import main

    items = load_text_set(SAMPLES / "coop_messages.jsonl")[::2]
    texts = tmp_path / "half.jsonl"
    texts.write_text("".join(json.dumps({"text": i.text}) + "\n" for i in items), "utf-8")
    out = tmp_path / "insert.json"
    argv = ["insert", str(MODEL_DIR), "--texts", str(texts), "--word", FOOTER, "--quiet", "--workers", "1"]
    assert main([*argv, "--knockout-heads", "1.*", "--json", str(out)]) == 0
    data = json.loads(out.read_text(encoding="utf-8"))
    mech = data["knockout_heads"]
    assert mech["heads"] == [[1, 0], [1, 1], [1, 2], [1, 3]]
    end = next(r for r in mech["positions"] if r["position"] == "end")
    tried, flipped = footer_at_the_end_of(items, [(1, h) for h in range(4)])
    assert (end["tried"], end["flipped"]) == (len(tried), flipped)
    intact = next(r for r in data["positions"] if r["position"] == "end")
    assert end["intact_flip_rate"] == intact["flip_rate"]
    r, r2 = intact["flips"] / intact["tried"], len(flipped) / len(tried)
    assert end["share_carried"] == pytest.approx((r - r2) / r, abs=1e-12) and end["share_carried"] > 0.02
    printed = capsys.readouterr().out
    assert "mechanism check: the same test with layer 1 · heads 0, 1, 2, 3 knocked out" in printed
    assert f"{end['share_carried']:.0%}" in printed
    assert main([*argv, "--knockout-heads", "9.0"]) == 2  # no such layer: one line, exit 2


def test_share_carried_worked_example():
    """Worked example: intact 55 of 56 flip, without the heads 11 of 56: (55 − 11)/55 = 80%."""
    from viewer.core.insertion import InsertionTally
    from viewer.reports.insertion import MechanismCheck

    intact, without = InsertionTally(("end",)), InsertionTally(("end",))
    for k in range(56):
        intact.add("end", k, k < 55, 0.5)
        without.add("end", k, k < 11, 0.1)
    assert MechanismCheck(((0, 0),), without, intact).share_carried("end") == pytest.approx(0.8)
    empty = InsertionTally(("end",))
    assert MechanismCheck(((0, 0),), without, empty).share_carried("end") is None
