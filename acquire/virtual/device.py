"""The virtual finger as a device on a real pseudo-terminal, speaking wire protocol v1.

One device thread (a :class:`~acquire.threads.worker.Worker`) owns the pty: it
reads host command lines, answers them, and while streaming generates frames
in chunks (paced by the wall clock times ``time_scale``), encodes them in bulk
and writes them through a bounded transmit buffer as a microcontroller would
(:mod:`acquire.virtual.link`). The host opens ``path``, a symlink that stays
put while the pty behind it comes and goes. The hello sent at boot usually
lands before a host opens the port, and pyserial flushes input on open: a
host asks ``HELLO?``.

The real strip's memory (:mod:`acquire.virtual.strip`) is one stream per
VirtualFinger, fed in frame order by the device thread (it lives on across
reboots: the strip is not the board). With ``markers_path`` a camera films the
finger's true shape while it streams (:mod:`acquire.virtual.camera`).
"""
from __future__ import annotations

import math
import os
import select
import shutil
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import firmware_protocol as fp

from acquire.core.memory_ops import LOOP_MAX as SHORT_CHUNK_FRAMES
from acquire.errors import UserError
from acquire.rig import Rig, load_rig
from acquire.threads.worker import Worker
from acquire.virtual.camera import Camera, CameraSettings, MarkerWriter
from acquire.virtual.link import FATE_DROP, FATE_NAMES, FATE_OVERFLOW, PtyLink
from acquire.virtual.model import SCENARIOS, Faults, FingerModel, check_hold_label
from acquire.virtual.strip import StripSettings
from acquire.virtual.truth import DEMO_TEXT, DEVICE_NAME, TruthWriter

__all__ = ["VirtualFinger", "DEVICE_NAME", "FATE_NAMES"]

_FIRMWARE = "tapcurve-virtual 1.0 (simulated)"
_MIN_RATE_HZ = 0.1
_MAX_CHUNK = 8192  # frames generated at most per pass
_MAX_LAG_S = 1.0  # a generator this far behind (wall s) skips ahead
_CODES_KEPT = 1 << 18  # frames of codes kept per boot for truth_for (the real strip cannot be replayed)


@dataclass
class _Segment:
    """Frames first .. (next segment's first - 1) of one boot: frame i is at
    device time t0_s + (i - first) / rate_hz, made by ``model``."""

    first: int
    t0_s: float
    rate_hz: float
    model: FingerModel


class VirtualFinger(Worker):
    """A simulated sensor board on a pseudo-terminal.

    Parameters (keyword-only)
    -------------------------
    rig : Rig, optional
        Default: the built-in demo rig. Sets channels and electrics.
    rate_hz : float
        Sample rate at boot (``RATE`` changes it until the next boot).
    adc_bits, seed, hold, scenario, noise_lsb
        Passed to :class:`FingerModel`.
    faults : Faults, optional
        Electrical faults act in the model; ``corrupt_rate``, ``drop_rate``,
        ``vanish_every_s`` and ``outage_s`` act on the link here.
    strip : StripSettings, optional
        The strip's creep, hysteresis and drift (default: a real strip);
        ``StripSettings(mode="ideal")`` gives the static law alone.
    mechanics : dict, optional
        More :class:`FingerModel` keywords (``bending_stiffness_nm2``,
        ``actuation_gain_nm_per_kpa``, ``pressure_kpa``).
    time_scale : float
        Device seconds per wall second (> 1: time stamps advance at the
        nominal rate, frames leave faster).
    link_path : str or Path, optional
        Where the stable symlink is made (default: in a new temp directory,
        removed on stop).
    truth_path : str or Path, optional
        HDF5 file that receives per-frame ground truth as it goes.
    markers_path : str or Path, optional
        New marker CSV the camera fills while the device streams; complete
        and closed at :meth:`stop`. Must not exist.
    camera : CameraSettings, optional
        The camera's clock, pose and imperfections (default: the defaults).
    tx_buffer_bytes : int
        Transmit buffer; whole sample packets that do not fit are dropped.
    tick_s, max_tick_s : float
        Shortest and longest generation period while streaming (wall s); at
        high frame rates the period grows to hold about 256 frames, up to
        ``max_tick_s``. A real device's USB link delivers every millisecond;
        20 ms chunks keep the simulation's own cost low (benchmarks of a
        60 Hz window ask for 8 ms, so every redraw has a new frame).

    Thread use: the public methods may be called from any thread; the pty,
    the model evaluation, the strip's state, the truth and marker files belong
    to the device thread.
    """

    def __init__(self, *, rig: Rig | None = None, rate_hz: float = 1000.0, adc_bits: int = 12, seed: int = 0,
                 faults: Faults | None = None, hold: str | None = None, scenario: str = "grasp",
                 strip: StripSettings | None = None, mechanics: dict | None = None, time_scale: float = 1.0,
                 link_path=None, truth_path=None, markers_path=None, camera: CameraSettings | None = None,
                 tx_buffer_bytes: int = 65536, tick_s: float = 0.005, max_tick_s: float = 0.02,
                 max_rate_hz: float = 50000.0,
                 noise_lsb: float = 1.2, clock_start_s: float = 0.0):
        super().__init__(name="virtual-finger")
        self.rig = rig if rig is not None else load_rig(None)
        self.faults = faults if faults is not None else Faults()
        self.max_rate_hz = float(max_rate_hz)
        rate_hz = float(rate_hz)
        if not _MIN_RATE_HZ <= rate_hz <= self.max_rate_hz:
            raise UserError(f"rate_hz {rate_hz:g}: must be {_MIN_RATE_HZ:g}..{self.max_rate_hz:g} Hz")
        if not (time_scale > 0 and math.isfinite(time_scale)):
            raise UserError(f"time_scale {time_scale!r}: must be a positive number")
        if scenario not in SCENARIOS:
            raise UserError(f"scenario {scenario!r} is not known (known: {', '.join(SCENARIOS)})")
        if 11 + 2 * self.rig.n_channels > 253:
            raise UserError(f"{self.rig.source}: the virtual finger sends at most 121 channels")
        if hold is not None:
            check_hold_label(hold)
        if not (clock_start_s >= 0 and math.isfinite(clock_start_s)):
            raise UserError(f"clock_start_s {clock_start_s!r}: must be a number >= 0")
        self.boot_rate_hz = rate_hz
        self.time_scale = float(time_scale)
        self.seed = int(seed)
        self.scenario = scenario
        self.tick_s = float(tick_s)
        self.max_tick_s = float(max_tick_s)
        self.strip_settings = (strip if strip is not None else StripSettings()).check()
        # what the device's microsecond counter reads at boot (it wraps at 2**32 us, 71.6 min)
        self._clock_start_us = int(round(clock_start_s * 1e6))
        self._base_model = FingerModel(rig=self.rig, seed=seed, adc_bits=adc_bits, scenario=scenario, hold=hold,
                                       faults=self.faults, noise_lsb=noise_lsb, **(mechanics or {}))
        self._real_strip = self._base_model.real_strip(self.strip_settings) if self.strip_settings.real else None
        self._hold = self._base_model.hold
        self._tx_buffer_bytes = int(tx_buffer_bytes)
        self._own_dir = None
        self._link = None if link_path is None else _checked_link(Path(link_path))
        self._truth_path = None if truth_path is None else _checked_new(Path(truth_path), exist_ok=True)
        self._markers_path = None if markers_path is None else _checked_new(Path(markers_path), exist_ok=False)
        self._camera = Camera(camera or CameraSettings(seed=self.seed), rig=self.rig) if markers_path else None
        self._lock = threading.Condition()
        self._counters = {
            "frames_generated": 0, "frames_sent": 0, "frames_dropped_tx": 0, "frames_late": 0,
            "frames_skipped_late": 0, "frames_lost_outage": 0, "packets_corrupted": 0,
            "packets_dropped": 0, "boots": 0, "vanishes": 0, "commands": 0, "command_errors": 0,
            "hellos_sent": 0, "bytes_sent": 0, "bytes_received": 0, "cpu_s": 0.0, "camera_frames": 0,
        }
        self._segments: dict[int, list[_Segment]] = {}
        self._codes_log: dict[int, list] = {}
        self._requests: list = []
        self._ready = threading.Event()
        self._gone = threading.Event()
        self._port_up = False
        self._port_name = None
        self._boot = 0
        self._started = False
        self._wake_r, self._wake_w = -1, -1

    # ------------------------------------------------------------------ public

    @property
    def path(self) -> str:
        """The stable symlink the host opens (valid after :meth:`start`)."""
        if self._link is None:
            raise RuntimeError("the virtual finger is not started")
        return str(self._link)

    @property
    def port_name(self) -> str | None:
        """The pty behind :attr:`path` now, or None while the port is away."""
        with self._lock:
            return self._port_name

    @property
    def model(self) -> FingerModel:
        """The finger's model (as booted: no hold change, run = first boot)."""
        return self._base_model.with_run(1)

    @property
    def boot(self) -> int:
        """Boot counter: 1 after start, +1 per rebooting vanish."""
        with self._lock:
            return self._boot

    @property
    def counters(self) -> dict:
        """A snapshot of the device's counters.

        ``frames_generated`` (made, all fates), ``frames_sent`` (queued for
        the wire, corrupted ones included), ``frames_dropped_tx`` (no room in
        the transmit buffer), ``packets_dropped`` (the drop_rate fault),
        ``packets_corrupted``, ``frames_late`` (status bit 0 set: sampled
        more than two generation periods plus one frame period behind the
        wall clock), ``frames_skipped_late`` (over 1 s behind: never made, a
        gap in seq), ``frames_lost_outage`` (sampled while the port was away
        without a reboot), ``boots``, ``vanishes``, ``commands``,
        ``command_errors``, ``hellos_sent``, ``bytes_sent``,
        ``bytes_received``, ``cpu_s`` (device thread CPU time),
        ``camera_frames`` (marker rows written).
        """
        with self._lock:
            return dict(self._counters)

    def start(self) -> "VirtualFinger":
        """Start the device thread; returns when the port exists (RuntimeError if it failed to)."""
        if self._started:
            raise RuntimeError("a VirtualFinger starts once; make a new one")
        self._started = True
        if self._link is None:
            self._own_dir = tempfile.mkdtemp(prefix="tapcurve-virtual-")
            self._link = Path(self._own_dir) / "finger"
        self._wake_r, self._wake_w = os.pipe()
        os.set_blocking(self._wake_r, False)
        os.set_blocking(self._wake_w, False)
        self.start_thread()
        if not self._ready.wait(30.0) or self.error is not None:  # a hang limit, generous for a loaded machine
            error = self.error
            self.error = None
            self._cleanup(timeout_s=5.0)
            raise RuntimeError(f"virtual finger failed to start: {error}")
        return self

    def stop(self, *, timeout_s: float = 10.0) -> None:
        """Stop the thread, close the pty, the truth and marker files, remove the symlink.

        Raises RuntimeError if the device thread had failed (or did not stop in time).
        """
        self._cleanup(timeout_s=timeout_s)
        if self.error is not None:
            raise RuntimeError(f"the virtual finger's device thread failed: {self.error}")

    def _cleanup(self, *, timeout_s: float) -> None:
        if self._thread is not None:
            self.stop_thread(timeout_s=timeout_s)
        for fd in (self._wake_r, self._wake_w):
            if fd >= 0:
                os.close(fd)
        self._wake_r = self._wake_w = -1
        if self._own_dir is not None:
            shutil.rmtree(self._own_dir, ignore_errors=True)
            self._own_dir = None

    def __enter__(self) -> "VirtualFinger":
        return self.start()

    def __exit__(self, exc_type, exc, tb) -> None:
        self.stop()

    def set_hold(self, label: str | None) -> None:
        """Press the finger onto a jig or hold a force (label grammar: :mod:`acquire.core.labels`), or
        release it (None). Takes effect from the next generated frame.

        Raises UserError for a bad label (in the caller's thread).
        """
        if label is not None:
            check_hold_label(label)
        self._request(("hold", label))

    def vanish(self, *, outage_s: float, reboot: bool = True, timeout_s: float = 5.0) -> None:
        """Make the port disappear now; it returns at the same path after
        ``outage_s`` wall seconds. With ``reboot`` the device comes back as a
        rebooted board: hello again, seq and device clock from 0, not
        streaming. Returns once the port is gone.
        """
        if not outage_s >= 0:
            raise ValueError(f"outage_s must be >= 0, got {outage_s!r}")
        self._gone.clear()
        self._request(("vanish", float(outage_s), bool(reboot)))
        if not self._gone.wait(timeout_s):
            raise TimeoutError("the virtual finger did not take its port away in time")

    def wait_ready(self, *, boot: int | None = None, timeout_s: float = 5.0) -> bool:
        """Wait until the port is there (and, with ``boot``, the device has
        booted at least that often). Returns False on timeout."""
        deadline = time.monotonic() + timeout_s
        with self._lock:
            while not (self._port_up and (boot is None or self._boot >= boot)):
                left = deadline - time.monotonic()
                if left <= 0 or self.error is not None:
                    return False
                self._lock.wait(min(left, 0.1))
            return True

    def truth_for(self, boot: int, seq) -> dict:
        """Ground truth of frames of one boot.

        Parameters
        ----------
        boot : int
            Boot number (1 = first).
        seq : array-like of int
            Unwrapped sequence numbers, counted from 0 at that boot.

        Returns
        -------
        dict
            As :meth:`FingerModel.truth` plus ``codes`` (N, C): the codes the
            device made for these frames (kept for the last 2**18 frames of
            each boot; older ones are recomputed with the ideal strip, exact
            only with ``strip`` ideal). Arrays owned by the caller.
        """
        seq = np.atleast_1d(np.asarray(seq, dtype=np.int64))
        with self._lock:
            segs = list(self._segments.get(int(boot), ()))
            log = list(self._codes_log.get(int(boot), ()))
        if not segs:
            raise KeyError(f"no frames were made in boot {boot}")
        if seq.size and seq.min() < 0:
            raise ValueError("seq must not be negative")
        firsts = np.array([s.first for s in segs])
        which = np.maximum(np.searchsorted(firsts, seq, side="right") - 1, 0)
        out = None
        for w in np.unique(which).tolist():
            sel = np.flatnonzero(which == w)
            seg = segs[w]
            t = seg.t0_s + (seq[sel] - seg.first) / seg.rate_hz
            tr = seg.model.truth(t)
            tr["codes"] = seg.model.codes(t, frame_index=seq[sel])
            if out is None:
                out = {k: np.empty((seq.shape[0],) + v.shape[1:], dtype=v.dtype) for k, v in tr.items()}
            for key, value in tr.items():
                out[key][sel] = value
        _fill_logged_codes(out["codes"], seq, log)
        return out

    # ------------------------------------------------------------------ plumbing

    def on_stop_requested(self) -> None:
        self._wake()

    def _wake(self) -> None:
        if self._wake_w >= 0:
            try:
                os.write(self._wake_w, b"x")
            except (BlockingIOError, OSError):
                pass  # a full pipe wakes the thread just as well

    def _request(self, item) -> None:
        with self._lock:
            self._requests.append(item)
        self._wake()

    def _count(self, **deltas) -> None:
        with self._lock:
            for key, value in deltas.items():
                self._counters[key] += value

    # ------------------------------------------------------------------ device thread

    def run(self) -> None:
        """The device thread: boot, open the port, serve until stopped (failures land in :attr:`error`)."""
        self._truth = self._markers = None
        self._port = PtyLink(self._link, tx_buffer_bytes=self._tx_buffer_bytes,
                             packet_bytes=11 + 2 * self.rig.n_channels + 2, count=self._count)
        try:
            if self._truth_path is not None:
                self._truth = TruthWriter(self._truth_path, self)
            if self._markers_path is not None:
                self._markers = MarkerWriter(self._markers_path, self._camera)
            self._strip = None if self._real_strip is None else self._real_strip.stream(
                rate_hz=self.boot_rate_hz, max_chunk_frames=SHORT_CHUNK_FRAMES)
            self._camera_t0 = 0.0  # device time of this boot on the camera's (continuous) time line
            self._boot_device()
            self._open_port()
            self._ready.set()
            self._loop()
        finally:
            self._ready.set()
            self._close_all()

    def _close_all(self) -> None:
        try:
            self._close_port()
        finally:
            try:
                if self._truth is not None:
                    self._truth.close()
            finally:
                if self._markers is not None:
                    self._markers.close()
                with self._lock:
                    self._counters["cpu_s"] = time.thread_time()
                    self._lock.notify_all()

    def _boot_device(self) -> None:
        """Power-on state: clock and seq from 0, not streaming, boot rate."""
        with self._lock:
            self._boot += 1
            self._counters["boots"] += 1
            boot = self._boot
            self._segments[boot] = []
            self._codes_log[boot] = []
        if boot > 1:
            self._camera_t0 += self._device_now()
        self._boot_wall = time.monotonic()
        self._model = self._base_model.with_run(boot).with_hold(self._hold)
        self._rate_hz = self.boot_rate_hz
        self._streaming = False
        self._next_frame = 0  # frames made in this boot (the next seq, unwrapped)
        self._seg = None
        self._seg_done = 0  # frames made in the current segment
        self._port.reset_buffers()
        self._rng = np.random.default_rng([self.seed, boot, 0x71E])
        self._hello_due = True

    def _open_port(self) -> None:
        name = self._port.open()
        with self._lock:
            self._port_up = True
            self._port_name = name
            self._lock.notify_all()
        if self._hello_due:
            self._hello_due = False
            self._port.send_control(fp.Hello(self._hello_info()))

    def _close_port(self) -> None:
        with self._lock:
            self._port_up = False
            self._port_name = None
        self._port.close()

    def _hello_info(self) -> dict:
        rate = self._rate_hz
        info = {
            "protocol": fp.PROTOCOL_VERSION, "firmware": _FIRMWARE, "adc_bits": self._base_model.adc_bits,
            "channels": self.rig.n_channels, "rate_hz": int(rate) if float(rate).is_integer() else rate,
            "device": DEVICE_NAME, "demo": DEMO_TEXT, "serial": f"VF-{self.seed & 0xFFFF:04X}",
            "boot": self._boot, "scenario": self.scenario, "hold": self._hold, "rig": self.rig.name,
            "time_scale": self.time_scale, "strip": self.strip_settings.mode,
        }
        injected = {k: v for k, v in self.faults.as_dict().items() if v != getattr(Faults(), k)}
        if injected:
            info["simulated_faults"] = injected
        return info

    def _device_now(self) -> float:
        return (time.monotonic() - self._boot_wall) * self.time_scale

    def _loop(self) -> None:
        poller = select.poll()
        poller.register(self._wake_r, select.POLLIN)
        registered = -1
        next_tick = time.monotonic()
        while not self.stopping:
            if registered != self._port.master:
                if registered >= 0:
                    try:
                        poller.unregister(registered)
                    except KeyError:
                        pass
                poller.register(self._port.master, select.POLLIN)
                registered = self._port.master
            self._handle_requests()
            if self.stopping:
                break
            if self._port.master != registered:
                continue  # a vanish replaced the port
            now = time.monotonic()
            every = self.faults.vanish_every_s
            if every is not None and now - self._port.since >= every:
                self._vanish(float(self.faults.outage_s), True)
                continue
            if self._streaming and now >= next_tick:
                self._generate()
                next_tick = now + self._tick()
            self._port.flush()
            if self._truth is not None:
                self._truth.maybe_flush()
            poller.modify(self._port.master, select.POLLIN | (select.POLLOUT if self._port.tx else 0))
            wait = 0.1 if not self._streaming else max(0.0, next_tick - time.monotonic())
            if every is not None:
                wait = min(wait, max(0.0, self._port.since + every - time.monotonic()))
            self._poll(poller, wait)
            with self._lock:
                self._counters["cpu_s"] = time.thread_time()

    def _poll(self, poller, wait_s: float) -> None:
        for fd, ev in poller.poll(wait_s * 1000.0):
            if fd == self._wake_r:
                try:
                    while os.read(self._wake_r, 4096):
                        pass
                except BlockingIOError:
                    pass
            elif ev & select.POLLIN:
                for line in self._port.read_lines():
                    self._command(line)

    def _handle_requests(self) -> None:
        with self._lock:
            items, self._requests = self._requests, []
        for item in items:
            if item[0] == "hold":
                self._set_hold(item[1])
            elif item[0] == "vanish":
                self._vanish(item[1], item[2])

    def _set_hold(self, label) -> None:
        self._hold = label
        self._model = self._base_model.with_run(self._boot).with_hold(self._hold)
        if self._streaming:
            self._new_segment(continuous=True)

    def _vanish(self, outage_s: float, reboot: bool) -> None:
        if self._truth is not None:
            self._truth.flush()
        self._close_port()
        self._count(vanishes=1)
        self._gone.set()
        back = time.monotonic() + outage_s
        while not self.stopping:
            left = back - time.monotonic()
            if left <= 0:
                break
            self._stop.wait(min(left, 0.05))
            with self._lock:
                pending = [r for r in self._requests if r[0] == "hold"]
                self._requests = [r for r in self._requests if r[0] != "hold"]
            for item in pending:
                self._hold = item[1]
                self._model = self._base_model.with_run(self._boot).with_hold(self._hold)
        if self.stopping:
            return
        if reboot:
            self._boot_device()
        else:
            # the board kept sampling while its port was away: those frames are gone
            self._port.tx.clear()
            if self._streaming:
                due = self._frames_due()
                self._seg_done += due
                self._next_frame += due
                self._count(frames_lost_outage=due)
        self._open_port()

    def _new_segment(self, *, continuous: bool) -> None:
        if continuous and self._seg is not None:
            t0 = self._seg.t0_s + self._seg_done / self._seg.rate_hz
        else:
            t0 = self._device_now()
        self._seg = _Segment(self._next_frame, t0, self._rate_hz, self._model)
        self._seg_done = 0
        if self._strip is not None:
            self._strip.set_rate(self._rate_hz)
        with self._lock:
            self._segments[self._boot].append(self._seg)

    def _tick(self) -> float:
        """Generation period, wall s: chunks of about 256 frames keep the
        per-chunk overhead small at high rates without much latency."""
        return min(self.max_tick_s, max(self.tick_s, 256.0 / (self._rate_hz * self.time_scale)))

    def _frames_due(self) -> int:
        """Frames of the current segment whose sample time has come."""
        elapsed = self._device_now() - self._seg.t0_s
        return max(0, int(math.floor(elapsed * self._seg.rate_hz)) + 1 - self._seg_done)

    def _generate(self) -> None:
        due = self._frames_due()
        if due <= 0:
            return
        wall_period = 1.0 / (self._seg.rate_hz * self.time_scale)
        if (due - 1) * wall_period > _MAX_LAG_S:
            # too far behind to catch up: those samples are never taken
            skip = due - max(1, int(0.1 / wall_period))
            self._seg_done += skip
            self._next_frame += skip
            self._port.overflow_pending = True
            self._count(frames_skipped_late=skip)
            due -= skip
        while due > 0:
            n = min(due, _MAX_CHUNK)
            self._make_frames(n, wall_period)
            due -= n

    def _make_frames(self, n: int, wall_period: float) -> None:
        seg = self._seg
        frame = np.arange(self._next_frame, self._next_frame + n, dtype=np.int64)
        t = seg.t0_s + np.arange(self._seg_done, self._seg_done + n, dtype=np.float64) / seg.rate_hz
        codes = seg.model.codes(t, frame_index=frame, strip=self._strip)
        self._log_codes(frame[0], codes)
        # lateness of each sample in wall seconds; batching by tick is the normal
        lag = (self._device_now() - t) / self.time_scale
        status = np.where(lag > 2.0 * self._tick() + wall_period, fp.STATUS_LATE, 0).astype(np.uint8)
        fate = np.zeros(n, dtype=np.uint8)
        if self.faults.drop_rate > 0:
            fate[self._rng.random(n) < self.faults.drop_rate] = FATE_DROP
        sent, n_corrupt = self._port.queue_samples(
            np.flatnonzero(fate == 0), frame=frame, t_us=np.rint(t * 1e6).astype(np.int64) + self._clock_start_us,
            status=status, codes=codes, fate=fate, corrupt_rate=self.faults.corrupt_rate, rng=self._rng)
        if self._truth is not None:
            self._truth.append(self._boot, frame, t, seg.model, codes, status, fate)
        if self._markers is not None:
            # the camera films on its own time line, which goes on across reboots
            rows = self._markers.film(_Shifted(seg.model, self._camera_t0), self._camera_t0 + t[0],
                                      self._camera_t0 + t[-1] + 1.0 / seg.rate_hz)
            self._count(camera_frames=rows)
        self._next_frame += n
        self._seg_done += n
        self._count(
            frames_generated=n, frames_sent=sent,
            frames_dropped_tx=int(np.count_nonzero(fate == FATE_OVERFLOW)),
            packets_dropped=int(np.count_nonzero(fate == FATE_DROP)),
            packets_corrupted=int(n_corrupt), frames_late=int(np.count_nonzero(status & fp.STATUS_LATE)),
        )

    def _log_codes(self, first: int, codes: np.ndarray) -> None:
        with self._lock:
            log = self._codes_log[self._boot]
            log.append((int(first), codes))
            while sum(c.shape[0] for _, c in log) - log[0][1].shape[0] >= _CODES_KEPT:
                log.pop(0)

    def _command(self, line: bytes | None) -> None:
        self._count(commands=1)
        if line is None:
            self._count(command_errors=1)
            self._port.send_control(fp.Reply("ERR line too long"))
            return
        try:
            word, arg = fp.parse_command(line)
        except fp.CommandError as exc:
            self._count(command_errors=1)
            self._port.send_control(fp.Reply(f"ERR {exc}"))
            return
        if word == "HELLO?":
            self._port.send_control(fp.Hello(self._hello_info()))
        elif word == "START":
            if not self._streaming:
                self._streaming = True
                self._new_segment(continuous=False)
            self._port.send_control(fp.Reply("OK START"))
        elif word == "STOP":
            self._streaming = False
            self._port.send_control(fp.Reply("OK STOP"))
        elif word == "RATE":
            self._set_rate(arg)

    def _set_rate(self, arg: float) -> None:
        if not _MIN_RATE_HZ <= arg <= self.max_rate_hz:
            self._count(command_errors=1)
            self._port.send_control(fp.Reply(f"ERR rate {arg:g} Hz out of range {_MIN_RATE_HZ:g}..{self.max_rate_hz:g}"))
            return
        self._rate_hz = float(arg)
        if self._streaming:
            self._new_segment(continuous=True)
        text = f"{int(arg)}" if float(arg).is_integer() else f"{arg:g}"
        self._port.send_control(fp.Reply(f"OK RATE {text}"))


class _Shifted:
    """A model seen on the camera's time line: ``shape(t)`` of the model at ``t - offset``."""

    def __init__(self, model: FingerModel, offset_s: float):
        self._model, self._offset, self.rig = model, float(offset_s), model.rig

    def shape(self, t_s):
        return self._model.shape(np.asarray(t_s) - self._offset)


def _fill_logged_codes(codes: np.ndarray, seq: np.ndarray, log: list) -> None:
    """Overwrite ``codes`` rows with the codes the device made, where they are still kept."""
    for first, block in log:
        sel = np.flatnonzero((seq >= first) & (seq < first + block.shape[0]))
        if sel.size:
            codes[sel] = block[seq[sel] - first]


def _checked_link(link: Path) -> Path:
    if not link.parent.is_dir():
        raise UserError(f"{link}: folder {link.parent} does not exist")
    if link.exists() and not link.is_symlink():
        raise UserError(f"{link}: exists and is not a symlink; will not replace it")
    return link


def _checked_new(path: Path, *, exist_ok: bool) -> Path:
    if not path.parent.is_dir():
        raise UserError(f"{path}: folder {path.parent} does not exist")
    if not exist_ok and os.path.lexists(path):
        raise UserError(f"{path}: exists; will not write over it")
    return path
