"""The finger films itself: camera geometry, clock, imperfections and the marker CSV.

References: plane geometry (a rotation plus a shift keeps distances; points
on an arc of curvature k lie on a circle of radius 1/k, and the chord over an
arc length L is 2/k sin(kL/2)); the camera clock's defining formula; binomial
bounds (5 sigma) for missed and wild detections; Python's csv module (RFC 4180).
"""
from __future__ import annotations

import argparse
import csv
import math
import subprocess
import sys

import numpy as np
import pytest

from acquire.core.markers import read_marker_csv
from acquire.errors import UserError
from acquire.rig import load_rig
from acquire.virtual import Camera, CameraSettings, FingerModel, VirtualFinger, write_marker_csv
from acquire.virtual.cli import add_virtual_device_arguments, build_virtual_finger

CLEAN = dict(noise_mm=0.0, missing=0.0, wild=0.0)


@pytest.fixture(scope="module")
def rig():
    return load_rig(None)


def _pairwise(p):
    return np.linalg.norm(p[:, :, None, :] - p[:, None, :, :], axis=-1)


def test_distances_invariant_under_camera_pose(rig):
    # A rigid motion of the plane (turn + shift, the wobble is a shift too) keeps every distance.
    model = FingerModel(rig=rig, seed=3, scenario="free")
    cam = Camera(CameraSettings(angle_rad=1.9, shift_mm=(-250.0, 80.0), **CLEAN), rig=rig)
    t = np.linspace(0.0, 30.0, 200)
    s_m, xy = model.shape(t)
    base = cam.markers_base(s_m, xy) * 1e3
    image = cam.film(model, t, np.arange(t.size))[1]
    np.testing.assert_allclose(_pairwise(image), _pairwise(base), atol=1e-9)
    assert np.abs(image - base).max() > 50.0  # the pose did move them


@pytest.mark.parametrize("kappa", [40.0, -25.0])
def test_held_arc_markers_on_a_circle(rig, kappa):
    # Markers on a jig of curvature k: on a circle of radius 1/k (centre (0, 1/k) in the base frame,
    # turned and shifted in the image), chords 2/k sin(k L/2).
    model = FingerModel(rig=rig, hold=f"curvature={kappa:g}/m")
    settings = CameraSettings(wobble_mm=0.0, angle_rad=-0.7, **CLEAN)
    cam = Camera(settings, rig=rig)
    t = np.array([0.0])
    kappa_t = model.truth(t)["curvature_per_m"][0, 0]  # the jig plus its tiny wobble
    p = cam.film(model, t, np.arange(1))[1][0]  # (K, 2) mm
    c, s = math.cos(settings.angle_rad), math.sin(settings.angle_rad)
    centre = np.array(settings.shift_mm) + 1e3 / kappa_t * np.array([-s, c])
    np.testing.assert_allclose(np.linalg.norm(p - centre, axis=1), 1e3 / abs(kappa_t), rtol=1e-9)
    arc = rig.markers_s_m[-1] - rig.markers_s_m[0]
    chord = 2.0 / abs(kappa_t) * math.sin(abs(kappa_t) * arc / 2.0) * 1e3
    assert np.linalg.norm(p[-1] - p[0]) == pytest.approx(chord, rel=1e-9)


def test_clock_mapping(rig):
    # t_cam = (t_device - offset) / (1 + ppm 1e-6); frames at k / fps on the camera clock.
    cam = Camera(CameraSettings(offset_s=-42.0, rate_ppm=-350.0, fps=120.0), rig=rig)
    t_dev = np.array([0.0, 1.0, 1000.0])
    np.testing.assert_allclose(cam.camera_time(t_dev), (t_dev + 42.0) / (1 - 350e-6), rtol=1e-15)
    np.testing.assert_allclose(cam.device_time(cam.camera_time(t_dev)), t_dev, atol=1e-9)
    k, t = cam.frames_between(10.0, 20.0)
    np.testing.assert_allclose(np.diff(cam.camera_time(t)), 1.0 / 120.0, rtol=1e-9)
    assert t[0] >= 10.0 and t[-1] < 20.0 and k.size == pytest.approx(10.0 * 120.0 / (1 - 350e-6), abs=1)


def test_missing_and_wild_fractions(rig):
    # Binomial counts, 5 sigma: 2 % missed, 0.1 % wild (5 .. 20 mm off) per marker per frame.
    settings = CameraSettings(missing=0.02, wild=0.001, noise_mm=0.0, wobble_mm=0.0)
    cam = Camera(settings, rig=rig)
    model = FingerModel(rig=rig, hold="flat")
    n_frames = 20000
    t = np.zeros(n_frames)
    clean = Camera(CameraSettings(wobble_mm=0.0, **CLEAN), rig=rig).film(model, t[:1], np.arange(1))[1]
    got = cam.film(model, t, np.arange(n_frames))[1]
    n = got.shape[0] * got.shape[1]
    missed = np.isnan(got[..., 0])
    assert (missed == np.isnan(got[..., 1])).all()  # both cells or none
    p = 0.02
    assert abs(missed.sum() - p * n) < 5 * math.sqrt(n * p * (1 - p))
    off = np.linalg.norm(got - clean, axis=-1)[~missed]
    wild = off > 1e-6
    m, q = off.size, 0.001
    assert abs(wild.sum() - q * m) < 5 * math.sqrt(m * q * (1 - q))
    assert off[wild].min() >= 5.0 - 1e-9 and off[wild].max() <= 20.0 + 1e-9


def test_noise_rms(rig):
    # numpy.std against the set 1-sigma noise (0.1 mm), 20000 frames: within 3 %.
    cam = Camera(CameraSettings(noise_mm=0.1, missing=0.0, wild=0.0, wobble_mm=0.0), rig=rig)
    clean = Camera(CameraSettings(wobble_mm=0.0, **CLEAN), rig=rig)
    model = FingerModel(rig=rig, hold="flat")
    t = np.zeros(20000)
    d = cam.film(model, t, np.arange(t.size))[1] - clean.film(model, t, np.arange(t.size))[1]
    assert d.std() == pytest.approx(0.1, rel=0.03)


def test_csv_parses_with_the_csv_module(tmp_path, rig):
    path = tmp_path / "markers.csv"
    model = FingerModel(rig=rig, scenario="free")
    t = np.arange(600) / 60.0
    assert write_marker_csv(path, model, t, settings=CameraSettings(missing=0.05)) == 600
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    k = rig.markers_s_m.shape[0]
    assert rows[0] == ["t_s"] + [f"m{i}_{a}_mm" for i in range(k) for a in ("x", "y")]
    assert all(len(r) == 1 + 2 * k for r in rows[1:]) and len(rows) == 601
    assert any(r[1] == "" and r[2] == "" for r in rows[1:])
    track = read_marker_csv(path, n_markers=k)  # the project's own strict reader agrees
    assert track.xy_m.shape == (600, k, 2)
    with pytest.raises(FileExistsError):
        write_marker_csv(path, model, t)


def test_device_films_while_streaming(tmp_path, wait_until):
    import serial

    path = tmp_path / "m.csv"
    with VirtualFinger(markers_path=path, seed=1, time_scale=20.0) as dev:
        port = serial.Serial(dev.path, timeout=0.05)
        try:
            port.write(b"START\n")
            port.flush()
            # keep reading so the device never stalls on a full pty
            wait_until(lambda: port.read(65536) is not None and dev.counters["camera_frames"] >= 120,
                       timeout_s=30, what="120 camera frames")
        finally:
            port.close()
    rows = list(csv.reader(open(path, newline="", encoding="utf-8")))
    assert len(rows) - 1 == dev.counters["camera_frames"] >= 120  # complete and closed at stop
    t = np.array([float(r[0]) for r in rows[1:]])
    np.testing.assert_allclose(np.diff(t), 1.0 / 60.0, rtol=1e-6, atol=2e-6)


def _parse(argv):
    p = argparse.ArgumentParser()
    add_virtual_device_arguments(p)
    return p.parse_args(argv)


@pytest.mark.parametrize("argv, option", [(["--camera-fps", "500"], "--camera-fps"),
                                          (["--camera-offset-s", "90"], "--camera-offset-s"),
                                          (["--camera-ppm", "-900"], "--camera-ppm")])
def test_camera_options_bounded(tmp_path, argv, option):
    with pytest.raises(UserError, match=option) as info:
        build_virtual_finger(_parse(["--markers", str(tmp_path / "m.csv")] + argv))
    assert "\n" not in str(info.value)


def test_markers_refuses_an_existing_file(tmp_path):
    # The command line: one line on stderr, exit 2, the file untouched.
    path = tmp_path / "old.csv"
    path.write_text("keep me\n")
    proc = subprocess.run([sys.executable, "-m", "display.cli", "virtual-device", "--markers", str(path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2
    assert len(proc.stderr.strip().splitlines()) == 1 and "--markers" in proc.stderr
    assert path.read_text() == "keep me\n"


def test_help_lists_the_new_options():
    # --help formats every option's text (a stray % in a help text breaks it)
    proc = subprocess.run([sys.executable, "-m", "display.cli", "virtual-device", "--help"],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0
    for option in ("--markers", "--camera-fps", "--strip", "--creep-percent", "--pressure-kpa", "--ei-n-m2"):
        assert option in proc.stdout
