"""Small pieces of the strip-memory identification: the steps into labelled holds, the play weights'
scale convention, RMS per segment, and the report of what the memory is worth.

Used by :mod:`acquire.commands.calibrate_memory` (see its docstring for the
identification as a whole).

Threads: pure, any thread. Returned arrays and objects are new.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Sequence

import numpy as np

from .memory import SegmentMemory, StripMemory
from .memory_fit import HoldStep

__all__ = ["hold_steps", "compensate_holds", "holds_without_creep",
           "unit_scale", "rms_per_segment", "SegmentMemoryReport", "MemoryReport"]

_SPEED_SMOOTH_S = 0.02  # moving average of the reading's speed when finding the move into a hold, s
_MOVE_END_FRACTION = 0.1  # a move has ended when the speed falls below this fraction of its peak
_MAX_GAP_S = 10.0  # holds further apart than this are not one chain of steps, s
_LEVEL_FRACTION = 0.1  # a hold's level: the mean of its last tenth (settled, creep taken out)


def _speed(t_s: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Smoothed speed of all segments together, each in units of its own range, per frame."""
    span = np.nanmax(x, axis=0) - np.nanmin(x, axis=0)
    span = np.where(np.isfinite(span) & (span > 0), span, 1.0)
    v = np.nansum(np.abs(np.diff(x, axis=0, prepend=x[:1])) / span, axis=1)
    dt = float(np.median(np.diff(t_s))) if t_s.size > 1 else 1.0
    w = max(1, int(round(_SPEED_SMOOTH_S / dt)))
    return np.convolve(v, np.ones(w) / w, mode="same")


def hold_steps(t_s, x, holds: Sequence, *, barriers=()) -> list[HoldStep]:
    """The step into each hold (the fastest moment of the move before it) and the frames after the move.

    Parameters
    ----------
    t_s : array_like, shape (N,)
        Frame times, s.
    x : array_like, shape (N, S)
        Relative resistance change of the whole recording.
    holds : sequence
        Objects with ``t_start_s`` and ``t_end_s`` (s; e.g.
        :class:`acquire.commands.calibrate_memory.HoldSpan`), in time order.
    barriers : sequence of (t_start_s, t_end_s)
        Other labelled intervals (motion), s: a hold after one starts a new chain.
    """
    t, x = np.asarray(t_s, float), np.asarray(x, float)
    speed = _speed(t, x)
    out, prev_end = [], float(t[0]) if t.size else 0.0
    for h, span in enumerate(holds):
        gap = np.flatnonzero((t > prev_end) & (t < span.t_start_s))
        t_step = t_first = span.t_start_s
        if gap.size >= 3:
            k = gap[int(np.argmax(speed[gap]))]
            t_step = float(t[k])
            after = gap[(gap > k) & (speed[gap] < _MOVE_END_FRACTION * speed[k])]
            t_first = max(span.t_start_s, float(t[after[0]]) if after.size else span.t_start_s)
        crossed = any(a < span.t_start_s and b > prev_end for a, b in barriers)
        chained = h > 0 and not crossed and span.t_start_s - prev_end <= _MAX_GAP_S
        out.append(HoldStep(t_step, t_first, span.t_end_s, chained))
        prev_end = span.t_end_s
    return out


def compensate_holds(memory: StripMemory, t_s, x, holds: Sequence, *, rate_hz: float) -> np.ndarray:
    """``memory.compensate(x)`` (N, S) of a holds recording, each move between holds taken as monotone.

    The creep is taken out first; then, from the end of one hold to the
    labelled start of the next, the signal is kept between the two holds'
    levels before the plays see it. The filters' step response overshoots (a
    2nd-order Butterworth by about 4 % of the step, for tens of ms): after a
    quick move between jigs that is a reversal the strip never made, which
    the plays would remember through the hold (on the virtual finger, with
    the strip's true memory, the flat hold after the largest bend came out
    1.4 to 1.7 % of its resistance high, 0.1 % with the moves kept monotone;
    that error moved the law's flat resistance, and the motion's hysteresis
    fit then took the offset for a narrower band). Outside those moves this
    is ``compensate``.

    Parameters
    ----------
    memory : StripMemory
    t_s : array_like, shape (N,)
        Frame times, s.
    x : array_like, shape (N, S)
        Relative resistance change of the whole recording (frames at ``rate_hz``).
    holds : sequence
        Objects with ``t_start_s`` and ``t_end_s`` (s), in time order.
    rate_hz : float
        Frame rate, Hz.
    """
    return memory.pi_operator().inverse().process(holds_without_creep(memory, t_s, x, holds, rate_hz=rate_hz))


def holds_without_creep(memory: StripMemory, t_s, x, holds: Sequence, *, rate_hz: float) -> np.ndarray:
    """The holds recording's ``x`` (N, S) with the creep of ``memory`` taken out and the moves between
    holds kept monotone: what :func:`compensate_holds` passes to the inverse plays (new array)."""
    t = np.asarray(t_s, float)
    y = memory.relaxation(rate_hz=rate_hz).inverse().process(np.asarray(x, float))
    prev = None
    for span in holds:
        a, b = int(np.searchsorted(t, span.t_start_s, "left")), int(np.searchsorted(t, span.t_end_s, "right"))
        if b <= a:
            continue
        tail = y[b - max(1, round(_LEVEL_FRACTION * (b - a))):b]
        ok = np.isfinite(tail)
        n = ok.sum(axis=0)
        level = np.where(n > 0, np.where(ok, tail, 0.0).sum(axis=0) / np.maximum(n, 1), np.nan)
        if prev is not None:
            start, prev_level = prev
            lo, hi = np.fmin(prev_level, level), np.fmax(prev_level, level)
            y[start:a] = np.clip(y[start:a], np.where(np.isfinite(lo), lo, -np.inf),
                                 np.where(np.isfinite(hi), hi, np.inf))
        prev = (b, level)
    return y


def unit_scale(seg: SegmentMemory) -> SegmentMemory:
    """The same memory for the static signal rescaled so that the play weights sum to 1.

    ``u`` is only defined up to a factor (``H[u] = H'[a u]`` with thresholds
    times a, weights over a); without a convention the alternating fit drifts
    along it. With weights summing to 1 a large monotone move passes with unit
    gain; the static law refitted next absorbs the factor.
    """
    a = float(seg.pi_weights.sum())
    if not a > 0:
        return seg
    return SegmentMemory(seg.pi_thresholds * a, seg.pi_weights / a, seg.creep_gains, seg.creep_taus_s)


def rms_per_segment(err: np.ndarray) -> np.ndarray:
    """RMS per column (S,) of ``err`` (N, S) over finite rows, same units; NaN where none."""
    ok = np.isfinite(err)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt((np.where(ok, err, 0.0) ** 2).sum(axis=0) / ok.sum(axis=0))


@dataclass(frozen=True)
class SegmentMemoryReport:
    """What the memory of one segment is and is worth (errors in 1/m and % of the calibrated range)."""

    segment: int
    kept: bool
    creep_from: str  # "holds", "motion" or "-"
    creep_gain: float
    creep_tau_s: float | None
    creep_pct: float  # creep after a full-range step, % of the range
    hysteresis_band_pct: float | None  # widest band of the major loop, % of range; None: not identified
    heldout: str  # how the held-out error was measured
    heldout_rms_static_per_m: float | None
    heldout_rms_memory_per_m: float | None
    heldout_rms_static_pct: float | None
    heldout_rms_memory_pct: float | None
    warnings: tuple


@dataclass(frozen=True)
class MemoryReport:
    """The memory fit of a calibration run (immutable; any thread)."""

    segments: tuple
    warnings: tuple = ()

    @property
    def all_warnings(self) -> list[str]:
        """Run-wide warnings, then each segment's, one line each."""
        return list(self.warnings) + [w for s in self.segments for w in s.warnings]

    def to_dict(self) -> dict:
        """JSON-able dict (plain floats, None for unknown)."""
        return {"segments": [asdict(s) for s in self.segments], "warnings": list(self.warnings)}

    def text(self) -> str:
        """A table for people, one line per segment, then the warnings."""
        lines = ["  segment     memory  creep % (tau s, from)    band %   held-out rms 1/m static -> memory  (% of range)"]
        for s in self.segments:
            tau = f"{s.creep_tau_s:.3g} s" if s.creep_tau_s else "-"
            band = "-" if s.hysteresis_band_pct is None else f"{s.hysteresis_band_pct:.2f}"
            if s.heldout_rms_static_per_m is None:
                held = "not measured"
            else:
                held = (f"{s.heldout_rms_static_per_m:7.3f} -> {s.heldout_rms_memory_per_m:7.3f}  "
                        f"({s.heldout_rms_static_pct:.2f} -> {s.heldout_rms_memory_pct:.2f})")
            lines.append(f"  segment {s.segment:2d}  {'kept' if s.kept else 'no':>6s}  {s.creep_pct:6.2f} ({tau}, {s.creep_from})"
                         .ljust(42) + f"{band:>7s}   {held}")
        if self.segments:
            lines.append(f"  held-out: {self.segments[0].heldout}")
        lines += [f"  warning: {w}" for w in self.all_warnings]
        return "\n".join(lines)
