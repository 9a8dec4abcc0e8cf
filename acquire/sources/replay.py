"""A recording played back into a :class:`~acquire.sources.feed.ViewFeed`.

Threads: one worker thread (a :class:`~acquire.threads.worker.Worker`) owns
the HDF5 file: it opens it, reads frames in chunks around the play head and
feeds them through the same numeric chain as a live session. The control
methods (play, pause, speed, seek, step, calibration, tare) may be called from
any thread (the GUI's); they only post requests to the worker, which applies
them in order.
"""
from __future__ import annotations

import math
import queue
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from acquire.core.calibration import load_for_rig
from acquire.errors import UserError
from acquire.link.frames import FrameBlock
from acquire.rig import Rig
from acquire.sources.feed import DisplayChain, ViewFeed
from acquire.threads.worker import Worker

__all__ = ["ReplaySource"]

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


class ReplaySource(Worker):
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
        super().__init__(name=f"replay {self.path.name}")
        self._cal_arg = calibration
        self.follow = bool(follow)
        self.window_s = float(window_s)
        self.chunk_frames = int(chunk_frames)
        self._requests: queue.Queue = queue.Queue()
        self._ready = threading.Event()
        self._open_error: UserError | None = None
        self._lock = threading.Lock()
        self.rig: Rig | None = None
        self.hello: dict = {}
        self.chain: DisplayChain | None = None
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
        self.start_thread()
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
        if self._open_error is not None:
            raise self._open_error

    def stop(self) -> None:
        """Stop the worker and close the file (waits up to 10 s)."""
        self.stop_thread(timeout_s=10.0)

    def on_stop_requested(self) -> None:
        self._requests.put(("wake",))

    def play(self) -> None:
        self._requests.put(("play",))

    def pause(self) -> None:
        self._requests.put(("pause",))

    def set_speed(self, speed: float) -> None:
        """Playback speed, 0.1x .. 20x."""
        speed = float(speed)
        if not 0.1 - 1e-9 <= speed <= 20.0 + 1e-9:
            raise UserError(f"speed {speed:g}: must be 0.1 .. 20")
        self._requests.put(("speed", speed))  # the worker owns the play clock

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
        return self.set_calibration(load_for_rig(path, self.rig))

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
            "position_index": self.position_index,
            "errors": [self.error] if self.error else [],
        }

    # -- worker thread ------------------------------------------------------------------------
    def run(self) -> None:
        try:
            t0 = time.perf_counter()
            self._open()
            self.open_time_s = time.perf_counter() - t0
        except BaseException as exc:
            self._open_error = exc if isinstance(exc, UserError) else UserError(f"{self.path}: cannot replay ({exc})")
            self.fail(str(self._open_error))
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
            cal = load_for_rig(cal, self.rig)
        if cal is None and rec.calibration_json is not None:
            from acquire.core.calibration import Calibration

            cal = Calibration.from_json(rec.calibration_json, source=f"{self.path}: calibration_json")
        if cal is None:  # a recording of the built-in virtual finger replays with its built-in calibration
            from acquire.virtual.builtin import builtin_calibration

            cal = builtin_calibration(self.rig, hello=self.hello)
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
        self.chain = DisplayChain(
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
        elif kind == "speed":
            self._speed = req[1]
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


