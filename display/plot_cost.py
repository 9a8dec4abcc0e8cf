"""What keeps a redraw cheap: cached axes, opaque plot widgets, traces merged to the plot's pixel width.

The sensor window redraws 60 times a second next to acquisition on the same
machine; each helper here takes work off the GUI thread without changing
what is drawn. GUI thread, except :func:`peak_envelope` (any thread).
"""
from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PyQt5 import QtCore, QtWidgets

__all__ = ["cache_axes", "opaque_view", "peak_envelope"]


def cache_axes(plot) -> None:
    """Keep each axis of a ``pg.PlotItem`` (its ticks, labels and grid lines) as a pixmap between changes.

    An axis draws the plot's grid, so its rectangle covers the data area and
    any curve's update repainted it from its picture every redraw; a cached
    pixmap is copied instead, and rendered again only when the ticks change
    (a new range). GUI thread.
    """
    for name in ("left", "bottom", "right", "top"):
        plot.getAxis(name).setCacheMode(QtWidgets.QGraphicsItem.DeviceCoordinateCache)


def opaque_view(view: pg.GraphicsView) -> None:
    """Tell Qt a plot widget paints every pixel of its viewport (its background brush does).

    Qt then paints none of the parent widgets (and their style sheet) behind a
    repainted region. GUI thread.
    """
    view.viewport().setAttribute(QtCore.Qt.WA_OpaquePaintEvent)
    view.viewport().setAttribute(QtCore.Qt.WA_NoSystemBackground)


def peak_envelope(values: np.ndarray, factor: int, *, time: bool = False) -> np.ndarray:
    """Merge min/max pairs ``factor`` at a time, newest kept whole: (2B, X) -> (2(B // factor), X).

    ``values`` holds one (minimum, maximum) row pair per bucket, oldest first (a
    :class:`~acquire.sources.feed.ViewSnapshot`'s traces). Each merged pair is the
    minimum and maximum of its ``factor`` buckets, so every peak stays drawn
    (a NaN makes its pair NaN: a gap stays a gap). With ``time`` the rows are
    times and a pair takes its buckets' mean. The oldest ``B % factor`` buckets
    are left out. Vectorised over columns; a new array (or ``values`` itself when
    ``factor`` is 1), owned by the caller. Any thread.
    """
    if factor <= 1:
        return values
    n_pairs = values.shape[0] // 2 // factor
    if n_pairs == 0:
        return values[:0]
    kept = values[values.shape[0] - 2 * factor * n_pairs:]
    groups = kept.reshape(n_pairs, 2 * factor, values.shape[1])
    out = np.empty((n_pairs, 2, values.shape[1]), dtype=values.dtype)
    if time:
        out[:, 0] = out[:, 1] = groups.mean(axis=1)
    else:
        out[:, 0] = groups.min(axis=1)
        out[:, 1] = groups.max(axis=1)
    return out.reshape(2 * n_pairs, values.shape[1])
