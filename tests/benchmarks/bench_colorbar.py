"""A colour bar following a new range: matplotlib's rebuild against ``rescale_by_ticks``,
measured side by side on a 128-token pair grid.

Run:  python tests/benchmarks/bench_colorbar.py

Both figures hold the same 128 × 128 grid and a styled colour bar. Each step gives the image a
new colour range and draws the figure: matplotlib's own colour bar rebuilds its mesh, outline and
locators on every range change; the one prepared by ``viewer.figures.style.rescale_by_ticks``
moves its axis limits alone (``set_colorbar_range``). Prints the median time of a range change
alone (``set_clim``, before the draw) and of a range change with its draw, for both, and the
ratio.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import numpy as np  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from viewer.figures import style  # noqa: E402

T = 128


def figure(pinned: bool):
    fig = Figure(figsize=(7.0, 6.0), dpi=100)
    ax = fig.add_axes((0.1, 0.1, 0.7, 0.8))
    cax = fig.add_axes((0.85, 0.1, 0.03, 0.8))
    grid = np.random.default_rng(0).random((T, T))
    image = ax.imshow(grid, cmap=style.SEQUENTIAL, vmin=0.0, vmax=1.0, interpolation="nearest")
    colorbar = fig.colorbar(image, cax=cax)
    style.style_colorbar(colorbar, "attention probability")
    if pinned:
        style.rescale_by_ticks(colorbar)
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    return canvas, image, colorbar


def steps(pinned: bool, repeats: int = 40) -> tuple[float, float]:
    canvas, image, colorbar = figure(pinned)
    change, whole = [], []
    for k in range(repeats):
        hi = 0.5 + 0.5 * (k % 2)
        t0 = time.perf_counter()
        image.set_clim(0.0, hi)
        if pinned:
            style.set_colorbar_range(colorbar, 0.0, hi)
        t1 = time.perf_counter()
        canvas.draw()
        t2 = time.perf_counter()
        change.append(t1 - t0)
        whole.append(t2 - t0)
    return statistics.median(change), statistics.median(whole)


def main() -> None:
    own_change, own_whole = steps(pinned=False)
    ours_change, ours_whole = steps(pinned=True)
    print(
        f"range change: matplotlib's colour bar {own_change * 1e3:.2f} ms, "
        f"pinned {ours_change * 1e3:.2f} ms; "
        f"with the draw {own_whole * 1e3:.1f} ms against {ours_whole * 1e3:.1f} ms "
        f"({own_whole / ours_whole:.2f}x)"
    )


if __name__ == "__main__":
    main()
