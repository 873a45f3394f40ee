"""Text the tokenizer cannot take, and ``--json`` outputs, through the ``headlight`` command.

Every bad input ends in exit status 2 and one line on stderr naming what is wrong (and where:
the line of a file), before a model is opened or a set is computed. References: Python's own
UTF-8 codec (a lone surrogate has no UTF-8 form; ``surrogateescape`` is how a command-line byte
that is not UTF-8 arrives in ``sys.argv``), and the files on disk before and after.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.model import tiny
from viewer.cli import main
from viewer.demo import MODEL_DIR
from viewer.errors import HeadlightError
from viewer.reports.textsets import survey

SET = [("the mechanic trued the wheel", "repair"), ("the invoice for the brake pads", "billing")] * 2


FLAGS = {"check": ["--workers", "1"], "evidence": []}


def run(capsys, *argv: str) -> tuple[int, str]:
    capsys.readouterr()
    status = main([*argv, *FLAGS.get(argv[0], ["--workers", "1", "--quiet"])])
    return status, capsys.readouterr().err


def assert_refused(status: int, err: str, *words: str) -> None:
    assert status == 2, err
    assert err.startswith("headlight: error: ") and err.count("\n") == 1 and "Traceback" not in err, err
    for word in words:
        assert word in err, err


@pytest.fixture
def no_model(monkeypatch):
    """Fail the test if a model is opened (the refusal must come before)."""
    import viewer.model.loader as loader

    def refuse(*args, **kwargs):
        raise AssertionError("a model was opened before the input was refused")

    monkeypatch.setattr(loader, "open_model", refuse)


def jsonl(path: Path, rows: list[str]) -> Path:
    path.write_text("".join(r + "\n" for r in rows), encoding="utf-8")
    return path


# -- text that is not Unicode ----------------------------------------------------------------------


@pytest.mark.parametrize(
    "line, words",
    [
        (r'{"text": "portal \ud800 repair"}', ["line 2", "lone surrogate", "U+D800"]),
        (r'{"text": "fine", "label": "\udfff"}', ["line 2", "lone surrogate"]),
        ('{"text": "x", "label": ' + "9" * 5000 + "}", ["line 2", "5000 digits"]),
        ('{"text": "x", "n": ' + "[" * 50_000 + "]" * 50_000 + "}", ["line 2", "nested too deeply"]),
    ],
)
def test_a_jsonl_line_the_tokenizer_cannot_take_is_named(tmp_path, capsys, no_model, line, words):
    path = jsonl(tmp_path / "t.jsonl", ['{"text": "the chain"}', line, '{"text": "the wheel"}'])
    with pytest.raises(HeadlightError) as info:
        survey(path)
    assert all(w in str(info.value) for w in words), info.value
    for command in ("shortcuts", "heads"):
        assert_refused(*run(capsys, command, str(MODEL_DIR), "--texts", str(path)), "t.jsonl line 2")
    assert_refused(*run(capsys, "check", str(MODEL_DIR), "--texts", str(path)), "t.jsonl line 2")


def test_a_line_that_is_not_utf8_is_named(tmp_path, capsys, no_model):
    path = tmp_path / "t.txt"
    path.write_bytes(b"the chain\nthe wheel\nthe \xff brake\n")
    assert_refused(*run(capsys, "heads", str(MODEL_DIR), "--texts", str(path)), "t.txt line 3", "UTF-8")


def test_a_link_pair_with_a_lone_surrogate_is_named(tmp_path, capsys, no_model):
    good = '{"text": "she fixed it", "source": "she", "target": "it", "distractors": ["fixed"]}'
    path = jsonl(tmp_path / "p.jsonl", [good, good.replace("fixed it", r"fixed \ud834 it")])
    assert_refused(*run(capsys, "links", str(MODEL_DIR), "--pairs", str(path)), "line 2", "lone surrogate")


@pytest.mark.parametrize("command", ["check", "evidence"])
def test_a_text_argument_that_is_not_unicode_or_empty_is_refused(capsys, no_model, command):
    # "\udcff" is how the byte 0xff of a command-line argument arrives (surrogateescape)
    for text, words in (("the \udcff chain", ["--text", "lone surrogate"]), ("", ["--text", "empty"])):
        assert_refused(*run(capsys, command, str(MODEL_DIR), "--text", text), *words)
    assert_refused(*run(capsys, command, str(MODEL_DIR), "--text", "   "), "empty")


def test_a_word_to_insert_that_is_not_unicode_is_refused(tmp_path, capsys, no_model):
    texts = jsonl(tmp_path / "t.jsonl", [json.dumps({"text": t}) for t, _ in SET])
    status, err = run(capsys, "insert", str(MODEL_DIR), "--texts", str(texts), "--word", "\ud800")
    assert_refused(status, err, "--word", "lone surrogate")


# -- --json ----------------------------------------------------------------------------------------


@pytest.fixture
def texts(tmp_path) -> Path:
    return jsonl(tmp_path / "t.jsonl", [json.dumps({"text": t, "label": y}) for t, y in SET])


def test_json_never_writes_over_an_input(tmp_path, texts, capsys, no_model):
    before = texts.read_bytes()
    for command in ("heads", "shortcuts", "check"):
        status, err = run(capsys, command, str(MODEL_DIR), "--texts", str(texts), "--json", str(texts))
        assert_refused(status, err, "--json", "input")
    pairs = tmp_path / "p.jsonl"
    pairs.write_text('{"text": "she fixed it", "source": "she", "target": "it", "distractors": ["fixed"]}\n')
    status, err = run(capsys, "links", str(MODEL_DIR), "--pairs", str(pairs), "--json", str(pairs))
    assert_refused(status, err, "--json")
    status, err = run(capsys, "check", str(MODEL_DIR), "--json", str(MODEL_DIR / "config.json"))
    assert_refused(status, err, "--json", "folder this command uses")
    assert texts.read_bytes() == before


def test_json_into_an_adapters_base_folder_is_refused(tmp_path, capsys):
    """The base of an adapter is an input too, though only the adapter folder is named."""
    from tests.model.test_adapters import make_adapter

    base, adapter = make_adapter(tmp_path, "bert")
    status, err = run(capsys, "check", str(adapter), "--json", str(base / "check.json"))
    assert_refused(status, err, "--json", str(base))
    assert not (base / "check.json").exists()


def test_json_folder_is_checked_before_the_work(tmp_path, texts, capsys, no_model):
    missing = tmp_path / "no" / "such" / "out.json"
    for argv in (
        ["heads", str(MODEL_DIR), "--texts", str(texts)],
        ["check", str(MODEL_DIR)],
        ["evidence", str(MODEL_DIR), "--text", "the chain"],
        ["card", str(MODEL_DIR), "--texts", str(texts), "--out", str(tmp_path / "card")],
    ):
        assert_refused(*run(capsys, *argv, "--json", str(missing)), "does not exist")
        assert_refused(*run(capsys, *argv, "--json", str(tmp_path)), "is a folder")
    assert not (tmp_path / "card").exists()


def test_card_json_writes_the_numbers_of_card_json(tmp_path, texts, capsys):
    model = tiny.save(tmp_path / "model", "bert")
    out, numbers = tmp_path / "card", tmp_path / "numbers.json"
    status, err = run(
        capsys, "card", str(model), "--texts", str(texts), "--out", str(out), "--json", str(numbers)
    )
    assert status == 0, err
    assert numbers.read_bytes() == (out / "card.json").read_bytes()
    assert json.loads(numbers.read_text())["heads"]["texts"] == len(SET)


# -- small things a new user meets first -------------------------------------------------------------


def test_demo_names_the_embedded_model_in_every_command(capsys):
    """``demo`` as the folder of any command is the embedded model, as the window's default is."""
    capsys.readouterr()
    assert main(["check", "demo", "--workers", "1"]) == 0
    out = capsys.readouterr().out
    assert "passed" in out
    status = main(["evidence", "demo", "--text", "the chain slips [via portal]", "--steps", "4"])
    assert status == 0 and "billing" in capsys.readouterr().out


def test_shortcuts_on_a_set_too_small_to_rank_says_why(tmp_path, capsys):
    texts = jsonl(tmp_path / "t.jsonl", [json.dumps({"text": t}) for t, _ in SET[:2]])
    capsys.readouterr()
    assert main(["shortcuts", str(MODEL_DIR), "--texts", str(texts), "--workers", "1", "--quiet"]) == 0
    out = capsys.readouterr().out
    for title in ("words", "two-word phrases"):
        assert f"shortcut search, {title}: none is seen in 3 or more of the 2 texts" in out, out
    assert "strongest first" not in out  # no empty table under a heading


def test_a_model_without_a_task_head_is_named_in_plain_words(tmp_path, capsys):
    bare = tiny.save(tmp_path / "bare", "bert-bare")
    status, err = run(capsys, "insert", str(bare), "--texts", str(tmp_path / "none.txt"), "--word", "x")
    assert status == 2
    (tmp_path / "t.txt").write_text("the chain\nthe wheel\n", encoding="utf-8")
    status, err = run(capsys, "insert", str(bare), "--texts", str(tmp_path / "t.txt"), "--word", "x")
    assert_refused(status, err, "has no task head (a bare encoder)")
    assert "a encoder" not in err


def test_a_config_that_is_not_utf8_names_the_line(tmp_path, capsys, no_model):
    """Where a file's bytes are not UTF-8 the message names the line, as for a text set."""
    folder = tmp_path / "m"
    folder.mkdir()
    (folder / "config.json").write_bytes(b'{\n  "model_type": "bert",\n  "name": "caf\xe9"\n}\n')
    assert_refused(*run(capsys, "check", str(folder)), "config.json", "line 3", "byte 0xe9")
