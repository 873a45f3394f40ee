"""A minimal evented field: callbacks run only when a value really changes (no Qt needed).

``Event`` is the hub one state field uses to tell its observers about a change. Observers are
called in the order they connected, on the thread that made the change (the GUI thread: the
worker never touches the state, it posts results that the GUI thread stores).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

Callback = Callable[[Any], None]


class Event:
    """A list of callbacks taking the new value."""

    __slots__ = ("name", "_callbacks", "_blocked")

    def __init__(self, name: str) -> None:
        self.name = name
        self._callbacks: list[Callback] = []
        self._blocked = 0

    def connect(self, callback: Callback) -> Callback:
        if callback not in self._callbacks:
            self._callbacks.append(callback)
        return callback

    def disconnect(self, callback: Callback) -> None:
        if callback in self._callbacks:
            self._callbacks.remove(callback)

    def emit(self, value: Any) -> None:
        if self._blocked:
            return
        for callback in list(self._callbacks):
            callback(value)

    def blocked(self) -> _Blocker:
        """``with event.blocked(): ...`` suppresses emissions inside the block."""
        return _Blocker(self)


class _Blocker:
    def __init__(self, event: Event) -> None:
        self.event = event

    def __enter__(self) -> Event:
        self.event._blocked += 1
        return self.event

    def __exit__(self, *exc: object) -> None:
        self.event._blocked -= 1


def same(a: Any, b: Any) -> bool:
    """Change test for state fields: identity for objects that hold arrays, == for the rest."""
    if a is b:
        return True
    if isinstance(a, (int, float, str, bool, tuple, type(None))) and isinstance(
        b, (int, float, str, bool, tuple, type(None))
    ):
        return type(a) is type(b) and a == b
    return False
