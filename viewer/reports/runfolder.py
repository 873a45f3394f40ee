"""Run folders: a long report's finished shards kept on disk so a killed run continues.

A run folder is named by the SHA-256 of its key (docs/scale.md, "Run folders"): the report
kind and its options, the shard size, the SHA-256 of every file that changes the numbers (the
weights, and the config and tokenizer files of the model folder; for an adapter also
``adapter_config.json`` and the base folder's config and tokenizer files), the SHA-256 of the
input, and the versions of Headlight, torch, transformers and tokenizers. The same command on
the same files finds the same folder; change any of them and it is another run.

Inside: ``run.json`` (the key, for people), ``shard-000000.npz`` … (one per finished shard,
written atomically by ``viewer.files``), and once every shard is in, ``result.npz`` (the merged
partial) replaces the shard files. Files hold numpy arrays only and are read with
``allow_pickle=False``: a cache folder never holds code.

Every file checks itself: next to the partial's arrays it records the shard's index, the
SHA-256 of the shard's items and a SHA-256 checksum of the arrays. A file that cannot be read,
or whose index, items or checksum do not match (truncated, a flipped byte, a shard copied over
another, an empty file) is reported in one line on stderr and that shard alone is computed
again; the good shards are kept.

One run at a time uses a folder: ``RunFolder.open`` takes the folder's lock (``filelock``, on
the file ``.lock``) and ``close`` gives it back. A second run on the same folder waits for the
lock, saying so once on stderr, and then continues from what the first one left (its result,
when it finished), so it never deletes or rewrites a file the other is reading.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import sys
from collections.abc import Callable, Iterable
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
from filelock import FileLock, Timeout
from tqdm import tqdm

from viewer import __version__
from viewer.errors import HeadlightError
from viewer.files import atomic_write_bytes, write_json
from viewer.reports.shardtypes import ShardKind, State

FORMAT = 5  # the layout of the folder's files and of the accumulators' states; change it when one changes
MODEL_FILES = (
    "config.json",
    "adapter_config.json",
    "tokenizer.json",
    "tokenizer_config.json",
    "special_tokens_map.json",
    "added_tokens.json",
    "vocab.txt",
    "vocab.json",
    "merges.txt",
    "tokenizer.model",
    "spiece.model",
)
_SHARD = re.compile(r"shard-(\d{6,})\.npz")
# the self-check of every file: which shard it holds, of which items, and the arrays' checksum
INDEX, ITEMS, CHECKSUM = "__shard_index", "__shard_items", "__shard_checksum"
RESULT = -1  # the index recorded in result.npz


def default_work_dir() -> Path:
    """``$XDG_CACHE_HOME/headlight/runs``, else ``~/.cache/headlight/runs``."""
    cache = os.environ.get("XDG_CACHE_HOME")
    base = Path(cache) if cache else Path.home() / ".cache"
    return base / "headlight" / "runs"


def file_digest(path: Path) -> str:
    with path.open("rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


def tree_digest(folder: Path) -> str:
    """SHA-256 over every file below ``folder``: relative names and contents, in name order."""
    h = hashlib.sha256()
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        h.update(path.relative_to(folder).as_posix().encode("utf-8") + b"\0")
        h.update(file_digest(path).encode("ascii"))
    return h.hexdigest()


def input_digest(path: Path) -> str:
    """SHA-256 of an input file, or of every file of an input folder (a saved dataset)."""
    try:
        return tree_digest(path) if path.is_dir() else file_digest(path)
    except OSError as exc:
        raise HeadlightError(f"cannot read {path}: {exc.strerror or exc}") from None


def model_digests(loaded: Any) -> dict[str, str]:
    """Name -> SHA-256 of every model file the numbers depend on.

    The weight files (a merged adapter's and its base's), and the config, adapter config and
    tokenizer files of the opened folder; for an adapter also those of its base folder, named
    ``base/...``. A file of the base folder is always named with that prefix, so that an
    adapter's own ``tokenizer.json`` and its base's are two entries.
    """
    folder = Path(loaded.folder)
    base = getattr(loaded, "base_folder", None)
    roots = [("", folder)] + ([("base/", Path(base))] if base is not None else [])
    out: dict[str, str] = {}
    for prefix, root in roots:
        for name in MODEL_FILES:
            if (root / name).is_file():
                out[prefix + name] = file_digest(root / name)
    for path in map(Path, getattr(loaded, "weight_files", ())):
        prefix = "base/" if base is not None and path.parent == Path(base) else ""
        out[prefix + path.name] = file_digest(path)
    return out


def items_digest(items: Iterable[Any]) -> str:
    """SHA-256 of a shard's items (their ``repr``: texts, labels, line numbers, link words)."""
    return hashlib.sha256(repr(tuple(items)).encode("utf-8")).hexdigest()


def _versions() -> dict[str, str]:
    out = {"headlight": __version__}
    for name in ("torch", "transformers", "tokenizers"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "-"
    return out


def checksum(state: State) -> str:
    """SHA-256 over every array of a state: its name, dtype, shape and bytes, in name order."""
    h = hashlib.sha256()
    for name in sorted(state):
        a = np.ascontiguousarray(state[name])
        h.update(f"{name}\0{a.dtype.str}\0{a.shape}\0".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def _hex(digest: str) -> np.ndarray:
    return np.frombuffer(bytes.fromhex(digest), dtype=np.uint8)


def pack(state: State, index: int, items: str) -> bytes:
    """An .npz of the state's arrays and the self-check (index, items digest, checksum)."""
    arrays = {k: np.asarray(v) for k, v in state.items()}
    arrays[INDEX] = np.array(index, dtype=np.int64)
    arrays[ITEMS] = _hex(items)
    arrays[CHECKSUM] = _hex(checksum(arrays))
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


class Damaged(Exception):
    """A run-folder file that cannot be trusted; the message says why."""


def unpack(data: bytes, index: int, items: str | None) -> State:
    """The state in ``data``, after its self-check; ``Damaged`` when anything does not match.

    ``items`` None skips the items check (the result file, whose items are the whole input,
    already part of the folder's key).
    """
    if not data:
        raise Damaged("is empty")
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except Exception as exc:  # noqa: BLE001 - a damaged zip raises many kinds; all mean "damaged"
        reason = " ".join(str(exc).split())[:120] or type(exc).__name__
        raise Damaged(f"cannot be read ({reason})") from None
    try:
        recorded = arrays.pop(CHECKSUM).tobytes().hex()
        found, held = int(arrays[INDEX]), arrays[ITEMS].tobytes().hex()
    except (KeyError, TypeError, ValueError):
        raise Damaged("has no self-check (index, items, checksum)") from None
    if checksum(arrays) != recorded:
        raise Damaged("does not match its checksum")
    if found != index:
        raise Damaged(f"holds {'the result' if found == RESULT else f'shard {found}'}, not this one")
    if items is not None and held != items:
        raise Damaged("was computed from other items than this shard's")
    del arrays[INDEX], arrays[ITEMS]
    return arrays


def note(message: str) -> None:
    """One line on stderr, written around the command's progress bar (tqdm's own ``write``)."""
    tqdm.write(f"headlight: {' '.join(message.split())}", file=sys.stderr)


class RunFolder:
    """One run's folder, held under its lock: finished shards in, merged result out."""

    def __init__(self, path: Path, lock: FileLock | None = None, report: Callable[[str], None] | None = None):
        self.path = path
        self.lock = lock
        self.report = report if report is not None else note

    @classmethod
    def open(
        cls,
        work: Path,
        kind: ShardKind,
        loaded: Any,
        inputs: dict[str, Any],
        shard_size: int,
        *,
        fresh: bool = False,
        report: Callable[[str], None] | None = None,
    ) -> RunFolder:
        """The run's folder under ``work``, created if needed, with its lock taken (waiting
        for another run that holds it). Call ``close`` when the run ends."""
        key = {
            "format": FORMAT,
            "kind": kind.name,
            "options": kind.options(),
            "shard_size": shard_size,
            "model": model_digests(loaded),
            "max_tokens": int(loaded.max_tokens),  # texts are cut to this (--max-tokens)
            "input": inputs,
            "versions": _versions(),
        }
        digest = hashlib.sha256(json.dumps(key, sort_keys=True).encode("utf-8")).hexdigest()
        path = Path(work).expanduser() / f"{kind.name}-{digest[:24]}"
        try:
            path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise HeadlightError(f"cannot make run folder {path}: {exc.strerror or exc}") from None
        folder = cls(path, FileLock(path / ".lock"), report)
        folder._take_lock()
        try:
            folder._remove_partial_writes()
            if fresh:
                folder.clear()
            if not (path / "run.json").is_file():
                write_json(path / "run.json", key)
        except BaseException:
            folder.close()
            raise
        return folder

    def _take_lock(self) -> None:
        assert self.lock is not None
        try:
            self.lock.acquire(timeout=0)
        except Timeout:
            self.report(f"another run is using the run folder {self.path}; waiting for it to finish")
            self.lock.acquire(poll_interval=0.2)
        except OSError as exc:
            raise HeadlightError(f"cannot lock run folder {self.path}: {exc.strerror or exc}") from None

    def close(self) -> None:
        """Give the folder's lock back (a run that is killed gives it back by ending)."""
        if self.lock is not None and self.lock.is_locked:
            self.lock.release()

    def _remove_partial_writes(self) -> None:
        """Temporary files of a write that was killed before its rename (``viewer.files``)."""
        for p in self.path.glob(".*.part"):
            p.unlink(missing_ok=True)

    def clear(self) -> None:
        for p in self.path.glob("*.npz"):
            p.unlink(missing_ok=True)

    def finished(self) -> set[int]:
        """Indices of the shard files on disk (``read`` checks each one)."""
        out = set()
        for p in self.path.iterdir():
            m = _SHARD.fullmatch(p.name)
            if m:
                out.add(int(m.group(1)))
        return out

    def _shard(self, index: int) -> Path:
        return self.path / f"shard-{index:06d}.npz"

    def _load(self, path: Path, index: int, items: str | None) -> State:
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise Damaged(f"cannot be read ({exc.strerror or exc})") from None
        return unpack(data, index, items)

    def read(self, index: int, items: str) -> State:
        """Shard ``index`` of the items whose digest is ``items``; ``Damaged`` if it is not."""
        return self._load(self._shard(index), index, items)

    def check(self, index: int, items: str) -> bool:
        """Whether shard ``index`` on disk is sound; a damaged one is reported and removed."""
        try:
            self.read(index, items)
        except Damaged as exc:
            self.report(
                f"run folder {self.path.name}: {self._shard(index).name} {exc}; computing shard {index} again"
            )
            self._shard(index).unlink(missing_ok=True)
            return False
        return True

    def write(self, index: int, state: State, items: str) -> None:
        atomic_write_bytes(self._shard(index), pack(state, index, items))

    def result(self) -> State | None:
        """The merged result of a finished run; None when there is none, or it is damaged
        (reported, removed, and the run computed again)."""
        path = self.path / "result.npz"
        if not path.is_file():
            return None
        try:
            return self._load(path, RESULT, None)
        except Damaged as exc:
            self.report(f"run folder {self.path.name}: result.npz {exc}; computing the run again")
            path.unlink(missing_ok=True)
            return None

    def finish(self, state: State) -> None:
        """Keep the merged result and drop the shard files it came from."""
        atomic_write_bytes(self.path / "result.npz", pack(state, RESULT, items_digest(())))
        for index in self.finished():
            self._shard(index).unlink(missing_ok=True)
