"""Every folder the loader must refuse: a one-line HeadlightError, CLI exit 2, no traceback."""

from __future__ import annotations

import json
import shutil
import socket
import subprocess
import sys
from pathlib import Path

import pytest

from tests.model import tiny
from viewer.cli import main
from viewer.core.attention import check_recording
from viewer.errors import HeadlightError
from viewer.model.loader import open_model


@pytest.fixture(scope="module")
def good(tmp_path_factory) -> Path:
    return tiny.save(tmp_path_factory.mktemp("good"), "bert")


def copy(good: Path, tmp_path: Path) -> Path:
    target = tmp_path / "m"
    shutil.copytree(good, target)
    return target


def edit_config(folder: Path, **changes) -> None:
    path = folder / "config.json"
    cfg = json.loads(path.read_text())
    cfg.update(changes)
    path.write_text(json.dumps(cfg))


def assert_refused(folder, capsys, match: str, *extra: str) -> None:
    with pytest.raises(HeadlightError, match=match) as info:
        open_model(folder, allow_pickle="--allow-pickle" in extra)
    assert "\n" not in str(info.value)
    capsys.readouterr()
    assert main(["check", str(folder), *extra]) == 2
    err = capsys.readouterr().err
    assert err.startswith("headlight: error: ") and err.count("\n") == 1
    assert "Traceback" not in err


def test_missing_folder(tmp_path, capsys):
    assert_refused(tmp_path / "nowhere", capsys, "not found")


def test_hub_like_name_is_not_looked_up(capsys):
    assert_refused("some-org/some-model", capsys, "local folders only")


def test_missing_config(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    (folder / "config.json").unlink()
    assert_refused(folder, capsys, "no config.json")


def test_invalid_config(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    (folder / "config.json").write_text("{ not json")
    assert_refused(folder, capsys, "not valid JSON")


def test_unsupported_architecture_names_the_supported(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    edit_config(folder, model_type="reformer")
    assert_refused(folder, capsys, r"unsupported architecture.*BERT.*DeBERTa.*GPT-2.*Llama.*Qwen3")


@pytest.mark.parametrize(
    ("model_type", "feature"), [("t5", "cross-attention"), ("bloom", "ALiBi"), ("mpt", "ALiBi")]
)
def test_unmodelled_attention_is_named(good, tmp_path, capsys, model_type, feature):
    folder = copy(good, tmp_path)
    edit_config(folder, model_type=model_type)
    assert_refused(folder, capsys, feature)


def test_remote_code_is_always_refused(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    edit_config(folder, auto_map={"AutoModel": "modeling_evil.EvilModel"})
    (folder / "modeling_evil.py").write_text("raise SystemExit('ran remote code')\n")
    assert_refused(folder, capsys, "remote code")


def test_pickle_only_needs_opt_in(tmp_path, capsys):
    folder = tiny.save(tmp_path / "p", "bert", safe=False)
    assert_refused(folder, capsys, "--allow-pickle")
    loaded = open_model(folder, allow_pickle=True)  # opt-in: loaded with weights_only=True
    assert check_recording(loaded.record("the chain")).passed


def test_pickle_opt_in_still_refuses_code(tmp_path, capsys):
    """weights_only=True refuses a pickle that would build arbitrary objects (reference: torch)."""
    folder = tiny.save(tmp_path / "p", "bert", safe=False)
    import torch

    class Evil:
        def __reduce__(self):
            return (print, ("pickle code ran",))

    torch.save({"x": Evil()}, folder / "pytorch_model.bin")
    with pytest.raises(HeadlightError):
        open_model(folder, allow_pickle=True)
    assert "pickle code ran" not in capsys.readouterr().out


def test_missing_tokenizer(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    for name in ("tokenizer.json", "tokenizer_config.json"):
        (folder / name).unlink()
    assert_refused(folder, capsys, "no tokenizer")


def test_truncated_safetensors(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    weights = folder / "model.safetensors"
    data = weights.read_bytes()
    weights.write_bytes(data[: len(data) - 1000])
    assert_refused(folder, capsys, "truncated or corrupt")


def test_corrupt_safetensors_header(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    weights = folder / "model.safetensors"
    data = bytearray(weights.read_bytes())
    data[8:16] = b"\xff\xfe garbage"[:8]
    weights.write_bytes(bytes(data))
    assert_refused(folder, capsys, "not a valid safetensors")


def test_shapes_that_do_not_match_the_config(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    edit_config(folder, intermediate_size=40)
    assert_refused(folder, capsys, "do not (fit|match) config.json")


def test_relative_position_scores_are_refused(good, tmp_path, capsys):
    folder = copy(good, tmp_path)
    edit_config(folder, position_embedding_type="relative_key")
    assert_refused(folder, capsys, "relative-position")


def test_deberta_p2p_term_is_refused(tmp_path, capsys):
    folder = tiny.save(tmp_path / "d", "deberta-v2")
    edit_config(folder, pos_att_type=["c2p", "p2c", "p2p"])
    assert_refused(folder, capsys, "p2p")


def test_bidirectional_gemma_is_refused(tmp_path, capsys):
    folder = tiny.save(tmp_path / "g", "gemma2")
    edit_config(folder, use_bidirectional_attention=True)
    assert_refused(folder, capsys, "use_bidirectional_attention")


def test_long_text_is_truncated_with_a_notice(good):
    loaded = open_model(good)
    rec = loaded.record(" ".join(["chain"] * 200))
    assert rec.n_tokens == loaded.max_tokens == 64
    assert rec.truncated and rec.truncated_from == 202
    assert any("cut from 202 to 64 tokens" in n for n in rec.notes)
    assert check_recording(rec).passed


def test_no_network_needed(good, monkeypatch):
    """With every socket connection made to fail, opening and recording still work."""

    def refuse(*args, **kwargs):
        raise OSError("network disabled by the test")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket.socket, "connect_ex", refuse)
    monkeypatch.setattr(socket, "create_connection", refuse)
    monkeypatch.setattr(socket, "getaddrinfo", refuse)
    loaded = open_model(good)
    assert check_recording(loaded.record("the member paid the invoice")).passed


def test_cli_exit_codes_in_a_real_process(good, tmp_path):
    """The installed entry point (the ``headlight`` script pip wrote next to this Python): exit 0
    and JSON on success; exit 2 and one line on a bad call, answered before any heavy import
    (in-process tests cover every other bad input: ``main`` returns 2 for each)."""
    script = Path(sys.executable).with_name("headlight")
    out = tmp_path / "check.json"
    ok = subprocess.run(
        [str(script), "check", str(good), "--text", "the mechanic", "--json", str(out), "--workers", "1"],
        capture_output=True,
        text=True,
    )
    assert ok.returncode == 0, ok.stderr
    data = json.loads(out.read_text())
    assert data["passed"] is True and data["max_abs_error"] <= 1e-5
    assert [row["layer"] for row in data["layers"]] == [0, 1]
    bad = subprocess.run(
        [str(script), "check", str(good), "--tolerance", "small"], capture_output=True, text=True
    )
    assert bad.returncode == 2
    assert bad.stderr.count("\n") == 1 and "Traceback" not in bad.stderr and "--tolerance" in bad.stderr


def test_check_fails_with_exit_1_below_the_error(good, capsys):
    """A tolerance below the float32 rounding error must fail: exit status 1."""
    assert main(["check", str(good), "--tolerance", "1e-12"]) == 1
    assert "FAILED" in capsys.readouterr().out
