"""The pair grid: one layer's (or head mean's) attention as a token × token heat grid.

Query tokens are rows (top to bottom), key tokens are columns (left to right); cell (i, j) is the
probability with which query i attends to key j. Keys a query may not see (the upper triangle of
a causal model, the cells outside a windowed layer's window, or anything a caller masks) are
transparent over a hatched background, so they read as "not computed" rather than as zero
attention. ``visible_cells(rec, layer)`` gives the mask of a recording's layer: the same
definition the re-derivation check and the entropy normalisation use (``Recording.key_mask``).

``draw_pair_grid`` draws into given axes (used by the window's pane and by the card export);
``update_pair_grid`` swaps the values in place, the fast path for a head switch;
``retoken_pair_grid`` puts another text into a figure laid out by ``pair_grid_into``, keeping its
axes and tick objects (creating matplotlib's ticks is most of the cost of a fresh grid);
``pair_grid_figure`` returns a stand-alone figure.

A long text is drawn as an *overview* (``viewer.core.overview``): ``block`` c > 1 says that each
value stands for a block of c × c tokens, so the image spans ⌈T / c⌉ · c tokens on each axis and
the axes, which count tokens, stop at T (the last row and column of blocks are cut where the text
ends). Blocks with no visible cell are NaN and hatched like masked cells. ``show_exact`` puts
the exact cells of a zoomed part in front of the blocks (and takes them away again).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.axes import Axes
from matplotlib.colorbar import Colorbar
from matplotlib.figure import Figure
from matplotlib.image import AxesImage
from matplotlib.patches import Rectangle
from matplotlib.text import Text

from viewer.core.recording import Recording
from viewer.figures import style
from viewer.figures.cells import cell_image
from viewer.figures.layout import InchLayout, line_height_in, main_with_colorbar, text_width_in, widest_in


@dataclass
class PairGridArtists:
    """What ``draw_pair_grid`` drew, for fast updates and for hit-testing."""

    ax: Axes
    image: AxesImage
    colorbar: Colorbar | None
    background: Rectangle
    marker: Rectangle  # outline of the selected cell (invisible when none)
    n_rows: int  # query tokens
    n_cols: int  # key tokens
    title: Text | None = None  # the drawn title (matplotlib's left title, ``_set_title``)
    block: int = 1  # tokens per side of what one value of ``image`` shows (1: cells)
    exact: AxesImage | None = None  # exact cells of a zoomed overview (``show_exact``)
    exact_span: tuple[slice, slice] | None = None  # (rows, keys) ``exact`` shows


def visible_cells(rec: Recording, layer: int | None = None) -> np.ndarray | None:
    """(T, T) bool cells of ``layer`` a query may see, or None when it sees every key.

    Pass it as ``visible=``: causal rows and windowed layers get their invisible cells hatched,
    a layer that sees everything skips the hatching altogether.
    """
    return rec.key_mask(layer) if rec.masked(layer) else None


def masked_grid(probs: np.ndarray, visible: np.ndarray | None) -> np.ma.MaskedArray:
    """(T_q, T_k) values as a masked array, masked where ``visible`` is False."""
    values = np.asarray(probs, dtype=np.float64)
    if values.ndim != 2:
        raise ValueError(f"a pair grid needs a (queries, keys) matrix, got shape {values.shape}")
    mask = np.zeros(values.shape, dtype=bool) if visible is None else ~np.asarray(visible, bool)
    if mask.shape != values.shape:
        raise ValueError(f"mask {mask.shape} does not fit values {values.shape}")
    return np.ma.masked_array(values, mask=mask)


def _set_title(ax: Axes, title: str) -> Text:
    """Set the grid's title; returns the text object that draws it (matplotlib's *left* title,
    not ``ax.title``: a fast redraw must redraw this one)."""
    # y given: matplotlib then skips measuring the tick labels to lift the title above them
    # (there are none on top), a good part of every draw
    return ax.set_title(title, fontsize=style.TITLE_SIZE, loc="left", y=1.0)


def blocks_for(n_tokens: int, block: int) -> int:
    """Values per side of a grid of ``n_tokens`` tokens pooled in blocks of ``block``: ⌈T / c⌉."""
    return -(-n_tokens // max(1, block))


def _token_grid(probs, visible, query_tokens, key_tokens, block: int = 1):
    """(masked grid, key tokens) after checking that the tokens fit the grid."""
    key_tokens = query_tokens if key_tokens is None else key_tokens
    grid = masked_grid(probs, visible)
    if (
        blocks_for(len(query_tokens), block) != grid.shape[0]
        or blocks_for(len(key_tokens), block) != grid.shape[1]
    ):
        raise ValueError(
            f"{len(query_tokens)} query and {len(key_tokens)} key tokens for a grid {grid.shape}"
            + (f" of blocks of {block}" if block > 1 else "")
        )
    return grid, key_tokens


def _extent(grid: np.ndarray, block: int) -> tuple[float, float, float, float]:
    """The image's extent in token coordinates: each value covers ``block`` tokens a side."""
    rows, cols = grid.shape
    return (-0.5, cols * block - 0.5, rows * block - 0.5, -0.5)


def _set_scale(artists: PairGridArtists, norm) -> None:
    artists.image.set_clim(norm.vmin, norm.vmax)
    if artists.exact is not None:
        artists.exact.set_clim(norm.vmin, norm.vmax)
    if artists.colorbar is not None:
        style.set_colorbar_range(artists.colorbar, norm.vmin, norm.vmax)


def _hatch_if_masked(background: Rectangle, grid: np.ma.MaskedArray) -> None:
    # the opaque image hides the hatching except under masked cells; with none, skipping it
    # saves Agg a hatch fill of the whole grid on every draw
    background.set_visible(bool(np.ma.getmaskarray(grid).any()))


def _norm(grid: np.ma.MaskedArray):
    shown = grid.compressed()
    return style.sequential_norm(shown if shown.size else np.zeros(1))


def draw_pair_grid(
    ax: Axes,
    probs: np.ndarray,
    query_tokens: Sequence[str],
    key_tokens: Sequence[str] | None = None,
    *,
    visible: np.ndarray | None = None,
    title: str | None = None,
    cax: Axes | None = None,
    units: str = style.ATTENTION_UNITS,
    block: int = 1,
    numbered: bool = False,
) -> PairGridArtists:
    """Draw a pair grid of ``probs`` (T_q, T_k) into ``ax`` (colour bar into ``cax`` if given).

    ``visible`` (T_q, T_k) bool marks the cells a query may see; the rest are drawn as masked.
    The colour scale runs from 0 to the largest visible value, labelled with ``units``. With
    ``block`` c > 1, ``probs`` is an overview of (⌈T_q / c⌉, ⌈T_k / c⌉) blocks (NaN: masked);
    ``numbered`` puts each labelled token's position before it ("4000 the").
    """
    grid, key_tokens = _token_grid(probs, visible, query_tokens, key_tokens, block)
    n_rows, n_cols = len(query_tokens), len(key_tokens)
    extent = _extent(grid, block)
    background = style.mask_background(ax, extent)
    _hatch_if_masked(background, grid)
    image = cell_image(
        ax,
        grid,
        cmap=style.sequential_cmap(),
        norm=_norm(grid),
        interpolation="nearest",
        aspect="auto",
        extent=extent,
        origin="upper",
        zorder=1,
    )
    # exact cells of a zoomed overview go in front of the blocks (``show_exact``); made here,
    # hidden, so that the pane's fast redraw knows it from the start
    exact = cell_image(
        ax,
        np.ma.masked_array(np.zeros((1, 1))),
        cmap=style.sequential_cmap(),
        norm=image.norm,
        interpolation="nearest",
        aspect="auto",
        extent=(-0.5, 0.5, 0.5, -0.5),
        origin="upper",
        zorder=1,
    )
    exact.set_visible(False)
    ax.set_xlim(-0.5, n_cols - 0.5)
    ax.set_ylim(n_rows - 0.5, -0.5)
    style.style_axes(ax)
    style.set_token_axis(ax, "x", key_tokens, rotate=True, numbered=numbered)
    style.set_token_axis(ax, "y", query_tokens, numbered=numbered)
    ax.set_xlabel("key (attended to)", fontsize=style.LABEL_SIZE)
    ax.set_ylabel("query (attending)", fontsize=style.LABEL_SIZE)
    place_axis_labels(ax, query_tokens, key_tokens, numbered)
    title_text = _set_title(ax, title or "")
    marker = Rectangle(
        (0, 0), 1, 1, fill=False, edgecolor=style.SELECTION, linewidth=1.6, visible=False, zorder=3
    )
    ax.add_patch(marker)
    colorbar = None
    if cax is not None:
        colorbar = ax.figure.colorbar(image, cax=cax)
        style.style_colorbar(colorbar, units)
        style.rescale_by_ticks(colorbar)
    return PairGridArtists(ax, image, colorbar, background, marker, n_rows, n_cols, title_text, block, exact)


def update_pair_grid(
    artists: PairGridArtists,
    probs: np.ndarray,
    *,
    visible: np.ndarray | None = None,
    title: str | None = None,
    units: str | None = None,
) -> None:
    """Replace the grid's values (same token count and block) without rebuilding axes or
    labels; ``units`` relabels the colour bar (block max or block mean of an overview)."""
    grid = masked_grid(probs, visible)
    want = (blocks_for(artists.n_rows, artists.block), blocks_for(artists.n_cols, artists.block))
    if grid.shape != want:
        raise ValueError(f"grid {grid.shape} does not fit the drawn {want[0]}×{want[1]}")
    artists.image.set_data(grid)
    _show_blocks(artists)
    if title is not None:
        artists.title.set_text(title)
    if units is not None and artists.colorbar is not None:
        artists.colorbar.units.set_text(units)


def retoken_pair_grid(
    artists: PairGridArtists,
    probs: np.ndarray,
    query_tokens: Sequence[str],
    key_tokens: Sequence[str] | None = None,
    *,
    visible: np.ndarray | None = None,
    title: str | None = None,
    units: str | None = None,
    block: int = 1,
    numbered: bool = False,
) -> PairGridArtists:
    """``artists`` (from ``pair_grid_into``) showing another text: the same figure as a fresh
    ``pair_grid_into`` would draw, built by changing the existing artists."""
    grid, key_tokens = _token_grid(probs, visible, query_tokens, key_tokens, block)
    n_rows, n_cols = len(query_tokens), len(key_tokens)
    ax = artists.ax
    extent = _extent(grid, block)
    artists.background.set_bounds(extent[0], extent[3], extent[1] - extent[0], extent[2] - extent[3])
    artists.image.set_data(grid)
    artists.image.set_extent(extent)
    artists.block = block
    artists.exact_span = None
    _show_blocks(artists)
    ax.set_xlim(-0.5, n_cols - 0.5)
    ax.set_ylim(n_rows - 0.5, -0.5)
    style.set_token_axis(ax, "x", key_tokens, rotate=True, restyle=False, numbered=numbered)
    style.set_token_axis(ax, "y", query_tokens, restyle=False, numbered=numbered)
    place_axis_labels(ax, query_tokens, key_tokens, numbered)
    if title is not None:
        artists.title.set_text(title)
    if units is not None and artists.colorbar is not None:
        artists.colorbar.units.set_text(units)
    cax = artists.colorbar.ax if artists.colorbar is not None else None
    ax.figure.set_layout_engine(
        InchLayout(main_with_colorbar(ax, cax, **pair_grid_margins(query_tokens, key_tokens, numbered)))
    )
    artists.n_rows, artists.n_cols = n_rows, n_cols
    artists.marker.set_visible(False)
    return artists


def _show_blocks(artists: PairGridArtists) -> None:
    """Show the main image (cells, or an overview's blocks) with its scale and hatching."""
    grid = artists.image.get_array()
    artists.image.set_visible(True)
    if artists.exact is not None:
        artists.exact.set_visible(False)
    artists.exact_span = None
    _hatch_if_masked(artists.background, grid)
    _set_scale(artists, _norm(grid))


def show_exact(
    artists: PairGridArtists,
    values: np.ndarray | None,
    rows: slice | None = None,
    cols: slice | None = None,
    *,
    visible: np.ndarray | None = None,
) -> None:
    """Show ``values`` (rows, cols), the exact cells of query tokens ``rows`` and key tokens
    ``cols`` of an overview, instead of its blocks (with its own colour scale and hatching of
    masked cells); ``values`` None shows the blocks again.

    The caller makes sure the cells cover what the axes show (a zoomed view): the blocks are
    hidden, not drawn around them."""
    if values is None:
        _show_blocks(artists)
        return
    grid = masked_grid(values, visible)
    if grid.shape != (rows.stop - rows.start, cols.stop - cols.start):
        raise ValueError(f"cells {grid.shape} do not fit rows {rows} and keys {cols}")
    exact = artists.exact
    exact.set_data(grid)
    exact.set_extent((cols.start - 0.5, cols.stop - 0.5, rows.stop - 0.5, rows.start - 0.5))
    exact.set_visible(True)
    artists.image.set_visible(False)
    artists.exact_span = (rows, cols)
    _hatch_if_masked(artists.background, grid)
    _set_scale(artists, _norm(grid))


def mark_cell(artists: PairGridArtists, row: int | None, col: int | None) -> None:
    """Outline cell (row, col), a whole row (col None) or nothing (row None); in an overview
    whose blocks are shown, the block holding the cell (a cell would be a fraction of a pixel)."""
    m = artists.marker
    if row is None:
        m.set_visible(False)
        return
    c = artists.block if artists.exact_span is None else 1
    top = row - row % c
    height = min(c, artists.n_rows - top)
    if col is None:
        m.set_bounds(-0.5, top - 0.5, artists.n_cols, height)
    else:
        left = col - col % c
        m.set_bounds(left - 0.5, top - 0.5, min(c, artists.n_cols - left), height)
    m.set_visible(True)


def cell_at(artists: PairGridArtists, x: float | None, y: float | None) -> tuple[int, int] | None:
    """(row, col) of the cell under data coordinates (x, y), or None outside the grid."""
    if x is None or y is None:
        return None
    col, row = int(round(x)), int(round(y))
    if 0 <= row < artists.n_rows and 0 <= col < artists.n_cols:
        return row, col
    return None


# tick length, label pad, and a gap before the axis label
TICK_ROOM_PT = style.TICK_LENGTH_PT + style.TICK_PAD_PT + 3.0


def _longest_labels(
    query_tokens: Sequence[str], key_tokens: Sequence[str], numbered: bool = False
) -> tuple[float, float]:
    """Widths in inches of the widest query and key token labels (with their positions when
    ``numbered``: "8191 the", the digits of the last position and a space before the token)."""

    def widest(tokens: Sequence[str]) -> float:
        labels = [style.token_label(t) for t in tokens]
        if numbered:
            last = str(max(0, len(tokens) - 1))
            labels = [f"{last} {label}" for label in labels]
        return max(widest_in(labels, style.FONT_SIZE), text_width_in(1))

    return widest(query_tokens), widest(key_tokens)


def place_axis_labels(
    ax: Axes, query_tokens: Sequence[str], key_tokens: Sequence[str], numbered: bool = False
) -> None:
    """Put the axis labels just beyond the longest token labels (estimated, as the margins are).

    Placed by hand, matplotlib does not measure every tick label at every draw to place them.
    """
    from matplotlib.transforms import offset_copy

    q, k = _longest_labels(query_tokens, key_tokens, numbered)
    down = k * 72.0 + TICK_ROOM_PT
    left = q * 72.0 + TICK_ROOM_PT
    ax.xaxis.set_label_coords(
        0.5, 0.0, transform=offset_copy(ax.transAxes, fig=ax.figure, y=-down, units="points")
    )
    ax.yaxis.set_label_coords(
        0.0, 0.5, transform=offset_copy(ax.transAxes, fig=ax.figure, x=-left, units="points")
    )
    ax.fit_texts = [ax.yaxis.label]  # smaller, or left out, where the grid is short


def pair_grid_margins(
    query_tokens: Sequence[str], key_tokens: Sequence[str], numbered: bool = False
) -> dict[str, float]:
    """Margins in inches that fit the longest token labels, the axis labels and a title."""
    q, k = _longest_labels(query_tokens, key_tokens, numbered)
    return {
        "left": q + line_height_in(style.LABEL_SIZE) + 0.15,
        "bottom": k + line_height_in(style.LABEL_SIZE) + 0.15,
        "top": line_height_in(style.TITLE_SIZE, 1.6),
    }


def pair_grid_into(
    fig: Figure,
    probs: np.ndarray,
    query_tokens: Sequence[str],
    key_tokens: Sequence[str] | None = None,
    *,
    visible: np.ndarray | None = None,
    title: str | None = None,
    colorbar: bool = True,
    units: str = style.ATTENTION_UNITS,
    block: int = 1,
    numbered: bool = False,
) -> PairGridArtists:
    """Clear ``fig`` and lay out one pair grid (with its colour bar) filling it (an overview
    of blocks of ``block`` tokens when that is above 1, see ``draw_pair_grid``)."""
    key_tokens = query_tokens if key_tokens is None else key_tokens
    fig.clear()
    ax = fig.add_axes((0.1, 0.1, 0.8, 0.8))
    cax = fig.add_axes((0.92, 0.1, 0.02, 0.8)) if colorbar else None
    fig.set_layout_engine(
        InchLayout(main_with_colorbar(ax, cax, **pair_grid_margins(query_tokens, key_tokens, numbered)))
    )
    return draw_pair_grid(
        ax,
        probs,
        query_tokens,
        key_tokens,
        visible=visible,
        title=title,
        cax=cax,
        units=units,
        block=block,
        numbered=numbered,
    )


def pair_grid_figure(
    probs: np.ndarray,
    query_tokens: Sequence[str],
    key_tokens: Sequence[str] | None = None,
    *,
    visible: np.ndarray | None = None,
    title: str | None = None,
    size: tuple[float, float] = (6.4, 5.6),
    dpi: float = 100,
) -> Figure:
    """A stand-alone pair-grid figure (for export and tests)."""
    fig = Figure(figsize=size, dpi=dpi)
    pair_grid_into(fig, probs, query_tokens, key_tokens, visible=visible, title=title)
    return fig
