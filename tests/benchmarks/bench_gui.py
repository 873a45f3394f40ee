"""Window benchmarks, measured side by side in one run (not part of the test suite).

    QT_QPA_PLATFORM=offscreen python tests/benchmarks/bench_gui.py [--model DIR] [--switch-interval S]

Prints four ratios (lower is better) with their goals:

1. head switch: selecting another head until the pair grid is repainted, against a bare
   matplotlib imshow of the same grid on a canvas of the same size (set_data + repaint);
   goal <= 1.5x.
2. run to painted: Ctrl+Enter until the pair grid and head map are repainted, against
   ``LoadedModel.record`` alone on the same 128-token text, the two alternated and each after
   one idle second of the event loop (a run follows typing; timed back to back, record() runs
   with torch's threads awake and takes 40-60% less, measured); goal <= 1.5x.
3. start-up: a fresh process until the window is visible, against a fresh process until
   ``import transformers`` has finished; goal <= 0.5x.
4. responsiveness: the longest gap between 10 ms timer ticks of the event loop during a
   512-token run (recording, check, drawing); goal <= 100 ms.

The model defaults to the MiniLM folder of the test extras (6 layers × 12 heads, 512 tokens).
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from collections.abc import Callable
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from PySide6.QtCore import QElapsedTimer, QEventLoop, QSettings, QTimer  # noqa: E402

# How often the benchmark looks at its conditions. Each look runs Python on the GUI thread and so
# takes the GIL from the render thread; paint times are read off the paint itself (PaintProbe).
POLL_MS = 5

WORDS = (
    "the mechanic at the co-op trued the rear wheel then she checked the brake cables "
    "twice and wrote a note for the member about the worn chain"
).split()


def text_of(loaded, n_tokens: int) -> str:
    """A text that tokenises to exactly ``n_tokens`` tokens (specials included)."""
    words: list[str] = []
    while True:
        words.append(WORDS[len(words) % len(WORDS)])
        ids = loaded.tokenizer(" ".join(words))["input_ids"]
        if len(ids) >= n_tokens:
            break
    while len(loaded.tokenizer(" ".join(words))["input_ids"]) > n_tokens:
        words.pop()
    return " ".join(words)


def pump_until(condition: Callable[[], bool], timeout: float = 600.0) -> None:
    """Run the event loop until ``condition()`` holds (checked every ``POLL_MS``).

    A real ``QEventLoop`` waits in C++ with the GIL released, like the application does; a
    Python loop around ``processEvents`` would compete with the worker thread for the GIL.
    """
    if condition():
        return
    loop = QEventLoop()
    timer = QTimer()
    timer.setInterval(POLL_MS)
    end = time.monotonic() + timeout

    def check() -> None:
        if condition() or time.monotonic() > end:
            loop.quit()

    timer.timeout.connect(check)
    timer.start()
    while not condition() and time.monotonic() <= end:
        loop.exec()  # may return early when a nested loop quits; then wait again
    timer.stop()
    if not condition():
        import traceback

        traceback.print_stack(limit=4)
        raise SystemExit("benchmark: timed out")


class PaintProbe:
    """Counts paint events of a canvas (wraps its paintEvent) and times the last one."""

    def __init__(self, canvas) -> None:
        self.count = 0
        self.last = 0.0  # time.perf_counter() at the end of the last paint
        self.waiting: tuple[Callable[[], bool], QEventLoop] | None = None
        original = canvas.paintEvent

        def paint(event, _original=original):
            _original(event)
            self.count += 1
            self.last = time.perf_counter()
            if self.waiting is not None and self.waiting[0]():
                self.waiting[1].quit()

        canvas.paintEvent = paint

    def wait(self, condition: Callable[[], bool], timeout: float = 600.0) -> None:
        """Run the event loop until a paint finds ``condition()`` true, without polling: no
        Python runs on the GUI thread meanwhile except the application's own event handling
        (a poll would take the GIL and a core from the recording it measures)."""
        loop = QEventLoop()
        self.waiting = (condition, loop)
        end = time.monotonic() + timeout
        QTimer.singleShot(int(timeout * 1000), loop.quit)
        while not condition() and time.monotonic() <= end:
            loop.exec()
        self.waiting = None
        if not condition():
            raise SystemExit("benchmark: timed out waiting for a paint")


def idle(seconds: float) -> None:
    """Let the event loop run for a while (the other panes finish their redraws)."""
    until = time.monotonic() + seconds
    pump_until(lambda: time.monotonic() > until)


def median_time(fn: Callable[[], None], repeats: int, settle: float = 0.0) -> float:
    """Median wall time of ``fn``; with ``settle`` the event loop idles before each call."""
    times = []
    for _ in range(repeats):
        if settle:
            idle(settle)
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


# -- 1. head switch -----------------------------------------------------------------------------


def bench_head_switch(window, repeats: int = 24) -> tuple[float, float]:
    """(select a head → its pair grid painted, set_data → bare canvas painted), medians.

    Both are timed to the end of the paint that shows the new values (``PaintProbe.last``),
    with the event loop idle before each switch so the other panes have finished the last one.
    """
    import numpy as np
    from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
    from matplotlib.figure import Figure

    pane = window.pair_grid
    probe = PaintProbe(pane.canvas)
    s = window.state
    heads = [(layer, head) for layer in range(s.n_layers) for head in range(s.n_heads)]
    k = [0]

    def switch() -> float:
        k[0] += 1
        before = probe.count
        start = time.perf_counter()
        s.select_head(*heads[k[0] % len(heads)])
        pump_until(lambda: probe.count > before and pane.idle)
        return probe.last - start

    switch()
    ours = median_paint(switch, repeats)

    t = s.n_tokens
    fig = Figure(figsize=pane.figure.get_size_inches(), dpi=pane.figure.dpi)
    canvas = FigureCanvasQTAgg(fig)
    canvas.resize(pane.canvas.size())
    canvas.show()
    ax = fig.add_subplot()
    grids = [np.random.default_rng(i).random((t, t)) for i in range(4)]
    image = ax.imshow(grids[0], interpolation="nearest", aspect="auto")
    bare_probe = PaintProbe(canvas)
    pump_until(lambda: bare_probe.count > 0)
    j = [0]

    def bare() -> float:
        j[0] += 1
        before = bare_probe.count
        start = time.perf_counter()
        image.set_data(grids[j[0] % 4])
        canvas.draw_idle()
        pump_until(lambda: bare_probe.count > before and not getattr(canvas, "_draw_pending", False))
        return bare_probe.last - start

    bare()
    reference = median_paint(bare, repeats)
    canvas.close()
    return ours, reference


def median_paint(fn: Callable[[], float], repeats: int, settle: float = 0.4) -> float:
    """Median of the times ``fn`` returns, the event loop idling ``settle`` s before each."""
    times = []
    for _ in range(repeats):
        idle(settle)
        times.append(fn())
    return statistics.median(times)


# -- 2. run to painted ---------------------------------------------------------------------------


def bench_run(window, loaded, text: str, repeats: int = 5) -> tuple[float, float, float]:
    """(run → pair grid painted, run → head map with the check painted, record() alone).

    Each time is taken at the end of the first paint of the new run (``PaintProbe``), so
    other panes redrawing afterwards do not count.
    """
    grid, heads = PaintProbe(window.pair_grid.canvas), PaintProbe(window.head_map.canvas)
    first_paint: list[float] = []
    full_paint: list[float] = []

    def run() -> None:
        old = window.state.analysis
        window.text_edit.setPlainText(text)
        g0 = grid.count
        summarised_at: list[int | None] = [None]

        def summary(_analysis) -> None:
            if window.state.analysis is not None and window.state.analysis.summarised:
                summarised_at[0] = heads.count  # head-map paints before this are of the old run

        window.state.events.analysis.connect(summary)
        start = time.perf_counter()
        window.run_current()
        grid.wait(lambda: window.state.analysis is not old and grid.count > g0)
        grid_painted = grid.last
        pump_until(
            lambda: (
                window.state.analysis.summarised
                and summarised_at[0] is not None
                and heads.count > summarised_at[0]
                and window.head_map.idle
            ),
            timeout=60,
        )
        window.state.events.analysis.disconnect(summary)
        first_paint.append(grid_painted - start)
        full_paint.append(heads.last - start)

    run()
    first_paint.clear()
    full_paint.clear()
    alone: list[float] = []
    for _ in range(repeats):
        # side by side, each after the same second of an idle event loop: a run right after
        # an idle second pays the wake-up of torch's threads (and of the processor), and a
        # record() timed back to back would not
        idle(1.0)
        run()
        idle(1.0)
        start = time.perf_counter()
        loaded.record(text)
        alone.append(time.perf_counter() - start)
    return statistics.median(first_paint), statistics.median(full_paint), statistics.median(alone)


# -- 3. start-up ---------------------------------------------------------------------------------

VISIBLE = textwrap.dedent("""
    import os, sys, time
    os.environ["QT_QPA_PLATFORM"] = "offscreen"
    from pathlib import Path
    from PySide6.QtCore import QSettings
    from viewer.gui.app import application
    from viewer.gui.window import MainWindow
    app = application()
    w = MainWindow(settings=QSettings(sys.argv[1] + "/s.ini", QSettings.Format.IniFormat),
                   config_dir=Path(sys.argv[1]), restore_geometry=False)
    w.show()
    app.processEvents()
    assert w.isVisible() and "torch" not in sys.modules
    print(time.time(), flush=True)
""")
IMPORT = "import time, transformers; print(time.time(), flush=True)"


def fresh(code: str, *args: str) -> float:
    start = time.time()
    out = subprocess.run(
        [sys.executable, "-c", code, *args], capture_output=True, text=True, check=True, cwd=ROOT
    )
    return float(out.stdout.strip().splitlines()[-1]) - start


def bench_startup(repeats: int = 5) -> tuple[float, float]:
    tmp = tempfile.mkdtemp(prefix="headlight-bench-")
    visible, imports = [], []
    for _ in range(repeats):  # interleaved, so both see the same machine load
        visible.append(fresh(VISIBLE, tmp))
        imports.append(fresh(IMPORT))
    return statistics.median(visible), statistics.median(imports)


# -- 4. responsiveness ---------------------------------------------------------------------------


def open_bench_window(model: str, *, evidence: bool):
    """The window as ``headlight`` opens it (collector tuned), on ``model``, ready to run."""
    from viewer.gui.app import application, tune_collector
    from viewer.gui.window import MainWindow

    application()
    tune_collector()  # as ``headlight`` does
    tmp = Path(tempfile.mkdtemp(prefix="headlight-bench-"))
    window = MainWindow(
        settings=QSettings(str(tmp / "s.ini"), QSettings.Format.IniFormat),
        config_dir=tmp,
        restore_geometry=False,
    )
    window.evidence_action.setChecked(evidence)
    window.resize(1600, 1000)
    window.show()
    window.start(model=model, restore_last=False)
    pump_until(lambda: window.canvases_ready and window.state.model is not None and not window.worker.busy)
    return window


class GapClock:
    """The longest time between ticks of a 10 ms timer of the GUI thread (``start``, ``stop``,
    ``longest`` in ms): how long the event loop was kept from turning."""

    def __init__(self) -> None:
        self.clock = QElapsedTimer()
        self.clock.start()
        self.longest = 0
        self.last = 0
        self.timer = QTimer()
        self.timer.setInterval(10)
        self.timer.timeout.connect(self._tick)

    def _tick(self) -> None:
        now = self.clock.elapsed()
        self.longest = max(self.longest, now - self.last)
        self.last = now

    def start(self) -> None:
        self.timer.start()
        self.last = self.clock.elapsed()

    def stop(self) -> None:
        self.timer.stop()


def bench_gaps(window, text: str) -> tuple[float, int]:
    """Longest event-loop gap (ms) while a long text is recorded, checked and drawn."""
    gaps = GapClock()
    probe = PaintProbe(window.pair_grid.canvas)
    before = probe.count
    old = window.state.analysis
    window.text_edit.setPlainText(text)
    gaps.start()
    window.run_current()
    pump_until(lambda: window.state.analysis is not old and probe.count > before and window.pair_grid.idle)
    pump_until(lambda: window.state.analysis.summarised)
    idle(1.0)  # the other panes' draws
    gaps.stop()
    return float(gaps.longest), window.state.analysis.recording.n_tokens


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--model", help="model folder (default: the MiniLM test model)")
    parser.add_argument(
        "--switch-interval",
        type=float,
        metavar="S",
        help="Python's GIL switch interval instead of the window's (Python's default: 0.005)",
    )
    args = parser.parse_args(argv)
    if args.model is None:
        from tests.conftest import minilm_folder

        args.model = str(minilm_folder())

    from viewer.model.loader import open_model

    if args.switch_interval is not None:
        sys.setswitchinterval(args.switch_interval)
    window = open_bench_window(args.model, evidence=False)  # the run itself, not the evidence
    loaded = open_model(args.model)
    text128 = text_of(loaded, 128)
    long_text = text_of(loaded, min(512, loaded.max_tokens))
    window.text_edit.setPlainText(text128)
    window.run_current()
    pump_until(lambda: window.state.analysis is not None)

    rows = []
    run_ours, run_all, run_ref = bench_run(window, loaded, text128)
    rows.append(("run to pair grid painted, 128 tok", run_ours, run_ref, 1.5, "record() alone"))
    rows.append(("  … and head map + check painted", run_all, run_ref, None, "record() alone"))
    switch_ours, switch_ref = bench_head_switch(window)
    rows.append(
        (
            f"head switch repaint, {window.state.n_tokens}² grid",
            switch_ours,
            switch_ref,
            1.5,
            "bare imshow draw",
        )
    )
    visible, imports = bench_startup()
    rows.append(("time to a visible window", visible, imports, 0.5, "import transformers"))
    gap, n = bench_gaps(window, long_text)
    window.close()

    print(f"model: {args.model} ({loaded.n_layers} layers × {loaded.n_heads} heads)")
    print(f"{'measure':<34} {'ours':>9} {'reference':>10} {'ratio':>7} {'goal':>6}  reference")
    for name, ours, ref, goal, what in rows:
        ratio = ours / ref
        if goal is None:
            print(f"{name:<34} {ours * 1000:>7.1f}ms {ref * 1000:>8.1f}ms {ratio:>6.2f}x {'':>6}  {what}")
            continue
        verdict = "ok" if ratio <= goal else "MISSED"
        print(
            f"{name:<34} {ours * 1000:>7.1f}ms {ref * 1000:>8.1f}ms {ratio:>6.2f}x "
            f"{goal:>5.1f}x  {what} [{verdict}]"
        )
    print(
        f"{'longest event-loop gap, ' + str(n) + ' tokens':<34} {gap:>7.0f}ms "
        f"{'':>10} {'':>7} {'100':>5}ms  [{'ok' if gap <= 100 else 'MISSED'}]"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
