"""The force in the window: an arrow at the sensor's far end to a stated scale, traces of |F| and actuation, export.

A replay of a synthetic recording (the virtual finger on a 25 mm jig, written
through the real recorder, with a pressure channel) under a calibration that
carries a made-up force model: the window draws whatever force the model
estimates; the checks compare the drawn arrow with the snapshot's force by
plane geometry (length = scale x |F|, direction = F).
"""
from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from PyQt5 import QtGui

from acquire.core.force import ForceModel
from acquire.link.frames import FrameBlock, FrameRing
from acquire.rig import parse_rig
from acquire.sources.replay import ReplaySource
from acquire.store.recorder import Recorder
from acquire.virtual import FingerModel
from display.export import ShapeFigure, save_widget
from display.views import force_arrow_scale_m_per_n, force_arrow_xy
from display.window import SensorWindow

RATE_HZ = 1000.0
PRESSURE_CODE = 3200  # made up: (3200 - 409.6) * 100/4096 = 68 kPa, 34 1/m of free curvature in the model below


@pytest.fixture(scope="module")
def force_rig(rig):
    text = rig.text.replace('channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5"]',
                            'channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5", "pressure"]')
    text += '\n[actuation]\nchannel = "pressure"\nunit = "kPa"\nper_code = 0.0244140625\noffset_code = 409.6\n'
    return parse_rig(text, source="force rig")


@pytest.fixture(scope="module")
def force_calibration(calibration, force_rig):
    # a made-up model: EI 3e-3 N m^2 everywhere, 0.5 1/m of free curvature per kPa
    model = ForceModel(force_rig.segment_lengths_m, np.full(6, 3e-3), np.full((6, 1), 0.5), "kPa")
    return dataclasses.replace(calibration, force=model.to_dict())


@pytest.fixture(scope="module")
def recording(tmp_path_factory, force_rig, force_calibration):
    path = tmp_path_factory.mktemp("force_view") / "jig.h5"
    n = 3000
    fi = np.arange(n)
    codes = FingerModel(rig=force_rig, seed=0).with_hold("radius=25mm").codes(fi / RATE_HZ, frame_index=fi)
    codes[:, 6] = PRESSURE_CODE + np.round(2 * np.sin(2 * np.pi * 0.7 * fi / RATE_HZ))  # a slow ripple
    ring = FrameRing(capacity_frames=n + 10, n_channels=7)
    hello = json.dumps({"protocol": 1, "channels": 7, "rate_hz": RATE_HZ, "adc_bits": 12})
    rec = Recorder(path=path, ring=ring, rig_toml=force_rig.text, device_hello=hello,
                   channel_names=force_rig.channels, calibration_json=force_calibration.to_json())
    rec.start()
    ring.push(FrameBlock(codes=codes, seq=fi.astype(np.int64), t_device_s=fi / RATE_HZ, t_host_s=fi / RATE_HZ,
                         status=np.zeros(n, np.uint8)))
    rec.stop()
    assert rec.error is None
    return path


def test_arrow_geometry_and_scale():
    # plane geometry: the shaft runs from the tip along F, |shaft| = scale |F|; the head strokes end behind the point
    pts = force_arrow_xy([0.05, 0.02], [0.3, -0.4], scale_m_per_n=0.1)
    np.testing.assert_allclose(pts[0], [0.05, 0.02])
    np.testing.assert_allclose(pts[1] - pts[0], [0.03, -0.04], atol=1e-15)
    assert np.hypot(*(pts[1] - pts[0])) == pytest.approx(0.05)
    for head in (pts[3], pts[5]):
        assert np.dot(head - pts[1], pts[1] - pts[0]) < 0
    # a 1-2-5 step: EI 3e-3 N m^2 over 96 mm is 0.33 N; half of a 110 mm reach per 0.33 N = 0.17 m/N -> 0.1 m/N
    model = ForceModel(np.full(6, 0.016), np.full(6, 3e-3), np.full((6, 1), 0.5), "kPa")
    assert force_arrow_scale_m_per_n(model, reach_m=0.11) == pytest.approx(0.1)


def _window(recording, qtbot):
    src = ReplaySource(path=recording).start()
    src.wait_ready()
    w = SensorWindow(source=src)
    qtbot.addWidget(w)
    w.show()
    src.seek(src.t_last_s)
    qtbot.waitUntil(lambda: w.current is not None and w.current.force_n is not None, timeout=15000)
    return src, w


def test_window_draws_the_force_arrow_and_traces(gui, qtbot, recording, force_rig, artifacts):
    src, w = _window(recording, qtbot)
    try:
        src.play()
        qtbot.waitUntil(lambda: w.current.trace_force_n is not None and len(w.current.trace_force_n) > 20,
                        timeout=15000)
        src.pause()
        w.resize(1366, 768)
        qtbot.wait(200)
        w.redraw()
        w._draw_traces(force=True)
        snap = w.current
        x, y = w.shape.force_arrow.getData()
        tip = snap.xy_m[w.shape.end_index]
        scale = w.force_scale_m_per_n
        np.testing.assert_allclose([x[0], y[0]], tip, atol=1e-12)
        np.testing.assert_allclose([x[1] - x[0], y[1] - y[0]], snap.force_n * scale, rtol=1e-9, atol=1e-12)
        assert f"arrow: {scale * 1e3:g} mm per N" in w.shape.force_label.text()
        assert w.shape.force_label.isVisible()
        # |F| and actuation rows under the curvature, with the traces drawn
        assert w.traces.force_plot.scene() is not None and w.traces.act_plot.scene() is not None
        fx, fy = w.traces.force_curve.getData()
        ax, ay = w.traces.act_curve.getData()
        assert fx is not None and len(fy) > 20 and np.nanmax(fy) > 0
        assert np.nanmedian(ay) == pytest.approx((PRESSURE_CODE - 409.6) * 0.0244140625, abs=0.06)
        assert snap.actuation == pytest.approx((PRESSURE_CODE - 409.6) * 0.0244140625, abs=0.06)
        assert 0.05 < np.hypot(*snap.force_n) < 1.0  # the jig's 40 1/m beyond the free 34 1/m: a fraction of a newton
        w.grab().save(str(artifacts / "live_window_force.png"))
    finally:
        w.close()
        src.stop()


def test_export_figure_includes_the_arrow(gui, qtbot, recording, force_rig, force_calibration, artifacts):
    src, w = _window(recording, qtbot)
    try:
        snap = w.current
        fig = ShapeFigure(rig=force_rig, reconstructor=src.reconstructor, calibration=force_calibration)
        fig.draw(snap, title="force export")
        x, y = fig.shape.force_arrow.getData()
        assert len(x) == 6 and "mm per N" in fig.caption.text() and "estimated force" in fig.caption.text()
        out = save_widget(fig, artifacts / "export_force_shape.png")
        # the arrow's colour is in the picture, near where the arrow's point is drawn
        img = QtGui.QImage(str(out))
        vb = fig.shape.getPlotItem().getViewBox()
        end = vb.mapViewToScene(__import__("PyQt5.QtCore", fromlist=["QPointF"]).QPointF(x[1], y[1]))
        pos = fig.shape.mapTo(fig, fig.shape.mapFromScene(end))
        found = False
        for dx in range(-4, 5):
            for dy in range(-4, 5):
                c = QtGui.QColor(img.pixel(pos.x() + dx, pos.y() + dy))
                found |= c.red() > 180 and c.green() > 140 and c.blue() < 140  # the caution yellow
        assert found
        fig.deleteLater()
    finally:
        w.close()
        src.stop()
