"""The one text-set reader: ``.txt``, ``.jsonl``, ``.csv``, ``.parquet`` or a saved dataset.

- ``.txt``: one text per line, UTF-8; blank lines are skipped.
- ``.jsonl``: one JSON object per line, ``{"text": ..., "label": ...}`` (label optional).
- ``.csv``: a header row with a ``text`` column and an optional ``label`` column.
- ``.parquet``: a ``text`` column of strings and an optional ``label`` column, streamed by row
  groups with pyarrow.
- a folder written by ``datasets.Dataset.save_to_disk`` (or ``DatasetDict.save_to_disk``, then
  ``split`` names the split), read through ``datasets.load_from_disk`` (memory-mapped Arrow).
  A ``ClassLabel`` label column gives its class names.

``text_column`` / ``label_column`` rename the two columns (fields) for every format but
``.txt``. Labels are compared as strings (``1`` and ``"1"`` are the same label). Blank texts
are skipped everywhere; every other problem is a one-line ``HeadlightError`` naming the file
and the line or row: bytes that are not UTF-8, a JSON line that is not JSON or holds a huge
integer, deep nesting or a lone surrogate (``"\\ud800"``, which no tokenizer can encode).
Everything is read as a stream, so a large set never has to fit in memory.
"""

from __future__ import annotations

import csv
import os
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

from viewer import safejson
from viewer.errors import HeadlightError

ARROW_BATCH = 1024  # rows decoded at a time from Parquet and Arrow

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
    line: int  # 1-based line number in the file (row number for tables)
    unit: str = field(default="line", compare=False)  # "line" or "row"

    @property
    def where(self) -> str:
        return f"{self.unit} {self.line}"


@dataclass(frozen=True)
class TextSource:
    """A text-set file or folder and how to read it (columns, split)."""

    path: Path
    split: str | None = None
    text_column: str | None = None  # None: "text"
    label_column: str | None = None  # None: "label" when there is one

    @property
    def name(self) -> str:
        return self.path.name + (f" ({self.split})" if self.split else "")

    def items(self) -> Iterator[TextItem]:
        return read_text_set(self)

    def key(self) -> dict[str, Any]:
        """What identifies this input for a run folder: its content hash and the read options."""
        from viewer.reports.runfolder import input_digest

        return {
            "sha256": input_digest(self.path),
            "split": self.split,
            "text_column": self.text_column,
            "label_column": self.label_column,
        }


def as_source(source: str | os.PathLike | TextSource) -> TextSource:
    return source if isinstance(source, TextSource) else TextSource(Path(source))


def _lines(path: Path) -> Iterator[tuple[int, str]]:
    """(line number, line) of a UTF-8 file; a line that is not UTF-8 is an error naming it."""
    with path.open("rb") as fh:
        for number, raw in enumerate(fh, start=1):
            try:
                yield number, raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise HeadlightError(
                    f"{path.name} line {number} is not UTF-8 text (byte 0x{raw[exc.start]:02x} at "
                    f"position {exc.start + 1})"
                ) from None


def _label(value: Any) -> str | None:
    return None if value is None or value == "" else str(value)


def read_text_set(source: str | os.PathLike | TextSource) -> Iterator[TextItem]:
    """Yield the texts of a text set in order; raises HeadlightError on bad input."""
    source = as_source(source)
    path = source.path
    if path.is_dir():
        yield from _read_saved_dataset(source)
        return
    if not path.is_file():
        raise HeadlightError(f"text-set file not found: {path}")
    suffix = path.suffix.lower()
    if source.split is not None:
        raise HeadlightError(f"{path.name}: --split is for a folder saved by datasets, not a file")
    text_col = source.text_column or "text"
    label_col = source.label_column or "label"
    if suffix == ".txt":
        if source.text_column or source.label_column:
            raise HeadlightError(f"{path.name}: a .txt text set has no columns (one text a line)")
        for number, line in _lines(path):
            text = line.strip()
            if text:
                yield TextItem(text, None, number)
    elif suffix == ".jsonl":
        yield from _read_jsonl(path, text_col, label_col, source.label_column is not None)
    elif suffix == ".csv":
        lines = (line for _, line in _lines(path))
        reader = csv.DictReader(lines)
        _columns(
            path.name, list(reader.fieldnames or ()), text_col, label_col, source.label_column is not None
        )
        for row in reader:
            text = (row.get(text_col) or "").strip()
            if text:
                yield TextItem(text, _label(row.get(label_col)), reader.line_num)
    elif suffix == ".parquet":
        yield from _read_parquet(source, text_col, label_col)
    else:
        raise HeadlightError(
            f"{path.name}: unknown text-set format {suffix or '(none)'}; use .txt, .jsonl, .csv, "
            ".parquet or a folder saved by datasets"
        )


def _read_jsonl(path: Path, text_col: str, label_col: str, label_given: bool) -> Iterator[TextItem]:
    seen_label = False
    for number, line in _lines(path):
        if not line.strip():
            continue
        obj = safejson.loads(line, f"{path.name} line {number}")
        if not isinstance(obj, dict) or not isinstance(obj.get(text_col), str):
            raise HeadlightError(f'{path.name} line {number}: needs a "{text_col}" string')
        seen_label = seen_label or label_col in obj
        if obj[text_col].strip():
            yield TextItem(obj[text_col], _label(obj.get(label_col)), number)
    if label_given and not seen_label:
        raise HeadlightError(f'{path.name}: no line has a "{label_col}" field')


def _columns(name: str, present: list[str], text_col: str, label_col: str, label_given: bool) -> list[str]:
    if text_col not in present:
        raise HeadlightError(
            f"{name}: no column '{text_col}' (columns: {', '.join(present) or 'none'}); name the "
            "text column with --text-column (in the window: the text column of Open text set)"
        )
    if label_col in present:
        return [text_col, label_col]
    if label_given:
        raise HeadlightError(f"{name}: no column '{label_col}' (columns: {', '.join(present)})")
    return [text_col]


def _table_items(
    name: str, batches: Iterable[list[list[Any]]], text_col: str, label_names: list[str] | None = None
) -> Iterator[TextItem]:
    """Items from column batches ([texts, labels?]); rows are numbered from 1."""
    row = 0
    for columns in batches:
        texts = columns[0]
        labels = columns[1] if len(columns) > 1 else [None] * len(texts)
        for text, label in zip(texts, labels, strict=True):
            row += 1
            if text is None:
                raise HeadlightError(f"{name} row {row}: column '{text_col}' is empty (null)")
            if not isinstance(text, str):
                raise HeadlightError(
                    f"{name} row {row}: column '{text_col}' holds {type(text).__name__}, not text"
                )
            safejson.check_text(text, f"{name} row {row}")
            if label_names is not None and label is not None:
                if label < 0:  # datasets' ClassLabel writes -1 for "no label"
                    label = None
                elif label >= len(label_names):
                    raise HeadlightError(
                        f"{name} row {row}: class {label} is not one of the "
                        f"column's {len(label_names)} class names"
                    )
                else:
                    label = label_names[label]
            if text.strip():
                yield TextItem(text, _label(label), row, unit="row")


def _read_parquet(source: TextSource, text_col: str, label_col: str) -> Iterator[TextItem]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    name = source.path.name
    try:
        pf = pq.ParquetFile(source.path)
    except (pa.ArrowException, OSError) as exc:
        raise HeadlightError(f"{name} is not a readable Parquet file ({exc})") from None
    schema = pf.schema_arrow
    cols = _columns(name, schema.names, text_col, label_col, source.label_column is not None)
    kind = schema.field(text_col).type
    if not (
        pa.types.is_string(kind)
        or pa.types.is_large_string(kind)
        or pa.types.is_dictionary(kind)
        and pa.types.is_string(kind.value_type)
    ):
        raise HeadlightError(f"{name}: column '{text_col}' holds {kind}, not text")
    try:
        batches = (
            [b.column(c).to_pylist() for c in cols]
            for b in pf.iter_batches(batch_size=ARROW_BATCH, columns=cols)
        )
        yield from _table_items(name, batches, text_col)
    except (pa.ArrowException, UnicodeDecodeError) as exc:
        raise HeadlightError(f"{name} cannot be read ({exc})") from None


def _read_saved_dataset(source: TextSource) -> Iterator[TextItem]:
    path = source.path
    if not ((path / "dataset_info.json").is_file() or (path / "dataset_dict.json").is_file()):
        raise HeadlightError(f"{path} is a folder but not one saved by datasets' save_to_disk")
    os.environ.setdefault("HF_DATASETS_OFFLINE", "1")
    import datasets

    datasets.disable_progress_bars()
    try:
        ds = datasets.load_from_disk(str(path))
    except (OSError, ValueError, KeyError) as exc:
        raise HeadlightError(f"{path}: the saved dataset cannot be read ({exc})") from None
    name = path.name
    if isinstance(ds, datasets.DatasetDict):
        splits = list(ds)
        if source.split is None and len(splits) != 1:
            raise HeadlightError(f"{name} holds the splits {', '.join(splits)}; choose one with --split")
        split = source.split or splits[0]
        if split not in ds:
            raise HeadlightError(f"{name} has no split '{split}' (splits: {', '.join(splits)})")
        ds, name = ds[split], f"{name} ({split})"
    elif source.split is not None:
        raise HeadlightError(f"{name} is a single dataset with no splits; leave out --split")
    text_col = source.text_column or "text"
    label_col = source.label_column or "label"
    cols = _columns(name, list(ds.column_names), text_col, label_col, source.label_column is not None)
    feature = ds.features[text_col]
    if getattr(feature, "dtype", None) not in ("string", "large_string"):
        raise HeadlightError(f"{name}: column '{text_col}' holds {feature}, not text")
    names = None
    if len(cols) > 1 and isinstance(ds.features[label_col], datasets.ClassLabel):
        names = list(ds.features[label_col].names)
    ds = ds.select_columns(cols).with_format(None)
    batches = ([b[c] for c in cols] for b in ds.iter(batch_size=ARROW_BATCH))
    yield from _table_items(name, batches, text_col, names)


@dataclass(frozen=True)
class Layout:
    """What a text set offers to read: its columns (fields) and, for a saved ``DatasetDict``,
    its splits (the columns are then the first split's)."""

    columns: tuple[str, ...]
    splits: tuple[str, ...] = ()


def layout_of(path: str | os.PathLike) -> Layout:
    """The columns and splits of a text set, read from its header, first object or schema only
    (a ``.txt`` file has none: one text a line)."""
    path = Path(path)
    if path.is_dir():
        if (path / "dataset_dict.json").is_file():
            dict_info = safejson.load_file(path / "dataset_dict.json", f"{path.name}/dataset_dict.json")
            splits = (
                tuple(str(s) for s in dict_info.get("splits") or ()) if isinstance(dict_info, dict) else ()
            )
            return Layout(layout_of(path / splits[0]).columns if splits else (), splits)
        if not (path / "dataset_info.json").is_file():
            raise HeadlightError(f"{path} is a folder but not one saved by datasets' save_to_disk")
        info = safejson.load_file(path / "dataset_info.json", f"{path.name}/dataset_info.json")
        return Layout(tuple(info.get("features") or ()) if isinstance(info, dict) else ())
    suffix = path.suffix.lower()
    if suffix == ".csv":
        for _, line in _lines(path):
            return Layout(tuple(next(csv.reader([line]), [])))
        return Layout(())
    if suffix == ".jsonl":
        for number, line in _lines(path):
            if line.strip():
                obj = safejson.loads(line, f"{path.name} line {number}")
                return Layout(tuple(obj) if isinstance(obj, dict) else ())
        return Layout(())
    if suffix == ".parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq

        try:
            return Layout(tuple(pq.ParquetFile(path).schema_arrow.names))
        except (pa.ArrowException, OSError) as exc:
            raise HeadlightError(f"{path.name} is not a readable Parquet file ({exc})") from None
    return Layout(())


@dataclass(frozen=True)
class Survey:
    """One streaming pass over a set: its size and the facts label checks need."""

    texts: int
    labelled: int
    first_unlabelled: TextItem | None
    labels: dict[str, TextItem]  # each label with the first item carrying it


def survey(source: str | os.PathLike | TextSource) -> Survey:
    """Count the texts and collect the labels; refuses an empty set."""
    source = as_source(source)
    texts = labelled = 0
    first_unlabelled = None
    labels: dict[str, TextItem] = {}
    for item in read_text_set(source):
        texts += 1
        if item.label is None:
            first_unlabelled = first_unlabelled or item
        else:
            labelled += 1
            labels.setdefault(item.label, item)
    if not texts:
        raise HeadlightError(f"{source.name} holds no texts")
    return Survey(texts, labelled, first_unlabelled, labels)


def load_text_set(source: str | os.PathLike | TextSource, *, need_labels: bool = False) -> list[TextItem]:
    """Read a whole text set into a list; refuses an empty set (and, if asked, missing labels)."""
    source = as_source(source)
    items = list(read_text_set(source))
    if not items:
        raise HeadlightError(f"{source.name} holds no texts")
    if need_labels:
        missing = [i for i in items if i.label is None]
        if missing:
            raise HeadlightError(
                f"{source.name}: this needs a label on every text; {missing[0].where} has none"
            )
    return items
