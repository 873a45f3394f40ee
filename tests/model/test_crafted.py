"""Hostile and broken model folders: refused in one line, before any model is built.

Every case of ``tests/model/crafted.py`` (sizes of the wrong type, sign or magnitude, a config
that disagrees with the safetensors header, headers whose dtypes, shapes or offsets disagree
with the file size, JSON with huge integers or deep nesting, tokenizer ids beyond the
embedding) must end in a ``HeadlightError`` from ``open_model`` and exit status 2 with one line
on stderr from ``headlight check``. The references: the safetensors format (8-byte length,
JSON header, data bytes tiled by ``data_offsets``), transformers' own config classes (the
sizes they turn into tensors) and the kernel's accounting of a process's peak memory.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.model import crafted, tiny
from viewer.cli import main
from viewer.errors import HeadlightError
from viewer.model.loader import open_model

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def good(tmp_path_factory) -> Path:
    return tiny.save(tmp_path_factory.mktemp("good"), "bert")


def run_check(folder: Path) -> tuple[int, str]:
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        status = main(["check", str(folder), "--workers", "1"])
    return status, err.getvalue()


@pytest.mark.parametrize("case", list(crafted.CASES))
def test_every_crafted_folder_is_refused_in_one_line(good, tmp_path, case):
    folder = crafted.make(good, tmp_path / "m", case)
    with pytest.raises(HeadlightError) as info:  # the window's path: the loader itself
        open_model(folder)
    assert "\n" not in str(info.value)
    status, err = run_check(folder)
    assert status == 2, err
    assert err.startswith("headlight: error: ") and err.count("\n") == 1, err
    assert "Traceback" not in err


def test_the_good_folder_and_real_checkpoints_still_open(good, minilm_dir):
    """No false refusal: the tiny folder, the demo model and the real MiniLM checkpoint."""
    from viewer.demo import MODEL_DIR
    from viewer.model.folders import check_folder

    for folder in (good, MODEL_DIR, minilm_dir):
        check_folder(folder)
    assert run_check(good)[0] == 0


PEAK = """
import resource, sys
from viewer.errors import HeadlightError
from viewer.model.loader import open_model
open_model(sys.argv[1]).record("the mechanic trued the wheel")
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
for folder in sys.argv[2:]:
    try:
        open_model(folder)
    except HeadlightError:
        pass
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""


def test_refusals_allocate_no_more_than_opening_the_good_folder(good, tmp_path):
    """The configs that ask for gigabytes (10⁸ labels, 10⁶ layers, a 2²⁰-wide feed-forward
    layer, a 4·10⁶-token vocabulary) are refused before transformers allocates anything: after
    opening and running the good folder, refusing all of them raises the process's peak
    resident memory (the kernel's ru_maxrss, in a fresh process) by less than 20 MB."""
    spoiled = [crafted.make(good, tmp_path / f"c{n}", case) for n, case in enumerate(crafted.HEAVY)]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    out = subprocess.run(
        [sys.executable, "-c", PEAK, str(good), *map(str, spoiled)],
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert out.returncode == 0, out.stderr[-2000:]
    good_kb, after_kb = map(int, out.stdout.split()[-2:])
    assert after_kb - good_kb < 20_000, (good_kb, after_kb)


MUTANT_VALUES = st.one_of(
    st.integers(min_value=-2, max_value=300),  # plausible values first: most open and run
    st.floats(min_value=0.0, max_value=1.0),
    st.integers(min_value=-(2**70), max_value=2**70),
    st.sampled_from([0, -1, 1, 3, 7, 64, 2**16, 2**24, 2**31, 2**63, 10**30]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=6),
    st.booleans(),
    st.none(),
    st.lists(st.integers(min_value=-3, max_value=300), max_size=3),
    st.dictionaries(st.text(max_size=3), st.integers(min_value=-3, max_value=3), max_size=2),
)
EXTRA_KEYS = ["num_labels", "head_dim", "embedding_size", "num_key_value_heads", "n_inner", "architectures"]
HEADER_VALUES = {
    "dtype": st.one_of(
        st.sampled_from(["F32", "F16", "BF16", "F64", "I64", "U8", "BOOL", "Q7"]), MUTANT_VALUES
    ),
    "shape": st.one_of(st.lists(st.integers(min_value=-5, max_value=500), max_size=3), MUTANT_VALUES),
    "data_offsets": st.one_of(
        st.lists(st.integers(min_value=-5, max_value=60_000), max_size=3), MUTANT_VALUES
    ),
}


def spoil(good: Path, scratch: Path, changes: dict, header_changes: list) -> Path:
    folder = scratch / "m"
    shutil.copytree(good, folder)
    if changes:
        crafted.edit_config(folder, **changes)
    if header_changes:
        header, body = crafted.read_header(folder / crafted.WEIGHTS)
        for name, field, value in header_changes:
            header[name][field] = value
        crafted.write_header(folder / crafted.WEIGHTS, header, body)
    return folder


def assert_no_traceback(folder: Path) -> None:
    status, err = run_check(folder)
    assert status in (0, 1, 2)
    if status == 2:
        assert err.count("\n") == 1 and "Traceback" not in err, err


PROPERTY = settings(
    max_examples=50,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)


def test_mutated_configs_never_end_in_a_traceback(good, tmp_path):
    """Property (hypothesis): whatever values up to three config keys take, the folder either
    opens (exit 0, or 1 for a failed check) or is refused with exit 2 and one line; no exception
    other than HeadlightError leaves the loader."""
    keys = st.sampled_from(sorted(json.loads((good / "config.json").read_text())) + EXTRA_KEYS)

    @PROPERTY
    @given(st.dictionaries(keys, MUTANT_VALUES, min_size=1, max_size=3))
    def property_(changes):
        with tempfile.TemporaryDirectory(dir=tmp_path) as scratch:
            assert_no_traceback(spoil(good, Path(scratch), changes, []))

    property_()


def test_mutated_safetensors_headers_never_end_in_a_traceback(good, tmp_path):
    """Property (hypothesis): the same for up to two header fields (dtype, shape, data_offsets)
    of any tensors, the data bytes left as they are."""
    header, _ = crafted.read_header(good / crafted.WEIGHTS)
    tensors = st.sampled_from(sorted(name for name in header if name != "__metadata__"))
    change = st.tuples(tensors, st.sampled_from(sorted(HEADER_VALUES))).flatmap(
        lambda nf: st.tuples(st.just(nf[0]), st.just(nf[1]), HEADER_VALUES[nf[1]])
    )

    @PROPERTY
    @given(st.lists(change, min_size=1, max_size=2))
    def property_(changes):
        with tempfile.TemporaryDirectory(dir=tmp_path) as scratch:
            assert_no_traceback(spoil(good, Path(scratch), {}, changes))

    property_()
