"""The one place for Headlight's figure style: colour maps, masked cells, fonts, token labels.

Every builder in ``viewer.figures`` takes its colours and sizes from here, so a pane on screen and
the same figure exported for a model card look alike.

* **Sequential** values (attention probabilities, entropy, scores) use ``cividis``, a colour map
  that is perceptually uniform and designed to read the same for viewers with red-green colour
  vision deficiency (Nuñez, Anderton & Renslow 2018, PLOS ONE 13(7): e0199239).
* **Differences** (compare mode, signed evidence) use the diverging ``RdBu_r`` with its centre
  pinned to zero by ``TwoSlopeNorm``, so white always means "no difference".
* **Masked cells** (keys a causal query may not see, undefined metrics) are not a colour of the
  map at all: they are left transparent over a light hatched background, so a masked cell can
  never be mistaken for a zero.
* **Token labels** are decimated by ``TokenLocator``: it places at most one label per label
  height of screen space, re-computed whenever the view is zoomed or panned, so labels never
  overlap however long the text.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import matplotlib as mpl
import numpy as np
from matplotlib.axes import Axes
from matplotlib.colors import Colormap, Normalize, TwoSlopeNorm
from matplotlib.patches import Rectangle
from matplotlib.ticker import FuncFormatter, Locator, MaxNLocator
from matplotlib.transforms import Affine2D, offset_copy

SEQUENTIAL = "cividis"
DIVERGING = "RdBu_r"

MASK_FACE = "#f4f1ea"  # background behind masked (transparent) cells
MASK_HATCH = "////"
MASK_EDGE = "#b9b2a3"  # colour of the hatch lines
SELECTION = "#e8590c"  # outline of the selected cell, row or bar (orange, away from cividis)
ACCENT = "#1f5f8b"  # bars and markers that are not selected
MUTED = "#6c757d"

FONT_SIZE = 8.0  # tick labels, annotations
LABEL_SIZE = 8.5  # axis labels, colour-bar labels
TITLE_SIZE = 9.5
LABEL_SPACING = 1.6  # a token label needs this many font heights of room along its axis
MAX_TOKEN_CHARS = 14
TICK_LENGTH_PT = 2.0  # token axes: tick length and the gap between tick and label
TICK_PAD_PT = 1.5

ATTENTION_UNITS = "attention probability"


def sequential_cmap() -> Colormap:
    """The sequential map with masked ("bad") values fully transparent."""
    return mpl.colormaps[SEQUENTIAL].with_extremes(bad=(0.0, 0.0, 0.0, 0.0))


def diverging_cmap() -> Colormap:
    """The diverging map for differences, masked values transparent."""
    return mpl.colormaps[DIVERGING].with_extremes(bad=(0.0, 0.0, 0.0, 0.0))


def diverging_norm(values: np.ndarray) -> TwoSlopeNorm:
    """A norm centred on 0, symmetric, spanning the largest |value| (at least 1e-12)."""
    finite = np.asarray(values, dtype=np.float64)
    finite = finite[np.isfinite(finite)]
    reach = float(np.abs(finite).max()) if finite.size else 1.0
    reach = max(reach, 1e-12)
    return TwoSlopeNorm(vcenter=0.0, vmin=-reach, vmax=reach)


def sequential_norm(values: np.ndarray, vmin: float | None = 0.0) -> Normalize:
    """A norm from ``vmin`` (default 0; None for the data minimum) to the data maximum."""
    finite = np.asarray(values, dtype=np.float64)
    finite = finite[np.isfinite(finite)]
    lo = float(finite.min()) if (vmin is None and finite.size) else (vmin or 0.0)
    hi = float(finite.max()) if finite.size else 1.0
    if not hi > lo:
        hi = lo + 1.0 if lo == 0 else lo + abs(lo) * 1e-6 + 1e-12
    return Normalize(vmin=lo, vmax=hi)


def mask_background(ax: Axes, extent: tuple[float, float, float, float]) -> Rectangle:
    """Hatched background behind an image, showing through its masked (transparent) cells.

    ``extent`` is (left, right, bottom, top) in data coordinates, as for ``imshow``.
    """
    left, right, bottom, top = extent
    patch = Rectangle(
        (min(left, right), min(bottom, top)),
        abs(right - left),
        abs(top - bottom),
        facecolor=MASK_FACE,
        edgecolor=MASK_EDGE,
        hatch=MASK_HATCH,
        linewidth=0,
        zorder=0,
    )
    ax.add_patch(patch)
    return patch


def cell_grid(ax: Axes, values, *, cmap, norm, draw=None):
    """A grid of (rows, columns) cells centred on whole coordinates, row 0 on top, over the hatched
    background of masked cells, with the axes framed to it and styled: the layout every heat grid
    shares. ``draw`` makes the image (``ax.imshow`` by default; ``cells.cell_image`` for a
    ``CellImage``) and gets imshow's arguments."""
    n_rows, n_cols = np.shape(values)
    extent = (-0.5, n_cols - 0.5, n_rows - 0.5, -0.5)
    mask_background(ax, extent)
    image = (draw or ax.imshow)(
        values,
        cmap=cmap,
        norm=norm,
        aspect="auto",
        interpolation="nearest",
        extent=extent,
        origin="upper",
        zorder=1,
    )
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    style_axes(ax)
    return image


def text_colour_for(rgba: Sequence[float]) -> str:
    """Black or white, whichever reads better on a cell of colour ``rgba`` (WCAG luminance)."""

    def channel(c: float) -> float:
        return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = (channel(float(c)) for c in rgba[:3])
    luminance = 0.2126 * r + 0.7152 * g + 0.0722 * b
    return "black" if luminance > 0.179 else "white"


# -- token labels ---------------------------------------------------------------------------------


def token_label(token: str, max_chars: int = MAX_TOKEN_CHARS) -> str:
    """A token as it should appear on an axis: markers made visible, mathtext escaped, shortened.

    Byte-level BPE's space marker ``Ġ`` and SentencePiece's ``▁`` become a leading ``·`` so that
    word starts stay visible; WordPiece's ``##`` is kept (it says "continues a word"); newlines and
    tabs become ``⏎`` and ``⇥``; ``$`` is escaped so matplotlib never reads it as mathtext.
    """
    text = str(token)
    if text[:1] in ("Ġ", "▁"):
        text = "·" + text[1:]
    text = text.replace("Ċ", "⏎").replace("\n", "⏎").replace("\t", "⇥")
    if text == "":
        text = "∅"
    if len(text) > max_chars:
        text = text[: max_chars - 1] + "…"
    return text.replace("$", r"\$")


def token_labels(tokens: Sequence[str]) -> list[str]:
    return [token_label(t) for t in tokens]


def widest_in(labels, font_size: float = FONT_SIZE, candidates: int = 32) -> float:
    """Width in inches of the widest of ``labels`` in matplotlib's default font, from the glyph
    advances matplotlib itself lays text out with (``TextToPath``); only the ``candidates``
    longest labels are measured ("someone" is wider than 0.6 em a character, "[CLS]" than
    "iii"), so a text of thousands of tokens costs a few measurements."""
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import text_to_path

    unique = sorted({str(s).replace("\\$", "$") for s in labels}, key=len, reverse=True)[:candidates]
    if not unique:
        return 0.0
    prop = FontProperties(size=font_size)
    widest = max(text_to_path.get_text_width_height_descent(s, prop, ismath=False)[0] for s in unique)
    return widest / 72.0  # text_to_path measures in points at this size


def nice_step(raw: float) -> int:
    """The smallest of 1, 2, 5, 10, 20, 50, ... that is at least ``raw`` (round steps make the
    labelled positions easy to count)."""
    if raw <= 1:
        return 1
    exponent = math.floor(math.log10(raw))
    for mantissa in (1, 2, 5, 10):
        step = mantissa * 10**exponent
        if step >= raw:
            return int(step)
    return int(10 ** (exponent + 1))


def label_step(span: float, room_px: float, font_px: float) -> int:
    """How many tokens apart labels must be so that ``span`` tokens fit in ``room_px`` pixels.

    One label needs ``LABEL_SPACING`` font heights; the step is the ``nice_step`` that leaves
    that much room.
    """
    if span <= 0 or room_px <= 0:
        return 1
    capacity = max(1.0, room_px / (font_px * LABEL_SPACING))
    return nice_step(span / capacity)


ROW_SPACING = 1.25
"""Font heights a one-line label needs across its line: the font's ascent plus descent is about
1.17 em in DejaVu Sans (matplotlib's default face), and a little air between labels."""


def index_step(span: float, room_px: float, need_px: float) -> int:
    """Every how many rows (or columns) a label can be written when ``span`` of them share
    ``room_px`` pixels and one label needs ``need_px`` pixels along the axis (every 2nd, 3rd,
    ...: a handful of rows, unlike a text's tokens, is counted without round steps)."""
    if span <= 0 or room_px <= 0:
        return 1
    return max(1, math.ceil(need_px * span / room_px - 1e-9))


class IndexLocator(Locator):
    """Ticks at the integer positions 0 … n−1 of a labelled axis (layers, heads, evidence
    rows), thinned to every ``index_step``-th when the axis is too short for one label each.

    ``need_pt`` is the room one label takes along the axis in points: a line's height across
    horizontal text, the widest label's width along it."""

    def __init__(self, n: int, need_pt: float) -> None:
        self.n = int(n)
        self.need_pt = float(need_pt)

    def step(self) -> int:
        axes = self.axis.axes
        box = axes.get_window_extent()
        room = float(box.width if self.axis is axes.xaxis else box.height)
        lo, hi = sorted(self.axis.get_view_interval())
        return index_step(hi - lo, room, self.need_pt * axes.figure.dpi / 72.0)

    def __call__(self) -> list[int]:
        lo, hi = sorted(self.axis.get_view_interval())
        step = self.step()
        first, last = max(0, math.ceil(lo)), min(self.n - 1, math.floor(hi))
        return [i for i in range(first + (-first) % step, last + 1, step)]


def set_index_axis(ax: Axes, which: str, labels: Sequence[str], *, along: bool = False) -> IndexLocator:
    """Label ``ax``'s x or y axis at 0 … n−1 with ``labels`` through an ``IndexLocator``;
    ``along`` when the labels are written along the axis (horizontal text on an x axis), so a
    label needs its width rather than its line height."""
    labels = [str(label) for label in labels]
    need = widest_in(labels, FONT_SIZE) * 72.0 + FONT_SIZE * 0.6 if along else FONT_SIZE * ROW_SPACING

    def name(value: float, _pos: int | None = None) -> str:
        i = int(round(value))
        return labels[i] if 0 <= i < len(labels) and abs(value - i) < 1e-6 else ""

    axis = ax.xaxis if which == "x" else ax.yaxis
    locator = IndexLocator(len(labels), need)
    axis.set_major_locator(locator)
    axis.set_major_formatter(FuncFormatter(name))
    axis.set_minor_locator(mpl.ticker.NullLocator())
    return locator


class TokenLocator(Locator):
    """Integer tick positions for a token axis, decimated so labels never overlap.

    The step is chosen from the axis' current size in pixels and view limits, so zooming in
    shows more labels and panning keeps them aligned to multiples of the step.
    """

    def __init__(self, n_tokens: int, font_size: float = FONT_SIZE) -> None:
        self.n_tokens = int(n_tokens)
        self.font_size = float(font_size)

    def _room_px(self) -> float:
        axes = self.axis.axes
        bbox = axes.get_window_extent()
        horizontal = self.axis is axes.xaxis
        return float(bbox.width if horizontal else bbox.height)

    def tick_values(self, vmin: float, vmax: float) -> list[int]:
        lo, hi = sorted((vmin, vmax))
        first = max(0, math.ceil(lo))
        last = min(self.n_tokens - 1, math.floor(hi))
        if last < first:
            return []
        dpi = self.axis.axes.figure.dpi if self.axis is not None else 100.0
        font_px = self.font_size * dpi / 72.0
        room = self._room_px() if self.axis is not None else 400.0
        step = label_step(hi - lo, room, font_px)
        start = first + (-first) % step
        return list(range(start, last + 1, step))

    def __call__(self) -> list[int]:
        vmin, vmax = self.axis.get_view_interval()
        return self.tick_values(vmin, vmax)


def set_token_axis(
    ax: Axes,
    which: str,
    tokens: Sequence[str],
    rotate: bool = False,
    restyle: bool = True,
    numbered: bool = False,
) -> None:
    """Label ``ax``'s x or y axis with ``tokens`` through a ``TokenLocator``.

    ``restyle`` False keeps the tick style of an axis this function already set up (restyling
    every tick is slow), changing only the labels. ``numbered`` puts each token's position
    before it ("4000 the"), for texts too long to find one's way by tokens alone. A label is
    made only when its tick is drawn, so a text of thousands of tokens costs what its few
    shown labels cost.
    """

    def name(value: float, _pos: int | None = None) -> str:
        i = int(round(value))
        if not 0 <= i < len(tokens):
            return ""
        return f"{i} {token_label(tokens[i])}" if numbered else token_label(tokens[i])

    axis = ax.xaxis if which == "x" else ax.yaxis
    axis.set_major_locator(TokenLocator(len(tokens)))
    axis.set_major_formatter(FuncFormatter(name))
    axis.set_minor_locator(mpl.ticker.NullLocator())
    if not restyle:
        return
    ax.tick_params(axis=which, labelsize=FONT_SIZE, length=TICK_LENGTH_PT, pad=TICK_PAD_PT)
    if which == "x" and rotate:
        ax.tick_params(axis="x", labelrotation=90)


def head_name(layer: int, head: int | None) -> str:
    """``layer 3 · head 1`` (counting from 0), or ``layer 3 · head mean``."""
    return f"layer {layer} · head mean" if head is None else f"layer {layer} · head {head}"


def style_axes(ax: Axes) -> None:
    """Thin frame and the house font sizes on one axes."""
    for spine in ax.spines.values():
        spine.set_linewidth(0.6)
        spine.set_color("#555555")
    ax.tick_params(labelsize=FONT_SIZE, width=0.6)


COLORBAR_TICKS = 4
COLORBAR_LABEL_GAP = 31.0  # points from the bar's right edge to its units label


class ColorbarLocator(MaxNLocator):
    """At most ``COLORBAR_TICKS`` round ticks, fewer when the bar is too short for their labels
    (one label needs ``LABEL_SPACING`` font heights); one tick when only one fits."""

    def __init__(self, font_size: float = FONT_SIZE) -> None:
        super().__init__(COLORBAR_TICKS)
        self.font_size = font_size

    def __call__(self):
        axes = self.axis.axes
        box = axes.get_window_extent()
        room = float(box.height if self.axis is axes.yaxis else box.width)
        capacity = int(room / (self.font_size * axes.figure.dpi / 72.0 * LABEL_SPACING))
        self.set_params(nbins=max(1, min(COLORBAR_TICKS, capacity - 1)))
        ticks = super().__call__()
        if capacity < 2:  # room for one label: the lowest in view
            lo, hi = sorted(self.axis.get_view_interval())
            inside = [t for t in ticks if lo <= t <= hi]
            return inside[:1] if capacity == 1 else []
        return ticks


def style_colorbar(cbar, label: str) -> None:
    """House look of a colour bar: a few ticks and the units written beside it.

    The units are a text of the colour bar's axes (``cbar.units``) rather than its axis label,
    so that a pane can redraw the ticks alone when the scale changes.
    """
    cbar.locator = ColorbarLocator()
    cbar.update_ticks()
    cbar.ax.tick_params(labelsize=FONT_SIZE, width=0.6, length=2)
    cbar.outline.set_linewidth(0.6)
    pin_empty_axis_labels(cbar.ax)
    place = offset_copy(cbar.ax.transAxes, fig=cbar.ax.figure, x=COLORBAR_LABEL_GAP, units="points")
    # rotated a quarter turn: the glyph tops face the bar, so "top" is the side at the anchor
    cbar.units = cbar.ax.text(
        1.0,
        0.5,
        label,
        transform=place,
        rotation=90,
        ha="center",
        va="top",
        fontsize=LABEL_SIZE,
        rotation_mode="anchor",
        multialignment="center",
    )
    cbar.ax.fit_texts = [cbar.units]  # sized to the bar's height by ``layout.InchLayout``


def rescale_by_ticks(cbar) -> None:
    """Make a vertical colour bar of a linear 0-based scale follow its image's ``set_clim`` by
    moving its axis limits alone (``set_colorbar_range``).

    A linear scale's colour bar looks the same in axes coordinates whatever its range; only the
    ticks move. matplotlib rebuilds the whole bar on every change of the image's limits (the
    colour mesh, the outline, the locators: 6-7 ms for a 128-token pair grid against 1 ms pinned,
    ``tests/benchmarks/bench_colorbar.py``),
    so the bar is cut from the image's updates and its colour mesh is pinned to the axes box.
    """
    mappable = cbar.mappable
    if getattr(mappable, "colorbar_cid", None) is not None:
        mappable.callbacks.disconnect(mappable.colorbar_cid)
        mappable.colorbar_cid = None
    lo, hi = float(cbar.vmin), float(cbar.vmax)
    if cbar.solids is not None:
        # the mesh keeps the colours and places of the range it was built for
        cbar.solids.set_norm(Normalize(vmin=lo, vmax=hi))
        cbar.solids.set_transform(
            Affine2D().translate(0.0, -lo).scale(1.0, 1.0 / (hi - lo)) + cbar.ax.transAxes
        )


def set_colorbar_range(cbar, vmin: float, vmax: float) -> None:
    """The range of a colour bar prepared by ``rescale_by_ticks``."""
    cbar.vmin, cbar.vmax = vmin, vmax
    cbar.ax.set_ylim(vmin, vmax)


def pin_empty_axis_labels(ax: Axes) -> None:
    """Give ``ax``'s empty axis labels a fixed place: matplotlib otherwise measures every tick
    label at every draw to place a label that shows nothing (a good part of a small figure's
    draw). A label set later must be placed again (``set_label_coords``)."""
    if not ax.xaxis.label.get_text():
        ax.xaxis.set_label_coords(0.5, 0.0)
    if not ax.yaxis.label.get_text():
        ax.yaxis.set_label_coords(0.0, 0.5)
