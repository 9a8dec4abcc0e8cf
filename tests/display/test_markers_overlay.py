"""Filmed markers over the shape: ``replay --markers``, ``export --markers`` and the overlay behind them.

References: the virtual camera's ground truth (the finger model's exact shape
at each camera frame, moved to the markers by the camera itself, never seen
by the host side; ``acquire.virtual.camera``), the clock mapping the camera
was given, and the closed form of a curve of constant curvature per segment
(a circular arc: x = (sin(t0 + k s) - sin t0) / k, y = (cos t0 - cos(t0 + k s)) / k).
"""
from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import h5py
import numpy as np
import pytest
from PyQt5 import QtGui

from acquire.commands.calibrate_motion import marker_overlay
from acquire.rig import load_rig
from acquire.sources.replay import ReplaySource
from acquire.virtual.camera import Camera, CameraSettings
from acquire.virtual.model import FingerModel
from display.markers_overlay import LEGEND_TEXT
from display.theme import COLOURS
from display.window import SensorWindow

REPO = Path(__file__).resolve().parents[2]
MARKERS_S_MM = [0, 8, 16, 24, 32, 40, 48, 56, 64, 72, 80, 88, 96]  # each tap and each segment's middle
SEED = 7  # the film's (tests/conftest.py, filmed_motion)
DURATION_S = 40.0


def tapcurve(*args, timeout_s: float = 180.0) -> subprocess.CompletedProcess:
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen")
    return subprocess.run([sys.executable, "-m", "display.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout_s, cwd=REPO, env=env)


@pytest.fixture(scope="module")
def film(filmed_motion):
    """40 s of the finger's free motion (ideal strip: no creep lag between the resistance and the curvature the
    camera sees), filmed by a camera whose clock is 5 s behind and 230 ppm slow, recorded through the serial
    path, and a calibration fitted from that film (``calibrate --motion``): the shape drawn is then the filmed
    curve. Made once per run (``filmed_motion``, tests/conftest.py), shared with test_calibrate_motion.py."""
    paths = {"rig": filmed_motion["rig"], "rec": filmed_motion["film"]["rec"],
             "markers": filmed_motion["film"]["markers"], "truth": filmed_motion["film"]["truth"],
             "cal": filmed_motion["cal"], "camera": CameraSettings(**filmed_motion["camera"])}
    assert filmed_motion["seed"] == SEED and filmed_motion["duration_s"] == DURATION_S
    assert load_rig(paths["rig"]).markers_s_m == pytest.approx(np.array(MARKERS_S_MM) / 1e3)
    paths["overlay"] = marker_overlay(paths["rec"], paths["markers"])
    return paths


# --- the overlay (acquire side) against the camera's ground truth ------------------------------------

def test_overlay_is_the_filmed_markers_in_the_base_frame_at_device_time(film):
    ov = film["overlay"]
    rig = load_rig(film["rig"])
    cam = Camera(film["camera"], rig=rig)
    t_cam = np.loadtxt(film["markers"], delimiter=",", skiprows=1, usecols=0)
    with h5py.File(film["truth"], "r") as f:
        t0 = float(f["t_device_s"][0])  # the recording's clock reads 0 here (its first frame)
        boot = int(f["boot"][0])  # the model's run: one boot, no reboot
    t_model = cam.device_time(t_cam)
    # time: the camera's clock as the virtual finger set it; within 3 camera frames (the low-pass delays the
    # resistance the clocks are aligned on: a real lag, not a clock error; as in test_calibrate_motion)
    inside = (t_model - t0 > 0.5) & (t_model - t0 < DURATION_S - 0.5)
    assert np.abs(ov.t_device_s - (t_model - t0))[inside].max() < 3 / 60
    # 60 frames/s on the camera's clock; the fitted rate of a 40 s film is good to a few thousand ppm
    assert ov.interval_s == pytest.approx(1 / 60, rel=5e-3)
    # place: the markers on the model's exact shape, in its base frame (camera noise 0.1 mm and a 0.2 mm
    # wobble of the mount; wild points and misses are left out by the percentiles / NaN)
    truth = cam.markers_base(*FingerModel(rig=rig, seed=SEED, scenario="free").with_run(boot).shape(t_model))
    err_mm = np.linalg.norm(ov.xy_base_m - truth, axis=-1)[inside] * 1e3
    ok = np.isfinite(err_mm)
    assert ok.mean() > 0.9
    assert np.median(err_mm[ok]) < 0.35 and np.percentile(err_mm[ok], 99) < 1.5, np.percentile(err_mm[ok], [50, 99])


def test_overlay_at_picks_the_nearest_camera_frame_within_one_interval(film):
    ov = film["overlay"]
    t, dt = ov.t_device_s, ov.interval_s
    k = t.size // 2
    np.testing.assert_array_equal(ov.at(t[k] + 0.4 * dt), ov.xy_base_m[k])
    np.testing.assert_array_equal(ov.at(t[k] - 0.4 * dt), ov.xy_base_m[k])
    assert ov.at(t[0] - 1.5 * dt) is None and ov.at(t[-1] + 1.5 * dt) is None
    assert ov.at(t[-1] + 0.9 * dt) is not None and ov.at(float("nan")) is None
    assert ov.at(t[k] + 0.4 * dt, max_gap_s=0.1 * dt) is None


# --- the replay window ---------------------------------------------------------------------------------

def _arc_points(curvature_per_m, segment_lengths_m, s_m) -> np.ndarray:
    """Closed form: points (K, 2) at arc lengths ``s_m`` of the curve from the origin along +x with constant
    curvature per segment (positive turns toward +y)."""
    edges = np.concatenate([[0.0], np.cumsum(segment_lengths_m)])
    start = [(0.0, 0.0, 0.0)]
    for k, length in zip(curvature_per_m, segment_lengths_m):
        start.append(_arc(*start[-1], k, length))
    out = []
    for s in s_m:
        j = int(np.clip(np.searchsorted(edges, s, side="right") - 1, 0, len(segment_lengths_m) - 1))
        out.append(_arc(*start[j], curvature_per_m[j], s - edges[j])[:2])
    return np.array(out)


def _arc(x, y, th, k, ds):
    if abs(k * ds) < 1e-9:
        return x + ds * np.cos(th), y + ds * np.sin(th), th
    th1 = th + k * ds
    return x + (np.sin(th1) - np.sin(th)) / k, y + (np.cos(th) - np.cos(th1)) / k, th1


def _still_times(film, n: int) -> list[float]:
    """``n`` recording times (s, 1 s apart at least) where the finger bends slowest (the model's truth): there a
    camera frame up to half an interval away and the clocks' alignment do not move the markers off the curve."""
    with h5py.File(film["truth"], "r") as f:
        t = f["t_device_s"][:] - f["t_device_s"][0]
        rate = np.abs(np.gradient(f["curvature_per_m"][:, 0], t))
    order = np.argsort(np.where((t > 1.0) & (t < DURATION_S - 1.0), rate, np.inf))
    picked: list[float] = []
    for i in order:
        if all(abs(t[i] - p) >= 1.0 for p in picked):
            picked.append(round(float(t[i]), 3))
        if len(picked) == n:
            return picked
    raise AssertionError("the free motion never slows down")


def _seek(w, qtbot, t_s: float) -> None:
    w.seek(t_s - w.source.t_first_s)
    qtbot.waitUntil(lambda: w.current is not None and abs(w.current.t_device_s - t_s) < 2e-3, timeout=30000)


@pytest.fixture
def replay_window(gui, qtbot, film):
    made = []

    def open_(markers):
        src = ReplaySource(path=film["rec"], calibration=str(film["cal"])).start()
        src.wait_ready()
        w = SensorWindow(source=src, markers=markers)
        qtbot.addWidget(w)
        w.show()
        made.append((w, src))
        return w

    yield open_
    for w, src in made:
        w.close()
        src.stop()


def test_replay_draws_the_markers_on_the_drawn_shape(replay_window, qtbot, film, artifacts):
    ov = film["overlay"]
    w = replay_window(ov)
    rig = w.rig
    s_m = np.asarray(rig.markers_s_m)
    legend = [label.text for _, label in w.markers_overlay.legend.items]
    assert legend == [LEGEND_TEXT]
    errors = []
    times = _still_times(film, 4)
    for t in times:
        _seek(w, qtbot, t)
        snap = w.current
        # the closed form is the drawn curve: it meets the drawn taps (within 0.1 mm, far below the check)
        taps = np.column_stack(w.shape.taps.getData())
        edges = np.concatenate([[0.0], np.cumsum(rig.segment_lengths_m)])
        np.testing.assert_allclose(_arc_points(snap.curvature_per_m, rig.segment_lengths_m, edges), taps, atol=1e-4)
        # the drawn markers are those of the camera frame nearest the drawn frame
        expected = ov.at(snap.t_device_s)
        seen = np.isfinite(expected).all(axis=1)
        drawn = np.column_stack(w.markers_overlay.item.getData())
        np.testing.assert_allclose(drawn, expected[seen])
        assert abs(w.markers_overlay.shown_t_device_s - snap.t_device_s) <= 0.5 * ov.interval_s + 1e-9
        on_curve = _arc_points(snap.curvature_per_m, rig.segment_lengths_m, s_m[seen])
        errors.append(np.linalg.norm(drawn - on_curve, axis=1) * 1e3)
        print(f"\nt {t} s: curvature {np.round(snap.curvature_per_m, 1)} 1/m, markers off the curve "
              f"{np.round(errors[-1], 2)} mm")
        if t == times[0]:
            w.update_status()  # the status timer may not have run since the seek
            w.grab().save(str(artifacts / "markers_overlay_replay.png"))
    err_mm = np.concatenate(errors)
    # a few mm at most: the calibration's own error (a static law fitted to 30 s of film) grows toward the
    # tip; a wild point (0.1 % per marker and frame, 5 .. 20 mm off) may be among the ~50 drawn
    assert np.median(err_mm) < 1.0 and np.sort(err_mm)[-2] < 3.0, err_mm


def test_replay_hides_the_markers_where_no_camera_frame_is_near(replay_window, qtbot, film):
    ov = film["overlay"]
    gap = (ov.t_device_s > 5.0) & (ov.t_device_s < 6.0)  # a second the camera missed
    holed = dataclasses.replace(ov, t_device_s=ov.t_device_s[~gap], xy_base_m=ov.xy_base_m[~gap])
    w = replay_window(holed)
    _seek(w, qtbot, 5.5)
    assert w.markers_overlay.shown_xy_m is None and len(w.markers_overlay.item.getData()[0]) == 0
    _seek(w, qtbot, 6.5)
    assert w.markers_overlay.shown_xy_m is not None and len(w.markers_overlay.item.getData()[0]) >= 10


def test_replay_without_markers_has_no_overlay(replay_window, qtbot):
    w = replay_window(None)
    _seek(w, qtbot, 3.0)
    assert w.markers_overlay is None


# --- the command line ----------------------------------------------------------------------------------

def _marker_pixels(path: Path) -> int:
    """Pixels of the markers' colour in an image (within 40 per channel)."""
    img = QtGui.QImage(str(path)).convertToFormat(QtGui.QImage.Format_RGB32)
    ptr = img.constBits()
    ptr.setsize(img.sizeInBytes())
    a = np.frombuffer(ptr, np.uint8).reshape(img.height(), img.bytesPerLine() // 4, 4)[:, : img.width(), :3]
    c = QtGui.QColor(COLOURS["markers"])
    bgr = np.array([c.blue(), c.green(), c.red()])
    return int((np.abs(a.astype(int) - bgr).max(axis=-1) < 40).sum())


def test_export_with_markers_writes_them_in_the_picture(film, tmp_path, artifacts, gui):
    out = artifacts / "markers_overlay_export.png"
    plain = tmp_path / "plain.png"
    with ThreadPoolExecutor(max_workers=2) as pool:  # two independent runs, side by side
        with_markers = pool.submit(tapcurve, "export", film["rec"], "--out", out, "--time", 7.0, "--calibration",
                                   film["cal"], "--markers", film["markers"], "--force")
        without = pool.submit(tapcurve, "export", film["rec"], "--out", plain, "--time", 7.0, "--calibration",
                              film["cal"])
        r, r_plain = with_markers.result(), without.result()
    assert r.returncode == 0, r.stderr
    assert r_plain.returncode == 0, r_plain.stderr
    assert QtGui.QImage(str(out)).width() > 0
    # the circles and the legend's sample are there; nothing of that colour without --markers
    assert _marker_pixels(out) > 200 and _marker_pixels(plain) == 0


def test_replay_with_markers_runs(film):
    r = tapcurve("replay", film["rec"], "--calibration", film["cal"], "--markers", film["markers"],
                 "--duration", 0.5)
    assert r.returncode == 0, r.stderr


def _one_line_exit_2(r, *names) -> None:
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr
    assert all(str(n) in lines[0] for n in names), r.stderr


def test_bad_marker_files_one_line_exit_2(film, tmp_path):
    lines = film["markers"].read_text().splitlines()
    header_only = tmp_path / "header_only.csv"
    header_only.write_text(lines[0] + "\n")
    # the camera's clock 1000 s away: nothing to align
    shifted = tmp_path / "shifted.csv"
    shifted.write_text("\n".join([lines[0]] + [f"{float(r.split(',')[0]) + 1000:.6f}," + r.split(",", 1)[1]
                                               for r in lines[1:]]) + "\n")
    cases = ((header_only, "header but no data rows"), (shifted, "no overlap in time"),
             (tmp_path / "absent.csv", "absent.csv"))
    with ThreadPoolExecutor(max_workers=3) as pool:  # independent runs, side by side
        runs = [(bad, why, tmp_path / f"{bad.stem}.png",
                 pool.submit(tapcurve, "replay", film["rec"], "--calibration", film["cal"], "--markers", bad,
                             "--duration", 30),
                 pool.submit(tapcurve, "export", film["rec"], "--out", tmp_path / f"{bad.stem}.png",
                             "--calibration", film["cal"], "--markers", bad))
                for bad, why in cases]
        for bad, why, out, replay, export in runs:
            _one_line_exit_2(replay.result(), bad, why)
            _one_line_exit_2(export.result(), bad, why)
            assert not out.exists()
