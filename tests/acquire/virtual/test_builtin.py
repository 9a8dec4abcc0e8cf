"""The virtual finger comes calibrated: its shipped calibration reads the finger's own holds right.

Ground truth: a jig hold of radius r bends every segment to curvature 1/r
(plane geometry); the finger's model reports it per frame (``truth``).
"""
from __future__ import annotations

import numpy as np
import pytest

from acquire.core.readout import DividerReadout
from acquire.rig import load_rig, parse_rig
from acquire.virtual import FingerModel, builtin_calibration
from acquire.virtual.builtin import BUILTIN_SEED, BUILTIN_SOURCE, JIG_LABELS, make_builtin_calibration


@pytest.fixture(scope="module")
def rig():
    return load_rig(None)


@pytest.fixture(scope="module")
def finger(rig):
    return FingerModel(rig=rig, seed=BUILTIN_SEED)


def _read(model, rig, n, first_frame, strip=None, t0_s=None):
    # t0_s: device time of the first frame (default first_frame / 1 kHz); the real strip drifts with it
    t = (first_frame / 1000.0 if t0_s is None else t0_s) + np.arange(n) / 1000.0
    codes = model.codes(t, frame_index=first_frame + np.arange(n), strip=strip)
    return t, DividerReadout.from_rig(rig, adc_bits=12).resistance_ohm(codes)


# The shipped calibration is fitted from the real strip's steady holds; a static calibration cannot know from
# which side the strip came, so a hold reads off by up to about half the hysteresis band (4 % of a loop over
# +-50 1/m: about 4 1/m, half of it 2 1/m) plus the fit's residual (about 2 1/m RMS across the holds). Ours.
HYSTERESIS_TOL_PER_M = 3.5


def test_builtin_calibration_reads_holds(rig, finger):
    # Holds visited one after another through the real strip (the calibration was not fitted at most of them),
    # read on the steady last 2 s of 12 s each.
    cal = builtin_calibration(rig)
    assert cal is not None and cal.source == BUILTIN_SOURCE
    strip = finger.real_strip().stream(rate_hz=1000.0)
    first = 5_000_000  # other frames (noise) than the fit's; device time from 0 (the strip's drift)
    for label, kappa in [("flat", 0.0), ("radius=40mm", 25.0), ("radius=-25mm", -40.0), ("curvature=55/m", 55.0),
                         ("flat", 0.0)]:
        held = finger.with_hold(label)
        t, r = _read(held, rig, 12000, first, strip, t0_s=(first - 5_000_000) / 1000.0)
        first += 12000
        truth = held.truth(t[-2000:])["curvature_per_m"]
        np.testing.assert_allclose(truth.mean(axis=0), kappa, atol=0.05)  # 1/r, plus the jig's tiny wobble
        got = cal.curvature_per_m(r[-2000:])
        np.testing.assert_allclose(got.mean(axis=0), truth.mean(axis=0), atol=HYSTERESIS_TOL_PER_M)


def test_builtin_calibration_reads_ideal_holds_closely(rig, finger):
    # The ideal strip (static law) read through the same calibration: off by the hysteresis offsets the
    # fit absorbed, never more than the band.
    cal = builtin_calibration(rig)
    held = finger.with_hold("radius=40mm")
    t, r = _read(held, rig, 2000, 7_000_000)
    np.testing.assert_allclose(cal.curvature_per_m(r).mean(axis=0), 25.0, atol=HYSTERESIS_TOL_PER_M)


def test_builtin_calibration_follows_the_grasp(rig, finger):
    # The moving finger through the real strip: non-uniform bends under the fruit's load, curvature -6 .. 22 1/m.
    t, r = _read(finger, rig, 20000, 0, finger.real_strip().stream(rate_hz=1000.0))
    err = builtin_calibration(rig).curvature_per_m(r) - finger.truth(t)["curvature_per_m"]
    # per frame, unfiltered: noise about 0.3 1/m RMS plus creep and hysteresis (ours: about 2.7 1/m)
    assert np.sqrt(np.mean(err**2)) < HYSTERESIS_TOL_PER_M


def test_only_the_builtin_finger_gets_it(rig):
    assert builtin_calibration(parse_rig(rig.text + "\n# a copy with a comment\n")) is not None
    other = parse_rig(rig.text.replace("[16.0, 16.0, 16.0,", "[16.0, 18.0, 16.0,"))
    assert builtin_calibration(other) is None
    assert builtin_calibration(parse_rig(rig.text.replace("r_ref_ohm = 10000.0", "r_ref_ohm = 4700.0"))) is None
    virtual = {"firmware": "tapcurve-virtual 1.0 (simulated)", "serial": f"VF-{BUILTIN_SEED:04X}", "adc_bits": 12}
    assert builtin_calibration(rig, hello=virtual) is not None
    assert builtin_calibration(rig, hello={**virtual, "serial": "VF-000B"}) is None  # another seed
    assert builtin_calibration(rig, hello={**virtual, "adc_bits": 16}) is None
    assert builtin_calibration(rig, hello={"firmware": "lab board 2.1", "adc_bits": 12}) is None


def test_shipped_file_is_current(rig):
    # The checked-in JSON must be what make_builtin_calibration fits today (same electrics, same holds).
    fresh = make_builtin_calibration()
    shipped = builtin_calibration(rig)
    np.testing.assert_allclose(shipped.r0_ohm, fresh.r0_ohm, rtol=1e-9)
    for a, b in zip(shipped.positive + shipped.negative, fresh.positive + fresh.negative):
        np.testing.assert_allclose(a, b, rtol=1e-6, atol=1e-9)
    assert [h for r in shipped.recordings for h in r["holds"]] == list(JIG_LABELS)
    assert shipped.check_rig(rig) == []
