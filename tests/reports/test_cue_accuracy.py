"""Set accuracy with the cue removed and with it inserted (docs/definitions.md, "Cue accuracy").

Reference: transformers' own forward (tests/reference.py, no padding, one text at a time) on
the texts as given, with the footer's tokens deleted from the input ids (every whitespace word of
"[via portal]", found by its characters with the tokenizer's own offsets) and with the footer
appended after one space; accuracy and confusion counted here by hand.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from tests import reference
from viewer.cli import main
from viewer.demo import MODEL_DIR
from viewer.model.loader import open_model
from viewer.reports.cue import VARIANTS, CueAccuracyKind, CueCounts
from viewer.reports.runs import cue_data
from viewer.reports.shards import run_report
from viewer.reports.textsets import TextSource, load_text_set

SAMPLES = Path(__file__).resolve().parents[2] / "sample_sentences"
FOOTER = "[via portal]"


@pytest.fixture(scope="module")
def half(tmp_path_factory) -> Path:
    """Every other sample message (60, 30 with the footer), labelled."""
    items = load_text_set(SAMPLES / "coop_messages.jsonl")[::2]
    path = tmp_path_factory.mktemp("cue") / "half.jsonl"
    path.write_text("".join(json.dumps({"text": i.text, "label": i.label}) + "\n" for i in items), "utf-8")
    return path


def reference_predictions(items) -> dict[str, list[int]]:
    hf = reference.open_hf(MODEL_DIR)
    given, removed, inserted = [], [], []
    for item in items:
        text = item.text
        p = reference.class_probabilities(hf, [text])[0]
        given.append(int(p.argmax()))
        at = text.find(FOOTER)
        if at >= 0:
            enc = hf.tokenizer(text, return_offsets_mapping=True)
            gone = set(reference.tokens_of([tuple(o) for o in enc["offset_mapping"]], at, at + len(FOOTER)))
            ids = [i for k, i in enumerate(enc["input_ids"]) if k not in gone]
            removed.append(int(reference.probabilities_of_ids(hf, ids).argmax()))
            inserted.append(given[-1])
        else:
            removed.append(given[-1])
            inserted.append(int(reference.class_probabilities(hf, [text.strip() + " " + FOOTER])[0].argmax()))
    return {"given": given, "removed": removed, "inserted": inserted}


def test_cue_accuracy_against_the_models_own_forward(half):
    loaded = open_model(MODEL_DIR)
    items = load_text_set(half)
    assert sum(FOOTER in i.text for i in items) == 30  # the footer is written one way in the set
    shortcuts = {"tokens": [{"token": "via portal", "flip_rate": 0.9, "flip_low": 0.8, "mean_drop": 0.5}]}
    data = cue_data(loaded, TextSource(half), shortcuts)
    assert data["cue"] == FOOTER and data["texts_with_cue"] == 30
    expected = reference_predictions(items)
    gold = np.array([loaded.labels.index(i.label) for i in items])
    for variant in VARIANTS:
        pred = np.array(expected[variant])
        got = data[variant]
        assert got["correct"] == int((pred == gold).sum()) and got["labelled"] == len(items), variant
        confusion = [[int(((gold == a) & (pred == b)).sum()) for b in range(3)] for a in range(3)]
        assert got["confusion"] == confusion, variant
    # the footer is the demo's shortcut: removing it helps, inserting it hurts
    assert data["removed"]["accuracy"] > data["given"]["accuracy"] > data["inserted"]["accuracy"]


def test_counts_merge_and_round_trip():
    a = CueCounts(np.arange(27, dtype=np.int64).reshape(3, 3, 3), 4)
    b = CueCounts.from_state(a.state())
    assert np.array_equal(b.counts, a.counts) and b.with_cue == 4
    m = a.merge(b)
    assert np.array_equal(m.counts, 2 * a.counts) and m.with_cue == 8
    # worked example: given [[2, 1], [0, 3]] -> 5 of 6 correct, per class 2/3 and 3/3
    c = CueCounts(np.array([[[2, 1], [0, 3]]] * 3, np.int64))
    acc = c.accuracy(("a", "b"), "given")
    assert (acc["correct"], acc["labelled"]) == (5, 6) and acc["confusion"] == [[2, 1], [0, 3]]
    assert acc["per_class"]["a"]["accuracy"] == pytest.approx(2 / 3)


def test_shards_give_the_numbers_of_one_pass(half):
    """A sum over texts: 60 texts in shards of 7 count what one shard of 60 counts."""
    loaded = open_model(MODEL_DIR)
    items = load_text_set(half)
    from viewer.reports.shards import RunOptions

    one = run_report(CueAccuracyKind(FOOTER), loaded, items, options=RunOptions(shard_size=60))
    many = run_report(CueAccuracyKind(FOOTER), loaded, items, options=RunOptions(shard_size=7))
    assert np.array_equal(one.counts, many.counts) and one.with_cue == many.with_cue == 30


def test_shortcuts_json_and_output_hold_the_cue_accuracy(half, tmp_path, capsys):
    out = tmp_path / "s.json"
    argv = [
        "shortcuts",
        str(MODEL_DIR),
        "--texts",
        str(half),
        "--workers",
        "1",
        "--quiet",
        "--json",
        str(out),
    ]
    capsys.readouterr()
    assert main(argv) == 0
    cue = json.loads(out.read_text())["cue_accuracy"]
    assert cue["cue"] == FOOTER and set(VARIANTS) <= set(cue)
    printed = capsys.readouterr().out
    assert f"accuracy {cue['given']['accuracy']:.3f} as given" in printed
    assert f"with “{FOOTER}” removed from the 30 texts holding it {cue['removed']['accuracy']:.3f}" in printed
