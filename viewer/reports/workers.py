"""Where shards run: this process, local worker processes, or an existing Dask cluster.

All three run the same map step (``map_shard``) on the same shards; only the submitting
differs. The engines hand back ``(shard index, items, state)`` as shards finish, and the shard
engine (``viewer.reports.shards``) merges them in shard order.

- ``InProcess``: the caller's own model, shard after shard (the window; sets of one shard).
- ``LocalPool``: ``concurrent.futures.ProcessPoolExecutor`` with the spawn start method and an
  initializer that opens the model once per process and sets one torch thread each. Chosen
  over dask's ``LocalCluster`` for the local case because it needs no scheduler or nanny
  processes and opens no network port, starts in the time the workers take to import torch,
  and stops with the command (each worker also leaves when the command's process dies).
- ``DaskCluster``: ``distributed.Client(address)`` on a cluster the user started with Dask's
  own ``dask scheduler`` / ``dask worker`` commands. Each worker process opens the model folder
  by path once (``worker_model`` caches it per process), so the folder must be reachable at the
  same path from every worker.

At most ``ahead`` shards beyond the next one to merge are in flight, so memory stays bounded
however long the set is.
"""

from __future__ import annotations

import atexit
import os
import socket
import threading
from collections.abc import Callable, Iterator
from concurrent.futures import FIRST_COMPLETED
from dataclasses import dataclass
from typing import Any

from viewer import __version__
from viewer.errors import HeadlightError
from viewer.reports.shardtypes import RunOptions, Shard, ShardKind, State

Result = tuple[int, int, State]  # (shard index, items in the shard, partial state)


@dataclass(frozen=True)
class ModelSpec:
    """What a worker needs to open the model: the folder by path, and how to run it."""

    folder: str  # absolute path, the same on every worker
    allow_pickle: bool = False
    threads: int | None = 1  # torch threads in the worker (None: the worker's own setting)
    version: str = __version__  # the Headlight version of the submitting command
    max_tokens: int | None = None  # texts are cut to this (the command's --max-tokens)


def model_spec(loaded: Any, threads: int | None) -> ModelSpec:
    pickled = any(p.suffix == ".bin" for p in getattr(loaded, "weight_files", ()))
    return ModelSpec(
        os.path.abspath(loaded.folder), allow_pickle=pickled, threads=threads, max_tokens=loaded.max_tokens
    )


_models: dict[tuple[str, bool], Any] = {}
_lock = threading.Lock()  # one LoadedModel runs one forward at a time (its hooks hold state)


def worker_model(spec: ModelSpec) -> Any:
    """The model of ``spec`` in this process, opened on first use and kept (one at a time)."""
    key = (spec.folder, spec.allow_pickle)
    if key not in _models:
        from viewer.model.loader import open_model

        if spec.version != __version__:
            raise HeadlightError(
                f"worker {socket.gethostname()} runs Headlight {__version__}, "
                f"the command {spec.version}; install the same version"
            )
        try:
            loaded = open_model(spec.folder, allow_pickle=spec.allow_pickle)
        except HeadlightError as exc:
            raise HeadlightError(f"on worker {socket.gethostname()}: {exc.message}") from None
        _models.clear()
        _models[key] = loaded
    _models[key].text.limit(spec.max_tokens)
    if spec.threads is not None:
        import torch

        if torch.get_num_threads() != spec.threads:
            torch.set_num_threads(spec.threads)
    return _models[key]


def _no_check() -> None:
    pass


def map_shard(spec: ModelSpec, kind: ShardKind, shard: Shard) -> Result:
    """The map step in a worker: open (or reuse) the model, fold the shard, return its state."""
    with _lock:
        loaded = worker_model(spec)
        partial = kind.map(loaded, shard, _no_check)
        return shard.index, len(shard.items), kind.state(partial)


def _leave_with_parent() -> None:
    """End this worker process when the command that started it dies (even by SIGKILL)."""
    import multiprocessing
    from multiprocessing.connection import wait

    parent = multiprocessing.parent_process()
    if parent is None:
        return

    def watch() -> None:
        wait([parent.sentinel])
        os._exit(1)

    threading.Thread(target=watch, name="headlight-parent-watch", daemon=True).start()


def _init_pool_worker(spec: ModelSpec) -> None:
    _leave_with_parent()
    try:
        worker_model(spec)  # open the model once, before the first shard arrives
    except HeadlightError:
        pass  # map_shard opens it again and the error travels back with the shard


class InProcess:
    """Shards one after another in this process, with the caller's model."""

    ahead = 1

    def __init__(self, loaded: Any, threads: int | None):
        self.loaded = loaded
        self.threads = threads
        self._before: int | None = None

    def run(
        self,
        kind: ShardKind,
        shards: Iterator[Shard],
        check: Callable[[], None],
        may_start: Callable[[int], bool],
    ) -> Iterator[Result]:
        import torch

        if self.threads is not None and torch.get_num_threads() != self.threads:
            self._before = torch.get_num_threads()
            torch.set_num_threads(self.threads)
        for shard in shards:
            check()
            partial = kind.map(self.loaded, shard, check)
            yield shard.index, len(shard.items), kind.state(partial)

    def close(self) -> None:
        if self._before is not None:
            import torch

            torch.set_num_threads(self._before)
            self._before = None


class _Submitting:
    """Keep up to ``ahead`` shards in flight on an executor-like object; yield as they finish."""

    ahead = 2

    def _submit(self, spec: ModelSpec, kind: ShardKind, shard: Shard, run: str) -> Any:
        raise NotImplementedError

    def _wait(self, futures: set[Any]) -> set[Any]:
        raise NotImplementedError

    def _cancel(self, futures: set[Any]) -> None:
        for f in futures:
            f.cancel()

    def run(
        self,
        kind: ShardKind,
        shards: Iterator[Shard],
        check: Callable[[], None],
        may_start: Callable[[int], bool],
    ) -> Iterator[Result]:
        pending: set[Any] = set()
        index: dict[Any, int] = {}
        waiting: Shard | None = None
        source = iter(shards)
        run = os.urandom(4).hex()
        try:
            while True:
                while len(pending) < self.ahead:
                    if waiting is None:
                        waiting = next(source, None)
                    if waiting is None or not may_start(waiting.index):
                        break
                    future = self._submit(self.spec, kind, waiting, run)
                    index[future] = waiting.index
                    pending.add(future)
                    waiting = None
                if not pending:
                    return
                done = self._wait(pending)
                pending -= done
                for future in sorted(done, key=index.__getitem__):
                    del index[future]
                    yield future.result()
                check()
        except BaseException:
            self._cancel(pending)
            raise


class LocalPool(_Submitting):
    """``workers`` spawned processes on this machine, one torch thread each."""

    def __init__(self, loaded: Any, workers: int, threads: int | None):
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        self.spec = model_spec(loaded, threads=threads or 1)
        self.ahead = 2 * workers
        self.pool = ProcessPoolExecutor(
            max_workers=workers,
            mp_context=multiprocessing.get_context("spawn"),
            initializer=_init_pool_worker,
            initargs=(self.spec,),
        )

    def _submit(self, spec: ModelSpec, kind: ShardKind, shard: Shard, run: str) -> Any:
        return self.pool.submit(map_shard, spec, kind, shard)

    def _wait(self, futures: set[Any]) -> set[Any]:
        from concurrent.futures import wait

        return set(wait(futures, return_when=FIRST_COMPLETED).done)

    def close(self) -> None:
        self.pool.shutdown(wait=True, cancel_futures=True)


class DaskCluster(_Submitting):
    """The shards as tasks on an existing Dask cluster (``distributed.Client(address)``)."""

    def __init__(self, loaded: Any, address: str, threads: int | None, timeout: float = 20.0):
        try:
            from distributed import Client
        except ImportError:  # pragma: no cover - a dependency of headlight
            raise HeadlightError(
                "--cluster needs dask.distributed: pip install 'dask[distributed]'"
            ) from None
        try:
            self.client = Client(address, timeout=timeout, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            reason = " ".join(str(exc).split())[:200] or type(exc).__name__
            raise HeadlightError(f"cannot reach the Dask scheduler at {address}: {reason}") from None
        try:
            self.client.wait_for_workers(1, timeout=timeout)
        except (OSError, TimeoutError):
            self.client.close()
            raise HeadlightError(
                f"the Dask scheduler at {address} has no workers; start some with: dask worker {address}"
            ) from None
        slots = sum(self.client.nthreads().values())
        self.spec = model_spec(loaded, threads=threads)
        self.ahead = 2 * max(1, slots)

    def _submit(self, spec: ModelSpec, kind: ShardKind, shard: Shard, run: str) -> Any:
        key = f"headlight-{kind.name}-{run}-{shard.index}"
        return self.client.submit(map_shard, spec, kind, shard, key=key, pure=False)

    def _wait(self, futures: set[Any]) -> set[Any]:
        from distributed import wait

        with self.client.as_current():
            return set(wait(list(futures), return_when="FIRST_COMPLETED").done)

    def _cancel(self, futures: set[Any]) -> None:
        if futures:
            self.client.cancel(list(futures))

    def close(self) -> None:
        self.client.close()


_kept: dict[tuple, Any] = {}  # pools and cluster clients, kept for the next report


def engine_for(options: RunOptions, loaded: Any, shards: int | None) -> Any:
    """The engine ``options`` ask for; a set of one shard always runs in this process.

    Worker pools and cluster clients are kept for the next report of the same model (a card
    runs five), since starting a worker costs an import of torch and transformers and an open
    of the model; ``close_engines`` ends them (the command does so before it exits).
    """
    workers = options.workers if shards is None else min(options.workers, shards)
    if not options.cluster and workers <= 1:
        return InProcess(loaded, options.threads)
    key = (options.cluster, workers, options.threads, os.path.abspath(loaded.folder))
    if key not in _kept:
        if options.cluster:
            _kept[key] = DaskCluster(loaded, options.cluster, options.threads)
        else:
            _kept[key] = LocalPool(loaded, workers, options.threads)
    return _kept[key]


def release(engine: Any, failed: bool) -> None:
    """After a report: a failed run's pool or client is closed (its workers may still be busy
    with cancelled shards); a kept one that ran well stays for the next report."""
    if isinstance(engine, InProcess):
        engine.close()
        return
    if failed:
        for key, kept in list(_kept.items()):
            if kept is engine:
                del _kept[key]
        engine.close()


def close_engines() -> None:
    """End every kept worker pool and cluster client."""
    while _kept:
        _, engine = _kept.popitem()
        engine.close()


atexit.register(close_engines)
