"""Run folders: a long report's finished shards kept on disk so a killed run continues.

A run folder is named by the SHA-256 of its key (docs/scale.md, "Run folders"): the report
kind and its options, the shard size, the SHA-256 of every file of the model folder that
changes the numbers (weights, config, tokenizer), the SHA-256 of the input, and the versions
of Headlight, torch, transformers and tokenizers. The same command on the same files finds the
same folder; change any of them and it is another run.

Inside: ``run.json`` (the key, for people), ``shard-000000.npz`` … (one per finished shard,
written atomically by ``viewer.files``), and once every shard is in, ``result.npz`` (the merged
partial) replaces the shard files. Files hold numpy arrays only and are read with
``allow_pickle=False``: a cache folder never holds code.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np

from viewer import __version__
from viewer.errors import HeadlightError
from viewer.files import atomic_write_bytes, write_json
from viewer.reports.shardtypes import ShardKind, State

FORMAT = 4  # the state layout of the accumulators; change it when one changes
MODEL_FILES = (
    "config.json",
    "tokenizer.json",
    "tokenizer_config.json",
    "special_tokens_map.json",
    "vocab.txt",
    "vocab.json",
    "merges.txt",
    "tokenizer.model",
    "spiece.model",
)
_SHARD = re.compile(r"shard-(\d{6,})\.npz")


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
    """File name -> SHA-256 for the model's weights, config and tokenizer files."""
    folder = Path(loaded.folder)
    paths = [Path(p) for p in getattr(loaded, "weight_files", ())]
    paths += [folder / name for name in MODEL_FILES if (folder / name).is_file()]
    return {p.name: file_digest(p) for p in paths}


def _versions() -> dict[str, str]:
    out = {"headlight": __version__}
    for name in ("torch", "transformers", "tokenizers"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "-"
    return out


def _pack(state: State) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **{k: np.asarray(v) for k, v in state.items()})
    return buf.getvalue()


def _unpack(path: Path) -> State:
    try:
        with np.load(path, allow_pickle=False) as npz:
            return {k: npz[k] for k in npz.files}
    except (OSError, ValueError, EOFError) as exc:
        raise HeadlightError(
            f"run folder file {path} cannot be read ({exc}); run again with --fresh"
        ) from None


class RunFolder:
    """One run's folder: finished shards in, merged result out."""

    def __init__(self, path: Path):
        self.path = path

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
    ) -> RunFolder:
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
        folder = cls(path)
        if fresh:
            folder.clear()
        if not (path / "run.json").is_file():
            write_json(path / "run.json", key)
        return folder

    def clear(self) -> None:
        for p in self.path.glob("*.npz"):
            p.unlink(missing_ok=True)

    def finished(self) -> set[int]:
        """Indices of the shards already on disk."""
        out = set()
        for p in self.path.iterdir():
            m = _SHARD.fullmatch(p.name)
            if m:
                out.add(int(m.group(1)))
        return out

    def _shard(self, index: int) -> Path:
        return self.path / f"shard-{index:06d}.npz"

    def read(self, index: int) -> State:
        return _unpack(self._shard(index))

    def write(self, index: int, state: State) -> None:
        atomic_write_bytes(self._shard(index), _pack(state))

    def result(self) -> State | None:
        path = self.path / "result.npz"
        return _unpack(path) if path.is_file() else None

    def finish(self, state: State) -> None:
        """Keep the merged result and drop the shard files it came from."""
        atomic_write_bytes(self.path / "result.npz", _pack(state))
        for index in self.finished():
            self._shard(index).unlink(missing_ok=True)
