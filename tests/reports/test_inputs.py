"""Text sets from Parquet and from saved datasets, column options, and their one-line errors.

References: files written by pyarrow (``pyarrow.parquet.write_table``) and folders written by
``datasets.Dataset.save_to_disk`` / ``DatasetDict.save_to_disk`` must read back the texts and
labels of the ``.jsonl`` they were made from, in order.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import datasets
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from viewer.cli import main
from viewer.demo import MODEL_DIR
from viewer.errors import HeadlightError
from viewer.reports.textsets import TextSource, load_text_set, read_text_set, survey

SAMPLES = Path(__file__).resolve().parents[2] / "sample_sentences"


@pytest.fixture(scope="module")
def jsonl():
    items = load_text_set(SAMPLES / "coop_messages.jsonl")
    return [(i.text, i.label) for i in items]


def pairs(source) -> list[tuple[str, str | None]]:
    return [(i.text, i.label) for i in read_text_set(source)]


def test_parquet_written_by_pyarrow_reads_back_as_the_jsonl(jsonl, tmp_path):
    table = pa.table(
        {"id": list(range(len(jsonl))), "text": [t for t, _ in jsonl], "label": [y for _, y in jsonl]}
    )
    path = tmp_path / "set.parquet"
    pq.write_table(table, path, row_group_size=25)  # several row groups, streamed one by one
    assert pq.ParquetFile(path).num_row_groups == 5
    assert pairs(path) == jsonl
    first = next(read_text_set(path))
    assert first.where == "row 1"


def test_saved_datasets_read_back_as_the_jsonl(jsonl, tmp_path):
    import datasets

    texts, labels = [t for t, _ in jsonl], [y for _, y in jsonl]
    datasets.Dataset.from_dict({"text": texts, "label": labels}).save_to_disk(tmp_path / "one")
    assert pairs(tmp_path / "one") == jsonl
    names = ["repair", "billing", "membership"]
    features = datasets.Features({"body": datasets.Value("string"), "y": datasets.ClassLabel(names=names)})
    coded = datasets.Dataset.from_dict(
        {"body": texts, "y": [names.index(y) for y in labels]}, features=features
    )
    datasets.DatasetDict({"train": coded.select(range(10)), "test": coded}).save_to_disk(tmp_path / "dict")
    source = TextSource(tmp_path / "dict", split="test", text_column="body", label_column="y")
    assert pairs(source) == jsonl  # ClassLabel numbers come back as the class names
    with pytest.raises(HeadlightError, match="splits train, test; choose one with --split"):
        pairs(TextSource(tmp_path / "dict", text_column="body"))
    with pytest.raises(HeadlightError, match="no split 'dev'"):
        pairs(TextSource(tmp_path / "dict", split="dev", text_column="body"))


def test_column_options_for_csv_and_jsonl(jsonl, tmp_path):
    with (tmp_path / "s.csv").open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["message", "route"])
        w.writerows(jsonl)
    assert pairs(TextSource(tmp_path / "s.csv", text_column="message", label_column="route")) == jsonl
    (tmp_path / "s.jsonl").write_text(
        "".join(json.dumps({"message": t, "route": y}) + "\n" for t, y in jsonl), encoding="utf-8"
    )
    assert pairs(TextSource(tmp_path / "s.jsonl", text_column="message", label_column="route")) == jsonl


@pytest.mark.parametrize(
    "case, expect",
    [
        ("missing-column", "no column 'text' (columns: body, label)"),
        ("missing-label-column", "no column 'gold'"),
        ("int-texts", "column 'text' holds int64, not text"),
        ("null-text", "row 2: column 'text' is empty (null)"),
        ("empty", "holds no texts"),
        ("not-parquet", "is not a readable Parquet file"),
        ("plain-folder", "not one saved by datasets"),
        ("txt-columns", "a .txt text set has no columns"),
    ],
)
def test_bad_tables_are_one_line_errors(case, expect, tmp_path):
    path = tmp_path / "t.parquet"
    kwargs = {}
    if case == "missing-column":
        pq.write_table(pa.table({"body": ["a"], "label": ["x"]}), path)
    elif case == "missing-label-column":
        pq.write_table(pa.table({"text": ["a"]}), path)
        kwargs = {"label_column": "gold"}
    elif case == "int-texts":
        pq.write_table(pa.table({"text": [1, 2]}), path)
    elif case == "null-text":
        pq.write_table(pa.table({"text": ["a", None]}), path)
    elif case == "empty":
        pq.write_table(pa.table({"text": pa.array(["  "], pa.string())}), path)
    elif case == "not-parquet":
        path.write_bytes(b"not parquet at all")
    elif case == "plain-folder":
        path = tmp_path / "folder"
        path.mkdir()
    else:
        path = tmp_path / "t.txt"
        path.write_text("a\n")
        kwargs = {"text_column": "body"}
    with pytest.raises(HeadlightError, match=expect.replace("(", r"\(").replace(")", r"\)")):
        survey(TextSource(path, **kwargs))


def test_the_commands_read_parquet_as_the_jsonl(tmp_path, capsys):
    """`headlight shortcuts` and `heads` on a Parquet file print what they print on the jsonl;
    a label the model does not know is a one-line error naming the row."""
    rows = [
        json.loads(line) for line in (SAMPLES / "coop_messages.jsonl").read_text("utf-8").splitlines()[:24]
    ]
    jsonl = tmp_path / "s.jsonl"
    jsonl.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    parquet = tmp_path / "s.parquet"
    pq.write_table(
        pa.table({"text": [r["text"] for r in rows], "label": [r["label"] for r in rows]}), parquet
    )
    out = {}
    for name, path in (("jsonl", jsonl), ("parquet", parquet)):
        for cmd in ("shortcuts", "heads"):
            target = tmp_path / f"{cmd}-{name}.json"
            assert (
                main(
                    [
                        cmd,
                        str(MODEL_DIR),
                        "--texts",
                        str(path),
                        "--workers",
                        "1",
                        "--quiet",
                        "--json",
                        str(target),
                    ]
                )
                == 0
            )
            out[cmd, name] = json.loads(target.read_text())
    for cmd in ("shortcuts", "heads"):
        assert out[cmd, "jsonl"] == out[cmd, "parquet"], cmd
    bad = tmp_path / "bad.parquet"
    pq.write_table(pa.table({"text": ["a", "b"], "label": ["repair", "refund"]}), bad)
    capsys.readouterr()
    assert main(["heads", str(MODEL_DIR), "--texts", str(bad), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["headlight: error: row 2: label 'refund' is not one of repair, billing, membership"]


def test_the_columns_and_splits_a_text_set_offers(jsonl, tmp_path):
    """Reference: the files as the standard library (csv, json), pyarrow and datasets wrote them."""
    from viewer.reports.textsets import layout_of

    with (tmp_path / "s.csv").open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["message", "route, as given"])
        w.writerows(jsonl)
    assert layout_of(tmp_path / "s.csv").columns == ("message", "route, as given")
    (tmp_path / "s.jsonl").write_text(
        "\n" + "".join(json.dumps({"message": t, "route": y}) + "\n" for t, y in jsonl), encoding="utf-8"
    )
    assert layout_of(tmp_path / "s.jsonl").columns == ("message", "route")
    pq.write_table(pa.table({"body": ["a"], "gold": ["x"]}), tmp_path / "t.parquet")
    assert layout_of(tmp_path / "t.parquet").columns == ("body", "gold")
    (tmp_path / "t.txt").write_text("one\ntwo\n", encoding="utf-8")
    assert layout_of(tmp_path / "t.txt").columns == ()
    one = datasets.Dataset.from_dict({"body": ["a", "b"], "y": [0, 1]})
    one.save_to_disk(str(tmp_path / "one"))
    assert layout_of(tmp_path / "one") == type(layout_of(tmp_path / "one"))(("body", "y"), ())
    datasets.DatasetDict({"train": one, "test": one}).save_to_disk(str(tmp_path / "two"))
    got = layout_of(tmp_path / "two")
    assert got.splits == ("train", "test") and got.columns == ("body", "y")


def test_the_csv_error_says_how_to_name_another_column(jsonl, tmp_path):
    with (tmp_path / "s.csv").open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["message", "route"])
        w.writerows(jsonl)
    with pytest.raises(HeadlightError) as caught:
        list(read_text_set(tmp_path / "s.csv"))
    message = str(caught.value)
    assert "\n" not in message
    assert "no column 'text' (columns: message, route)" in message
    assert "--text-column" in message and "Open text set" in message
