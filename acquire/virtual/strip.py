"""A real printed strip's memory for the virtual finger: creep, hysteresis, drift, per-segment spread.

Printed-ink and carbon resistive strips do not follow a static law: after a
step bend the resistance keeps creeping for seconds, loading and unloading
differ (hysteresis), and the flat resistance drifts over hours. The virtual
finger adds these, on by default, to the static response of
:mod:`acquire.virtual.electrics`:

    R_k(t) = R0_k (1 + drift_k(t)) max(1 + x_k(t), 0.05),   x = C[H[u]],

with ``u`` the static relative change of segment k (units of x), ``H`` a
Prandtl-Ishlinskii operator and ``C`` first-order relaxation, both from
:class:`acquire.core.memory.StripMemory` (its ``simulator``: stateful, frames
in order). The settled gain of C is 1, so steady holds read the static
law plus the hysteresis offset.

Magnitudes (defaults; each segment draws its own around them from the seed):

- creep 4 % of a step, tau 4 s; hysteresis band 4 % of the loop's swing;
  from memory: resistive flex sensors of printed carbon ink are reported with
  creep and hysteresis of several % of full scale, some above 10 %, and
  relaxation over seconds (G. Saggio et al., "Resistive flex sensors: a
  survey", Smart Materials and Structures 25, 013001, 2016). The values here
  are mid-range choices of ours, not fitted to any sensor.
- drift of the flat resistance 1 %/hour plus a slow wander of 0.1 % (periods
  of minutes): common practice, no source (made up, in the range a bench
  test of such strips over an afternoon shows).
- per-segment spread: gains x(1 +- 20 %), time constants x(1 +- 30 %),
  drift x(1 +- 30 %): common practice, no source.

The hysteresis band is set on the loop over the calibrated range
(+-50 1/m, the built-in calibration's range): a full loop's loading and
unloading branches, at the same curvature in the middle, differ by
``hysteresis_percent`` of the loop's resistance swing. With play thresholds
``r_j`` and weights ``w_j`` (``w_0 + sum w_j = 1``) the branches differ by
``2 sum w_j r_j`` once every play has turned, and the swing is
``span - 2 sum w_j r_j`` (span: the static u range), hence
``2 sum w_j r_j = h / (1 + h) span``.

Threads: :class:`StripSettings` and :class:`RealStrip` are immutable, any
thread; a :class:`StripStream` belongs to one thread (the device thread).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields

import numpy as np

from acquire.core.memory import SegmentMemory, StripMemory
from acquire.errors import UserError

__all__ = ["StripSettings", "RealStrip", "StripStream", "STRIP_MODES", "STRIP_BOUNDS"]

STRIP_MODES = ("real", "ideal")
#: (low, high, unit) of each setting, named in messages
STRIP_BOUNDS = {
    "creep_percent": (0.0, 20.0, "%"),
    "creep_tau_s": (0.05, 600.0, "s"),
    "hysteresis_percent": (0.0, 30.0, "%"),
    "drift_percent_per_hour": (-20.0, 20.0, "%/hour"),
    "wander_percent": (0.0, 5.0, "%"),
}
# play thresholds as fractions of the static span (three plays: a rounded loop; ours)
_PLAY_FRACTIONS = np.array([0.04, 0.08, 0.12])
_TWO_PI = 2.0 * math.pi


@dataclass(frozen=True)
class StripSettings:
    """How the virtual strip misbehaves (defaults: a real strip; see the module text for sources).

    Attributes
    ----------
    mode : "real" or "ideal"
        ``ideal``: the static law alone (the codes of earlier versions).
    creep_percent : float
        Creep after a step, % of the step (mean over segments).
    creep_tau_s : float
        Creep time constant, s (mean over segments).
    hysteresis_percent : float
        Band between loading and unloading, % of the loop's swing over the calibrated range.
    drift_percent_per_hour : float
        Drift of the flat resistance, % per hour of device time.
    wander_percent : float
        Bound of a slow wander of the flat resistance, % (zero at t = 0).
    """

    mode: str = "real"
    creep_percent: float = 4.0
    creep_tau_s: float = 4.0
    hysteresis_percent: float = 4.0
    drift_percent_per_hour: float = 1.0
    wander_percent: float = 0.1

    @property
    def real(self) -> bool:
        return self.mode == "real"

    def check(self, *, names: dict | None = None) -> "StripSettings":
        """Return self if every value is within :data:`STRIP_BOUNDS`; else UserError naming it (``names``: option names)."""
        names = names or {}
        if self.mode not in STRIP_MODES:
            raise UserError(f"{names.get('mode', 'strip.mode')} {self.mode!r}: must be real or ideal")
        for key, (lo, hi, unit) in STRIP_BOUNDS.items():
            v = float(getattr(self, key))
            if not (math.isfinite(v) and lo <= v <= hi):
                raise UserError(f"{names.get(key, 'strip.' + key)} {v:g}: must be {lo:g}..{hi:g} {unit}")
        return self

    def as_dict(self) -> dict:
        """Plain values (for the hello and the truth file)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


class RealStrip:
    """Per-segment memory and drift of one simulated strip (immutable; any thread).

    Parameters
    ----------
    settings : StripSettings
    span : array (S,)
        Static relative change range of each segment over the calibrated range (units of x).
    seed : int
        Draws each segment's parameters.

    Attributes
    ----------
    memory : StripMemory
        The per-segment PI and creep parameters (what the strip does).
    drift_per_hour : ndarray (S,)
        Fractional drift of each flat resistance per hour.
    hysteresis_fraction : ndarray (S,)
        Each segment's band, as a fraction of its loop's swing.
    """

    def __init__(self, settings: StripSettings, *, span, seed: int):
        self.settings = settings.check()
        span = np.asarray(span, dtype=np.float64)
        rng = np.random.default_rng([int(seed), 0x5791])
        s = span.shape[0]
        spread = lambda width: 1.0 + rng.uniform(-width, width, s)  # noqa: E731
        c = settings.creep_percent / 100.0 * spread(0.2)
        tau = settings.creep_tau_s * spread(0.3)
        h = settings.hysteresis_percent / 100.0 * spread(0.2)
        segs = []
        for k in range(s):
            r = span[k] * _PLAY_FRACTIONS
            band = h[k] / (1.0 + h[k]) * span[k]  # = 2 sum w_j r_j (module text)
            w = np.full(r.shape, band / (2.0 * r.sum()))
            segs.append(SegmentMemory(
                pi_thresholds=np.concatenate([[0.0], r]) if h[k] > 0 else (0.0,),
                pi_weights=np.concatenate([[1.0 - w.sum()], w]) if h[k] > 0 else (1.0,),
                creep_gains=(c[k],) if c[k] > 0 else (), creep_taus_s=(tau[k],) if c[k] > 0 else (),
            ))
        self.memory = StripMemory(segs)
        self.hysteresis_fraction = h
        self.drift_per_hour = settings.drift_percent_per_hour / 100.0 * spread(0.3)
        # wander: two slow sines per segment, periods 3 .. 20 min (made up), |wander| <= wander_percent
        self._w_amp = settings.wander_percent / 100.0 * rng.uniform(0.15, 0.25, (2, s))
        self._w_hz = 1.0 / rng.uniform(180.0, 1200.0, (2, s))
        self._w_phase = rng.uniform(0.0, _TWO_PI, (2, s))

    def flat_factor(self, t_s) -> np.ndarray:
        """``1 + drift(t)`` of each flat resistance at device times ``t_s`` (s), (N, S); new array. Pure."""
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))[:, None]
        wander = sum(a * (np.sin(_TWO_PI * f * t + p) - np.sin(p))
                     for a, f, p in zip(self._w_amp, self._w_hz, self._w_phase))
        return 1.0 + self.drift_per_hour * t / 3600.0 + wander

    def stream(self, *, rate_hz: float, max_chunk_frames: int | None = None) -> "StripStream":
        """A stateful stream of this strip for frames at ``rate_hz`` (Hz), at rest until its first frame
        (``max_chunk_frames``: see :class:`StripStream`)."""
        return StripStream(self, rate_hz=rate_hz, max_chunk_frames=max_chunk_frames)


class StripStream:
    """The strip's state through one run of frames (one thread owns it).

    Frames must come in order; :meth:`set_rate` keeps the hysteresis state
    across a rate change (the creep restarts settled at the current value).
    With ``max_chunk_frames`` (the virtual device's real-time thread) longer
    runs of frames go through in pieces of at most that many: the memory
    operators' short-chunk path, which needs no scipy, so the device never
    waits for scipy's import (a second or more) while it should be sending.
    The result is the same for any chunking (the operators' rule).
    """

    def __init__(self, strip: RealStrip, *, rate_hz: float, max_chunk_frames: int | None = None):
        self.strip = strip
        self.rate_hz = float(rate_hz)
        self.max_chunk_frames = None if max_chunk_frames is None else max(1, int(max_chunk_frames))
        self._chain = strip.memory.simulator(rate_hz=self.rate_hz)

    def set_rate(self, rate_hz: float) -> None:
        """Frames from now on come at ``rate_hz`` (Hz)."""
        if float(rate_hz) == self.rate_hz:
            return
        plays = self._chain.stages[0].state
        self.rate_hz = float(rate_hz)
        self._chain = self.strip.memory.simulator(rate_hz=self.rate_hz)
        if not np.isnan(plays["plays"]).any():
            self._chain.stages[0].state = plays

    def relative_change(self, u) -> np.ndarray:
        """Static relative change ``u`` (N, S) of the next N frames -> the strip's ``x`` (N, S); new array."""
        u = np.asarray(u, dtype=np.float64)
        step = self.max_chunk_frames
        if step is None or u.shape[0] <= step:
            return self._chain.process(u)
        return np.concatenate([self._chain.process(u[i:i + step]) for i in range(0, u.shape[0], step)])

    def segment_ohm(self, t_s, u, r0_ohm) -> np.ndarray:
        """Resistance (N, S), ohm, of the next N frames at device times ``t_s`` from static ``u`` (N, S)."""
        x = self.relative_change(u)
        return r0_ohm * self.strip.flat_factor(t_s) * np.maximum(1.0 + x, 0.05)
