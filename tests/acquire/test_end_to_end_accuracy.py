"""End to end on the virtual finger, through the serial path, against the finger's ground truth.

The virtual finger runs on a real pseudo-terminal. Labelled holds on jigs of
known curvature are recorded through SerialReader -> FrameRing -> Recorder
(labels placed as a person pressing label buttons would); the finger then
moves (the grasp scenario, made up for the demo: a greenhouse tomato-picking
gripper) and `tapcurve record` records it; `tapcurve calibrate` fits the
holds and `tapcurve process` (causal, and `--zero-phase`) reconstructs the
moving recording. The device's truth file holds, per frame, the exact mean
curvature of each segment and the end point of the sensor from its elastica
model: the reference here (an outside model in the sense that the host side
never sees it: only codes cross the pty).

Figures: tip (sensor end) error in % of the sensor length, mean and max, and
RMS curvature error per segment, printed as a table (``pytest -s``).
Requirement: mean tip error <= 1.5 % of the length; goal 0.75 % (project
targets, no outside source). The causal live filters delay the estimate by
about the spike median's (W - 1) / 2 frames plus the Butterworth low-pass's
group delay (computed here with ``scipy.signal.group_delay``, the reference
implementation); the lag that minimises the causal error is checked against
that prediction.
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
from scipy import signal

from acquire.rig import load_rig
from acquire.virtual import StripSettings, VirtualFinger

REPO = Path(__file__).resolve().parents[2]
RIG_PATH = REPO / "acquire" / "rigs" / "demo_finger.toml"
RATE_HZ = 1000.0
TIME_SCALE = 4.0  # device seconds per wall second: the holds take a quarter of their device time
HOLD_S = 1.5
SETTLE_S = 0.3
MOVING_S = 16.0
# jig labels and the curvature each states, 1/m (curvature = 1 / radius, plane geometry)
HOLDS = [("flat", 0.0), ("curvature=15/m", 15.0), ("radius=40mm", 25.0), ("radius=25mm", 40.0),
         ("radius=20mm", 50.0), ("flat", 0.0), ("radius=-100mm", -10.0), ("curvature=-15/m", -15.0),
         ("radius=-40mm", -25.0), ("flat", 0.0)]


def tapcurve(*args: str, timeout_s: float = 120.0) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "display.cli", *args], capture_output=True, text=True,
                          timeout=timeout_s, cwd=REPO)


@pytest.fixture(scope="module")
def session(tmp_path_factory, record_jig_holds):
    d = tmp_path_factory.mktemp("e2e")
    rig = load_rig(RIG_PATH)
    # the ideal strip: the figures in the README's accuracy table (the real strip has its own rows)
    dev = VirtualFinger(rig=rig, rate_hz=RATE_HZ, seed=7, hold="flat", time_scale=TIME_SCALE,
                        truth_path=d / "truth.h5", strip=StripSettings(mode="ideal"))
    dev.start()
    try:
        holds_counters = record_jig_holds(dev, rig, d / "holds.h5", HOLDS, hold_s=HOLD_S, settle_s=SETTLE_S,
                                          rate_hz=RATE_HZ)
        dev.set_hold(None)  # off the jig: the grasp scenario plays
        r = tapcurve("record", "--port", dev.path, "--rig", str(RIG_PATH), "--out", str(d / "grasp.h5"),
                     "--duration", str(MOVING_S), "--label", "grasp (moving)", "--quiet")
        assert r.returncode == 0, r.stderr
    finally:
        dev.stop()
    r = tapcurve("calibrate", str(d / "holds.h5"), "--rig", str(RIG_PATH), "--out", str(d / "cal.json"))
    assert r.returncode == 0, r.stderr
    calibrate_report = r.stdout
    for name, extra in (("causal", ()), ("zero-phase", ("--zero-phase",))):
        r = tapcurve("process", str(d / "grasp.h5"), "--calibration", str(d / "cal.json"),
                     "--out", str(d / f"{name}.h5"), "--quiet", *extra)
        assert r.returncode == 0, r.stderr
    return {"dir": d, "rig": rig, "holds_counters": holds_counters, "calibrate_report": calibrate_report}


def figures(d: Path, name: str, truth_rows) -> dict:
    with h5py.File(d / "grasp.h5", "r") as f:
        seq = f["raw/seq"][:]
        codes = f["raw/adc"][:]
    truth = truth_rows(d / "truth.h5", seq, codes)
    with h5py.File(d / f"{name}.h5", "r") as f:
        tap_end = int(f["derived"].attrs["tap_index"][-1])
        length = float(f["derived/s_m"][tap_end])
        tip = f["derived/xy"][:, tap_end, :].astype(np.float64)
        curv = f["derived/curvature"][:].astype(np.float64)
    err = np.hypot(*(tip - truth["tip_xy_m"]).T)
    # the delay that fits best: estimate at frame i + lag against the truth at frame i
    lags = np.arange(0, 31)
    by_lag = [np.mean(np.hypot(*(tip[lag:] - truth["tip_xy_m"][: tip.shape[0] - lag]).T)) for lag in lags]
    best = int(lags[int(np.argmin(by_lag))])
    return {
        "frames": int(seq.shape[0]),
        "length_m": length,
        "tip_mean_pct": 100.0 * float(err.mean()) / length,
        "tip_max_pct": 100.0 * float(err.max()) / length,
        "curvature_rms_per_m": np.sqrt(np.mean((curv - truth["curvature_per_m"]) ** 2, axis=0)),
        "best_lag_frames": best,
        "tip_mean_pct_at_best_lag": 100.0 * float(by_lag[best]) / length,
        "truth_curvature_range": (float(truth["curvature_per_m"].min()), float(truth["curvature_per_m"].max())),
    }


def predicted_lag_frames(rig) -> float:
    """Spike median (W - 1) / 2 frames plus the low-pass's group delay near DC."""
    b, a = signal.butter(rig.lowpass_order, rig.lowpass_hz, btype="low", fs=RATE_HZ)
    _, gd = signal.group_delay((b, a), w=[0.5], fs=RATE_HZ)  # samples, at 0.5 Hz (the grasp's pace)
    return (rig.spike_window - 1) / 2 + float(gd[0])


def test_serial_path_lost_nothing(session):
    c = session["holds_counters"]
    assert c["frames_lost"] == 0 and sum(v for k, v in c.items() if k.startswith("drop_")) == 0
    with h5py.File(session["dir"] / "grasp.h5", "r") as f:
        assert f["raw/seq"].shape[0] == int(MOVING_S * RATE_HZ)
        assert (np.diff(f["raw/seq"][:]) == 1).all()


def test_calibration_fits_the_holds(session):
    doc = json.loads((session["dir"] / "cal.json").read_text())
    for seg in doc["fit_report"]["segments"]:
        assert seg["n_holds"] == len(HOLDS)
        assert seg["curvature_min_per_m"] == pytest.approx(-25.0)  # radius=-40mm
        assert seg["curvature_max_per_m"] == pytest.approx(50.0)  # radius=20mm
        assert seg["rms_residual_per_m"] < 0.2


def test_tip_accuracy_against_ground_truth(session, truth_rows):
    rig = session["rig"]
    causal = figures(session["dir"], "causal", truth_rows)
    zero = figures(session["dir"], "zero-phase", truth_rows)
    predicted = predicted_lag_frames(rig)
    lines = [
        "",
        f"virtual finger, grasp scenario: {causal['frames']} frames at {RATE_HZ:g} Hz, sensor "
        f"{1000 * causal['length_m']:.0f} mm, truth curvature {causal['truth_curvature_range'][0]:+.1f} .. "
        f"{causal['truth_curvature_range'][1]:+.1f} 1/m",
        "filters      tip mean %L  tip max %L  best lag frames  tip mean %L at best lag",
    ]
    for name, f in (("causal", causal), ("zero-phase", zero)):
        lines.append(f"{name:11s}  {f['tip_mean_pct']:11.3f}  {f['tip_max_pct']:10.3f}  {f['best_lag_frames']:15d}  "
                     f"{f['tip_mean_pct_at_best_lag']:23.3f}")
    lines.append(f"predicted causal delay {predicted:.1f} frames (median + Butterworth group delay)")
    lines.append("curvature RMS error per segment, 1/m:")
    lines.append("segment      " + "  ".join(f"{k:6d}" for k in range(rig.n_segments)))
    for name, f in (("causal", causal), ("zero-phase", zero)):
        lines.append(f"{name:11s}  " + "  ".join(f"{v:6.3f}" for v in f["curvature_rms_per_m"]))
    print("\n".join(lines))

    # the requirement and the goal (project targets)
    assert causal["tip_mean_pct"] <= 1.5
    assert zero["tip_mean_pct"] <= 0.75
    # the causal error is mostly the filters' delay: it fits best at the predicted lag,
    # and there it is as small as the zero-phase one (within 0.2 % of the length)
    assert abs(causal["best_lag_frames"] - predicted) <= 3
    assert causal["tip_mean_pct_at_best_lag"] <= zero["tip_mean_pct"] + 0.2
    # zero-phase filtering has no delay (Gustafsson, IEEE Trans. Signal Processing, 1996)
    assert zero["best_lag_frames"] <= 1
    assert np.all(zero["curvature_rms_per_m"] < 0.3)
    assert np.all(causal["curvature_rms_per_m"] < 0.6)
