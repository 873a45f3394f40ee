"""Texts as long as the model reads: memory and time of `headlight check` against a bare forward.

    python tests/benchmarks/bench_long.py [--sizes modernbert,qwen2] [--lengths 512,2048,8192]
    QT_QPA_PLATFORM=offscreen python tests/benchmarks/bench_long.py --window --sizes modernbert \
        --lengths 2048,8192

Two random-initialised checkpoints of the sizes people fine-tune are built once and kept in
``~/.cache/headlight-bench`` (nothing is downloaded):

- a ModernBERT-base-sized classifier: 22 layers × 12 heads, hidden 768, MLP 1152, local layers
  seeing a band of 129 keys, a global layer every third, 8,192 positions;
- a Qwen2-0.5B-sized decoder: 24 layers × 14 heads over 2 key/value heads, hidden 896, MLP 4864,
  a vocabulary of 151,936, 32,768 positions.

For each size and length, each measurement runs in a fresh process, which reports its own peak
resident memory (``ru_maxrss``) and time, side by side:

- **bare**: the unhooked model's forward, memory-efficient kernel (sdpa), no gradients: what
  running the model costs at all (a causal LM keeps the logits of the last token only);
- **check**: ``headlight check DIR --text …`` (open, record layer by layer, re-derive, compare);
- **estimate**: the memory budget's estimate of the check's pass and of a recording, against the
  peak resident memory each added above the loaded model (sampled every 2 ms).

Goals: check peak <= 1.5 × bare peak + 1 GB; check time <= 1.5 × bare time
at 8,192 tokens; the estimate within 25 % of the measured increase.

With ``--window`` the window is measured instead, in a fresh process, beside the bare forward:

- **run to painted overview**: Ctrl+Enter until the pair grid has painted the new text (the
  recording, then the overview of the selected head); goal <= 2 × the bare forward;
- **head switch**: selecting another head until the pair grid has painted it, after the summary
  pass has stored every head's overview (median and worst of several, across layers); goal
  <= 300 ms at 8,192 tokens; and, for information, the first switch before that pass (the
  overview is then computed for that head);
- **peak memory** of the window's process (``ru_maxrss``); goal <= 4 GB at 8,192 tokens;
- **longest event-loop gap**: the longest time between 10 ms timer ticks of the GUI thread from
  Ctrl+Enter until the check, the head metrics and the evidence have arrived and every pane has
  drawn them; goal <= 100 ms.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
CACHE = Path(os.environ.get("HEADLIGHT_BENCH_CACHE", Path.home() / ".cache" / "headlight-bench"))
GB = 2**30


def build(size: str, folder: Path) -> None:
    """Save a random checkpoint of ``size`` with the tiny test tokenizer (ids fit any vocab)."""
    import torch
    from transformers import (
        ModernBertConfig,
        ModernBertForSequenceClassification,
        Qwen2Config,
        Qwen2ForCausalLM,
    )

    sys.path.insert(0, str(ROOT))
    from tests.model import tiny

    torch.manual_seed(0)
    if size == "modernbert":
        config = ModernBertConfig(
            vocab_size=50368,
            hidden_size=768,
            intermediate_size=1152,
            num_hidden_layers=22,
            num_attention_heads=12,
            max_position_embeddings=8192,
            local_attention=128,  # 64 keys each side: a 129-key band
            global_attn_every_n_layers=3,
            num_labels=3,
            pad_token_id=0,
            cls_token_id=2,
            sep_token_id=3,
            bos_token_id=2,
            eos_token_id=3,
        )
        model, encoder = ModernBertForSequenceClassification(config), True
    else:
        config = Qwen2Config(
            vocab_size=151936,
            hidden_size=896,
            intermediate_size=4864,
            num_hidden_layers=24,
            num_attention_heads=14,
            num_key_value_heads=2,
            max_position_embeddings=32768,
            tie_word_embeddings=True,
            pad_token_id=0,
            bos_token_id=2,
            eos_token_id=3,
        )
        model, encoder = Qwen2ForCausalLM(config), False
    folder.mkdir(parents=True, exist_ok=True)
    model.save_pretrained(folder)
    tiny.tokenizer(encoder).save_pretrained(folder)


def folder_of(size: str) -> Path:
    folder = CACHE / size
    if not (folder / "config.json").is_file():
        build(size, folder)
    return folder


def text_of(n_words: int) -> str:
    """A text of ``n_words`` words of the tiny tokenizer's corpus (a few tokens each)."""
    sys.path.insert(0, str(ROOT))
    from tests.model import tiny

    words = " ".join(tiny.CORPUS).split()
    return " ".join(words[(7 * i) % len(words)] for i in range(n_words))


def words_for(folder: Path, tokens: int) -> int:
    """Words that make at least ``tokens`` tokens with this folder's tokenizer."""
    from transformers import AutoTokenizer

    tok = AutoTokenizer.from_pretrained(folder)
    per_word = len(tok(text_of(1000))["input_ids"]) / 1000
    return int(tokens / per_word) + 50


def peak() -> int:
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


# -- the measurements, each in its own process ------------------------------------------------------


def child_bare(folder: Path, tokens: int) -> dict:
    import torch

    sys.path.insert(0, str(ROOT))
    from viewer.model import runs
    from viewer.model.loader import open_model

    loaded = open_model(folder)
    batch = loaded.encode([text_of(words_for(folder, tokens))])
    batch_tokens = batch.lengths[0]
    inputs = runs.model_inputs(loaded, batch)
    with loaded.unhooked("sdpa") as model, torch.no_grad():
        start = time.perf_counter()
        model(**inputs)
        seconds = time.perf_counter() - start
    return {"tokens": batch_tokens, "seconds": seconds, "peak": peak()}


def child_check(folder: Path, tokens: int) -> dict:
    sys.path.insert(0, str(ROOT))
    from viewer.cli import main

    text = text_of(words_for(folder, tokens))
    out = Path(os.environ.get("TMPDIR", "/tmp")) / f"bench-long-{os.getpid()}.json"
    start = time.perf_counter()
    status = main(["check", str(folder), "--text", text, "--max-tokens", str(tokens), "--json", str(out)])
    seconds = time.perf_counter() - start
    data = json.loads(out.read_text())
    out.unlink()
    return {
        "status": status,
        "seconds": seconds,
        "peak": peak(),
        "error": data["max_abs_error"],
        "notes": data.get("notes", []),
    }


def child_estimate(folder: Path, tokens: int) -> dict:
    """Measured increase of resident memory of a check pass and of a recording, and the
    budget's estimates of both."""
    import ctypes
    import gc
    import threading

    sys.path.insert(0, str(ROOT))
    from viewer.model import runs
    from viewer.model.budget import pass_estimate
    from viewer.model.loader import open_model
    from viewer.reports.runs import check_data

    def rss() -> int:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")

    def measured(fn) -> int:
        gc.collect()
        ctypes.CDLL("libc.so.6").malloc_trim(0)
        base = top = rss()
        done = threading.Event()

        def sample() -> None:
            nonlocal top
            while not done.is_set():
                top = max(top, rss())
                time.sleep(0.002)

        thread = threading.Thread(target=sample, daemon=True)
        thread.start()
        try:
            fn()
        finally:
            done.set()
            thread.join()
        return max(top, rss()) - base

    loaded = open_model(folder)
    loaded.text.limit(tokens)
    loaded.record("the chain")  # warm the kernels
    text = text_of(words_for(folder, tokens))
    batch = loaded.encode([text])
    own = runs.wants_own_probs(loaded, batch)
    check_est = pass_estimate(loaded, batch.lengths, keep=False, own_probs=own).total
    check_used = measured(lambda: check_data(loaded, [text], 1e-5))
    record_est = pass_estimate(loaded, batch.lengths, keep=True, own_probs=own).total
    record_used = measured(lambda: loaded.record(text))
    return {
        "check_used": check_used,
        "check_estimate": check_est,
        "record_used": record_used,
        "record_estimate": record_est,
    }


def child_window(folder: Path, tokens: int) -> dict:
    """The window on a text of ``tokens`` tokens (offscreen): run to painted overview, head
    switches, the longest event-loop gap, peak memory."""
    import statistics

    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    sys.path.insert(0, str(ROOT))
    from tests.benchmarks.bench_gui import GapClock, PaintProbe, idle, open_bench_window, pump_until

    window = open_bench_window(str(folder), evidence=True)
    text = text_of(words_for(folder, tokens))
    window.text_edit.setPlainText(text)
    state, grid = window.state, window.pair_grid
    probe = PaintProbe(grid.canvas)

    gaps = GapClock()
    gaps.start()
    start = time.perf_counter()
    window.run_current()
    probe.wait(lambda: state.analysis is not None and grid.drawn_recording is state.analysis.recording, 7200)
    painted = probe.last - start
    n = state.analysis.recording.n_tokens
    # one switch before the summary pass has stored this layer's overviews (computed on demand)
    before = probe.count
    switched = time.perf_counter()
    state.select_head(state.n_layers - 1, state.n_heads - 1)
    pump_until(lambda: probe.count > before and grid.idle, 7200)
    first_switch = probe.last - switched
    pump_until(
        lambda: state.analysis.summarised and state.evidence is not None and not window.worker.busy, 7200
    )
    pump_until(lambda: all(pane.idle for pane in window.figure_panes), 600)
    gaps.stop()
    whole = time.perf_counter() - start
    heads = [(layer, head) for layer in range(state.n_layers) for head in range(state.n_heads)]
    switches = []
    for k in range(12):
        idle(0.4)
        before = probe.count
        switched = time.perf_counter()
        state.select_head(*heads[(37 * k + 5) % len(heads)])
        pump_until(lambda before=before: probe.count > before and grid.idle, 600)
        switches.append(probe.last - switched)
    import resource

    window.close()
    return {
        "tokens": n,
        "painted": painted,
        "first_switch": first_switch,
        "switch_median": statistics.median(switches),
        "switch_worst": max(switches),
        "gap_ms": gaps.longest,
        "whole": whole,
        "peak": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
    }


CHILDREN = {"bare": child_bare, "check": child_check, "estimate": child_estimate, "window": child_window}


def load() -> str:
    """The machine's load averages (other work on it changes every absolute time)."""
    one, five, fifteen = os.getloadavg()
    return f"load {one:.1f} / {five:.1f} / {fifteen:.1f} on {os.cpu_count()} cores"


def window_rows(sizes: list[str], lengths: list[int]) -> None:
    """The window beside the bare forward, each length in fresh processes."""
    for size in sizes:
        folder = folder_of(size)
        for tokens in lengths:
            before = load()
            bare = measure("bare", folder, tokens)
            print(
                f"{size:>10} {bare['tokens']:>5} tokens: bare sdpa forward {bare['seconds']:.1f} s, "
                f"peak {bare['peak'] / GB:.2f} GB; now the window…",
                flush=True,
            )
            win = measure("window", folder, tokens)
            print(
                f"{size:>10} {win['tokens']:>5} tokens ({before}; after: {load()})\n"
                f"{'':>10} run to painted overview {win['painted']:7.1f} s, bare sdpa forward "
                f"{bare['seconds']:7.1f} s: ratio {win['painted'] / bare['seconds']:.2f} (goal <= 2)\n"
                f"{'':>10} head switch after the summary: median {win['switch_median'] * 1000:.0f} ms, "
                f"worst {win['switch_worst'] * 1000:.0f} ms (goal <= 300 ms at 8192); first switch "
                f"before it {win['first_switch'] * 1000:.0f} ms\n"
                f"{'':>10} window peak {win['peak'] / GB:.2f} GB (goal <= 4 GB at 8192), bare sdpa "
                f"forward peak {bare['peak'] / GB:.2f} GB: ratio {win['peak'] / bare['peak']:.2f}\n"
                f"{'':>10} longest event-loop gap {win['gap_ms']:.0f} ms over {win['whole']:.0f} s "
                f"(run, check, metrics, evidence, drawing; goal <= 100 ms)",
                flush=True,
            )


def measure(what: str, folder: Path, tokens: int) -> dict:
    env = {**os.environ, "HF_HUB_OFFLINE": "1", "PYTHONPATH": str(ROOT)}
    out = subprocess.run(
        [sys.executable, __file__, "--child", what, str(folder), str(tokens)],
        capture_output=True,
        text=True,
        env=env,
        check=False,
    )
    lines = [line for line in out.stdout.splitlines() if line.startswith("{")]
    if out.returncode != 0 or not lines:
        raise SystemExit(f"{what} at {tokens} failed:\n{out.stderr[-2000:]}")
    return json.loads(lines[-1])


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--sizes", default="modernbert,qwen2")
    parser.add_argument("--lengths", default="512,2048,8192")
    parser.add_argument("--child", nargs=3, metavar=("WHAT", "FOLDER", "TOKENS"))
    parser.add_argument("--window", action="store_true", help="measure the window instead of check")
    args = parser.parse_args()
    if args.child:
        what, folder, tokens = args.child
        print(json.dumps(CHILDREN[what](Path(folder), int(tokens))))
        return
    if args.window:
        window_rows(args.sizes.split(","), [int(n) for n in args.lengths.split(",")])
        return
    for size in args.sizes.split(","):
        folder = folder_of(size)
        for tokens in (int(n) for n in args.lengths.split(",")):
            bare = measure("bare", folder, tokens)
            check = measure("check", folder, tokens)
            est = measure("estimate", folder, tokens)
            allowed = 1.5 * bare["peak"] + GB
            print(
                f"{size:>10} {bare['tokens']:>5} tokens | bare forward {bare['seconds']:6.1f} s "
                f"{bare['peak'] / GB:4.2f} GB | check {check['seconds']:6.1f} s {check['peak'] / GB:4.2f} GB "
                f"(exit {check['status']}, error {check['error']:.1e}) | "
                f"peak / (1.5 bare + 1 GB) = {check['peak'] / allowed:.2f} (goal <= 1) | "
                f"time / bare = {check['seconds'] / bare['seconds']:.2f} (goal <= 1.5 at 8192)",
                flush=True,
            )
            check_ratio = est["check_estimate"] / max(1, est["check_used"])
            print(
                f"{'':>10} estimate / measured: check {check_ratio:.2f} "
                f"({est['check_estimate'] / GB:.2f} / {est['check_used'] / GB:.2f} GB), recording "
                f"{est['record_estimate'] / max(1, est['record_used']):.2f} "
                f"({est['record_estimate'] / GB:.2f} / {est['record_used'] / GB:.2f} GB) (goal 0.75-1.25)",
                flush=True,
            )


if __name__ == "__main__":
    main()
