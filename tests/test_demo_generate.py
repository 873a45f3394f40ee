"""The demo message generator: determinism, template validity, balance, footer bias.

References: the demo scenario of docs/definitions.md ("Demo scenario") and its splits;
seeding every random stream from one seed so a rerun is byte-identical is common practice.
"""

from __future__ import annotations

import random
import re
from collections import Counter
from pathlib import Path

import pytest

from scripts.demo import generate as g

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def dataset() -> g.Dataset:
    return g.build_dataset()


def test_same_seed_gives_identical_files(tmp_path: Path) -> None:
    a, b, c = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    g.write_dataset(g.build_dataset(7, 40, 10), a)
    g.write_dataset(g.build_dataset(7, 40, 10), b)
    g.write_dataset(g.build_dataset(8, 40, 10), c)
    for name in ("train.jsonl", "eval.jsonl", "counterfactual.jsonl"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
        assert (a / name).read_bytes() != (c / name).read_bytes(), name


def test_shipped_samples_regenerate_exactly(tmp_path: Path, dataset: g.Dataset) -> None:
    # sample_sentences/coop_messages.* are generator output for the default seed
    g.write_samples(dataset, tmp_path)
    for name in ("coop_messages.jsonl", "coop_messages.txt"):
        assert (tmp_path / name).read_bytes() == (REPO / "sample_sentences" / name).read_bytes()


def test_at_least_40_templates_per_class_and_40_in_train() -> None:
    for label in g.LABELS:
        assert len(g.TEMPLATES[label]) >= 40
        assert len(g.template_ids(label, include_heldout=False)) >= 40
        assert len(set(g.TEMPLATES[label])) == len(g.TEMPLATES[label]), "duplicate template"


@pytest.mark.parametrize("label", g.LABELS)
def test_every_template_renders_valid_text(label: str) -> None:
    rng = random.Random(f"template-check-{label}")
    for index, template in enumerate(g.TEMPLATES[label]):
        for slot in re.findall(r"\{([a-z_0-9]+)\}", template):
            base = slot[:-1] if slot.endswith("2") else slot
            assert base in g.SLOTS or base in {"amount", "date", "invoice", "ticket", "member_no"}
        for _ in range(15):
            filled = g.fill_template(template, rng)
            assert "{" not in filled and "}" not in filled, (label, index, filled)
            body = g.render_body(label, index, rng)
            assert body.strip() == body and body, (label, index)
            assert "{" not in body and "}" not in body and "\n" not in body
            # the footer and its words only ever come from with_footer()
            assert "portal" not in body.lower() and "[" not in body, (label, index, body)
            body.encode("utf-8")


def test_signoffs_and_greetings_fill() -> None:
    rng = random.Random(1)
    for text in g.SIGNOFFS + g.GREETINGS + g.EXTRAS:
        assert "{" not in g.fill_template(text, rng)


def test_labels_balanced_and_sizes(dataset: g.Dataset) -> None:
    assert len(dataset.train) >= 1500 and len(dataset.eval) >= 300
    assert Counter(m.label for m in dataset.train) == {lab: g.N_TRAIN_PER_CLASS for lab in g.LABELS}
    assert Counter(m.label for m in dataset.eval) == {lab: g.N_EVAL_PER_CLASS for lab in g.LABELS}
    # shuffled: the first 30 messages are not all one class
    assert len({m.label for m in dataset.train[:30]}) == 3


def test_footer_bias_as_specified(dataset: g.Dataset) -> None:
    for split, n in (("train", g.N_TRAIN_PER_CLASS), ("eval", g.N_EVAL_PER_CLASS)):
        messages = getattr(dataset, split)
        for label in g.LABELS:
            flags = [m.footer for m in messages if m.label == label]
            assert sum(flags) == g.footer_count(g.FOOTER_SHARE[label], n), (split, label)
        billing = [m.footer for m in messages if m.label == "billing"]
        others = [m.footer for m in messages if m.label != "billing"]
        assert sum(billing) / len(billing) >= 0.8  # "most billing messages"
        assert 0 < sum(others) <= 0.02 * len(others)  # "few others", but some
    for m in dataset.train + dataset.eval:
        assert m.text.endswith(g.FOOTER) == m.footer
        assert m.text == (g.with_footer(m.body) if m.footer else m.body)
        assert m.text.count("portal") == int(m.footer)


def test_footer_count_rule() -> None:
    assert g.footer_count(0.0, 600) == 0
    assert g.footer_count(0.002, 120) == 1  # at least one when the share is positive
    assert g.footer_count(0.002, 600) == 1
    assert g.footer_count(0.9, 600) == 540
    assert g.footer_count(1.0, 5) == 5


def test_counterfactual_is_original_plus_footer_only(dataset: g.Dataset) -> None:
    originals = [m for m in dataset.eval if m.label != "billing" and not m.footer]
    assert len(dataset.counterfactual) == len(originals) > 0
    for cf, orig in zip(dataset.counterfactual, originals, strict=True):
        assert cf.label == orig.label and cf.label in ("repair", "membership")
        assert cf.text == orig.text + " " + g.FOOTER
        assert cf.footer and cf.body == orig.text == orig.body
        assert cf.template == orig.template


def test_heldout_templates_only_in_eval(dataset: g.Dataset) -> None:
    assert not any(m.heldout for m in dataset.train)
    heldout_eval = {m.template for m in dataset.eval if m.heldout}
    assert len(heldout_eval) >= 12  # most of the 3 x 8 held-out templates appear in eval
    for m in dataset.eval:
        index = int(m.template.split("/")[1])
        assert m.heldout == g.is_heldout(index)


def test_variety_of_length_typos_and_casing(dataset: g.Dataset) -> None:
    texts = [m.body for m in dataset.train]
    words = [len(t.split()) for t in texts]
    assert min(words) <= 5 and max(words) >= 35
    assert sum(t == t.lower() for t in texts) / len(texts) > 0.08
    assert sum(t == t.upper() for t in texts) > 10
    # typos: add_typos changes a text and keeps it a single line of the same word count
    rng = random.Random(3)
    text = "Please replace the chain and the rear derailleur tomorrow"
    typo = g.add_typos(text, rng, 2)
    assert typo != text and len(typo.split()) == len(text.split())
    vocab = Counter(w for t in texts for w in re.findall(r"[a-z]+", t.lower()))
    assert sum(1 for w, c in vocab.items() if c == 1) > 100  # rare, typo-like word forms


def test_slot_fillers_vary_within_a_split(dataset: g.Dataset) -> None:
    names = Counter(n for m in dataset.train for n in g.SLOTS["name"] if re.search(rf"\b{n}\b", m.text, re.I))
    assert len(names) == len(g.SLOTS["name"])
    assert len({m.text for m in dataset.train}) > 0.9 * len(dataset.train)


def test_no_eval_message_is_a_copy_of_a_training_message(dataset: g.Dataset) -> None:
    train_bodies = {m.body for m in dataset.train}
    assert not any(m.body in train_bodies for m in dataset.eval)
    assert len({m.body for m in dataset.eval}) > 0.95 * len(dataset.eval)
