"""Sessions: what the user was looking at, saved to and restored from a JSON file of our own.

Format (``"format": "headlight-session"``, ``"version": 1``)::

    {
      "format": "headlight-session", "version": 1,
      "model": "/path/to/checkpoint" | null,
      "base": "/path/to/base/model" | null,   (the base of an adapter folder; optional)
      "text": "the text of the current run",
      "text_set": "/path/to/texts.jsonl" | null, "item": 3 | null,
      "link_pairs": "/path/to/pairs.jsonl" | null,
      "compare": {"kind": "text" | "model", "value": "..."} | null,
      "selection": {"layer": 0, "head": 1 | null, "source": 4 | null, "target": 2 | null,
                    "metric": "entropy", "scope": "text", "mistakes_only": false,
                    "difference": false, "word": null},
      "notes": "free text"
    }

Recordings are not stored: restoring opens the model and runs the text again, which gives the
same numbers (the runs are deterministic) without a large file.

A session file is read as bounded JSON (``viewer.safejson``: no huge integers, no deep
nesting, at most 16 MB); anything unreadable is a one-line ``HeadlightError``. A last session
that cannot be restored is moved aside (``set_aside``), never deleted, so the window can start
on the demo and the file is still there to look at.
"""

from __future__ import annotations

import os
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from viewer.errors import HeadlightError
from viewer.files import atomic_write_text, json_text
from viewer.safejson import load_file
from viewer.session.state import HEAD_MAP_METRICS, Selection

FORMAT = "headlight-session"
VERSION = 1


@dataclass
class Session:
    model: str | None = None
    base: str | None = None
    text: str = ""
    text_set: str | None = None
    item: int | None = None
    link_pairs: str | None = None
    compare: dict[str, str] | None = None
    selection: dict[str, Any] = field(default_factory=dict)
    notes: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {"format": FORMAT, "version": VERSION, **asdict(self)}


def capture(state: Selection, *, text_set: str | None = None, link_pairs: str | None = None) -> Session:
    """The session for the current state."""
    model = state.model.folder if state.model is not None else None
    target = state.compare_target
    return Session(
        model=model,
        base=state.model.base if state.model is not None else None,
        text=state.text,
        text_set=text_set
        if text_set is not None
        else (state.textset.path if state.textset is not None else None),
        item=state.item,
        link_pairs=link_pairs
        if link_pairs is not None
        else (state.link_pairs.path if state.link_pairs is not None else None),
        compare=None if target is None else {"kind": target[0], "value": target[1]},
        selection=state.snapshot(),
        notes=state.notes,
    )


def _int_or_none(value: Any, name: str) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise HeadlightError(f"session field {name} must be a non-negative integer or null")
    return value


def from_dict(data: Any) -> Session:
    """Validate a parsed session file; HeadlightError with a one-line message when it is wrong."""
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise HeadlightError('not a Headlight session file (no "format": "headlight-session")')
    if data.get("version") != VERSION:
        raise HeadlightError(
            f"session version {data.get('version')!r} is not supported "
            f"(this Headlight reads version {VERSION})"
        )
    sel = data.get("selection") or {}
    if not isinstance(sel, dict):
        raise HeadlightError("session field selection must be an object")
    clean: dict[str, Any] = {}
    for name in ("layer", "head", "source", "target"):
        if name in sel:
            clean[name] = _int_or_none(sel[name], f"selection.{name}")
    if clean.get("layer") is None:
        clean["layer"] = 0
    metric = sel.get("metric", "entropy")
    clean["metric"] = metric if metric in HEAD_MAP_METRICS else "entropy"
    clean["scope"] = sel.get("scope") if sel.get("scope") in ("text", "set") else "text"
    clean["mistakes_only"] = bool(sel.get("mistakes_only", False))
    clean["difference"] = bool(sel.get("difference", False))
    word = sel.get("word")
    clean["word"] = word if isinstance(word, str) and word else None
    compare = data.get("compare")
    if compare is not None:
        if (
            not isinstance(compare, dict)
            or compare.get("kind") not in ("text", "model")
            or not isinstance(compare.get("value"), str)
        ):
            raise HeadlightError('session field compare must be {"kind": "text" | "model", "value": ...}')
        compare = {"kind": compare["kind"], "value": compare["value"]}
    strings = {}
    for name in ("model", "base", "text_set", "link_pairs"):
        v = data.get(name)
        if v is not None and not isinstance(v, str):
            raise HeadlightError(f"session field {name} must be a path or null")
        strings[name] = v
    text = data.get("text", "")
    notes = data.get("notes", "")
    if not isinstance(text, str) or not isinstance(notes, str):
        raise HeadlightError("session fields text and notes must be strings")
    return Session(
        model=strings["model"],
        base=strings["base"],
        text=text,
        text_set=strings["text_set"],
        item=_int_or_none(data.get("item"), "item"),
        link_pairs=strings["link_pairs"],
        compare=compare,
        selection=clean,
        notes=notes,
    )


def save(path: str | Path, session: Session) -> None:
    """Write the session atomically (``viewer.files``: temporary file, fsync, rename)."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise HeadlightError(f"cannot write {path}: {exc.strerror}") from None
    atomic_write_text(path, json_text(session.to_dict()))


def load(path: str | Path) -> Session:
    path = Path(path)
    if not path.is_file():
        raise HeadlightError(f"session file not found: {path}")
    return from_dict(load_file(path, f"session {path.name}"))


def set_aside(path: str | Path) -> Path:
    """Move an unreadable session file to ``<name>.unreadable-<time>.json`` next to it (kept
    for the user to look at, and out of the way of the next save); returns the new path."""
    path = Path(path)
    stamp = time.strftime("%Y%m%d-%H%M%S")
    for n in range(1000):
        target = path.with_name(f"{path.stem}.unreadable-{stamp}{f'-{n}' if n else ''}{path.suffix}")
        if not target.exists():
            break
    try:
        os.replace(path, target)
    except OSError as exc:
        raise HeadlightError(f"cannot move {path} aside: {exc.strerror or exc}") from None
    return target
