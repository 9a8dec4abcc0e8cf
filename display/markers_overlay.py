"""Filmed camera markers drawn over the reconstructed shape (``replay --markers``, ``export --markers``).

The markers come aligned in time and moved into the sensor's base frame by
:func:`acquire.commands.calibrate_motion.marker_overlay` (the caller reads
the files; nothing here does). Each redraw shows the markers of the camera
frame nearest the drawn frame's device time, as hollow circles in their own
colour with a legend entry; with no camera frame within one camera interval
they are hidden. Where calibration and alignment are right, the circles sit
on the curve.

GUI thread only.
"""
from __future__ import annotations

import numpy as np
import pyqtgraph as pg

from .theme import COLOURS

__all__ = ["MarkersOverlay", "LEGEND_TEXT"]

#: the legend entry of the markers
LEGEND_TEXT = "filmed markers"


class MarkersOverlay:
    """A scatter item of filmed markers on a :class:`display.views.ShapeView`.

    Parameters
    ----------
    view : display.views.ShapeView
        The shape plot to draw on (the item and a legend are added to it).
    markers : acquire.commands.calibrate_motion.MarkerOverlay
        The camera frames in device time and their markers in the base frame, m.

    Attributes
    ----------
    item : pg.ScatterPlotItem
        The drawn markers (empty while hidden).
    shown_xy_m : ndarray, shape (K', 2), or None
        The markers drawn last (finite ones only), m; None while hidden.
    shown_t_device_s : float or None
        Device time of the camera frame drawn last, s.
    """

    def __init__(self, view, *, markers):
        self.markers = markers
        self.shown_xy_m = None
        self.shown_t_device_s = None
        plot = view.getPlotItem()
        pen = pg.mkPen(COLOURS["markers"], width=2)
        pen.setCosmetic(True)
        self.item = pg.ScatterPlotItem(symbol="o", size=11, pen=pen, brush=pg.mkBrush(None), antialias=True,
                                       name=LEGEND_TEXT)
        self.item.setZValue(10)  # over the curve, the taps and the body
        plot.addItem(self.item)
        self.legend = pg.LegendItem(offset=(-10, 10), labelTextColor=COLOURS["text"],
                                    brush=pg.mkBrush(17, 22, 29, 200), pen=pg.mkPen(COLOURS["panel_edge"]))
        self.legend.setParentItem(plot.getViewBox())
        self.legend.addItem(self.item, LEGEND_TEXT)
        self.legend.anchor(itemPos=(1, 0), parentPos=(1, 0), offset=(-10, 10))

    def update(self, t_device_s: float) -> np.ndarray | None:
        """Draw the markers of the camera frame nearest ``t_device_s`` (s); hide them if there is none.

        Returns the drawn points (K', 2), m (the attribute, not a copy), or None.
        """
        t_device_s = float(t_device_s)
        xy = self.markers.at(t_device_s)
        if xy is not None:
            xy = xy[np.isfinite(xy).all(axis=1)]
        # the item stays visible (its legend sample toggles it): hidden means no points
        if xy is None or xy.shape[0] == 0:
            self.item.setData([], [])
            self.shown_xy_m = self.shown_t_device_s = None
            return None
        self.item.setData(xy[:, 0], xy[:, 1])
        self.shown_xy_m = xy
        t = self.markers.t_device_s
        i = int(np.clip(np.searchsorted(t, t_device_s), 1, max(t.size - 1, 1)))
        near = t[max(i - 1, 0):i + 1]
        self.shown_t_device_s = float(near[np.argmin(np.abs(near - t_device_s))])
        return xy

    def clear(self) -> None:
        """Hide the markers."""
        self.update(float("nan"))

