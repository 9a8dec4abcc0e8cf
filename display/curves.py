"""A light curve item: one pen, one path, bounds computed once per ``setData``.

pyqtgraph's ``PlotCurveItem`` recomputes its bounds and pixel padding in Python
each time the scene asks (dozens of times per repaint), and its paint sets up
per call what never changes here. The sensor window sets new data on about
twenty curves up to 60 times a second, and that bookkeeping was most of its
GUI-thread time. :class:`LightCurve` keeps what a window's curves use:
``setData``, ``getData``, ``name``, ``opts`` for a legend's sample, the data
bounds a ``ViewBox`` auto-ranges on. GUI thread.
"""
from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PyQt5 import QtCore, QtGui

__all__ = ["LightCurve", "TapMarks"]


class LightCurve(pg.GraphicsObject):
    """A polyline (or pairs of points) drawn with one cosmetic pen.

    Parameters
    ----------
    pen : QtGui.QPen
        Cosmetic pen (width in pixels).
    name : str or None
        Its legend entry.
    connect : str
        ``all``, ``pairs`` or ``finite`` (NaN points break the line), as
        :func:`pyqtgraph.arrayToQPath`; ``setData`` may override it.
    antialias : bool
    brush : QtGui.QBrush or None
        Fill the outline closed from the last point to the first (non-zero
        winding: a fold of the outline stays filled); None draws the line only.

    Attributes
    ----------
    opts : dict
        ``pen`` and ``antialias``: what a ``LegendItem`` reads.
    """

    def __init__(self, *, pen: QtGui.QPen, name: str | None = None, connect: str = "all", antialias: bool = False,
                 brush: QtGui.QBrush | None = None):
        super().__init__()
        self.brush = brush
        self._name = name
        self.connect = connect
        self.opts = {"pen": pen, "antialias": bool(antialias), "symbol": None, "fillLevel": None, "name": name}
        self._x = self._y = np.zeros(0)
        self._path = QtGui.QPainterPath()
        self._rect = QtCore.QRectF()
        self._bounds: tuple | None = None
        self._pad: tuple | None = None  # (dx, dy): the pen's reach in data units

    def name(self) -> str | None:
        return self._name

    def setData(self, x, y, *, connect: str | None = None) -> None:  # noqa: N802 (pyqtgraph's name)
        """New points (arrays of equal length, in the view's units); the caller keeps its arrays."""
        x = np.asarray(x, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        self.prepareGeometryChange()
        self._x, self._y = x, y
        self._bounds = None
        if x.shape[0] == 0:
            self._path = QtGui.QPainterPath()
        else:
            self._path = pg.arrayToQPath(x, y, connect=connect or self.connect)
            if self.brush is not None:
                self._path.closeSubpath()
                self._path.setFillRule(QtCore.Qt.WindingFill)
        self._rect = self._padded(self._path.boundingRect())
        self.informViewBoundsChanged()
        self.update()

    def path(self) -> QtGui.QPainterPath:
        """The path drawn, in data units."""
        return self._path

    def getData(self):  # noqa: N802 (pyqtgraph's name)
        """The points drawn: (x, y) arrays (read only)."""
        return self._x, self._y

    def _padded(self, rect: QtCore.QRectF) -> QtCore.QRectF:
        # the pen's half width (pixels) in data units at the view's scale, looked up again only when
        # the view's transform changes (pixelVectors costs more than the rest of a setData)
        if self._x.shape[0] == 0:
            return QtCore.QRectF()
        if self._pad is None:
            px, py = self.pixelVectors()
            pad = self.pixelPadding()
            self._pad = (0.0 if px is None else pad * px.length(), 0.0 if py is None else pad * py.length())
        dx, dy = self._pad
        return rect.adjusted(-dx, -dy, dx, dy)

    def viewTransformChanged(self) -> None:  # noqa: N802 (pyqtgraph's name)
        # a zoom, a pan or a resize: padding from the new scale, bounds at once
        super().viewTransformChanged()
        self._pad = None
        self.prepareGeometryChange()
        self._rect = self._padded(self._path.boundingRect())

    def boundingRect(self) -> QtCore.QRectF:  # noqa: N802 (Qt's name)
        return self._rect

    def dataBounds(self, ax: int, frac: float = 1.0, orthoRange=None):  # noqa: N802 (pyqtgraph's name)
        """(min, max) of the finite data along axis ``ax`` (0: x, 1: y), for auto-range; (None, None) if none."""
        if self._bounds is None:
            self._bounds = tuple(self._finite_range(v) for v in (self._x, self._y))
        return self._bounds[ax]

    @staticmethod
    def _finite_range(v: np.ndarray):
        f = v[np.isfinite(v)]
        return (None, None) if f.shape[0] == 0 else (float(f.min()), float(f.max()))

    def pixelPadding(self) -> float:  # noqa: N802 (pyqtgraph's name)
        return 0.5 * self.opts["pen"].widthF() + 1.0

    def paint(self, painter, option, widget=None) -> None:
        if self._x.shape[0] == 0:
            return
        painter.setRenderHint(QtGui.QPainter.Antialiasing, self.opts["antialias"])
        painter.setPen(self.opts["pen"])
        painter.setBrush(self.brush if self.brush is not None else QtCore.Qt.NoBrush)
        painter.drawPath(self._path)


class TapMarks(LightCurve):
    """Dots at points with a number beside each, sized in pixels whatever the zoom.

    Drawn in device pixels (the dots 7 px across, each number just right of
    and above its dot), so no per-point symbol pixmaps are made or looked
    up: one item for what took two scatter items.

    Parameters
    ----------
    labels : sequence of str
        One per point, in order.
    pen, brush : the dots' edge and fill.
    text_colour : anything pyqtgraph.mkColor takes
    """

    _RADIUS_PX = 3.5

    def __init__(self, *, labels, pen: QtGui.QPen, brush: QtGui.QBrush, text_colour):
        super().__init__(pen=pen, antialias=True)
        self.labels = [str(t) for t in labels]
        self.dot_brush = brush
        self.text_pen = pg.mkPen(text_colour)
        self.font = QtGui.QFont("Sans")
        self.font.setPixelSize(11)

    def pixelPadding(self) -> float:  # noqa: N802 (pyqtgraph's name)
        return 24.0  # a dot and a two-digit number beside it

    def paint(self, painter, option, widget=None) -> None:
        if self._x.shape[0] == 0:
            return
        to_px = painter.transform()
        painter.save()
        painter.resetTransform()
        painter.setRenderHint(QtGui.QPainter.Antialiasing, True)
        painter.setFont(self.font)
        r = self._RADIUS_PX
        for x, y, text in zip(self._x, self._y, self.labels):
            pt = to_px.map(QtCore.QPointF(x, y))
            painter.setPen(self.opts["pen"])
            painter.setBrush(self.dot_brush)
            painter.drawEllipse(pt, r, r)
            painter.setPen(self.text_pen)
            painter.drawText(pt + QtCore.QPointF(r + 3.0, -r - 1.0), text)
        painter.restore()
