"""Signed metrics on a diverging scale centred at 0, and one number format per grid.

References: matplotlib's ``TwoSlopeNorm`` maps its centre to the middle of the colour map
(norm(0) = 0.5), and Python's own float formatting (every cell text parses back to its value
within half a unit of the grid's last decimal).
"""

from __future__ import annotations

import re

import numpy as np
from matplotlib.figure import Figure

from tests.gui.conftest import run_and_wait, settle
from viewer.figures.head_map import format_value, head_map_into, value_format


def decimals(text: str) -> int:
    return len(text.split(".")[1]) if "." in text else 0


def test_a_head_map_writes_every_cell_in_one_format():
    # the mix the window showed: "0.13", "-8e-03", "6e-03", "0.01" in one grid
    values = np.array([[0.13, 0.40, -0.008], [0.006, 0.01, -0.03]])
    fig = Figure(figsize=(6, 3))
    artists = head_map_into(fig, values, label="Δ entropy", diverging=True, annotate=True)
    texts = [t.get_text() for t in artists.cell_texts]
    assert len({decimals(t) for t in texts}) == 1 and not any("e" in t for t in texts), texts
    step = 10.0 ** -decimals(texts[0])
    np.testing.assert_allclose([float(t) for t in texts], values.ravel(), atol=step / 2 + 1e-12)
    # tiny values keep two significant digits in the grid's one format, no "-0.00"
    for grid in (np.array([[3e-4, -1e-4], [2e-5, 0.0]]), np.array([[3e-8, -1e-8], [0.0, 1e-9]])):
        fmt = value_format(grid)
        shown = [format_value(v, fmt) for v in grid.ravel()]
        assert len({re.sub(r"[\d+-]", "9", s.lstrip("-")) for s in shown}) == 1, shown
        assert not any(s.startswith("-") and float(s) == 0 for s in shown)
        assert float(shown[0]) == float(f"{grid[0, 0]:.2g}")


def test_the_knockout_effect_is_drawn_centred_at_zero(qtbot, window):
    run_and_wait(qtbot, window)  # with the evidence: head importance and knockout
    knockout = window.state.evidence.head_knockout
    assert knockout is not None
    window.state.set_metric("knockout")
    pane = window.head_map
    settle(qtbot, pane)
    np.testing.assert_array_equal(np.ma.getdata(pane.displayed_values()), knockout)
    assert pane.artists.diverging
    norm = pane.artists.image.norm
    reach = float(np.nanmax(np.abs(knockout)))
    assert norm.vcenter == 0.0 and norm.vmin == -reach and norm.vmax == reach
    assert float(norm(0.0)) == 0.5  # white, not the low end of a one-way scale
    # an unsigned metric stays on its one-way scale
    window.state.set_metric("entropy")
    settle(qtbot, pane)
    assert not pane.artists.diverging
