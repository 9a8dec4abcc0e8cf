"""The HDF5 recorder: one writer thread owns the file.

Frames come from the reader's ring through the recorder's own cursor; the
file is created with every dataset in place, switched to SWMR mode, and
flushed every ``flush_interval_s`` so that a killed process loses at most
that much and readers can follow the file while it grows.
"""
from __future__ import annotations

import fcntl
import math
import os
import queue
import resource
import threading
import time
from pathlib import Path
from typing import Callable

import h5py
import numpy as np

from acquire.link.clock import ClockFit
from acquire.errors import UserError
from acquire.threads.worker import Worker
from acquire.link.frames import EventLog, FrameRing
from acquire.store.recording import COUNTER_NAMES, EVENT_TEXT_BYTES, LIBVER, check_label_text, create_derived, pack_xy, create_layout

__all__ = ["Recorder"]


def _append(ds: h5py.Dataset, values: np.ndarray) -> None:
    n = ds.shape[0]
    ds.resize(n + values.shape[0], axis=0)
    ds[n:] = values


class Recorder(Worker):
    """Writes one recording from a :class:`FrameRing`.

    Device time in the file counts from the file's first frame; label times
    given to :meth:`begin_label`, :meth:`end_label` and :meth:`add_label` are
    in the session's device time (the ring's ``t_device_s``) and are shifted
    the same way.

    Parameters
    ----------
    path : path
        The file to create; an existing file is never overwritten.
    ring : FrameRing
        The reader's ring.
    rig_toml, device_hello : str
        Stored as root attributes.
    channel_names : sequence of str
    events : EventLog, optional
        Link events (disconnects, reboots, notes) to store in /events.
    counters : callable returning dict, optional
        Called from the writer thread at each flush; stored in /counters.
    pipeline : object with ``process(FrameBlock)`` and ``s_m``, optional
        With a calibration: /derived is written as frames arrive.
    calibration_json : str, optional
    label : str, optional
        Marks the whole recording as one labelled interval.
    flush_interval_s : float
        At most this much data is lost if the process is killed.
    max_frames : int, optional
        Write at most this many frames; ``reached_max`` is set then.
    from_oldest : bool
        Start at the oldest frame the ring still holds (a recording started
        with the session: nothing is missed) or, if False, at the newest (a
        recording started later, from a button: it begins at the click).

    Attributes
    ----------
    error : str or None
        Set (one line) when writing failed; recording stopped, the file holds
        everything up to the failure, acquisition is not affected.
    """

    def __init__(
        self,
        *,
        path: str | Path,
        ring: FrameRing,
        rig_toml: str,
        device_hello: str,
        channel_names,
        events: EventLog | None = None,
        counters: Callable[[], dict] | None = None,
        pipeline=None,
        calibration_json: str | None = None,
        label: str | None = None,
        flush_interval_s: float = 0.25,
        n_segments: int | None = None,
        max_frames: int | None = None,
        from_oldest: bool = True,
    ):
        super().__init__(name=f"recorder {Path(path).name}")
        self.path = Path(path)
        self.ring = ring
        self.rig_toml = rig_toml
        self.device_hello = device_hello
        self.channel_names = list(channel_names)
        self.events = events
        self.counters = counters
        self.pipeline = pipeline
        self.calibration_json = calibration_json
        self.flush_interval_s = float(flush_interval_s)
        self.n_segments = n_segments
        self.label = label
        self.max_frames = max_frames
        self.from_oldest = bool(from_oldest)
        self.reached_max = threading.Event()
        if label is not None:
            check_label_text(label)
        self.frames_written = 0
        self.file_bytes = 0
        self._cursor = None
        self._first_position = 0
        self._event_index = events.count if events is not None else 0
        self._labels: queue.Queue = queue.Queue()
        self._open_labels: dict[int, int] = {}  # label id -> row
        self._next_label_id = 0
        self._label_id_lock = threading.Lock()
        self._derived_tail = _WholeChunks()  # begin_label may be called from any thread
        self._last_t_device_s = math.nan
        self._t0_host = 0.0
        self._finished = threading.Event()
        self._lock_fd: int | None = None
        self._t_dev0: float | None = None
        self._derived_points = 0
        self._clock = ClockFit()
        self._clean_stop = False
        self._frame_bytes = 2 * ring.n_channels + 8 + 8 + 8 + 1

    # -- control (any thread) ---------------------------------------------------------
    def start(self) -> None:
        """Create the file and start the writer thread.

        Raises
        ------
        UserError
            The file exists or cannot be created.
        """
        if self.path.exists():
            raise UserError(f"{self.path}: exists; tapcurve never overwrites a recording (choose another --out)")
        parent = self.path.parent
        if not parent.is_dir():
            raise UserError(f"{self.path}: folder {parent} does not exist")
        # the file is laid out under a hidden name and appears under its own only once it is in
        # SWMR mode: a recorder killed before that leaves no half-made recording behind
        starting = self.path.with_name(f".{self.path.name}.{os.getpid()}.starting")
        try:
            # 'w-' fails if the file appeared meanwhile; HDF5 locks it while we write
            self._file = h5py.File(starting, "w-", libver=LIBVER)
        except (OSError, FileExistsError) as exc:
            raise UserError(f"{self.path}: cannot create ({exc})") from None
        f = self._file
        try:
            create_layout(
                f,
                n_channels=self.ring.n_channels,
                channel_names=self.channel_names,
                rig_toml=self.rig_toml,
                device_hello=self.device_hello,
                calibration_json=self.calibration_json,
            )
            if self.pipeline is not None and getattr(self.pipeline, "s_m", None) is not None:
                self._derived_points = create_derived(
                    f,
                    n_segments=int(self.n_segments or self.pipeline.rig.n_segments),
                    s_m=self.pipeline.s_m,
                    tap_index=self.pipeline.reconstructor.tap_index,
                    **_derived_options(self.pipeline),
                )
            f.swmr_mode = True
            # HDF5 drops its own file lock once SWMR writing starts; ours tells
            # readers (open_recording) that a writer is alive, so they never
            # "repair" a file that is still being written
            self._lock_fd = os.open(starting, os.O_RDONLY)
            fcntl.flock(self._lock_fd, fcntl.LOCK_SH | fcntl.LOCK_NB)  # shared: SWMR readers lock too
            try:
                os.link(starting, self.path)  # never replaces a file that appeared meanwhile
            except FileExistsError:
                raise UserError(f"{self.path}: exists; tapcurve never overwrites a recording") from None
            starting.unlink()
        except BaseException:
            f.close()
            if self._lock_fd is not None:
                os.close(self._lock_fd)
                self._lock_fd = None
            starting.unlink(missing_ok=True)
            raise
        self._cursor = self.ring.cursor(from_oldest=self.from_oldest)
        self._first_position = self._cursor.position
        # host time counts from the file's creation, or from its first frame if that came earlier
        first = self.ring.t_host_at(self._first_position)
        self._t0_host = time.monotonic() if first is None else min(time.monotonic(), first)
        if self.label is not None:
            self.begin_label(self.label, t_start_s=self.FILE_START)
        self.start_thread()

    def stop(self, *, timeout_s: float = 30.0) -> None:
        """Write what the ring still holds, close the file, end the thread."""
        self.stop_thread(timeout_s=timeout_s)

    def wait_finished(self, timeout_s: float) -> bool:
        return self._finished.wait(timeout_s)

    #: a label time meaning "the file's first frame"
    FILE_START = object()

    def begin_label(self, text: str, *, t_start_s: float | None = None) -> int:
        """Open a labelled interval (device time; default: the newest frame). Returns its id."""
        check_label_text(text)
        with self._label_id_lock:
            label_id = self._next_label_id
            self._next_label_id += 1
        self._labels.put(("begin", label_id, text, t_start_s))
        return label_id

    def end_label(self, label_id: int, *, t_end_s: float | None = None) -> None:
        """Close a labelled interval opened with :meth:`begin_label`."""
        self._labels.put(("end", label_id, None, t_end_s))

    def add_label(self, text: str, *, t_start_s: float, t_end_s: float) -> None:
        """Store a complete labelled interval (device time, s)."""
        check_label_text(text)
        label_id = self.begin_label(text, t_start_s=t_start_s)
        self.end_label(label_id, t_end_s=t_end_s)

    # -- writer thread ----------------------------------------------------------------------
    def run(self) -> None:
        f = self._file
        next_flush = time.monotonic() + self.flush_interval_s
        try:
            while True:
                # sleep until the next flush: frames wait in the ring meanwhile
                stopping = self._stop.wait(max(0.0, next_flush - time.monotonic()))
                now = time.monotonic()
                if now >= next_flush or stopping:
                    self._write_pending(f)
                    f.flush()
                    self.file_bytes = self.path.stat().st_size
                    next_flush = now + self.flush_interval_s
                if stopping:
                    break
        except _NoRoom as exc:
            self._clean_stop = True  # nothing failed: the file can be closed normally
            self.fail(
                f"recording to {self.path} stopped: {exc}; the file holds the "
                f"{self.frames_written} frames before that"
            )
        except Exception as exc:  # disk full, file removed, I/O error: stop recording only
            text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            self.fail(f"recording to {self.path} stopped: {text}")
        finally:
            try:
                if self.error is None or self._clean_stop:
                    if self.error is None or self._tail_fits(f):
                        self._derived_tail.flush(f)
                    self._close_labels(f)
                f.close()
            except Exception as exc:
                self.fail(f"recording to {self.path}: closing failed: {exc}")
            finally:
                if self._lock_fd is not None:
                    os.close(self._lock_fd)  # releases the lock
                    self._lock_fd = None
            try:
                self.file_bytes = self.path.stat().st_size
            except OSError:
                pass
            self._finished.set()

    def _room_problem(self, f: h5py.File, pending_frames: int) -> str | None:
        """Why the next flush might not fit (disk nearly full, file size limit), or None.

        A write that fails half way can leave HDF5 metadata pointing past the
        end of the file, so the recorder stops *before* that, with the file
        closed cleanly. Room needed: what the next flush can write, see
        :func:`_flush_bytes`.
        """
        need = _flush_bytes(f, pending_frames, held=self._derived_tail)
        size = self.path.stat().st_size
        soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
        if soft != resource.RLIM_INFINITY and size + need > soft:
            return f"the file size limit ({soft / 1e6:.2f} MB) is reached"
        st = os.statvfs(self.path.parent)
        free = st.f_bavail * st.f_frsize
        if free < need:
            return f"the disk is nearly full ({free / 1e6:.1f} MB free)"
        return None

    def _tail_fits(self, f: h5py.File) -> bool:
        """After a stop for room: whether the /derived rows held in memory fit (else they are left out)."""
        need = _METADATA_BYTES + self._derived_tail.bytes_held()
        soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
        size = self.path.stat().st_size
        if soft != resource.RLIM_INFINITY and size + need > soft:
            return False
        st = os.statvfs(self.path.parent)
        return st.f_bavail * st.f_frsize >= need

    def _write_pending(self, f: h5py.File) -> None:
        pending = self._cursor.pending
        problem = self._room_problem(f, pending)
        fits = pending
        if problem is not None:
            # write what still fits (the most frames whose flush fits), then stop
            lo, hi = 0, pending
            while lo < hi:
                mid = (lo + hi + 1) // 2
                if self._room_problem(f, mid) is None:
                    lo = mid
                else:
                    hi = mid - 1
            fits = lo
            if fits == 0:
                raise _NoRoom(problem)
        block = self._cursor.read(max_frames=fits)
        if self.max_frames is not None:
            room = self.max_frames - self.frames_written
            if len(block) >= room:
                block = block.slice(0, max(room, 0))
                self.reached_max.set()
        raw = f["raw"]
        n = len(block)
        if n:
            t_host = block.t_host_s - self._t0_host
            if self._t_dev0 is None:
                # device time in the file counts from the file's first frame, whenever it was started
                self._t_dev0 = float(block.t_device_s[0])
            t_dev = block.t_device_s - self._t_dev0
            _append(raw["adc"], block.codes)
            _append(raw["seq"], block.seq)
            _append(raw["t_device_s"], t_dev)
            _append(raw["t_host_s"], t_host)
            _append(raw["status"], block.status)
            if "derived" in f:
                out = self.pipeline.process(block)
                held = self._derived_tail
                held.append(f["derived"]["curvature"], np.asarray(out.curvature_per_m, dtype=np.float32))
                held.append(f["derived"]["xy"], pack_xy(out.xy_m[:, : self._derived_points]))
                _append_optional(f["derived"], out, n, append=held.append)
            self.frames_written += n
            self._last_t_device_s = float(t_dev[-1])
            point = self._clock.add_batch(t_dev, t_host)
            if point is not None:
                drift_ppm, offset_s = self._clock.estimate()
                g = f["clock"]
                _append(g["t_device_s"], np.array([point[0]]))
                _append(g["offset_s"], np.array([point[1]]))
                _append(g["fit_drift_ppm"], np.array([drift_ppm]))
                _append(g["fit_offset_s"], np.array([offset_s]))
        self._write_labels(f)
        self._write_events(f)
        self._write_counters(f)
        if problem is not None:
            raise _NoRoom(problem)

    def _write_labels(self, f: h5py.File) -> None:
        g = f["labels"]
        while True:
            try:
                op, label_id, text, t = self._labels.get_nowait()
            except queue.Empty:
                break
            if op == "begin":
                row = g["text"].shape[0]
                t0 = self._file_time(t)
                _append(g["text"], np.array([text.encode("utf-8")], dtype=g["text"].dtype))
                _append(g["t_start_s"], np.array([0.0 if math.isnan(t0) else t0]))
                _append(g["t_end_s"], np.array([math.nan]))
                self._open_labels[label_id] = row
            else:
                row = self._open_labels.pop(label_id, None)
                if row is not None:
                    g["t_end_s"][row] = self._file_time(t)
        # an open interval ends, for now, at the newest frame: a killed recorder leaves it that long
        for row in self._open_labels.values():
            if not math.isnan(self._last_t_device_s):
                g["t_end_s"][row] = self._last_t_device_s

    def _file_time(self, t_session_s) -> float:
        """A label time given in the session's device time, in the file's (first frame = 0)."""
        if t_session_s is None:
            return self._last_t_device_s
        if t_session_s is self.FILE_START:
            return 0.0
        return float(t_session_s) - (self._t_dev0 or 0.0)

    def _close_labels(self, f: h5py.File) -> None:
        self._write_labels(f)
        self._open_labels.clear()

    def _write_events(self, f: h5py.File) -> None:
        if self.events is None:
            return
        new, self._event_index = self.events.since(self._event_index)
        if not new:
            return
        g = f["events"]
        tb = g["text"].dtype
        _append(g["t_host_s"], np.array([e.t_host_s - self._t0_host for e in new]))
        _append(g["frame"], np.array([e.frame_index - self._first_position for e in new], dtype=np.int64))
        _append(g["kind"], np.array([e.kind.encode()[:16] for e in new], dtype=g["kind"].dtype))
        _append(g["text"], np.array([_clip_utf8(e.text, EVENT_TEXT_BYTES) for e in new], dtype=tb))

    def _write_counters(self, f: h5py.File) -> None:
        values = dict(self.counters()) if self.counters is not None else {}
        values["ring_lost_frames"] = self._cursor.lost_frames
        row = np.array([[int(values.get(name, 0)) for name in COUNTER_NAMES]], dtype=np.int64)
        g = f["counters"]
        _append(g["t_host_s"], np.array([time.monotonic() - self._t0_host]))
        _append(g["values"], row)


def _derived_options(pipeline) -> dict:
    """What /derived holds besides the shape: the force with a force model, the actuation with a rig channel."""
    cal = pipeline.calibration
    act = getattr(pipeline.rig, "actuation", None)
    return {"with_force": cal is not None and cal.force_model is not None,
            "actuation_unit": None if act is None else act.unit}


def _append_optional(g: h5py.Group, out, n: int, *, append=None) -> None:
    """Append the force and actuation of ``n`` processed frames to the datasets /derived has (NaN if missing)."""
    append = append or _append
    for name, width in (("force_n", (2,)), ("actuation", ())):
        if name in g:
            value = getattr(out, name)
            append(g[name], np.full((n, *width), np.nan, np.float32) if value is None
                   else np.asarray(value, dtype=np.float32))


class _WholeChunks:
    """Appends to compressed datasets in whole chunks only; the tail waits in memory until it fills one.

    A compressed chunk rewritten at every flush leaves its older copies as
    unreclaimed space in a file written in SWMR mode (measured: the file grew
    2.5 times the stored data), so /derived, which ``tapcurve process`` can
    recompute from /raw at any time, is written a chunk at a time (a few
    seconds at 1 kHz); /raw keeps its 0.25 s flushes. Writer thread only.
    """

    def __init__(self):
        self._tail: dict[str, np.ndarray] = {}

    def append(self, ds: h5py.Dataset, values: np.ndarray) -> None:
        tail = self._tail.get(ds.name)
        data = values if tail is None or tail.shape[0] == 0 else np.concatenate([tail, values])
        whole = (data.shape[0] // ds.chunks[0]) * ds.chunks[0]
        if whole:
            _append(ds, data[:whole])
        self._tail[ds.name] = data[whole:]

    def rows_held(self, name: str) -> int:
        tail = self._tail.get(name)
        return 0 if tail is None else int(tail.shape[0])

    def bytes_held(self) -> int:
        """Bytes the held rows take as whole chunks, uncompressed (a bound for writing them)."""
        return sum(int(t.nbytes) for t in self._tail.values())

    def flush(self, f: h5py.File) -> None:
        """Write what waits (at the end of the recording)."""
        for name, tail in self._tail.items():
            if tail.shape[0]:
                _append(f[name], tail)
        self._tail.clear()


#: room for metadata a flush may add (B-tree nodes, heap growth), bytes (common practice, no source)
_METADATA_BYTES = 64 << 10
#: frames-per-flush datasets; the others get at most a row or a few per flush
_FRAME_GROUPS = ("raw", "derived")


def _flush_bytes(f: h5py.File, pending_frames: int, held: "_WholeChunks | None" = None) -> int:
    """Most bytes the next flush can add to the file: every chunk it writes, whole and uncompressed.

    For the per-frame datasets (/raw, /derived) that is the partly filled last
    chunk (rewritten) and the new chunks ``pending_frames`` rows need; for the
    others one chunk each; plus :data:`_METADATA_BYTES`.
    """
    total = _METADATA_BYTES

    def add(name: str, obj) -> None:
        nonlocal total
        if not isinstance(obj, h5py.Dataset) or obj.chunks is None or obj.maxshape[0] is not None:
            return
        rows = obj.chunks[0]
        chunk_bytes = int(np.prod(obj.chunks)) * obj.dtype.itemsize
        if name.split("/")[0] == "derived" and held is not None:
            # written through _WholeChunks: only the chunks the held rows and the new ones complete
            total += ((held.rows_held(obj.name) + pending_frames) // rows) * chunk_bytes
        elif name.split("/")[0] in _FRAME_GROUPS:
            n0 = obj.shape[0]
            touched = -(-(n0 + pending_frames) // rows) - n0 // rows
            total += max(1, touched) * chunk_bytes
        else:
            total += chunk_bytes

    f.visititems(add)
    return total


class _NoRoom(Exception):
    """Not enough room for the next flush."""


def _clip_utf8(text: str, n_bytes: int) -> bytes:
    data = text.encode("utf-8")[:n_bytes]
    return data.decode("utf-8", errors="ignore").encode("utf-8")
