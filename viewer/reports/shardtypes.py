"""The types every part of the shard engine shares: shards, report kinds, run options.

``viewer.reports.shards`` runs them; ``runfolder`` keeps their partials and ``workers`` maps
them elsewhere. They live here so that those three import this module, not one another.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar, Protocol

import numpy as np

from viewer.errors import Cancelled, HeadlightError  # noqa: F401  (Cancelled: re-exported)

SHARD_SIZE = 32
"""Texts per shard. Part of a run's identity: the partial sums, and so the last bits of every
mean, depend on where the shards are cut (never on how many workers ran them)."""

State = dict[str, np.ndarray]


@dataclass(frozen=True)
class Shard:
    """``items[start : start + len(items)]`` of the whole set; shard ``index`` in order."""

    index: int
    start: int
    items: tuple[Any, ...]

    def indexed(self) -> Iterator[tuple[int, Any]]:
        """(position in the whole set, item) pairs."""
        return enumerate(self.items, start=self.start)


def cut_shards(items: Iterable[Any], size: int = SHARD_SIZE) -> Iterator[Shard]:
    """Consecutive shards of ``size`` items (the last may be shorter), read lazily."""
    if size < 1:
        raise HeadlightError(f"shard size must be at least 1, got {size}")
    chunk: list[Any] = []
    index = start = 0
    for item in items:
        chunk.append(item)
        if len(chunk) == size:
            yield Shard(index, start, tuple(chunk))
            index, start, chunk = index + 1, start + size, []
    if chunk:
        yield Shard(index, start, tuple(chunk))


def shard_count(items: int, size: int = SHARD_SIZE) -> int:
    return -(-items // size)


class Partial(Protocol):
    def merge(self, other: Any) -> Any: ...


class ShardKind(Protocol):
    """A report kind: the map step over one shard and the (de)serialisation of its partial."""

    name: ClassVar[str]

    def options(self) -> dict[str, Any]: ...

    def map(self, loaded: Any, shard: Shard, check: Callable[[], None]) -> Partial: ...

    def state(self, partial: Any) -> State: ...

    def load(self, state: State) -> Partial: ...


@dataclass(frozen=True)
class RunOptions:
    """Where and how a report's shards run.

    workers: processes on this machine (1: this process); cluster: a Dask scheduler address
    (then ``workers`` is ignored); work: the folder holding run folders (None: keep nothing);
    fresh: ignore finished shards kept there; threads: torch threads while a shard is mapped,
    wherever it runs (None: leave the process's setting).

    One torch thread everywhere is what makes every engine's numbers bit-identical: a forward
    on two threads can differ from the same forward on one in the last bit of a float32
    (on the demo model's sample messages a summed drop moves by 8e-10,
    ``tests/benchmarks/bench_threads.py``), and workers run one thread each.
    """

    workers: int = 1
    cluster: str | None = None
    work: Path | None = None
    fresh: bool = False
    shard_size: int = SHARD_SIZE
    threads: int | None = 1


SERIAL = RunOptions()
