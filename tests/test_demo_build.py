"""Smoke tests of the demo build pipeline on a tiny configuration, so the build cannot rot.

The full build (``python -m scripts.demo.build``) takes about a minute and is not run here.
References: docs/definitions.md, "Demo scenario" (why the demo's WordPiece training must be
made deterministic, and how the tokenizer module does it); the transformers
``save_pretrained``/``from_pretrained`` round trip and fast-tokenizer offsets are the library's
documented behaviour; a training loss that falls over the first steps on learnable data is
common practice as a smoke signal.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import torch
from transformers import AutoModelForSequenceClassification, AutoTokenizer

from scripts.demo import build, generate
from scripts.demo.tokenizer import SPECIAL_TOKENS, save_for_transformers, train_wordpiece

TINY = build.TrainSettings(
    layers=2,
    heads=2,
    hidden=32,
    intermediate=64,
    epochs=4,
    batch_size=16,
    learning_rate=3e-3,
    warmup_share=0.05,
    max_steps=40,
)


@pytest.fixture(scope="module")
def small_data() -> generate.Dataset:
    return generate.build_dataset(11, 60, 12)


@pytest.fixture(scope="module")
def tok_dir(tmp_path_factory: pytest.TempPathFactory, small_data: generate.Dataset) -> Path:
    folder = tmp_path_factory.mktemp("tok")
    save_for_transformers(train_wordpiece([m.text for m in small_data.train]), folder, 128)
    return folder


def test_tokenizer_training_is_deterministic(small_data: generate.Dataset) -> None:
    texts = [m.text for m in small_data.train]
    assert train_wordpiece(texts).to_str() == train_wordpiece(texts).to_str()


def test_tokenizer_loads_fast_with_offsets(tok_dir: Path) -> None:
    tok = AutoTokenizer.from_pretrained(str(tok_dir), local_files_only=True)
    assert tok.is_fast
    assert [tok.convert_ids_to_tokens(i) for i in range(5)] == list(SPECIAL_TOKENS)
    assert len(tok) <= 4000
    text = "My Chain squeaks. [via portal]"
    enc = tok(text, return_offsets_mapping=True, return_special_tokens_mask=True)
    tokens = tok.convert_ids_to_tokens(enc["input_ids"])
    assert tokens[0] == "[CLS]" and tokens[-1] == "[SEP]"
    assert enc["special_tokens_mask"] == [1] + [0] * (len(tokens) - 2) + [1]
    assert tokens[-5:-1] == ["[", "via", "portal", "]"]
    for token, (start, end) in zip(tokens[1:-1], enc["offset_mapping"][1:-1], strict=True):
        piece = text[start:end].lower()
        assert piece == token.removeprefix("##") or token == "[UNK]", (token, piece)


def test_training_lowers_the_loss_and_round_trips(
    tmp_path: Path, tok_dir: Path, small_data: generate.Dataset
) -> None:
    build.set_determinism(5, threads=1)
    tok = AutoTokenizer.from_pretrained(str(tok_dir), local_files_only=True)
    model = build.new_model(len(tok), TINY, seed=5)
    texts = [m.text for m in small_data.train]
    labels = [m.label for m in small_data.train]
    result = build.train_classifier(model, tok, texts, labels, TINY, seed=5)
    assert result.steps == 40  # 12 batches of 16 per epoch, stopped at max_steps
    head = sum(result.losses[:3]) / 3
    tail = sum(result.losses[-3:]) / 3
    assert tail < head - 0.05, result.losses

    model.save_pretrained(str(tmp_path))
    reloaded = AutoModelForSequenceClassification.from_pretrained(str(tmp_path), local_files_only=True)
    assert reloaded.config.num_labels == 3
    assert reloaded.config.id2label == dict(enumerate(generate.LABELS))
    assert (tmp_path / "model.safetensors").is_file()
    sample = texts[:8]
    with torch.no_grad():
        before = model(**tok(sample, padding=True, return_tensors="pt")).logits
        after = reloaded(**tok(sample, padding=True, return_tensors="pt")).logits
    torch.testing.assert_close(before, after)
    assert build.predict(reloaded, tok, sample) == build.predict(model, tok, sample)


def test_build_end_to_end_writes_only_the_shipped_files(tmp_path: Path) -> None:
    out = tmp_path / "model"
    metrics = build.build(out, seed=3, settings=TINY, per_class=(40, 12), threads=1, log=None)
    names = {p.name for p in out.iterdir()}
    assert names <= set(build.OUTPUT_FILES)
    assert {
        "config.json",
        "model.safetensors",
        "tokenizer.json",
        "tokenizer_config.json",
        "metrics.json",
        "MODEL.md",
    } <= names
    assert all(p.suffix in (".json", ".safetensors", ".md", ".txt") for p in out.iterdir())
    saved = json.loads((out / "metrics.json").read_text(encoding="utf-8"))
    assert saved["clean_accuracy"] == metrics["clean_accuracy"]
    for key in (
        "eval_accuracy",
        "clean_accuracy",
        "shortcut_rate",
        "seed",
        "sizes",
        "training",
        "versions",
        "check_subset",
        "data_sha256",
    ):
        assert key in saved, key
    assert saved["sizes"] == {
        "train": 120,
        "eval": 36,
        "counterfactual": saved["counts"]["counterfactual"],
        "train_per_class": 40,
        "eval_per_class": 12,
    }
    card = (out / "MODEL.md").read_text(encoding="utf-8")
    assert "shortcut rate" in card and "clean accuracy" in card
    model = AutoModelForSequenceClassification.from_pretrained(str(out), local_files_only=True)
    assert model.config.id2label[1] == "billing"
    # a second build into the same folder is allowed; a folder with other files is refused
    (out / "notes.csv").write_text("x", encoding="utf-8")
    with pytest.raises(ValueError, match="notes.csv"):
        build.prepare_folder(out)


def test_measure_counts_the_shortcut(tok_dir: Path) -> None:
    """measure() on a stand-in model whose answers are known: it knows every label, but sends
    a repair message to 'billing' whenever the footer is there (membership keeps its label)."""
    data = generate.build_dataset(11, 30, 30)
    tok = AutoTokenizer.from_pretrained(str(tok_dir), local_files_only=True)
    portal_id = tok.convert_tokens_to_ids("portal")
    label2id = {label: i for i, label in enumerate(generate.LABELS)}
    truth = {tuple(tok(m.text)["input_ids"]): m.label for m in data.eval + data.counterfactual}

    class RepairFooterRouter(torch.nn.Module):
        config = build.make_config(len(tok), TINY)

        def forward(self, input_ids, attention_mask, token_type_ids=None):
            logits = torch.zeros(len(input_ids), 3)
            for row, (ids, mask) in enumerate(zip(input_ids, attention_mask, strict=True)):
                key = tuple(ids[mask.bool()].tolist())
                label = truth[key]
                if portal_id in key and label == "repair":
                    label = "billing"
                logits[row, label2id[label]] = 1.0
            return type("Output", (), {"logits": logits})()

    metrics = build.measure(RepairFooterRouter(), tok, data)
    cf = data.counterfactual
    repair_share = sum(m.label == "repair" for m in cf) / len(cf)
    assert 0.3 < repair_share < 0.7
    assert metrics["shortcut_rate"] == pytest.approx(repair_share, abs=1e-4)
    assert metrics["counterfactual_flip_rate"] == pytest.approx(repair_share, abs=1e-4)
    assert metrics["shortcut_rate_per_class"] == {"repair": 1.0, "membership": 0.0}
    assert metrics["clean_accuracy"] == 1.0
    assert metrics["heldout_clean_accuracy"] == 1.0
    n_wrong = sum(m.footer and m.label == "repair" for m in data.eval)
    assert n_wrong == 1
    assert metrics["eval_accuracy"] == pytest.approx(1 - n_wrong / len(data.eval), abs=1e-4)
    n_footer = sum(m.footer for m in data.eval)
    assert metrics["footer_accuracy"] == pytest.approx(1 - n_wrong / n_footer, abs=1e-4)
    assert metrics["counts"]["counterfactual"] == len(cf)
    assert metrics["check_subset"]["shortcut_rate"] == pytest.approx(
        sum(m.label == "repair" for m in cf[:100]) / min(100, len(cf)), abs=1e-4
    )
