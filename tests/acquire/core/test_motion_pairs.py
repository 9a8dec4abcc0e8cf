"""Pairs from a filmed motion session: pairing lag, flat resistance, coverage, bins.

References: closed forms only. A resistance that is a fixed function of the
curvature a known time earlier (a pure delay) must give that delay back; a law
with a kink at a known flat resistance must give that resistance back; gaps
in a frame clock are where the clock jumps. Noise levels and tolerances are
common practice, no source.
"""
from __future__ import annotations

import numpy as np

from acquire.core.motion_pairs import (
    bin_motion, flat_resistance, paired_resistance, pairing_lag, recording_covers,
)

R0 = 8000.0


def law(kappa):
    """A made-up strip law with a kink at flat: 2 % per 1/m up, a third of that down (closed form)."""
    k = np.asarray(kappa, dtype=float)
    return R0 * (1.0 + np.where(k >= 0, 0.02 * k + 1e-4 * k * k, 0.007 * k))


def motion(t):
    """Smooth made-up motion through both directions, 1/m."""
    return 30.0 * np.sin(2 * np.pi * 0.23 * t) + 15.0 * np.sin(2 * np.pi * 0.61 * t + 1.0)


def session(delay_s: float, *, seed: int = 0, noise_per_m: float = 1.5):
    rng = np.random.default_rng(seed)
    t_rec = np.arange(0.0, 60.0, 0.001)
    r = law(motion(t_rec - delay_s))[:, None] * np.ones((1, 2))      # the resistance comes late by delay_s
    t_cam = np.arange(0.5, 59.5, 1 / 60)
    k = motion(t_cam)[:, None] + rng.normal(0.0, noise_per_m, (t_cam.size, 2))
    return t_rec, r, t_cam, k


def test_pairing_lag_recovers_a_pure_delay():
    # closed form: R(t) = law(kappa(t - d)) pairs with kappa(t) at t + d
    for delay in (0.0, 0.007, -0.012, 0.03):
        t_rec, r, t_cam, k = session(delay)
        lag = pairing_lag(t_cam, k, t_rec, r)
        assert abs(lag - delay) < 1.5e-3, (delay, lag)    # common practice, no source: a tenth of a camera frame


def test_pairing_lag_zero_without_motion():
    t_rec = np.arange(0.0, 10.0, 0.001)
    r = np.full((t_rec.size, 1), R0)
    t_cam = np.arange(1.0, 9.0, 1 / 60)
    k = np.random.default_rng(1).normal(0.0, 1.0, (t_cam.size, 1))
    assert pairing_lag(t_cam, k, t_rec, r) == 0.0


def test_flat_resistance_at_the_kink():
    # closed form: the law crosses curvature 0 at R0 exactly; a smooth curve through the kink would miss it
    t_rec, r, t_cam, k = session(0.0, seed=3)
    rp = paired_resistance(t_cam, t_rec, r)
    flat = np.abs(motion(t_cam)) < 0.01
    assert flat.sum() < 10                               # the motion only passes flat, it never rests there
    r0 = flat_resistance(rp[:, 0], k[:, 0])
    assert abs(r0 / R0 - 1.0) < 5e-4, r0                  # 0.05 %: common practice, no source
    # never near flat: no flat resistance
    assert np.isnan(flat_resistance(rp[:, 0][k[:, 0] > 10], k[:, 0][k[:, 0] > 10]))


def test_recording_covers_leaves_out_gaps_and_settling():
    t_rec = np.concatenate([np.arange(0.0, 2.0, 0.001), np.arange(3.0, 5.0, 0.001)])   # 1 s of frames lost
    t = np.array([-0.1, 0.1, 0.5, 1.9985, 2.5, 3.1, 3.5, 4.9985, 5.5])
    got = recording_covers(t, t_rec, settle_s=0.2)
    assert got.tolist() == [False, False, True, True, False, False, True, True, False]


def test_bins_keep_the_two_sides_apart():
    t_rec, r, t_cam, k = session(0.0, seed=5)
    rp = paired_resistance(t_cam, t_rec, r)
    p = bin_motion(rp, k, n_bins=20, min_frames=3)
    for s in range(2):
        x, kb = p.x[s], p.reference_per_m[s]
        assert x.size >= 30 and np.all(np.diff(x) > 0)
        # every bin lies on one side of flat: its mean curvature has the sign of its resistance change
        # (bins nearest flat excepted: their means are within the markers' noise of 0)
        far = np.abs(kb) > 1.0
        assert np.all(np.sign(x[far]) == np.sign(kb[far]))
        assert abs(p.r0_ohm[s] / R0 - 1.0) < 1e-3          # 0.1 %: common practice, no source
