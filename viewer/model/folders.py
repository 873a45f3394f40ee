"""Validating a checkpoint folder before anything in it is deserialised.

A model folder can be hostile. ``model_folder(path, allow_pickle)`` reads ``config.json`` as
plain JSON and refuses remote code, chooses the weight files (safetensors; pickle only on
explicit opt-in), checks every safetensors header and size, notes the stored floating-point
type, and requires a tokenizer. ``adapter_folder(path, base, allow_pickle)`` does the same for a
PEFT adapter folder (``adapter_config.json``) and finds the base model folder it belongs to.

Nothing here imports torch or transformers: the checks run on bytes and JSON only. Every
problem a user can cause is a one-line ``HeadlightError``; a missing base model of an adapter is
its own subclass, ``NeedsBaseModel``, so that the window can ask for the base folder.
"""

from __future__ import annotations

import json
import os
import struct
from dataclasses import dataclass
from pathlib import Path

from viewer.errors import HeadlightError

TOKENIZER_FILES = ("tokenizer.json", "vocab.txt", "vocab.json", "tokenizer.model", "spiece.model")

# safetensors dtype names of the reduced-precision floating types upcast at load
HALF_TYPES = {"BF16": "bfloat16", "F16": "float16"}


class NeedsBaseModel(HeadlightError):
    """An adapter folder whose base model is not a local folder and none was given."""


@dataclass(frozen=True)
class ModelFolder:
    """A checked model folder: its parsed config and the weight files to load."""

    path: Path
    config: dict
    weights: tuple[Path, ...]
    safetensors: bool
    stored_dtype: str | None  # "bfloat16" / "float16" when the weights are stored that way


@dataclass(frozen=True)
class AdapterFolder:
    """A checked PEFT adapter folder and the base model folder it is applied to."""

    path: Path
    config: dict  # adapter_config.json
    weights: Path
    safetensors: bool
    base: Path
    has_tokenizer: bool


def existing_folder(folder: str | os.PathLike) -> Path:
    path = Path(folder).expanduser()
    if not path.exists():
        hint = ""
        if "/" in str(folder) and not str(folder).startswith((".", "/", "~")):
            hint = " (Headlight opens local folders only and never downloads models)"
        raise HeadlightError(f"model folder not found: {folder}{hint}")
    if not path.is_dir():
        raise HeadlightError(f"{folder} is a file, not a model folder")
    return path


def _json_object(path: Path, what: str) -> dict:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise HeadlightError(f"{what} in {path.parent} is not valid JSON: {exc}") from None
    if not isinstance(data, dict):
        raise HeadlightError(f"{what} in {path.parent} is not a JSON object")
    return data


def read_config(folder: Path) -> dict:
    path = folder / "config.json"
    if not path.is_file():
        raise HeadlightError(f"{folder} has no config.json; is it a Hugging Face model folder?")
    data = _json_object(path, "config.json")
    if data.get("auto_map") or data.get("trust_remote_code"):
        raise HeadlightError(
            f"config.json in {folder} asks for remote code (auto_map); Headlight never runs code "
            "from a model folder"
        )
    if "model_type" not in data:
        raise HeadlightError(f"config.json in {folder} has no model_type")
    return data


def check_safetensors(path: Path) -> dict:
    """Validate a safetensors file's header and size without loading tensors.

    Format: 8-byte little-endian header length N, N bytes of JSON, then the tensor bytes; every
    tensor's ``data_offsets`` must lie inside the byte buffer, and the buffer must end exactly
    where the last tensor does (a truncated download fails here).
    """
    size = path.stat().st_size
    try:
        with path.open("rb") as fh:
            head = fh.read(8)
            if len(head) < 8:
                raise ValueError("file shorter than its 8-byte header length")
            (n,) = struct.unpack("<Q", head)
            if n > size - 8 or n > 100_000_000:
                raise ValueError("header length points past the end of the file")
            header = json.loads(fh.read(n).decode("utf-8"))
    except (ValueError, UnicodeDecodeError) as exc:
        raise HeadlightError(f"{path.name} is not a valid safetensors file: {exc}") from None
    if not isinstance(header, dict):
        raise HeadlightError(f"{path.name} is not a valid safetensors file: header not an object")
    buffer = size - 8 - n
    end = 0
    for name, info in header.items():
        if name == "__metadata__":
            continue
        try:
            start, stop = info["data_offsets"]
        except (TypeError, KeyError, ValueError):
            raise HeadlightError(f"{path.name}: tensor {name!r} has no data offsets") from None
        if not (0 <= start <= stop <= buffer):
            raise HeadlightError(
                f"{path.name} is truncated or corrupt: tensor {name!r} lies past the end of the file"
            )
        end = max(end, stop)
    if end != buffer:
        raise HeadlightError(
            f"{path.name} is truncated or corrupt: {buffer} data bytes but tensors cover {end}"
        )
    return header


def _stored_half_type(headers: list[dict]) -> str | None:
    """ "bfloat16" or "float16" when the floating-point tensors are stored in that type."""
    kinds = {
        info.get("dtype")
        for h in headers
        for name, info in h.items()
        if name != "__metadata__" and isinstance(info, dict)
    }
    halves = sorted(HALF_TYPES[k] for k in kinds if k in HALF_TYPES)
    return halves[0] if halves else None


def _pickle_weights(folder: Path, pattern: str, allow_pickle: bool, what: str) -> list[Path]:
    pickles = sorted(folder.glob(pattern))
    if pickles and not allow_pickle:
        raise HeadlightError(
            f"{folder} has only pickle {what} ({pickles[0].name}); pickle files can run code. "
            "Convert to safetensors, or pass --allow-pickle to load them with weights_only=True"
        )
    return pickles


def weight_files(folder: Path, allow_pickle: bool) -> tuple[list[Path], bool]:
    """The weight files to load and whether they are safetensors."""
    single = folder / "model.safetensors"
    index = folder / "model.safetensors.index.json"
    if single.is_file():
        return [single], True
    if index.is_file():
        try:
            shards = sorted(set(json.loads(index.read_text(encoding="utf-8"))["weight_map"].values()))
        except (ValueError, KeyError, TypeError):
            raise HeadlightError(f"{index.name} in {folder} is not a valid shard index") from None
        paths = [folder / s for s in shards]
        missing = [p.name for p in paths if not p.is_file()]
        if missing:
            raise HeadlightError(f"weight shard {missing[0]} listed in {index.name} is missing")
        return paths, True
    pickles = _pickle_weights(folder, "pytorch_model*.bin", allow_pickle, "weights")
    if pickles:
        return pickles, False
    raise HeadlightError(f"{folder} has no weights (model.safetensors or pytorch_model.bin)")


def has_tokenizer(folder: Path) -> bool:
    return any((folder / f).is_file() for f in TOKENIZER_FILES)


def model_folder(path: Path, allow_pickle: bool = False) -> ModelFolder:
    """Check a model folder without deserialising anything (see the module docstring)."""
    config = read_config(path)
    weights, safe = weight_files(path, allow_pickle)
    headers = [check_safetensors(w) for w in weights] if safe else []
    if not has_tokenizer(path):
        raise HeadlightError(f"{path} has no tokenizer (tokenizer.json or vocab files)")
    stored = _stored_half_type(headers)
    if stored is None and not safe:
        declared = str(config.get("dtype") or config.get("torch_dtype") or "")
        stored = declared if declared in HALF_TYPES.values() else None
    return ModelFolder(path, config, tuple(weights), safe, stored)


def is_adapter_folder(path: Path) -> bool:
    return (path / "adapter_config.json").is_file() and not (path / "config.json").is_file()


def adapter_folder(path: Path, base: str | os.PathLike | None, allow_pickle: bool = False) -> AdapterFolder:
    """Check a PEFT adapter folder and resolve its base model folder.

    The base is ``base`` when given, else the adapter's ``base_model_name_or_path`` when that is
    a local folder (absolute, or relative to the adapter folder); otherwise ``NeedsBaseModel``.
    """
    config = _json_object(path / "adapter_config.json", "adapter_config.json")
    if config.get("auto_mapping") or config.get("trust_remote_code"):
        raise HeadlightError(
            f"adapter_config.json in {path} asks for remote code; Headlight never runs code "
            "from a model folder"
        )
    kind = str(config.get("peft_type") or "")
    if not kind:
        raise HeadlightError(f"adapter_config.json in {path} has no peft_type")
    single = path / "adapter_model.safetensors"
    if single.is_file():
        check_safetensors(single)
        weights, safe = single, True
    else:
        pickles = _pickle_weights(path, "adapter_model.bin", allow_pickle, "adapter weights")
        if not pickles:
            raise HeadlightError(f"{path} has no adapter weights (adapter_model.safetensors)")
        weights, safe = pickles[0], False
    if base is not None:
        base_path = existing_folder(base)
    else:
        named = str(config.get("base_model_name_or_path") or "")
        candidates = [Path(named).expanduser(), path / named] if named else []
        found = [c for c in candidates if c.is_dir() and (c / "config.json").is_file()]
        if not found:
            shown = f" {named!r}" if named else ""
            raise NeedsBaseModel(
                f"adapter {path.name} needs its base model{shown}, which is not a local folder; "
                "give the base model folder (--base DIR)"
            )
        base_path = found[0].resolve()
    if is_adapter_folder(base_path):
        raise HeadlightError(f"base model {base_path} is itself an adapter folder")
    return AdapterFolder(path, config, weights, safe, base_path, has_tokenizer(path))
