"""The shard engine: every text-set report is a map over fixed-size shards and a merge in order.

docs/scale.md describes the scheme; in short:

- the set is cut into shards of ``shard_size`` consecutive items, in input order
  (``cut_shards``); shard k holds items k·S … (k+1)·S − 1;
- a **report kind** (``ShardKind``) maps one shard to a *partial*: one of the mergeable
  accumulators (``HeadStats``, ``KnockoutTally``, ``LinkAccuracy`` …) filled on that shard alone;
- partials are merged in shard order, 0, 1, 2, …, whatever order they finished in. The serial
  run uses the very same shards, so every run — one process, worker processes, a Dask cluster,
  a run resumed from its run folder — adds the same floating-point partial sums in the same
  order and gets the same numbers, to the last bit.

Where the shards run is the engine's choice (``RunOptions``): in this process (the window, and
sets of one shard), in local worker processes, or on a Dask cluster (``viewer.reports.workers``).
Finished shards can be kept in a run folder (``viewer.reports.runfolder``) so a killed run
continues where it stopped.

To add a report kind: a frozen, picklable dataclass with a ``name``, ``options()`` (JSON-ready;
everything that changes the numbers, since it is part of the run-folder key), ``map(loaded,
shard, check)`` returning a partial with ``merge(other) -> merged``, and ``state(partial)`` /
``load(state)`` turning a partial into a dict of numpy arrays and back exactly.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sized
from typing import Any

from viewer.errors import HeadlightError
from viewer.reports import runfolder, workers
from viewer.reports.shardtypes import (  # noqa: F401  (re-exported: the engine's public names)
    SERIAL,
    SHARD_SIZE,
    Cancelled,
    Partial,
    RunOptions,
    Shard,
    ShardKind,
    State,
    cut_shards,
    shard_count,
)


def progress_callback(
    progress: Callable[[int, int | None], None] | None, total: int | None
) -> Callable[[int], None] | None:
    """Turn a caller's ``progress(done, total)`` into the engine's per-shard ``on_shard(n)``."""
    if progress is None:
        return None
    done = [0]

    def on_shard(n: int) -> None:
        done[0] += n
        progress(done[0], total)

    return on_shard


def sized(items: Iterable[Any]) -> int | None:
    return len(items) if isinstance(items, Sized) else None


def run_shards(
    kind: ShardKind,
    loaded: Any,
    items: Iterable[Any],
    *,
    options: RunOptions = SERIAL,
    total: int | None = None,
    inputs: dict[str, Any] | None = None,
    on_shard: Callable[[int], None] | None = None,
    cancelled: Callable[[], bool] | None = None,
) -> Any | None:
    """Map ``kind`` over the shards of ``items`` and merge the partials in shard order.

    ``loaded`` is the model opened in this process; workers open the same folder themselves.
    ``total`` (items, when known) sizes the pool; ``inputs`` describes where the items were
    read from and, with ``options.work``, names the run folder (None: no run folder).
    ``on_shard(n)`` is called after every finished shard of n items (shards taken from the run
    folder included); ``cancelled()`` is asked between shards and batches and stops the run
    with ``Cancelled``. Returns the merged partial, None for an empty set.

    With a run folder, its lock is held for the whole run (a second run on the same folder
    waits for it), and every shard found on disk passes its self-check (index, items,
    checksum) before it is used; a damaged one is reported on stderr and computed again.
    """
    if total is None:
        total = sized(items)
    folder = None
    if options.work is not None and inputs is not None:
        folder = runfolder.RunFolder.open(
            options.work, kind, loaded, inputs, options.shard_size, fresh=options.fresh
        )
    try:
        return _run_in(kind, loaded, items, options, total, folder, on_shard, cancelled)
    finally:
        if folder is not None:
            folder.close()


def _run_in(
    kind: ShardKind,
    loaded: Any,
    items: Iterable[Any],
    options: RunOptions,
    total: int | None,
    folder: runfolder.RunFolder | None,
    on_shard: Callable[[int], None] | None,
    cancelled: Callable[[], bool] | None,
) -> Any | None:
    """``run_shards`` with the run folder (None: none) open and locked."""
    if folder is not None:
        finished = folder.result()
        if finished is not None:
            if on_shard and total:
                on_shard(total)
            return kind.load(finished)
    on_disk = folder.finished() if folder is not None else set()
    # shards on disk that passed their self-check, with the digest of their items; a damaged
    # one is reported and computed again
    kept: dict[int, str] = {}

    def check() -> None:
        if cancelled is not None and cancelled():
            raise Cancelled("cancelled")

    def todo() -> Iterator[tuple[Shard, str]]:
        for shard in cut_shards(items, options.shard_size):
            digest = runfolder.items_digest(shard.items) if folder is not None else ""
            if shard.index in on_disk and folder.check(shard.index, digest):
                kept[shard.index] = digest
                if on_shard:
                    on_shard(len(shard.items))
                continue
            yield shard, digest

    digests: dict[int, str] = {}

    def shards() -> Iterator[Shard]:
        for shard, digest in todo():
            digests[shard.index] = digest
            yield shard

    merged: Any = None
    next_index = 0
    ready: dict[int, State] = {}

    def drain() -> None:
        nonlocal merged, next_index
        while next_index in ready or next_index in kept:
            if next_index in ready:
                state = ready.pop(next_index)
            else:
                try:
                    state = folder.read(next_index, kept.pop(next_index))
                except runfolder.Damaged as exc:  # changed on disk after its check
                    raise HeadlightError(f"run folder {folder.path}: shard {next_index} {exc}") from None
            part = kind.load(state)
            merged = part if merged is None else merged.merge(part)
            next_index += 1

    def may_start(index: int) -> bool:  # bounds the shards in flight beyond the next merge
        drain()
        return index < next_index + engine.ahead

    n_shards = None if total is None else shard_count(total, options.shard_size)
    engine = workers.engine_for(options, loaded, n_shards)
    failed = True
    try:
        for index, n, state in engine.run(kind, shards(), check, may_start):
            digest = digests.pop(index)
            if folder is not None:
                folder.write(index, state, digest)
            ready[index] = state
            if on_shard:
                on_shard(n)
            drain()
        failed = False
    finally:
        workers.release(engine, failed)
    drain()
    if ready or (n_shards is not None and next_index != n_shards):
        raise RuntimeError(
            f"merged {next_index} of {n_shards} shards; shards {sorted(ready)} are waiting for a missing one"
        )
    if folder is not None and merged is not None:
        folder.finish(kind.state(merged))
    return merged


def require_some(partial: Any, what: str = "the text set holds no texts") -> Any:
    if partial is None:
        raise HeadlightError(what)
    return partial


def run_report(
    kind: ShardKind,
    loaded: Any,
    items: Iterable[Any],
    *,
    options: RunOptions = SERIAL,
    progress: Callable[..., None] | None = None,
    cancelled: Callable[[], bool] | None = None,
    empty: str = "the text set holds no texts",
) -> Any:
    """``run_shards`` for callers holding the items (the window): ``progress(done, total)``
    with the items done after every shard, and a HeadlightError(``empty``) for an empty set."""
    on_shard = progress_callback(progress, sized(items))
    return require_some(
        run_shards(kind, loaded, items, options=options, on_shard=on_shard, cancelled=cancelled), empty
    )


def set_runner(
    loaded: Any,
    items: Iterable[Any],
    *,
    options: RunOptions = SERIAL,
    cancelled: Callable[[], bool] | None = None,
    progress: Callable[..., None] | None = None,
    progress_of: Callable[[Any], bool] = lambda kind: True,
) -> Callable[[Any, str], Any]:
    """``run(kind, label)``: ``run_report`` of a report kind over ``items`` as often as a
    report needs to read the set (a one-shot stream of items is read into a list first; a
    ``TextSource`` reads its file again); ``progress(done, total)`` follows the kinds that
    ``progress_of`` accepts."""
    from viewer.reports.textsets import TextSource

    if not isinstance(items, TextSource):
        items = list(items)

    def run(kind: Any, _label: str) -> Any:
        return run_report(
            kind,
            loaded,
            items.items() if isinstance(items, TextSource) else items,
            options=options,
            cancelled=cancelled,
            progress=progress if progress_of(kind) else None,
        )

    return run
