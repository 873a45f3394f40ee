"""Atomic writes reach the disk: the temporary file and the folder are fsynced.

Reference: POSIX rename(2) is atomic but not durable; durability needs fsync of the file before
the rename and of the folder after it (common practice, e.g. the SQLite and ext4 docs).
"""

from __future__ import annotations

import os

from viewer import files


def test_atomic_write_fsyncs_file_then_folder(tmp_path, monkeypatch):
    synced = []
    real = os.fsync

    def spy(fd):
        synced.append(os.path.realpath(f"/proc/self/fd/{fd}"))
        real(fd)

    monkeypatch.setattr(files.os, "fsync", spy)
    target = tmp_path / "out.json"
    files.atomic_write_bytes(target, b"{}")
    assert target.read_bytes() == b"{}"
    assert len(synced) == 2
    assert synced[0].startswith(str(tmp_path / ".out.json.")) and synced[1] == str(tmp_path)
    assert not list(tmp_path.glob(".*.part"))
