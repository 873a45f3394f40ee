"""How messages and the card name a model and its head."""

from __future__ import annotations

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
