"""The one text-set reader: ``.txt``, ``.jsonl`` or ``.csv`` files, UTF-8, read as a stream.

- ``.txt``: one text per line; blank lines are skipped.
- ``.jsonl``: one JSON object per line, ``{"text": ..., "label": ...}`` (label optional).
- ``.csv``: a header row with a ``text`` column and an optional ``label`` column.

Files are read line by line, so a large file never has to fit in memory.
"""

from __future__ import annotations

import csv
import json
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TypeVar

from viewer.errors import HeadlightError

FORMATS = (".txt", ".jsonl", ".csv")

Item = TypeVar("Item")


def chunks(items: Iterable[Item], size: int) -> Iterator[list[Item]]:
    """Consecutive lists of at most `size` items, read lazily from a stream."""
    chunk: list[Item] = []
    for item in items:
        chunk.append(item)
        if len(chunk) == size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


@dataclass(frozen=True)
class TextItem:
    text: str
    label: str | None
    line: int  # 1-based line number in the file


def _lines(path: Path) -> Iterator[tuple[int, str]]:
    try:
        with path.open("r", encoding="utf-8", newline="") as fh:
            yield from enumerate(fh, start=1)
    except UnicodeDecodeError as exc:
        raise HeadlightError(
            f"{path.name} is not UTF-8 text (byte {exc.start} of a line cannot be decoded)"
        ) from None


def read_text_set(path: str | Path) -> Iterator[TextItem]:
    """Yield the texts of a text-set file in order; raises HeadlightError on bad input."""
    path = Path(path)
    if not path.is_file():
        raise HeadlightError(f"text-set file not found: {path}")
    suffix = path.suffix.lower()
    if suffix == ".txt":
        for number, line in _lines(path):
            text = line.strip()
            if text:
                yield TextItem(text, None, number)
    elif suffix == ".jsonl":
        for number, line in _lines(path):
            if not line.strip():
                continue
            try:
                obj = json.loads(line)
            except json.JSONDecodeError as exc:
                raise HeadlightError(f"{path.name} line {number}: not valid JSON ({exc.msg})") from None
            if not isinstance(obj, dict) or not isinstance(obj.get("text"), str):
                raise HeadlightError(f"{path.name} line {number}: needs a \"text\" string")
            label = obj.get("label")
            if obj["text"].strip():
                yield TextItem(obj["text"], None if label is None else str(label), number)
    elif suffix == ".csv":
        lines = (line for _, line in _lines(path))
        reader = csv.DictReader(lines)
        if reader.fieldnames is None or "text" not in reader.fieldnames:
            raise HeadlightError(f"{path.name}: the CSV header needs a 'text' column")
        for row in reader:
            text = (row.get("text") or "").strip()
            if text:
                label = row.get("label")
                yield TextItem(text, label if label not in (None, "") else None, reader.line_num)
    else:
        raise HeadlightError(
            f"{path.name}: unknown text-set format {suffix or '(none)'}; use .txt, .jsonl or .csv"
        )


def load_text_set(path: str | Path, *, need_labels: bool = False) -> list[TextItem]:
    """Read a whole text set into a list; refuses an empty set (and, if asked, missing labels)."""
    items = list(read_text_set(path))
    if not items:
        raise HeadlightError(f"{Path(path).name} holds no texts")
    if need_labels:
        missing = [i.line for i in items if i.label is None]
        if missing:
            raise HeadlightError(
                f"{Path(path).name}: this needs a label on every text; line {missing[0]} has none"
            )
    return items
