"""The head map: a layers × heads grid coloured by one per-head metric.

Rows are layers (layer 0 at the top), columns are heads, both counted from 0. A metric that is
undefined for a head (NaN) is drawn masked, like a masked pair-grid cell. A difference between
two runs (compare mode) is drawn with the diverging map centred on zero.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from matplotlib.axes import Axes
from matplotlib.colorbar import Colorbar
from matplotlib.figure import Figure
from matplotlib.image import AxesImage
from matplotlib.patches import Rectangle

from viewer.figures import style
from viewer.figures.cells import cell_image
from viewer.figures.layout import (
    Box,
    InchLayout,
    line_height_in,
    main_with_colorbar,
    text_width_in,
    widest_in,
)

ANNOTATE_MAX_CELLS = 160  # write values into cells only when there are this few


@dataclass
class HeadMapArtists:
    ax: Axes
    image: AxesImage
    colorbar: Colorbar | None
    marker: Rectangle
    n_layers: int
    n_heads: int
    diverging: bool
    cell_texts: list = field(default_factory=list)  # the values written into cells, if any


def value_format(values: np.ndarray) -> str:
    """One number format for every cell of a grid, from its largest |value|: fixed decimals
    that give that value two significant digits (at least two decimals, as 0–1 metrics read
    best), whole numbers from 100 up, and one shared scientific format when fixed decimals
    would need more than five."""
    finite = np.abs(np.asarray(values, dtype=np.float64))
    finite = finite[np.isfinite(finite)]
    top = float(finite.max()) if finite.size else 0.0
    if top >= 100:
        return "{:.0f}"
    if top >= 10:
        return "{:.1f}"
    if top == 0:
        return "{:.2f}"
    decimals = max(2, 1 - math.floor(math.log10(top)))
    return f"{{:.{decimals}f}}" if decimals <= 5 else "{:.1e}"


def format_value(value: float, fmt: str = "{:.2f}") -> str:
    """A cell's text in its grid's format (``value_format``); "–" where undefined."""
    if not np.isfinite(value):
        return "–"
    text = fmt.format(value)
    if text.startswith("-") and float(text) == 0:  # "-0.00": a tiny negative, shown as zero
        text = text[1:]
    return text


def draw_head_map(
    ax: Axes,
    values: np.ndarray,
    *,
    label: str,
    diverging: bool = False,
    selected: tuple[int, int | None] | None = None,
    title: str | None = None,
    cax: Axes | None = None,
    annotate: bool | None = None,
) -> HeadMapArtists:
    """Draw ``values`` (L, H) into ``ax``; ``label`` names the metric and its units.

    ``selected`` is (layer, head) to outline one cell or (layer, None) to outline a layer's row
    (the head mean). ``annotate`` writes each value into its cell (default: when the grid is
    small enough to read).
    """
    data, grid, cmap, norm = _scaled(values, diverging)
    n_layers, n_heads = data.shape
    image = style.cell_grid(ax, grid, cmap=cmap, norm=norm, draw=lambda *a, **k: cell_image(ax, *a, **k))
    heads = [f"head {h}" if n_heads <= 8 else str(h) for h in range(n_heads)]
    style.set_index_axis(ax, "x", heads, along=True)
    style.set_index_axis(ax, "y", [f"layer {layer}" for layer in range(n_layers)])
    ax.tick_params(axis="both", length=0, labelsize=style.FONT_SIZE)
    ax.xaxis.set_ticks_position("top")
    ax.xaxis.set_label_position("top")
    if n_heads > 8:
        ax.set_xlabel("head", fontsize=style.LABEL_SIZE)
    style.pin_empty_axis_labels(ax)
    if title:
        ax.set_title(title, fontsize=style.TITLE_SIZE, loc="left", pad=18)
    if annotate is None:
        annotate = n_layers * n_heads <= ANNOTATE_MAX_CELLS
    cell_texts = []
    fmt = value_format(data)
    if annotate:
        font = style.FONT_SIZE - (1.5 if n_heads > 8 else 0.5)
        for layer in range(n_layers):
            for head in range(n_heads):
                v = data[layer, head]
                cell_texts.append(
                    ax.text(
                        head,
                        layer,
                        format_value(v, fmt),
                        ha="center",
                        va="center",
                        fontsize=font,
                        color=_text_colour(cmap, norm, v),
                        zorder=2,
                    )
                )
    marker = Rectangle(
        (0, 0), 1, 1, fill=False, edgecolor=style.SELECTION, linewidth=2.2, visible=False, zorder=3
    )
    ax.add_patch(marker)
    colorbar = None
    if cax is not None:
        colorbar = ax.figure.colorbar(image, cax=cax)
        style.style_colorbar(colorbar, label)
    artists = HeadMapArtists(ax, image, colorbar, marker, n_layers, n_heads, diverging, cell_texts)
    mark_head(artists, selected)
    return artists


def _scaled(values: np.ndarray, diverging: bool):
    """(data, masked grid, colour map, norm) of (L, H) values, as ``draw_head_map`` uses them."""
    data = np.asarray(values, dtype=np.float64)
    if data.ndim != 2:
        raise ValueError(f"a head map needs (layers, heads) values, got shape {data.shape}")
    grid = np.ma.masked_invalid(data)
    shown = grid.compressed()
    if diverging:
        cmap, norm = style.diverging_cmap(), style.diverging_norm(shown)
    else:
        cmap, norm = style.sequential_cmap(), style.sequential_norm(shown, vmin=None)
        if shown.size and shown.min() >= 0 and shown.max() <= 1:
            norm = style.sequential_norm(np.array([0.0, max(shown.max(), 1e-12)]))
    return data, grid, cmap, norm


def _text_colour(cmap, norm, value: float) -> str:
    return style.text_colour_for(cmap(norm(value))) if np.isfinite(value) else "black"


def update_head_map(artists: HeadMapArtists, values: np.ndarray) -> None:
    """New values of the same shape and kind in place: the figure a fresh ``draw_head_map``
    would draw, without rebuilding axes, ticks and colour bar."""
    data, grid, cmap, norm = _scaled(values, artists.diverging)
    if data.shape != (artists.n_layers, artists.n_heads):
        raise ValueError(
            f"values {data.shape} do not fit the drawn {artists.n_layers}×{artists.n_heads} head map"
        )
    artists.image.set_data(grid)
    artists.image.set_clim(norm.vmin, norm.vmax)
    fmt = value_format(data)
    for text, v in zip(artists.cell_texts, data.ravel(), strict=False):
        text.set_text(format_value(v, fmt))
        text.set_color(_text_colour(cmap, artists.image.norm, v))


def mark_head(artists: HeadMapArtists, selected: tuple[int, int | None] | None) -> None:
    """Outline the selected head, or the selected layer's whole row for the head mean."""
    m = artists.marker
    if selected is None or not 0 <= selected[0] < artists.n_layers:
        m.set_visible(False)
        return
    layer, head = selected
    if head is None:
        m.set_bounds(-0.5, layer - 0.5, artists.n_heads, 1)
    else:
        m.set_bounds(head - 0.5, layer - 0.5, 1, 1)
    m.set_visible(True)


def head_at(artists: HeadMapArtists, x: float | None, y: float | None) -> tuple[int, int] | None:
    """(layer, head) under data coordinates (x, y), or None outside the grid."""
    if x is None or y is None:
        return None
    head, layer = int(round(x)), int(round(y))
    if 0 <= layer < artists.n_layers and 0 <= head < artists.n_heads:
        return layer, head
    return None


def head_map_into(
    fig: Figure,
    values: np.ndarray,
    *,
    label: str,
    diverging: bool = False,
    selected: tuple[int, int | None] | None = None,
    title: str | None = None,
    annotate: bool | None = None,
) -> HeadMapArtists:
    """Clear ``fig`` and lay out one head map with its colour bar."""
    fig.clear()
    ax = fig.add_axes((0.1, 0.1, 0.7, 0.8))
    cax = fig.add_axes((0.85, 0.1, 0.03, 0.8))
    n_layers = np.asarray(values).shape[0]
    left = text_width_in(len(f"layer {n_layers - 1}")) + 0.15
    top = line_height_in(style.FONT_SIZE, 1.6) + (line_height_in(style.TITLE_SIZE, 1.8) if title else 0.0)
    if np.asarray(values).shape[1] > 8:
        top += line_height_in(style.LABEL_SIZE)
    place = main_with_colorbar(ax, cax, left=left, bottom=0.1, top=top, right_label=0.66)
    drawn: list[HeadMapArtists] = []

    def place_and_fit(width: float, height: float) -> dict[Axes, Box]:
        boxes = place(width, height)
        for artists in drawn:
            _, _, w, h = boxes[ax]
            fit_cell_texts(artists, w * 72.0 / artists.n_heads, h * 72.0 / artists.n_layers)
        return boxes

    fig.set_layout_engine(InchLayout(place_and_fit))
    artists = draw_head_map(
        ax,
        values,
        label=label,
        diverging=diverging,
        selected=selected,
        title=title,
        cax=cax,
        annotate=annotate,
    )
    drawn.append(artists)
    return artists


def fit_cell_texts(artists: HeadMapArtists, cell_width_pt: float, cell_height_pt: float) -> None:
    """Show the values written into cells only when a cell holds its text: a line's height
    (``style.ROW_SPACING`` font heights) and the widest value's width."""
    if not artists.cell_texts:
        return
    font = artists.cell_texts[0].get_fontsize()
    wide = widest_in([t.get_text() for t in artists.cell_texts], font) * 72.0 + 2.0
    fits = cell_height_pt >= font * style.ROW_SPACING and cell_width_pt >= wide
    for text in artists.cell_texts:
        text.set_visible(fits)
