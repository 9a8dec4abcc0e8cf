"""Compact /derived: shape points only as dense as the shape needs, compressed, and old dense files still read.

The spacing rule is the sagitta of a circular arc (a chord of length h on a bend
of curvature k is at most k h^2 / 8 from the arc; standard geometry), so the
check is against a reconstruction 20 times denser, linearly interpolated.
"""
from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from acquire.core.pipeline import SHAPE_TOLERANCE_M, shape_spacing_m
from acquire.core.reconstruct import Reconstructor
from acquire.rig import load_rig
from acquire.store.recording import XY_STEP_M, open_recording, pack_xy
from acquire.virtual.builtin import builtin_calibration
from acquire.virtual.model import FingerModel

REPO = Path(__file__).resolve().parents[3]
DEMO = REPO / "recordings" / "demo_grasp.h5"


@pytest.fixture(scope="module")
def rig():
    return load_rig(None)


@pytest.fixture(scope="module")
def cal(rig):
    return builtin_calibration(rig)


def _worst_gap_m(rig, spacing_m: float, curvature_per_m: np.ndarray) -> float:
    """Largest distance between the linearly interpolated coarse shape and a 0.05 mm reconstruction."""
    coarse = Reconstructor.from_rig(rig, spacing_m=spacing_m)
    fine = Reconstructor.from_rig(rig, spacing_m=0.00005)
    n_c = int(coarse.tap_index[-1]) + 1
    n_f = int(fine.tap_index[-1]) + 1
    xy_c = pack_xy(coarse.shape_xy(curvature_per_m)[:, :n_c]).astype(np.float64)
    xy_f = fine.shape_xy(curvature_per_m)[:, :n_f]
    s_c, s_f = coarse.s_m[:n_c], fine.s_m[:n_f]
    worst = 0.0
    for i in range(curvature_per_m.shape[0]):
        x = np.interp(s_f, s_c, xy_c[i, :, 0])
        y = np.interp(s_f, s_c, xy_c[i, :, 1])
        worst = max(worst, float(np.max(np.hypot(x - xy_f[i, :, 0], y - xy_f[i, :, 1]))))
    return worst


def test_compact_points_follow_the_grasp_within_the_tolerance(rig, cal):
    model = FingerModel(rig=rig, seed=0)
    t = np.linspace(0.0, 16.0, 400)  # the grasp scenario (made up for the demo), ground-truth curvature
    kappa = model.truth(t)["curvature_per_m"]
    spacing = shape_spacing_m(cal)
    assert spacing > 0.0015  # fewer points than one a millimetre, or the rule does nothing
    assert _worst_gap_m(rig, spacing, kappa) <= SHAPE_TOLERANCE_M


@pytest.mark.parametrize("edge", ["curvature_max_per_m", "curvature_min_per_m"])
def test_compact_points_at_the_largest_calibrated_curvature(rig, cal, edge):
    kappa = np.asarray(getattr(cal, edge))[None, :]
    # every segment at its calibrated extreme, and a finger bent at the base only (extreme, then flat);
    # a zigzag of extreme and flat segments is not a soft finger's shape and is not covered by the rule
    step = kappa.copy()
    step[0, 3:] = 0.0
    spacing = shape_spacing_m(cal)
    assert _worst_gap_m(rig, spacing, np.vstack([kappa, step])) <= SHAPE_TOLERANCE_M


def test_packing_keeps_the_stated_precision():
    xy = np.random.default_rng(0).uniform(-0.12, 0.12, size=(1000, 40, 2)).astype(np.float32)
    packed = pack_xy(xy)
    # rounding to the nearest whole step: at most half a step off, and whole steps exactly (closed form)
    assert np.abs(packed.astype(np.float64) - xy).max() <= XY_STEP_M / 2
    steps = packed.astype(np.float64) / XY_STEP_M
    assert np.array_equal(steps, np.round(steps))
    assert np.array_equal(pack_xy(packed), packed)  # idempotent
    special = np.array([np.nan, np.inf, -np.inf], dtype=np.float32)
    assert np.array_equal(pack_xy(special), special, equal_nan=True)


def _tapcurve(*args, cwd=REPO):
    return subprocess.run([sys.executable, "-m", "display.cli", *args], capture_output=True, text=True,
                          cwd=cwd, timeout=300)


@pytest.fixture(scope="module")
def processed(tmp_path_factory):
    out = tmp_path_factory.mktemp("compact") / "demo_processed.h5"
    r = _tapcurve("process", str(DEMO), "--calibration", str(REPO / "recordings" / "demo_calibration.json"),
                  "--out", str(out), "--quiet")
    assert r.returncode == 0, r.stderr
    return out


def test_process_writes_compressed_compact_derived(processed):
    with h5py.File(processed, "r") as f:
        xy = f["derived/xy"]
        assert xy.compression == "gzip" and xy.shuffle
        assert f["raw/adc"].shape[0] == xy.shape[0]
        assert xy.shape[1] == f["derived/s_m"].shape[0] < 97


@pytest.mark.skipif(shutil.which("h5dump") is None, reason="h5dump (Debian hdf5-tools) not installed")
def test_h5dump_reads_the_compressed_file(processed):
    r = subprocess.run(["h5dump", "-d", "/derived/xy", "-s", "0,0,0", "-c", "1,3,2", str(processed)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    with h5py.File(processed, "r") as f:
        first = f["derived/xy"][0, 1]
    assert f"{first[0]:.6g}"[:5] in r.stdout.replace(" ", "")


def test_a_dense_uncompressed_file_of_the_first_release_still_replays_and_inspects(tmp_path, rig, cal):
    old = tmp_path / "old_dense.h5"
    shutil.copy(DEMO, old)
    recon = Reconstructor.from_rig(rig, spacing_m=0.001)
    n_pts = int(recon.tap_index[-1]) + 1
    with h5py.File(old, "a") as f:  # the first release's /derived: every millimetre, no filters
        n = f["raw/adc"].shape[0]
        kappa = np.full((n, rig.n_segments), 10.0, dtype=np.float32)
        g = f.create_group("derived")
        g.create_dataset("curvature", data=kappa, maxshape=(None, rig.n_segments))
        g.create_dataset("s_m", data=recon.s_m[:n_pts])
        g.create_dataset("xy", data=recon.shape_xy(kappa[:1])[:, :n_pts].repeat(n, axis=0).astype(np.float32),
                         maxshape=(None, n_pts, 2))
        f.attrs["calibration_json"] = cal.to_json()
    r = _tapcurve("inspect", str(old))
    assert r.returncode == 0, r.stderr
    from acquire.sources.replay import ReplaySource

    src = ReplaySource(path=old).start()
    try:
        src.wait_ready(timeout_s=30)
        src.seek(src.t_first_s + 1.0)
        assert src.wait_idle(30.0)
        snap = src.feed.snapshot()
        assert snap is not None and snap.xy_m is not None and np.isfinite(snap.xy_m).all()
    finally:
        src.stop()
    with open_recording(old) as rec:
        assert rec.has_derived
