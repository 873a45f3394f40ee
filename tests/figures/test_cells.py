"""``CellImage`` against matplotlib's own ``AxesImage`` (reference: ``Axes.imshow`` with
``interpolation="nearest"``, drawn by the same Agg canvas and by ``make_image`` itself)."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
import pytest  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.image import AxesImage  # noqa: E402

from viewer.figures.cells import CellImage, cell_image  # noqa: E402


def _figure(values, fast: bool, size, dpi, limits=None, **kwargs):
    fig = Figure(figsize=size, dpi=dpi)
    canvas = FigureCanvasAgg(fig)
    ax = fig.add_axes((0.13, 0.11, 0.71, 0.77))
    rows, cols = values.shape
    options = (
        dict(
            cmap="viridis",
            interpolation="nearest",
            aspect="auto",
            extent=(-0.5, cols - 0.5, rows - 0.5, -0.5),
            origin="upper",
        )
        | kwargs
    )
    image = cell_image(ax, values, **options) if fast else ax.imshow(values, **options)
    if limits is not None:
        ax.set_xlim(limits[0], limits[1])
        ax.set_ylim(limits[2], limits[3])
    ax.axis("off")
    canvas.draw()
    return np.asarray(canvas.buffer_rgba()).copy(), image, canvas


@pytest.mark.parametrize("seed", range(24))
def test_cell_image_draws_the_pixels_of_a_nearest_imshow(seed):
    rng = np.random.default_rng(seed)
    rows, cols = (int(n) for n in rng.integers(3, 140, size=2))
    values = np.ma.masked_array(rng.random((rows, cols)), rng.random((rows, cols)) < 0.2)
    size = (float(rng.uniform(2, 8)), float(rng.uniform(2, 7)))
    dpi = int(rng.choice([72, 100, 144]))
    limits = None
    if seed % 2:  # zoomed in: the grid runs past the axes and is clipped
        limits = (
            rng.uniform(-0.5, cols / 2),
            rng.uniform(cols / 2 + 0.5, cols - 0.5),
            rng.uniform(rows / 2 + 0.5, rows - 0.5),
            rng.uniform(-0.5, rows / 2),
        )
    origin = "lower" if seed % 3 == 0 else "upper"
    extent = (
        (-0.5, cols - 0.5, -0.5, rows - 0.5) if origin == "lower" else (-0.5, cols - 0.5, rows - 0.5, -0.5)
    )
    ours, image, _ = _figure(values, True, size, dpi, limits, origin=origin, extent=extent)
    theirs, _, _ = _figure(values, False, size, dpi, limits, origin=origin, extent=extent)
    assert isinstance(image, CellImage)
    np.testing.assert_array_equal(ours, theirs)


@pytest.mark.parametrize("magnification", [1.0, 2.0, 300 / 72])
def test_cell_image_samples_like_axes_image_at_any_magnification(magnification):
    # vector backends (PDF, SVG) ask for the raster at dpi/72 of the figure's size
    rng = np.random.default_rng(7)
    values = np.ma.masked_array(rng.random((17, 29)), rng.random((17, 29)) < 0.3)
    _, image, canvas = _figure(values, True, (5, 4), 72)
    renderer = canvas.get_renderer()
    ours = image.make_image(renderer, magnification)
    theirs = AxesImage.make_image(image, renderer, magnification)
    np.testing.assert_array_equal(ours[0], theirs[0])
    assert ours[1:3] == pytest.approx(theirs[1:3])


def test_cell_image_leaves_other_interpolations_to_matplotlib():
    rng = np.random.default_rng(2)
    values = rng.random((12, 9))
    ours, image, _ = _figure(values, True, (4, 3), 100, interpolation="bilinear")
    theirs, _, _ = _figure(values, False, (4, 3), 100, interpolation="bilinear")
    assert image._cells_to_pixels(1.0) is None  # not nearest: matplotlib resamples
    np.testing.assert_array_equal(ours, theirs)


def test_cell_image_shows_masked_cells_as_the_colour_map_bad_colour():
    values = np.ma.masked_array(np.array([[0.0, 1.0], [0.5, 0.25]]), [[False, True], [False, False]])
    _, image, canvas = _figure(values, True, (2, 2), 50)
    out, *_ = image.make_image(canvas.get_renderer(), 1.0)
    # output row 0 is the bottom of the picture; origin "upper" puts the first row on top
    top_right = out[-1, -1]
    bottom_left = out[0, 0]
    assert top_right[3] == 0  # masked: the cmap's bad colour, transparent by default
    np.testing.assert_array_equal(bottom_left, image.to_rgba(0.5, bytes=True))
