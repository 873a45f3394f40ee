"""Crafted model folders: a tiny good checkpoint with one thing made hostile or broken.

``CASES`` maps a case name to a function that spoils a copy of the tiny BERT classifier of
``tests.model.tiny`` (2 layers, 4 heads, hidden 32, vocabulary 200, 3 labels). The folder
tests and ``tests/benchmarks/bench_crafted.py`` run every case through ``headlight check``.
"""

from __future__ import annotations

import json
import shutil
import struct
from collections.abc import Callable
from pathlib import Path
from typing import Any

WEIGHTS = "model.safetensors"
EMBEDDING = "bert.embeddings.word_embeddings.weight"  # (200, 32) float32


def edit_config(folder: Path, **changes: Any) -> None:
    path = folder / "config.json"
    cfg = json.loads(path.read_text())
    cfg.update(changes)
    path.write_text(json.dumps(cfg))


def write_config_text(folder: Path, text: str) -> None:
    (folder / "config.json").write_text(text)


def read_header(path: Path) -> tuple[dict, bytes]:
    data = path.read_bytes()
    (n,) = struct.unpack("<Q", data[:8])
    return json.loads(data[8 : 8 + n]), data[8 + n :]


def write_header(path: Path, header: Any, body: bytes, raw: bytes | None = None) -> None:
    text = raw if raw is not None else json.dumps(header).encode("utf-8")
    path.write_bytes(struct.pack("<Q", len(text)) + text + body)


def edit_header(folder: Path, fn: Callable[[dict], None]) -> None:
    path = folder / WEIGHTS
    header, body = read_header(path)
    fn(header)
    write_header(path, header, body)


def _set(name: str, field: str, value: Any) -> Callable[[dict], None]:
    def fn(header: dict) -> None:
        header[name][field] = value

    return fn


def _tokenizer_with_id(folder: Path, new_id: int) -> None:
    path = folder / "tokenizer.json"
    tok = json.loads(path.read_text())
    tok["added_tokens"].append(
        {
            "id": new_id,
            "content": "[FOOTER]",
            "single_word": False,
            "lstrip": False,
            "rstrip": False,
            "normalized": False,
            "special": True,
        }
    )
    path.write_text(json.dumps(tok))


DEEP = "[" * 100_000 + "]" * 100_000
HUGE = "9" * 5000


def _config_with(raw: str) -> Callable[[Path], None]:
    def fn(folder: Path) -> None:
        text = (folder / "config.json").read_text()
        write_config_text(folder, text.rstrip().rstrip("}") + f', "extra": {raw}}}')

    return fn


def _header_with(raw: str) -> Callable[[Path], None]:
    def fn(folder: Path) -> None:
        path = folder / WEIGHTS
        header, body = read_header(path)
        text = json.dumps(header)
        write_header(path, None, body, raw=(text[:-1] + f', "__x": {raw}}}').encode())

    return fn


# the cases that allocate gigabytes when the config is believed
HEAVY = (
    "labels 100000000",
    "layers 1000000",
    "intermediate 10**8",
    "intermediate 2**20 (header 48)",
    "vocabulary 4000000 (header 200)",
    "layers 1000 (header 2)",
)

CASES: dict[str, Callable[[Path], None]] = {
    # config sizes: types, signs, bounds, divisibility
    "heads 0": lambda f: edit_config(f, num_attention_heads=0),
    "heads -4": lambda f: edit_config(f, num_attention_heads=-4),
    "heads 3 (do not divide hidden 32)": lambda f: edit_config(f, num_attention_heads=3),
    "hidden 'abc'": lambda f: edit_config(f, hidden_size="abc"),
    "hidden 128.5": lambda f: edit_config(f, hidden_size=128.5),
    "hidden true": lambda f: edit_config(f, hidden_size=True),
    "hidden 64 (header 32)": lambda f: edit_config(f, hidden_size=64),
    "layers 1e6 (float)": lambda f: edit_config(f, num_hidden_layers=1e6),
    "layers 1000000": lambda f: edit_config(f, num_hidden_layers=1_000_000),
    "layers 3 (header 2)": lambda f: edit_config(f, num_hidden_layers=3),
    "layers null": lambda f: edit_config(f, num_hidden_layers=None),
    "labels 1e8 (float)": lambda f: edit_config(f, num_labels=1e8, id2label=None, label2id=None),
    "labels 100000000": lambda f: edit_config(f, num_labels=100_000_000, id2label=None, label2id=None),
    "labels 5 (header 3)": lambda f: edit_config(
        f, id2label={str(i): f"c{i}" for i in range(5)}, label2id={f"c{i}": i for i in range(5)}
    ),
    "id2label key 'x'": lambda f: edit_config(f, id2label={"x": "repair"}, label2id={"repair": 0}),
    "vocabulary 10**9": lambda f: edit_config(f, vocab_size=10**9),
    "vocabulary 300 (header 200)": lambda f: edit_config(f, vocab_size=300),
    "intermediate 10**8": lambda f: edit_config(f, intermediate_size=10**8),
    # within the sanity bounds, so only the weight file can tell: these allocate before a check
    "intermediate 2**20 (header 48)": lambda f: edit_config(f, intermediate_size=2**20),
    "vocabulary 4000000 (header 200)": lambda f: edit_config(f, vocab_size=4_000_000),
    "layers 1000 (header 2)": lambda f: edit_config(f, num_hidden_layers=1000),
    "labels 60000 (header 3)": lambda f: edit_config(f, num_labels=60_000, id2label=None, label2id=None),
    "positions 10**9": lambda f: edit_config(f, max_position_embeddings=10**9),
    "positions 1000 (header 64)": lambda f: edit_config(f, max_position_embeddings=1000),
    "token types 10**6": lambda f: edit_config(f, type_vocab_size=10**6),
    "pad id 500 (vocabulary 200)": lambda f: edit_config(f, pad_token_id=500),
    "architectures [5]": lambda f: edit_config(f, architectures=[5]),
    "architectures a string": lambda f: edit_config(f, architectures="BertForSequenceClassification"),
    "model_type 5": lambda f: edit_config(f, model_type=5),
    "config a list": lambda f: write_config_text(f, "[1, 2]"),
    "config 5000-digit integer": _config_with(HUGE),
    "config 100k-deep nesting": _config_with(DEEP),
    # safetensors header: dtypes, shapes and offsets against the file size
    "header shape lies (more elements)": lambda f: edit_header(f, _set(EMBEDDING, "shape", [400, 32])),
    "header shape lies (same bytes)": lambda f: edit_header(f, _set(EMBEDDING, "shape", [100, 64])),
    "header dtype lies (F64)": lambda f: edit_header(f, _set(EMBEDDING, "dtype", "F64")),
    "header dtype unknown": lambda f: edit_header(f, _set(EMBEDDING, "dtype", "Q7")),
    "header negative shape": lambda f: edit_header(f, _set(EMBEDDING, "shape", [-200, -32])),
    "header shape of strings": lambda f: edit_header(f, _set(EMBEDDING, "shape", ["200", "32"])),
    "header offsets as strings": lambda f: edit_header(f, _set(EMBEDDING, "data_offsets", ["0", "25600"])),
    "header offsets overlap": lambda f: edit_header(f, _set(EMBEDDING, "data_offsets", [0, 25600])),
    "header embedding renamed": lambda f: edit_header(f, lambda h: h.update(x=h.pop(EMBEDDING))),
    "header 5000-digit integer": _header_with(HUGE),
    "header 100k-deep nesting": _header_with(DEEP),
    # tokenizer
    "tokenizer id 500 (vocabulary 200)": lambda f: _tokenizer_with_id(f, 500),
    "tokenizer.json garbage": lambda f: (f / "tokenizer.json").write_text('{"model": [[[['),
    "tokenizer_config 5000-digit integer": lambda f: (f / "tokenizer_config.json").write_text(
        '{"model_max_length": ' + HUGE + "}"
    ),
    "tokenizer_config 100k-deep nesting": lambda f: (f / "tokenizer_config.json").write_text(
        '{"x": ' + DEEP + "}"
    ),
}


def make(good: Path, target: Path, case: str) -> Path:
    """A copy of ``good`` at ``target`` spoiled by ``case``."""
    shutil.copytree(good, target)
    CASES[case](target)
    return target
