"""The shard engine on the demo model: worker processes and a real Dask cluster give the serial
numbers, a killed run resumes to them, run folders hold no code.

References: the serial run (one process, the same shards) for every engine, compared exactly
(tallies and partial sums bit for bit, which is stronger than means within 1e-12); a
``HeadStats`` filled text by text and a word count written out with ``str.split`` for the serial
run itself; the model's own forward (transformers' logits) for the window's predictions;
``hashlib`` for the run-folder key.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch

from tests.reference import strip_word
from viewer.cli import main
from viewer.core.headstats import METRICS, HeadStats
from viewer.core.links import read_link_pairs
from viewer.demo import MODEL_DIR
from viewer.model.loader import open_model
from viewer.reports import workers
from viewer.reports.heads import HeadsKind, scan_text_set
from viewer.reports.insertion import InsertionKind, PhraseKnockoutKind
from viewer.reports.links import LinksKind
from viewer.reports.runs import CheckKind, heads_data, shortcuts_data
from viewer.reports.shards import Cancelled, RunOptions, cut_shards, run_shards
from viewer.reports.shortcuts import ConfirmKind, ScreenKind, ShortcutKind, shortcut_search
from viewer.reports.textsets import TextItem, load_text_set

ROOT = Path(__file__).resolve().parents[2]
SAMPLES = ROOT / "sample_sentences"
SHARD = 8
KINDS = {
    "shortcuts": ShortcutKind(batch_size=16, phrases=True),
    # the screened search's two passes: the screen, and the confirmation of a few candidates
    "screen": ScreenKind(batch_size=16, phrases=True),
    "confirm": ConfirmKind(batch_size=16, words=("portal", "the", "via"), phrase_keys=("via portal",)),
    "heads": HeadsKind(rows=True, importance=True, knockout=True, use_labels=True),
    "links": LinksKind(),
    "check": CheckKind(tolerance=1e-5),
    # the demo's footer; class 1 of the demo model is "billing" (its config's id2label)
    "phrase": PhraseKnockoutKind("[via portal]", batch_size=16),
    "insertion": InsertionKind("[via portal]", target=1, seed=3, batch_size=16),
}


@pytest.fixture(scope="module")
def demo():
    return open_model(MODEL_DIR)


@pytest.fixture(scope="module")
def items():
    return load_text_set(SAMPLES / "coop_messages.jsonl")[:48]  # footer texts among them


@pytest.fixture(scope="module")
def few(items):
    """What every engine runs every kind on: 3 shards, 8 footer texts among them."""
    return items[:24]


@pytest.fixture(scope="module")
def pairs():
    return read_link_pairs(SAMPLES / "coop_links.jsonl")[:16]


def inputs_of(name, items, pairs):
    return pairs if name == "links" else items


def run_all(demo, items, pairs, options):
    return {
        name: kind.state(run_shards(kind, demo, inputs_of(name, items, pairs), options=options))
        for name, kind in KINDS.items()
    }


@pytest.fixture(scope="module")
def serial(demo, few, pairs):
    return run_all(demo, few, pairs, RunOptions(shard_size=SHARD))


def assert_same(got: dict, want: dict) -> None:
    for name in want:
        assert set(got[name]) == set(want[name]), name
        for key, value in want[name].items():
            assert np.array_equal(got[name][key], value, equal_nan=True), (name, key)


def test_serial_run_against_one_accumulator_and_a_word_count(demo, few, serial):
    """Shards merged in order equal one HeadStats filled text by text (sums of parts; the
    summation order differs, so within 1e-12), and each word's count is the number of texts
    holding it as a whitespace word, end punctuation stripped (the definition of count)."""
    whole = HeadStats(demo.n_layers, demo.n_heads)
    for item in few:
        rec = demo.record(item.text)
        whole.add(rec.own_probs, rec.special, demo.family.causal)
    merged = KINDS["heads"].load(serial["heads"]).stats.summary()
    for metric in METRICS:
        np.testing.assert_allclose(
            getattr(merged, metric), getattr(whole.summary(), metric), rtol=0, atol=1e-12, err_msg=metric
        )
    report = KINDS["shortcuts"].load(serial["shortcuts"])
    for word in ("portal", "via", "the"):
        held = sum(word in {strip_word(w) for w in i.text.split()} for i in few)
        assert report.words.entry(word)["count"] == held > 0
    assert report.texts == len(few)
    # The screened search's passes count the same texts, and its confirmation knocks a
    # candidate out of the same texts as the exhaustive search, with the same outcomes (the
    # batches differ, so the float sums may differ in their last bits).
    screen = KINDS["screen"].load(serial["screen"])
    confirmed = KINDS["confirm"].load(serial["confirm"])
    assert screen.words.texts == len(few) and set(confirmed.words.keys()) == {"portal", "the", "via"}
    for tally, want, key in (
        (confirmed.words, report.words, "the"),
        (confirmed.phrases, report.phrases, "via portal"),
    ):
        got, ref = tally.entry(key), want.entry(key)
        assert (got["count"], got["flip_rate"], got["by_class"]) == (
            ref["count"],
            ref["flip_rate"],
            ref["by_class"],
        )
        assert got["mean_drop"] == pytest.approx(ref["mean_drop"], abs=1e-6)
        assert got["focus"] == pytest.approx(ref["focus"], abs=1e-6)
        assert (screen.words if tally is confirmed.words else screen.phrases).count(key) == ref["count"]


def test_shards_merge_in_shard_order_whatever_order_they_finish(demo, items, monkeypatch):
    """An engine that hands the shards back last first still gives the shard-order merge."""

    class Reversed(workers.InProcess):
        ahead = 10**6

        def run(self, kind, shards, check, may_start):
            yield from reversed(list(super().run(kind, shards, check, may_start)))

    kind = ShortcutKind(batch_size=16, phrases=False)
    want = kind.state(run_shards(kind, demo, items, options=RunOptions(shard_size=SHARD)))
    monkeypatch.setattr(workers, "engine_for", lambda options, loaded, n: Reversed(loaded, 1))
    got = kind.state(run_shards(kind, demo, items, options=RunOptions(shard_size=SHARD)))
    for key in want:
        assert np.array_equal(got[key], want[key]), key
    assert [s.start for s in cut_shards(range(20), SHARD)] == [0, 8, 16]


class Threads(workers._Submitting):
    """The submitting engine of the pool and the cluster on a thread of this process."""

    def __init__(self, loaded):
        from concurrent.futures import ThreadPoolExecutor

        self.loaded, self.spec, self.ahead = loaded, None, 2
        self.pool = ThreadPoolExecutor(1)  # one LoadedModel runs one forward at a time

    def _submit(self, spec, kind, shard, run):
        def one() -> tuple:
            torch.set_num_threads(1)  # as every engine does (RunOptions.threads)
            return shard.index, len(shard.items), kind.state(kind.map(self.loaded, shard, lambda: None))

        return self.pool.submit(one)

    def _wait(self, futures):
        from concurrent.futures import FIRST_COMPLETED, wait

        return set(wait(futures, return_when=FIRST_COMPLETED).done)

    def close(self):
        self.pool.shutdown()


def test_a_run_resumed_on_submitting_workers_computes_the_rest(demo, items, tmp_path, monkeypatch):
    """Stopped after three shards, resumed on an engine that submits shards (as the pool and
    the cluster do): it must compute every missing shard and give the uninterrupted result."""
    kind = ShortcutKind(batch_size=16, phrases=False)
    want = kind.state(run_shards(kind, demo, items, options=RunOptions(shard_size=SHARD)))
    options = RunOptions(shard_size=SHARD, work=tmp_path)
    inputs = {"name": "the first 48 sample messages"}
    done = []
    with pytest.raises(Cancelled):
        run_shards(
            kind,
            demo,
            items,
            options=options,
            inputs=inputs,
            on_shard=done.append,
            cancelled=lambda: len(done) >= 3,
        )
    (folder,) = tmp_path.iterdir()
    assert len(list(folder.glob("shard-*.npz"))) == 3
    monkeypatch.setattr(workers, "engine_for", lambda options, loaded, n: Threads(loaded))
    got = kind.state(run_shards(kind, demo, items, options=options, inputs=inputs))
    assert got["words.texts"] == len(items)
    for key in want:
        assert np.array_equal(got[key], want[key]), key


@pytest.mark.slow
def test_local_worker_processes_give_the_serial_numbers(demo, few, pairs, serial):
    try:
        got = run_all(demo, few, pairs, RunOptions(workers=2, shard_size=SHARD))
    finally:
        workers.close_engines()
    assert_same(got, serial)


@pytest.mark.slow
def test_a_dask_cluster_gives_the_serial_numbers(demo, few, pairs, serial):
    """A real distributed.LocalCluster, not a mock: a scheduler and one worker process of its own,
    reached over TCP (merging out of order is the subject of the reversed-engine test)."""
    from distributed import LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        try:
            got = run_all(demo, few, pairs, RunOptions(cluster=cluster.scheduler_address, shard_size=SHARD))
        finally:
            workers.close_engines()
    assert_same(got, serial)


def test_an_unreachable_scheduler_is_a_one_line_error(demo):
    with pytest.raises(workers.HeadlightError, match="cannot reach the Dask scheduler"):
        workers.DaskCluster(demo, "tcp://127.0.0.1:9", 1, timeout=1)


@pytest.mark.slow
def test_a_killed_run_resumes_to_the_serial_result(demo, few, tmp_path, monkeypatch):
    """A subprocess killed (SIGKILL) after a few shards; the same command again computes only
    the missing shards and prints what a run without a run folder prints."""
    texts = tmp_path / "texts.jsonl"
    texts.write_text("".join(json.dumps({"text": i.text}) + "\n" for i in few), "utf-8")
    work = tmp_path / "work"
    argv = [
        "shortcuts",
        str(MODEL_DIR),
        "--texts",
        str(texts),
        "--workers",
        "1",
        "--shard-size",
        "2",
        "--no-phrases",
        "--exhaustive",
        "--work",
        str(work),
        "--quiet",
    ]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen(
        [sys.executable, "-m", "viewer", *argv], env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    deadline = time.monotonic() + 120
    try:
        while len(list(work.glob("*/shard-*.npz"))) < 3:
            assert proc.poll() is None, "the run ended before it could be killed"
            assert time.monotonic() < deadline
            time.sleep(0.02)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    (folder,) = work.iterdir()
    kept = len(list(folder.glob("shard-*.npz")))
    assert kept >= 3 and not (folder / "result.npz").exists()
    assert not list(folder.glob(".*.part"))  # atomic writes: no half-written shard is left

    calls = []
    original = ShortcutKind.map

    def counting(self, loaded, shard, check):
        calls.append(shard.index)
        return original(self, loaded, shard, check)

    monkeypatch.setattr(ShortcutKind, "map", counting)
    assert main([*argv, "--json", str(tmp_path / "resumed.json")]) == 0
    assert len(calls) == 12 - kept and not set(calls) & set(range(kept))
    assert (folder / "result.npz").exists() and not list(folder.glob("shard-*.npz"))
    reference = shortcuts_data(
        demo, texts, phrases=False, exhaustive=True, run=RunOptions(shard_size=2), quiet=True
    )
    reference.pop("model")
    resumed = json.loads((tmp_path / "resumed.json").read_text())
    resumed.pop("model")
    assert resumed == reference

    calls.clear()  # a finished run answers from its result; --fresh starts over
    assert main([*argv, "--json", str(tmp_path / "again.json")]) == 0
    assert calls == []
    assert main([*argv, "--fresh", "--json", str(tmp_path / "fresh.json")]) == 0
    assert len(calls) == 12
    for name in ("again", "fresh"):
        data = json.loads((tmp_path / f"{name}.json").read_text())
        data.pop("model")
        assert data == reference, name


def test_run_folders_are_keyed_by_content_and_options_and_hold_no_code(demo, items, tmp_path):
    texts = tmp_path / "t.jsonl"
    texts.write_text(
        "".join(json.dumps({"text": i.text, "label": i.label}) + "\n" for i in items[:12]), encoding="utf-8"
    )
    work = tmp_path / "work"
    for phrases in (True, False, True):
        shortcuts_data(
            demo, texts, phrases=phrases, exhaustive=True, quiet=True, run=RunOptions(work=work, shard_size=4)
        )
    folders = sorted(work.iterdir())
    assert len(folders) == 2  # phrases on / off; the third run found the first folder
    key = json.loads((folders[0] / "run.json").read_text())
    want = hashlib.sha256((MODEL_DIR / "model.safetensors").read_bytes()).hexdigest()
    assert key["model"]["model.safetensors"] == want
    assert key["input"]["sha256"] == hashlib.sha256(texts.read_bytes()).hexdigest()
    for folder in folders:
        assert sorted(p.name for p in folder.iterdir()) == [".lock", "result.npz", "run.json"]
        with np.load(folder / "result.npz", allow_pickle=False) as npz:
            assert all(npz[k].dtype != object for k in npz.files)
    texts.write_text(texts.read_text() + json.dumps({"text": "one more"}) + "\n")
    shortcuts_data(demo, texts, exhaustive=True, quiet=True, run=RunOptions(work=work, shard_size=4))
    assert len(list(work.iterdir())) == 3  # another input is another run


def test_a_screened_search_keeps_both_passes_in_run_folders(demo, items, tmp_path, monkeypatch):
    """The screen and the confirmation are two report kinds with their own run folders; the
    same command again answers from both without running a shard, with the same numbers."""
    texts = tmp_path / "t.jsonl"
    texts.write_text("".join(json.dumps({"text": i.text}) + "\n" for i in items[:16]), encoding="utf-8")
    work = tmp_path / "work"
    run = RunOptions(work=work, shard_size=8)
    first = shortcuts_data(demo, texts, quiet=True, run=run)
    assert sorted(p.name.split("-")[1] for p in work.iterdir()) == ["confirm", "screen"]
    calls = []
    for kind in (ScreenKind, ConfirmKind):
        monkeypatch.setattr(kind, "map", lambda *a, **k: calls.append(a))
    again = shortcuts_data(demo, texts, quiet=True, run=run)
    assert calls == [] and again == first and first["mode"] == "screened"


def test_window_scan_equals_heads_and_the_models_own_predictions(demo, items, tmp_path):
    """scan_text_set's head summary is `headlight heads`' to the bit (same kind, same shards);
    its predictions are transformers' own argmax of the classifier's logits."""
    texts = tmp_path / "t.jsonl"
    texts.write_text("".join(json.dumps({"text": i.text}) + "\n" for i in items), encoding="utf-8")
    scan = scan_text_set(demo, items)
    heads = heads_data(demo, texts, importance=False, quiet=True)
    summary = scan.heads.to_dict()
    for metric in METRICS:
        assert summary[metric] == heads[metric], metric
    with demo.unhooked() as model, torch.no_grad():
        enc = demo.tokenizer([i.text for i in items], padding=True, return_tensors="pt")
        probs = torch.softmax(model(**enc).logits, dim=-1).numpy()
    assert [r.predicted for r in scan.rows] == probs.argmax(axis=1).tolist()
    np.testing.assert_allclose([r.confidence for r in scan.rows], probs.max(axis=1), atol=1e-5)
    assert [r.label for r in scan.rows] == [demo.labels[k] for k in probs.argmax(axis=1)]
    assert [r.tokens for r in scan.rows] == [int(m.sum()) for m in enc["attention_mask"]]


def test_progress_counts_texts_and_cancel_stops_between_shards(demo, items):
    seen = []
    report = shortcut_search(
        demo,
        items[:20],
        phrases=False,
        exhaustive=True,
        progress=lambda d, t: seen.append((d, t)),
        options=RunOptions(shard_size=SHARD),
    )
    assert seen == [(8, 20), (16, 20), (20, 20)] and report.texts == 20


def test_cancel_in_process_stops_before_the_next_shard(demo, items):
    threads = torch.get_num_threads()
    done = []
    with pytest.raises(Cancelled):
        shortcut_search(
            demo,
            items,
            phrases=False,
            exhaustive=True,
            options=RunOptions(shard_size=SHARD),
            progress=lambda d, t: done.append(d),
            cancelled=lambda: len(done) >= 2,
        )
    assert done == [8, 16]
    assert torch.get_num_threads() == threads  # the run's one torch thread is given back


def test_a_stream_and_a_list_give_the_same_report(demo, items):
    kind = ShortcutKind(batch_size=16, phrases=False)
    a = kind.state(run_shards(kind, demo, iter(items), options=RunOptions(shard_size=SHARD)))
    b = kind.state(run_shards(kind, demo, list(items), options=RunOptions(shard_size=SHARD)))
    assert all(np.array_equal(a[k], b[k]) for k in a)
    assert run_shards(kind, demo, iter([]), options=RunOptions()) is None
    assert TextItem("x", None, 3, unit="row").where == "row 3"


def test_the_screened_search_reads_a_stream_of_texts_twice_as_it_reads_a_list(demo, items):
    """The default search makes two passes (screen, then confirmation): a one-shot stream
    must give the report a list gives, not an empty confirmation."""
    listed = shortcut_search(demo, list(items), phrases=False)
    streamed = shortcut_search(demo, iter(items), phrases=False)
    assert listed.confirmed > 0 and (streamed.texts, streamed.confirmed) == (listed.texts, listed.confirmed)
    assert streamed.words.ranking() == listed.words.ranking()
