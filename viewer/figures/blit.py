"""Blitting: redraw only the artists that change on a selection, over a cached background.

A head switch changes the pair grid's image, its title, the colour bar and the selection
outline, not the token labels, which are most of the drawing work. Those few artists are marked
*animated*: a full draw leaves them out, copies the rest of the figure as the background, then
draws them on top. A selection change afterwards restores the background and draws the animated
artists again (matplotlib's blitting; the window does this on its render thread,
which then hands the pixels to the pane's view).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any


class Blitter:
    """Keeps the background of ``canvas`` without ``artists`` and redraws just them."""

    def __init__(self, canvas: Any, artists: Sequence[Any]) -> None:
        self.canvas = canvas
        self.artists = [a for a in artists if a is not None]
        self.background = None
        self.background_texts: list = []
        self._bounds = None
        for artist in self.artists:
            artist.set_animated(True)
        self._cid = canvas.mpl_connect("draw_event", self._on_draw)

    def _on_draw(self, event) -> None:
        figure = self.canvas.figure
        self.background = self.canvas.copy_from_bbox(figure.bbox)
        # texts the renderer recorded instead of drawing (``viewer.gui.panes.render``)
        self.background_texts = list(getattr(event.renderer, "texts", ()))
        self._bounds = tuple(figure.bbox.bounds)
        self._draw_artists()

    def _draw_artists(self) -> None:
        figure = self.canvas.figure
        for artist in self.artists:
            if artist.get_visible():
                figure.draw_artist(artist)

    def update(self) -> bool:
        """Redraw the animated artists now; False when a full draw is needed instead."""
        figure = self.canvas.figure
        if self.background is None or figure is None or tuple(figure.bbox.bounds) != self._bounds:
            return False  # never drawn, or resized since: a full draw recaptures it
        renderer = self.canvas.get_renderer()
        if hasattr(renderer, "texts"):
            renderer.texts = list(self.background_texts)
        self.canvas.restore_region(self.background)
        self._draw_artists()
        return True

    def detach(self) -> None:
        self.canvas.mpl_disconnect(self._cid)
        for artist in self.artists:
            artist.set_animated(False)
        self.artists = []
        self.background = None
