"""The strip-memory calibration end to end, through the serial path, against the finger's ground truth.

What is checked: the virtual finger with its real strip (creep, hysteresis and
drift: the default ``StripSettings()``) runs on a real pseudo-terminal, once per
session, each a new run of the device (strip at rest, clock from 0):

1. labelled holds on the ten jigs of tests/acquire/test_end_to_end_accuracy.py,
   6 s each, recorded through SerialReader -> FrameRing -> Recorder with the
   labels placed as a person pressing label buttons would;
2. a 40 s free motion, filmed while it streams (a marker at each tap and each
   segment's middle; the camera's clock 5 s off and 230 ppm slow), recorded by
   ``tapcurve record``;
3. a different motion (the grasp scenario), recorded by ``tapcurve record``.

``tapcurve calibrate`` fits the holds plus the film (with the strip's memory,
and with ``--static`` for comparison); ``tapcurve process`` (causal) reconstructs
the grasp with each calibration. Requirement (project issue): mean tip (sensor
end) error <= 1.5 % of the sensor length with the memory model, and the memory
kept in every segment; the memory must also cut the static calibration's error
to below 0.4 x (the bar of the in-process test,
tests/acquire/commands/test_calibrate_memory.py; project targets, no outside
source). The same flow in process (no pty) is ``bench/bench_memory.py``.

The reference is the finger's own elastica model: the device's truth file holds,
per frame, the end point of the sensor. It is an outside model in the sense that
the host side never sees it: only codes cross the pty, and the marker CSV is the
camera's view of the same model. The accuracy printed here is a figure on one
made-up session (seed 7), not a proof.

The in-process bench reads 0.73 % on seed 7; this test reads about 0.9 %. The
pty adds nothing (the recorded codes are bit for bit the model's, and the same
files calibrated in process give the command's figure): the device's first boot
plays the model's run 1 while the bench plays run 0, i.e. other made-up motions
and noise of the same seed, and each session starts when ``START`` arrives
(about 0.5 s of device time after boot), not at 0.
"""
from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from acquire.rig import load_rig
from acquire.virtual import StripSettings, VirtualFinger
from acquire.virtual.camera import CameraSettings

REPO = Path(__file__).resolve().parents[2]
DEMO_RIG = REPO / "acquire" / "rigs" / "demo_finger.toml"
SEED = 7
RATE_HZ = 1000.0
# device seconds per wall second: the 63 device seconds of holds take about 16 wall seconds; the device keeps up
# (nothing skipped or dropped, checked below) with the real strip on a loaded 2-core machine
TIME_SCALE = 4.0
HOLD_S = 6.0  # device seconds per labelled hold, as bench/bench_memory.py (long enough to show the creep)
SETTLE_S = 0.3  # after the jig changes, before the label starts (as the bench)
FILM_S = 40.0
GRASP_S = 16.0
# a marker at each tap and each segment's middle (as bench_memory.filmed_rig and the filmed_motion fixture)
MARKERS_S_MM = [0, 8, 16, 24, 32, 40, 48, 56, 64, 72, 80, 88, 96]
# the camera's clock 5 s behind the device's and 230 ppm slow (bench_memory.CAMERA)
CAMERA = CameraSettings(seed=SEED, offset_s=-5.0, rate_ppm=-230.0)
# jig labels and the curvature each states, 1/m (curvature = 1 / radius, plane geometry)
HOLDS = [("flat", 0.0), ("curvature=15/m", 15.0), ("radius=40mm", 25.0), ("radius=25mm", 40.0),
         ("radius=20mm", 50.0), ("flat", 0.0), ("radius=-100mm", -10.0), ("curvature=-15/m", -15.0),
         ("radius=-40mm", -25.0), ("flat", 0.0)]
TIP_LIMIT_PCT = 1.5
MEMORY_OVER_STATIC = 0.4


def tapcurve(*args) -> subprocess.Popen:
    """A ``tapcurve`` command started in a subprocess (not waited for: two may run side by side)."""
    return subprocess.Popen([sys.executable, "-m", "display.cli", *map(str, args)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, cwd=REPO)


def finish(proc: subprocess.Popen, timeout_s: float = 300.0) -> str:
    """Wait for a command; its stdout (the test fails on a non-zero exit, with the command's stderr)."""
    out, err = proc.communicate(timeout=timeout_s)
    assert proc.returncode == 0, f"{proc.args[3:]}: exit {proc.returncode}\n{err}"
    return out


def device_losses(dev: VirtualFinger) -> dict:
    """The device's counters of frames never made or never sent (all must stay 0)."""
    c = dev.counters
    return {k: c[k] for k in ("frames_skipped_late", "frames_dropped_tx", "packets_dropped", "frames_lost_outage")}


def new_finger(rig, **kw) -> VirtualFinger:
    """A new run of the device: seed 7, the real strip (defaults), at rest, clock from 0."""
    return VirtualFinger(rig=rig, rate_hz=RATE_HZ, seed=SEED, time_scale=TIME_SCALE, strip=StripSettings(), **kw)


def record_holds(d: Path, rig, record_jig_holds) -> dict:
    """The labelled holds, as tests/acquire/test_end_to_end_accuracy.py records them (6 s each here)."""
    dev = new_finger(rig, hold="flat", truth_path=d / "holds_truth.h5")
    dev.start()
    try:
        reader = record_jig_holds(dev, rig, d / "holds.h5", HOLDS, hold_s=HOLD_S, settle_s=SETTLE_S,
                                  rate_hz=RATE_HZ)
    finally:
        dev.stop()
    assert dev.error is None
    return {"reader": reader, "device": device_losses(dev)}


def record_motion(d: Path, rig, rig_path: Path, name: str, *, scenario: str, duration_s: float,
                  film: bool) -> dict:
    """One motion session recorded by ``tapcurve record`` (``--duration``: frames = duration x rate, i.e.
    device seconds, whatever the time scale), filmed while it streams if ``film``."""
    dev = new_finger(rig, scenario=scenario, truth_path=d / f"{name}_truth.h5",
                     markers_path=d / f"{name}.csv" if film else None, camera=CAMERA if film else None)
    dev.start()
    try:
        finish(tapcurve("record", "--port", dev.path, "--rig", rig_path, "--out", d / f"{name}.h5",
                        "--duration", duration_s, "--quiet"))
    finally:
        dev.stop()
    assert dev.error is None
    return {"device": device_losses(dev), "camera_frames": dev.counters["camera_frames"]}


@pytest.fixture(scope="module")
def memory_session(tmp_path_factory, record_jig_holds):
    t_start = time.monotonic()
    d = tmp_path_factory.mktemp("e2e_memory")
    rig_path = d / "rig_markers.toml"
    # the demo rig with markers, in a file for the commands' --rig (as bench_memory.filmed_rig)
    rig_path.write_text(DEMO_RIG.read_text().replace(
        "[body]", f"[markers]\ns_mm = [{', '.join(map(str, MARKERS_S_MM))}]\n\n[body]"))
    rig = load_rig(rig_path)
    counters = {"holds": record_holds(d, rig, record_jig_holds)}
    # one after the other: each device thread runs in this process and shares its interpreter with the others
    counters["film"] = record_motion(d, rig, rig_path, "film", scenario="free", duration_s=FILM_S, film=True)
    counters["grasp"] = record_motion(d, rig, rig_path, "grasp", scenario="grasp", duration_s=GRASP_S, film=False)
    t_recorded = time.monotonic()
    # the two fits side by side (two processes, two cores)
    cal = {name: tapcurve("calibrate", d / "holds.h5", "--motion", d / "film.h5", d / "film.csv",
                          "--rig", rig_path, "--out", d / f"cal_{name}.json", *extra)
           for name, extra in (("memory", ()), ("static", ("--static",)))}
    calibrate_stdout = {name: finish(p) for name, p in cal.items()}
    procs = [tapcurve("process", d / "grasp.h5", "--calibration", d / f"cal_{name}.json",
                      "--out", d / f"grasp_{name}.h5", "--quiet") for name in ("memory", "static")]
    for p in procs:
        finish(p)
    t_end = time.monotonic()
    return {"dir": d, "rig": rig, "counters": counters, "calibrate_stdout": calibrate_stdout,
            "wall_s": {"record": t_recorded - t_start, "calibrate + process": t_end - t_recorded,
                       "total": t_end - t_start}}


def tip_figures(d: Path, name: str, truth_rows) -> dict:
    """Tip error of the grasp processed with calibration ``name``: mean and max, % of the sensor length."""
    with h5py.File(d / "grasp.h5", "r") as f:
        seq = f["raw/seq"][:]
        codes = f["raw/adc"][:]
    truth = truth_rows(d / "grasp_truth.h5", seq, codes)["tip_xy_m"]
    with h5py.File(d / f"grasp_{name}.h5", "r") as f:
        tap_end = int(f["derived"].attrs["tap_index"][-1])
        length = float(f["derived/s_m"][tap_end])
        tip = f["derived/xy"][:, tap_end, :].astype(np.float64)
    assert tip.shape == truth.shape
    err = np.hypot(*(tip - truth).T)  # Euclidean distance in the bending plane
    return {"frames": int(seq.size), "length_m": length, "mean_pct": 100.0 * float(err.mean()) / length,
            "max_pct": 100.0 * float(err.max()) / length}


# about 35 s of wall time on a 2-core machine (measured, both tests, for the shared fixture): 31 s recording
# (about 125 device s at 4x), 5 s fitting and processing
@pytest.mark.slow
def test_serial_path_lost_nothing(memory_session):
    c = memory_session["counters"]
    for name in ("holds", "film", "grasp"):
        assert all(v == 0 for v in c[name]["device"].values()), (name, c[name]["device"])
    r = c["holds"]["reader"]
    assert r["frames_lost"] == 0 and sum(v for k, v in r.items() if k.startswith("drop_")) == 0
    d = memory_session["dir"]
    for name, secs in (("film", FILM_S), ("grasp", GRASP_S)):
        with h5py.File(d / f"{name}.h5", "r") as f:
            assert f["raw/seq"].shape[0] == int(secs * RATE_HZ)
            assert (np.diff(f["raw/seq"][:]) == 1).all()
    # the camera filmed the whole recording at its 60 frames per second (and a little more before stop)
    assert c["film"]["camera_frames"] >= 60 * FILM_S


@pytest.mark.slow  # the shared fixture above
def test_memory_calibration_reaches_the_requirement(memory_session, truth_rows):
    d = memory_session["dir"]
    doc = json.loads((d / "cal_memory.json").read_text())
    static_doc = json.loads((d / "cal_static.json").read_text())
    assert static_doc.get("memory") is None  # --static: no memory section
    segs = doc["memory"]["fit_report"]["segments"]
    assert len(segs) == memory_session["rig"].n_segments
    memory, static = tip_figures(d, "memory", truth_rows), tip_figures(d, "static", truth_rows)
    wall = memory_session["wall_s"]
    lines = [
        "",
        (f"real strip, seed {SEED}, through the pty at {TIME_SCALE:g}x: holds {len(HOLDS)} x {HOLD_S:g} s + film "
         f"{FILM_S:g} s, grasp {memory['frames']} frames, sensor {1000 * memory['length_m']:.0f} mm"),
        "calibration      tip mean %L  tip max %L",
        f"memory           {memory['mean_pct']:11.3f}  {memory['max_pct']:10.3f}",
        f"static           {static['mean_pct']:11.3f}  {static['max_pct']:10.3f}",
        f"memory / static  {memory['mean_pct'] / static['mean_pct']:11.3f}",
        "memory kept in segments: " + ", ".join(str(i) for i, s in enumerate(segs) if s.get("kept")),
        "wall s: " + ", ".join(f"{k} {v:.0f}" for k, v in wall.items()),
    ]
    print("\n".join(lines))
    assert all(s["kept"] for s in segs), segs
    assert memory["mean_pct"] <= TIP_LIMIT_PCT
    assert memory["mean_pct"] < MEMORY_OVER_STATIC * static["mean_pct"]
