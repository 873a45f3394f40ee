"""Validating a checkpoint folder before anything in it is deserialised or built.

A model folder can be hostile. ``model_folder(path, allow_pickle)`` checks, in this order and
before any model is built (docs/definitions.md, "What a model folder must satisfy"):

- ``config.json``: read as bounded JSON (``viewer.safejson``: no huge integers, no deep
  nesting, at most 4 MB), no remote code, ``model_type`` a supported architecture,
  ``architectures`` a list of strings, every size a positive integer within ``SIZE_BOUNDS``,
  the heads dividing the hidden size, ``id2label`` and ``pad_token_id`` that fit;
- the weight files: safetensors (pickle only on explicit opt-in); every safetensors header is
  bounded JSON whose tensors have known dtypes, shapes of non-negative integers and
  ``data_offsets`` that tile the data bytes exactly, each tensor's byte length being its
  element count times its dtype's size, so the header agrees with the file's size;
- config against header: layer count, hidden size, vocabulary, label count, learned position
  rows and every other size the config gives agree with the tensor shapes the header declares,
  so that building the model allocates no more than the weight file holds;
- the tokenizer: present, its files bounded JSON, and every id it can produce a row of the
  token embedding;
- finally the config is handed to its transformers config class (only the class, no model),
  whose own type checks become a one-line refusal too.

``adapter_folder(path, base, allow_pickle)`` does the same for a PEFT adapter folder
(``adapter_config.json``) and finds the base model folder it belongs to.

Nothing here imports torch; transformers is imported only for the config class, after every
other check has passed (the loader has imported it by then anyway). Every problem a user can
cause is a one-line ``HeadlightError``; a missing base model of an adapter is its own subclass,
``NeedsBaseModel``, so that the window can ask for the base folder.
"""

from __future__ import annotations

import math
import os
import re
import struct
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from viewer import safejson
from viewer.errors import HeadlightError
from viewer.model.families import family_for

TOKENIZER_FILES = ("tokenizer.json", "vocab.txt", "vocab.json", "tokenizer.model", "spiece.model")
TOKENIZER_JSON = ("tokenizer_config.json", "special_tokens_map.json", "added_tokens.json")

# safetensors dtype names of the reduced-precision floating types upcast at load
HALF_TYPES = {"BF16": "bfloat16", "F16": "float16"}
# bytes per element of every safetensors dtype Headlight accepts (the format's own list)
DTYPE_BYTES = {
    "BOOL": 1,
    "U8": 1,
    "I8": 1,
    "F8_E4M3": 1,
    "F8_E5M2": 1,
    "I16": 2,
    "U16": 2,
    "F16": 2,
    "BF16": 2,
    "I32": 4,
    "U32": 4,
    "F32": 4,
    "I64": 8,
    "U64": 8,
    "F64": 8,
}
CONFIG_BYTES = 4 * 2**20  # real config.json files are a few kB
HEADER_BYTES = 100_000_000  # the safetensors library's own limit on a header
LABELS_MAX = 2**16

# Config sizes: (lowest, highest) accepted, per key; aliases of one quantity share bounds.
# The bounds are sanity limits well above any released checkpoint of a supported family; the
# real limit is the weight file: every size that shapes a tensor must agree with the header.
_LAYERS, _HEADS, _WIDTH = (1, 1024), (1, 1024), (1, 2**16)
SIZE_BOUNDS: dict[str, tuple[int, int]] = {
    "num_hidden_layers": _LAYERS,
    "n_layer": _LAYERS,
    "n_layers": _LAYERS,
    "num_hidden_groups": _LAYERS,
    "inner_group_num": _LAYERS,
    "global_attn_every_n_layers": _LAYERS,
    "max_window_layers": (0, 1024),
    "num_attention_heads": _HEADS,
    "n_head": _HEADS,
    "n_heads": _HEADS,
    "num_key_value_heads": _HEADS,
    "hidden_size": _WIDTH,
    "n_embd": _WIDTH,
    "dim": _WIDTH,
    "d_model": _WIDTH,
    "embedding_size": _WIDTH,
    "word_embed_proj_dim": _WIDTH,
    "pooler_hidden_size": _WIDTH,
    "head_dim": (1, 2**13),
    "attention_head_size": (1, 2**13),
    "intermediate_size": (1, 2**20),
    "n_inner": (1, 2**20),
    "hidden_dim": (1, 2**20),
    "ffn_dim": (1, 2**20),
    "vocab_size": (1, 2**22),
    "type_vocab_size": (0, 1024),
    "max_position_embeddings": (1, 2**24),
    "n_positions": (1, 2**24),
    "original_max_position_embeddings": (1, 2**24),
    "sliding_window": (0, 2**24),
    "local_attention": (0, 2**24),
    "relative_attention_num_buckets": (1, 2**16),
    "relative_attention_max_distance": (1, 2**24),
    "position_buckets": (-1, 2**16),
    "max_relative_positions": (-1, 2**24),
    "num_labels": (1, LABELS_MAX),
}
# one quantity, its config keys (first present wins, as transformers' attribute maps do)
LAYERS = ("num_hidden_layers", "n_layer", "n_layers")
HEADS = ("num_attention_heads", "n_head", "n_heads")
HIDDEN = ("hidden_size", "n_embd", "dim", "d_model")
FEED_FORWARD = ("intermediate_size", "n_inner", "hidden_dim", "ffn_dim")
POSITIONS = ("max_position_embeddings", "n_positions")
REQUIRED = {"layer count": LAYERS, "head count": HEADS, "hidden size": HIDDEN, "vocabulary": ("vocab_size",)}

# tensor names in the safetensors header, by role (every supported family's naming)
_EMBEDDING = re.compile(r"(^|\.)(word_embeddings|embed_tokens|wte|embed_in|tok_embeddings)\.weight$")
_LAYER = re.compile(r"(?:^|\.)(?:layer|layers|h)\.(\d+)\.")
_ALBERT_GROUP = re.compile(r"(?:^|\.)albert_layer_groups\.(\d+)\.albert_layers\.(\d+)\.")
_HEAD = re.compile(r"(^|\.)(classifier|score)(\.out_proj)?\.weight$")
_POSITION_ROWS = re.compile(r"(^|\.)(position_embeddings|wpe|embed_positions)\.weight$")
_TOKEN_TYPES = re.compile(r"(^|\.)token_type_embeddings\.weight$")
_RELATIVE = re.compile(r"(^|\.)(rel_embeddings|relative_attention_bias)\.weight$")
_LORA_A = re.compile(r"\.lora_A(\.[^.]+)?\.weight$")


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
    data = safejson.load_file(path, f"{what} in {path.parent}", max_bytes=CONFIG_BYTES)
    if not isinstance(data, dict):
        raise HeadlightError(f"{what} in {path.parent} is not a JSON object")
    return data


# -- config.json ---------------------------------------------------------------------------------


def read_config(folder: Path) -> dict:
    """config.json as bounded JSON, with its sizes, types and labels checked (not the weights)."""
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
    family_for(data["model_type"])  # unsupported architectures are refused by name
    check_config(data, f"config.json in {folder}")
    return data


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def first_size(config: dict, keys: Iterable[str]) -> int | None:
    """The first of ``keys`` the config gives a value for (None: none of them)."""
    for key in keys:
        if config.get(key) is not None:
            return config[key]
    return None


def label_count(config: dict) -> int | None:
    """Labels as transformers counts them: ``id2label``'s length, else ``num_labels``."""
    if isinstance(config.get("id2label"), dict):
        return len(config["id2label"])
    return config.get("num_labels")


def check_config(config: dict, what: str) -> None:
    """Types, bounds and consistency of a config's sizes, labels and architectures."""
    archs = config.get("architectures")
    if archs is not None and not (
        isinstance(archs, list) and len(archs) <= 16 and all(isinstance(a, str) for a in archs)
    ):
        raise HeadlightError(f"{what}: architectures must be a list of class names (strings)")
    for key, (low, high) in SIZE_BOUNDS.items():
        value = config.get(key)
        if value is None:
            continue
        if not _is_int(value):
            raise HeadlightError(f"{what}: {key} must be an integer, got {_shown(value)}")
        if not low <= value <= high:
            raise HeadlightError(f"{what}: {key} = {value} is outside {low}…{high}")
    for name, keys in REQUIRED.items():
        if first_size(config, keys) is None:
            raise HeadlightError(f"{what} gives no {name} ({' or '.join(keys)})")
    hidden, heads = first_size(config, HIDDEN), first_size(config, HEADS)
    head_dim = first_size(config, ("head_dim", "attention_head_size"))
    if head_dim is None and hidden % heads:
        raise HeadlightError(f"{what}: hidden size {hidden} is not divisible by {heads} attention heads")
    kv = config.get("num_key_value_heads")
    if kv is not None and heads % kv:
        raise HeadlightError(f"{what}: {heads} attention heads cannot share {kv} key/value heads evenly")
    vocab = config["vocab_size"]
    pad = config.get("pad_token_id")
    if pad is not None and not (_is_int(pad) and -vocab <= pad < vocab):
        raise HeadlightError(f"{what}: pad_token_id {_shown(pad)} is not a row of the {vocab} tokens")
    _check_labels(config, what)


def _check_labels(config: dict, what: str) -> None:
    id2label, label2id = config.get("id2label"), config.get("label2id")
    if id2label is not None:
        if not isinstance(id2label, dict) or len(id2label) > LABELS_MAX:
            raise HeadlightError(f"{what}: id2label must be an object of at most {LABELS_MAX} labels")
        for key, name in id2label.items():
            if not (re.fullmatch(r"\d{1,5}", key) and int(key) < LABELS_MAX and isinstance(name, str)):
                raise HeadlightError(
                    f"{what}: id2label maps class numbers to names, not {_shown(key)} → {_shown(name)}"
                )
    if label2id is not None:
        if not isinstance(label2id, dict) or len(label2id) > LABELS_MAX:
            raise HeadlightError(f"{what}: label2id must be an object of at most {LABELS_MAX} labels")
        if not all(_is_int(v) and 0 <= v < LABELS_MAX for v in label2id.values()):
            raise HeadlightError(f"{what}: label2id must map names to class numbers")


def _shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def typed_config(config: dict, folder: Path) -> Any:
    """The config through its transformers config class (type checks of every field; no model).

    Runs after every other check. The class's own validation of a file we did not write can
    fail in many ways (strict-dataclass field errors, value errors of rotary settings, ...);
    each is the user's bad input here, so all of them become one line.
    """
    from transformers import CONFIG_MAPPING

    try:
        return CONFIG_MAPPING[config["model_type"]].from_dict(dict(config))
    except Exception as exc:  # noqa: BLE001 - see the docstring
        reason = " ".join(str(exc).split())[:240] or type(exc).__name__
        raise HeadlightError(f"config.json in {folder} cannot be used: {reason}") from None


# -- safetensors headers -------------------------------------------------------------------------


def check_safetensors(path: Path) -> dict:
    """Validate a safetensors file's header against its size without loading tensors.

    Format: 8-byte little-endian header length N, N bytes of JSON, then the data bytes. Every
    tensor names a known dtype, a shape of non-negative integers and ``data_offsets`` [start,
    stop] into the data bytes, with stop − start = (product of the shape) × (bytes of the
    dtype); sorted by start, the tensors tile the data bytes exactly from 0 to the end of the
    file (a truncated download, a lying shape or dtype, overlapping tensors all fail here).
    """
    size = path.stat().st_size
    bad = f"{path.name} is not a valid safetensors file"
    with path.open("rb") as fh:
        head = fh.read(8)
        if len(head) < 8:
            raise HeadlightError(f"{bad}: file shorter than its 8-byte header length")
        (n,) = struct.unpack("<Q", head)
        if n > size - 8 or n > HEADER_BYTES:
            raise HeadlightError(f"{bad}: header length points past the end of the file")
        raw = fh.read(n)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise HeadlightError(f"{bad}: header is not UTF-8") from None
    header = safejson.loads(text, f"the header of {path.name}", max_depth=3)
    if not isinstance(header, dict):
        raise HeadlightError(f"{bad}: header not an object")
    meta = header.get("__metadata__")
    if meta is not None and not (isinstance(meta, dict) and all(isinstance(v, str) for v in meta.values())):
        raise HeadlightError(f"{bad}: __metadata__ must map names to strings")
    spans = []
    for name, info in header.items():
        if name == "__metadata__":
            continue
        spans.append((*_tensor_span(path.name, name, info), name))
    buffer = size - 8 - n
    end = 0
    for start, stop, name in sorted(spans):
        if start != end:
            where = "overlaps the tensor before it" if start < end else "leaves a gap before it"
            raise HeadlightError(f"{path.name} is truncated or corrupt: tensor {name!r} {where}")
        end = stop
    if end != buffer:
        raise HeadlightError(
            f"{path.name} is truncated or corrupt: {buffer} data bytes but tensors cover {end}"
        )
    return header


def _tensor_span(file: str, name: str, info: Any) -> tuple[int, int]:
    """(start, stop) of one header entry, checked against its dtype and shape."""
    if not isinstance(info, dict):
        raise HeadlightError(f"{file}: tensor {name!r} is not described by an object")
    dtype, shape, offsets = info.get("dtype"), info.get("shape"), info.get("data_offsets")
    if dtype not in DTYPE_BYTES:
        raise HeadlightError(f"{file}: tensor {name!r} has an unknown dtype {_shown(dtype)}")
    if not (isinstance(shape, list) and len(shape) <= 8 and all(_is_int(d) and d >= 0 for d in shape)):
        raise HeadlightError(f"{file}: tensor {name!r} has a shape that is not sizes: {_shown(shape)}")
    if not (isinstance(offsets, list) and len(offsets) == 2 and all(_is_int(o) and o >= 0 for o in offsets)):
        raise HeadlightError(f"{file}: tensor {name!r} has no valid data offsets: {_shown(offsets)}")
    start, stop = offsets
    if stop - start != math.prod(shape) * DTYPE_BYTES[dtype]:
        raise HeadlightError(
            f"{file} is truncated or corrupt: tensor {name!r} ({dtype} {shape}) needs "
            f"{math.prod(shape) * DTYPE_BYTES[dtype]} bytes but its offsets hold {stop - start}"
        )
    return start, stop


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


def _shapes(headers: list[dict]) -> dict[str, list[int]]:
    return {name: info["shape"] for h in headers for name, info in h.items() if name != "__metadata__"}


def _one(shapes: dict[str, list[int]], pattern: re.Pattern) -> tuple[str, list[int]] | None:
    found = sorted((name, shape) for name, shape in shapes.items() if pattern.search(name))
    return found[0] if found else None


def embedding_rows(shapes: dict[str, list[int]]) -> int | None:
    """Rows of the token embedding in a set of header shapes (None: no such tensor)."""
    found = _one(shapes, _EMBEDDING)
    return found[1][0] if found and len(found[1]) == 2 else None


def check_against_weights(config: dict, shapes: dict[str, list[int]], folder: Path) -> None:
    """The config's sizes against the tensor shapes the safetensors headers declare.

    Before any model is built: a size the file does not hold would make transformers allocate a
    tensor the file cannot fill (a 10⁸-label classifier head, a million layers). Exact where
    the role of a tensor is plain (token embedding: vocabulary × width; layers; label rows),
    and otherwise each size must be one of the dimensions of the first layer's tensors.
    """

    def refuse(why: str) -> HeadlightError:
        return HeadlightError(f"weights in {folder} do not match config.json: {why}")

    embedding = _one(shapes, _EMBEDDING)
    if embedding is None or len(embedding[1]) != 2:
        raise refuse("no token embedding (word_embeddings, embed_tokens, wte, ...) in the weights")
    rows, width = embedding[1]
    hidden = first_size(config, HIDDEN)
    if rows != config["vocab_size"]:
        raise refuse(f"vocab_size {config['vocab_size']} but the token embedding has {rows} rows")
    want = config.get("embedding_size") or config.get("word_embed_proj_dim") or hidden
    if width != want:
        raise refuse(f"embedding width {want} but the token embedding is {width} wide")

    if config["model_type"] == "albert":
        found = {(int(m[1]), int(m[2])) for name in shapes if (m := _ALBERT_GROUP.search(name))}
        groups = {g for g, _ in found}
        stored, declared = len(groups), config.get("num_hidden_groups", 1)
        if groups != set(range(declared)) or {i for g, i in found if g == 0} != set(
            range(config.get("inner_group_num", 1))
        ):
            raise refuse(f"{declared} layer group(s) declared, {stored} stored")
        first = {n: s for n, s in shapes.items() if ".albert_layer_groups.0." in n}
    else:
        indices = {int(m[1]) for name in shapes if (m := _LAYER.search(name))}
        layers = first_size(config, LAYERS)
        if indices != set(range(layers)):
            raise refuse(f"{layers} layers declared, {len(indices)} stored")
        first = {n: s for n, s in shapes.items() if (m := _LAYER.search(n)) and m[1] == "0"}
    dims = {d for shape in first.values() for d in shape}
    heads = first_size(config, HEADS)
    head_dim = first_size(config, ("head_dim", "attention_head_size")) or hidden // heads
    sizes = {"hidden size": hidden, "heads × head size": heads * head_dim}
    sizes.update({key: config[key] for key in FEED_FORWARD if config.get(key) is not None})
    for name, value in sizes.items():
        if value not in dims:
            raise refuse(f"{name} {value} is not a dimension of any tensor of the first layer")

    labels = label_count(config)
    head = _one(shapes, _HEAD)
    archs = config.get("architectures") or []
    if head is not None and labels is not None and head[1][0] != labels:
        raise refuse(f"{labels} labels declared but the classification head has {head[1][0]} rows")
    if head is None and any(a.endswith("ForSequenceClassification") for a in archs):
        raise refuse("a sequence classifier without a classification head (classifier or score)")
    positions = first_size(config, POSITIONS)
    learned = _one(shapes, _POSITION_ROWS)
    if learned is not None and positions is not None and positions > learned[1][0]:
        raise refuse(f"max_position_embeddings {positions} but {learned[1][0]} position rows stored")
    types = _one(shapes, _TOKEN_TYPES)
    if types is not None and config.get("type_vocab_size", types[1][0]) != types[1][0]:
        raise refuse(f"type_vocab_size {config['type_vocab_size']} but {types[1][0]} token-type rows stored")
    relative = _one(shapes, _RELATIVE)
    widest = max((d for shape in shapes.values() for d in shape), default=0)
    for key in ("relative_attention_num_buckets", "position_buckets", "max_relative_positions"):
        value = config.get(key)
        if value is not None and value > 0 and relative is not None and value > widest:
            raise refuse(f"{key} {value} exceeds every dimension of the stored tensors")
    pooler = config.get("pooler_hidden_size")
    if pooler is not None and pooler > widest:
        raise refuse(f"pooler_hidden_size {pooler} exceeds every dimension of the stored tensors")


# -- weight files ----------------------------------------------------------------------------------


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
        data = safejson.load_file(index, f"{index.name} in {folder}", max_bytes=CONFIG_BYTES)
        mapping = data.get("weight_map") if isinstance(data, dict) else None
        if not isinstance(mapping, dict) or not all(isinstance(v, str) for v in mapping.values()):
            raise HeadlightError(f"{index.name} in {folder} is not a valid shard index")
        paths = [folder / s for s in sorted(set(mapping.values()))]
        outside = [p.name for p in paths if p.resolve().parent != folder.resolve()]
        if outside:
            raise HeadlightError(f"{index.name} in {folder} names a shard outside the folder: {outside[0]}")
        missing = [p.name for p in paths if not p.is_file()]
        if missing:
            raise HeadlightError(f"weight shard {missing[0]} listed in {index.name} is missing")
        return paths, True
    pickles = _pickle_weights(folder, "pytorch_model*.bin", allow_pickle, "weights")
    if pickles:
        return pickles, False
    raise HeadlightError(f"{folder} has no weights (model.safetensors or pytorch_model.bin)")


# -- tokenizers ------------------------------------------------------------------------------------


def has_tokenizer(folder: Path) -> bool:
    return any((folder / f).is_file() for f in TOKENIZER_FILES)


def tokenizer_ids(folder: Path) -> int | None:
    """One more than the largest token id the folder's tokenizer can produce (None: unknown).

    ``tokenizer.json`` is read by the tokenizers library itself (its parser bounds nesting);
    otherwise ``vocab.txt`` (one token a line) or ``vocab.json``; the added tokens of
    ``tokenizer_config.json`` and ``added_tokens.json`` count too. A SentencePiece model alone
    is not read here.
    """
    top = -1
    extra: list[Any] = []
    for name in TOKENIZER_JSON:
        path = folder / name
        if path.is_file():
            data = _json_object(path, name)
            if name == "added_tokens.json":
                extra += list(data.values())
            elif name == "tokenizer_config.json" and isinstance(data.get("added_tokens_decoder"), dict):
                extra += [int(k) if re.fullmatch(r"\d{1,12}", k) else k for k in data["added_tokens_decoder"]]
    if not all(_is_int(i) and i >= 0 for i in extra):
        raise HeadlightError(f"the tokenizer files in {folder} give added tokens ids that are not numbers")
    top = max(extra, default=-1)
    if (folder / "tokenizer.json").is_file():
        from tokenizers import Tokenizer

        path = folder / "tokenizer.json"
        if path.stat().st_size > 512 * 2**20:
            raise HeadlightError(f"tokenizer.json in {folder} is refused: larger than 512 MB")
        try:
            vocab = Tokenizer.from_file(str(path)).get_vocab(with_added_tokens=True)
        except Exception as exc:  # noqa: BLE001 - the library raises a bare Exception for bad files
            reason = " ".join(str(exc).split())[:200]
            raise HeadlightError(f"tokenizer.json in {folder} cannot be read: {reason}") from None
        return max(top, max(vocab.values(), default=-1)) + 1
    if (folder / "vocab.txt").is_file():
        with (folder / "vocab.txt").open("rb") as fh:
            lines = sum(1 for _ in fh)
        return max(top, lines - 1) + 1
    if (folder / "vocab.json").is_file():
        vocab = safejson.load_file(folder / "vocab.json", f"vocab.json in {folder}", max_bytes=256 * 2**20)
        ids = list(vocab.values()) if isinstance(vocab, dict) else [None]
        if not all(_is_int(i) and i >= 0 for i in ids):
            raise HeadlightError(f"vocab.json in {folder} must map tokens to ids")
        return max(top, max(ids, default=-1)) + 1
    return None if top < 0 else top + 1


def check_tokenizer_fits(folder: Path, rows: int | None, where: str) -> None:
    """Every id the tokenizer of ``folder`` produces must be a row of a ``rows``-row embedding."""
    ids = tokenizer_ids(folder)
    if rows is not None and ids is not None and ids > rows:
        raise HeadlightError(
            f"the tokenizer in {folder} produces ids up to {ids - 1}, beyond the {rows} rows of "
            f"the token embedding of {where}"
        )


# -- whole folders ---------------------------------------------------------------------------------


def model_folder(path: Path, allow_pickle: bool = False, *, typed: bool = True) -> ModelFolder:
    """Check a model folder without deserialising or building anything (module docstring).

    ``typed=False`` leaves out the last step, the transformers config class, so that the
    check runs without importing torch (the command line checks a folder that way first, so a
    bad folder is refused in a fraction of a second).
    """
    config = read_config(path)
    weights, safe = weight_files(path, allow_pickle)
    headers = [check_safetensors(w) for w in weights] if safe else []
    if not has_tokenizer(path):
        raise HeadlightError(f"{path} has no tokenizer (tokenizer.json or vocab files)")
    rows = config["vocab_size"]
    if safe:
        shapes = _shapes(headers)
        check_against_weights(config, shapes, path)
        rows = embedding_rows(shapes)
    check_tokenizer_fits(path, rows, path.name)
    if typed:
        typed_config(config, path)
    stored = _stored_half_type(headers)
    if stored is None and not safe:
        declared = str(config.get("dtype") or config.get("torch_dtype") or "")
        stored = declared if declared in HALF_TYPES.values() else None
    return ModelFolder(path, config, tuple(weights), safe, stored)


def is_adapter_folder(path: Path) -> bool:
    return (path / "adapter_config.json").is_file() and not (path / "config.json").is_file()


def check_adapter_config(config: dict, what: str) -> None:
    """Types and bounds of the adapter_config.json fields Headlight and peft rely on."""
    kind = config.get("peft_type")
    if not isinstance(kind, str) or not kind:
        raise HeadlightError(f"{what} has no peft_type")
    rank = config.get("r")
    if rank is not None and not (_is_int(rank) and 1 <= rank <= 2**16):
        raise HeadlightError(f"{what}: r must be an integer in 1…65536, got {_shown(rank)}")
    alpha = config.get("lora_alpha")
    if alpha is not None and not (
        isinstance(alpha, (int, float)) and not isinstance(alpha, bool) and math.isfinite(alpha)
    ):
        raise HeadlightError(f"{what}: lora_alpha must be a number, got {_shown(alpha)}")
    for key in ("target_modules", "modules_to_save"):
        value = config.get(key)
        if value is not None and not (
            isinstance(value, str) or isinstance(value, list) and all(isinstance(v, str) for v in value)
        ):
            raise HeadlightError(f"{what}: {key} must be a module name or a list of them")
    named = config.get("base_model_name_or_path")
    if named is not None and not isinstance(named, str):
        raise HeadlightError(f"{what}: base_model_name_or_path must be a folder name")
    for key in ("rank_pattern", "alpha_pattern"):
        if config.get(key) is not None and not isinstance(config[key], dict):
            raise HeadlightError(f"{what}: {key} must be an object")


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
    check_adapter_config(config, f"adapter_config.json in {path}")
    single = path / "adapter_model.safetensors"
    shapes: dict[str, list[int]] = {}
    if single.is_file():
        shapes = _shapes([check_safetensors(single)])
        weights, safe = single, True
    else:
        pickles = _pickle_weights(path, "adapter_model.bin", allow_pickle, "adapter weights")
        if not pickles:
            raise HeadlightError(f"{path} has no adapter weights (adapter_model.safetensors)")
        weights, safe = pickles[0], False
    rank = config.get("r")
    if rank is not None and not config.get("rank_pattern"):
        for name, shape in shapes.items():
            if _LORA_A.search(name) and (len(shape) < 1 or shape[0] != rank):
                raise HeadlightError(
                    f"adapter weights in {path} do not match adapter_config.json: r = {rank} "
                    f"but {name} has {shape[0] if shape else 0} rows"
                )
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
    own_tokenizer = has_tokenizer(path)
    if own_tokenizer:
        rows = embedding_rows(shapes) or _base_rows(base_path, allow_pickle)
        check_tokenizer_fits(path, rows, f"base model {base_path.name}")
    return AdapterFolder(path, config, weights, safe, base_path, own_tokenizer)


def check_folder(
    folder: str | os.PathLike, base: str | os.PathLike | None = None, allow_pickle: bool = False
) -> None:
    """Every check ``open_model`` makes before it builds anything but the config class's own,
    without importing torch: a model folder, or an adapter folder and its base."""
    path = existing_folder(folder)
    if is_adapter_folder(path):
        model_folder(adapter_folder(path, base, allow_pickle).base, allow_pickle, typed=False)
    elif base is None:
        model_folder(path, allow_pickle, typed=False)


def _base_rows(base: Path, allow_pickle: bool) -> int | None:
    """Rows of the base model's token embedding (its header; else its config's vocab_size)."""
    config = read_config(base)
    weights, safe = weight_files(base, allow_pickle)
    if safe:
        return embedding_rows(_shapes([check_safetensors(w) for w in weights]))
    return config["vocab_size"]
