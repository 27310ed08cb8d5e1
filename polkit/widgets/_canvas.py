"""A matplotlib figure rendered off-screen into an ``ipywidgets.Image``, with fast overlays.

The panels draw their slow parts (a map of tens of thousands of pixels, data points) once
into a cached background and redraw only the light overlay lines when a slider moves:
the background is restored from the Agg buffer, the overlay artists are drawn on top
(matplotlib's blitting: ``copy_from_bbox`` / ``restore_region`` / ``draw_artist``), and
the buffer is encoded as PNG into the image widget.  This needs no interactive
matplotlib backend, works the same in JupyterLab, in a test driven from Python and in
a kernel executed by nbclient, and never touches pyplot's global figure list.
"""

from __future__ import annotations

import io
import logging
from collections.abc import Iterable

import numpy as np

log = logging.getLogger(__name__)

__all__ = ["LiveFigure", "figure_png"]


def _encode_png(rgba: np.ndarray) -> bytes:
    from PIL import Image

    buf = io.BytesIO()
    # compress_level 1: a few ms per frame; the frames are transient
    Image.fromarray(rgba, mode="RGBA").save(buf, format="png", compress_level=1)
    return buf.getvalue()


def figure_png(fig, *, dpi: int | None = None) -> bytes:
    """A complete rendering of ``fig`` (every artist, animated or not) as PNG bytes."""
    buf = io.BytesIO()
    animated = [a for a in fig.findobj() if a.get_animated()]
    for a in animated:
        a.set_animated(False)
    try:
        fig.savefig(buf, format="png", dpi=dpi or fig.dpi)
    finally:
        for a in animated:
            a.set_animated(True)
    return buf.getvalue()


class LiveFigure:
    """An off-screen figure whose overlay artists can be redrawn quickly into an image widget.

    Parameters
    ----------
    figsize
        Figure size in inches.
    dpi
        Resolution of the rendered image.
    ncols, nrows
        Axes grid (``squeeze=False`` layout; :attr:`axes` is 2-d).
    image
        The ``ipywidgets.Image`` to update; a new one when ``None``.

    Attributes
    ----------
    figure
        The :class:`matplotlib.figure.Figure` (Agg canvas, not registered with pyplot).
    axes
        2-d array of axes.
    image
        The image widget holding the latest rendering (PNG bytes in ``image.value``).
    """

    def __init__(self, figsize=(6.4, 4.6), *, dpi: int = 90, nrows: int = 1, ncols: int = 1,
                 image=None):
        import ipywidgets as w
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        self.figure = Figure(figsize=figsize, dpi=dpi, layout="constrained")
        self.canvas = FigureCanvasAgg(self.figure)
        self.axes = np.atleast_2d(self.figure.subplots(nrows, ncols, squeeze=False))
        self.image = image if image is not None else w.Image(format="png")
        self._overlay: list = []
        self._background = None
        self.frames = 0

    def overlay(self, artists: Iterable) -> None:
        """Mark ``artists`` as overlays: excluded from the background, redrawn by :meth:`update`."""
        for a in artists:
            a.set_animated(True)
            self._overlay.append(a)

    def clear_overlay(self) -> None:
        """Forget every overlay artist (and remove them from their axes)."""
        for a in self._overlay:
            a.remove()
        self._overlay = []

    def redraw(self) -> None:
        """Render everything: the background (cached) and the overlays on top."""
        # the layout engine runs on the full draw only; overlays never move the axes
        self.canvas.draw()
        self._background = self.canvas.copy_from_bbox(self.figure.bbox)
        self._paint()

    def update(self) -> None:
        """Redraw the overlays on the cached background and refresh the image widget."""
        if self._background is None:
            self.redraw()
            return
        self.canvas.restore_region(self._background)
        self._paint()

    def _paint(self) -> None:
        renderer = self.canvas.get_renderer()
        for a in self._overlay:
            if not a.get_visible():
                continue
            if a.axes is not None:
                a.axes.draw_artist(a)
            else:
                a.draw(renderer)
        rgba = np.asarray(self.canvas.buffer_rgba())
        self.image.value = _encode_png(rgba)
        self.frames += 1

    def png(self) -> bytes:
        """The complete figure (overlays included) as PNG bytes, for a static copy."""
        return figure_png(self.figure)
