"""The insertion-test figure draws the report's own numbers: one bar per position tried, its
length the flip-into rate, its interval the Wilson bounds, its label "flips of tried"."""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from viewer.core.insertion import InsertionTally
from viewer.figures.insertion import insertion_into


def test_bars_are_the_flip_rates_and_untried_positions_are_left_out():
    tally = InsertionTally()
    tally.texts, tally.skipped = 10, 2
    for k in range(8):
        tally.add("end", k, k < 6, 0.5)  # 6 of 8
        tally.add("start", k, k < 2, 0.1)  # 2 of 8
    data = {"phrase": "[via portal]", "class": "billing", **tally.to_dict()}
    fig = Figure(figsize=(8, 3), dpi=100)
    artists = insertion_into(fig, data)
    assert artists.positions == ("start", "end")  # "random" was not tried
    widths = [bar.get_width() for bar in artists.bars]
    np.testing.assert_array_equal(widths, [2 / 8, 6 / 8])
    texts = [t.get_text() for t in artists.ax.texts]
    assert "2 of 8" in texts and "6 of 8" in texts
    assert "8 texts not predicted billing" in artists.ax.get_title(loc="left")
    fig.canvas.draw()  # draws without error at this size
