"""Recording and check cost on the real MiniLM model, as ratios measured side by side.

Run:  python tests/benchmarks/bench_recording.py

For each length (32, 128, 512 tokens) it alternates a full Headlight recording (hooks, copies to
numpy, slicing per text) with a bare forward pass of the same model asking for
``output_attentions=True`` and no hooks, and reports the ratio of medians. It also times the
re-derivation check of one recording against one bare forward. Goals: recording <= 1.25x at 128
tokens; check <= 0.3x of one forward at 128 tokens and <= 1x at 512. Not a test: machines are
noisy, read the ratios (and run it on an otherwise idle machine: other processes on the cores
slow torch's two-thread forward far more than the check).
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from tests.conftest import minilm_folder  # noqa: E402
from viewer.core.attention import check_recording  # noqa: E402
from viewer.model.loader import open_model  # noqa: E402
from viewer.model.runs import model_inputs  # noqa: E402


def text_of(loaded, n_tokens: int) -> str:
    words = "the co-op mechanic trued a wheel and checked the chain for wear".split()
    text = " ".join(words[i % len(words)] for i in range(n_tokens))
    while len(loaded.tokenizer(text)["input_ids"]) > n_tokens:
        text = text.rsplit(" ", 1)[0]
    return text


def measure(loaded, text: str, repeats: int):
    """(recording, bare forward, check) medians in seconds, alternated, and the last
    recording and check result."""
    inputs = model_inputs(loaded, loaded.encode([text]))
    rec_t, bare_t, check_t = [], [], []
    loaded.record(text)  # warm-up
    for _ in range(repeats):
        t0 = time.perf_counter()
        rec = loaded.record(text)
        rec_t.append(time.perf_counter() - t0)
        with loaded.unhooked() as model, torch.no_grad():
            t0 = time.perf_counter()
            loaded.tokenizer([text], return_tensors="pt")
            model(**inputs, output_attentions=True)
            bare_t.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        result = check_recording(rec)
        check_t.append(time.perf_counter() - t0)
    medians = tuple(statistics.median(x) for x in (rec_t, bare_t, check_t))
    return medians, rec, result


def main(repeats: int = 15) -> None:
    torch.set_num_threads(2)
    loaded = open_model(minilm_folder())
    print(f"model: MiniLM ({loaded.n_layers} layers x {loaded.n_heads} heads), torch threads 2")
    for n in (32, 128, 512):
        (rec_m, bare_m, check_m), rec, _ = measure(loaded, text_of(loaded, n), repeats)
        print(
            f"{rec.n_tokens:4d} tokens: recording {rec_m * 1e3:7.1f} ms, bare forward "
            f"{bare_m * 1e3:7.1f} ms, ratio {rec_m / bare_m:.2f}x (goal <= 1.25x at 128); "
            f"check {check_m * 1e3:7.1f} ms = {check_m / bare_m:.2f}x of a forward "
            "(goal <= 0.3x at 128, <= 1x at 512)"
        )


if __name__ == "__main__":
    main()
