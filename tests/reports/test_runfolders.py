"""Run folders never give stale or damaged numbers, and two runs on one folder do not collide.

References: a fresh run on the same shards without any run folder (the shard engine's serial
run, compared bit for bit); ``hashlib`` for the key; peft's own merge for what ``lora_alpha``
changes (the adapter tests hold the merge against peft's un-merged forward).
"""

from __future__ import annotations

import json
import shutil
import threading
import time

import numpy as np
import pytest

from tests.model import tiny
from tests.model.test_adapters import make_adapter
from viewer.demo import MODEL_DIR
from viewer.model.loader import open_model
from viewer.reports import runfolder
from viewer.reports.heads import HeadsKind
from viewer.reports.runs import heads_data
from viewer.reports.shards import Cancelled, RunOptions, Shard, run_shards
from viewer.reports.textsets import TextItem

SHARD = 4
KIND = HeadsKind(batch_size=16)
INPUTS = {"name": "24 co-op messages"}


@pytest.fixture(scope="module")
def demo():
    return open_model(MODEL_DIR)


@pytest.fixture(scope="module")
def items():
    texts = [
        f"the {thing} on my {bike} {verb} again, can someone at the {depot} depot look at it"
        for thing in ("chain", "brake", "wheel")
        for bike in ("cargo bike", "tandem")
        for verb, depot in (
            ("slips", "Oldmere"),
            ("squeaks", "Harbour Row"),
            ("rattles", "Oldmere"),
            ("sticks", "Mill Lane"),
        )
    ]
    return [TextItem(t, None, n) for n, t in enumerate(texts, 1)]  # 24 texts, 6 shards


def fresh(demo, items) -> dict:
    return KIND.state(run_shards(KIND, demo, items, options=RunOptions(shard_size=SHARD)))


def assert_same(got: dict, want: dict) -> None:
    assert set(got) == set(want)
    for key in want:
        assert np.array_equal(got[key], want[key], equal_nan=True), key


def stop_after(demo, items, options, shards: int) -> None:
    """A run stopped (as if killed) once ``shards`` shards are on disk."""
    done = []
    with pytest.raises(Cancelled):
        run_shards(
            KIND,
            demo,
            items,
            options=options,
            inputs=INPUTS,
            on_shard=done.append,
            cancelled=lambda: len(done) >= shards,
        )


@pytest.fixture
def counting(monkeypatch):
    """The shards HeadsKind maps, in order (to see which were computed, not read)."""
    calls: list[int] = []
    original = HeadsKind.map

    def map_(self, loaded, shard, check):
        calls.append(shard.index)
        return original(self, loaded, shard, check)

    monkeypatch.setattr(HeadsKind, "map", map_)
    return calls


# -- the key ---------------------------------------------------------------------------------------


def test_an_adapters_alpha_is_part_of_the_key_and_stale_numbers_do_not_come_back(tmp_path):
    """lora_alpha 8 → 64 changes the merged weights (peft scales the LoRA update by alpha / r):
    the second run must give a fresh run's numbers, not the first run's."""
    base, adapter = make_adapter(tmp_path, "bert")
    texts = tmp_path / "t.jsonl"
    texts.write_text("".join(json.dumps({"text": t}) + "\n" for t in tiny.TEXTS * 3), encoding="utf-8")
    work = RunOptions(work=tmp_path / "work", shard_size=2)
    before = heads_data(open_model(adapter), texts, importance=False, quiet=True, run=work)["entropy"]

    cfg = json.loads((adapter / "adapter_config.json").read_text())
    assert cfg["lora_alpha"] == 8
    cfg["lora_alpha"] = 64
    (adapter / "adapter_config.json").write_text(json.dumps(cfg))
    loaded = open_model(adapter)
    after = heads_data(loaded, texts, importance=False, quiet=True, run=work)["entropy"]
    reference = heads_data(loaded, texts, importance=False, quiet=True, run=RunOptions(shard_size=2))
    assert after == reference["entropy"]
    assert after != before
    assert len(list((tmp_path / "work").iterdir())) == 2


@pytest.mark.parametrize(
    "changed", ["adapter/adapter_config.json", "base/config.json", "base/tokenizer.json", "adapter/weights"]
)
def test_every_input_of_the_numbers_is_in_the_key(tmp_path, changed):
    """The adapter's config and weights, and the base's config, weights and tokenizer."""
    base, adapter = make_adapter(tmp_path, "bert")
    loaded = open_model(adapter)
    before = runfolder.model_digests(loaded)
    where, name = changed.split("/")
    path = (adapter if where == "adapter" else base) / name
    if name == "weights":
        path = adapter / "adapter_model.safetensors"
    path.write_bytes(path.read_bytes() + b" ")
    after = runfolder.model_digests(loaded)
    assert before != after
    assert {
        "adapter_config.json",
        "base/config.json",
        "base/tokenizer.json",
        "base/model.safetensors",
    } <= set(before)


# -- self-checking shards --------------------------------------------------------------------------


def damage(folder, how: str, demo, other_items) -> None:
    path = folder / "shard-000002.npz"
    data = path.read_bytes()
    if how == "truncated":
        path.write_bytes(data[: len(data) // 2])
    elif how == "flipped byte":
        flipped = bytearray(data)
        flipped[len(data) // 2] ^= 0x55
        path.write_bytes(bytes(flipped))
    elif how == "empty":
        path.write_bytes(b"")
    elif how == "another shard copied over it":
        shutil.copyfile(folder / "shard-000001.npz", path)
    elif how == "a shard of other texts":  # the right index, written from other items
        state = KIND.state(KIND.map(demo, shard(2, other_items), lambda: None))
        path.write_bytes(runfolder.pack(state, 2, runfolder.items_digest(other_items)))
    else:
        raise ValueError(how)


def shard(index, items):
    return Shard(index, index * SHARD, tuple(items))


@pytest.mark.parametrize(
    "how", ["truncated", "flipped byte", "empty", "another shard copied over it", "a shard of other texts"]
)
def test_a_damaged_shard_is_reported_and_computed_again(demo, items, tmp_path, capsys, counting, how):
    want = fresh(demo, items)
    options = RunOptions(shard_size=SHARD, work=tmp_path)
    stop_after(demo, items, options, 5)  # shards 0-4 on disk, 5 missing
    (folder,) = tmp_path.iterdir()
    damage(folder, how, demo, items[:SHARD])
    counting.clear()
    capsys.readouterr()
    got = KIND.state(run_shards(KIND, demo, items, options=options, inputs=INPUTS))
    assert_same(got, want)
    assert counting == [2, 5]  # the good shards were read, not computed
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "shard-000002.npz" in err[0] and "computing shard 2 again" in err[0], err


def test_a_damaged_result_is_reported_and_the_run_computed_again(demo, items, tmp_path, capsys, counting):
    want = fresh(demo, items)
    options = RunOptions(shard_size=SHARD, work=tmp_path)
    run_shards(KIND, demo, items, options=options, inputs=INPUTS)
    (folder,) = tmp_path.iterdir()
    (folder / "result.npz").write_bytes((folder / "result.npz").read_bytes()[:100])
    counting.clear()
    capsys.readouterr()
    assert_same(KIND.state(run_shards(KIND, demo, items, options=options, inputs=INPUTS)), want)
    assert counting == list(range(6))
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "result.npz" in err[0], err


def test_shard_files_record_their_index_items_and_checksum(demo, items, tmp_path):
    options = RunOptions(shard_size=SHARD, work=tmp_path)
    stop_after(demo, items, options, 2)
    (folder,) = tmp_path.iterdir()
    with np.load(folder / "shard-000001.npz", allow_pickle=False) as npz:
        assert int(npz[runfolder.INDEX]) == 1
        digest = npz[runfolder.ITEMS].tobytes().hex()
        assert digest == runfolder.items_digest(items[SHARD : 2 * SHARD])
        state = {k: npz[k] for k in npz.files if k != runfolder.CHECKSUM}
        assert npz[runfolder.CHECKSUM].tobytes().hex() == runfolder.checksum(state)


# -- two runs on one folder ------------------------------------------------------------------------


def test_a_second_run_on_the_same_folder_waits_and_both_get_the_fresh_numbers(
    demo, items, tmp_path, monkeypatch
):
    """Run A resumes a folder holding shards 0, 1, 4 and 5 (a gap, as worker processes leave
    one). While A computes shard 2, run B starts on the same folder in another thread. Without
    a lock B finishes first and deletes shards 4 and 5, which A has yet to read. With it, B
    waits (and says so), then answers from A's result."""
    want = fresh(demo, items)
    options = RunOptions(shard_size=SHARD, work=tmp_path)
    folder = runfolder.RunFolder.open(tmp_path, KIND, demo, INPUTS, SHARD)
    for index in (0, 1, 4, 5):
        part = items[index * SHARD : (index + 1) * SHARD]
        state = KIND.state(KIND.map(demo, shard(index, part), lambda: None))
        folder.write(index, state, runfolder.items_digest(part))
    folder.close()

    other = open_model(MODEL_DIR)  # B's own model: one LoadedModel runs one forward at a time
    notes: list[str] = []
    monkeypatch.setattr(runfolder, "note", notes.append)
    results: dict[str, dict] = {}
    errors: list[BaseException] = []

    def run_b() -> None:
        try:
            results["B"] = KIND.state(run_shards(KIND, other, items, options=options, inputs=INPUTS))
        except BaseException as exc:  # noqa: BLE001 - reported by the assertion below
            errors.append(exc)

    b = threading.Thread(target=run_b)
    original = HeadsKind.map

    def map_(self, loaded, shard, check):
        if loaded is demo and shard.index == 2 and not b.is_alive() and "B" not in results:
            b.start()
            deadline = time.monotonic() + 60
            while b.is_alive() and not notes and time.monotonic() < deadline:
                time.sleep(0.01)  # until B has finished, or is waiting for the lock
        return original(self, loaded, shard, check)

    monkeypatch.setattr(HeadsKind, "map", map_)
    results["A"] = KIND.state(run_shards(KIND, demo, items, options=options, inputs=INPUTS))
    b.join(timeout=120)
    assert not errors, errors
    assert_same(results["A"], want)
    assert_same(results["B"], want)
    assert any("waiting" in n for n in notes), notes
