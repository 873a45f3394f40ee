"""The insertion-test figure: per insertion point, the rate of texts flipping into the class.

One horizontal bar per position (start, end, random word boundary) with the flip-into rate and
its 95% Wilson score interval as a line across the bar's end (Wilson 1927); each bar is labelled
"flips of tried". Drawn from the insertion report's own dictionary (``headlight insert
--json``), so the figure and the numbers beside it cannot disagree.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from viewer.core.insertion import POSITION_NAMES
from viewer.figures import style
from viewer.figures.layout import Box, InchLayout, line_height_in, longest, text_width_in


@dataclass
class InsertionArtists:
    ax: Axes
    bars: object  # the BarContainer, one bar per position tried
    positions: tuple[str, ...]  # positions in bar order, top to bottom
    rates: np.ndarray  # (P,) the bar lengths


def insertion_into(fig: Figure, data: Mapping[str, Any], *, title: str = "") -> InsertionArtists:
    """Clear ``fig`` and draw ``data`` (an insertion report's ``to_dict()``)."""
    fig.clear()
    rows = [r for r in data["positions"] if r["tried"]]
    names = [POSITION_NAMES.get(r["position"], r["position"]) for r in rows]
    rates = np.array([r["flip_rate"] for r in rows], dtype=np.float64)
    low = np.array([r["flip_low"] for r in rows], dtype=np.float64)
    high = np.array([r["flip_high"] for r in rows], dtype=np.float64)
    ax = fig.add_axes((0.2, 0.2, 0.7, 0.6))
    left = text_width_in(longest(names) if names else 4, style.FONT_SIZE) + 0.25
    bottom = line_height_in(style.FONT_SIZE) + line_height_in(style.LABEL_SIZE) + 0.2
    top = line_height_in(style.TITLE_SIZE, 1.8)

    def place(width: float, height: float) -> dict[Axes, Box]:
        return {ax: (left, bottom, max(width - left - 0.9, 0.1), max(height - bottom - top, 0.1))}

    fig.set_layout_engine(InchLayout(place))
    y = np.arange(len(rows))
    bars = ax.barh(y, rates, height=0.6, color=style.ACCENT, alpha=0.8, zorder=2)
    if len(rows):
        ax.errorbar(
            rates,
            y,
            xerr=np.vstack([rates - low, high - rates]),
            fmt="none",
            ecolor="#1d2b36",
            elinewidth=1.2,
            capsize=4,
            zorder=3,
        )
    for k, r in enumerate(rows):
        ax.annotate(
            f"{r['flips']} of {r['tried']}",
            (high[k], k),
            xytext=(6, 0),
            textcoords="offset points",
            va="center",
            fontsize=style.FONT_SIZE,
            color="#1d2b36",
            annotation_clip=False,
        )
    ax.set_yticks(y, names, fontsize=style.FONT_SIZE)
    ax.invert_yaxis()
    ax.set_xlim(0.0, 1.0)
    style.style_axes(ax)
    ax.set_xlabel(f"texts flipping into {data['class']} (95% Wilson interval)", fontsize=style.LABEL_SIZE)
    ax.set_title(
        title
        or f"inserting “{data['phrase']}” into "
        f"{data['texts'] - data['skipped']} texts not predicted {data['class']}",
        fontsize=style.TITLE_SIZE,
        loc="left",
        y=1.0,
    )
    return InsertionArtists(ax, bars, tuple(r["position"] for r in rows), rates)
