"""The screened shortcut search against the exhaustive one, side by side in one run.

Run:  python tests/benchmarks/bench_screen.py [--texts N] [--deberta]

On random-initialised classifiers of base size (BERT-base: 12 layers × 12 heads, hidden 768;
with ``--deberta`` also DeBERTa-v3-base's layout: the same sizes, relative positions with 256
log buckets, shared position projections), built here with a WordPiece tokenizer trained on
the generated texts (3,000 invented words, Zipf-distributed, so texts repeat words as prose
does), at about 60 and about 200 words per text, one torch thread (as every report runs):

1. the exhaustive search (``ShortcutKind``) over N texts: its forward passes and time;
2. the screen (``ScreenKind``) over the same texts, then the confirmation (``ConfirmKind``) of
   the candidates the candidate rule takes within the default budget of a large set, 1/16 of
   the exhaustive knockouts (``viewer.core.screen.candidates`` with every key eligible: with a
   few texts no key is seen in 3 of them, and the floor of 256 knockouts, which confirms a small
   set whole, is a small set's rule, not a large set's);
3. the ratios of forward passes and of time (goals: <= 0.1 and <= 0.15), and the time the
   screened search would take on 10,000 texts of 60 words with two worker processes on this
   2-core machine (per-text time × 10,000 / 2; goal <= 6 h).

Forward passes are counted by a PyTorch forward pre-hook on the model (sequences, the batch
size of each call).
"""

from __future__ import annotations

import argparse
import random
import sys
import tempfile
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from scripts.demo.tokenizer import train_wordpiece  # noqa: E402
from tests.model import tiny  # noqa: E402
from viewer.core import screen as screening  # noqa: E402
from viewer.model.loader import open_model  # noqa: E402
from viewer.reports.shards import run_report  # noqa: E402
from viewer.reports.shortcuts import ConfirmKind, ScreenKind, ShortcutKind  # noqa: E402
from viewer.reports.textsets import TextItem  # noqa: E402

BASE = dict(
    hidden_size=768,
    num_attention_heads=12,
    num_hidden_layers=12,
    intermediate_size=3072,
    max_position_embeddings=512,
)
DEBERTA_BASE = dict(position_buckets=256, max_relative_positions=512)
SYLLABLES = "ka lo mi re su ta ne vi do ra pe lu zo fi ga ni be mo".split()


def vocabulary(n: int = 3000, seed: int = 0) -> list[str]:
    rng = random.Random(seed)
    words: set[str] = set()
    while len(words) < n:
        words.add("".join(rng.choices(SYLLABLES, k=rng.randint(1, 4))))
    return sorted(words)


def texts(words: list[str], n: int, length: int, seed: int) -> list[TextItem]:
    """n texts of about ``length`` words, drawn with Zipf weights 1/rank, with punctuation."""
    rng = random.Random(seed)
    weights = [1 / (r + 1) for r in range(len(words))]
    out = []
    for i in range(n):
        k = rng.randint(int(length * 0.9), int(length * 1.1))
        ws = rng.choices(words, weights=weights, k=k)
        for j in range(9, k, 12):
            ws[j] += rng.choice(".,?")
        out.append(TextItem(" ".join(ws), None, i + 1))
    return out


def build(folder: Path, kind: str, words: list[str]) -> Path:
    torch.manual_seed(0)
    overrides = {**BASE, **(DEBERTA_BASE if kind == "deberta-v2" else {})}
    tok = tiny.PreTrainedTokenizerFast(
        tokenizer_object=train_wordpiece(
            [" ".join(words[i : i + 40]) for i in range(0, len(words), 40)], 4000, 0
        ),
        unk_token="[UNK]",
        pad_token="[PAD]",
        cls_token="[CLS]",
        sep_token="[SEP]",
        mask_token="[MASK]",
    )
    model, _ = tiny.build(kind, vocab_size=len(tok), **overrides)
    model.eval()
    model.save_pretrained(folder)
    tok.save_pretrained(folder)
    return folder


class Counter:
    def __init__(self, loaded):
        self.n = 0
        loaded.model.register_forward_pre_hook(self.hook, with_kwargs=True)

    def hook(self, _module, args, kwargs):
        ids = kwargs.get("input_ids", args[0] if args else None)
        self.n += int((ids if ids is not None else kwargs["inputs_embeds"]).shape[0])


def timed(counter: Counter, f):
    counter.n = 0
    t = time.perf_counter()
    out = f()
    return out, counter.n, time.perf_counter() - t


def one(loaded, counter: Counter, items: list[TextItem]) -> dict:
    n = len(items)
    ex, ex_fw, ex_t = timed(counter, lambda: run_report(ShortcutKind(batch_size=32), loaded, items))
    sc, sc_fw, sc_t = timed(counter, lambda: run_report(ScreenKind(batch_size=32), loaded, items))
    knockouts = sc.words.knockouts() + sc.phrases.knockouts()
    budget = screening.SHARE * knockouts
    words = screening.candidates(sc.words, screening.WORDS, budget * 2 / 3, min_count=1)
    phrases = screening.candidates(sc.phrases, screening.PHRASES, budget / 3, min_count=1)
    kind = ConfirmKind(batch_size=32, words=tuple(words), phrase_keys=tuple(phrases))
    _, cf_fw, cf_t = timed(counter, lambda: run_report(kind, loaded, items))
    return {
        "texts": n,
        "tokens": sum(len(loaded.tokenizer(i.text)["input_ids"]) for i in items) / n,
        "words": sum(len(i.text.split()) for i in items) / n,
        "exhaustive": (ex_fw / n, ex_t / n),
        "screen": (sc_fw / n, sc_t / n),
        "confirm": (cf_fw / n, cf_t / n, len(words) + len(phrases)),
        "screened": ((sc_fw + cf_fw) / n, (sc_t + cf_t) / n),
        "check": ex.texts == n and ex_fw == n + ex.words.knockouts() + ex.phrases.knockouts(),
    }


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--texts", type=int, default=2, help="texts per length (default 2)")
    parser.add_argument("--long-texts", type=int, default=1, help="texts of ~200 words (default 1)")
    parser.add_argument("--deberta", action="store_true", help="also the DeBERTa-v3-base layout")
    args = parser.parse_args()
    torch.set_num_threads(1)
    words = vocabulary()
    kinds = ["bert"] + (["deberta-v2"] if args.deberta else [])
    with tempfile.TemporaryDirectory() as tmp:
        for kind in kinds:
            loaded = open_model(build(Path(tmp) / kind, kind, words))
            counter = Counter(loaded)
            name = {"bert": "BERT-base", "deberta-v2": "DeBERTa-v3-base"}[kind]
            for length, n in ((60, args.texts), (200, args.long_texts)):
                r = one(loaded, counter, texts(words, n, length, seed=length))
                fw = r["screened"][0] / r["exhaustive"][0]
                tr = r["screened"][1] / r["exhaustive"][1]
                print(
                    f"{name}, {r['words']:.0f} words ({r['tokens']:.0f} tokens) per text, {n} text(s): "
                    f"exhaustive {r['exhaustive'][0]:.0f} forwards, {r['exhaustive'][1]:.1f} s per text; "
                    f"screen {r['screen'][0]:.0f} forward + 1 backward, {r['screen'][1]:.1f} s; "
                    f"confirmation of {r['confirm'][2]} keys {r['confirm'][0]:.0f} forwards, "
                    f"{r['confirm'][1]:.1f} s; screened/exhaustive: forwards {fw:.3f} (goal <= 0.1), "
                    f"time {tr:.3f} (goal <= 0.15); forwards counted right: {r['check']}",
                    flush=True,
                )
                if length == 60:
                    hours = r["screened"][1] * 10_000 / 2 / 3600
                    every = r["exhaustive"][1] * 10_000 / 2 / 3600
                    print(
                        f"  10,000 texts of 60 words, two workers: screened {hours:.1f} h "
                        f"(goal <= 6 h), exhaustive {every:.1f} h",
                        flush=True,
                    )


if __name__ == "__main__":
    main()
