"""Sources for a display: a live session (a device, or the built-in virtual finger) and a replayed recording.

Both publish the same :class:`ViewFeed`: the newest frame's readings and
shape, a decimated history for rolling traces and a trail of the fingertip. A
display pulls :meth:`ViewFeed.snapshot` from its redraw timer and never waits,
never touches a port or an HDF5 file.

Threads
-------
:class:`LiveSession`
    the reader thread (:class:`~acquire.link.reader.SerialReader`), the recorder
    thread (:class:`~acquire.store.recorder.Recorder`, while recording), the
    session's processing thread (ring -> filters -> calibration -> feed), the
    virtual finger's device thread when no port is given, and the shape
    stream's threads with ``publish``. The control methods (recording, labels,
    tare, calibration) may be called from any thread, typically the GUI's.
:class:`ReplaySource`
    one worker thread owns the HDF5 file: it opens it, reads frames in chunks
    around the play head and feeds them through the same numeric chain. The
    control methods only post requests to it.

Display processing runs the filters of a :class:`~acquire.core.pipeline.Pipeline`
without calibration and applies the calibration and the reconstruction itself,
computing the shape only for the frames that are drawn (the newest frame and
one trail point per trace bucket): the curvature and shape equal what the
pipeline gives with that calibration, at a fraction of the cost at high
replay speeds.
"""
from __future__ import annotations

import json
import math
import queue
import threading
import time
import warnings
from collections import deque
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from acquire.errors import UserError
from acquire.link.frames import Event, FrameBlock, FrameRing, RingCursor
from acquire.rig import Rig

__all__ = [
    "VirtualOptions",
    "ViewSnapshot",
    "ViewFeed",
    "LiveSession",
    "ReplaySource",
    "load_calibration_for",
    "add_virtual_source_arguments",
    "virtual_options_from_args",
]


# ----------------------------------------------------------------------------- helpers


def load_calibration_for(path, rig: Rig):
    """Load a calibration file and check it against ``rig`` (see :func:`acquire.core.calibration.load_for_rig`)."""
    from acquire.core.calibration import load_for_rig

    return load_for_rig(path, rig)


def _fmin_reduce(x: np.ndarray) -> np.ndarray:
    # min over axis 1 ignoring NaN (NaN only where all are NaN), without warnings
    return np.fmin.reduce(x, axis=1)


def _fmax_reduce(x: np.ndarray) -> np.ndarray:
    return np.fmax.reduce(x, axis=1)


@dataclass(frozen=True)
class VirtualOptions:
    """How to run the built-in virtual finger when no port is given.

    Attributes
    ----------
    rate_hz : float
        Sample rate, Hz.
    seed : int
    hold : str or None
        Jig label (``flat``, ``radius=25mm``, ``curvature=40/m``) or None for
        the moving scenario.
    scenario : str
        ``grasp`` or ``sweep``.
    faults : acquire.virtual.Faults or None
        Simulated wiring and link faults.
    """

    rate_hz: float = 1000.0
    seed: int = 0
    hold: str | None = None
    scenario: str = "grasp"
    faults: object = None


# ----------------------------------------------------------------------------- the feed


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
        self.reset()

    def reset(self) -> None:
        """Forget everything (after a seek, or a new calibration)."""
        with self._lock:
            self._version = getattr(self, "_version", 0) + 1
            self._frames = 0
            self._buckets = 0  # buckets ever completed since reset
            self._has_curv = False
            self._pending: list[tuple] = []  # rows of an incomplete bucket
            self._pending_n = 0
            self._newest = None

    def push(self, block: FrameBlock, *, resistance_ohm, filtered_ohm, curvature_per_m, chain_ok) -> None:
        """Add N processed frames (producer thread).

        Parameters
        ----------
        block : FrameBlock
        resistance_ohm, filtered_ohm : ndarray, shape (N, S), ohm
        curvature_per_m : ndarray, shape (N, S), 1/m, or None
        chain_ok : ndarray of bool, shape (N,)
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
        )
        with self._lock:
            if has_curv != self._has_curv and self._frames:
                # calibration appeared or went: older buckets mean something else
                self._buckets = 0
                self._pending, self._pending_n = [], 0
            self._has_curv = has_curv
            self._pending.append(rows)
            self._pending_n += n
            b = self.bucket_frames
            full = self._pending_n // b
            if full:
                t = np.concatenate([r[0] for r in self._pending])
                codes = np.concatenate([r[1] for r in self._pending]).astype(np.float32)
                res = np.concatenate([r[2] for r in self._pending])
                curv = np.concatenate([r[3] for r in self._pending]) if has_curv else None
                m = full * b
                self._store(
                    t[:m].reshape(full, b)[:, -1],
                    codes[:m].reshape(full, b, -1),
                    res[:m].reshape(full, b, -1),
                    None if curv is None else curv[:m].reshape(full, b, -1),
                )
                rest = slice(m, None)
                self._pending = [(t[rest], codes[rest], res[rest], None if curv is None else curv[rest])]
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
            )

    def _store(self, t_last, codes, res, curv) -> None:
        # caller holds the lock; codes etc. shape (k, bucket_frames, X)
        k = t_last.shape[0]
        cap = self.capacity
        if k > cap:
            t_last, codes, res = t_last[-cap:], codes[-cap:], res[-cap:]
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
            seq, t_dev, t_host, codes, res, filt, curv, xy, ok = self._newest
            nb = min(self._buckets, self.capacity)
            start = (self._buckets - nb) % self.capacity
            sl = slice(start, start + nb)
            t = np.repeat(self._t[sl], 2)
            tr_codes = self._codes[sl].reshape(2 * nb, self.n_channels).copy()
            tr_res = self._res[sl].reshape(2 * nb, self.n_segments).copy()
            tr_curv = self._curv[sl].reshape(2 * nb, self.n_segments).copy() if self._has_curv else None
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
            )


class _DisplayChain:
    """Filters (a calibration-free Pipeline), the calibration and the feed, for one source.

    Thread use: :meth:`process` on the producer thread; :meth:`set_calibration`
    and :meth:`tare` from any thread (take effect at the next block).
    """

    def __init__(self, *, rig: Rig, calibration, rate_hz: float, adc_bits: int, window_s: float):
        from acquire.core.pipeline import Pipeline

        self.rig = rig
        self.pipeline = Pipeline(rig=rig, calibration=None, rate_hz=rate_hz, adc_bits=adc_bits)
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
        return notes

    def process(self, block: FrameBlock) -> None:
        if len(block) == 0:
            return
        out = self.pipeline.process(block)
        cal = self.calibration
        curv = None
        if cal is not None:
            curv, _ = cal.evaluate(out.filtered_ohm)
        self.feed.push(
            block,
            resistance_ohm=out.resistance_ohm,
            filtered_ohm=out.filtered_ohm,
            curvature_per_m=curv,
            chain_ok=out.chain_ok,
        )
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
        """Re-zero the calibration at the median of the last second; returns the tared calibration."""
        cal = self.calibration
        if cal is None:
            raise UserError("cannot tare: no calibration loaded")
        r = self.recent_filtered()
        if r.shape[0] == 0:
            raise UserError("cannot tare: no frames yet")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # an all-NaN segment: tared() refuses it
            med = np.nanmedian(r, axis=0)
        tared = cal.tared(med)
        self.set_calibration(tared)
        return tared


# ----------------------------------------------------------------------------- live


class LiveSession:
    """A device (or the built-in virtual finger) read, processed, optionally recorded and published.

    Parameters
    ----------
    port : str or None
        Serial port; None starts the built-in virtual finger in this process
        and reads it through its pseudo-terminal like any device.
    rig : Rig
    calibration : Calibration or None
    record_path : path or None
        Start recording to this file at once.
    record_label : str or None
        With ``record_path``: mark the whole recording as one labelled interval.
    publish : str or None
        ``HOST:PORT`` for the shape stream.
    allow_remote : bool
        Allow a non-loopback ``publish`` address.
    virtual_options : VirtualOptions or None
        For the virtual finger (ignored with a port).
    window_s : float
        History kept for the display's traces, s.

    Threads: see the module docstring. Call :meth:`start` and :meth:`stop`
    from one thread (the main thread).

    Raises
    ------
    UserError
        From :meth:`start`: port missing or busy, the device's channel count
        differs from the rig, the recording cannot be created.
    """

    def __init__(
        self,
        *,
        port: str | None = None,
        rig: Rig,
        calibration=None,
        record_path=None,
        record_label: str | None = None,
        publish: str | None = None,
        allow_remote: bool = False,
        virtual_options: VirtualOptions | None = None,
        window_s: float = 10.0,
    ):
        self.port = port
        self.rig = rig
        self._initial_calibration = calibration
        self.record_path = None if record_path is None else Path(record_path)
        self.record_label = record_label
        self.publish_address = publish
        self.allow_remote = bool(allow_remote)
        self.virtual_options = virtual_options or VirtualOptions()
        self.window_s = float(window_s)
        self.virtual = None
        self.reader = None
        self.chain: _DisplayChain | None = None
        self.publisher = None
        self.recorder = None
        self._rec_lock = threading.RLock()
        self._label: tuple[int, str, float] | None = None  # (recorder id, text, t_start)
        self._labels_done: list[tuple[str, float, float]] = []
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        self._rate_samples: deque = deque(maxlen=64)  # (monotonic s, ring.written)
        self._latency: deque = deque(maxlen=256)  # arrival -> processed, s
        self._display_cursor: RingCursor | None = None
        self.notes: list[str] = []
        self.started = False

    # -- properties (any thread) -------------------------------------------------------
    @property
    def source_name(self) -> str:
        if self.port is not None:
            return self.port
        return "built-in virtual finger (demo)"

    @property
    def ring(self) -> FrameRing:
        return self.reader.ring

    @property
    def feed(self) -> ViewFeed:
        return self.chain.feed

    @property
    def rate_hz(self) -> float:
        return self.reader.rate_hz

    @property
    def adc_bits(self) -> int:
        return self.reader.adc_bits

    @property
    def s_m(self) -> np.ndarray:
        return self.chain.reconstructor.s_m

    @property
    def reconstructor(self):
        return self.chain.reconstructor

    @property
    def calibration(self):
        return self.chain.calibration if self.chain is not None else self._initial_calibration

    @property
    def is_live(self) -> bool:
        return True

    @property
    def recording(self) -> bool:
        with self._rec_lock:
            return self.recorder is not None

    @property
    def open_label(self) -> str | None:
        lab = self._label
        return None if lab is None else lab[1]

    def cursor(self) -> RingCursor:
        """A new reader position at the newest frame, for another consumer."""
        return self.reader.ring.cursor()

    # -- life cycle (main thread) ----------------------------------------------------------
    def start(self) -> "LiveSession":
        from acquire.link.reader import SerialReader

        try:
            port = self.port
            if port is None:
                from acquire.virtual import VirtualFinger

                vo = self.virtual_options
                if vo.faults is not None:
                    vo.faults.check(self.rig)
                self.virtual = VirtualFinger(
                    rig=self.rig, rate_hz=vo.rate_hz, seed=vo.seed, hold=vo.hold,
                    scenario=vo.scenario, faults=vo.faults,
                )
                self.virtual.start()
                port = self.virtual.path
            self.reader = SerialReader(port=port)
            self.reader.start()
            self.rig.check_device(channels=self.reader.n_channels, where=f"device on {self.source_name}")
            self.chain = _DisplayChain(
                rig=self.rig, calibration=self._initial_calibration,
                rate_hz=self.reader.rate_hz, adc_bits=self.reader.adc_bits, window_s=self.window_s,
            )
            self._display_cursor = self.reader.ring.cursor()
            self._thread = threading.Thread(target=self._run, name="session processing", daemon=True)
            self._thread.start()
            if self.record_path is not None:
                self.start_recording(self.record_path, label=self.record_label, from_session_start=True)
            if self.publish_address:
                self._start_publisher()
        except BaseException:
            self.stop()
            raise
        self.started = True
        return self

    def stop(self) -> None:
        """Close the recording (labels ended), stop publisher, processing, reader and device. Safe twice."""
        try:
            self.stop_recording()
        finally:
            if self.publisher is not None:
                try:
                    self.publisher.stop()
                finally:
                    self.publisher = None
            self._stop.set()
            if self._thread is not None:
                self._thread.join(timeout=5.0)
                self._thread = None
            if self.reader is not None:
                self.reader.stop()
            if self.virtual is not None:
                try:
                    self.virtual.stop()
                except RuntimeError as exc:  # the device thread failed: say so, the file is closed already
                    self.notes.append(str(exc))
                self.virtual = None

    def __enter__(self) -> "LiveSession":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # -- processing thread ---------------------------------------------------------------
    def _run(self) -> None:
        cur = self._display_cursor
        reader = self.reader
        event_index = reader.events.count
        next_rate = 0.0
        while not self._stop.is_set():
            now = time.monotonic()
            if now >= next_rate:
                self._rate_samples.append((now, reader.ring.written))
                next_rate = now + 0.25
            if not cur.wait(0.05):
                continue
            # a reconnect or reboot breaks the stream: filters start afresh
            events, event_index = reader.events.since(event_index)
            if any(e.kind in ("reconnected", "reboot") for e in events):
                self.chain.pipeline.reset()
            block = cur.read(max_frames=max(64, int(self.rate_hz)))
            if len(block) == 0:
                continue
            self.chain.process(block)
            self._latency.append(time.monotonic() - float(block.t_host_s[-1]))

    # -- recording (any thread) ------------------------------------------------------------
    def start_recording(self, path, *, label: str | None = None, from_session_start: bool = False) -> Path:
        """Start writing a recording to ``path`` (never overwritten).

        The recorder keeps the calibration in use at this moment for /derived
        for the whole file (an HDF5 file in SWMR mode cannot change its
        attributes); a later tare or calibration is noted in /events.

        Raises
        ------
        UserError
            Already recording, the file exists or cannot be created.
        """
        from acquire.store.recorder import Recorder

        with self._rec_lock:
            if self.recorder is not None:
                raise UserError(f"already recording to {self.recorder.path}")
            cal = self.calibration
            pipeline = None
            if cal is not None:
                from acquire.core.pipeline import Pipeline

                pipeline = Pipeline(rig=self.rig, calibration=cal, rate_hz=self.rate_hz, adc_bits=self.adc_bits)
            rec = Recorder(
                path=Path(path),
                ring=self.reader.ring,
                from_oldest=from_session_start,  # from a button: the recording begins at the click
                rig_toml=self.rig.text,
                device_hello=json.dumps(self.reader.hello),
                channel_names=self.rig.channels,
                events=self.reader.events,
                counters=self.reader.all_counters,
                pipeline=pipeline,
                calibration_json=None if cal is None else cal.to_json(),
                label=label,
                n_segments=self.rig.n_segments,
            )
            rec.start()
            self.recorder = rec
            self._labels_done = []
            if label is not None:
                self._labels_done.append((label, 0.0, math.nan))
            return rec.path

    def stop_recording(self) -> dict | None:
        """End an open label, close the file; returns a summary or None if not recording."""
        with self._rec_lock:
            rec = self.recorder
            if rec is None:
                return None
            if self._label is not None:
                self.end_label()
            rec.stop()
            self.recorder = None
            return {
                "path": str(rec.path),
                "frames": rec.frames_written,
                "bytes": rec.file_bytes,
                "error": rec.error,
                "labels": list(self._labels_done),
            }

    def newest_device_time_s(self) -> float:
        """Device time of the newest frame received, s (NaN before the first)."""
        block = self.reader.ring.latest(1)
        return float(block.t_device_s[-1]) if len(block) else math.nan

    def begin_label(self, text: str) -> float:
        """Open a labelled interval at the newest frame received; returns its start (device s).

        Raises
        ------
        UserError
            Not recording, a label is open already, or the text is empty or too long.
        """
        from acquire.store.recording import check_label_text

        text = text.strip()
        check_label_text(text)
        with self._rec_lock:
            if self.recorder is None:
                raise UserError("labels mark intervals of a recording: start recording first")
            if self._label is not None:
                raise UserError(f"label {self._label[1]!r} is still open: stop it first")
            t0 = self.newest_device_time_s()
            label_id = self.recorder.begin_label(text, t_start_s=None if math.isnan(t0) else t0)
            self._label = (label_id, text, t0)
            return t0

    def end_label(self) -> tuple[str, float, float] | None:
        """Close the open labelled interval at the newest frame; returns (text, t_start, t_end)."""
        with self._rec_lock:
            if self._label is None or self.recorder is None:
                self._label = None
                return None
            label_id, text, t0 = self._label
            t1 = self.newest_device_time_s()
            self.recorder.end_label(label_id, t_end_s=None if math.isnan(t1) else t1)
            self._label = None
            self._labels_done.append((text, t0, t1))
            return text, t0, t1

    # -- calibration (any thread) --------------------------------------------------------------
    def set_calibration(self, calibration) -> list[str]:
        """Use ``calibration`` (or None) for the display and the shape stream from the next block.

        Returns the notes of :meth:`Calibration.check_rig`. Raises UserError if it does not fit the rig.
        """
        notes = self.chain.set_calibration(calibration)
        if self.publisher is not None and hasattr(self.publisher, "set_calibration"):
            self.publisher.set_calibration(calibration)
        text = "calibration removed" if calibration is None else f"calibration loaded: {calibration.source}"
        self._note(text)
        return notes

    def load_calibration(self, path) -> list[str]:
        """Load a calibration file and use it (see :meth:`set_calibration`)."""
        return self.set_calibration(load_calibration_for(path, self.rig))

    def tare(self):
        """Re-zero the calibration at the last second of frames (sensor held flat)."""
        tared = self.chain.tare()
        if self.publisher is not None and hasattr(self.publisher, "set_calibration"):
            self.publisher.set_calibration(tared)
        self._note("tare: flat resistances " + ", ".join(f"{r:.0f}" for r in tared.r0_ohm) + " ohm")
        return tared

    def _note(self, text: str) -> None:
        # lands in the recording's /events through the reader's event log
        reader = self.reader
        if reader is not None and reader.ring is not None:
            reader.events.append(Event(time.monotonic(), reader.ring.written, "info", text))

    def _start_publisher(self) -> None:
        from acquire.serve.publish import ShapePublisher

        self.publisher = ShapePublisher.from_address(
            self.publish_address,
            allow_remote=self.allow_remote,
            ring=self.reader.ring,
            rig=self.rig,
            calibration=self.calibration,
            rate_hz=self.rate_hz,
            adc_bits=self.adc_bits,
            counters=self.reader.all_counters,
        )
        self.publisher.start()

    # -- status (any thread) ---------------------------------------------------------------------
    def measured_rate_hz(self) -> float:
        samples = list(self._rate_samples)
        if len(samples) < 2:
            return math.nan
        t1, n1 = samples[-1]
        # about the last 2 s
        t0, n0 = next(((t, n) for t, n in samples if t1 - t <= 2.01), samples[0])
        if t1 - t0 <= 0:
            return math.nan
        return (n1 - n0) / (t1 - t0)

    def status(self) -> dict:
        """Counters and state for a status line (any thread)."""
        reader = self.reader
        c = reader.all_counters() if reader is not None else {}
        bad = {k[5:]: v for k, v in c.items() if k.startswith("drop_") and v}
        lat = sorted(self._latency)
        with self._rec_lock:
            rec = self.recorder
            out = {
                "mode": "live",
                "source": self.source_name,
                "connected": bool(reader is not None and reader.connected),
                "nominal_rate_hz": reader.rate_hz if reader is not None else math.nan,
                "frame_rate_hz": self.measured_rate_hz(),
                "frames": int(c.get("frames", 0)),
                "frames_lost": int(c.get("frames_lost", 0)),
                "display_lost": int(self._display_cursor.lost_frames) if self._display_cursor else 0,
                "bad_packets": int(sum(bad.values())),
                "bad_by_cause": bad,
                "reconnects": int(c.get("reconnects", 0)),
                "reboots": int(c.get("reboots", 0)),
                "latency_s": lat[len(lat) // 2] if lat else math.nan,
                "recording": None if rec is None else str(rec.path),
                "recording_bytes": 0 if rec is None else int(rec.file_bytes),
                "recording_frames": 0 if rec is None else int(rec.frames_written),
                "recorder_error": None if rec is None else rec.error,
                "label": self.open_label,
                "calibration": None if self.calibration is None else str(self.calibration.source),
                "reader_error": None if reader is None else reader.error,
            }
        return out


# ----------------------------------------------------------------------------- replay


#: a followed file is shown this far behind its newest frame (the recorder flushes every 0.25 s, so the
#: motion stays smooth) once the play head is within _FOLLOW_EDGE_S of the end
_FOLLOW_DELAY_S = 0.3
_FOLLOW_EDGE_S = 2.0


@dataclass(frozen=True)
class _LabelInfo:
    text: str
    t_start_s: float
    t_end_s: float


class ReplaySource:
    """A recording played back into a :class:`ViewFeed`, read by one worker thread.

    Parameters
    ----------
    path : path
        The recording (a file still being written is opened in SWMR mode).
    calibration : Calibration, path or None
        Overrides the recording's own ``calibration_json``.
    follow : bool
        Keep up with a file still being recorded: start at its end and track
        new frames while playing at the end.
    window_s : float
        History kept for the traces, s.
    chunk_frames : int
        Frames read from the file per chunk while playing.

    Times are device times (``/raw/t_device_s``), s. The worker opens the
    file in :meth:`start`; :meth:`wait_ready` returns once the file's
    metadata is known (or raises the error that stopped it). Opening reads
    only the metadata, the labels and a window of frames, so it takes about
    the same time for any length of recording.
    """

    def __init__(self, *, path, calibration=None, follow: bool = False, window_s: float = 10.0,
                 chunk_frames: int = 8192):
        self.path = Path(path)
        self._cal_arg = calibration
        self.follow = bool(follow)
        self.window_s = float(window_s)
        self.chunk_frames = int(chunk_frames)
        self._requests: queue.Queue = queue.Queue()
        self._ready = threading.Event()
        self._error: BaseException | None = None
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self.rig: Rig | None = None
        self.hello: dict = {}
        self.chain: _DisplayChain | None = None
        self.notes: list[str] = []
        self.open_time_s = math.nan
        # play state, written by the worker, read by anyone
        self._n_frames = 0
        self._t_first = 0.0
        self._t_last = 0.0
        self._labels: list[_LabelInfo] = []
        self._playing = False
        self._speed = 1.0
        self._head = 0  # index of the next frame to process; the newest shown is head - 1
        self._head_t = 0.0
        self._live_file = False
        self.recovered = False
        self.frames_shown = 0
        self._counters: dict = {}
        self.rate_hz = math.nan
        self.adc_bits = 12

    # -- metadata (any thread, after wait_ready) ----------------------------------------------
    @property
    def is_live(self) -> bool:
        return False

    @property
    def feed(self) -> ViewFeed:
        return self.chain.feed

    @property
    def reconstructor(self):
        return self.chain.reconstructor

    @property
    def s_m(self) -> np.ndarray:
        return self.chain.reconstructor.s_m

    @property
    def calibration(self):
        return self.chain.calibration

    @property
    def n_frames(self) -> int:
        return self._n_frames

    @property
    def t_first_s(self) -> float:
        return self._t_first

    @property
    def t_last_s(self) -> float:
        return self._t_last

    @property
    def labels(self) -> list[_LabelInfo]:
        with self._lock:
            return list(self._labels)

    @property
    def playing(self) -> bool:
        return self._playing

    @property
    def speed(self) -> float:
        return self._speed

    @property
    def position_s(self) -> float:
        """Device time of the newest frame shown, s."""
        return self._head_t

    @property
    def position_index(self) -> int:
        """Index of the newest frame shown."""
        return max(0, self._head - 1)

    # -- control (any thread) --------------------------------------------------------------------
    def start(self) -> "ReplaySource":
        self._thread = threading.Thread(target=self._run, name=f"replay {self.path.name}", daemon=True)
        self._thread.start()
        return self

    def wait_ready(self, timeout_s: float = 30.0) -> None:
        """Block until the file is open and the first window is processed.

        Raises
        ------
        UserError
            The file is not a readable recording (the worker's error).
        TimeoutError
        """
        if not self._ready.wait(timeout_s):
            raise TimeoutError(f"{self.path}: not opened within {timeout_s:g} s")
        if self._error is not None:
            raise self._error

    def stop(self) -> None:
        self._stop.set()
        self._requests.put(("wake",))
        if self._thread is not None:
            self._thread.join(timeout=10.0)
            self._thread = None

    def play(self) -> None:
        self._requests.put(("play",))

    def pause(self) -> None:
        self._requests.put(("pause",))

    def set_speed(self, speed: float) -> None:
        """Playback speed, 0.1x .. 20x."""
        speed = float(speed)
        if not 0.1 - 1e-9 <= speed <= 20.0 + 1e-9:
            raise UserError(f"speed {speed:g}: must be 0.1 .. 20")
        self._speed = speed

    def seek(self, t_s: float) -> None:
        """Show the frame at device time ``t_s`` (the last one at or before it)."""
        self._requests.put(("seek", float(t_s)))

    def step(self, n_frames: int) -> None:
        """Move the play head by whole frames (negative: back); pauses playback."""
        self._requests.put(("step", int(n_frames)))

    def set_calibration(self, calibration) -> list[str]:
        notes = self.chain.set_calibration(calibration)
        self._requests.put(("reprocess",))
        return notes

    def load_calibration(self, path) -> list[str]:
        return self.set_calibration(load_calibration_for(path, self.rig))

    def tare(self):
        tared = self.chain.tare()
        self._requests.put(("reprocess",))
        return tared

    def wait_idle(self, timeout_s: float = 10.0) -> bool:
        """Wait until every request posted so far has been handled (tests, export)."""
        done = threading.Event()
        self._requests.put(("mark", done))
        return done.wait(timeout_s)

    def status(self) -> dict:
        return {
            "mode": "replay",
            "source": str(self.path),
            "connected": True,
            "frames": self._n_frames,
            "position_s": self._head_t - self._t_first,
            "duration_s": self._t_last - self._t_first,
            "playing": self._playing,
            "speed": self._speed,
            "following": self.follow,
            "file_live": self._live_file,
            "recovered": self.recovered,
            "calibration": None if self.chain is None or self.calibration is None else str(self.calibration.source),
            "frames_lost": int(self._counters.get("frames_lost", 0)),
            "bad_packets": int(sum(v for k, v in self._counters.items() if k.startswith("drop_"))),
            "reconnects": int(self._counters.get("reconnects", 0)),
            "open_time_s": self.open_time_s,
        }

    # -- worker thread ------------------------------------------------------------------------
    def _run(self) -> None:
        try:
            t0 = time.perf_counter()
            self._open()
            self.open_time_s = time.perf_counter() - t0
        except BaseException as exc:
            self._error = exc if isinstance(exc, UserError) else UserError(f"{self.path}: cannot replay ({exc})")
            self._ready.set()
            return
        self._ready.set()
        try:
            self._loop()
        finally:
            try:
                self._rec.close()
            except Exception:
                pass

    def _open(self) -> None:
        from acquire.store.recording import open_recording
        from acquire.rig import parse_rig

        rec = open_recording(self.path)
        self._rec = rec
        self.recovered = rec.recovered
        self._live_file = rec.live
        self.rig = parse_rig(rec.rig_toml, source=f"{self.path}: rig_toml")
        self.hello = rec.hello
        self._counters = rec.counters()
        cal = self._cal_arg
        if isinstance(cal, (str, Path)):
            cal = load_calibration_for(cal, self.rig)
        if cal is None and rec.calibration_json is not None:
            from acquire.core.calibration import Calibration

            cal = Calibration.from_json(rec.calibration_json, source=f"{self.path}: calibration_json")
        self._raw = rec.file["raw"]
        self._update_extent()
        rate = self.hello.get("rate_hz")
        if not isinstance(rate, (int, float)) or rate <= 0:
            rate = self._estimate_rate()
        self.rate_hz = float(rate)
        self.adc_bits = int(self.hello.get("adc_bits", 12))
        if self._raw["adc"].shape[1] != self.rig.n_channels:
            raise UserError(
                f"{self.path}: /raw/adc has {self._raw['adc'].shape[1]} channels, its rig_toml lists {self.rig.n_channels}"
            )
        self.chain = _DisplayChain(
            rig=self.rig, calibration=cal, rate_hz=self.rate_hz, adc_bits=self.adc_bits, window_s=self.window_s
        )
        self._chunk: FrameBlock | None = None  # read-ahead from the play head
        self._chunk_start = 0
        self._show_index(self._n_frames - 1 if self.follow else 0)

    def _update_extent(self) -> None:
        rec = self._rec
        if rec.live:
            rec.refresh()
        n = rec.n_frames
        self._n_frames = n
        t = self._raw["t_device_s"]
        if n:
            self._t_first = float(t[0])
            self._t_last = float(t[n - 1])
        labels = [_LabelInfo(lab.text, lab.t_start_s, lab.t_end_s) for lab in rec.labels()]
        with self._lock:
            self._labels = labels

    def _estimate_rate(self) -> float:
        n = min(self._n_frames, 4096)
        if n < 2:
            return 1000.0
        t = self._raw["t_device_s"][:n]
        d = np.diff(t)
        d = d[d > 0]
        return float(1.0 / np.median(d)) if d.size else 1000.0

    def _index_at_or_before(self, t_s: float) -> int:
        """Index of the last frame with t_device_s <= t_s (0 if none); binary search in the file."""
        ds = self._raw["t_device_s"]
        lo, hi = 0, self._n_frames  # invariant: frames < lo are <= t, frames >= hi are > t
        # narrow with single-element reads, then finish on one slice
        while hi - lo > 4096:
            mid = (lo + hi) // 2
            if float(ds[mid]) <= t_s:
                lo = mid + 1
            else:
                hi = mid
        block = ds[lo:hi]
        i = lo + int(np.searchsorted(block, t_s, side="right"))
        return max(0, i - 1)

    def _read(self, start: int, stop: int) -> FrameBlock:
        return self._rec.frames(start, stop)

    def _show_index(self, index: int) -> None:
        """Reset and process the window ending at frame ``index`` (it becomes the newest shown)."""
        n = self._n_frames
        if n == 0:
            self._head = 0
            return
        index = int(min(max(index, 0), n - 1))
        prime = int(self.window_s * self.rate_hz)
        start = max(0, index + 1 - prime)
        self.chain.pipeline.reset()
        self.chain.feed.reset()
        block = self._read(start, index + 1)
        self.chain.process(block)
        self._head = index + 1
        self._head_t = float(block.t_device_s[-1])
        self._chunk = None
        self.frames_shown += 1

    def _advance_to(self, stop: int) -> None:
        """Process frames [head, stop) from the read-ahead chunks."""
        stop = min(stop, self._n_frames)
        while self._head < stop:
            c = self._chunk_at_head()
            if c is None:
                return
            part = c.slice(self._head - self._chunk_start, min(len(c), stop - self._chunk_start))
            self.chain.process(part)
            self._head += len(part)
            self._head_t = float(part.t_device_s[-1])

    def _handle(self, req) -> None:
        kind = req[0]
        if kind == "play":
            if self._head >= self._n_frames and not self.follow:
                self._show_index(0)  # play again from the start
            self._playing = True
        elif kind == "pause":
            self._playing = False
        elif kind == "seek":
            self._show_index(self._index_at_or_before(req[1]))
        elif kind == "step":
            self._playing = False
            n = req[1]
            if n > 0:
                self._advance_to(self._head + n)
            elif n < 0:
                self._show_index(self._head - 1 + n)
        elif kind == "reprocess":
            self._show_index(self._head - 1)
        elif kind == "mark":
            req[1].set()

    def _chunk_at_head(self) -> FrameBlock | None:
        c = self._chunk
        if c is None or not (self._chunk_start <= self._head < self._chunk_start + len(c)):
            self._chunk_start = self._head
            self._chunk = c = self._read(self._head, min(self._n_frames, self._head + self.chunk_frames))
        return c if len(c) else None

    def _play_until(self, play_t: float) -> None:
        """Process every frame with device time <= ``play_t`` (chunk by chunk)."""
        while self._head < self._n_frames and not self._stop.is_set():
            c = self._chunk_at_head()
            if c is None:
                return
            stop = self._chunk_start + int(np.searchsorted(c.t_device_s, play_t, side="right"))
            if stop <= self._head:
                return
            self._advance_to(stop)
            if stop < self._chunk_start + len(c):
                return  # the clock is inside this chunk

    def _loop(self) -> None:
        last = time.monotonic()
        next_refresh = last + 0.25
        play_t = None  # device time the play clock has reached
        while not self._stop.is_set():
            try:
                req = self._requests.get(timeout=0.005 if self._playing else 0.1)
            except queue.Empty:
                req = None
            if req is not None:
                # a drag sends many seeks: only the newest matters
                pending = [req]
                while True:
                    try:
                        pending.append(self._requests.get_nowait())
                    except queue.Empty:
                        break
                last_seek = max((i for i, r in enumerate(pending) if r[0] == "seek"), default=-1)
                for i, r in enumerate(pending):
                    if r[0] == "mark" or (r[0] == "seek" and i != last_seek):
                        continue
                    self._handle(r)
                    play_t = None  # the clock restarts from the new head
                for r in pending:
                    if r[0] == "mark":
                        self._handle(r)
            now = time.monotonic()
            if self.follow and now >= next_refresh:
                next_refresh = now + 0.1
                self._update_extent()
            if not self._playing:
                last = now
                continue
            if play_t is None:
                play_t, last = self._head_t, now
            play_t += (now - last) * self._speed
            last = now
            if self.follow and self._t_last - self._head_t < _FOLLOW_EDGE_S:
                # at the growing end: stay a little behind the newest frame on disk, never further
                play_t = max(play_t, self._t_last - _FOLLOW_DELAY_S)
            if self._head < self._n_frames:
                self._play_until(play_t)
            elif self.follow:
                play_t = self._head_t  # at the end of a growing file: wait for frames
            else:
                self._playing = False
                play_t = None


# ----------------------------------------------------------------------------- command line


def add_virtual_source_arguments(parser) -> None:
    """Options of the built-in virtual finger for commands whose source defaults to it (main thread)."""
    from acquire.virtual.cli import add_finger_arguments

    add_finger_arguments(parser, title="built-in virtual finger (used without --port; simulated, for demos and tests)")


def virtual_options_from_args(args, rig: Rig) -> VirtualOptions:
    """The :class:`VirtualOptions` the parsed options ask for, checked against ``rig``.

    Raises
    ------
    UserError
        A bad value, a fault that does not fit the rig, or an unknown hold label or scenario (the message
        names the option).
    """
    from acquire.virtual.cli import finger_settings_from_args

    return VirtualOptions(**finger_settings_from_args(args, rig))
