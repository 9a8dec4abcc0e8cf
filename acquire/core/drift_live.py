"""Drift of the flat reading, live: measured while the sensor is known to be flat.

:func:`acquire.core.drift.flat_drift` says how far a flat reading has moved
since calibration (per segment, in % of r0 and as the curvature the
calibration reads there) and whether a tare is due. This module feeds it live:
:class:`FlatDriftTracker` keeps the frames of the latest stretch during which
the sensor is *known* to be flat, and :class:`FlatDriftMonitor` runs it from a
ring cursor for the health window.

When is the sensor known to be flat?
------------------------------------
Only when someone says so, as a flat interval in device time:

- an open label that states ``flat`` (:func:`is_flat_label`, the one label
  grammar), in the live window or in a recording replayed;
- the virtual finger held flat (``--hold flat``: pressed onto a flat jig);
- the windows' "Held flat" button, pressed while the sensor is held flat.

It is never guessed from the signal. A drifted strip held flat reads the
curvature ``law(d)`` (:mod:`acquire.core.drift`), so "the curvature is near
zero and steady" can only find a drift smaller than the tolerance used to
call the sensor flat: with that tolerance at the tare threshold it can never
warn, and with a wider one a finger resting at a slight bend (a grasp held
still reads as steady as a flat strip) is taken for drift, and a tare then
bakes that bend into the calibration. A constant bend and a drifted flat
strip give the same frames; only the user knows which it is.

Which frames
------------
Within a flat interval ``[a, b)``: frames at least ``settle_s`` (1 s) after
``a`` and after the last restart of the filters (a reconnect or a device
reboot: the low-pass starts afresh there), so that the hand leaving the
button or the jig, and the filters' start, are not measured. Of these, the
last ``window_s`` (1 s, the frames a Tare pressed at that moment would use,
:meth:`acquire.sources.feed.DisplayChain.tare`): the figure shown is the
offset a tare would take away. Creep after a bend lasts longer than that
(the virtual finger's strip: 4 s); :func:`~acquire.core.drift.flat_drift`
flags a reading that still moves (``settling``) and the readout says so.
The measurement stays on show after the interval ends, with its age.

Every frame is judged by its own device time against the intervals and the
restarts carried in its block, so the frames kept, and the readout, are the
same however the stream is cut into blocks (live a few frames at a time, a
replay in large chunks). An interval may be declared a little after its
start time (the GUI thread runs behind the frames): the first ``settle_s``
are skipped anyway, and an end declared late drops the frames after it.

Threads: :class:`FlatDriftTracker`: :meth:`~FlatDriftTracker.push` from one
producer thread, the rest from any thread (a lock makes each call atomic).
:class:`FlatDriftMonitor` belongs to the thread that calls it (the GUI).
Returned objects are new and owned by the caller.
"""
from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np

from acquire.core.drift import DriftReport, flat_drift
from acquire.core.labels import LabelError, parse_label
from acquire.core.verdicts import FAULT, OK, WARN

__all__ = ["is_flat_label", "DriftReadout", "FlatDriftTracker", "FlatDriftMonitor", "drift_verdicts",
           "SETTLE_S", "WINDOW_S"]

#: skip this long after a flat interval starts or the filters restart, s (common practice, no source)
SETTLE_S = 1.0
#: judge this long of flat frames, s: the frames a tare would use (the last second)
WINDOW_S = 1.0
_KEEP_EXTRA_S = 0.5  # kept beyond the window, so that a late declared end still leaves a window


def is_flat_label(text) -> bool:
    """True if ``text`` is a label that states the sensor is flat (``flat``; ``curvature=0/m`` too)."""
    if not text:
        return False
    try:
        return parse_label(str(text)) == 0.0
    except LabelError:
        return False


@dataclass(frozen=True)
class DriftReadout:
    """What a window shows about the flat drift now (immutable; any thread).

    Attributes
    ----------
    state : str
        ``"no calibration"``, ``"unknown"`` (never measured, not flat now),
        ``"measuring"`` (flat now, not enough settled frames yet) or
        ``"measured"``.
    flat_now : bool
        A flat interval is open.
    report : DriftReport or None
        The latest measurement (``"measured"`` only).
    age_s : float
        Device time from the newest frame measured to the newest frame seen, s
        (0 while it is being measured).
    since_tare : bool
        The calibration in use has been tared: the drift is since that tare.
    """

    state: str
    flat_now: bool
    report: DriftReport | None = None
    age_s: float = 0.0
    since_tare: bool = False

    def worst(self):
        """The segment closest to (or furthest over) its threshold, or None."""
        if self.report is None:
            return None
        segs = [s for s in self.report.segments if math.isfinite(s.curvature_error_per_m)]
        if not segs:
            return None
        return max(segs, key=lambda s: (s.suspicious, abs(s.curvature_error_per_m) / s.threshold_per_m))

    def as_status(self) -> dict:
        """JSON-able fields for :func:`acquire.session.status.status_parts` (key ``flat_drift``)."""
        out = {"state": self.state, "flat_now": self.flat_now, "age_s": float(self.age_s),
               "since_tare": self.since_tare}
        w = self.worst()
        if self.report is not None:
            out.update(needs_tare=bool(self.report.needs_tare), settling=any(s.settling for s in self.report.segments),
                       valid=w is not None and all(math.isfinite(s.curvature_error_per_m)
                                                   for s in self.report.segments))
        if w is not None:
            out.update(segment=w.segment, drift_pct=w.drift_pct, curvature_error_per_m=w.curvature_error_per_m,
                       threshold_per_m=w.threshold_per_m, suspicious=w.suspicious)
        return out


def drift_verdicts(report: DriftReport | None, *, n_segments: int) -> list[tuple[str, str]]:
    """(verdict, reason) per segment for the health view: ``ok``, ``warn`` (tare due) or ``fault``.

    Thresholds (argued in :mod:`acquire.core.drift`): *warn* when the flat
    reading's curvature error exceeds the tare threshold, ``0.01 / L`` 1/m
    for a sensor of length L (the tip moved by 0.5 % of L; never below the
    calibration's RMS residual); *fault* when the flat resistance is 10 % or
    more from the calibration's (more than drift: another rig, a damaged
    strip, a loose tap). No report, or a segment without a valid flat
    reading: ``ok`` with an empty reason (the wiring rows judge that).
    """
    out = [(OK, "")] * n_segments
    if report is None:
        return out
    for s in report.segments:
        if not math.isfinite(s.curvature_error_per_m):
            continue
        what = f"flat reads {s.curvature_error_per_m:+.2f} 1/m (limit {s.threshold_per_m:.2f})"
        later = ", still settling" if s.settling else ""
        if s.suspicious:
            odd = (f"flat resistance {s.drift_pct:+.1f} % from the calibration's: more than drift "
                   "(other rig, damaged strip, loose tap?)")
            out[s.segment] = (FAULT, odd)
        elif s.needs_tare:
            out[s.segment] = (WARN, f"tare due: {what}{later}")
        else:
            out[s.segment] = (OK, f"{what}{later}")
    return out


class FlatDriftTracker:
    """The frames of the latest known-flat stretch, and the drift they show (see the module text).

    Parameters
    ----------
    n_segments : int
    rate_hz : float
        Nominal frame rate, Hz (how many frames make a measurement).
    calibration : Calibration or None
    window_s, settle_s : float
        Frames judged, and skipped at the start of each flat stretch, s.
    length_m : float, optional
        Sensor length for the threshold (default: the calibration's rig).

    Threads: :meth:`push` from one producer thread; the other methods from
    any thread.
    """

    def __init__(self, *, n_segments: int, rate_hz: float, calibration=None, window_s: float = WINDOW_S,
                 settle_s: float = SETTLE_S, length_m: float | None = None):
        self.n_segments = int(n_segments)
        self.window_s = float(window_s)
        self.settle_s = float(settle_s)
        self.length_m = length_m
        # a measurement needs half a window of valid frames (common practice, no source)
        self.min_frames = max(10, int(0.5 * window_s * rate_hz))
        self._lock = threading.Lock()
        self._calibration = calibration
        self._intervals: list[list[float]] = []  # [start, end) device s; end inf while open
        self._t_fresh = -math.inf  # device time from which the filters run without a restart
        self._t_last = -math.inf  # newest frame pushed
        self._clear_buffer()
        self._version = 0
        self._cache = None

    def _clear_buffer(self) -> None:
        self._buf_t = np.zeros(0)
        self._buf_r = np.zeros((0, self.n_segments))
        self._buf_key = None  # start of the interval the buffered frames belong to

    # -- declarations (any thread)
    def set_calibration(self, calibration) -> None:
        """Judge against ``calibration`` from now (a tare: the drift since that tare)."""
        with self._lock:
            self._calibration = calibration
            self._version += 1

    def flat_from(self, t_device_s: float = -math.inf) -> None:
        """The sensor is flat from ``t_device_s`` (device s; -inf or NaN: from the first frame) until :meth:`flat_until`."""
        t = float(t_device_s)
        t = -math.inf if math.isnan(t) else t
        with self._lock:
            self._close(t)
            self._intervals.append([t, math.inf])
            del self._intervals[:-256]  # bounded: the latest intervals are the ones that matter
            self._version += 1

    def flat_until(self, t_device_s: float) -> None:
        """The open flat interval ends at ``t_device_s`` (device s; not finite: the newest frame);
        frames at or after it are dropped."""
        with self._lock:
            t = float(t_device_s)
            self._close(t if math.isfinite(t) else self._t_last)
            self._version += 1

    def _close(self, t: float) -> None:
        if self._intervals and self._intervals[-1][1] == math.inf:
            self._intervals[-1][1] = max(t, self._intervals[-1][0])
            if self._buf_key == self._intervals[-1][0]:
                keep = self._buf_t < self._intervals[-1][1]
                self._buf_t, self._buf_r = self._buf_t[keep], self._buf_r[keep]

    def set_flat_intervals(self, intervals) -> None:
        """Replace the flat intervals by ``intervals`` [(start, end) device s] (a recording's flat labels)."""
        with self._lock:
            self._intervals = [[float(a), float(b)] for a, b in intervals]
            if self._buf_key is not None and not any(a == self._buf_key for a, _ in self._intervals):
                self._clear_buffer()
            self._version += 1

    @property
    def flat_now(self) -> bool:
        """A flat interval is open."""
        with self._lock:
            return bool(self._intervals and self._intervals[-1][1] == math.inf)

    # -- frames (producer thread)
    def push(self, t_device_s, filtered_ohm, *, restarts=()) -> None:
        """Take N frames: device time (N,), s, and filtered resistance (N, S), ohm.

        ``restarts``: indices into the block where the filters started afresh
        (:attr:`acquire.link.frames.FrameBlock.restarts`); a gap in device time
        longer than ``settle_s`` counts as one. Time going back (a seek in a
        replay, a rebooted device's clock) starts afresh too and forgets the
        frames kept. Nothing is kept while no flat interval is declared.
        """
        t = np.asarray(t_device_s, dtype=np.float64)
        n = t.shape[0]
        if n == 0:
            return
        fresh = np.full(n, np.nan)
        for i in sorted(int(i) for i in np.asarray(restarts).reshape(-1)):
            if 0 <= i < n:
                fresh[i] = t[i]
        with self._lock:
            if t[0] < self._t_last or self._t_last == -math.inf:
                self._clear_buffer()
                fresh[0] = t[0] if np.isnan(fresh[0]) else fresh[0]
                self._t_fresh = t[0]
            # a gap longer than the settling time (frames lost, a replay seeking ahead) restarts too
            gap = np.diff(np.concatenate([[self._t_last], t])) > self.settle_s
            fresh = np.where(gap & np.isnan(fresh), t, fresh)
            # device time of the last restart at or before each frame
            fresh = np.fmax.accumulate(np.where(np.isnan(fresh), self._t_fresh, fresh))
            self._t_fresh = float(fresh[-1])
            self._t_last = float(t[-1])
            live = [(a, b) for a, b in self._intervals if b > t[0] and a + self.settle_s <= t[-1]]
            if not live:
                return
            key = np.full(n, np.nan)
            for a, b in live:
                m = (t >= np.maximum(a, fresh) + self.settle_s) & (t < b)
                key[m] = a
            hit = np.flatnonzero(~np.isnan(key))
            if hit.size == 0:
                return
            k = float(key[hit[-1]])
            sel = hit[key[hit] == k]
            r = np.asarray(filtered_ohm, dtype=np.float64)[sel]
            if k != self._buf_key:
                self._buf_t, self._buf_r, self._buf_key = t[sel].copy(), r.copy(), k
            else:
                self._buf_t = np.concatenate([self._buf_t, t[sel]])
                self._buf_r = np.concatenate([self._buf_r, r])
            keep = self._buf_t > self._buf_t[-1] - (self.window_s + _KEEP_EXTRA_S)
            if not keep.all():
                self._buf_t, self._buf_r = self._buf_t[keep], self._buf_r[keep]
            self._version += 1

    # -- readout (any thread)
    def measured_frames(self) -> tuple[np.ndarray, np.ndarray]:
        """(device time (n,), filtered resistance (n, S)) of the frames measured now (copies)."""
        with self._lock:
            return self._window()

    def _window(self):
        if self._buf_t.shape[0] == 0:
            return self._buf_t.copy(), self._buf_r.copy()
        m = self._buf_t > self._buf_t[-1] - self.window_s
        return self._buf_t[m].copy(), self._buf_r[m].copy()

    def readout(self) -> DriftReadout:
        """The drift now (:class:`DriftReadout`); the measurement is recomputed only when something changed."""
        with self._lock:
            cal = self._calibration
            flat_now = bool(self._intervals and self._intervals[-1][1] == math.inf)
            open_key = self._intervals[-1][0] if flat_now else None
            buf_key, t_last, version = self._buf_key, self._t_last, self._version
            cached = self._cache if self._cache is not None and self._cache[0] == version else None
            t, r = (None, None) if cached is not None else self._window()
        if cached is not None:
            report, t_meas = cached[1], cached[2]
        else:  # outside the lock: the producer does not wait for the medians
            report, t_meas = None, math.nan
            if cal is not None and t.shape[0] >= self.min_frames:
                report, t_meas = flat_drift(cal, r, length_m=self.length_m), float(t[-1])
            with self._lock:
                if self._version == version:
                    self._cache = (version, report, t_meas)
        if cal is None:
            return DriftReadout("no calibration", flat_now)
        since_tare = bool(getattr(cal, "tares", None))
        if flat_now and buf_key != open_key:
            return DriftReadout("measuring", True, since_tare=since_tare)
        if report is None:
            return DriftReadout("measuring" if flat_now else "unknown", flat_now, since_tare=since_tare)
        return DriftReadout("measured", flat_now, report, max(0.0, t_last - t_meas), since_tare)


class FlatDriftMonitor:
    """A :class:`FlatDriftTracker` fed from a ring cursor through its own filters (the health window).

    Parameters
    ----------
    cursor : acquire.link.frames.RingCursor
        The monitor's own read position.
    rig : acquire.rig.Rig
    rate_hz : float
    adc_bits : int
    calibration : Calibration or None

    Threads: all methods on one thread (they copy from the ring and filter).
    """

    def __init__(self, *, cursor, rig, rate_hz: float, adc_bits: int, calibration=None):
        from acquire.core.pipeline import Pipeline

        self.cursor = cursor
        self.pipeline = Pipeline(rig=rig, calibration=None, rate_hz=rate_hz, adc_bits=adc_bits, with_shape=False)
        self.tracker = FlatDriftTracker(n_segments=rig.n_segments, rate_hz=rate_hz, calibration=calibration)

    def update(self) -> int:
        """Filter the frames pending in the cursor and keep the flat ones; returns how many were read."""
        block = self.cursor.read()
        n = len(block)
        if n:
            out = self.pipeline.process(block)
            self.tracker.push(block.t_device_s, out.filtered_ohm, restarts=block.restarts)
        return n
