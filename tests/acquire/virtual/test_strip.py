"""The real strip: creep, hysteresis and drift as set, and the ideal strip unchanged.

References: the first-order step response ``1 - exp(-t/tau)`` (closed form of
the relaxation term, zero-order hold at the samples); the Prandtl-Ishlinskii
play operator's branch offsets (a turned play sits at u - r loading and u + r
unloading: Brokate & Sprekels 1996, ch. 2, from memory); a straight line's
slope for the drift; codes of the version before the real strip (SHA-256 of
the codes, recorded then).
"""
from __future__ import annotations

import hashlib

import numpy as np
import pytest

from acquire.rig import load_rig
from acquire.virtual import FingerModel, StripSettings, VirtualFinger

OFF = dict(creep_percent=0.0, hysteresis_percent=0.0, drift_percent_per_hour=0.0, wander_percent=0.0)


@pytest.fixture(scope="module")
def model():
    return FingerModel(rig=load_rig(None), seed=5)


def test_creep_step_is_first_order(model):
    strip = model.real_strip(StripSettings(**{**OFF, "creep_percent": 4.0, "creep_tau_s": 3.0}))
    stream = strip.stream(rate_hz=100.0)
    static = model.static_strip
    u0, u1 = static.response(np.zeros(6)), static.response(np.full(6, 30.0))
    n0, n1 = 200, 3000
    u = np.concatenate([np.repeat(u0[None], n0, 0), np.repeat(u1[None], n1, 0)])
    t = np.arange(n0 + n1) / 100.0
    r = stream.segment_ohm(t, u, static.r0_ohm)
    c = np.array([s.creep_gains[0] for s in strip.memory.segments])
    tau = np.array([s.creep_taus_s[0] for s in strip.memory.segments])
    ts = t[n0:, None] - t[n0]
    step = u1 - u0
    expected = static.r0_ohm * (1 + u0 + step * ((1 - c) + c * (1 - np.exp(-ts / tau))))
    np.testing.assert_allclose(r[n0:], expected, rtol=1e-9)
    np.testing.assert_allclose(r[:n0], static.r0_ohm * (1 + u0) * np.ones((n0, 1)), rtol=1e-12)
    # per-segment spread around the set values (x(1 +- 20 %), x(1 +- 30 %))
    assert ((c > 0.032) & (c < 0.048)).all() and ((tau > 2.1) & (tau < 3.9)).all() and c.std() > 0


def test_hysteresis_band_as_set(model):
    strip = model.real_strip(StripSettings(**{**OFF, "hysteresis_percent": 5.0}))
    stream = strip.stream(rate_hz=100.0)
    static = model.static_strip
    leg = np.linspace(-50.0, 50.0, 2001)
    kappa = np.concatenate([leg, leg[::-1], leg, leg[::-1]])  # two full loops
    u = static.response(kappa[:, None])
    r = stream.segment_ohm(np.zeros(kappa.size), u, static.r0_ohm)  # t = 0: no drift
    n = leg.size
    up, down = slice(2 * n, 3 * n), slice(3 * n, 4 * n)  # the second loop
    for k in range(6):
        mid = 0.5 * (u[:, k].min() + u[:, k].max())
        r_up = np.interp(mid, u[up, k], r[up, k])
        r_down = np.interp(mid, u[down, k][::-1], r[down, k][::-1])
        swing = r[2 * n:, k].max() - r[2 * n:, k].min()
        assert (r_down - r_up) / swing == pytest.approx(strip.hysteresis_fraction[k], rel=1e-6)
    assert strip.hysteresis_fraction.mean() == pytest.approx(0.05, rel=0.2)


def test_drift_rate_as_set(model):
    strip = model.real_strip(StripSettings(**{**OFF, "drift_percent_per_hour": 1.5}))
    t = np.arange(0.0, 7200.0, 10.0)
    f = strip.flat_factor(t)
    slope = np.polyfit(t / 3600.0, f, 1)[0]  # per hour, each segment
    np.testing.assert_allclose(slope, strip.drift_per_hour, rtol=1e-9)
    assert strip.drift_per_hour.mean() == pytest.approx(0.015, rel=0.3)
    wander = model.real_strip(StripSettings(**{**OFF, "wander_percent": 0.1})).flat_factor(t) - 1.0
    assert 1e-4 < np.abs(wander).max() <= 0.001  # the set bound, 0.1 %


# SHA-256 (first 16 hex digits) of model.codes(arange(20000) / 1000 s, frames 0..19999), recorded with the
# version before the real strip existed
PREVIOUS = [(dict(seed=0), "e85b64e377dba5cc"), (dict(seed=3, scenario="sweep"), "e680e5d6f625cc81"),
            (dict(seed=0, hold="radius=25mm"), "7059ec405d3d3caf")]


@pytest.mark.parametrize("kw, digest", PREVIOUS)
def test_ideal_strip_reproduces_previous_codes(kw, digest):
    t = np.arange(20000) / 1000.0
    codes = FingerModel(**kw).codes(t, frame_index=np.arange(20000))
    assert hashlib.sha256(codes.tobytes()).hexdigest()[:16] == digest


def test_device_ideal_strip_sends_the_static_codes(tmp_path):
    import h5py
    import serial

    truth = tmp_path / "truth.h5"
    with VirtualFinger(strip=StripSettings(mode="ideal"), truth_path=truth, seed=3, time_scale=10.0) as dev:
        port = serial.Serial(dev.path, timeout=0.05)
        try:
            port.write(b"START\n")
            for _ in range(400):
                port.read(65536)
                if dev.counters["frames_generated"] > 3000:
                    break
        finally:
            port.close()
        model = dev.model
    with h5py.File(truth, "r") as f:
        t, seq, codes = f["t_device_s"][:], f["seq"][:], f["codes"][:]
    np.testing.assert_array_equal(codes, model.codes(t, frame_index=seq))
    assert t.size > 3000


def test_real_strip_differs_and_is_chunk_invariant(model):
    # The real path is stateful: the same frames fed in any chunks give the same codes.
    t = np.arange(6000) / 1000.0
    whole = model.codes(t, frame_index=np.arange(6000), strip=model.real_strip().stream(rate_hz=1000.0))
    stream = model.real_strip().stream(rate_hz=1000.0)
    parts = [model.codes(t[a:b], frame_index=np.arange(a, b), strip=stream)
             for a, b in [(0, 1), (1, 7), (7, 2000), (2000, 6000)]]
    np.testing.assert_array_equal(np.concatenate(parts), whole)
    ideal = model.codes(t, frame_index=np.arange(6000))
    assert np.abs(whole.astype(int) - ideal).max() > 10


@pytest.mark.parametrize("argv, option", [(["--strip", "fancy"], "--strip"), (["--creep-percent", "50"], "--creep-percent"),
                                          (["--creep-tau-s", "0"], "--creep-tau-s"),
                                          (["--hysteresis-percent", "-1"], "--hysteresis-percent"),
                                          (["--drift-percent-per-hour", "x"], "--drift-percent-per-hour"),
                                          (["--stiffness-scale", "100"], "--stiffness-scale"),
                                          (["--actuation-gain-nm-per-kpa", "0"], "--actuation-gain-nm-per-kpa")])
def test_strip_and_mechanics_options_bounded(argv, option):
    # CLI rule: one line naming the option, its bounds in the message.
    import argparse

    from acquire.errors import UserError
    from acquire.virtual.cli import add_finger_arguments, finger_settings_from_args

    p = argparse.ArgumentParser()
    add_finger_arguments(p, title="finger")
    with pytest.raises(UserError, match=option) as info:
        finger_settings_from_args(p.parse_args(argv), load_rig(None))
    assert "\n" not in str(info.value)
    ok = finger_settings_from_args(p.parse_args(["--strip", "ideal", "--creep-percent", "3"]), load_rig(None),
                                   extended=True)
    assert ok["strip"].mode == "ideal" and ok["strip"].creep_percent == 3.0


def test_free_scenario_reaches_the_calibrated_range():
    # Made-up free motion: both directions to about +-50 1/m, pauses of different lengths.
    m = FingerModel(seed=0, scenario="free")
    t = np.arange(0.0, 300.0, 0.01)
    k = m.truth(t)["curvature_per_m"].mean(axis=1)
    assert k.max() > 45.0 and k.min() < -45.0 and np.abs(k).max() < 53.0
    still = np.abs(np.diff(k)) < 1e-9
    runs = np.diff(np.flatnonzero(np.diff(np.concatenate([[0], still.astype(int), [0]]))))[::2] * 0.01
    assert runs.min() < 0.5 and runs.max() > 3.0  # short and long pauses


def test_the_device_stream_needs_no_scipy_and_splits_without_changing_the_result():
    # The device thread must never wait for scipy's import (a second or more) while it should be
    # sending: its strip stream goes through long runs in short pieces. A fresh interpreter shows
    # what is imported; the split result equals the whole run's (the operators' chunking rule).
    import subprocess
    import sys
    from pathlib import Path

    code = """
import sys
import numpy as np
from acquire.core.memory_ops import LOOP_MAX
from acquire.virtual.model import FingerModel
strip = FingerModel(seed=2).real_strip()
u = 0.05 * np.sin(np.linspace(0.0, 20.0, 3000))[:, None] * np.ones(6)
split = strip.stream(rate_hz=1000.0, max_chunk_frames=LOOP_MAX).relative_change(u)
assert "scipy.signal" not in sys.modules, "scipy.signal imported by the short-chunk path"
whole = strip.stream(rate_hz=1000.0).relative_change(u)
np.testing.assert_allclose(split, whole, rtol=0, atol=1e-12)
print("ok")
"""
    root = Path(__file__).resolve().parents[3]
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=root)
    assert r.returncode == 0 and r.stdout.strip() == "ok", r.stderr[-2000:]
