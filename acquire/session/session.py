"""One session: a device (or the built-in virtual finger) wired to everything that consumes it.

Every command that acquires (``record``, ``live``, ``health``) builds one
:class:`Session`; no command wires threads by hand. The session connects

    device (serial port or the virtual finger on a pty)
      -> SerialReader thread -> FrameRing
           ├─> Recorder thread -> HDF5 (and /derived with a calibration)
           ├─> ShapePublisher thread -> TCP clients
           └─> view processing thread -> ViewFeed (only with ``view=True``)

and reacts in one place to a reconnect or a device reboot: the reader marks
the ring there, and every consumer's :class:`~acquire.core.pipeline.Pipeline`
restarts its filters at that frame, so the window, the recording's /derived,
the shape stream and a later ``tapcurve process`` of the file agree.

Threads
-------
Every background thread is an :class:`~acquire.threads.worker.Worker`; a
failure in any of them is captured and shown by :meth:`Session.errors` and in
:meth:`Session.status`. :meth:`Session.start` and :meth:`Session.stop` run on
the main thread; the control methods (recording, labels, tare, calibration,
status) may be called from any thread, typically the GUI's.
"""
from __future__ import annotations

import json
import math
import threading
import time
from collections import deque
from pathlib import Path

import numpy as np

from acquire.errors import UserError
from acquire.link.frames import Event, FrameRing, RingCursor
from acquire.rig import Rig
from acquire.threads.worker import Worker

__all__ = ["Session", "load_calibration_for"]


def load_calibration_for(path, rig: Rig):
    """Load a calibration file and check it against ``rig`` (see :func:`acquire.core.calibration.load_for_rig`)."""
    from acquire.core.calibration import load_for_rig

    return load_for_rig(path, rig)


class _ViewProcessing(Worker):
    """The session's view thread: ring -> filters -> calibration -> feed."""

    def __init__(self, session: "Session"):
        super().__init__(name="view processing")
        self.session = session
        self.cursor: RingCursor = session.reader.ring.cursor()
        self.latency_s: deque = deque(maxlen=256)  # arrival -> processed, s

    def run(self) -> None:
        chain = self.session.chain
        max_frames = max(64, int(self.session.rate_hz))
        while not self.stopping:
            if not self.cursor.wait(0.05):
                continue
            block = self.cursor.read(max_frames=max_frames)
            if len(block) == 0:
                continue
            chain.process(block)  # restarts after a reconnect or reboot are in the block
            self.latency_s.append(time.monotonic() - float(block.t_host_s[-1]))


class Session:
    """A device (or the built-in virtual finger) read, processed, optionally recorded and published.

    Parameters
    ----------
    port : str or None
        Serial port (a device path or a pyserial URL such as
        ``socket://host:port``); None starts the built-in virtual finger in
        this process and reads it through its pseudo-terminal like any device.
    rig : Rig
    calibration : Calibration or None
    view : bool
        Run the view processing thread that fills :attr:`feed` (windows and
        headless ``live``); ``record`` runs without it.
    window_s : float
        History kept for the display's traces, s.
    record_path : path or None
        Start recording to this file at once (never overwritten).
    record_label : str or None
        With ``record_path``: mark the whole recording as one labelled interval.
    record_option : str
        The option that named the file, for messages (``--out``, ``--record``).
    record_duration_s : float or None
        Stop the recording after this many seconds' worth of frames at the
        device's rate (``record --duration``).
    publish : str or None
        ``HOST:PORT`` for the shape stream.
    publish_rate_hz : float or None
        At most this many stream messages per second to each client.
    allow_remote : bool
        Allow a non-loopback ``publish`` address.
    virtual_options : VirtualOptions or None
        For the virtual finger (ignored with a port).
    dense_points : bool
        Write /derived shape points every millimetre instead of only as dense as the
        calibrated curvature range needs (see :func:`acquire.core.pipeline.shape_spacing_m`).

    Raises
    ------
    UserError
        From :meth:`start`: port missing or busy, the device's channel count
        differs from the rig, the recording cannot be created, the stream
        address cannot be bound.
    """

    def __init__(
        self,
        *,
        port: str | None = None,
        rig: Rig,
        calibration=None,
        view: bool = True,
        window_s: float = 10.0,
        record_path=None,
        record_label: str | None = None,
        record_option: str = "--record",
        record_duration_s: float | None = None,
        publish: str | None = None,
        publish_rate_hz: float | None = None,
        allow_remote: bool = False,
        virtual_options=None,
        dense_points: bool = False,
    ):
        from acquire.sources.virtual import VirtualOptions

        self.port = port
        self.rig = rig
        self._initial_calibration = calibration
        self.view = bool(view)
        self.window_s = float(window_s)
        self.record_path = None if record_path is None else Path(record_path)
        self.record_label = record_label
        self.record_option = record_option
        self.record_duration_s = record_duration_s
        self.publish_address = publish
        self.publish_rate_hz = publish_rate_hz
        self.allow_remote = bool(allow_remote)
        self.dense_points = bool(dense_points)
        self.virtual_options = virtual_options or VirtualOptions()
        self.virtual = None
        self.reader = None
        self.chain = None
        self.processing: _ViewProcessing | None = None
        self.publisher = None
        self.recorder = None
        self._rec_lock = threading.RLock()
        self._label: tuple[int, str, float] | None = None  # (recorder id, text, t_start)
        self._labels_done: list[tuple[str, float, float]] = []
        self._finished_errors: list[str] = []
        self.notes: list[str] = []
        self.started = False

    # -- properties (any thread) -------------------------------------------------------
    @property
    def source_name(self) -> str:
        if self.port is not None:
            return self.port
        if self.rig.source == "built-in demo rig":
            return "built-in virtual finger (simulated)"
        return f"virtual finger (simulated) with the rig {self.rig.source}"

    @property
    def ring(self) -> FrameRing:
        return self.reader.ring

    @property
    def feed(self):
        """The :class:`~acquire.sources.feed.ViewFeed` a window reads (None without ``view``)."""
        return None if self.chain is None else self.chain.feed

    @property
    def rate_hz(self) -> float:
        return self.reader.rate_hz

    @property
    def adc_bits(self) -> int:
        return self.reader.adc_bits

    @property
    def s_m(self) -> np.ndarray:
        return self.reconstructor.s_m

    @property
    def reconstructor(self):
        if self.chain is not None:
            return self.chain.reconstructor
        from acquire.core.reconstruct import Reconstructor

        return Reconstructor.from_rig(self.rig)

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
    def start(self) -> "Session":
        """Open everything in an order that leaves nothing behind on failure.

        The inputs are checked before anything opens; the shape stream binds
        before the recording file is created, so a refused address leaves no
        file; a failure anywhere stops what was started.
        """
        from acquire.link.reader import SerialReader

        self._check_inputs()
        try:
            port = self.port if self.port is not None else self._start_virtual()
            self.reader = SerialReader(port=port)
            self.reader.start()
            self.rig.check_device(channels=self.reader.n_channels, where=f"device on {self.source_name}")
            if self.view:
                from acquire.sources.feed import DisplayChain

                self.chain = DisplayChain(
                    rig=self.rig, calibration=self._initial_calibration,
                    rate_hz=self.reader.rate_hz, adc_bits=self.reader.adc_bits, window_s=self.window_s,
                )
                self.processing = _ViewProcessing(self)
                self.processing.start_thread()
            if self.publish_address:
                self._start_publisher()
            if self.record_path is not None:
                dur = self.record_duration_s
                max_frames = None if dur is None else max(1, int(round(dur * self.reader.rate_hz)))
                self.start_recording(self.record_path, label=self.record_label, from_session_start=True,
                                     max_frames=max_frames)
        except BaseException:
            self.stop()
            raise
        self.started = True
        return self

    def _check_inputs(self) -> None:
        if self.record_path is not None:
            from acquire.store.outputs import check_output

            check_output(self.record_path, option=self.record_option, what="recording")
        if self.record_label is not None:
            from acquire.core.labels import check_label_text

            if self.record_path is None:
                raise UserError("--label marks a recording: give a file to record to as well")
            check_label_text(self.record_label)
        if self.publish_address:
            from acquire.serve.publish import check_address

            check_address(self.publish_address, allow_remote=self.allow_remote)

    def _start_virtual(self) -> str:
        from acquire.virtual import VirtualFinger

        vo = self.virtual_options
        if vo.faults is not None:
            vo.faults.check(self.rig)
        self.virtual = VirtualFinger(
            rig=self.rig, rate_hz=vo.rate_hz, seed=vo.seed, hold=vo.hold, scenario=vo.scenario, faults=vo.faults,
            strip=vo.strip, mechanics=vo.mechanics, max_tick_s=vo.max_chunk_s,
        )
        self.virtual.start()
        return self.virtual.path

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
            if self.processing is not None:
                self.processing.stop_thread(timeout_s=5.0)
            if self.reader is not None:
                self.reader.stop()
            if self.virtual is not None:
                try:
                    self.virtual.stop()
                except RuntimeError as exc:  # the device thread failed: say so, the file is closed already
                    self.notes.append(str(exc))
                self.virtual = None

    def __enter__(self) -> "Session":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # -- recording (any thread) ------------------------------------------------------------
    def start_recording(self, path, *, label: str | None = None, from_session_start: bool = False,
                        max_frames: int | None = None) -> Path:
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

        from acquire.store.outputs import check_output

        with self._rec_lock:
            if self.recorder is not None:
                raise UserError(f"already recording to {self.recorder.path}")
            path = check_output(path, option=self.record_option, what="recording")
            cal = self.calibration
            pipeline = None
            if cal is not None:
                from acquire.core.pipeline import Pipeline

                from acquire.core.pipeline import DENSE_SPACING_M, shape_spacing_m

                spacing_m = DENSE_SPACING_M if self.dense_points else shape_spacing_m(cal)
                pipeline = Pipeline(rig=self.rig, calibration=cal, rate_hz=self.rate_hz, adc_bits=self.adc_bits,
                                    spacing_m=spacing_m)
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
                max_frames=max_frames,
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
            if rec.error:
                self._finished_errors.append(rec.error)
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
        from acquire.core.labels import check_label_text

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
        notes = [] if self.chain is None else self.chain.set_calibration(calibration)
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
        if self.chain is None:
            raise UserError("cannot tare: this session has no view processing")
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
            max_rate_hz=self.publish_rate_hz,
        )
        self.publisher.start()

    # -- status (any thread) ---------------------------------------------------------------------
    def errors(self) -> list[str]:
        """Failures of the session's threads so far, one line each (any thread)."""
        workers = (self.reader, self.processing, self.publisher, self.recorder)
        out = [w.error for w in workers if w is not None and getattr(w, "error", None)]
        if self.virtual is not None and getattr(self.virtual, "error", None) is not None:
            out.append(f"virtual finger failed: {self.virtual.error}")
        return out + [e for e in self._finished_errors if e not in out]

    def measured_rate_hz(self, *, window_s: float = 2.0) -> float:
        """Frames per second received over the last ``window_s`` s of host time (any thread; NaN early on)."""
        reader = self.reader
        if reader is None or reader.ring is None:
            return math.nan
        block = reader.ring.latest(int(max(64, reader.rate_hz * (window_s + 1.0))))
        t = block.t_host_s
        recent = t[t >= time.monotonic() - window_s]
        if recent.shape[0] < 2 or recent[-1] - recent[0] <= 0.1 * window_s:
            return math.nan
        return (recent.shape[0] - 1) / float(recent[-1] - recent[0])

    def status(self) -> dict:
        """Counters and state for a status line (any thread)."""
        reader = self.reader
        c = reader.all_counters() if reader is not None else {}
        bad = {k[5:]: v for k, v in c.items() if k.startswith("drop_") and v}
        lat = sorted(self.processing.latency_s) if self.processing is not None else []
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
                "display_lost": 0 if self.processing is None else int(self.processing.cursor.lost_frames),
                "bad_packets": int(sum(bad.values())),
                "bad_by_cause": bad,
                "reconnects": int(c.get("reconnects", 0)),
                "reboots": int(c.get("reboots", 0)),
                "latency_s": lat[len(lat) // 2] if lat else math.nan,
                "calibration_source": None if self.calibration is None else self.calibration.source,
                "recording": None if rec is None else str(rec.path),
                "recording_bytes": 0 if rec is None else int(rec.file_bytes),
                "recording_frames": 0 if rec is None else int(rec.frames_written),
                "recorder_error": None if rec is None else rec.error,
                "label": self.open_label,
                "calibration": None if self.calibration is None else str(self.calibration.source),
                "reader_error": None if reader is None else reader.error,
                "errors": self.errors(),
                # the window replaces this with its own (it also knows its Held flat toggle)
                "flat_drift": None if self.chain is None else self.chain.drift.readout().as_status(),
            }
        return out


