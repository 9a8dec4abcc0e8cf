"""The flat drift, live: frames of declared flat stretches only, the closed form law(d), any chunking, the warnings.

The calibration law is the made-up one of test_drift.py (curvature = 60 x + 30 x^2
for x >= 0, 150 x for x < 0, x = R / r0 - 1): a flat resistance moved to r0 (1 + d)
reads law(d), the closed form. The threshold for its 48 mm sensor is 0.01 / L =
0.208 1/m (acquire.core.drift: the tip moved by 0.5 % of L, a project target).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from acquire.core.calibration import Calibration
from acquire.core.drift import SUSPICIOUS_FRACTION
from acquire.core.drift_live import FlatDriftTracker, drift_verdicts, is_flat_label
from acquire.session.status import drift_part, status_parts

R0 = np.array([5000.0, 5200.0, 4900.0])
C1, C2, D1 = 60.0, 30.0, 150.0
RATE = 500.0
THRESHOLD = 0.01 / 0.048


def made_up_cal():
    n = R0.size
    return Calibration(
        r0_ohm=R0, positive=[[C1, C2]] * n, negative=[[D1]] * n, x_min=np.full(n, -0.2), x_max=np.full(n, 0.6),
        curvature_min_per_m=np.full(n, -25.0), curvature_max_per_m=np.full(n, 40.0), readout_kind="divider",
        rig={"n_segments": n, "segment_lengths_mm": [16.0, 16.0, 16.0]})


def law(d):
    """The made-up law at x = d (closed form)."""
    d = np.asarray(d, dtype=float)
    return np.where(d >= 0, C1 * d + C2 * d * d, D1 * d)


def stream(d, *, seconds=6.0, noise_ohm=0.3, seed=1):
    """(t, R): a strip whose flat resistance is r0 (1 + d), sampled at RATE."""
    n = int(seconds * RATE)
    t = np.arange(n) / RATE
    r = R0 * (1 + np.asarray(d)) + np.random.default_rng(seed).normal(scale=noise_ohm, size=(n, R0.size))
    return t, r


def feed(tracker, t, r, *, chunk, restarts=()):
    restarts = np.asarray(restarts, dtype=np.int64)
    for i in range(0, t.shape[0], chunk):
        sl = slice(i, i + chunk)
        tracker.push(t[sl], r[sl], restarts=restarts[(restarts >= i) & (restarts < i + chunk)] - i)
    return tracker


def test_known_r0_offset_reads_the_closed_form_law_of_d():
    d = np.array([0.003, -0.0005, 0.0])
    t, r = stream(d, noise_ohm=0.0)
    tr = FlatDriftTracker(n_segments=3, rate_hz=RATE, calibration=made_up_cal())
    tr.flat_from(0.5)
    ro = feed(tr, t, r, chunk=37).readout()
    assert ro.state == "measured" and ro.flat_now
    rep = ro.report
    np.testing.assert_allclose([s.drift_pct for s in rep.segments], 100 * d, atol=1e-9)
    np.testing.assert_allclose([s.curvature_error_per_m for s in rep.segments], law(d), atol=1e-9)
    assert not rep.needs_tare  # law(0.003) = 0.18 and law(-0.0005) = -0.075 1/m: both under 0.208
    # the frames judged: the last WINDOW_S (1 s) of the stretch, all past the settling time
    tm, _ = tr.measured_frames()
    assert tm[0] > t[-1] - 1.0 and tm[-1] == t[-1] and tm.shape[0] == int(RATE)


def test_same_readout_for_any_chunking():
    # a bend, a flat stretch that creeps back (the first second of it well off), then a bend again
    t, r = stream([0.004, -0.002, 0.001], seconds=8.0)
    bent = (t < 2.0) | (t >= 6.0)
    r[bent] *= 1.05
    r[(t >= 2.0) & (t < 2.8)] += 40.0  # settling right after the bend: must not be measured
    outs = []
    for chunk in (1, 7, 250, 999, t.shape[0]):
        tr = FlatDriftTracker(n_segments=3, rate_hz=RATE, calibration=made_up_cal())
        tr.flat_from(2.0)
        tr.flat_until(6.0)  # declared in advance, as a replay's labels are
        feed(tr, t, r, chunk=chunk, restarts=[0])
        tm, rm = tr.measured_frames()
        outs.append((tm, rm, tr.readout()))
    for tm, rm, ro in outs[1:]:
        np.testing.assert_array_equal(tm, outs[0][0])
        np.testing.assert_array_equal(rm, outs[0][1])
        assert ro.report.to_dict() == outs[0][2].report.to_dict()
    tm = outs[0][0]
    assert tm[0] >= 5.0 - 1e-9 and tm[-1] < 6.0  # the last second before the end, nothing bent
    np.testing.assert_allclose([s.drift_pct for s in outs[0][2].report.segments], [0.4, -0.2, 0.1], atol=0.01)
    assert not outs[0][2].flat_now and outs[0][2].age_s == pytest.approx(t[-1] - tm[-1])


def test_settling_time_and_a_late_declared_end_are_respected():
    t, r = stream([0.0, 0.0, 0.0], seconds=5.0)
    r[t >= 3.0] *= 1.2  # bent again from 3 s
    tr = FlatDriftTracker(n_segments=3, rate_hz=RATE, calibration=made_up_cal(), settle_s=1.0)
    tr.flat_from(0.0)
    feed(tr, t[t < 0.9], r[t < 0.9], chunk=50)
    assert tr.readout().state == "measuring"  # still inside the settling second
    late = (t >= 0.9) & (t < 3.3)
    feed(tr, t[late], r[late], chunk=50)
    tr.flat_until(3.0)  # the GUI says so 0.3 s after the bent frames arrived: they are dropped
    feed(tr, t[t >= 3.3], r[t >= 3.3], chunk=50)
    tm, _ = tr.measured_frames()
    assert tm[-1] < 3.0 and tm[0] > 1.5 and tm.shape[0] == int(RATE)
    assert not tr.readout().report.needs_tare


def test_a_restart_of_the_filters_starts_the_settling_again():
    t, r = stream([0.0, 0.0, 0.0], seconds=4.0)
    tr = FlatDriftTracker(n_segments=3, rate_hz=RATE, calibration=made_up_cal())
    tr.flat_from(0.0)
    i = int(3.5 * RATE)  # a reconnect at 3.5 s: frames from there until 4.5 s are not judged
    feed(tr, t, r, chunk=100, restarts=[0, i])
    tm, _ = tr.measured_frames()
    assert tm[-1] < t[i]
    # time going back (a seek in a replay) forgets the frames kept
    tr.push(t[:10], r[:10])
    assert tr.measured_frames()[0].shape[0] == 0


def test_a_steady_bend_is_never_taken_for_flat():
    # steady, small, near zero: exactly what an automatic "flat" detector would pick; nothing is declared
    d = np.array([0.004, 0.004, 0.004])  # reads law(d) = 0.24 1/m, over the threshold
    t, r = stream(d)
    tr = feed(FlatDriftTracker(n_segments=3, rate_hz=RATE, calibration=made_up_cal()), t, r, chunk=64)
    ro = tr.readout()
    assert ro.state == "unknown" and ro.report is None and not ro.flat_now
    assert drift_part(ro.as_status()) is None
    assert is_flat_label("flat") and is_flat_label(" FLAT ") and is_flat_label("curvature=0/m")
    assert not is_flat_label("radius=25mm") and not is_flat_label("flat-ish") and not is_flat_label(None)


def _one(d_segment0):
    t, r = stream([d_segment0, 0.0, 0.0], noise_ohm=0.0)
    tr = FlatDriftTracker(n_segments=3, rate_hz=RATE, calibration=made_up_cal())
    tr.flat_from(0.0)
    return feed(tr, t, r, chunk=500).readout()


def test_warnings_at_the_threshold():
    # law(d) = C1 d + C2 d^2 = threshold: d = (-C1 + sqrt(C1^2 + 4 C2 thr)) / (2 C2) (quadratic formula)
    d_at = (-C1 + math.sqrt(C1 * C1 + 4 * C2 * THRESHOLD)) / (2 * C2)
    below, above = _one(d_at * 0.99), _one(d_at * 1.01)
    assert below.report.segments[0].threshold_per_m == pytest.approx(THRESHOLD)
    assert not below.report.needs_tare and above.report.needs_tare
    v_below = drift_verdicts(below.report, n_segments=3)
    v_above = drift_verdicts(above.report, n_segments=3)
    assert v_below[0][0] == "ok" and v_above[0][0] == "warn" and v_above[0][1].startswith("tare due")
    assert [v for v, _ in v_above[1:]] == ["ok", "ok"]
    assert drift_part(below.as_status()).endswith(": ok")
    assert "TARE DUE" in drift_part(above.as_status())
    # 10 % of r0 or more is more than drift: a fault, whatever the law reads
    far = _one(SUSPICIOUS_FRACTION * 1.05)
    assert drift_verdicts(far.report, n_segments=3)[0][0] == "fault"
    assert "more than drift" in drift_part(far.as_status())
    # the status line carries it after the calibration
    st = {"mode": "live", "frames_lost": 0, "bad_packets": 0, "reconnects": 0, "calibration": "cal.json",
          "flat_drift": above.as_status()}
    parts = status_parts(st)
    assert parts[-1].startswith("flat drift since calibration +") and parts[-2] == "calibration: cal.json"
    assert drift_verdicts(None, n_segments=3) == [("ok", "")] * 3


def test_tare_brings_it_back_under_the_threshold_and_says_since_tare():
    from acquire.core.pipeline import tare_calibration

    t, r = stream([0.01, 0.0, -0.004])
    cal = made_up_cal()
    tr = FlatDriftTracker(n_segments=3, rate_hz=RATE, calibration=cal)
    tr.flat_from(0.0)
    feed(tr, t, r, chunk=200)
    assert tr.readout().report.needs_tare
    tr.set_calibration(tare_calibration(cal, r[-int(RATE):]))  # the window's tare: the last second
    ro = tr.readout()
    assert ro.since_tare and not ro.report.needs_tare
    assert drift_part(ro.as_status()).startswith("flat drift since tare")
