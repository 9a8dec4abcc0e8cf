"""What a display reads: the newest processed frame, decimated history and a tip trail.

:class:`ViewFeed` is filled by a source's producer thread (the live session's
processing thread, the replay worker) and read by a display's redraw timer,
which never waits: :meth:`ViewFeed.snapshot` copies what is new under a short
lock. :class:`DisplayChain` is the numeric path in front of it: the filters of
a calibration-free :class:`~acquire.core.pipeline.Pipeline`, then the
calibration and the reconstruction only for the frames that are drawn (the
newest frame and one trail point per trace bucket), which equals what the
pipeline gives with that calibration at a fraction of the cost at high replay
speeds.
"""
from __future__ import annotations

import math
import threading
from collections import deque
from dataclasses import dataclass

import numpy as np

from acquire.link.frames import FrameBlock
from acquire.rig import Rig

__all__ = ["ViewSnapshot", "ViewFeed", "DisplayChain"]


def _fmin_reduce(x: np.ndarray) -> np.ndarray:
    # min over axis 1 ignoring NaN (NaN only where all are NaN), without warnings
    return np.fmin.reduce(x, axis=1)


def _fmax_reduce(x: np.ndarray) -> np.ndarray:
    return np.fmax.reduce(x, axis=1)



@dataclass
class ViewSnapshot:
    """What a display draws at one redraw (arrays new, owned by the receiver).

    Attributes
    ----------
    version : int
        Grows with every block pushed; equal versions mean nothing new.
    frames : int
        Frames pushed since the feed was last reset.
    seq : int
        Sequence number of the newest frame.
    t_device_s, t_host_s : float
        Device time and host arrival time (monotonic clock, s; NaN for a
        replay) of the newest frame.
    codes : ndarray of uint16, shape (C,)
    resistance_ohm, filtered_ohm : ndarray of float64, shape (S,)
        Newest frame, as read and after the filters, ohm.
    curvature_per_m : ndarray of float64, shape (S,), or None
        Newest frame's mean segment curvature, 1/m (None without calibration).
    xy_m : ndarray of float64, shape (P, 2), or None
        Newest frame's shape points, m, at the source's ``s_m``.
    trail_xy_m : ndarray of float64, shape (K, 2), or None
        Tip positions of the last ``trail_s``, oldest first, m.
    trace_t_s : ndarray of float64, shape (2B,)
        Device time of each trace point (every bucket twice: its minimum,
        then its maximum).
    trace_codes : ndarray of float32, shape (2B, C)
    trace_resistance_ohm : ndarray of float32, shape (2B, S)
    trace_curvature_per_m : ndarray of float32, shape (2B, S), or None
        Min/max envelope per bucket of ``bucket_frames`` frames.
    chain_ok : bool
        The newest frame passed every wiring check.
    force_n : ndarray of float64, shape (2,), or None
        Newest frame's estimated force at the sensor's far end (Fx, Fy), base frame, N
        (None without a force model).
    actuation : float or None
        Newest frame's actuation in the rig's unit (None without ``[actuation]``).
    trace_force_n : ndarray of float32, shape (2B,), or None
        Min/max envelope of the force magnitude ``|F|`` per bucket, N.
    trace_actuation : ndarray of float32, shape (2B,), or None
        Min/max envelope of the actuation per bucket.
    """

    version: int
    frames: int
    seq: int
    t_device_s: float
    t_host_s: float
    codes: np.ndarray
    resistance_ohm: np.ndarray
    filtered_ohm: np.ndarray
    curvature_per_m: np.ndarray | None
    xy_m: np.ndarray | None
    trail_xy_m: np.ndarray | None
    trace_t_s: np.ndarray
    trace_codes: np.ndarray
    trace_resistance_ohm: np.ndarray
    trace_curvature_per_m: np.ndarray | None
    chain_ok: bool
    force_n: np.ndarray | None = None
    actuation: float | None = None
    trace_force_n: np.ndarray | None = None
    trace_actuation: np.ndarray | None = None


def _extra_rows(force_n, actuation, n: int) -> np.ndarray:
    """(N, 2) float32: the force magnitude |F| (N) and the actuation, NaN where absent."""
    out = np.full((n, 2), np.nan, dtype=np.float32)
    if force_n is not None:
        f = np.asarray(force_n, dtype=np.float32)
        out[:, 0] = np.hypot(f[:, 0], f[:, 1])
    if actuation is not None:
        out[:, 1] = actuation
    return out


class ViewFeed:
    """Processed frames for a display: newest frame, decimated history, tip trail.

    Parameters
    ----------
    n_channels, n_segments : int
    rate_hz : float
        Nominal frame rate, Hz (sets the bucket size).
    reconstructor : acquire.core.reconstruct.Reconstructor
        Turns curvature into shape points.
    window_s : float
        History kept for the traces, s.
    max_points : int
        Buckets kept (each drawn as two points, min and max).
    trail_s : float
        Length of the tip trail, s.

    Threads: :meth:`push` and :meth:`reset` from one producer thread,
    :meth:`snapshot` from any (the GUI); a lock makes each call atomic.
    Buckets count frames from the last reset, so the history is the same
    whatever blocks the frames came in.
    """

    def __init__(
        self,
        *,
        n_channels: int,
        n_segments: int,
        rate_hz: float,
        reconstructor,
        window_s: float = 10.0,
        max_points: int = 1000,
        trail_s: float = 1.5,
    ):
        self.n_channels = int(n_channels)
        self.n_segments = int(n_segments)
        self.reconstructor = reconstructor
        self.window_s = float(window_s)
        self.bucket_frames = max(1, int(math.ceil(rate_hz * window_s / max_points)))
        self.capacity = max(2, int(math.ceil(window_s * rate_hz / self.bucket_frames)))
        self.trail_buckets = max(2, int(round(trail_s * rate_hz / self.bucket_frames)))
        self._lock = threading.Lock()
        b2 = 2 * self.capacity
        # each bucket is written twice (i and i + capacity): any window is one contiguous slice
        self._t = np.zeros(b2)
        self._codes = np.zeros((b2, 2, self.n_channels), dtype=np.float32)
        self._res = np.zeros((b2, 2, self.n_segments), dtype=np.float32)
        self._curv = np.zeros((b2, 2, self.n_segments), dtype=np.float32)
        self._tip = np.zeros((b2, 2))
        self._extra = np.full((b2, 2, 2), np.nan, dtype=np.float32)  # |F| and actuation envelopes
        self.reset()

    def reset(self) -> None:
        """Forget everything (after a seek, or a new calibration)."""
        with self._lock:
            self._version = getattr(self, "_version", 0) + 1
            self._frames = 0
            self._buckets = 0  # buckets ever completed since reset
            self._has_curv = False
            self._has_extra = (False, False)  # force, actuation
            self._pending: list[tuple] = []  # rows of an incomplete bucket
            self._pending_n = 0
            self._newest = None

    def push(self, block: FrameBlock, *, resistance_ohm, filtered_ohm, curvature_per_m, chain_ok,
             force_n=None, actuation=None) -> None:
        """Add N processed frames (producer thread).

        Parameters
        ----------
        block : FrameBlock
        resistance_ohm, filtered_ohm : ndarray, shape (N, S), ohm
        curvature_per_m : ndarray, shape (N, S), 1/m, or None
        chain_ok : ndarray of bool, shape (N,)
        force_n : ndarray, shape (N, 2), N, or None
        actuation : ndarray, shape (N,), or None
        """
        n = len(block)
        if n == 0:
            return
        has_curv = curvature_per_m is not None
        xy_new = None
        if has_curv:
            xy_new = self.reconstructor.shape_xy(np.asarray(curvature_per_m[-1:], dtype=np.float64))[0]
        rows = (
            block.t_device_s,
            block.codes,
            np.asarray(resistance_ohm, dtype=np.float32),
            np.asarray(curvature_per_m, dtype=np.float32) if has_curv else None,
            _extra_rows(force_n, actuation, n),
        )
        has_extra = (force_n is not None, actuation is not None)
        with self._lock:
            if has_curv != self._has_curv and self._frames:
                # calibration appeared or went: older buckets mean something else
                self._buckets = 0
                self._pending, self._pending_n = [], 0
            self._has_curv = has_curv
            self._has_extra = has_extra
            self._pending.append(rows)
            self._pending_n += n
            b = self.bucket_frames
            full = self._pending_n // b
            if full:
                t = np.concatenate([r[0] for r in self._pending])
                codes = np.concatenate([r[1] for r in self._pending]).astype(np.float32)
                res = np.concatenate([r[2] for r in self._pending])
                curv = np.concatenate([r[3] for r in self._pending]) if has_curv else None
                extra = np.concatenate([r[4] for r in self._pending])
                m = full * b
                self._store(
                    t[:m].reshape(full, b)[:, -1],
                    codes[:m].reshape(full, b, -1),
                    res[:m].reshape(full, b, -1),
                    None if curv is None else curv[:m].reshape(full, b, -1),
                    extra[:m].reshape(full, b, 2),
                )
                rest = slice(m, None)
                self._pending = [(t[rest], codes[rest], res[rest], None if curv is None else curv[rest],
                                  extra[rest])]
                self._pending_n -= m
            self._frames += n
            self._version += 1
            self._newest = (
                int(block.seq[-1]),
                float(block.t_device_s[-1]),
                float(block.t_host_s[-1]),
                block.codes[-1].copy(),
                np.array(resistance_ohm[-1], dtype=np.float64),
                np.array(filtered_ohm[-1], dtype=np.float64),
                None if not has_curv else np.array(curvature_per_m[-1], dtype=np.float64),
                xy_new,
                bool(np.asarray(chain_ok)[-1]),
                None if force_n is None else np.array(force_n[-1], dtype=np.float64),
                None if actuation is None else float(np.asarray(actuation)[-1]),
            )

    def _store(self, t_last, codes, res, curv, extra) -> None:
        # caller holds the lock; codes etc. shape (k, bucket_frames, X)
        k = t_last.shape[0]
        cap = self.capacity
        if k > cap:
            t_last, codes, res, extra = t_last[-cap:], codes[-cap:], res[-cap:], extra[-cap:]
            curv = None if curv is None else curv[-cap:]
            self._buckets += k - cap
            k = cap
        idx = (self._buckets + np.arange(k)) % cap
        both = np.concatenate([idx, idx + cap])

        def put(dst, chunk):
            env = np.stack([_fmin_reduce(chunk), _fmax_reduce(chunk)], axis=1)  # (k, 2, X)
            dst[both] = np.concatenate([env, env])

        self._t[both] = np.concatenate([t_last, t_last])
        put(self._codes, codes)
        put(self._res, res)
        put(self._extra, extra)
        if curv is not None:
            put(self._curv, curv)
            tips = self.reconstructor.shape_xy(curv[:, -1, :].astype(np.float64))[:, -1, :]
            self._tip[both] = np.concatenate([tips, tips])
        self._buckets += k

    @property
    def version(self) -> int:
        return self._version

    def snapshot(self, *, since_version: int = -1) -> ViewSnapshot | None:
        """The current state, or None if nothing was pushed since ``since_version`` (any thread)."""
        with self._lock:
            if self._newest is None or self._version == since_version:
                return None
            seq, t_dev, t_host, codes, res, filt, curv, xy, ok, force, act = self._newest
            nb = min(self._buckets, self.capacity)
            start = (self._buckets - nb) % self.capacity
            sl = slice(start, start + nb)
            t = np.repeat(self._t[sl], 2)
            tr_codes = self._codes[sl].reshape(2 * nb, self.n_channels).copy()
            tr_res = self._res[sl].reshape(2 * nb, self.n_segments).copy()
            tr_curv = self._curv[sl].reshape(2 * nb, self.n_segments).copy() if self._has_curv else None
            tr_extra = self._extra[sl].reshape(2 * nb, 2)
            has_force, has_act = self._has_extra
            trail = None
            if self._has_curv:
                k = min(nb, self.trail_buckets)
                trail = self._tip[start + nb - k : start + nb].copy()
                if xy is not None:
                    trail = np.concatenate([trail, xy[-1:]])
            return ViewSnapshot(
                version=self._version,
                frames=self._frames,
                seq=seq,
                t_device_s=t_dev,
                t_host_s=t_host,
                codes=codes.copy(),
                resistance_ohm=res.copy(),
                filtered_ohm=filt.copy(),
                curvature_per_m=None if curv is None else curv.copy(),
                xy_m=None if xy is None else xy.copy(),
                trail_xy_m=trail,
                trace_t_s=t,
                trace_codes=tr_codes,
                trace_resistance_ohm=tr_res,
                trace_curvature_per_m=tr_curv,
                chain_ok=ok,
                force_n=None if force is None else force.copy(),
                actuation=act,
                trace_force_n=tr_extra[:, 0].copy() if has_force else None,
                trace_actuation=tr_extra[:, 1].copy() if has_act else None,
            )



class DisplayChain:
    """The numeric chain for a display: a Pipeline without shapes (the feed draws only the frames it shows)
    and without the force's uncertainties (the display draws the force alone).

    Thread use: :meth:`process` on the producer thread; :meth:`set_calibration`
    and :meth:`tare` from any thread (take effect at the next block).
    :attr:`drift` (:class:`acquire.core.drift_live.FlatDriftTracker`) keeps the
    flat frames of the intervals declared on it; its declarations and
    readout may be called from any thread.
    """

    def __init__(self, *, rig: Rig, calibration, rate_hz: float, adc_bits: int, window_s: float):
        from acquire.core.pipeline import Pipeline

        self.rig = rig
        self.pipeline = Pipeline(rig=rig, calibration=None, rate_hz=rate_hz, adc_bits=adc_bits, with_shape=False,
                                 with_force_sigma=False)
        self.reconstructor = self.pipeline.reconstructor
        self.feed = ViewFeed(
            n_channels=rig.n_channels,
            n_segments=rig.n_segments,
            rate_hz=rate_hz,
            reconstructor=self.reconstructor,
            window_s=window_s,
        )
        self._lock = threading.Lock()
        self._calibration = None
        self.calibration_notes: list[str] = []
        # the last second of filtered resistance, for tare
        self._recent = deque()
        self._recent_n = 0
        self._recent_max = max(1, int(rate_hz))
        from acquire.core.drift_live import FlatDriftTracker

        self.drift = FlatDriftTracker(n_segments=rig.n_segments, rate_hz=rate_hz)
        if calibration is not None:
            self.set_calibration(calibration)

    @property
    def calibration(self):
        with self._lock:
            return self._calibration

    def set_calibration(self, calibration) -> list[str]:
        notes = [] if calibration is None else list(calibration.check_rig(self.rig))
        with self._lock:
            self._calibration = calibration
            self.calibration_notes = notes
        self.pipeline.set_calibration(calibration)  # memory and force follow it; takes effect at the next block
        self.drift.set_calibration(calibration)
        return notes

    def process(self, block: FrameBlock) -> None:
        if len(block) == 0:
            return
        out = self.pipeline.process(block)
        self.feed.push(
            block,
            resistance_ohm=out.resistance_ohm,
            filtered_ohm=out.filtered_ohm,
            curvature_per_m=out.curvature_per_m,
            chain_ok=out.chain_ok,
            force_n=out.force_n,
            actuation=out.actuation,
        )
        self.drift.push(block.t_device_s, out.filtered_ohm, restarts=block.restarts)
        with self._lock:
            self._recent.append(out.filtered_ohm)
            self._recent_n += out.filtered_ohm.shape[0]
            while self._recent and self._recent_n - self._recent[0].shape[0] >= self._recent_max:
                self._recent_n -= self._recent.popleft().shape[0]

    def recent_filtered(self) -> np.ndarray:
        with self._lock:
            if not self._recent:
                return np.zeros((0, self.rig.n_segments))
            return np.concatenate(list(self._recent))[-self._recent_max :]

    def tare(self):
        """Re-zero the calibration at the last second of frames (sensor held flat); returns it."""
        from acquire.core.pipeline import tare_calibration

        tared = tare_calibration(self.calibration, self.recent_filtered())
        self.set_calibration(tared)
        return tared
