"""A model's display name: what its own model card calls it, else its folder's name.

The rule (docs/definitions.md, "Model name"): the first of

1. the ``model_name:`` field of the YAML front matter of the folder's ``README.md`` (then
   ``MODEL.md``), the metadata block Hugging Face model cards open with;
2. the first ``name:`` under the front matter's ``model-index:``;
3. the card's first level-1 Markdown heading (``# all-MiniLM-L6-v2``), which the model cards
   written by transformers' ``Trainer`` and by hand alike open with;
4. the folder's name, with ``(from X)`` when ``config.json`` records in ``_name_or_path`` the hub
   id ``X`` it was fine-tuned or converted from (that names the starting point, not the model).

A model card can be hostile like every file of a folder: at most ``CARD_BYTES`` of it are read,
bytes that are not UTF-8 are replaced, and a name keeps printable characters only, at most
``NAME_CHARS`` of them, with Markdown emphasis and links reduced to their text.
"""

from __future__ import annotations

import re
from pathlib import Path

CARD_FILES = ("README.md", "MODEL.md")
CARD_BYTES = 65_536  # the front matter and the title are at the top of a card
NAME_CHARS = 80
_HUB_ID = re.compile(r"^[A-Za-z0-9][\w.-]*/[\w.-]+$")

HEAD_KIND_NAMES = {
    "classifier": "sequence classifier",
    "causal-lm": "causal language model",
    "masked-lm": "masked language model",
    "encoder": "bare encoder",
}


def head_phrase(kind: str) -> str:
    """How messages name a model's head: "a sequence classifier head", "no task head (a bare
    encoder)"."""
    if kind == "encoder":
        return "no task head (a bare encoder)"
    return f"a {HEAD_KIND_NAMES.get(kind, kind)} head"


def clean_name(raw: str) -> str:
    """One line of printable text, Markdown links and emphasis reduced to their text, quotes
    around a YAML value removed, at most ``NAME_CHARS`` characters (an ellipsis when cut)."""
    text = re.sub(r"!?\[([^\]]*)\]\([^)]*\)", r"\1", raw)  # [text](url) -> text
    text = re.sub(r"[*_`]+", "", text)
    text = "".join(c for c in text if c.isprintable())
    text = " ".join(text.split()).strip("\"' ")
    return text if len(text) <= NAME_CHARS else text[: NAME_CHARS - 1].rstrip() + "…"


def short_name(name: str, limit: int = 40) -> str:
    """A name for a figure's title, where a line has room for little else: a trailing
    parenthesis dropped ("Northgate Cycle Co-op message router (Headlight demo model)" ->
    "Northgate Cycle Co-op message router"), then at most ``limit`` characters."""
    text = re.sub(r"\s*\([^()]*\)\s*$", "", name) or name
    return text if len(text) <= limit else text[: limit - 1].rstrip() + "…"


def _card_text(folder: Path) -> str | None:
    for name in CARD_FILES:
        path = folder / name
        if path.is_file():
            with path.open("rb") as fh:
                return fh.read(CARD_BYTES).decode("utf-8", errors="replace")
    return None


def _named(raw: str) -> str | None:
    """A cleaned heading or field, None for a template's placeholder ("Model Card for Model
    ID", the heading of the card PEFT writes beside an adapter)."""
    name = clean_name(raw)
    name = re.sub(r"^model card for\s+", "", name, flags=re.IGNORECASE)
    return None if not name or name.lower() in ("model id", "model card") else name


def card_name(text: str) -> str | None:
    """The name a model card's text gives its model (rules 1-3 of the module docstring)."""
    lines = text.lstrip("\ufeff").splitlines()
    body = lines
    if lines and lines[0].strip() == "---":
        end = next((k for k in range(1, len(lines)) if lines[k].strip() in ("---", "...")), None)
        if end is not None:
            front, body = lines[1:end], lines[end + 1 :]
            for line in front:
                m = re.match(r"^model_name:\s*(.+)$", line)
                if m and _named(m.group(1)):
                    return _named(m.group(1))
            in_index = False
            for line in front:
                if re.match(r"^model-index:\s*$", line):
                    in_index = True
                    continue
                if in_index and line[:1] not in (" ", "-", ""):
                    break
                m = re.match(r"^\s*-?\s*name:\s*(.+)$", line)
                if in_index and m and _named(m.group(1)):
                    return _named(m.group(1))
    fenced = False
    for line in body:
        if line.lstrip().startswith("```"):
            fenced = not fenced
        m = re.match(r"^#\s+(.+?)\s*#*\s*$", line)
        if not fenced and m and _named(m.group(1)):
            return _named(m.group(1))
    return None


def card_name_of(folder: str | Path) -> str | None:
    """The name the model card in ``folder`` gives (rules 1-3), None without one."""
    text = _card_text(Path(folder))
    return card_name(text) if text is not None else None


def display_name(folder: str | Path, config: dict | None = None) -> str:
    """The name to show for the model in ``folder`` (``config``: its config.json, when read)."""
    folder = Path(folder)
    name = card_name_of(folder)
    if name:
        return name
    shown = folder.name if folder.name != "model" else f"{folder.parent.name}/model"
    origin = (config or {}).get("_name_or_path")
    if isinstance(origin, str) and _HUB_ID.match(origin) and not Path(origin).exists():
        return f"{shown} (from {clean_name(origin)})"
    return shown
