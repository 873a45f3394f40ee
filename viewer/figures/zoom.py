"""Wheel zoom and drag pan for a token axis, kept inside the data's extent.

The wheel zooms around the cursor; dragging with the right or middle button (or the left button
with Shift held) pans. Token labels follow automatically: ``viewer.figures.style.TokenLocator``
re-decimates them for every new view.
"""

from __future__ import annotations

from dataclasses import dataclass

ZOOM_STEP = 1.25
MIN_SPAN = 4.0  # tokens visible at the deepest zoom


@dataclass
class Extent:
    x0: float
    x1: float
    y0: float  # top (smaller index) for image axes
    y1: float


class ZoomPan:
    """Zoom/pan state for one axes; ``both`` False restricts it to the x axis."""

    def __init__(self, both: bool = True) -> None:
        self.both = both
        self.ax = None
        self.extent: Extent | None = None
        self._drag: tuple[float, float, tuple, tuple] | None = None

    def attach(self, ax, extent: Extent) -> None:
        self.ax = ax
        self.extent = extent
        self._drag = None

    @property
    def zoomed(self) -> bool:
        if self.ax is None or self.extent is None:
            return False
        x0, x1 = self.ax.get_xlim()
        return abs((x1 - x0) - (self.extent.x1 - self.extent.x0)) > 1e-6 or (
            self.both
            and abs(abs(self.ax.get_ylim()[0] - self.ax.get_ylim()[1]) - abs(self.extent.y1 - self.extent.y0))
            > 1e-6
        )

    def reset(self) -> None:
        if self.ax is None or self.extent is None:
            return
        self.ax.set_xlim(self.extent.x0, self.extent.x1)
        self.ax.set_ylim(self.extent.y1, self.extent.y0)

    def _clamp(self, lo: float, hi: float, full_lo: float, full_hi: float) -> tuple[float, float]:
        span = min(max(hi - lo, MIN_SPAN), full_hi - full_lo)
        lo = max(full_lo, min(lo, full_hi - span))
        return lo, lo + span

    def zoom(self, x: float, y: float, steps: float) -> bool:
        """Zoom by ``ZOOM_STEP ** steps`` around data point (x, y); True if the view changed."""
        if self.ax is None or self.extent is None:
            return False
        factor = ZOOM_STEP ** (-steps)
        e = self.extent
        x0, x1 = self.ax.get_xlim()
        nx = self._clamp(x - (x - x0) * factor, x + (x1 - x) * factor, e.x0, e.x1)
        self.ax.set_xlim(*nx)
        if self.both:
            top, bottom = sorted(self.ax.get_ylim())
            ny = self._clamp(y - (y - top) * factor, y + (bottom - y) * factor, e.y0, e.y1)
            self.ax.set_ylim(ny[1], ny[0])
        return True

    def start_drag(self, px: float, py: float) -> None:
        if self.ax is None:
            return
        self._drag = (px, py, self.ax.get_xlim(), self.ax.get_ylim())

    @property
    def dragging(self) -> bool:
        return self._drag is not None

    def drag_to(self, px: float, py: float) -> bool:
        if self.ax is None or self.extent is None or self._drag is None:
            return False
        sx, sy, xlim, ylim = self._drag
        bbox = self.ax.get_window_extent()
        dx = (px - sx) / max(bbox.width, 1) * (xlim[1] - xlim[0])
        e = self.extent
        self.ax.set_xlim(*self._clamp(xlim[0] - dx, xlim[1] - dx, e.x0, e.x1))
        if self.both:
            dy = (py - sy) / max(bbox.height, 1) * (ylim[0] - ylim[1])
            top, bottom = ylim[1], ylim[0]
            ny = self._clamp(top + dy, bottom + dy, e.y0, e.y1)
            self.ax.set_ylim(ny[1], ny[0])
        return True

    def end_drag(self) -> None:
        self._drag = None
