"""A progress bar on stderr for runs over a text set (throttled; never on stdout)."""

from __future__ import annotations

import sys
import time
from typing import TextIO


class Progress:
    """``with Progress(total, "heads") as bar: bar(n)`` after every n texts done."""

    def __init__(self, total: int | None, label: str, stream: TextIO | None = None,
                 enabled: bool = True, every: float = 0.25):
        self.total, self.label, self.done = total, label, 0
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = enabled
        self.every = every
        self._last = 0.0
        self._drawn = -1
        self._start = time.monotonic()

    def __call__(self, n: int = 1) -> None:
        self.done += n
        now = time.monotonic()
        if self.enabled and (now - self._last >= self.every or self.done == self.total):
            self._last = now
            self._draw(now)

    def _draw(self, now: float) -> None:
        elapsed = now - self._start
        if self.total:
            frac = min(1.0, self.done / self.total)
            bar = "#" * int(frac * 30)
            line = f"{self.label} [{bar:<30}] {self.done}/{self.total} {elapsed:5.1f}s"
        else:
            line = f"{self.label} {self.done} {elapsed:5.1f}s"
        self.stream.write("\r" + line)
        self.stream.flush()
        self._drawn = self.done

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc) -> None:
        if self.enabled and self.done:
            if self._drawn != self.done:
                self._draw(time.monotonic())
            self.stream.write("\n")
            self.stream.flush()
