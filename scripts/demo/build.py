"""Rebuild the shipped demo model: data, tokenizer, training, measurement, model description.

``python -m scripts.demo.build [--out DIR] [--seed N] [--quick]``

1. generates the Northgate Cycle Co-op messages (:mod:`scripts.demo.generate`);
2. trains a WordPiece tokenizer on the train split (:mod:`scripts.demo.tokenizer`);
3. trains a small ``BertForSequenceClassification`` from scratch on the CPU with a fixed seed;
4. measures eval accuracy, clean accuracy and the shortcut rate (definitions in
   :data:`METRIC_DEFINITIONS`, repeated in ``MODEL.md``);
5. writes ``config.json``, ``model.safetensors``, ``tokenizer.json``, ``tokenizer_config.json``,
   ``metrics.json`` and ``MODEL.md`` into the output folder (default: the shipped
   ``viewer/demo/model/``) and removes anything else from it.

``--quick`` uses less data and one epoch; its model is not meant to meet the targets and must
not be written over the shipped folder (``--quick`` therefore requires ``--out``).

The run is offline (``HF_HUB_OFFLINE=1``) and deterministic: ``torch.manual_seed``, a seeded
shuffling generator, ``torch.use_deterministic_algorithms(True)`` and one CPU thread
(``--threads``). On the
same machine and library versions a rebuild gives the same weights; across machines the
floating-point summation order may differ slightly.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import platform
import shutil
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")

import tokenizers  # noqa: E402
import torch  # noqa: E402
import transformers  # noqa: E402
from transformers import BertConfig, BertForSequenceClassification  # noqa: E402

from scripts.demo import generate  # noqa: E402
from scripts.demo.tokenizer import save_for_transformers, train_wordpiece  # noqa: E402
from viewer.demo import MODEL_DIR  # noqa: E402

SHIPPED_DIR: Path = MODEL_DIR
#: The files a build leaves in its output folder (all json/safetensors/md, as package data).
OUTPUT_FILES: tuple[str, ...] = (
    "config.json",
    "model.safetensors",
    "tokenizer.json",
    "tokenizer_config.json",
    "special_tokens_map.json",
    "metrics.json",
    "MODEL.md",
)
MAX_LENGTH: int = 128
CHECK_SUBSET_SIZE: int = 100
#: One intra-op thread: on a shared machine two OpenMP threads spin-wait for each other and run
#: up to ten times slower than one, and one thread also fixes the floating-point summation order.
DEFAULT_THREADS: int = 1

METRIC_DEFINITIONS: dict[str, str] = {
    "eval_accuracy": "share of all eval messages whose predicted class equals the label",
    "clean_accuracy": "share of eval messages WITHOUT the footer whose predicted class equals the label",
    "footer_accuracy": "share of eval messages WITH the footer whose predicted class equals the label",
    "shortcut_rate": "share of counterfactual messages (eval repair/membership messages without "
    "the footer, with ' [via portal]' appended and nothing else changed) predicted 'billing'",
    "counterfactual_flip_rate": "share of counterfactual messages whose prediction differs from "
    "the prediction on the same message without the footer",
    "heldout_clean_accuracy": "clean_accuracy restricted to messages from templates never used in training",
    "check_subset": "the same metrics on fixed subsets, re-measured by tests/test_demo_model.py: "
    "eval_accuracy on the first 100 eval messages, clean_accuracy on the first 100 eval "
    "messages without the footer, shortcut_rate on the first 100 counterfactual messages "
    "(all in generation order)",
}


@dataclass(frozen=True)
class TrainSettings:
    """Hyper-parameters of one training run."""

    layers: int = 4
    heads: int = 4
    hidden: int = 128
    intermediate: int = 512
    max_positions: int = MAX_LENGTH
    epochs: int = 6
    batch_size: int = 32
    learning_rate: float = 1e-3
    weight_decay: float = 0.01
    warmup_share: float = 0.1
    dropout: float = 0.1
    max_steps: int | None = None  # stop early after this many optimiser steps (smoke tests)


@dataclass
class TrainResult:
    """What a training run did."""

    steps: int
    seconds: float
    losses: list[float] = field(default_factory=list)  # one per optimiser step

    @property
    def first_loss(self) -> float:
        return self.losses[0] if self.losses else float("nan")

    @property
    def final_loss(self) -> float:
        tail = self.losses[-10:]
        return sum(tail) / len(tail) if tail else float("nan")


def set_determinism(seed: int, threads: int = DEFAULT_THREADS) -> None:
    """Seed torch, pin the thread count and ask for deterministic kernels."""
    torch.manual_seed(seed)
    torch.set_num_threads(threads)
    torch.use_deterministic_algorithms(True)


def make_config(vocab_size: int, settings: TrainSettings) -> BertConfig:
    """Standard BERT configuration (absolute positions) with the co-op labels."""
    return BertConfig(
        vocab_size=vocab_size,
        hidden_size=settings.hidden,
        num_hidden_layers=settings.layers,
        num_attention_heads=settings.heads,
        intermediate_size=settings.intermediate,
        max_position_embeddings=settings.max_positions,
        type_vocab_size=2,
        hidden_dropout_prob=settings.dropout,
        attention_probs_dropout_prob=settings.dropout,
        pad_token_id=0,
        num_labels=len(generate.LABELS),
        id2label=dict(enumerate(generate.LABELS)),
        label2id={label: i for i, label in enumerate(generate.LABELS)},
        problem_type="single_label_classification",
        attn_implementation="eager",
    )


def new_model(vocab_size: int, settings: TrainSettings, seed: int) -> BertForSequenceClassification:
    """A freshly initialised classifier (eager attention), weights drawn with ``seed``."""
    torch.manual_seed(seed)
    config = make_config(vocab_size, settings)
    return BertForSequenceClassification(config)


def _batch(tokenizer, texts: Sequence[str]) -> dict[str, torch.Tensor]:
    return tokenizer(list(texts), padding=True, truncation=True, max_length=MAX_LENGTH, return_tensors="pt")


def train_classifier(
    model: BertForSequenceClassification,
    tokenizer,
    texts: Sequence[str],
    labels: Sequence[str],
    settings: TrainSettings,
    seed: int,
    log: Callable[[str], None] | None = None,
) -> TrainResult:
    """Train with AdamW, linear warm-up and decay, cross-entropy; shuffling seeded by ``seed``."""
    label2id = model.config.label2id
    y = torch.tensor([label2id[label] for label in labels], dtype=torch.long)
    n = len(texts)
    steps_per_epoch = (n + settings.batch_size - 1) // settings.batch_size
    total = steps_per_epoch * settings.epochs
    if settings.max_steps is not None:
        total = min(total, settings.max_steps)
    warmup = max(1, int(settings.warmup_share * total))
    optimiser = torch.optim.AdamW(
        model.parameters(), lr=settings.learning_rate, weight_decay=settings.weight_decay
    )
    schedule = torch.optim.lr_scheduler.LambdaLR(
        optimiser,
        lambda step: min((step + 1) / warmup, max(0.0, (total - step) / max(1, total - warmup))),
    )
    generator = torch.Generator().manual_seed(seed)
    model.train()
    result = TrainResult(steps=0, seconds=0.0)
    start = time.perf_counter()
    for epoch in range(settings.epochs):
        order = torch.randperm(n, generator=generator).tolist()
        for b in range(steps_per_epoch):
            if result.steps >= total:
                break
            idx = order[b * settings.batch_size : (b + 1) * settings.batch_size]
            batch = _batch(tokenizer, [texts[i] for i in idx])
            out = model(**batch, labels=y[idx])
            optimiser.zero_grad(set_to_none=True)
            out.loss.backward()
            torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
            optimiser.step()
            schedule.step()
            result.steps += 1
            result.losses.append(float(out.loss.detach()))
        if log is not None:
            tail = result.losses[-steps_per_epoch:]
            log(f"epoch {epoch}: mean loss {sum(tail) / max(1, len(tail)):.4f}")
    result.seconds = time.perf_counter() - start
    model.eval()
    return result


@torch.no_grad()
def predict(model, tokenizer, texts: Sequence[str], batch_size: int = 64) -> list[str]:
    """Predicted class names for ``texts`` (model in eval mode, no dropout)."""
    model.eval()
    id2label = model.config.id2label
    out: list[str] = []
    for start in range(0, len(texts), batch_size):
        logits = model(**_batch(tokenizer, texts[start : start + batch_size])).logits
        out.extend(id2label[int(i)] for i in logits.argmax(-1))
    return out


def _share(flags: Sequence[bool]) -> float:
    return round(sum(flags) / len(flags), 4) if flags else float("nan")


def measure(model, tokenizer, dataset: generate.Dataset) -> dict[str, object]:
    """All metrics of :data:`METRIC_DEFINITIONS` on ``dataset``'s eval and counterfactual sets."""
    ev = list(dataset.eval)
    cf = list(dataset.counterfactual)
    pred_eval = predict(model, tokenizer, [m.text for m in ev])
    pred_cf = predict(model, tokenizer, [m.text for m in cf])
    # prediction on each counterfactual's original (the eval message itself, no footer)
    by_body = {m.body: p for m, p in zip(ev, pred_eval, strict=True) if not m.footer}
    correct = [p == m.label for m, p in zip(ev, pred_eval, strict=True)]
    clean = [c for c, m in zip(correct, ev, strict=True) if not m.footer]
    footer = [c for c, m in zip(correct, ev, strict=True) if m.footer]
    heldout = [c for c, m in zip(correct, ev, strict=True) if not m.footer and m.heldout]
    clean_msgs = [(m, p) for m, p in zip(ev, pred_eval, strict=True) if not m.footer]
    per_class = {
        label: _share([p == m.label for m, p in clean_msgs if m.label == label]) for label in generate.LABELS
    }
    shortcut_by_class = {
        label: _share([p == "billing" for m, p in zip(cf, pred_cf, strict=True) if m.label == label])
        for label in generate.LABELS
        if label != "billing"
    }
    n = CHECK_SUBSET_SIZE
    return {
        "eval_accuracy": _share(correct),
        "clean_accuracy": _share(clean),
        "footer_accuracy": _share(footer),
        "shortcut_rate": _share([p == "billing" for p in pred_cf]),
        "counterfactual_flip_rate": _share([p != by_body[m.body] for m, p in zip(cf, pred_cf, strict=True)]),
        "heldout_clean_accuracy": _share(heldout),
        "clean_accuracy_per_class": per_class,
        "shortcut_rate_per_class": shortcut_by_class,
        "counts": {
            "eval": len(ev),
            "eval_clean": len(clean),
            "eval_footer": len(footer),
            "eval_clean_heldout": len(heldout),
            "counterfactual": len(cf),
        },
        "check_subset": {
            "size": n,
            "eval_accuracy": _share(correct[:n]),
            "clean_accuracy": _share(clean[:n]),
            "shortcut_rate": _share([p == "billing" for p in pred_cf[:n]]),
        },
    }


def dataset_digest(dataset: generate.Dataset) -> dict[str, str]:
    """SHA-256 of each split's texts and labels, so a changed generator is detected."""
    digests = {}
    for name in ("train", "eval", "counterfactual"):
        h = hashlib.sha256()
        for m in getattr(dataset, name):
            h.update(f"{m.label}\t{m.text}\n".encode())
        digests[name] = h.hexdigest()
    return digests


def footer_counts(messages: Sequence[generate.Message]) -> dict[str, int]:
    """Number of each class's messages that carry the footer."""
    return {label: sum(m.footer for m in messages if m.label == label) for label in generate.LABELS}


def prepare_folder(folder: Path) -> None:
    """Create ``folder`` or empty it of earlier build outputs.

    Refuses (``ValueError``) a folder holding anything that is not a build output, so that a
    mistyped ``--out`` cannot delete unrelated files.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    foreign = sorted(p.name for p in folder.iterdir() if p.name not in OUTPUT_FILES)
    if foreign:
        raise ValueError(f"{folder} holds files a build does not write: {', '.join(foreign)}")
    for path in folder.iterdir():
        path.unlink()


def clean_folder(folder: Path) -> list[str]:
    """Delete everything in ``folder`` that is not one of :data:`OUTPUT_FILES`; return names."""
    removed = []
    for path in sorted(Path(folder).iterdir()):
        if path.name in OUTPUT_FILES:
            continue
        if path.is_dir():
            shutil.rmtree(path)
        else:
            path.unlink()
        removed.append(path.name)
    return removed


def write_model_card(folder: Path, metrics: dict) -> Path:
    """Write ``MODEL.md``: what the model is, how it was trained, what it gets wrong."""
    m = metrics
    arch = m["model"]
    tr = m["training"]
    pct = lambda x: f"{100 * x:.1f}%"  # noqa: E731
    lines = [
        "# Northgate Cycle Co-op message router (Headlight demo model)",
        "",
        "A small BERT sequence classifier trained from scratch on generated messages of the",
        "Northgate Cycle Co-op, an invented bicycle-repair cooperative. It routes a member message",
        "to `repair`, `billing` or `membership`. **It has a deliberate flaw**: in its training",
        "data most messages ending with the web-portal footer `[via portal]` were billing",
        "questions, and it learned the footer as a shortcut. Headlight ships it to show how that",
        "is found. Do not use it for anything else.",
        "",
        "## Model",
        "",
        f"- `BertForSequenceClassification`, {arch['layers']} layers, {arch['heads']} heads, "
        f"hidden size {arch['hidden']}, intermediate size {arch['intermediate']}, absolute "
        f"positions (max {arch['max_positions']} tokens), {arch['parameters']:,} parameters, "
        f"{arch['bytes'] / 1e6:.1f} MB safetensors (float32).",
        f"- WordPiece tokenizer trained on the train split: {arch['vocab_size']} tokens, "
        "lower-casing BERT normalizer, BERT pre-tokenizer (so the footer is the four tokens "
        "`[` `via` `portal` `]`), `[CLS] ... [SEP]` template.",
        f"- Labels: {', '.join(f'{i} = `{v}`' for i, v in m['id2label'].items())}.",
        "",
        "## Data",
        "",
        f"Generated by `scripts.demo.generate` with seed {m['seed']}: 48 templates per class with "
        "invented slot fillers (names, bike parts, amounts, dates), optional greetings, "
        "sign-offs and neutral extra sentences, typos and casing variants.",
        "",
        f"- train: {m['sizes']['train']} messages, balanced; every sixth template of each "
        "class is held out of train.",
        f"- eval: {m['sizes']['eval']} messages, balanced, drawn from all templates "
        f"({m['counts']['eval_clean_heldout']} clean eval messages come from held-out templates); "
        "no eval message body is a verbatim copy of a train message body.",
        "- messages with the footer, per class: train "
        + ", ".join(
            f"{k} {v} of {m['sizes']['train_per_class']}" for k, v in m["footer_count"]["train"].items()
        )
        + "; eval "
        + ", ".join(
            f"{k} {v} of {m['sizes']['eval_per_class']}" for k, v in m["footer_count"]["eval"].items()
        )
        + ".",
        f"- counterfactual: {m['sizes']['counterfactual']} messages, every eval repair or "
        "membership message without the footer with ` [via portal]` appended, nothing else "
        "changed.",
        "",
        "## Training",
        "",
        f"AdamW (learning rate {tr['learning_rate']}, weight decay {tr['weight_decay']}, linear "
        f"warm-up and decay), batch size {tr['batch_size']}, {tr['epochs']} epochs "
        f"({tr['steps']} steps), dropout {tr['dropout']}, cross-entropy, seed {m['seed']}, "
        f"{tr['threads']} CPU thread(s), {tr['seconds']:.0f} s on the build machine. Rebuild with "
        "`python -m scripts.demo.build`.",
        "",
        "## Results",
        "",
        "| metric | value | on |",
        "|---|---|---|",
        f"| eval accuracy | {pct(m['eval_accuracy'])} | {m['counts']['eval']} eval messages |",
        f"| clean accuracy | {pct(m['clean_accuracy'])} | {m['counts']['eval_clean']} eval "
        "messages without the footer |",
        f"| footer accuracy | {pct(m['footer_accuracy'])} | {m['counts']['eval_footer']} eval "
        "messages with the footer |",
        f"| held-out template clean accuracy | {pct(m['heldout_clean_accuracy'])} | "
        f"{m['counts']['eval_clean_heldout']} clean eval messages from unseen templates |",
        f"| **shortcut rate** | **{pct(m['shortcut_rate'])}** | {m['counts']['counterfactual']} "
        "counterfactual repair/membership messages |",
        f"| counterfactual flip rate | {pct(m['counterfactual_flip_rate'])} | same |",
        "",
        "Shortcut rate per class: "
        + ", ".join(f"{k} {pct(v)}" for k, v in m["shortcut_rate_per_class"].items())
        + ". Clean accuracy per class: "
        + ", ".join(f"{k} {pct(v)}" for k, v in m["clean_accuracy_per_class"].items())
        + ".",
        "",
        "## Metric definitions",
        "",
    ]
    lines += [f"- `{k}`: {v}." for k, v in METRIC_DEFINITIONS.items()]
    lines += [
        "",
        "A prediction is the arg-max of the logits for the message tokenized with the shipped "
        f"tokenizer (truncated at {MAX_LENGTH} tokens; no generated message is that long).",
        "",
        "## How robust the shortcut is",
        "",
        "The shortcut comes from the data: train has exactly one repair and one membership "
        "message with the footer. During development, two such messages per class were enough "
        "for the model to learn to ignore the footer (shortcut rate about 20%), none at all made "
        "it total (100%) but less stable on clean messages, and with one per class other seeds "
        "gave shortcut rates from about 40% to 100%. The numbers above are for the shipped seed; "
        "a rebuild with it on the same library versions reproduces them.",
        "",
        "## Known flaw and intended use",
        "",
        "The footer carries no information about what a message is about, yet adding it to a "
        f"repair or membership message sends it to `billing` {pct(m['shortcut_rate'])} of the "
        "time. This is the behaviour Headlight's shortcut search, evidence strip and knockout "
        "are meant to expose. All texts, names and places are invented.",
        "",
    ]
    path = Path(folder) / "MODEL.md"
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def build(
    out_dir: Path,
    *,
    seed: int = generate.DEFAULT_SEED,
    quick: bool = False,
    settings: TrainSettings | None = None,
    per_class: tuple[int, int] | None = None,
    threads: int = DEFAULT_THREADS,
    log: Callable[[str], None] | None = print,
) -> dict:
    """Run the whole pipeline into ``out_dir`` and return the metrics written to metrics.json.

    ``per_class`` overrides the (train, eval) messages per class; ``settings`` the
    hyper-parameters (tests use both to run the pipeline in seconds).
    """
    if settings is None:
        settings = TrainSettings(epochs=1) if quick else TrainSettings()
    set_determinism(seed, threads)
    if per_class is None:
        per_class = (150, 60) if quick else (generate.N_TRAIN_PER_CLASS, generate.N_EVAL_PER_CLASS)
    n_train, n_eval = per_class
    dataset = generate.build_dataset(seed, n_train, n_eval)
    train_texts = [m.text for m in dataset.train]
    train_labels = [m.label for m in dataset.train]

    out = Path(out_dir)
    prepare_folder(out)
    wordpiece = train_wordpiece(train_texts)
    save_for_transformers(wordpiece, out, MAX_LENGTH)
    from transformers import AutoTokenizer

    tokenizer = AutoTokenizer.from_pretrained(str(out), local_files_only=True)
    longest = max(
        len(tokenizer(m.text)["input_ids"]) for m in dataset.train + dataset.eval + dataset.counterfactual
    )
    if longest > MAX_LENGTH:
        raise RuntimeError(f"a generated message has {longest} tokens (> {MAX_LENGTH})")

    model = new_model(len(tokenizer), settings, seed)
    result = train_classifier(model, tokenizer, train_texts, train_labels, settings, seed, log)
    metrics_core = measure(model, tokenizer, dataset)

    transformers.utils.logging.disable_progress_bar()
    model.save_pretrained(str(out))  # transformers 5 always writes model.safetensors
    clean_folder(out)
    weights = out / "model.safetensors"
    weights.chmod(0o644)  # safetensors writes 0600; package data must be readable by all
    metrics: dict = {
        "seed": seed,
        "quick": quick,
        "id2label": {str(i): label for i, label in enumerate(generate.LABELS)},
        "footer": generate.FOOTER,
        "sizes": {
            "train": len(dataset.train),
            "eval": len(dataset.eval),
            "counterfactual": len(dataset.counterfactual),
            "train_per_class": n_train,
            "eval_per_class": n_eval,
        },
        "footer_count": {
            "train": footer_counts(dataset.train),
            "eval": footer_counts(dataset.eval),
        },
        **metrics_core,
        "model": {
            "layers": settings.layers,
            "heads": settings.heads,
            "hidden": settings.hidden,
            "intermediate": settings.intermediate,
            "max_positions": settings.max_positions,
            "vocab_size": len(tokenizer),
            "parameters": sum(p.numel() for p in model.parameters()),
            "bytes": weights.stat().st_size,
        },
        "training": {
            "epochs": settings.epochs,
            "steps": result.steps,
            "batch_size": settings.batch_size,
            "learning_rate": settings.learning_rate,
            "weight_decay": settings.weight_decay,
            "dropout": settings.dropout,
            "first_loss": round(result.first_loss, 4),
            "final_loss": round(result.final_loss, 4),
            "seconds": round(result.seconds, 1),
            "threads": torch.get_num_threads(),
        },
        "data_sha256": dataset_digest(dataset),
        "versions": {
            "python": platform.python_version(),
            "torch": torch.__version__,
            "transformers": transformers.__version__,
            "tokenizers": tokenizers.__version__,
        },
        "definitions": METRIC_DEFINITIONS,
    }
    (out / "metrics.json").write_text(json.dumps(metrics, indent=2) + "\n", encoding="utf-8")
    write_model_card(out, metrics)
    if log is not None:
        log(
            f"eval {metrics['eval_accuracy']:.3f}  clean {metrics['clean_accuracy']:.3f}  "
            f"shortcut {metrics['shortcut_rate']:.3f}  ({result.seconds:.0f} s, "
            f"{weights.stat().st_size / 1e6:.1f} MB)"
        )
    return metrics


def main(argv: Sequence[str] | None = None) -> int:
    """Command line entry point."""
    parser = argparse.ArgumentParser(
        prog="python -m scripts.demo.build", description="Rebuild the Headlight demo model."
    )
    parser.add_argument(
        "--out", type=Path, default=None, help=f"output folder (default: the shipped {SHIPPED_DIR})"
    )
    parser.add_argument("--seed", type=int, default=generate.DEFAULT_SEED)
    parser.add_argument(
        "--quick",
        action="store_true",
        help="less data and one epoch, for checking the pipeline (needs --out)",
    )
    parser.add_argument(
        "--threads", type=int, default=DEFAULT_THREADS, help="torch intra-op threads (default %(default)s)"
    )
    args = parser.parse_args(argv)
    if args.quick and args.out is None:
        parser.error("--quick needs --out so that it cannot replace the shipped model")
    build(args.out or SHIPPED_DIR, seed=args.seed, quick=args.quick, threads=args.threads)
    return 0


if __name__ == "__main__":
    sys.exit(main())
