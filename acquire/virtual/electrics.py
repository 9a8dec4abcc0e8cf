"""The virtual strip's static electrics, the divider and the ADC noise.

Each segment's resistance rises with local curvature (weaker and saturating
for the opposite bend), with a seeded spread of flat resistance and gain per
segment; the local response is integrated over the segment (the elastica
tables carry the segment means of the basis functions). Then the ratiometric
divider (r_ref into tap 0, segments in series, tap S grounded), ADC
quantisation and noise. Magnitudes: made up for the demo (a gain of 2 % per
1/m and a weaker opposite bend: common practice for resistive bend sensors,
no source).

Threads: pure, any thread; returned arrays are new and owned by the caller.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["StaticStrip", "divider_tap_volts", "normals", "uniforms", "noise_key", "CALIBRATED_RANGE_PER_M"]

_TWO_PI = 2.0 * math.pi
#: curvature range of the built-in calibration, 1/m (the span the hysteresis band refers to)
CALIBRATED_RANGE_PER_M = (-50.0, 50.0)


class StaticStrip:
    """The memory-free law ``R = R0 (1 + u(kappa))`` of every segment (immutable).

    Parameters
    ----------
    n_segments : int
    segment_ohm_range : (float, float)
        The rig's healthy range, ohm; the flat resistance sits in its geometric middle.
    seed : int
        Draws the spread per segment.
    basis : ndarray (4, rows, S), optional
        Segment means of k+, k+^2, k-, k-^2 over the elastica table's rows.
    """

    def __init__(self, *, n_segments: int, segment_ohm_range, seed: int, basis: np.ndarray | None = None):
        rng = np.random.default_rng([int(seed), 0xE1EC])
        s = int(n_segments)
        lo, hi = segment_ohm_range
        # flat resistance in the geometric middle of the healthy range, kept
        # far enough from its ends for the whole response (x0.55 .. x2.6)
        nominal = math.sqrt(lo * hi)
        if hi / lo > 2.6 / 0.55 * 1.15:
            nominal = min(max(nominal, lo / 0.55 * 1.07), hi / 2.6 / 1.07)
        self.r0_ohm = nominal * (1.0 + rng.uniform(-0.05, 0.05, s))
        # fractional rise per 1/m of positive bend, its square term, and the
        # weaker, saturating response to the opposite bend
        self.gain = 0.02 * (1.0 + rng.uniform(-0.1, 0.1, s))
        self.beta_pos = 0.006 * (1.0 + rng.uniform(-0.2, 0.2, s))
        self.rho_neg = 0.35 * (1.0 + rng.uniform(-0.15, 0.15, s))
        self.beta_neg = 0.004 * (1.0 + rng.uniform(-0.2, 0.2, s))
        self.table = None
        if basis is not None:
            coef = np.stack([self.gain, self.gain * self.beta_pos, self.gain * self.rho_neg,
                             self.gain * self.rho_neg * self.beta_neg])  # (4, S)
            self.table = np.einsum("brs,bs->rs", basis, coef)
            self.table.setflags(write=False)
        for arr in (self.r0_ohm, self.gain, self.beta_pos, self.rho_neg, self.beta_neg):
            arr.setflags(write=False)

    def response(self, kappa_per_m) -> np.ndarray:
        """Relative change u for a uniform curvature (broadcasts against (S,)); new array."""
        kp = np.maximum(kappa_per_m, 0.0)
        kn = np.minimum(kappa_per_m, 0.0)
        return self.gain * (kp + self.beta_pos * kp * kp + self.rho_neg * (kn + self.beta_neg * kn * kn))

    def calibrated_span(self) -> np.ndarray:
        """Range of u of each segment over :data:`CALIBRATED_RANGE_PER_M` (S,)."""
        lo, hi = CALIBRATED_RANGE_PER_M
        return self.response(hi) - self.response(lo)

    def ohm(self, u) -> np.ndarray:
        """Resistance for relative change ``u`` (N, S), ohm; new array."""
        return self.r0_ohm * np.maximum(1.0 + np.asarray(u), 0.05)


def divider_tap_volts(r_ohm, r_ref_ohm: float) -> np.ndarray:
    """Tap voltages v_k (k = 0 .. S-1) in units of V_ex, (N, S), for segment resistances (N, S).

    r_ref into tap 0, segments in series, tap S grounded.
    """
    r = np.asarray(r_ohm, dtype=np.float64)
    below = np.cumsum(r[:, ::-1], axis=1)[:, ::-1]  # resistance from tap k to ground
    return below / (float(r_ref_ohm) + below[:, :1])


_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLD = np.uint64(0x9E3779B97F4A7C15)


def _mix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser (Steele, Lea & Flood, 'Fast splittable pseudorandom
    number generators', OOPSLA 2014) on uint64 arrays: counter -> random bits."""
    z = x + _GOLD
    z = (z ^ (z >> np.uint64(30))) * _M1
    z = (z ^ (z >> np.uint64(27))) * _M2
    return z ^ (z >> np.uint64(31))


def normals(key: int, frame_index: np.ndarray, n_cols: int) -> np.ndarray:
    """Standard normal deviates, shape (N, n_cols), a pure function of
    (key, frame index, column): any chunking of frames gives the same values."""
    fi = np.asarray(frame_index, dtype=np.int64).astype(np.uint64)
    ctr = fi[:, None] * np.uint64(n_cols) + np.arange(n_cols, dtype=np.uint64)[None, :]
    bits = _mix64(ctr ^ np.uint64(key & 0xFFFFFFFFFFFFFFFF))
    u1 = ((bits >> np.uint64(40)).astype(np.float64) + 0.5) * (1.0 / (1 << 24))
    u2 = (bits & np.uint64(0xFFFFFF)).astype(np.float64) * (1.0 / (1 << 24))
    # Box-Muller (Box & Muller, Ann. Math. Statist. 1958)
    return np.sqrt(-2.0 * np.log(u1)) * np.cos(_TWO_PI * u2)


def noise_key(*parts: int) -> int:
    """A 64-bit noise key from small integers (seed, run, purpose)."""
    ss = np.random.SeedSequence([int(p) & 0xFFFFFFFF for p in parts])
    return int(ss.generate_state(1, dtype=np.uint64)[0])


def uniforms(key: int, index: np.ndarray, n_cols: int) -> np.ndarray:
    """Uniform deviates in [0, 1), shape (N, n_cols), a pure function of (key, index, column)."""
    fi = np.asarray(index, dtype=np.int64).astype(np.uint64)
    ctr = fi[:, None] * np.uint64(n_cols) + np.arange(n_cols, dtype=np.uint64)[None, :]
    bits = _mix64(ctr ^ np.uint64(key & 0xFFFFFFFFFFFFFFFF))
    return (bits >> np.uint64(11)).astype(np.float64) * (1.0 / (1 << 53))
