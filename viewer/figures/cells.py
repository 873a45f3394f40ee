"""An image of cells drawn by nearest sampling of its colours, for the heat grids.

matplotlib's ``AxesImage`` with ``interpolation="nearest"`` resamples the *data* to the screen's
pixels (a float64 resampling of the values and another of the mask) and then colour-maps every
screen pixel: for a 128 × 128 pair grid on a 740 × 700 pixel axes that is about 40 ms of a
draw. The cells are flat, so the same picture comes from colour-mapping the cells once and
repeating each cell's colour over the screen pixels whose centre falls inside it. ``CellImage``
does that with two index vectors and one ``take``; it is the ``AxesImage`` sampling (same
output box, same pixel-centre rule) in every case it handles, and it hands every other case
(vector output, a non-affine or rotated transform, other interpolations, per-cell alpha) back
to matplotlib.
"""

from __future__ import annotations

import numpy as np
from matplotlib.axes import Axes
from matplotlib.image import AxesImage
from matplotlib.transforms import Affine2D, Bbox, TransformedBbox


class CellImage(AxesImage):
    """``AxesImage`` whose nearest-sampled raster output skips the resampling of the data."""

    def make_image(self, renderer, magnification=1.0, unsampled=False):
        fast = self._cells_to_pixels(magnification) if not unsampled else None
        if fast is None:
            return super().make_image(renderer, magnification, unsampled)
        return fast

    def _cells_to_pixels(self, magnification: float):
        A = self.get_array()
        if (
            A is None
            or A.ndim != 2
            or A.size == 0
            or self.get_interpolation() != "nearest"
            or np.ndim(self.get_alpha()) > 0
            or not self.get_transform().is_affine
        ):
            return None
        # the output box exactly as ``_ImageBase._make_image`` rounds it
        x1, x2, y1, y2 = self.get_extent()
        out_bbox = TransformedBbox(Bbox([[x1, y1], [x2, y2]]), self.get_transform())
        clip = (
            (self.get_clip_box() or self.axes.bbox) if self.get_clip_on() else self.get_figure(root=True).bbox
        )
        clipped = Bbox.intersection(out_bbox, clip)
        if clipped is None:
            return None, 0, 0, None
        e = clipped.extents * magnification
        x0 = np.floor(e[0] + 0.5)
        y0 = np.ceil(e[1] - 0.5 - 1e-8)
        x1p = np.floor(e[2] + 0.5 + 1e-8)
        y1p = np.ceil(e[3] - 0.5)
        width, height = int(x1p - x0), int(y1p - y0)
        if width <= 0 or height <= 0:
            return None, 0, 0, None
        # cell (array) coordinates → output pixels, as there: origin flip, extent, data transform
        rows, cols = A.shape
        t0 = Affine2D().translate(0, -rows).scale(1, -1) if self.origin == "upper" else Affine2D()
        in_w, in_h = (x2 - x1), (y2 - y1)
        t = (
            t0
            + Affine2D().scale(in_w / cols, in_h / rows).translate(x1, y1)
            + self.get_transform()
            + Affine2D().scale(magnification).translate(-x0, -y0)
        )
        m = t.get_matrix()
        if abs(m[0, 1]) > 1e-12 or abs(m[1, 0]) > 1e-12:
            return None  # rotated or skewed: matplotlib's resampler
        # the cell under each output pixel's centre; output row r is pixel row r from the bottom
        inverse = t.inverted().get_matrix()
        u = (np.arange(width) + 0.5) * inverse[0, 0] + inverse[0, 2]
        v = (np.arange(height) + 0.5) * inverse[1, 1] + inverse[1, 2]
        col = np.floor(u).astype(np.intp)
        row = np.floor(v).astype(np.intp)
        inside_c = (col >= 0) & (col < cols)
        inside_r = (row >= 0) & (row < rows)
        rgba = np.ascontiguousarray(self.to_rgba(A, bytes=True))
        # one transparent cell for pixels off the grid (none while the axes show only the grid)
        flat = np.zeros(rows * cols + 1, dtype=np.uint32)
        flat[:-1] = rgba.view(np.uint32).reshape(-1)
        index = np.where(inside_r, row, 0)[:, None] * cols + np.where(inside_c, col, 0)[None, :]
        index[~inside_r, :] = rows * cols
        index[:, ~inside_c] = rows * cols
        out = flat[index].view(np.uint8).reshape(height, width, 4)
        alpha = self._get_scalar_alpha()
        if alpha != 1:
            out[..., 3] = (out[..., 3].astype(np.float32) * alpha).astype(np.uint8)
        return out, x0 / magnification, y0 / magnification, t


def cell_image(ax: Axes, values, **kwargs) -> CellImage:
    """``ax.imshow(values, **kwargs)`` drawn as a ``CellImage``.

    ``imshow`` does the work (extent, limits, norm, clipping, the axes' image list); the image it
    made then changes class, which is safe as ``CellImage`` adds no state of its own."""
    image = ax.imshow(values, **kwargs)
    image.__class__ = CellImage
    return image
