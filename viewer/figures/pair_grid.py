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

from viewer.core.recording import Recording
from viewer.figures import style
from viewer.figures.cells import cell_image
from viewer.figures.layout import InchLayout, line_height_in, main_with_colorbar, text_width_in


@dataclass
class PairGridArtists:
    """What ``draw_pair_grid`` drew, for fast updates and for hit-testing."""

    ax: Axes
    image: AxesImage
    colorbar: Colorbar | None
    background: Rectangle
    marker: Rectangle  # outline of the selected cell (invisible when none)
    n_rows: int
    n_cols: int


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


def _set_title(ax: Axes, title: str) -> None:
    # y given: matplotlib then skips measuring the tick labels to lift the title above them
    # (there are none on top), a good part of every draw
    ax.set_title(title, fontsize=style.TITLE_SIZE, loc="left", y=1.0)


def _token_grid(probs, visible, query_tokens, key_tokens):
    """(masked grid, key tokens) after checking that the tokens fit the grid."""
    key_tokens = query_tokens if key_tokens is None else key_tokens
    grid = masked_grid(probs, visible)
    if len(query_tokens) != grid.shape[0] or len(key_tokens) != grid.shape[1]:
        raise ValueError(
            f"{len(query_tokens)} query and {len(key_tokens)} key tokens for a grid {grid.shape}"
        )
    return grid, key_tokens


def _set_scale(artists: PairGridArtists, norm) -> None:
    artists.image.set_clim(norm.vmin, norm.vmax)
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
) -> PairGridArtists:
    """Draw a pair grid of ``probs`` (T_q, T_k) into ``ax`` (colour bar into ``cax`` if given).

    ``visible`` (T_q, T_k) bool marks the cells a query may see; the rest are drawn as masked.
    The colour scale runs from 0 to the largest visible value, labelled with ``units``.
    """
    grid, key_tokens = _token_grid(probs, visible, query_tokens, key_tokens)
    n_rows, n_cols = grid.shape
    extent = (-0.5, n_cols - 0.5, n_rows - 0.5, -0.5)
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
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    style.style_axes(ax)
    style.set_token_axis(ax, "x", key_tokens, rotate=True)
    style.set_token_axis(ax, "y", query_tokens)
    ax.set_xlabel("key (attended to)", fontsize=style.LABEL_SIZE)
    ax.set_ylabel("query (attending)", fontsize=style.LABEL_SIZE)
    place_axis_labels(ax, query_tokens, key_tokens)
    if title:
        _set_title(ax, title)
    marker = Rectangle(
        (0, 0), 1, 1, fill=False, edgecolor=style.SELECTION, linewidth=1.6, visible=False, zorder=3
    )
    ax.add_patch(marker)
    colorbar = None
    if cax is not None:
        colorbar = ax.figure.colorbar(image, cax=cax)
        style.style_colorbar(colorbar, units)
        style.rescale_by_ticks(colorbar)
    return PairGridArtists(ax, image, colorbar, background, marker, n_rows, n_cols)


def update_pair_grid(
    artists: PairGridArtists,
    probs: np.ndarray,
    *,
    visible: np.ndarray | None = None,
    title: str | None = None,
) -> None:
    """Replace the grid's values (same token count) without rebuilding axes or labels."""
    grid = masked_grid(probs, visible)
    if grid.shape != (artists.n_rows, artists.n_cols):
        raise ValueError(f"grid {grid.shape} does not fit the drawn {artists.n_rows}×{artists.n_cols}")
    artists.image.set_data(grid)
    _hatch_if_masked(artists.background, grid)
    _set_scale(artists, _norm(grid))
    if title is not None:
        _set_title(artists.ax, title)


def retoken_pair_grid(
    artists: PairGridArtists,
    probs: np.ndarray,
    query_tokens: Sequence[str],
    key_tokens: Sequence[str] | None = None,
    *,
    visible: np.ndarray | None = None,
    title: str | None = None,
) -> PairGridArtists:
    """``artists`` (from ``pair_grid_into``) showing another text: the same figure as a fresh
    ``pair_grid_into`` would draw, built by changing the existing artists."""
    grid, key_tokens = _token_grid(probs, visible, query_tokens, key_tokens)
    n_rows, n_cols = grid.shape
    ax = artists.ax
    extent = (-0.5, n_cols - 0.5, n_rows - 0.5, -0.5)
    artists.background.set_bounds(-0.5, -0.5, n_cols, n_rows)
    _hatch_if_masked(artists.background, grid)
    artists.image.set_data(grid)
    artists.image.set_extent(extent)
    _set_scale(artists, _norm(grid))
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    style.set_token_axis(ax, "x", key_tokens, rotate=True, restyle=False)
    style.set_token_axis(ax, "y", query_tokens, restyle=False)
    place_axis_labels(ax, query_tokens, key_tokens)
    if title is not None:
        _set_title(ax, title)
    cax = artists.colorbar.ax if artists.colorbar is not None else None
    ax.figure.set_layout_engine(
        InchLayout(main_with_colorbar(ax, cax, **pair_grid_margins(query_tokens, key_tokens)))
    )
    artists.n_rows, artists.n_cols = n_rows, n_cols
    artists.marker.set_visible(False)
    return artists


def mark_cell(artists: PairGridArtists, row: int | None, col: int | None) -> None:
    """Outline cell (row, col), a whole row (col None) or nothing (row None)."""
    m = artists.marker
    if row is None:
        m.set_visible(False)
        return
    if col is None:
        m.set_bounds(-0.5, row - 0.5, artists.n_cols, 1)
    else:
        m.set_bounds(col - 0.5, row - 0.5, 1, 1)
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


def _longest_labels(query_tokens: Sequence[str], key_tokens: Sequence[str]) -> tuple[int, int]:
    """Characters in the longest query and key token labels."""
    q = max((len(style.token_label(t)) for t in query_tokens), default=1)
    k = max((len(style.token_label(t)) for t in key_tokens), default=1)
    return q, k


def place_axis_labels(ax: Axes, query_tokens: Sequence[str], key_tokens: Sequence[str]) -> None:
    """Put the axis labels just beyond the longest token labels (estimated, as the margins are).

    Placed by hand, matplotlib does not measure every tick label at every draw to place them.
    """
    from matplotlib.transforms import offset_copy

    q, k = _longest_labels(query_tokens, key_tokens)
    down = text_width_in(k) * 72.0 + TICK_ROOM_PT
    left = text_width_in(q) * 72.0 + TICK_ROOM_PT
    ax.xaxis.set_label_coords(
        0.5, 0.0, transform=offset_copy(ax.transAxes, fig=ax.figure, y=-down, units="points")
    )
    ax.yaxis.set_label_coords(
        0.0, 0.5, transform=offset_copy(ax.transAxes, fig=ax.figure, x=-left, units="points")
    )


def pair_grid_margins(query_tokens: Sequence[str], key_tokens: Sequence[str]) -> dict[str, float]:
    """Margins in inches that fit the longest token labels, the axis labels and a title."""
    q, k = _longest_labels(query_tokens, key_tokens)
    return {
        "left": text_width_in(q) + line_height_in(style.LABEL_SIZE) + 0.15,
        "bottom": text_width_in(k) + line_height_in(style.LABEL_SIZE) + 0.15,
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
) -> PairGridArtists:
    """Clear ``fig`` and lay out one pair grid (with its colour bar) filling it."""
    key_tokens = query_tokens if key_tokens is None else key_tokens
    fig.clear()
    ax = fig.add_axes((0.1, 0.1, 0.8, 0.8))
    cax = fig.add_axes((0.92, 0.1, 0.02, 0.8)) if colorbar else None
    fig.set_layout_engine(
        InchLayout(main_with_colorbar(ax, cax, **pair_grid_margins(query_tokens, key_tokens)))
    )
    return draw_pair_grid(ax, probs, query_tokens, key_tokens, visible=visible, title=title, cax=cax)


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
