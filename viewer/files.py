"""Safe file output: atomic writes, no silent overwrites, sanitised names.

Every file Headlight writes goes to a temporary file in the target folder first, is flushed to
disk (fsync) and is then renamed over the target (``os.replace`` is atomic on one file system;
the folder is fsynced after the rename), so a crash, a power cut or a full disk never leaves a
half-written figure, card, session or run-folder shard behind. ``atomic_write_bytes`` is the one helper
for this; everything else that writes a file goes through it. An existing file or folder is only
replaced when the caller says so (``--force`` on the command line, a confirmation in the
window). Problems the user can fix become one-line ``HeadlightError`` messages.
"""

from __future__ import annotations

import json
import os
import re
import secrets
import shutil
import tempfile
import unicodedata
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from filelock import FileLock, Timeout

from viewer.errors import HeadlightError


def _fail(path: Path, exc: OSError) -> HeadlightError:
    reason = exc.strerror or type(exc).__name__
    return HeadlightError(f"cannot write {path}: {reason}")


def atomic_write_bytes(path: str | os.PathLike, data: bytes, *, force: bool = True) -> Path:
    """Write `data` to `path` through a temporary file and a rename."""
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise HeadlightError(f"cannot write {path}: folder {folder} does not exist")
    if path.exists() and not force:
        raise HeadlightError(f"{path} already exists; pass --force to replace it")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=folder)
    except OSError as exc:
        raise _fail(path, exc) from None
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())  # the bytes are on disk before the name points at them
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except OSError as exc:
        Path(tmp).unlink(missing_ok=True)
        raise _fail(path, exc) from None
    _fsync_folder(folder)
    return path


def _fsync_folder(folder: Path) -> None:
    """Make a rename in ``folder`` durable (POSIX: fsync the folder; a no-op where it cannot)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems cannot fsync a folder; the rename itself has happened
    finally:
        os.close(fd)


def atomic_write_text(path: str | os.PathLike, text: str, *, force: bool = True) -> Path:
    return atomic_write_bytes(path, text.encode("utf-8"), force=force)


def json_text(data: Any) -> str:
    return json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def write_json(path: str | os.PathLike, data: Any, *, force: bool = True) -> Path:
    """Write JSON atomically (NaN is not JSON: callers turn it into null first)."""
    return atomic_write_text(path, json_text(data), force=force)


def check_output(target: str | os.PathLike, inputs: Iterable[str | os.PathLike | None], what: str) -> Path:
    """Check an output file before the work that fills it: its folder exists and is writable,
    it is not a folder, and it is none of the ``inputs`` (the files and folders a command
    reads) nor inside an input folder. ``what`` names the option in the message (``--json``).
    """
    path = Path(target).expanduser()
    folder = path.parent if str(path.parent) else Path(".")
    if path.is_dir():
        raise HeadlightError(f"{what} {path} is a folder; give a file name")
    if not folder.is_dir():
        raise HeadlightError(f"cannot write {what} {path}: folder {folder} does not exist")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise HeadlightError(f"cannot write {what} {path}: folder {folder} is not writable")
    resolved = path.resolve()
    for given in inputs:
        if given is None:
            continue
        source = Path(given).expanduser()
        if not source.exists():
            continue
        if source.is_dir():
            if resolved.is_relative_to(source.resolve()):
                raise HeadlightError(f"{what} {path} would write into {source}, a folder this command uses")
        elif path.exists() and os.path.samefile(path, source):
            raise HeadlightError(f"{what} {path} is an input of this command; choose another file")
    return path


def sanitise_name(text: str, *, max_chars: int = 40, fallback: str = "text") -> str:
    """A file-name stem from free text: ASCII letters, digits and single dashes only."""
    ascii_text = unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode()
    stem = re.sub(r"[^a-z0-9]+", "-", ascii_text.lower()).strip("-")
    stem = stem[:max_chars].rstrip("-")
    return stem or fallback


class StagedFolder:
    """Build a folder under a temporary name, then move it into place in one rename.

    ``with StagedFolder(out, force) as tmp: ...write into tmp...`` leaves either the complete
    new folder at `out` or, on any error, the old state untouched.

    The staging folder ``.<name>.staging-<token>`` is held under a lock (``filelock``, on
    ``.<name>.staging-<token>.lock`` beside it) for as long as it is being written. A process
    that is killed meanwhile leaves the folder behind but not the lock (the kernel releases it
    with the process), so the next export to the same place removes every staging folder whose
    lock it can take: those are the leftovers of killed exports, never one that is being
    written. Also removed then: a ``.<name>.old`` a killed swap left, and staging folders of
    earlier versions (``.<name>.`` and eight random characters, made by ``tempfile``).
    """

    def __init__(self, target: str | os.PathLike, force: bool = False):
        self.target = Path(target)
        self.force = force
        self.tmp: Path | None = None
        self.lock: FileLock | None = None

    def __enter__(self) -> Path:
        parent = self.target.parent if str(self.target.parent) else Path(".")
        if not parent.is_dir():
            raise HeadlightError(f"cannot write {self.target}: folder {parent} does not exist")
        if self.target.exists() and not self.force:
            raise HeadlightError(f"{self.target} already exists; pass --force to replace it")
        if self.target.exists() and not self.target.is_dir():
            raise HeadlightError(f"{self.target} exists and is not a folder")
        remove_stale_staging(self.target)
        tmp = parent / f".{self.target.name}.staging-{secrets.token_hex(6)}"
        try:
            self.lock = FileLock(_lock_path(tmp))
            self.lock.acquire(timeout=0)
            tmp.mkdir(mode=0o700)
        except (OSError, Timeout) as exc:
            self._unlock()
            raise _fail(self.target, exc if isinstance(exc, OSError) else OSError("locked")) from None
        self.tmp = tmp
        return tmp

    def _unlock(self) -> None:
        if self.lock is not None:
            if self.lock.is_locked:
                self.lock.release()
            Path(self.lock.lock_file).unlink(missing_ok=True)
            self.lock = None

    def __exit__(self, exc_type, exc, tb) -> None:
        assert self.tmp is not None
        try:
            self._swap(exc_type is not None)
        finally:
            self._unlock()

    def _swap(self, failed: bool) -> None:
        assert self.tmp is not None
        if failed:
            shutil.rmtree(self.tmp, ignore_errors=True)
            return
        old = None
        try:
            os.chmod(self.tmp, 0o755)
            if self.target.exists():
                old = self.target.with_name(f".{self.target.name}.old")
                shutil.rmtree(old, ignore_errors=True)
                os.replace(self.target, old)
            os.replace(self.tmp, self.target)
        except OSError as e:
            shutil.rmtree(self.tmp, ignore_errors=True)
            if old is not None and not self.target.exists():
                os.replace(old, self.target)
            raise _fail(self.target, e) from None
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)


def _lock_path(staging: Path) -> Path:
    return staging.with_name(staging.name + ".lock")


def remove_stale_staging(target: Path) -> list[Path]:
    """Remove the staging folders of ``target`` that no running export holds (see
    ``StagedFolder``); returns what was removed."""
    parent = target.parent if str(target.parent) else Path(".")
    name = re.escape(target.name)
    staging = re.compile(rf"\.{name}\.staging-[0-9a-f]+")
    legacy = re.compile(rf"\.{name}\.[a-z0-9_]{{8}}")
    removed: list[Path] = []
    live = False
    try:
        entries = list(parent.iterdir())
    except OSError:
        return removed
    for entry in entries:
        if staging.fullmatch(entry.name) and entry.is_dir():
            lock = FileLock(_lock_path(entry))
            try:
                lock.acquire(timeout=0)
            except (Timeout, OSError):
                live = True  # an export in progress
                continue
            try:
                shutil.rmtree(entry, ignore_errors=True)
                removed.append(entry)
            finally:
                lock.release()
                _lock_path(entry).unlink(missing_ok=True)
        elif legacy.fullmatch(entry.name) and entry.is_dir():
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry)
    old = target.with_name(f".{target.name}.old")
    if not live and old.is_dir():
        if target.exists():
            shutil.rmtree(old, ignore_errors=True)
        else:  # killed between the two renames of a swap: the old folder was the target
            os.replace(old, target)
        removed.append(old)
    return removed
