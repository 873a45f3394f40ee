"""Fixed margins in inches, re-applied at every draw: cheap, predictable figure layouts.

matplotlib's constrained layout measures every text at every draw, which is too slow for a pane
that repaints on each head switch. Headlight's figures know their label sizes in advance (token
labels are at most ``style.MAX_TOKEN_CHARS`` characters), so each builder states its margins in
inches and ``InchLayout`` turns them into axes positions for whatever size the figure has, on
screen or on paper.
"""

from __future__ import annotations

from collections.abc import Callable

from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.layout_engine import LayoutEngine

from viewer.figures.style import FONT_SIZE, LABEL_SIZE, widest_in

Box = tuple[float, float, float, float]  # left, bottom, width, height in inches
Placer = Callable[[float, float], dict[Axes, Box]]


class InchLayout(LayoutEngine):
    """A layout engine that asks ``placer(width_in, height_in)`` for every axes' box in inches."""

    _adjust_compatible = False
    _colorbar_gridspec = False

    def __init__(self, placer: Placer) -> None:
        super().__init__()
        self.placer = placer

    def execute(self, fig: Figure) -> None:
        width, height = fig.get_size_inches()
        if width <= 0 or height <= 0:
            return
        for ax, (left, bottom, w, h) in self.placer(float(width), float(height)).items():
            w = max(w, 0.05)
            h = max(h, 0.05)
            ax.set_position((left / width, bottom / height, w / width, h / height))
            for text in getattr(ax, "fit_texts", ()):  # written up the axes, centred on it
                middle = bottom + h / 2
                fit_along(text, 2 * min(middle, height - middle) * 72.0)


UNITS_SIZES = (LABEL_SIZE, FONT_SIZE, 7.0, 6.0)


def fit_along(text, room_pt: float) -> None:
    """Give a label written upwards beside an axes (a colour bar's units, a y-axis label) the
    largest of ``UNITS_SIZES`` at which its longest line fits ``room_pt`` points; hide it when
    none does (it would be cut off at the figure's edge or run into another pane's text)."""
    lines = text.get_text().split("\n")
    for size in UNITS_SIZES:
        if widest_in(lines, size) * 72.0 <= room_pt:
            text.set_fontsize(size)
            text.set_visible(True)
            return
    text.set_visible(False)


def text_width_in(chars: int, font_size: float = FONT_SIZE) -> float:
    """Rough width in inches of ``chars`` characters of the sans-serif font (0.6 em each)."""
    return chars * 0.6 * font_size / 72.0


def line_height_in(font_size: float = FONT_SIZE, lines: float = 1.0) -> float:
    return lines * 1.3 * font_size / 72.0


def longest(labels) -> int:
    return max((len(str(s).replace("\\$", "$")) for s in labels), default=1)


def main_with_colorbar(
    ax: Axes,
    cax: Axes | None,
    *,
    left: float,
    bottom: float,
    top: float,
    right_label: float = 0.62,
    bar: float = 0.12,
    gap: float = 0.1,
    right_pad: float = 0.05,
) -> Placer:
    """A placer: ``ax`` filling the figure inside the margins, ``cax`` a thin bar on its right."""

    def place(width: float, height: float) -> dict[Axes, Box]:
        right = right_pad + ((bar + gap + right_label) if cax is not None else 0.0)
        w = width - left - right
        h = height - bottom - top
        boxes: dict[Axes, Box] = {ax: (left, bottom, w, h)}
        if cax is not None:
            boxes[cax] = (left + max(w, 0.05) + gap, bottom, bar, h)
        return boxes

    return place
