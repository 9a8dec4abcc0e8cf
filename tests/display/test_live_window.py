"""The live window on the virtual finger: the drawn curve, labels from the controls, Ctrl-C, screenshots."""
from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
from PyQt5 import QtCore

from acquire.core.reconstruct import Reconstructor, body_outline
from acquire.session import Session as LiveSession
from acquire.sources.virtual import VirtualOptions
from display.window import SAFETY_TEXT, SensorWindow

REPO = Path(__file__).resolve().parents[2]


def _window(session, qtbot, *, frames: int = 300):
    w = SensorWindow(source=session)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitUntil(lambda: w.current is not None and w.current.frames > frames, timeout=10000)
    return w


def test_curve_drawn_is_the_reconstructors_shape_of_the_current_frame(gui, qtbot, rig, calibration, artifacts):
    session = LiveSession(rig=rig, calibration=calibration,
                          virtual_options=VirtualOptions(hold="radius=25mm", seed=0))
    with session:
        w = _window(session, qtbot)
        w.pause_button.click()  # freeze the view: acquisition goes on, the drawn frame stays
        assert w.paused
        snap = w.current
        x, y = w.shape.sensor_curve.getData()
        tx, ty = w.shape.tip_curve.getData()
        px, py = w.shape.taps.getData()
        path = w.shape.body_item.path()
        qtbot.waitUntil(lambda: session.feed.version > snap.version + 5, timeout=5000)
        w.redraw()
        assert w.current is snap  # paused: nothing new drawn although frames arrived
        w.pause_button.click()
        qtbot.waitUntil(lambda: w.current is not snap, timeout=5000)
        w.resize(1366, 768)
        qtbot.wait(50)
        w.grab().save(str(artifacts / "live_window_calibrated.png"))

    # reference: an independent reconstructor fed the frame's curvature
    ref = Reconstructor.from_rig(rig).shape_xy(snap.curvature_per_m[None, :])[0]
    end = int(Reconstructor.from_rig(rig).tap_index[-1])
    np.testing.assert_allclose(np.stack([x, y], axis=1), ref[: end + 1], atol=1e-12)
    np.testing.assert_allclose(np.stack([tx, ty], axis=1), ref[end:], atol=1e-12)
    taps = ref[Reconstructor.from_rig(rig).tap_index]
    np.testing.assert_allclose(np.stack([px, py], axis=1), taps, atol=1e-12)
    # the jig is a circle of radius 25 mm (40/m); the calibration fitted by least squares reads it within
    # a few 1/m, and the drawn curve is the arc of the curvature read: x = sin(k s)/k, y = (1 - cos(k s))/k
    # (circle through the origin heading +x, plane geometry)
    k = float(snap.curvature_per_m.mean())
    assert k == pytest.approx(40.0, rel=0.1)
    s = Reconstructor.from_rig(rig).s_m[: end + 1]
    arc = np.stack([np.sin(k * s) / k, (1 - np.cos(k * s)) / k], axis=1)
    assert np.max(np.hypot(*(np.stack([x, y], axis=1) - arc).T)) < 1.5e-3
    # the body polygon drawn is the outline of that shape
    outline = body_outline(ref[None], thickness_above_m=rig.thickness_above_m,
                           thickness_below_m=rig.thickness_below_m)[0]
    poly = path.toFillPolygon()
    pts = np.array([[poly[i].x(), poly[i].y()] for i in range(poly.size())])
    assert pts.shape[0] >= outline.shape[0]
    np.testing.assert_allclose(pts[: outline.shape[0]], outline, atol=1e-9)


def test_without_calibration_the_view_says_so(gui, qtbot, rig, artifacts):
    with LiveSession(rig=rig, virtual_options=VirtualOptions(seed=1)) as session:
        w = _window(session, qtbot)
        assert "No calibration loaded" in w.shape.message and w.shape.message_label.isVisible()
        assert w.shape.sensor_curve.getData()[0] is None or len(w.shape.sensor_curve.getData()[0]) == 0
        assert w.bars.mode == "resistance"
        # the bars show the newest frame's filtered segment resistances
        np.testing.assert_allclose(w.bars.values, np.nan_to_num(w.current.filtered_ohm))
        w.trace_mode.setCurrentIndex(1)
        assert w.traces.mode == "resistance"
        qtbot.wait(100)
        assert "calibration: none" in w.status_text()
        assert SAFETY_TEXT in w.caution_label.text()
        w.resize(1366, 768)
        w.grab().save(str(artifacts / "live_window_uncalibrated.png"))


def test_labels_made_with_the_controls_land_in_the_recording(gui, qtbot, rig, calibration_path, tmp_path):
    out = tmp_path / "labelled.h5"
    with LiveSession(rig=rig) as session:
        w = _window(session, qtbot)
        assert w.load_calibration(calibration_path)
        qtbot.waitUntil(lambda: w.current.curvature_per_m is not None, timeout=5000)
        assert not w.label_button.isEnabled()  # labels need a recording
        assert w.start_recording(out)  # what the Record button does after its file dialog
        w.update_status()
        assert w.label_button.isEnabled() and "REC" in w.status_text()
        qtbot.keyClicks(w.label_edit, "radius=25mm")
        qtbot.waitUntil(lambda: session.status()["recording_frames"] > 200, timeout=5000)
        before = int(session.ring.latest(1).seq[-1])
        qtbot.mouseClick(w.label_button, QtCore.Qt.LeftButton)
        after = int(session.ring.latest(1).seq[-1])
        assert session.open_label == "radius=25mm"
        qtbot.waitUntil(lambda: int(session.ring.latest(1).seq[-1]) > after + 500, timeout=5000)
        before_end = int(session.ring.latest(1).seq[-1])
        qtbot.keyClick(w, QtCore.Qt.Key_F2)  # the hotkey ends it
        after_end = int(session.ring.latest(1).seq[-1])
        assert session.open_label is None
        w.label_edit.clear()
        qtbot.keyClicks(w.label_edit, "flat")
        qtbot.keyClick(w.label_edit, QtCore.Qt.Key_Return)  # Return starts one too
        assert session.open_label == "flat"
        qtbot.mouseClick(w.record_button, QtCore.Qt.LeftButton)  # stopping ends the open label
        assert not session.recording
    with h5py.File(out, "r") as f:
        seq = f["raw/seq"][:]
        t = f["raw/t_device_s"][:]
        text = [x.decode() for x in f["labels/text"][:]]
        t0 = f["labels/t_start_s"][:]
        t1 = f["labels/t_end_s"][:]
    assert text == ["radius=25mm", "flat"]
    # each time is the device time of a frame that was the newest one while the control was used
    i0 = int(np.flatnonzero(t == t0[0])[0])
    i1 = int(np.flatnonzero(t == t1[0])[0])
    assert before <= seq[i0] <= after and before_end <= seq[i1] <= after_end
    assert np.isfinite(t1).all() and t1[1] <= t[-1] and t0[1] >= t1[0]
    # no frame of the interval is missing from the file (sequence numbers are consecutive)
    assert i1 - i0 == seq[i1] - seq[i0] >= 500


def test_ctrl_c_leaves_a_complete_recording(tmp_path, wait_until):
    out = tmp_path / "interrupted.h5"
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", PYTHONPATH=str(REPO))
    proc = subprocess.Popen(
        [sys.executable, "-m", "display.cli", "live", "--record", str(out), "--label", "whole run (demo)"],
        cwd=tmp_path, env=env, stderr=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )
    try:
        lines = []
        wait_until(lambda: lines.append(proc.stderr.readline()) or "recording to" in lines[-1] or proc.poll() is not None,
                   timeout_s=30, what="the recording to start")
        assert proc.poll() is None, "".join(lines) + proc.stderr.read()

        def frames_on_disk() -> int:
            try:
                with h5py.File(out, "r", libver="latest", swmr=True) as f:
                    return int(f["raw/seq"].shape[0])
            except Exception:  # not there yet, or caught between two flushes of the writer
                return 0

        wait_until(lambda: frames_on_disk() > 1000, timeout_s=20, what="1000 frames on disk")
        proc.send_signal(signal.SIGINT)
        code = proc.wait(timeout=30)
        err = proc.stderr.read()
    finally:
        if proc.poll() is None:
            proc.kill()
    assert code == 0, err
    assert "labels" in err and "Traceback" not in err
    # plain h5py opens it: closed cleanly, nothing to repair
    with h5py.File(out, "r") as f:
        n = {k: f["raw"][k].shape[0] for k in ("adc", "seq", "t_device_s", "t_host_s", "status")}
        assert len(set(n.values())) == 1 and n["seq"] > 1000
        assert [x.decode() for x in f["labels/text"][:]] == ["whole run (demo)"]
        t_end = float(f["labels/t_end_s"][0])
        assert t_end == pytest.approx(float(f["raw/t_device_s"][-1]))
        assert f["counters/values"].shape[0] >= 1


def test_status_says_when_the_redraw_rate_is_lowered(gui, qtbot, rig, artifacts):
    # The governor's rule itself is tested with synthetic timings in test_views.py; here the window
    # follows it: the timer runs at the lowered rate and the status line says why.
    with LiveSession(rig=rig, virtual_options=VirtualOptions(seed=2)) as session:
        w = SensorWindow(source=session, adaptive=False)  # the rule is driven by hand below
        qtbot.addWidget(w)
        w.show()
        qtbot.waitUntil(lambda: w.current is not None, timeout=10000)
        assert "redraw" not in w.status_text() and w.timer.interval() == 17
        t, cpu = 0.0, 0.0
        while w.governor.rate_hz == 60.0:
            t += w.governor.interval_s
            cpu += 0.012  # 12 ms of GUI-thread CPU per redraw at 60 Hz: 0.72 core, over the budget
            w.governor.tick(now_s=t, cpu_s=cpu)
        w.apply_rate()
        assert w.governor.rate_hz == 30.0 and w.timer.interval() == 33
        assert "redraw 30 Hz: machine busy" in w.status_label.text()
        w.resize(1366, 768)
        qtbot.wait(50)
        w.grab().save(str(artifacts / "live_window_redraw_lowered.png"))
