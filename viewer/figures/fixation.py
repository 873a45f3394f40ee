"""The fixation plot: per word type over a text set, attention received against knockout effect.

x is the mean share of the summary token's last-layer attention that lands on the word (head
mean, or one head); y is the mean drop in the predicted class's probability when the word is
knocked out (docs/definitions.md, "Word knockout"). One point per word, its area growing with
the number of texts the word occurs in. Dashed lines at the medians cut the plane into four:
the upper left holds words that are *ignored but decisive* (little attention, large effect),
the lower right words *attended but harmless* — the two places where attention and knockout
disagree, which is why attention alone does not explain a prediction.

The words with the largest effect and the most attended ones are labelled (``labelled``);
hovering names any point.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from viewer.figures import style
from viewer.figures.layout import Box, InchLayout, line_height_in, text_width_in

X_UNITS = "summary-token attention share (last layer)"
Y_UNITS = "knockout: mean drop in p(predicted)"
LABELS = 12  # words labelled by name


@dataclass
class FixationArtists:
    ax: Axes
    points: object  # the PathCollection of the scatter
    labels: list  # Text artists, one per labelled word
    labelled: tuple[int, ...]  # word indices that carry a label, in label order
    x: np.ndarray  # (N,) the plotted x values
    y: np.ndarray  # (N,)
    highlight: object | None = None


def labelled_words(x: np.ndarray, y: np.ndarray, k: int = LABELS) -> tuple[int, ...]:
    """Label candidates in order: the ⌈k/2⌉ largest effects, then the most attended others,
    then the rest by effect (``fixation_into`` skips candidates whose label would overlap)."""
    n = len(x)
    by_effect = [int(i) for i in np.lexsort((np.arange(n), -np.asarray(y)))]
    by_focus = [int(i) for i in np.lexsort((np.arange(n), -np.asarray(x)))]
    chosen: list[int] = by_effect[: (k + 1) // 2]
    for i in by_focus:
        if len(chosen) >= min(k, n):
            break
        if i not in chosen:
            chosen.append(i)
    return tuple(chosen) + tuple(i for i in by_effect if i not in chosen)


def _free_labels(
    candidates: Sequence[int],
    words: Sequence[str],
    x: np.ndarray,
    y: np.ndarray,
    box: Box,
    limits: tuple[float, float, float, float],
    k: int,
) -> tuple[int, ...]:
    """Up to ``k`` candidates whose labels, estimated at the axes' size in inches, do not
    overlap each other and stay inside the axes' width."""
    left, bottom, width, height = box
    x0, x1, y0, y1 = limits
    sx = width / max(x1 - x0, 1e-12)
    sy = height / max(y1 - y0, 1e-12)
    px, py = (x - x0) * sx, (y - y0) * sy  # point positions in inches inside the axes
    h = line_height_in(style.FONT_SIZE)
    placed: list[tuple[float, float, float, float]] = []
    keep: list[int] = []
    for i in candidates:
        if len(keep) >= k:
            break
        w = text_width_in(len(style.token_label(words[i])))
        a = (px[i] + 0.05, py[i] + 0.04, px[i] + 0.05 + w, py[i] + 0.04 + h)
        if a[2] > width + 0.2:
            continue
        if any(a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3] for b in placed):
            continue
        keep.append(i)
        placed.append(a)
    return tuple(keep)


def fixation_into(
    fig: Figure,
    words: Sequence[str],
    focus: np.ndarray,
    effect: np.ndarray,
    counts: Sequence[int],
    *,
    title: str = "",
    highlight: str | None = None,
    x_units: str = X_UNITS,
) -> FixationArtists:
    """Clear ``fig`` and draw one labelled point per word: ``focus`` (x) against ``effect`` (y)."""
    fig.clear()
    x = np.asarray(focus, dtype=np.float64)
    y = np.asarray(effect, dtype=np.float64)
    n = np.asarray(counts, dtype=np.float64)
    if not (len(words) == x.size == y.size == n.size):
        raise ValueError("words, focus, effect and counts must have one entry per word")
    ax = fig.add_axes((0.12, 0.12, 0.8, 0.75))
    left = line_height_in(style.FONT_SIZE) * 4 + line_height_in(style.LABEL_SIZE) + 0.1
    bottom = line_height_in(style.FONT_SIZE) + line_height_in(style.LABEL_SIZE) + 0.2
    top = line_height_in(style.TITLE_SIZE, 1.8)

    def place(width: float, height: float) -> dict[Axes, Box]:
        return {ax: (left, bottom, max(width - left - 0.25, 0.1), max(height - bottom - top, 0.1))}

    fig.set_layout_engine(InchLayout(place))
    width_in, height_in = fig.get_size_inches()
    sizes = 14.0 + 46.0 * np.sqrt(n / max(float(n.max()), 1.0)) if n.size else n
    points = ax.scatter(x, y, s=sizes, color=style.ACCENT, alpha=0.55, linewidths=0, zorder=2)
    if x.size:
        ax.axvline(float(np.median(x)), color=style.MUTED, linewidth=0.8, linestyle="--", zorder=1)
        ax.axhline(float(np.median(y)), color=style.MUTED, linewidth=0.8, linestyle="--", zorder=1)
        pad_x = max(float(np.ptp(x)) * 0.08, 1e-3)
        pad_y = max(float(np.ptp(y)) * 0.08, 1e-3)
        ax.set_xlim(float(x.min()) - pad_x, float(x.max()) + pad_x * 3)
        ax.set_ylim(float(y.min()) - pad_y, float(y.max()) + pad_y * 2)
        corners = (
            (0.01, 0.99, "ignored but decisive", "left", "top"),
            (0.99, 0.01, "attended but harmless", "right", "bottom"),
        )
        for cx, cy, words_there, ha, va in corners:
            ax.text(
                cx,
                cy,
                words_there,
                transform=ax.transAxes,
                ha=ha,
                va=va,
                fontsize=style.FONT_SIZE - 0.5,
                color=style.MUTED,
            )
    limits = (*ax.get_xlim(), *ax.get_ylim())
    chosen = _free_labels(labelled_words(x, y), words, x, y, place(width_in, height_in)[ax], limits, LABELS)
    labels = [
        ax.annotate(
            style.token_label(words[i]),
            (x[i], y[i]),
            xytext=(4, 3),
            textcoords="offset points",
            fontsize=style.FONT_SIZE,
            color="#1d2b36",
            zorder=3,
        )
        for i in chosen
    ]
    mark = None
    if highlight is not None and highlight in words:
        i = list(words).index(highlight)
        mark = ax.scatter(
            [x[i]], [y[i]], s=90, facecolors="none", edgecolors=style.SELECTION, linewidths=1.8, zorder=4
        )
    style.style_axes(ax)
    ax.set_xlabel(x_units, fontsize=style.LABEL_SIZE)
    ax.set_ylabel(Y_UNITS, fontsize=style.LABEL_SIZE)
    ax.fit_texts = [ax.yaxis.label]  # smaller, or left out, where the plot is short
    if title:
        ax.set_title(title, fontsize=style.TITLE_SIZE, loc="left", y=1.0)
    return FixationArtists(ax, points, labels, chosen, x, y, mark)


def point_at(artists: FixationArtists, x_px: float, y_px: float, radius_px: float = 8.0) -> int | None:
    """The word whose point is nearest to display position (x_px, y_px), within ``radius_px``."""
    if artists.x.size == 0:
        return None
    xy = artists.ax.transData.transform(np.column_stack([artists.x, artists.y]))
    d = np.hypot(xy[:, 0] - x_px, xy[:, 1] - y_px)
    i = int(np.argmin(d))
    return i if d[i] <= radius_px else None
