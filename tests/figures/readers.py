"""Reading a drawn matplotlib figure back, for tests: what an axis shows, a colour bar's units."""

from __future__ import annotations

from matplotlib.axes import Axes


def visible_tick_labels(ax: Axes, which: str) -> list[str]:
    """The non-empty tick label strings the axis shows at its current size and view, as
    matplotlib's own locator and formatter choose them."""
    axis = ax.xaxis if which == "x" else ax.yaxis
    ticks = axis.get_major_locator()()
    vmin, vmax = sorted(axis.get_view_interval())
    fmt = axis.get_major_formatter()
    shown = [t for t in ticks if vmin <= t <= vmax]
    return [s for s in (fmt(t) for t in shown) if s]


def colorbar_units(cbar) -> str:
    """The units label of a colour bar styled by ``viewer.figures.style.style_colorbar``."""
    units = getattr(cbar, "units", None)
    return units.get_text() if units is not None else cbar.ax.get_ylabel()
