"""The fixation plot: one point per word at (focus, effect), labels where the words are."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from viewer.figures.fixation import fixation_into, labelled_words, point_at  # noqa: E402


def sample(n: int = 30, seed: int = 0):
    rng = np.random.default_rng(seed)
    words = [f"word{i}" for i in range(n)]
    return words, rng.random(n) * 0.2, rng.normal(0, 0.05, n), rng.integers(3, 40, n)


def test_one_point_per_word_at_its_numbers():
    words, x, y, counts = sample()
    fig = Figure(figsize=(6, 4), dpi=100)
    arts = fixation_into(fig, words, x, y, counts, title="fixation")
    offsets = np.asarray(arts.points.get_offsets())
    assert offsets.shape == (len(words), 2)
    np.testing.assert_array_equal(offsets[:, 0], x)
    np.testing.assert_array_equal(offsets[:, 1], y)


def test_labels_name_the_strongest_and_most_attended_words_and_are_painted():
    words, x, y, counts = sample()
    y[7] = 0.9  # by far the largest knockout effect
    x[11] = 0.5  # by far the most attended
    fig = Figure(figsize=(6, 4), dpi=100)
    arts = fixation_into(fig, words, x, y, counts)
    names = [t.get_text() for t in arts.labels]
    assert "word7" in names and "word11" in names
    assert arts.labelled[0] == 7
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    rgba = np.asarray(canvas.buffer_rgba())
    height = rgba.shape[0]
    renderer = canvas.get_renderer()
    for label in arts.labels:
        box = label.get_window_extent(renderer)
        x0, x1 = int(box.x0), int(np.ceil(box.x1))
        y0, y1 = height - int(np.ceil(box.y1)), height - int(box.y0)
        patch = rgba[max(y0, 0) : y1, max(x0, 0) : x1, :3].astype(int)
        # dark text pixels inside the label's box: the label is drawn where it says it is
        assert patch.size and (patch.sum(axis=2) < 300).sum() >= 3, label.get_text()


def test_labelled_words_rule_and_hit_testing():
    x = np.array([0.0, 0.5, 0.1, 0.2])
    y = np.array([0.9, 0.0, 0.5, 0.1])
    assert labelled_words(x, y, k=2)[:2] == (0, 1)
    assert labelled_words(x, y, k=3) == (0, 2, 1, 3)  # then the rest, by effect
    fig = Figure(figsize=(5, 4), dpi=100)
    arts = fixation_into(fig, ["a", "b", "c", "d"], x, y, [3, 4, 5, 6], highlight="c")
    FigureCanvasAgg(fig).draw()
    px, py = arts.ax.transData.transform((0.1, 0.5))
    assert point_at(arts, px, py) == 2
    assert point_at(arts, px + 200, py + 200) is None
    assert arts.highlight is not None


def test_labels_do_not_overlap():
    # twenty words piled on one spot: only one of them can carry a readable label there
    words = [f"clustered{i}" for i in range(20)] + ["alone"]
    x = np.r_[np.full(20, 0.1) + np.arange(20) * 1e-5, 0.9]
    y = np.r_[np.full(20, 0.2), 0.8]
    fig = Figure(figsize=(6, 4), dpi=100)
    arts = fixation_into(fig, words, x, y, [5] * 21)
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    boxes = [t.get_window_extent(renderer) for t in arts.labels]
    for i, a in enumerate(boxes):
        for b in boxes[i + 1 :]:
            assert not a.overlaps(b)
    assert "alone" in [t.get_text() for t in arts.labels]


def test_the_y_label_stays_inside_a_short_plot():
    """Reference: matplotlib's own extent of the drawn label; at 1366 × 768 the fixation dock
    was about 1.8 inches high and the label ran off both ends."""
    words, x, y, counts = sample()
    for height in (4.0, 1.8, 1.0):
        fig = Figure(figsize=(9, height), dpi=100)
        canvas = FigureCanvasAgg(fig)
        arts = fixation_into(fig, words, x, y, counts, title="fixation")
        canvas.draw()
        label = arts.ax.yaxis.label
        if label.get_visible():
            box = label.get_window_extent(canvas.get_renderer())
            assert box.y0 >= -0.5 and box.y1 <= fig.bbox.height + 0.5, (height, box)
        else:
            assert height < 1.8  # left out only where no size fits
    assert label.get_fontsize() <= 8.5
