"""The virtual finger as a device on a real pseudo-terminal, speaking wire protocol v1.

One device thread owns the pty: it reads host command lines, answers them,
and while streaming generates frames in chunks (paced by the wall clock times
``time_scale``), encodes them in bulk and writes them through a bounded
transmit buffer as a microcontroller would. The host opens ``path``, a
symlink that stays put while the pty behind it comes and goes.

The device keeps its own fd of the pty's slave side open, so the master
never sees EIO while no host has the port open; bytes written then wait in
the pty (and, once it is full, the transmit buffer drops whole packets as a
board's would). The hello sent at boot usually lands before a host opens the
port, and pyserial flushes input on open: a host asks ``HELLO?``.
"""
from __future__ import annotations

import datetime
import errno
import json
import math
import os
import select
import shutil
import tempfile
import threading
import time
import tty
from dataclasses import dataclass
from pathlib import Path

import numpy as np

import firmware_protocol as fp

from acquire.errors import UserError
from acquire.rig import Rig, load_rig
from acquire.core.labels import parse_hold_label
from acquire.virtual.model import SCENARIOS, Faults, FingerModel

__all__ = ["VirtualFinger", "DEVICE_NAME", "FATE_NAMES"]

#: the ``device`` key of the hello
DEVICE_NAME = "virtual finger (demo)"
_FIRMWARE = "tapcurve-virtual 1.0 (simulated)"
_DEMO = "one finger of a greenhouse tomato-picking gripper (made up for the demo)"
#: what became of each generated frame (truth file ``fate`` values)
FATE_NAMES = ("sent", "corrupted on the wire", "dropped on the wire", "dropped: transmit buffer full")
_FATE_SENT, _FATE_CORRUPT, _FATE_DROP, _FATE_OVERFLOW = range(4)

_MIN_RATE_HZ = 0.1
_MAX_LINE = 200  # a command line longer than this is noise
_MAX_CHUNK = 8192  # frames generated at most per pass
_MAX_LAG_S = 1.0  # a generator this far behind (wall s) skips ahead


@dataclass
class _Segment:
    """Frames first .. (next segment's first - 1) of one boot: frame i is at
    device time t0_s + (i - first) / rate_hz, made by ``model``."""

    first: int
    t0_s: float
    rate_hz: float
    model: FingerModel


class VirtualFinger:
    """A simulated sensor board on a pseudo-terminal.

    Parameters (keyword-only)
    -------------------------
    rig : Rig, optional
        Default: the built-in demo rig. Sets channels and electrics.
    rate_hz : float
        Sample rate at boot (``RATE`` changes it until the next boot).
    adc_bits, seed, hold, scenario
        Passed to :class:`FingerModel`.
    faults : Faults, optional
        Electrical faults act in the model; ``corrupt_rate``, ``drop_rate``,
        ``vanish_every_s`` and ``outage_s`` act on the link here.
    time_scale : float
        Device seconds per wall second (> 1: time stamps advance at the
        nominal rate, frames leave faster).
    link_path : str or Path, optional
        Where the stable symlink is made (default: in a new temp directory,
        removed on stop).
    truth_path : str or Path, optional
        HDF5 file that receives per-frame ground truth as it goes.
    tx_buffer_bytes : int
        Transmit buffer; whole sample packets that do not fit are dropped.
    tick_s : float
        Shortest generation period while streaming (wall s); at high frame
        rates the period grows to hold about 256 frames, at most 20 ms.

    Thread use: the public methods may be called from any thread; the pty,
    the model evaluation and the truth file belong to the device thread.
    """

    def __init__(
        self,
        *,
        rig: Rig | None = None,
        rate_hz: float = 1000.0,
        adc_bits: int = 12,
        seed: int = 0,
        faults: Faults | None = None,
        hold: str | None = None,
        scenario: str = "grasp",
        time_scale: float = 1.0,
        link_path: str | os.PathLike | None = None,
        truth_path: str | os.PathLike | None = None,
        tx_buffer_bytes: int = 65536,
        tick_s: float = 0.005,
        max_rate_hz: float = 50000.0,
        noise_lsb: float = 1.2,
        clock_start_s: float = 0.0,
    ):
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
            parse_hold_label(hold)
        self.boot_rate_hz = rate_hz
        self.time_scale = float(time_scale)
        self.seed = int(seed)
        self.scenario = scenario
        self.tx_buffer_bytes = int(tx_buffer_bytes)
        self.tick_s = float(tick_s)
        if not (clock_start_s >= 0 and math.isfinite(clock_start_s)):
            raise UserError(f"clock_start_s {clock_start_s!r}: must be a number >= 0")
        # what the device's microsecond counter reads at boot (it wraps at 2**32 us, 71.6 min)
        self._clock_start_us = int(round(clock_start_s * 1e6))
        self._base_model = FingerModel(
            rig=self.rig, seed=seed, adc_bits=adc_bits, scenario=scenario, hold=hold,
            faults=self.faults, noise_lsb=noise_lsb,
        )
        self._hold = self._base_model.hold
        self._pkt_len = 11 + 2 * self.rig.n_channels + 2  # COBS adds one byte, plus the 0x00

        self._own_dir = None
        if link_path is None:
            self._link = None
        else:
            link = Path(link_path)
            if not link.parent.is_dir():
                raise UserError(f"{link}: folder {link.parent} does not exist")
            if link.exists() and not link.is_symlink():
                raise UserError(f"{link}: exists and is not a symlink; will not replace it")
            self._link = link
        self._truth_path = None if truth_path is None else Path(truth_path)
        if self._truth_path is not None and not self._truth_path.parent.is_dir():
            raise UserError(f"{self._truth_path}: folder {self._truth_path.parent} does not exist")

        self._lock = threading.Condition()
        self._counters = {
            "frames_generated": 0, "frames_sent": 0, "frames_dropped_tx": 0, "frames_late": 0,
            "frames_skipped_late": 0, "frames_lost_outage": 0, "packets_corrupted": 0,
            "packets_dropped": 0, "boots": 0, "vanishes": 0, "commands": 0, "command_errors": 0,
            "hellos_sent": 0, "bytes_sent": 0, "bytes_received": 0, "cpu_s": 0.0,
        }
        self._segments: dict[int, list[_Segment]] = {}
        self._requests: list = []
        self._thread = None
        self._stop = threading.Event()
        self._ready = threading.Event()
        self._gone = threading.Event()
        self._error: BaseException | None = None
        self._port_up = False
        self._port_name = None
        self._boot = 0
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
        ``bytes_received``, ``cpu_s`` (device thread CPU time).
        """
        with self._lock:
            return dict(self._counters)

    @property
    def error(self) -> BaseException | None:
        """What stopped the device thread, if it failed."""
        return self._error

    def start(self) -> "VirtualFinger":
        """Start the device thread; returns when the port exists."""
        if self._thread is not None or self._stop.is_set():
            raise RuntimeError("a VirtualFinger starts once; make a new one")
        if self._link is None:
            self._own_dir = tempfile.mkdtemp(prefix="tapcurve-virtual-")
            self._link = Path(self._own_dir) / "finger"
        self._wake_r, self._wake_w = os.pipe()
        os.set_blocking(self._wake_r, False)
        os.set_blocking(self._wake_w, False)
        self._thread = threading.Thread(target=self._run, name="virtual-finger", daemon=True)
        self._thread.start()
        if not self._ready.wait(10.0) or self._error is not None:
            self.stop()
            raise RuntimeError(f"virtual finger failed to start: {self._error!r}")
        return self

    def stop(self, *, timeout_s: float = 10.0) -> None:
        """Stop the thread, close the pty and the truth file, remove the symlink.

        Raises RuntimeError if the device thread had failed.
        """
        if self._thread is not None:
            self._stop.set()
            self._wake()
            self._thread.join(timeout_s)
            self._thread = None
        for fd in (self._wake_r, self._wake_w):
            if fd >= 0:
                os.close(fd)
        self._wake_r = self._wake_w = -1
        if self._own_dir is not None:
            shutil.rmtree(self._own_dir, ignore_errors=True)
            self._own_dir = None
        if self._error is not None:
            raise RuntimeError("the virtual finger's device thread failed") from self._error

    def __enter__(self) -> "VirtualFinger":
        return self.start()

    def __exit__(self, exc_type, exc, tb) -> None:
        self.stop()

    def set_hold(self, label: str | None) -> None:
        """Press the finger onto a jig (label grammar: :mod:`acquire.core.labels`), or
        release it (None). Takes effect from the next generated frame.

        Raises UserError for a bad label (in the caller's thread).
        """
        if label is not None:
            parse_hold_label(label)
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
                if left <= 0 or self._error is not None:
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
            As :meth:`FingerModel.truth` (``t_device_s``, ``curvature_per_m``,
            ``tip_xy_m``, ``moment_nm``, ``load_n``) plus ``codes`` (N, C): the
            codes the device made for these frames. Arrays owned by the caller.
        """
        seq = np.atleast_1d(np.asarray(seq, dtype=np.int64))
        with self._lock:
            segs = list(self._segments.get(int(boot), ()))
        if not segs:
            raise KeyError(f"no frames were made in boot {boot}")
        if seq.size and seq.min() < 0:
            raise ValueError("seq must not be negative")
        firsts = np.array([s.first for s in segs])
        which = np.searchsorted(firsts, seq, side="right") - 1
        which = np.maximum(which, 0)
        parts = {}
        order = []
        for w in np.unique(which).tolist():
            sel = np.flatnonzero(which == w)
            seg = segs[w]
            t = seg.t0_s + (seq[sel] - seg.first) / seg.rate_hz
            tr = seg.model.truth(t)
            tr["codes"] = seg.model.codes(t, frame_index=seq[sel])
            parts[w] = (sel, tr)
            order.append(w)
        n = seq.shape[0]
        out = {}
        for key, value in parts[order[0]][1].items():
            out[key] = np.empty((n,) + value.shape[1:], dtype=value.dtype)
        for sel, tr in parts.values():
            for key, value in tr.items():
                out[key][sel] = value
        return out

    # ------------------------------------------------------------------ plumbing

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

    def _run(self) -> None:
        self._master = self._slave = -1
        self._truth = None
        try:
            if self._truth_path is not None:
                self._truth = _TruthWriter(self._truth_path, self)
            self._boot_device()
            self._open_port()
            self._ready.set()
            self._loop()
        except BaseException as exc:  # reported by stop()
            self._error = exc
            self._ready.set()
        finally:
            try:
                self._close_port()
            finally:
                if self._truth is not None:
                    self._truth.close()
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
        self._boot_wall = time.monotonic()
        self._model = self._base_model.with_run(boot).with_hold(self._hold)
        self._rate_hz = self.boot_rate_hz
        self._streaming = False
        self._next_frame = 0  # frames made in this boot (the next seq, unwrapped)
        self._seg = None
        self._seg_done = 0  # frames made in the current segment
        self._tx = bytearray()
        self._rx = bytearray()
        self._overflow_pending = False
        self._rng = np.random.default_rng([self.seed, boot, 0x71E])
        self._hello_due = True

    def _open_port(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(master, False)
        name = os.ttyname(slave)
        tmp = self._link.with_name(f".{self._link.name}.{os.getpid()}.tmp")
        try:
            tmp.unlink()
        except FileNotFoundError:
            pass
        os.symlink(name, tmp)
        os.replace(tmp, self._link)
        self._master, self._slave = master, slave
        self._port_since = time.monotonic()
        with self._lock:
            self._port_up = True
            self._port_name = name
            self._lock.notify_all()
        if self._hello_due:
            self._hello_due = False
            self._send_control(fp.Hello(self._hello_info()))

    def _close_port(self) -> None:
        with self._lock:
            self._port_up = False
            self._port_name = None
        try:
            if self._link is not None and self._link.is_symlink():
                self._link.unlink()
        except FileNotFoundError:
            pass
        for fd in (self._master, self._slave):
            if fd >= 0:
                os.close(fd)
        self._master = self._slave = -1

    def _hello_info(self) -> dict:
        rate = self._rate_hz
        info = {
            "protocol": fp.PROTOCOL_VERSION,
            "firmware": _FIRMWARE,
            "adc_bits": self._base_model.adc_bits,
            "channels": self.rig.n_channels,
            "rate_hz": int(rate) if float(rate).is_integer() else rate,
            "device": DEVICE_NAME,
            "demo": _DEMO,
            "serial": f"VF-{self.seed & 0xFFFF:04X}",
            "boot": self._boot,
            "scenario": self.scenario,
            "hold": self._hold,
            "rig": self.rig.name,
            "time_scale": self.time_scale,
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
        while not self._stop.is_set():
            if registered != self._master:
                if registered >= 0:
                    try:
                        poller.unregister(registered)
                    except KeyError:
                        pass
                poller.register(self._master, select.POLLIN)
                registered = self._master
            self._handle_requests()
            if self._stop.is_set():
                break
            if self._master != registered:
                continue  # a vanish replaced the port
            now = time.monotonic()
            every = self.faults.vanish_every_s
            if every is not None and now - self._port_since >= every:
                self._vanish(float(self.faults.outage_s), True)
                continue
            if self._streaming and now >= next_tick:
                self._generate()
                next_tick = now + self._tick()
            self._flush_tx()
            if self._truth is not None:
                self._truth.maybe_flush()
            mask = select.POLLIN | (select.POLLOUT if self._tx else 0)
            poller.modify(self._master, mask)
            wait = 0.1 if not self._streaming else max(0.0, next_tick - time.monotonic())
            if every is not None:
                wait = min(wait, max(0.0, self._port_since + every - time.monotonic()))
            for fd, ev in poller.poll(wait * 1000.0):
                if fd == self._wake_r:
                    try:
                        while os.read(self._wake_r, 4096):
                            pass
                    except BlockingIOError:
                        pass
                elif ev & select.POLLIN:
                    self._read_commands()
            with self._lock:
                self._counters["cpu_s"] = time.thread_time()

    def _handle_requests(self) -> None:
        with self._lock:
            items, self._requests = self._requests, []
        for item in items:
            if item[0] == "hold":
                self._hold = item[1]
                self._model = self._base_model.with_run(self._boot).with_hold(self._hold)
                if self._streaming:
                    self._new_segment(continuous=True)
            elif item[0] == "vanish":
                self._vanish(item[1], item[2])

    def _vanish(self, outage_s: float, reboot: bool) -> None:
        if self._truth is not None:
            self._truth.flush()
        self._close_port()
        self._count(vanishes=1)
        self._gone.set()
        back = time.monotonic() + outage_s
        while not self._stop.is_set():
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
        if self._stop.is_set():
            return
        if reboot:
            self._boot_device()
        else:
            # the board kept sampling while its port was away: those frames are gone
            self._tx.clear()
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
        with self._lock:
            self._segments[self._boot].append(self._seg)

    def _tick(self) -> float:
        """Generation period, wall s: chunks of about 256 frames keep the
        per-chunk overhead small at high rates without much latency."""
        return min(0.02, max(self.tick_s, 256.0 / (self._rate_hz * self.time_scale)))

    def _frames_due(self) -> int:
        """Frames of the current segment whose sample time has come."""
        elapsed = self._device_now() - self._seg.t0_s
        return max(0, int(math.floor(elapsed * self._seg.rate_hz)) + 1 - self._seg_done)

    def _generate(self) -> None:
        due = self._frames_due()
        if due <= 0:
            return
        seg = self._seg
        wall_period = 1.0 / (seg.rate_hz * self.time_scale)
        lag_wall = (due - 1) * wall_period
        if lag_wall > _MAX_LAG_S:
            # too far behind to catch up: those samples are never taken
            skip = due - max(1, int(0.1 / wall_period))
            self._seg_done += skip
            self._next_frame += skip
            self._overflow_pending = True
            self._count(frames_skipped_late=skip)
            due -= skip
        while due > 0:
            n = min(due, _MAX_CHUNK)
            self._make_frames(n, wall_period)
            due -= n

    def _make_frames(self, n: int, wall_period: float) -> None:
        seg = self._seg
        frame = np.arange(self._next_frame, self._next_frame + n, dtype=np.int64)
        local = np.arange(self._seg_done, self._seg_done + n, dtype=np.float64)
        t = seg.t0_s + local / seg.rate_hz
        codes = seg.model.codes(t, frame_index=frame)
        # lateness of each sample in wall seconds; batching by tick is the normal
        lag = (self._device_now() - t) / self.time_scale
        status = np.where(lag > 2.0 * self._tick() + wall_period, fp.STATUS_LATE, 0).astype(np.uint8)
        fate = np.zeros(n, dtype=np.uint8)
        f = self.faults
        if f.drop_rate > 0:
            fate[self._rng.random(n) < f.drop_rate] = _FATE_DROP
        keep = np.flatnonzero(fate == 0)
        sent, n_corrupt = self._queue(keep, frame, t, status, codes, fate)
        if self._truth is not None:
            self._truth.append(self._boot, frame, t, seg.model, codes, status, fate)
        self._next_frame += n
        self._seg_done += n
        self._count(
            frames_generated=n, frames_sent=sent,
            frames_dropped_tx=int(np.count_nonzero(fate == _FATE_OVERFLOW)),
            packets_dropped=int(np.count_nonzero(fate == _FATE_DROP)),
            packets_corrupted=int(n_corrupt), frames_late=int(np.count_nonzero(status & fp.STATUS_LATE)),
        )

    def _queue(self, keep, frame, t, status, codes, fate) -> tuple[int, int]:
        """Put packets ``keep`` into the transmit buffer, draining it into the
        pty between pieces as a UART drains while the next sample is taken.
        What finds no room is dropped (fate 3) and flags the next packet sent.
        Returns (packets queued, packets corrupted)."""
        f = self.faults
        pos = 0
        n_corrupt = 0
        while pos < keep.size:
            self._flush_tx()
            room = max(0, self.tx_buffer_bytes - len(self._tx)) // self._pkt_len
            if room == 0:
                break
            part = keep[pos : pos + room]
            pos += part.size
            if self._overflow_pending:
                status[part[0]] |= fp.STATUS_TX_OVERFLOW
                self._overflow_pending = False
            wire = fp.encode_samples_bulk(
                seq=frame[part], t_us=np.rint(t[part] * 1e6).astype(np.int64) + self._clock_start_us,
                status=status[part], codes=codes[part],
            )
            if f.corrupt_rate > 0:
                hit = np.flatnonzero(self._rng.random(part.size) < f.corrupt_rate)
                if hit.size:
                    buf = np.frombuffer(bytearray(wire), dtype=np.uint8).reshape(part.size, self._pkt_len)
                    for row in hit.tolist():
                        k = int(self._rng.integers(1, 4))
                        where = self._rng.integers(0, self._pkt_len, k)
                        buf[row, where] ^= self._rng.integers(1, 256, k).astype(np.uint8)
                    wire = buf.tobytes()
                    fate[part[hit]] = _FATE_CORRUPT
                    n_corrupt += hit.size
            self._tx += wire
        if pos < keep.size:
            fate[keep[pos:]] = _FATE_OVERFLOW
            self._overflow_pending = True
        return pos, n_corrupt

    def _send_control(self, packet) -> None:
        # replies and hellos are always queued: they are small and rare
        self._tx += fp.encode_packet(packet)
        if isinstance(packet, fp.Hello):
            self._count(hellos_sent=1)
        self._flush_tx()

    def _flush_tx(self) -> None:
        while self._tx and self._master >= 0:
            try:
                n = os.write(self._master, self._tx[:65536])
            except BlockingIOError:
                return
            except OSError as exc:
                if exc.errno in (errno.EIO, errno.EAGAIN):
                    return
                raise
            if n <= 0:
                return
            del self._tx[:n]
            self._count(bytes_sent=n)

    def _read_commands(self) -> None:
        try:
            data = os.read(self._master, 4096)
        except (BlockingIOError, InterruptedError):
            return
        except OSError as exc:
            if exc.errno == errno.EIO:
                return
            raise
        if not data:
            return
        self._count(bytes_received=len(data))
        self._rx += data
        while True:
            nl = self._rx.find(b"\n")
            if nl < 0:
                break
            line = bytes(self._rx[:nl]).strip()
            del self._rx[: nl + 1]
            if line:
                self._command(line)
        if len(self._rx) > _MAX_LINE:
            self._rx.clear()
            self._count(commands=1, command_errors=1)
            self._send_control(fp.Reply("ERR line too long"))

    def _command(self, line: bytes) -> None:
        self._count(commands=1)
        try:
            word, arg = fp.parse_command(line)
        except fp.CommandError as exc:
            self._count(command_errors=1)
            self._send_control(fp.Reply(f"ERR {exc}"))
            return
        if word == "HELLO?":
            self._send_control(fp.Hello(self._hello_info()))
        elif word == "START":
            if not self._streaming:
                self._streaming = True
                self._new_segment(continuous=False)
            self._send_control(fp.Reply("OK START"))
        elif word == "STOP":
            self._streaming = False
            self._send_control(fp.Reply("OK STOP"))
        elif word == "RATE":
            if not _MIN_RATE_HZ <= arg <= self.max_rate_hz:
                self._count(command_errors=1)
                self._send_control(fp.Reply(
                    f"ERR rate {arg:g} Hz out of range {_MIN_RATE_HZ:g}..{self.max_rate_hz:g}"))
                return
            self._rate_hz = float(arg)
            if self._streaming:
                self._new_segment(continuous=True)
            text = f"{int(arg)}" if float(arg).is_integer() else f"{arg:g}"
            self._send_control(fp.Reply(f"OK RATE {text}"))


class _TruthWriter:
    """Per-frame ground truth into a chunked HDF5 file (device thread only)."""

    def __init__(self, path: Path, dev: VirtualFinger):
        import h5py

        self._f = h5py.File(path, "w")
        f = self._f
        s = dev.rig.n_segments
        c = dev.rig.n_channels
        f.attrs["layout"] = "tapcurve-virtual-truth"
        f.attrs["layout_version"] = 1
        f.attrs["created_utc"] = datetime.datetime.now(datetime.timezone.utc).isoformat()
        f.attrs["device"] = DEVICE_NAME
        f.attrs["demo"] = _DEMO
        f.attrs["scenario"] = dev.scenario
        f.attrs["seed"] = dev.seed
        f.attrs["time_scale"] = dev.time_scale
        f.attrs["rig_toml"] = dev.rig.text
        f.attrs["faults_json"] = json.dumps(dev.faults.as_dict())
        f.attrs["fate_names"] = json.dumps(list(FATE_NAMES))
        specs = {
            "boot": ("i4", (), None),
            "seq": ("i8", (), None),
            "t_device_s": ("f8", (), "s"),
            "curvature_per_m": ("f8", (s,), "1/m"),
            "tip_xy_m": ("f8", (2,), "m"),
            "moment_nm": ("f8", (), "N m"),
            "load_n": ("f8", (), "N"),
            "hold_curvature_per_m": ("f4", (), "1/m"),
            "codes": ("u2", (c,), None),
            "status": ("u1", (), None),
            "fate": ("u1", (), None),
        }
        self._ds = {}
        for name, (dtype, tail, units) in specs.items():
            ds = f.create_dataset(name, shape=(0,) + tail, maxshape=(None,) + tail, dtype=dtype,
                                  chunks=(4096,) + tail)
            if units:
                ds.attrs["units"] = units
            self._ds[name] = ds
        self._ds["seq"].attrs["meaning"] = "unwrapped sequence number, 0 at each boot"
        self._ds["hold_curvature_per_m"].attrs["meaning"] = "jig curvature when held, NaN otherwise"
        self._pending: list[dict] = []
        self._n_pending = 0
        self._last_flush = time.monotonic()

    def append(self, boot, frame, t, model, codes, status, fate) -> None:
        tr = model.truth(t)
        n = frame.shape[0]
        hold = np.nan if model.hold_curvature_per_m is None else model.hold_curvature_per_m
        self._pending.append({
            "boot": np.full(n, boot), "seq": frame, "t_device_s": t,
            "curvature_per_m": tr["curvature_per_m"], "tip_xy_m": tr["tip_xy_m"],
            "moment_nm": tr["moment_nm"], "load_n": tr["load_n"],
            "hold_curvature_per_m": np.full(n, hold), "codes": codes, "status": status, "fate": fate,
        })
        self._n_pending += n
        if self._n_pending >= 16384:
            self.flush()

    def maybe_flush(self) -> None:
        if self._pending and time.monotonic() - self._last_flush > 0.5:
            self.flush()

    def flush(self) -> None:
        self._last_flush = time.monotonic()
        if not self._pending:
            return
        for name, ds in self._ds.items():
            block = np.concatenate([p[name] for p in self._pending])
            n0 = ds.shape[0]
            ds.resize(n0 + block.shape[0], axis=0)
            ds[n0:] = block
        self._pending = []
        self._n_pending = 0
        self._f.flush()

    def close(self) -> None:
        try:
            self.flush()
        finally:
            self._f.close()
