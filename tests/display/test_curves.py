"""The light curve items against pyqtgraph's own (the reference library: same data, same pen, same pixels)."""
from __future__ import annotations

import numpy as np
import pyqtgraph as pg
import pytest
from PyQt5 import QtCore, QtGui

from display.curves import LightCurve, TapMarks

SIZE = (320, 240)


def _plot(qtbot, item, *, auto: bool = False) -> pg.PlotWidget:
    w = pg.PlotWidget()
    qtbot.addWidget(w)
    w.resize(*SIZE)
    w.setBackground("k")
    w.getPlotItem().hideAxis("left")
    w.getPlotItem().hideAxis("bottom")
    w.addItem(item)
    if not auto:
        w.getPlotItem().setRange(xRange=(-1.2, 1.2), yRange=(-1.2, 1.2), padding=0)
        w.getPlotItem().disableAutoRange()
    w.show()
    qtbot.waitExposed(w)
    return w


def _pixels(w: pg.PlotWidget) -> np.ndarray:
    img = w.grab().toImage().convertToFormat(QtGui.QImage.Format_RGB32)
    ptr = img.constBits()
    ptr.setsize(img.byteCount())
    return np.frombuffer(ptr, np.uint8).reshape(img.height(), img.bytesPerLine() // 4, 4)[:, : img.width(), :3].copy()


def _data():
    t = np.linspace(0.0, 2.0 * np.pi, 400)
    x, y = np.cos(3 * t), np.sin(2 * t)
    y[150:160] = np.nan  # a gap
    return x, y


@pytest.mark.parametrize("antialias", [False, True])
def test_draws_the_same_pixels_as_pyqtgraphs_curve(gui, qtbot, antialias):
    x, y = _data()
    pen = pg.mkPen((250, 180, 60), width=2)
    ref = pg.PlotCurveItem(pen=pen, connect="finite", antialias=antialias)
    ref.setData(x, y)
    ours = LightCurve(pen=pen, connect="finite", antialias=antialias)
    ours.setData(x, y)
    a, b = _pixels(_plot(qtbot, ref)), _pixels(_plot(qtbot, ours))
    lit = (a.sum(axis=2) > 60) | (b.sum(axis=2) > 60)
    assert lit.sum() > 1000  # the curve is drawn at all
    # the same path through the same painter: at most a stray edge pixel may differ
    differ = np.abs(a.astype(int) - b.astype(int)).max(axis=2) > 24
    assert differ.sum() <= 0.01 * lit.sum()


def test_a_gap_stays_a_gap_and_bounds_skip_it(gui, qtbot):
    x, y = _data()
    ours = LightCurve(pen=pg.mkPen("w"), connect="finite")
    ours.setData(x, y)
    ref = pg.PlotCurveItem(x, y, connect="finite")
    for ax in (0, 1):
        assert ours.dataBounds(ax) == pytest.approx(ref.dataBounds(ax))
    path = ours.path()
    moves = [i for i in range(path.elementCount()) if path.elementAt(i).isMoveTo()]
    assert moves[0] == 0 and 160 in moves  # the first point after the gap starts a new sub-path: no line across
    # with every point NaN there are no bounds, as pyqtgraph's curve says
    ours.setData(x, np.full_like(y, np.nan))
    assert ours.dataBounds(1) == (None, None)
    ours.setData([], [])
    assert ours.boundingRect().isNull() and ours.getData()[0].shape == (0,)


def test_auto_range_follows_the_data_like_pyqtgraphs_curve(gui, qtbot):
    x, y = _data()
    ref = pg.PlotCurveItem(pen=pg.mkPen("w"))
    ours = LightCurve(pen=pg.mkPen("w"))
    wr, wo = _plot(qtbot, ref, auto=True), _plot(qtbot, ours, auto=True)
    for scale in (1.0, 5.0):
        ref.setData(x * scale, y * scale + 3.0, connect="finite")
        ours.setData(x * scale, y * scale + 3.0, connect="finite")
        top = 3.0 + 0.99 * scale
        qtbot.waitUntil(lambda: min(wr.getPlotItem().viewRange()[1][1], wo.getPlotItem().viewRange()[1][1]) > top,
                        timeout=3000)
        # pyqtgraph pads by the pen in pixels, both alike; ranges agree to a few pixels of 240
        assert np.allclose(wr.getPlotItem().viewRange(), wo.getPlotItem().viewRange(), rtol=0.02)


def test_a_filled_outline(gui, qtbot):
    # a closed square, filled: pixels inside take the brush, outside stay background
    ours = LightCurve(pen=pg.mkPen((255, 255, 255)), brush=QtGui.QBrush(QtGui.QColor(0, 200, 0)))
    ours.setData([-0.5, 0.5, 0.5, -0.5], [-0.5, -0.5, 0.5, 0.5])
    w = _plot(qtbot, ours)
    img = _pixels(w)
    vb = w.getPlotItem().getViewBox()
    inside = w.mapFromScene(vb.mapViewToScene(QtCore.QPointF(0.1, 0.2)))
    outside = w.mapFromScene(vb.mapViewToScene(QtCore.QPointF(0.9, 0.9)))
    b, g, r = img[inside.y(), inside.x()]  # grabbed as BGR
    assert g > 150 and r < 60 and b < 60
    assert img[outside.y(), outside.x()].max() < 30


def test_tap_marks_sit_on_their_points_whatever_the_zoom(gui, qtbot):
    marks = TapMarks(labels=["0", "1"], pen=pg.mkPen((255, 255, 255)), brush=pg.mkBrush((230, 40, 40)),
                     text_colour=(120, 120, 255))
    marks.setData([-0.6, 0.4], [0.0, 0.5])
    w = _plot(qtbot, marks)
    vb = w.getPlotItem().getViewBox()
    for zoom in (1.0, 0.5):
        vb.setRange(xRange=(-1.2 * zoom, 1.2 * zoom), yRange=(-1.2 * zoom, 1.2 * zoom), padding=0)
        qtbot.wait(50)
        img = _pixels(w)
        for px, py in ((-0.6, 0.0), (0.4, 0.5)):
            c = w.mapFromScene(vb.mapViewToScene(QtCore.QPointF(px, py)))
            r, g, b = img[c.y(), c.x()][::-1]  # grabbed as BGR
            assert r > 180 and g < 90 and b < 90  # the dot's fill at its point's pixel
            # the number: text-coloured pixels a few pixels right of and above the dot, at any zoom
            box = img[c.y() - 16:c.y() - 2, c.x() + 4:c.x() + 16]
            assert ((box[..., 0] > 180) & (box[..., 2] < 160)).any()
