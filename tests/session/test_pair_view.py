"""What the pair grid shows of a long text, without a window: overviews, exact cells, hover text.

Reference: transformers' own eager ``output_attentions`` of the same token ids on a separately
loaded copy of a tiny causal decoder with 2,048 positions, on a text of about 1,500 tokens (longer
than ``DENSE_TOKENS``, so it is shown as an overview). The overview's blocks are checked against
a brute-force pooling of those probabilities written out here with numpy reshapes, following the
definition in docs/definitions.md, "Overview": block max over the visible cells, block mean over
the visible cells, no value (NaN) for a block without one; visible means j <= i for a causal
model (Vaswani et al. 2017, §3.2.3, the decoder's masking).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from transformers import AutoModelForCausalLM, LlamaConfig, LlamaForCausalLM

from tests.benchmarks.bench_long import text_of
from tests.model import tiny
from viewer.core.overview import DENSE_TOKENS, block_size
from viewer.figures.pair_grid import mark_cell, pair_grid_into, show_exact
from viewer.model.loader import open_model
from viewer.session import pair_view
from viewer.session.analysis import analyse, summarise

LONG_WORDS = 900  # about 1,500 tokens of the tiny tokenizer


def pooled(probs: np.ndarray, visible: np.ndarray, c: int) -> tuple[np.ndarray, np.ndarray]:
    """(n, n) block max and block mean of (T, T) ``probs`` over its ``visible`` cells, blocks of
    c × c tokens (the last ones cut where the text ends), NaN where a block sees nothing."""
    t = probs.shape[0]
    n = -(-t // c)
    pad = n * c - t
    p = np.pad(probs, ((0, pad), (0, pad))).reshape(n, c, n, c)
    v = np.pad(visible, ((0, pad), (0, pad))).reshape(n, c, n, c)  # padding: not visible
    count = v.sum(axis=(1, 3))
    peak = np.where(v, p, -np.inf).max(axis=(1, 3))
    mean = np.where(v, p, 0.0).sum(axis=(1, 3)) / np.maximum(count, 1)
    peak[count == 0] = np.nan
    mean[count == 0] = np.nan
    return peak, mean


@pytest.fixture(scope="module")
def causal_long(tmp_path_factory):
    """(analysis of a ~1,500-token text, the library's (L, H, T, T) attention, visible (T, T))."""
    folder = tmp_path_factory.mktemp("long") / "llama"
    torch.manual_seed(0)
    LlamaForCausalLM(LlamaConfig(**{**tiny.DECODER, "max_position_embeddings": 2048})).save_pretrained(folder)
    tiny.tokenizer(False).save_pretrained(folder)
    loaded = open_model(folder)
    rec = loaded.record(text_of(LONG_WORDS))
    assert DENSE_TOKENS < rec.n_tokens <= 2048 and not rec.truncated
    ref = AutoModelForCausalLM.from_pretrained(folder, attn_implementation="eager", local_files_only=True)
    ref.eval()
    with torch.no_grad():
        out = ref(input_ids=torch.from_numpy(rec.token_ids)[None], output_attentions=True)
    theirs = torch.stack(out.attentions, dim=1)[0].double().numpy()  # (L, H, T, T)
    i, j = np.indices((rec.n_tokens, rec.n_tokens))
    return analyse(rec), theirs, j <= i


def test_overviews_are_the_pooled_library_attentions(causal_long):
    analysis, theirs, visible = causal_long
    rec = analysis.recording
    c = block_size(rec.n_tokens)
    assert c > 1
    for layer in range(rec.n_layers):
        for head in (0, rec.n_heads - 1, None):
            probs = theirs[layer].mean(axis=0) if head is None else theirs[layer, head]
            peak, mean = pooled(probs, visible, c)
            view = analysis.overview(layer, head)
            assert view.size == c
            np.testing.assert_allclose(pair_view.block_values(view, "max"), peak, atol=1e-6)
            np.testing.assert_allclose(pair_view.block_values(view, "mean"), mean, atol=1e-6)
            assert np.isnan(peak).any(), "blocks above the diagonal see nothing"


def test_the_summary_pass_stores_the_same_overviews_layer_by_layer(causal_long):
    analysis, theirs, visible = causal_long
    fresh = analyse(analysis.recording)  # its own cache: nothing computed yet
    assert fresh.cached_overview(0, 1) is None
    summarised = summarise(fresh, threads=1)
    c = block_size(fresh.recording.n_tokens)
    for layer in range(fresh.recording.n_layers):
        for head in (1, None):
            view = summarised.cached_overview(layer, head)
            assert view is not None
            probs = theirs[layer].mean(axis=0) if head is None else theirs[layer, head]
            np.testing.assert_allclose(view.maximum[0], pooled(probs, visible, c)[0], atol=1e-6)


def test_exact_cells_rows_and_hover_text_equal_the_library(causal_long):
    analysis, theirs, visible = causal_long
    rec = analysis.recording
    rows, cols = slice(700, 990), slice(650, 1010)  # across the diagonal
    cells = pair_view.exact_cells(analysis, 1, 2, rows, cols)
    np.testing.assert_allclose(cells.values, theirs[1, 2, rows, cols], atol=1e-6)
    np.testing.assert_array_equal(cells.visible, visible[rows, cols])
    assert cells.covers(rec, 1, 2, slice(710, 900), slice(700, 1000))
    assert not cells.covers(rec, 1, 2, slice(600, 900), slice(700, 1000))
    mean = pair_view.exact_cells(analysis, 0, None, rows, cols)
    np.testing.assert_allclose(mean.values, theirs[0, :, rows, cols].mean(axis=0), atol=1e-6)
    # one row on demand for a hovered cell, and the block it lies in
    np.testing.assert_allclose(analysis.row(1, 2, 800), theirs[1, 2, 800], atol=1e-6)
    overview = analysis.overview(1, 2)
    text = pair_view.describe_cell(analysis, 1, 2, 800, 640, overview=overview)
    shown = float(text.split("attention probability ")[1].split("\n")[0])
    assert shown == pytest.approx(theirs[1, 2, 800, 640], abs=1e-6)
    c = overview.size
    peak = pooled(theirs[1, 2], visible, c)[0][800 // c, 640 // c]
    assert f"block max {peak:.6f}" in text
    masked = pair_view.describe_cell(analysis, 1, 2, 10, 20)
    assert "masked (a causal query cannot see later keys)" in masked


def test_the_overview_is_drawn_with_hatched_blocks_and_exact_cells_in_front(causal_long):
    analysis, theirs, visible = causal_long
    rec = analysis.recording
    view = analysis.overview(0, 3)
    values = pair_view.block_values(view, "max")
    fig = Figure(figsize=(6, 5), dpi=80)
    arts = pair_grid_into(
        fig, values, rec.tokens, visible=np.isfinite(values), title="overview", block=view.size, numbered=True
    )
    FigureCanvasAgg(fig).draw()
    shown = arts.image.get_array()
    np.testing.assert_array_equal(np.ma.getmaskarray(shown), np.isnan(values))
    assert arts.background.get_visible(), "blocks above the diagonal are hatched"
    # the axes count tokens and stop where the text ends, the image's blocks c tokens each
    assert arts.ax.get_xlim() == (-0.5, rec.n_tokens - 0.5)
    assert arts.image.get_extent()[1] == values.shape[1] * view.size - 0.5
    mark_cell(arts, 100, 3)  # the block holding the cell is outlined
    c = view.size
    assert arts.marker.get_width() == c and arts.marker.get_x() == 3 - 3 % c - 0.5
    rows, cols = slice(0, 40), slice(0, 40)
    cells = pair_view.exact_cells(analysis, 0, 3, rows, cols)
    show_exact(arts, cells.values, rows, cols, visible=cells.visible)
    assert not arts.image.get_visible() and arts.exact.get_visible()
    np.testing.assert_array_equal(np.ma.getmaskarray(arts.exact.get_array()), ~visible[rows, cols])
    show_exact(arts, None)
    assert arts.image.get_visible() and not arts.exact.get_visible()


def test_the_view_decides_between_blocks_and_exact_cells():
    assert pair_view.view_span(-0.5, 99.5, 8192) == slice(0, 100)
    # token i covers [i - 0.5, i + 0.5]: 10.2 lies in token 10, 19.4 in token 19, 19.7 in 20
    assert pair_view.view_span(10.2, 19.4, 8192) == slice(10, 20)
    assert pair_view.view_span(10.2, 19.7, 8192) == slice(10, 21)
    assert pair_view.view_span(8000.0, 9000.0, 8192) == slice(8000, 8192)
    span = slice(1000, 1000 + pair_view.EXACT_CELLS)
    rows, cols = pair_view.exact_region(span, span, 8192)
    more = int(pair_view.EXACT_CELLS * pair_view.MARGIN)
    assert rows == slice(1000 - more, 1000 + pair_view.EXACT_CELLS + more)
    assert pair_view.exact_region(slice(0, pair_view.EXACT_CELLS + 1), span, 8192) is None
    assert pair_view.exact_region(slice(0, 10), slice(8180, 8192), 8192) == (slice(0, 12), slice(8177, 8192))


def test_word_units_by_binary_search_are_the_scan_of_every_token(causal_long):
    """Reference: ``viewer.core.links.word_token_indices``, the scan over every token that
    defines a word's sub-tokens (docs/definitions.md, "Link pairs"), for every word of a
    1,500-token text; and the same answers when the offsets are out of order (the scan is then
    used)."""
    from viewer.core.links import text_words, word_token_indices
    from viewer.session.analysis import overlapping_tokens, recorded_text

    rec = causal_long[0].recording
    text = recorded_text(rec)
    spans = text_words(text)
    assert len(spans) > 500
    find = overlapping_tokens(rec.offsets)
    for span in spans:
        np.testing.assert_array_equal(find(span), word_token_indices(span, rec.offsets))
    shuffled = rec.offsets[np.random.default_rng(0).permutation(rec.n_tokens)]
    find = overlapping_tokens(shuffled)
    for span in spans[:50]:
        np.testing.assert_array_equal(find(span), word_token_indices(span, shuffled))


def test_a_cut_text_is_read_for_words_only_as_far_as_its_tokens():
    import dataclasses

    from tests.core.test_attention import make_recording
    from viewer.session.analysis import recorded_text, word_units

    rec = make_recording(np.random.default_rng(0), t=4)
    text = "brake pads squeal " + "spoke " * 100_000
    offsets = np.array([[0, 0], [0, 5], [6, 9], [11, 13]])  # the last token ends inside "squeal"
    rec = dataclasses.replace(rec, text=text, offsets=offsets)
    assert recorded_text(rec) == "brake pads squeal"  # to the end of the word the last token is in
    assert word_units(rec).names == ("t0", "brake", "pads", "squeal")  # t0: a token with no span
