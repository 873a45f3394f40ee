"""JSON from files Headlight did not write: bounded in size, integer length and nesting depth.

Python's ``json`` module turns a 5,000-digit integer into a ``ValueError`` (the interpreter's
limit on converting long digit strings) and a 100,000-deep nesting into a ``RecursionError``;
neither is a ``JSONDecodeError``, and a structure a few hundred levels deep parses but breaks
whatever walks it recursively later (``copy.deepcopy`` of a config, for one). ``loads`` refuses
all three in one line, before anything else sees the data:

- an integer of more than ``MAX_INT_DIGITS`` digits (real files hold at most ~30: tokenizer
  configs write ``model_max_length`` as 10³⁰);
- nesting deeper than ``max_depth`` arrays and objects (``MAX_DEPTH`` by default; model configs
  nest 3 or 4 levels);
- text that is not JSON, or a file larger than ``max_bytes``;
- a string holding a lone surrogate (``"\\ud800"``): JSON escapes can write one, but it is not
  Unicode text, and a tokenizer cannot encode it (``check_text`` says so for any text).

Every refusal is a ``HeadlightError`` whose message starts with ``what`` (e.g. "config.json in
/models/router").
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

from viewer.errors import HeadlightError

MAX_INT_DIGITS = 100
MAX_DEPTH = 32
MAX_FILE_BYTES = 16 * 2**20


# a lone surrogate in parsed JSON can only come from a \uD800-\uDFFF escape in its text
_SURROGATE_ESCAPE = re.compile(r"\\u[dD][89a-fA-F][0-9a-fA-F]{2}")


class _Refused(ValueError):
    pass


def check_text(text: str, what: str) -> str:
    """``text`` when it is Unicode text; a one-line ``HeadlightError`` naming ``what`` when it
    holds a lone surrogate (from a JSON escape, or from bytes of a command-line argument that
    are not UTF-8), which no tokenizer can encode."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError as exc:
        bad = text[exc.start]
        raise HeadlightError(
            f"{what} holds {bad!r}, a lone surrogate (U+{ord(bad):04X}), which is not Unicode text"
        ) from None
    return text


def _strings(data: Any) -> Any:
    """Every string of parsed JSON, keys included, walked without recursion."""
    stack = [data]
    while stack:
        node = stack.pop()
        if isinstance(node, str):
            yield node
        elif isinstance(node, dict):
            stack.extend(node)
            stack.extend(node.values())
        elif isinstance(node, list):
            stack.extend(node)


def _bounded_int(digits: str) -> int:
    if len(digits.lstrip("-")) > MAX_INT_DIGITS:
        raise _Refused(f"an integer of {len(digits.lstrip('-'))} digits (at most {MAX_INT_DIGITS})")
    return int(digits)


def depth(data: Any) -> int:
    """Nesting depth of parsed JSON (a scalar is 0, ``[1]`` is 1), walked without recursion."""
    deepest = 0
    stack = [(data, 1)]
    while stack:
        node, level = stack.pop()
        if isinstance(node, dict):
            children = node.values()
        elif isinstance(node, list):
            children = node
        else:
            continue
        deepest = max(deepest, level)
        stack.extend((c, level + 1) for c in children if isinstance(c, (dict, list)))
    return deepest


def loads(text: str, what: str, *, max_depth: int = MAX_DEPTH) -> Any:
    """Parse ``text``; a one-line ``HeadlightError`` naming ``what`` for anything refused."""
    try:
        data = json.loads(text, parse_int=_bounded_int)
    except _Refused as exc:
        raise HeadlightError(f"{what} is refused: it holds {exc}") from None
    except RecursionError:
        raise HeadlightError(f"{what} is refused: it is nested too deeply") from None
    except json.JSONDecodeError as exc:
        at = f"column {exc.colno}" if exc.lineno == 1 else f"line {exc.lineno}, column {exc.colno}"
        raise HeadlightError(f"{what} is not valid JSON ({exc.msg} at {at})") from None
    except (UnicodeDecodeError, ValueError) as exc:
        raise HeadlightError(f"{what} is not valid JSON ({exc})") from None
    if depth(data) > max_depth:
        raise HeadlightError(f"{what} is refused: it nests more than {max_depth} levels deep")
    if _SURROGATE_ESCAPE.search(text):
        for string in _strings(data):
            check_text(string, what)
    return data


def load_file(
    path: str | Path, what: str, *, max_bytes: int = MAX_FILE_BYTES, max_depth: int = MAX_DEPTH
) -> Any:
    """``loads`` of a UTF-8 file, refusing one larger than ``max_bytes`` before reading it."""
    path = Path(path)
    try:
        size = path.stat().st_size
        if size > max_bytes:
            raise HeadlightError(f"{what} is refused: {size} bytes (at most {max_bytes})")
        raw = path.read_bytes()
    except OSError as exc:
        raise HeadlightError(f"cannot read {what}: {exc.strerror or exc}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        column = exc.start - (raw.rfind(b"\n", 0, exc.start) + 1) + 1
        raise HeadlightError(
            f"{what} is not UTF-8 text: line {line}, byte 0x{raw[exc.start]:02x} at position {column}"
        ) from None
    return loads(text, what, max_depth=max_depth)
