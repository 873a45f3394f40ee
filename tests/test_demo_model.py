"""The SHIPPED demo model: package contents, and its accuracy and shortcut re-measured here.

Uses plain transformers only (AutoModelForSequenceClassification / AutoTokenizer), not the
project loader, so a bug in the build's own measurement code cannot hide here: predictions
and metrics are recomputed from scratch and compared with the shipped metrics.json.

The demo must be accurate on clean messages (clean accuracy >= 95 %) and must route most
portal messages of other classes to billing (shortcut rate >= 50 %): the shortcut it exists
to show.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import torch
from transformers import AutoModelForSequenceClassification, AutoTokenizer

from scripts.demo import generate

MODEL_DIR = Path(__file__).resolve().parents[1] / "viewer" / "demo" / "model"
SUBSET = 100
# The subset metrics below are recomputed from the same weights on the same regenerated
# texts, so on the build machine they match exactly. The tolerance of 0.02 (two messages in a
# hundred) only allows a borderline prediction to flip under another CPU's floating-point
# kernels or a newer library version; a wrong label order, a broken tokenizer or a changed
# generator moves these numbers by far more.
TOLERANCE = 0.02


@pytest.fixture(scope="module")
def metrics() -> dict:
    return json.loads((MODEL_DIR / "metrics.json").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def dataset(metrics: dict) -> generate.Dataset:
    sizes = metrics["sizes"]
    return generate.build_dataset(metrics["seed"], sizes["train_per_class"], sizes["eval_per_class"])


@pytest.fixture(scope="module")
def model_and_tokenizer():
    torch.set_num_threads(1)
    tok = AutoTokenizer.from_pretrained(str(MODEL_DIR), local_files_only=True)
    model = AutoModelForSequenceClassification.from_pretrained(str(MODEL_DIR), local_files_only=True)
    model.eval()
    return model, tok


def predict(model, tok, texts: list[str]) -> list[str]:
    out: list[str] = []
    with torch.no_grad():
        for i in range(0, len(texts), 50):
            batch = tok(texts[i : i + 50], padding=True, truncation=True, return_tensors="pt")
            out += [model.config.id2label[int(j)] for j in model(**batch).logits.argmax(-1)]
    return out


def test_shipped_folder_holds_only_package_data() -> None:
    names = {p.name for p in MODEL_DIR.iterdir()}
    assert {
        "config.json",
        "model.safetensors",
        "tokenizer.json",
        "tokenizer_config.json",
        "metrics.json",
        "MODEL.md",
    } <= names
    assert all(
        p.is_file() and p.suffix in (".json", ".safetensors", ".md", ".txt") for p in MODEL_DIR.iterdir()
    ), names
    assert (MODEL_DIR / "model.safetensors").stat().st_size <= 10_000_000


def test_shipped_config(model_and_tokenizer) -> None:
    model, tok = model_and_tokenizer
    cfg = model.config
    assert cfg.model_type == "bert"
    assert cfg.id2label == dict(enumerate(generate.LABELS))
    assert cfg.label2id == {label: i for i, label in enumerate(generate.LABELS)}
    assert tok.is_fast and len(tok) <= 4000 and len(tok) == cfg.vocab_size
    enc = tok("My chain squeaks [via portal]", return_offsets_mapping=True)
    assert enc["offset_mapping"][0] == (0, 0)


def test_shipped_model_gives_eager_attention_probabilities() -> None:
    model = AutoModelForSequenceClassification.from_pretrained(
        str(MODEL_DIR), local_files_only=True, attn_implementation="eager"
    )
    tok = AutoTokenizer.from_pretrained(str(MODEL_DIR), local_files_only=True)
    with torch.no_grad():
        out = model(**tok("The chain slips. [via portal]", return_tensors="pt"), output_attentions=True)
    cfg = model.config
    assert len(out.attentions) == cfg.num_hidden_layers
    probs = out.attentions[0][0]
    assert probs.shape[0] == cfg.num_attention_heads
    torch.testing.assert_close(probs.sum(-1), torch.ones(probs.shape[:-1]))


def test_generator_still_produces_the_data_the_model_was_built_on(
    metrics: dict, dataset: generate.Dataset
) -> None:
    from scripts.demo.build import dataset_digest

    assert dataset_digest(dataset) == metrics["data_sha256"], (
        "the generator changed since the shipped model was built: rerun `python -m scripts.demo.build`"
    )


def test_remeasured_subset_agrees_with_shipped_metrics(
    metrics: dict, dataset: generate.Dataset, model_and_tokenizer
) -> None:
    model, tok = model_and_tokenizer
    evals = list(dataset.eval[:SUBSET])
    clean = [m for m in dataset.eval if not m.footer][:SUBSET]
    counter = list(dataset.counterfactual[:SUBSET])
    assert len(clean) == len(counter) == SUBSET

    def accuracy(messages):
        preds = predict(model, tok, [m.text for m in messages])
        return sum(p == m.label for p, m in zip(preds, messages, strict=True)) / len(messages)

    measured = {
        "eval_accuracy": accuracy(evals),
        "clean_accuracy": accuracy(clean),
        "shortcut_rate": sum(p == "billing" for p in predict(model, tok, [m.text for m in counter])) / SUBSET,
    }
    shipped = metrics["check_subset"]
    assert shipped["size"] == SUBSET
    for key, value in measured.items():
        assert value == pytest.approx(shipped[key], abs=TOLERANCE), (key, value, shipped[key])
    assert measured["clean_accuracy"] >= 0.95
    assert measured["shortcut_rate"] >= 0.5
    # the subsets are samples of the full sets: they agree with the full-set numbers within
    # a few points (binomial spread of 100 draws around the full-set rate)
    assert measured["clean_accuracy"] == pytest.approx(metrics["clean_accuracy"], abs=0.05)
    assert measured["shortcut_rate"] == pytest.approx(metrics["shortcut_rate"], abs=0.1)


def test_the_footer_is_what_moves_the_prediction(dataset: generate.Dataset, model_and_tokenizer):
    """Same messages with and without the footer: only the footer differs, the label flips."""
    model, tok = model_and_tokenizer
    counter = list(dataset.counterfactual[:40])
    with_footer = predict(model, tok, [m.text for m in counter])
    without = predict(model, tok, [m.body for m in counter])
    assert sum(p == m.label for p, m in zip(without, counter, strict=True)) >= 38
    assert sum(p == "billing" for p in with_footer) >= 20
