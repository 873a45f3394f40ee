"""Out-of-window cells of a windowed layer are hatched in the pair grid like any masked cell."""

from __future__ import annotations

import dataclasses

import numpy as np

from tests.core.test_attention import make_recording
from viewer.core.terms import ScoreTerms
from viewer.figures.pair_grid import pair_grid_figure, visible_cells


def test_a_windowed_layer_hatches_exactly_its_out_of_window_cells():
    rec = make_recording(np.random.default_rng(0), t=9)
    rec = dataclasses.replace(rec, terms=ScoreTerms(window=np.array([[2, 2], [-1, -1]])))
    local = visible_cells(rec, 0)
    i, j = np.indices((9, 9))
    np.testing.assert_array_equal(local, np.abs(i - j) <= 2)  # the window's definition
    assert visible_cells(rec, 1) is None  # a global encoder layer hides nothing
    fig = pair_grid_figure(rec.own_probs[0, 0] * local, list(rec.tokens), visible=local)
    image, background = fig.axes[0].images[0], fig.axes[0].patches[0]
    np.testing.assert_array_equal(np.ma.getmaskarray(image.get_array()), ~local)
    assert background.get_visible(), "masked cells show the hatched background"
    fig = pair_grid_figure(rec.own_probs[1, 0], list(rec.tokens), visible=visible_cells(rec, 1))
    assert not fig.axes[0].patches[0].get_visible()


def test_a_causal_recording_keeps_its_triangle_and_adds_its_window():
    rec = dataclasses.replace(
        make_recording(np.random.default_rng(1), t=6, causal=True),
        terms=ScoreTerms(window=np.array([[1, -1], [-1, -1]])),
    )
    i, j = np.indices((6, 6))
    np.testing.assert_array_equal(visible_cells(rec, 0), (j <= i) & (i - j <= 1))
    np.testing.assert_array_equal(visible_cells(rec, 1), j <= i)
    np.testing.assert_array_equal(rec.key_mask(), j <= i)  # no layer: the shared causal rule
