"""The worker thread: model work off the GUI thread, results back as messages.

One ``QThreadPool`` with a single thread runs the jobs of ``viewer.session.jobs`` one after another
(a torch model is not meant to be driven from two threads at once, and the open checkpoints live
in that thread's ``models`` dict).

A job never touches a Qt object: it puts plain messages (progress, result, failure,
cancellation) on a thread-safe ``queue.Queue`` and wakes the GUI thread with an argument-less
queued signal; the GUI thread then drains the queue and re-emits each message as a signal of
the ``Worker``. So widgets are only ever touched from the GUI thread, no Python object has to be
marshalled by Qt across threads, and nothing polls: while the model runs, the GUI thread sleeps
until there is a message (a poll every few milliseconds would take the GIL from the recording
each time). Cancelling sets a flag the job checks
between steps; a new job of the same name cancels the one it replaces.

The worker thread runs at a lower scheduling priority than the GUI thread (``WORKER_NICENESS``
more, on Linux, where niceness is per thread and inherited by the threads it starts: torch's and
numpy's): on a laptop's two cores, a recording, a check and a drawing all want the CPU, and the
one the user waits on from moment to moment is the event loop.
"""

from __future__ import annotations

import os
import queue
import sys
import threading
import traceback
from collections.abc import Callable
from typing import Any

from PySide6.QtCore import QObject, QRunnable, Qt, QThreadPool, Signal

from viewer.errors import HeadlightError
from viewer.session.jobs import Cancelled, JobContext

WORKER_NICENESS = 5


def lower_priority() -> None:
    """Raise this thread's niceness to ``WORKER_NICENESS`` (once; where the OS allows)."""
    if not sys.platform.startswith("linux"):
        return
    tid = threading.get_native_id()
    try:
        now = os.getpriority(os.PRIO_PROCESS, tid)
        if now < WORKER_NICENESS:
            os.setpriority(os.PRIO_PROCESS, tid, WORKER_NICENESS)
    except OSError:  # not allowed here: the thread keeps its priority
        pass


class Job(QRunnable):
    """One call of a job function on the worker thread; reports through ``outbox``."""

    def __init__(
        self,
        name: str,
        fn: Callable[..., Any],
        args: tuple,
        models: dict,
        outbox: queue.Queue,
        wake: Callable[[], None],
    ) -> None:
        super().__init__()
        self.setAutoDelete(False)
        self.name = name
        self.fn = fn
        self.args = args
        self.models = models
        self.outbox = outbox
        self.wake = wake
        self.cancel_flag = threading.Event()
        self.done = threading.Event()

    def cancel(self) -> None:
        self.cancel_flag.set()

    def _post(self, what: str, *payload: Any) -> None:
        self.outbox.put((self, what, payload))
        try:
            self.wake()
        except RuntimeError:  # the window is being torn down
            pass

    def _progress(self, done: int, total: int, message: str) -> None:
        self._post("progress", int(done), int(total), str(message))

    def run(self) -> None:  # worker thread
        lower_priority()
        ctx = JobContext(progress=self._progress, cancelled=self.cancel_flag.is_set, models=self.models)
        try:
            ctx.check()
            result = self.fn(ctx, *self.args)
            ctx.check()
        except Cancelled:
            self._post("cancelled")
        except HeadlightError as exc:
            self._post("failed", str(exc))
        except Exception as exc:  # noqa: BLE001 - any failure must reach the user as a dialog
            traceback.print_exc(file=sys.stderr)
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
            self._post(
                "failed",
                f"internal error in {self.name}: {type(exc).__name__}"
                + (f": {first[:200]}" if first else ""),
            )
        else:
            self._post("finished", result)
        finally:
            self.done.set()


class Worker(QObject):
    """Runs jobs one at a time; signals carry the job name so the window can route results."""

    started = Signal(str)  # name
    progress = Signal(str, int, int, str)  # name, done, total (0 = unknown), message
    finished = Signal(str, object)  # name, result
    failed = Signal(str, str)  # name, one-line message
    cancelled = Signal(str)  # name
    idle = Signal()
    _posted = Signal()  # emitted on the worker thread: messages are waiting

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.pool = QThreadPool(self)
        self.pool.setMaxThreadCount(1)
        self.models: dict[str, Any] = {}
        self.outbox: queue.Queue = queue.Queue()
        self._jobs: list[Job] = []
        self._retired: list[Job] = []  # kept alive until their thread has left run()
        self._posted.connect(self.deliver, Qt.ConnectionType.QueuedConnection)

    # -- submitting and cancelling ---------------------------------------------------------
    def submit(self, name: str, fn: Callable[..., Any], *args: Any, replace: bool = True) -> Job:
        """Queue ``fn(ctx, *args)``; ``replace`` cancels pending jobs of the same name."""
        if replace:
            for job in self._jobs:
                if job.name == name:
                    job.cancel()
        self._retired = [j for j in self._retired if not j.done.is_set()]
        job = Job(name, fn, args, self.models, self.outbox, self._posted.emit)
        self._jobs.append(job)
        self.started.emit(name)
        self.pool.start(job)
        return job

    def cancel(self, name: str | None = None, keep: tuple[str, ...] = ()) -> None:
        """Cancel every queued or running job (or those named ``name``), except those named in ``keep``."""
        for job in self._jobs:
            if (name is None or job.name == name) and job.name not in keep:
                job.cancel()

    @property
    def busy(self) -> bool:
        return bool(self._jobs)

    def running_jobs(self) -> list[str]:
        return [job.name for job in self._jobs if not job.cancel_flag.is_set()]

    def wait(self, msecs: int = 30000) -> bool:
        """Block until the pool is empty (for shutdown and tests); True when it is."""
        return bool(self.pool.waitForDone(msecs))

    def shutdown(self) -> None:
        self.cancel()
        self.pool.clear()
        self.pool.waitForDone(60000)

    # -- delivery on the GUI thread -----------------------------------------------------------
    def deliver(self) -> None:
        """Re-emit the messages the jobs have posted (GUI thread, woken by ``_posted``)."""
        while True:
            try:
                job, what, payload = self.outbox.get_nowait()
            except queue.Empty:
                break
            if what == "progress":
                if not job.cancel_flag.is_set():
                    self.progress.emit(job.name, *payload)
                continue
            self._retire(job)
            if what == "finished" and not job.cancel_flag.is_set():
                self.finished.emit(job.name, payload[0])
            elif what == "failed":
                self.failed.emit(job.name, payload[0])
            else:
                self.cancelled.emit(job.name)
            if not self._jobs:
                self.idle.emit()

    def _retire(self, job: Job) -> None:
        if job in self._jobs:
            self._jobs.remove(job)
            self._retired.append(job)
