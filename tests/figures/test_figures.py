"""Figure builders, drawn headless with the Agg backend.

The references are the inputs themselves: a figure must show exactly the numbers it was given
(pair-grid cells = probabilities, head-map cells = metric), masked cells must be masked (not
zero), and token labels must never outnumber the room the axis has.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
import pytest  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from tests.figures.readers import colorbar_units, visible_tick_labels  # noqa: E402
from viewer.figures import style  # noqa: E402
from viewer.figures.evidence import evidence_into, normalise_rows  # noqa: E402
from viewer.figures.head_map import head_at, head_map_into, update_head_map  # noqa: E402
from viewer.figures.links import links_into, relink, top_links  # noqa: E402
from viewer.figures.pair_grid import (  # noqa: E402
    cell_at,
    pair_grid_figure,
    pair_grid_into,
    retoken_pair_grid,
    update_pair_grid,
)


def head_map_figure(values: np.ndarray, **options) -> Figure:
    fig = Figure(figsize=(6.0, 3.6), dpi=100)
    head_map_into(fig, values, **options)
    return fig


def random_attention(t: int, causal: bool, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    a = rng.random((t, t))
    if causal:
        a = np.tril(a)
    return a / a.sum(axis=1, keepdims=True)


def pixels(fig: Figure) -> np.ndarray:
    """The RGBA pixels of ``fig`` drawn by Agg."""
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    return np.asarray(canvas.buffer_rgba()).copy()


def drawn(fig: Figure) -> Figure:
    FigureCanvasAgg(fig).draw()
    return fig


def test_pair_grid_image_holds_the_probabilities():
    probs = random_attention(12, causal=False)
    tokens = [f"t{i}" for i in range(12)]
    fig = drawn(pair_grid_figure(probs, tokens, title="layer 0 · head 1"))
    image = fig.axes[0].images[0]
    data = image.get_array()
    np.testing.assert_array_equal(np.ma.getdata(data), probs)  # exactly the input
    assert not np.ma.getmaskarray(data).any()
    assert image.colorbar is not None
    assert colorbar_units(image.colorbar) == "attention probability"


def test_pair_grid_masks_causal_cells_instead_of_showing_zero():
    probs = random_attention(10, causal=True)
    visible = np.tril(np.ones((10, 10), dtype=bool))
    fig = drawn(pair_grid_figure(probs, [str(i) for i in range(10)], visible=visible))
    data = fig.axes[0].images[0].get_array()
    np.testing.assert_array_equal(np.ma.getmaskarray(data), ~visible)
    np.testing.assert_array_equal(np.ma.getdata(data)[visible], probs[visible])
    # a masked cell is transparent (the hatched background shows), a zero cell is not
    cmap = fig.axes[0].images[0].get_cmap()
    assert cmap(np.ma.masked)[3] == 0.0
    assert cmap(0.0)[3] == 1.0
    hatched = [p for p in fig.axes[0].patches if p.get_hatch()]
    assert hatched, "masked cells need the hatched background"


def test_pair_grid_update_swaps_values_in_place():
    probs = random_attention(8, causal=False, seed=1)
    other = random_attention(8, causal=False, seed=2)
    fig = Figure()
    artists = pair_grid_into(fig, probs, [str(i) for i in range(8)])
    update_pair_grid(artists, other, title="layer 1 · head 0")
    np.testing.assert_array_equal(np.ma.getdata(artists.image.get_array()), other)
    assert artists.image.get_clim() == (0.0, pytest.approx(other.max()))
    assert cell_at(artists, 2.2, 4.9) == (5, 2)
    assert cell_at(artists, -0.6, 0) is None


@pytest.mark.parametrize("causal", [False, True])
def test_retokened_pair_grid_draws_the_same_pixels_as_a_fresh_one(causal):
    # reference: a fresh ``pair_grid_into`` of the second text on its own figure
    first = random_attention(40, causal=causal, seed=3)
    second = random_attention(23, causal=causal, seed=4)
    visible = np.tril(np.ones((23, 23), dtype=bool)) if causal else None
    tokens = [f"second-{i}" for i in range(23)]
    reused, fresh = Figure(figsize=(6, 5), dpi=80), Figure(figsize=(6, 5), dpi=80)
    artists = pair_grid_into(reused, first, [f"t{i}" for i in range(40)], title="first")
    FigureCanvasAgg(reused).draw()
    retoken_pair_grid(artists, second, tokens, visible=visible, title="second")
    pair_grid_into(fresh, second, tokens, visible=visible, title="second")
    np.testing.assert_array_equal(pixels(reused), pixels(fresh))
    assert (artists.n_rows, artists.n_cols) == (23, 23)
    assert cell_at(artists, 22.0, 22.0) == (22, 22) and cell_at(artists, 23.0, 0) is None


def test_updated_pair_grid_draws_the_same_pixels_as_a_fresh_one():
    """Reference: a fresh ``pair_grid_into`` of the new values. The colour bar follows the new
    range by moving its limits only (``style.rescale_by_ticks``), so its colours, ticks and
    labels must still be those a new bar would get, also for a range far from the first."""
    tokens = [f"t{i}" for i in range(30)]
    first = random_attention(30, causal=False, seed=7)
    second = random_attention(30, causal=False, seed=8) ** 3
    reused, fresh = Figure(figsize=(6, 5), dpi=80), Figure(figsize=(6, 5), dpi=80)
    artists = pair_grid_into(reused, first, tokens, title="a")
    FigureCanvasAgg(reused).draw()
    update_pair_grid(artists, second, title="b")
    pair_grid_into(fresh, second, tokens, title="b")
    assert artists.colorbar.ax.get_ylim() == (0.0, pytest.approx(second.max()))
    np.testing.assert_array_equal(pixels(reused), pixels(fresh))


@pytest.mark.parametrize("diverging", [False, True])
def test_updated_head_map_draws_the_same_pixels_as_a_fresh_one(diverging):
    # reference: a fresh ``head_map_into`` of the new values on its own figure
    rng = np.random.default_rng(5)
    first, second = rng.random((4, 4)), rng.random((4, 4)) * 0.5
    if diverging:
        first, second = first - 0.5, second - 0.1
    second[2, 1] = np.nan  # an undefined head stays masked
    reused, fresh = Figure(figsize=(6, 4), dpi=80), Figure(figsize=(6, 4), dpi=80)
    artists = head_map_into(reused, first, label="metric", diverging=diverging, annotate=True)
    FigureCanvasAgg(reused).draw()
    update_head_map(artists, second)
    head_map_into(fresh, second, label="metric", diverging=diverging, annotate=True)
    np.testing.assert_array_equal(pixels(reused), pixels(fresh))
    with pytest.raises(ValueError):
        update_head_map(artists, np.zeros((3, 4)))


@pytest.mark.parametrize("n_tokens", [512])
def test_token_labels_are_decimated_for_long_texts(n_tokens):
    probs = random_attention(n_tokens, causal=False)
    tokens = [f"w{i}" for i in range(n_tokens)]
    fig = drawn(pair_grid_figure(probs, tokens, size=(6.4, 5.6), dpi=100))
    ax = fig.axes[0]
    font_px = style.FONT_SIZE * fig.dpi / 72
    for which, room in (("x", ax.get_window_extent().width), ("y", ax.get_window_extent().height)):
        labels = visible_tick_labels(ax, which)
        # no more labels than fit at one label height each (so none overlap) ...
        assert 2 <= len(labels) <= room / (font_px * style.LABEL_SPACING) + 1
    # ... and zooming in shows every token once the view is small enough
    ax.set_xlim(99.5, 109.5)
    assert visible_tick_labels(ax, "x") == [f"w{i}" for i in range(100, 110)]


def test_rendered_tick_labels_do_not_overlap():
    tokens = [f"token{i}" for i in range(300)]
    fig = drawn(pair_grid_figure(random_attention(300, False), tokens, size=(5, 4)))
    renderer = fig.canvas.get_renderer()
    ax = fig.axes[0]
    for axis in (ax.xaxis, ax.yaxis):
        boxes = [
            t.get_window_extent(renderer) for t in axis.get_ticklabels() if t.get_text() and t.get_visible()
        ]
        for a, b in zip(boxes, boxes[1:], strict=False):
            assert not a.overlaps(b)


def test_token_label_cleaning():
    assert style.token_label("Ġthe") == "·the"
    assert style.token_label("▁word") == "·word"
    assert style.token_label("##ing") == "##ing"
    assert style.token_label("$5") == r"\$5"
    assert style.token_label("x" * 40).endswith("…")
    assert len(style.token_label("x" * 40)) == style.MAX_TOKEN_CHARS


def test_head_map_data_equals_the_metric_and_names_count_from_zero():
    metric = np.random.default_rng(3).random((6, 12))
    fig = drawn(head_map_figure(metric, label="entropy (0–1)", selected=(3, 1)))
    ax = fig.axes[0]
    np.testing.assert_array_equal(np.ma.getdata(ax.images[0].get_array()), metric)
    assert [t.get_text() for t in ax.get_yticklabels()] == [f"layer {i}" for i in range(6)]
    assert colorbar_units(ax.images[0].colorbar) == "entropy (0–1)"
    marker = [p for p in ax.patches if p.get_visible() and not p.get_fill()][0]
    assert (marker.get_x(), marker.get_y()) == (0.5, 2.5)  # head 1, layer 3


def test_head_map_difference_is_centred_on_zero():
    diff = np.array([[-0.2, 0.1], [0.4, 0.0]])
    fig = drawn(head_map_figure(diff, label="Δ entropy", diverging=True))
    image = fig.axes[0].images[0]
    norm = image.norm
    assert norm.vcenter == 0.0 and norm.vmin == -0.4 and norm.vmax == 0.4
    assert image.get_cmap().name.startswith(style.DIVERGING)


def test_head_map_masks_undefined_metrics():
    metric = np.array([[0.5, np.nan], [0.2, 0.3]])
    fig = drawn(head_map_figure(metric, label="weight on next"))
    mask = np.ma.getmaskarray(fig.axes[0].images[0].get_array())
    np.testing.assert_array_equal(mask, np.isnan(metric))


def test_head_hit_testing():
    fig = Figure()
    from viewer.figures.head_map import head_map_into

    artists = head_map_into(fig, np.zeros((3, 4)), label="x")
    assert head_at(artists, 3.4, 1.6) == (2, 3)
    assert head_at(artists, 4.6, 0) is None


def test_evidence_rows_are_normalised_and_agreement_shown():
    values = np.array([[0.0, 2.0, 1.0], [-3.0, 1.5, 0.0], [np.nan, 0.5, 0.25]])
    shown = normalise_rows(values)
    np.testing.assert_allclose(shown[0], [0, 1, 0.5])
    np.testing.assert_allclose(shown[1], [-1, 0.5, 0])
    assert np.isnan(shown[2, 0]) and shown[2, 1] == 1.0
    fig = Figure(figsize=(9.0, 3.2), dpi=100)
    evidence_into(
        fig,
        ["[CLS]", "a", "b"],
        ["x", "y", "knockout"],
        values,
        [0.5, -0.25, "reference"],
        labels=["p", "q"],
        probabilities=np.array([0.3, 0.7]),
        predicted=1,
        gold="p",
    )
    fig = drawn(fig)
    ax = fig.axes[0]
    np.testing.assert_allclose(np.ma.getdata(ax.images[0].get_array())[:2], shown[:2])
    texts = [t.get_text() for t in ax.texts]
    assert "ρ +0.50" in texts and "ρ -0.25" in texts and "reference" in texts


def test_link_bars_show_the_top_scores_and_keep_the_target():
    scores = np.array([0.1, 0.5, 0.05, 0.3, 0.02])
    assert list(top_links(scores, 2)) == [1, 3]
    fig = Figure(figsize=(8, 3))
    arts = links_into(
        fig,
        ["a", "b", "c", "d", "e"],
        scores,
        per_head_to_target=np.ones((2, 2)),
        target=4,
        source_name="a",
        target_name="e",
        head_title="layer 0 · head 0",
    )
    drawn(fig)
    assert 4 in arts.shown  # the selected target is always among the bars
    widths = [p.get_width() for p in arts.bars_ax.patches]
    np.testing.assert_allclose(widths, scores[list(arts.shown)])


@pytest.mark.parametrize("fewer, with_target", [(False, True), (True, True), (False, False)])
def test_relinked_bars_draw_the_same_pixels_as_a_fresh_figure(fewer, with_target):
    # reference: a fresh ``links_into`` of the second head on its own figure
    rng = np.random.default_rng(5)
    names = [f"word{i}" for i in range(5 if fewer else 30)]
    per_head = rng.random((3, 4)) if with_target else None
    target = 2 if with_target else None
    first, second = rng.random(len(names)), rng.random(len(names))
    common = dict(per_head_to_target=per_head, target=target, source_name="word0")
    reused, fresh = Figure(figsize=(7, 3), dpi=80), Figure(figsize=(7, 3), dpi=80)
    target_name = "word2" if with_target else None
    arts = links_into(
        reused,
        names,
        first,
        target_name=target_name,
        head_title="layer 0 · head 0",
        selected=(0, 0),
        **common,
    )
    FigureCanvasAgg(reused).draw()
    relink(arts, names, second, head_title="layer 2 · head 3", selected=(2, 3), **common)
    ref = links_into(
        fresh,
        names,
        second,
        target_name=target_name,
        head_title="layer 2 · head 3",
        selected=(2, 3),
        **common,
    )
    np.testing.assert_array_equal(pixels(reused), pixels(fresh))
    assert arts.shown == ref.shown and (not with_target or 2 in arts.shown)
    widths = [p.get_width() for p in arts.bars_ax.patches]
    np.testing.assert_allclose(widths, second[list(arts.shown)])
