"""The replay window: frames in order at 1x and 10x, scrubbing, labels, stepping, export from the command line."""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
from PyQt5 import QtCore, QtGui

from acquire.session import Session
from acquire.sources.replay import ReplaySource
from display.window import SensorWindow

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def recording(tmp_path_factory, rig, calibration, wait_until):
    """About 4 s of the virtual finger at 1 kHz with a calibration and two labels (made up, demo)."""
    path = tmp_path_factory.mktemp("replay") / "grasp-demo.h5"
    with Session(rig=rig, calibration=calibration, record_path=path) as session:
        marks = [(800, "begin"), (1500, "end"), (2200, "begin2"), (3000, "end2"), (4000, "stop")]
        for n, what in marks:
            wait_until(lambda: session.status()["recording_frames"] >= n, timeout_s=30,
                       what=f"{n} frames recorded")
            if what == "begin":
                session.begin_label("approach (demo)")
            elif what == "begin2":
                session.begin_label("radius=25mm")
            elif what.startswith("end"):
                session.end_label()
    return path


@pytest.fixture(scope="module")
def file_frames(recording):
    with h5py.File(recording, "r") as f:
        return {"seq": f["raw/seq"][:], "t": f["raw/t_device_s"][:],
                "labels": [(x.decode(), a, b) for x, a, b in zip(f["labels/text"][:], f["labels/t_start_s"][:],
                                                                 f["labels/t_end_s"][:])]}


def _open(recording, qtbot):
    src = ReplaySource(path=recording).start()
    src.wait_ready()
    w = SensorWindow(source=src)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitUntil(lambda: w.current is not None, timeout=30000)
    return src, w


@pytest.mark.parametrize("speed", [1.0, 10.0])
def test_replay_shows_the_recordings_frames_in_order(gui, qtbot, recording, file_frames, speed):
    # correctness only: the speed is taken and every frame drawn is the file's, in order; device seconds
    # per wall second and frames per redraw are figures of the machine (bench/bench_replay.py)
    span = 0.6 if speed == 1.0 else 3.5  # device seconds watched in one pass
    src, w = _open(recording, qtbot)
    passes = []
    try:
        w.set_speed(speed)
        assert w.speed_box.currentData() == speed
        assert src.wait_idle() and src.speed == speed
        # how many redraws fit in one pass depends on the machine's load (at 10x a pass is 0.35 s of wall
        # time): play passes from the start until one has shown several frames
        while not any(len(p) >= 3 for p in passes):
            assert len(passes) < 30, [len(p) for p in passes]
            w.seek(0.0)
            qtbot.waitUntil(lambda: w.current.seq == file_frames["seq"][0], timeout=30000)
            w.drawn.clear()
            qtbot.mouseClick(w.play_button, QtCore.Qt.LeftButton)
            qtbot.waitUntil(lambda: w.current.t_device_s >= span, timeout=60000)
            # pause, not the play button's toggle: at 10x the file's end (0.05 s of wall time later) may
            # already have stopped the play, and a toggle would start it again
            src.pause()
            assert src.wait_idle() and not src.playing
            passes.append(list(w.drawn))
    finally:
        w.close()
        src.stop()
    for drawn in passes:
        seqs = np.array([d[0] for d in drawn])
        t_dev = np.array([d[1] for d in drawn])
        assert len(seqs) >= 1 and np.all(np.diff(seqs) > 0)
        # every frame drawn is the file's frame with that sequence number and device time
        idx = np.searchsorted(file_frames["seq"], seqs)
        np.testing.assert_array_equal(file_frames["seq"][idx], seqs)
        np.testing.assert_array_equal(file_frames["t"][idx], t_dev)
        # the pass ended where the drawing did: at or past the span watched, within the file
        assert span <= t_dev[-1] <= file_frames["t"][-1]


def test_scrub_step_and_jump_to_labels(gui, qtbot, recording, file_frames, artifacts):
    src, w = _open(recording, qtbot)
    try:
        w.update_status()
        assert w.label_list.count() == 2
        assert len(w.timeline._regions) == 4  # two bands, two names
        # pick the second label in the list: the view jumps to its start
        item = w.label_list.item(1)
        assert item.text().startswith("radius=25mm")
        w.label_list.itemClicked.emit(item)
        t_label = file_frames["labels"][1][1]
        qtbot.waitUntil(lambda: w.current.t_device_s == t_label, timeout=30000)
        # step one frame on and one back
        seq0 = w.current.seq
        qtbot.keyClick(w, QtCore.Qt.Key_Right)
        qtbot.waitUntil(lambda: w.current.seq == seq0 + 1, timeout=30000)
        w.step(-1)
        qtbot.waitUntil(lambda: w.current.seq == seq0, timeout=30000)
        # drag the play head: the timeline asks for a time from the recording's first frame (which a loaded
        # machine may record later than device time 0), the view shows the frame at or before it
        t = file_frames["t"]
        w.timeline.seek_requested.emit(2.0)
        i = int(np.searchsorted(t, t[0] + 2.0, side="right")) - 1
        qtbot.waitUntil(lambda: w.current.seq == file_frames["seq"][i], timeout=30000)
        w.update_status()
        assert w.timeline.head.value() == pytest.approx(t[i] - t[0])
        assert "frame" in w.status_text() and "calibration" in w.status_text()
        w.resize(1366, 768)
        qtbot.wait(50)
        w.grab().save(str(artifacts / "replay_window.png"))
        # exports from the window
        png = artifacts / "replay_shape.png"
        svg = artifacts / "replay_window.svg"
        w.export_shape(png)
        w.export_window(svg)
        assert QtGui.QImage(str(png)).width() > 500
        assert svg.read_text().lstrip().startswith("<?xml") and "<svg" in svg.read_text()[:500]
    finally:
        w.close()
        src.stop()


def test_export_from_the_command_line_headless(recording, tmp_path, artifacts):
    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    env["PYTHONPATH"] = str(REPO)
    for suffix in ("png",):  # SVG goes through the same figure (tested from the window above)
        out = tmp_path / f"shape.{suffix}"
        r = subprocess.run([sys.executable, "-m", "display.cli", "export", str(recording), "--out", str(out),
                            "--time", "1.25"], env=env, capture_output=True, text=True, timeout=60)
        assert r.returncode == 0, r.stderr
        assert out.is_file() and out.stat().st_size > 1000
    img = QtGui.QImage(str(tmp_path / "shape.png"))
    assert (img.width(), img.height()) == (1000, 720)
    img.save(str(artifacts / "export_cli_shape.png"))
    # a time outside the recording is a one-line error, exit 2
    r = subprocess.run([sys.executable, "-m", "display.cli", "export", str(recording), "--out",
                        str(tmp_path / "x.png"), "--time", "999"], env=env, capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "--time 999" in r.stderr
