"""Links: where a source word's attention goes, and how each head scores one source→target link.

Two pictures, side by side in ``links_into``:

* a bar chart of the words with the highest link score from the source in the selected head
  (score = attention from the source's first sub-token summed over the word's sub-tokens,
  docs/definitions.md, "Link pairs"), the selected target's bar highlighted;
* a head map of the link score from the source to the target in every head.

With a link-pairs file, ``accuracy_into`` shows per-head accuracy with the nearest baseline
marked on the colour bar.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from viewer.figures import style
from viewer.figures.head_map import HeadMapArtists, draw_head_map, mark_head
from viewer.figures.layout import Box, InchLayout, line_height_in, text_width_in, widest_in

LINK_UNITS = "link score (attention probability)"


@dataclass
class LinksArtists:
    bars_ax: Axes
    map_artists: HeadMapArtists | None
    shown: tuple[int, ...]  # candidate indices drawn as bars, top first
    bar_artists: list = field(default_factory=list)  # the bars and their value texts


def top_links(scores: np.ndarray, k: int, exclude: int | None = None) -> np.ndarray:
    """Indices of the ``k`` highest scores, highest first (ties by position), minus ``exclude``."""
    s = np.asarray(scores, dtype=np.float64)
    order = np.lexsort((np.arange(s.size), -s))
    if exclude is not None:
        order = order[order != exclude]
    return order[:k]


def draw_link_bars(
    ax: Axes,
    names: Sequence[str],
    scores: np.ndarray,
    *,
    highlight: int | None = None,
    top: int = 8,
    exclude: int | None = None,
    title: str | None = None,
    drawn: list | None = None,
) -> tuple[int, ...]:
    """Horizontal bars of the ``top`` best-scoring candidates; ``highlight`` always shown.

    The bars and value texts are appended to ``drawn`` when given (``relink`` removes them)."""
    s = np.asarray(scores, dtype=np.float64)
    chosen = list(top_links(s, top, exclude))
    if highlight is not None and highlight not in chosen and 0 <= highlight < s.size:
        chosen = chosen[: max(top - 1, 0)] + [highlight]
    n = len(chosen)
    colours = [style.SELECTION if i == highlight else style.ACCENT for i in chosen]
    bars = ax.barh(range(n), s[chosen], color=colours, height=0.66, zorder=2)
    ax.set_yticks(range(n), [style.token_label(names[i]) for i in chosen])
    ax.set_ylim(n - 0.5, -0.5)
    ax.link_rows = n  # bars drawn; ``links_into`` shows as many of them as the height holds
    peak = float(s[chosen].max()) if n else 1.0
    ax.set_xlim(0, max(peak * 1.25, 1e-6))
    ax.link_peak = peak  # ``links_into`` widens the scale until the longest bar's value fits
    style.style_axes(ax)
    ax.tick_params(axis="y", length=0)
    ax.set_xlabel(LINK_UNITS, fontsize=style.LABEL_SIZE)
    values = [
        ax.text(
            s[i] + peak * 0.02,
            row,
            f"{s[i]:.3f}",
            va="center",
            ha="left",
            fontsize=style.FONT_SIZE - 0.5,
            color="#222222",
            zorder=3,
            clip_on=True,
        )
        for row, i in enumerate(chosen)
    ]
    style.pin_empty_axis_labels(ax)
    if title:
        # y given: no ticks on top, so where matplotlib would put it anyway, without measuring
        ax.set_title(title, fontsize=style.TITLE_SIZE, loc="left", y=1.0)
    if drawn is not None:
        drawn.append(bars)
        drawn.extend(values)
    return tuple(int(i) for i in chosen)


VALUE_WIDTH_PT = widest_in(["0.000"], style.FONT_SIZE - 0.5) * 72.0 + 2.0  # a bar's value text


def fit_values(ax: Axes, width_in: float) -> None:
    """Widen the bars' scale so that the longest bar's value, written just after it, ends inside
    axes ``width_in`` inches wide (at least 1.25 × the longest bar)."""
    peak = getattr(ax, "link_peak", None)
    if peak is None:
        return
    share = VALUE_WIDTH_PT / max(width_in * 72.0, 1e-6)
    reach = peak * 1.02 / (1.0 - share) if share < 0.8 else peak * 1.25
    ax.set_xlim(0, max(peak * 1.25, reach, 1e-6))


def links_into(
    fig: Figure,
    names: Sequence[str],
    head_scores: np.ndarray,
    *,
    per_head_to_target: np.ndarray | None,
    target: int | None,
    source_name: str,
    target_name: str | None,
    head_title: str,
    selected: tuple[int, int | None] | None = None,
    exclude: int | None = None,
) -> LinksArtists:
    """Clear ``fig`` and draw the bars (left) and the per-head link map (right, if a target)."""
    fig.clear()
    bars = fig.add_axes((0.1, 0.1, 0.35, 0.8))
    has_map = per_head_to_target is not None
    hax = fig.add_axes((0.6, 0.1, 0.3, 0.8)) if has_map else None
    cax = fig.add_axes((0.93, 0.1, 0.02, 0.8)) if has_map else None
    label_w = text_width_in(max((len(style.token_label(n)) for n in names), default=4)) + 0.12
    n_layers = per_head_to_target.shape[0] if has_map else 1
    layer_w = text_width_in(len(f"layer {n_layers - 1}")) + 0.12
    top = line_height_in(style.TITLE_SIZE, 1.8)
    bottom = line_height_in(style.FONT_SIZE) + line_height_in(style.LABEL_SIZE) + 0.15

    def place(width: float, height: float) -> dict[Axes, Box]:
        h = max(height - top - bottom, 0.1)
        # the best bars first, as many as have a line each (``style.ROW_SPACING``)
        fit = max(1, int(h * 72.0 / (style.FONT_SIZE * style.ROW_SPACING)))
        bars.set_ylim(min(getattr(bars, "link_rows", fit), fit) - 0.5, -0.5)
        if not has_map:
            fit_values(bars, width - label_w - 0.2)
            return {bars: (label_w, bottom, width - label_w - 0.2, h)}
        usable = width - label_w - layer_w - 0.9 - 0.3
        bars_w = usable * 0.42
        fit_values(bars, bars_w)
        map_w = usable - bars_w
        map_top = top + line_height_in(style.FONT_SIZE, 1.6) + line_height_in(style.LABEL_SIZE)
        mh = max(height - map_top - 0.15, 0.1)
        x_map = label_w + bars_w + 0.3 + layer_w
        return {
            bars: (label_w, bottom, bars_w, h),
            hax: (x_map, 0.15, map_w, mh),
            cax: (x_map + map_w + 0.08, 0.15, 0.1, mh),
        }

    fig.set_layout_engine(InchLayout(place))
    drawn: list = []
    shown = draw_link_bars(
        bars,
        names,
        head_scores,
        highlight=target,
        exclude=exclude,
        title=_bars_title(source_name, head_title),
        drawn=drawn,
    )
    map_artists = None
    if has_map:
        map_artists = draw_head_map(
            hax,
            per_head_to_target,
            label="link score",
            selected=selected,
            cax=cax,
            annotate=False,
            title=f"'{style.token_label(source_name)}' → '{style.token_label(target_name or '')}'"
            " in every head",
        )
    return LinksArtists(bars, map_artists, shown, drawn)


def _bars_title(source_name: str, head_title: str) -> str:
    return f"from '{style.token_label(source_name)}' · {head_title}"


def relink(
    artists: LinksArtists,
    names: Sequence[str],
    head_scores: np.ndarray,
    *,
    per_head_to_target: np.ndarray | None,
    target: int | None,
    source_name: str,
    head_title: str,
    selected: tuple[int, int | None] | None = None,
    exclude: int | None = None,
) -> LinksArtists:
    """``artists`` (from ``links_into`` with the same names, source and target) showing another
    head: the figure a fresh ``links_into`` would draw, without rebuilding its axes and ticks.

    The bars are drawn anew (they change with the head); the per-head map, if there is one,
    keeps its values (the source→target score in every head does not depend on the selected
    head) and only moves its outline."""
    if (artists.map_artists is None) != (per_head_to_target is None):
        raise ValueError("relink keeps the figure's layout: a per-head map for both or neither")
    ax = artists.bars_ax
    for artist in artists.bar_artists:
        artist.remove()
    artists.bar_artists.clear()
    artists.shown = draw_link_bars(
        ax,
        names,
        head_scores,
        highlight=target,
        exclude=exclude,
        title=_bars_title(source_name, head_title),
        drawn=artists.bar_artists,
    )
    if artists.map_artists is not None:
        mark_head(artists.map_artists, selected)
    return artists


def accuracy_into(
    fig: Figure,
    accuracy: np.ndarray,
    *,
    nearest_baseline: float,
    pairs: int,
    selected: tuple[int, int | None] | None = None,
) -> HeadMapArtists:
    """Clear ``fig`` and draw per-head link accuracy over a link-pairs file, baseline marked."""
    from viewer.figures.head_map import head_map_into

    artists = head_map_into(
        fig,
        accuracy,
        label="link accuracy",
        selected=selected,
        title=f"link accuracy over {pairs} pairs · nearest baseline {nearest_baseline:.2f}",
    )
    if artists.colorbar is not None:
        artists.colorbar.ax.axhline(nearest_baseline, color=style.SELECTION, linewidth=1.5)
    return artists
