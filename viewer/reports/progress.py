"""Progress bars for the commands: tqdm on stderr (never stdout), counting finished shards.

Shards finish on whichever worker ran them; the bar counts them all as the command receives
them, shards taken from a run folder included.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager

from tqdm import tqdm


@contextmanager
def shard_bar(label: str, shards: int | None, *, quiet: bool = False) -> Iterator[Callable[[int], None]]:
    """``with shard_bar("heads", n) as on_shard:`` and call ``on_shard(items)`` per shard."""
    with tqdm(
        total=shards,
        desc=label,
        unit="shard",
        file=sys.stderr,
        disable=quiet,
        dynamic_ncols=True,
        mininterval=0.25,
        leave=True,
    ) as bar:
        yield lambda _items: bar.update(1)
