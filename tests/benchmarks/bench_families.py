"""Recording and check cost for the newer families, as ratios measured side by side.

Run:  python tests/benchmarks/bench_families.py

For DeBERTa-v3 (shared position projections, 256 log buckets), ModernBERT (local/global layers)
and Qwen3 (q/k norms, grouped K/V) at a tiny-but-realistic size (hidden 256, 4 layers, 4 heads,
random weights built from transformers' config classes), it alternates a full Headlight
recording with a bare forward of the same model asking for ``output_attentions=True`` and no
hooks, at 128 tokens, and reports the ratio of medians, then the re-derivation check (with all of
the family's score terms) against one bare forward. Goal: recording <= 1.25x. Not a test.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from tests.benchmarks.bench_recording import measure  # noqa: E402
from tests.model import tiny  # noqa: E402
from viewer.model.loader import open_model  # noqa: E402

SIZE = dict(
    hidden_size=256,
    num_attention_heads=4,
    num_hidden_layers=4,
    intermediate_size=1024,
    max_position_embeddings=512,
)
KINDS = {
    "deberta-v2": dict(**SIZE, position_buckets=256, max_relative_positions=512),
    "modernbert": dict(**SIZE, local_attention=64),
    "qwen3": dict(**{**SIZE, "num_key_value_heads": 2}, head_dim=64, sliding_window=64),
}


def text_of(loaded, n_tokens: int) -> str:
    words = " ".join(tiny.CORPUS).split()
    text = " ".join(words[i % len(words)] for i in range(n_tokens))
    while len(loaded.tokenizer(text)["input_ids"]) > n_tokens:
        text = text.rsplit(" ", 1)[0]
    return text


def main(repeats: int = 15, n_tokens: int = 128) -> None:
    torch.set_num_threads(2)
    with tempfile.TemporaryDirectory() as root:
        for kind, overrides in KINDS.items():
            loaded = open_model(tiny.save(Path(root) / kind, kind, **overrides))
            (rec_m, bare_m, check_m), rec, result = measure(loaded, text_of(loaded, n_tokens), repeats)
            print(
                f"{loaded.family.name:11s} {rec.n_tokens:4d} tokens, terms "
                f"{','.join(rec.terms.names()) or '-':18s}: recording {rec_m * 1e3:6.1f} ms, "
                f"bare forward {bare_m * 1e3:6.1f} ms, ratio {rec_m / bare_m:.2f}x (goal <= 1.25x);"
                f" check {check_m * 1e3:6.1f} ms = {check_m / bare_m:.2f}x, max error "
                f"{result.max_abs_error:.1e} ({'passed' if result.passed else 'FAILED'})"
            )


if __name__ == "__main__":
    main()
