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


def _read(model, rig, n, first_frame):
    t = first_frame / 1000.0 + np.arange(n) / 1000.0
    codes = model.codes(t, frame_index=first_frame + np.arange(n))
    return t, DividerReadout.from_rig(rig, adc_bits=12).resistance_ohm(codes)


@pytest.mark.parametrize("label, kappa", [("radius=40mm", 25.0), ("radius=-25mm", -40.0),
                                          ("curvature=55/m", 55.0), ("flat", 0.0)])
def test_builtin_calibration_reads_holds(rig, finger, label, kappa):
    # Holds the calibration was not fitted at (except flat), other frames than the fit's.
    cal = builtin_calibration(rig)
    assert cal is not None and cal.source == BUILTIN_SOURCE
    held = finger.with_hold(label)
    t, r = _read(held, rig, 2000, 5_000_000)
    truth = held.truth(t)["curvature_per_m"]
    np.testing.assert_allclose(truth.mean(axis=0), kappa, atol=0.05)  # 1/r, plus the jig's tiny wobble
    got = cal.curvature_per_m(r)
    # Tolerance 0.25 1/m on the 2 s mean (0.2 % of the calibrated -50 .. 67 1/m span): ours; the single
    # frames carry 1.2 LSB of ADC noise, about 1 1/m each, which the mean averages away.
    np.testing.assert_allclose(got.mean(axis=0), truth.mean(axis=0), atol=0.25)


def test_builtin_calibration_follows_the_grasp(rig, finger):
    # The moving finger: non-uniform bends under the fruit's load, curvature -6 .. 22 1/m.
    t, r = _read(finger, rig, 20000, 0)
    err = builtin_calibration(rig).curvature_per_m(r) - finger.truth(t)["curvature_per_m"]
    assert np.sqrt(np.mean(err**2)) < 0.6  # per frame, unfiltered (ours: noise about 0.3 1/m RMS)


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
