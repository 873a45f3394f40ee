"""Shortcut search at scale on a 22 M-parameter classifier, as ratios measured side by side.

Run:  python tests/benchmarks/bench_scale.py [TEXTS]   (default 500 texts)

The classifier is the MiniLM encoder of the test extras (6 layers, 12 heads, 384 wide) with a
seeded 3-class head, saved as a BertForSequenceClassification folder in a temporary folder.

1. Throughput of ``--workers 2`` against one process, over the same texts (goal: >= 1.5x on 2
   cores). One process is timed twice: on one torch thread (what every engine maps shards
   with, docs/scale.md) and on all cores' torch threads (the fastest one process can be). The
   two-worker time includes starting the workers.
2. Throughput of the search's knockout forwards against a bare batched forward of the plain
   torch model (no hooks, no bookkeeping) over the very same knocked-out inputs in the same
   batches, both on one torch thread (goal: >= 0.8x). The search's time includes its one
   attention pass per text and everything else it does.
3. Peak resident memory of the worker processes for N and 4N texts (goal: flat).
"""

from __future__ import annotations

import random
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from tests.conftest import minilm_folder  # noqa: E402
from viewer.core.shortcuts import phrase_spans, word_spans  # noqa: E402
from viewer.model.loader import open_model  # noqa: E402
from viewer.model.runs import attentions, model_inputs  # noqa: E402
from viewer.reports import workers  # noqa: E402
from viewer.reports.shards import RunOptions  # noqa: E402
from viewer.reports.shortcuts import knockout_tokens, shortcut_search  # noqa: E402
from viewer.reports.textsets import TextItem  # noqa: E402

WORDS = (
    "member mechanic wheel chain invoice brake cable tandem renewal workshop portal "
    "saddle refund gears spoke frame courier tuesday receipt puncture the a my is "
    "please"
).split()
BATCH = 32


def texts(n: int, seed: int = 0) -> list[TextItem]:
    rng = random.Random(seed)
    return [TextItem(" ".join(rng.choices(WORDS, k=rng.randint(6, 20))), None, i + 1) for i in range(n)]


def classifier(folder: Path) -> Path:
    """MiniLM's encoder under a seeded 3-class head, saved as a classifier folder."""
    from transformers import AutoTokenizer, BertForSequenceClassification

    torch.manual_seed(0)
    labels = {0: "repair", 1: "billing", 2: "membership"}
    model = BertForSequenceClassification.from_pretrained(
        minilm_folder(),
        num_labels=3,
        id2label=labels,
        label2id={v: k for k, v in labels.items()},
        local_files_only=True,
    )
    model.save_pretrained(folder, safe_serialization=True)
    AutoTokenizer.from_pretrained(minilm_folder(), local_files_only=True).save_pretrained(folder)
    return folder


def knocked_out_inputs(loaded, items, phrases: bool) -> list[list[int]]:
    """The id lists the search runs, in its order (per group of 16 texts)."""
    out = []
    for att in attentions(loaded, [i.text for i in items], BATCH):
        plans = list(knockout_tokens(att, word_spans(att.text)).values())
        if phrases:
            plans += list(knockout_tokens(att, phrase_spans(att.text)).values())
        out += [np.delete(att.token_ids, idx).tolist() for idx in plans]
    return out


def bare(loaded, id_lists: list[list[int]]) -> None:
    """The same padded batches through the plain model (the search groups 16 texts; a group's
    knockouts are batched by 32, so batches are cut at group boundaries as here)."""
    with loaded.unhooked() as model, torch.no_grad():
        for start in range(0, len(id_lists), BATCH):
            batch = loaded.text.from_ids(id_lists[start : start + BATCH])
            model(**model_inputs(loaded, batch))


def timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def children_peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 500
    folder = classifier(Path(tempfile.mkdtemp()) / "minilm-classifier")
    loaded = open_model(folder)
    params = sum(p.numel() for p in loaded.model.parameters())
    items = texts(n)
    words = sum(len(word_spans(i.text)) + len(phrase_spans(i.text)) for i in items)
    print(
        f"{loaded.name}: {params / 1e6:.1f} M parameters, {loaded.n_layers} layers x "
        f"{loaded.n_heads} heads; {n} texts, {words} knockouts (words and phrases); "
        f"{torch.get_num_threads()} cores' torch threads available"
    )

    cores = torch.get_num_threads()
    one = timed(lambda: shortcut_search(loaded, items, batch_size=BATCH))
    all_threads = timed(
        lambda: shortcut_search(loaded, items, batch_size=BATCH, options=RunOptions(threads=None))
    )
    torch.set_num_threads(cores)
    two = timed(lambda: shortcut_search(loaded, items, batch_size=BATCH, options=RunOptions(workers=2)))
    workers.close_engines()
    print(
        f"1. shortcut search: one process {one:.1f} s on 1 torch thread, {all_threads:.1f} s "
        f"on {cores}; --workers 2 {two:.1f} s (worker start included)"
    )
    print(
        f"   throughput ratio --workers 2 / one process: {one / two:.2f}x against 1 thread, "
        f"{all_threads / two:.2f}x against {cores} threads (goal >= 1.5x)"
    )

    torch.set_num_threads(1)
    id_lists = [
        ids
        for start in range(0, n, 16)
        for ids in knocked_out_inputs(loaded, items[start : start + 16], phrases=True)
    ]
    groups = [len(knocked_out_inputs(loaded, items[s : s + 16], True)) for s in range(0, n, 16)]

    def bare_grouped() -> None:
        at = 0
        for size in groups:
            bare(loaded, id_lists[at : at + size])
            at += size

    search = min(timed(lambda: shortcut_search(loaded, items, batch_size=BATCH)) for _ in range(2))
    reference = min(timed(bare_grouped) for _ in range(2))
    print(
        f"2. knockout forwards: search {search:.1f} s, bare batched forward over the same "
        f"{len(id_lists)} inputs {reference:.1f} s; throughput ratio {reference / search:.2f}x "
        "(goal >= 0.8x)"
    )
    torch.set_num_threads(cores)

    peaks = []
    for size in (n // 2, 2 * n):
        shortcut_search(loaded, texts(size, seed=size), batch_size=BATCH, options=RunOptions(workers=2))
        workers.close_engines()
        peaks.append(children_peak_mb())
    print(
        f"3. peak RSS of a worker: {peaks[0]:.0f} MB after {n // 2} texts, {peaks[1]:.0f} MB "
        f"after {2 * n} texts: growth {peaks[1] - peaks[0]:.1f} MB (goal: flat)"
    )


if __name__ == "__main__":
    main()
