"""Drift of the flat reading: closed forms through a calibration's law, the threshold, the verdict.

The calibration law here is made up (two-sided polynomial: curvature = 60 x +
30 x^2 for x >= 0, 150 x for x < 0, x = R / r0 - 1). A flat resistance moved
to r0 (1 + d) must read law(d) exactly: drift % = 100 d, curvature error =
60 d + 30 d^2 (d > 0) or 150 d (d < 0): the closed form of the law at x = d.
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from acquire.core.calibration import Calibration, FitReport, SegmentReport
from acquire.core.drift import SUSPICIOUS_FRACTION, TIP_BUDGET_FRACTION, flat_drift

R0 = np.array([5000.0, 5200.0, 4900.0])
C1, C2, D1 = 60.0, 30.0, 150.0


def made_up_cal(*, lengths_mm=(16.0, 16.0, 16.0), residual_per_m=None):
    n = R0.size
    report = None
    if residual_per_m is not None:
        report = FitReport(segments=[SegmentReport(k, 5, 100, residual_per_m, 0.1, -25.0, 40.0, 2, 1)
                                     for k in range(n)])
    return Calibration(
        r0_ohm=R0, positive=[[C1, C2]] * n, negative=[[D1]] * n, x_min=np.full(n, -0.2), x_max=np.full(n, 0.6),
        curvature_min_per_m=np.full(n, -25.0), curvature_max_per_m=np.full(n, 40.0), readout_kind="divider",
        rig={"n_segments": n, **({"segment_lengths_mm": list(lengths_mm)} if lengths_mm else {})}, report=report)


def flat_frames(d, *, n=500, noise_ohm=0.5, seed=0):
    rng = np.random.default_rng(seed)
    return R0 * (1 + np.asarray(d)) + rng.normal(scale=noise_ohm, size=(n, R0.size))


def test_known_r0_change_gives_the_closed_form_drift_and_curvature_error():
    d = np.array([0.002, -0.001, 0.0])
    rep = flat_drift(made_up_cal(), flat_frames(d, noise_ohm=0.0))
    expected = np.where(d >= 0, C1 * d + C2 * d * d, D1 * d)  # the law at x = d (module docstring)
    got = np.array([s.curvature_error_per_m for s in rep.segments])
    assert np.allclose(got, expected, rtol=1e-9, atol=1e-12)
    assert np.allclose([s.drift_pct for s in rep.segments], 100 * d, rtol=1e-9, atol=1e-12)


def test_median_of_noisy_flat_frames_is_used():
    d = np.array([0.002, -0.001, 0.0005])
    rep = flat_drift(made_up_cal(), flat_frames(d, noise_ohm=2.0, n=4000))
    expected = np.where(d >= 0, C1 * d + C2 * d * d, D1 * d)
    # median of 4000 frames of 2 ohm noise: standard error about 1.25 * 2 / sqrt(4000) ohm
    # (efficiency of the median, pi/2 variance ratio; textbook statistics, from memory)
    tol = 4 * 1.25 * 2 / np.sqrt(4000) / R0 * D1
    assert np.allclose([s.curvature_error_per_m for s in rep.segments], expected, atol=tol.max())


def test_threshold_is_the_tip_budget_over_the_sensor_length():
    # a uniform curvature error dk bends the end of a sensor of length L by about dk L^2 / 2
    # (circular arc end (1 - cos kL) / k, small kL): the tip budget 0.5 % L gives dk = 0.01 / L
    rep = flat_drift(made_up_cal(lengths_mm=(16.0, 16.0, 16.0)), flat_frames([0.0, 0.0, 0.0]))
    assert rep.segments[0].threshold_per_m == pytest.approx(2 * TIP_BUDGET_FRACTION / 0.048)
    # without a length: 1 % of the calibrated range (65 1/m)
    rep = flat_drift(made_up_cal(lengths_mm=None), flat_frames([0.0, 0.0, 0.0]))
    assert rep.segments[0].threshold_per_m == pytest.approx(0.65)
    # never below the calibration's own residual
    rep = flat_drift(made_up_cal(residual_per_m=0.5), flat_frames([0.0, 0.0, 0.0]))
    assert rep.segments[0].threshold_per_m == pytest.approx(0.5)


def test_verdict_says_tare_over_the_threshold_and_not_under_it():
    cal = made_up_cal()  # threshold 0.208 1/m for 48 mm
    small = flat_drift(cal, flat_frames([0.001, 0.0, 0.0], noise_ohm=0.0))  # 0.06 1/m
    big = flat_drift(cal, flat_frames([0.0, -0.002, 0.0], noise_ohm=0.0))  # -0.3 1/m
    assert not small.needs_tare and small.verdict.startswith("no tare needed")
    assert big.needs_tare and big.verdict.startswith("tare now") and "segment 1" in big.verdict
    assert [s.needs_tare for s in big.segments] == [False, True, False]
    assert len(big.text().splitlines()) == 1 + R0.size + 2
    json.dumps(big.to_dict())


def test_large_change_is_called_more_than_drift_and_settling_is_noticed():
    cal = made_up_cal()
    rep = flat_drift(cal, flat_frames([SUSPICIOUS_FRACTION * 1.2, 0.0, 0.0], noise_ohm=0.0))
    assert "more than drift" in rep.verdict
    # a flat reading still creeping back by 1 % of r0 during the stretch
    frames = flat_frames([0.0, 0.0, 0.0], noise_ohm=0.5)
    frames[:, 2] += R0[2] * 0.01 * np.exp(-np.arange(frames.shape[0]) / 200.0)
    rep = flat_drift(cal, frames)
    assert [s.settling for s in rep.segments] == [False, False, True]
    assert "still moving" in rep.verdict


def test_no_valid_frame_and_wrong_shape():
    cal = made_up_cal()
    frames = flat_frames([0.0, 0.0, 0.0])
    frames[:, 1] = np.nan
    assert "no valid flat reading" in flat_drift(cal, frames).verdict
    with pytest.raises(ValueError, match="shape"):
        flat_drift(cal, np.zeros((10, 2)))
