"""The serial reader: one thread per device, decoding into a :class:`FrameRing`.

The thread only reads, decodes, unwraps and pushes frames; it never waits for
a consumer. It survives the port vanishing (a cable pulled, a device reset):
it reopens the same path, asks for a hello and starts the stream again.

How sequence numbers and device time stay unambiguous
-----------------------------------------------------
The wire ``seq`` (16 bit) and ``t_us`` (32 bit) wrap; the reader unwraps them
into int64 ``seq`` and float64 ``t_device_s`` (seconds since the first frame
of the session). A forward jump in ``seq`` is frames lost on the way, counted
in ``frames_lost``. After the link comes back the reader decides whether the
device kept running (``seq`` and ``t_us`` advanced by about the outage: the
frames in between are counted as lost) or rebooted (they restarted): then a
new *epoch* begins, unwrapped ``seq`` goes on at the previous value + 1 and
``t_device_s`` at the previous value + the outage measured on the host clock,
and a ``reboot`` event records the frame index, so the column stays strictly
increasing and every row keeps one meaning.
"""
from __future__ import annotations

import json
import queue
import threading
import time

import numpy as np
import serial

from firmware_protocol import (
    STATUS_LATE,
    STATUS_TX_OVERFLOW,
    Hello,
    Note,
    Reply,
    SampleBlock,
    StreamDecoder,
    cmd_hello,
    cmd_rate,
    cmd_start,
    cmd_stop,
)

from acquire.errors import UserError
from acquire.link.counters import LINK_COUNTER_NAMES
from acquire.link.frames import Event, EventLog, FrameBlock, FrameRing
from acquire.threads.worker import Worker

__all__ = ["SerialReader", "PortError", "open_port"]


class PortError(UserError):
    """The serial port cannot be used (missing, busy, not a tapcurve device)."""


#: the reader gathers bytes for at most this long per decode: enough to amortise
#: the bulk decoder over many packets at high rates, short next to a 60 Hz redraw
READ_WINDOW_S = 0.004
_READ_SIZE = 1 << 16


def _open(port: str, timeout_s: float) -> serial.SerialBase:
    # pyserial's URL forms (socket://host:port, rfc2217://host:port, ...) reach boards behind a
    # serial-to-network bridge; a plain path is a local port, opened for this program alone
    if "://" in port:
        return serial.serial_for_url(port, baudrate=921600, timeout=timeout_s)
    return serial.Serial(port, baudrate=921600, timeout=timeout_s, exclusive=True)


def open_port(port: str, *, timeout_s: float = READ_WINDOW_S) -> serial.SerialBase:
    """Open ``port`` (a device path or a pyserial URL) for exclusive use.

    Failures become a one-line :class:`PortError` naming the port and the likely cause.
    """
    try:
        return _open(port, timeout_s)
    except (serial.SerialException, OSError, ValueError) as exc:
        from acquire.link.ports import describe_port_error

        raise PortError(describe_port_error(port, exc)) from None


def _is_int(value) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _hello_problem(info: dict) -> str | None:
    """What makes a hello unusable for this host (protocol version 1), or None."""
    if info.get("protocol") != 1:
        return f"speaks protocol {info.get('protocol')!r}; this tapcurve speaks protocol 1"
    if not _is_int(info.get("channels")) or not 1 <= info["channels"] <= 255:
        return f"has channels {info.get('channels')!r}; expected a whole number 1..255"
    rate = info.get("rate_hz")
    if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not rate > 0:
        return f"has rate_hz {rate!r}; expected a positive number"
    if not _is_int(info.get("adc_bits")) or not 1 <= info["adc_bits"] <= 16:
        return f"has adc_bits {info.get('adc_bits')!r}; expected a whole number 1..16"
    return None


class SerialReader(Worker):
    """Reads one device on a serial port in a background thread.

    Parameters
    ----------
    port : str
        Device path (``/dev/ttyACM0``, the virtual finger's link, ...).
    rate_hz : float or None
        If given, sent as ``RATE`` before ``START``.
    ring_seconds : float
        Ring capacity in seconds of frames at the device's rate.
    hello_timeout_s : float
        How long :meth:`start` waits for the device's hello.
    reconnect : bool
        Reopen the port when it vanishes (default) or stop.

    Attributes
    ----------
    hello : dict
        The device's first hello (later ones arrive as events).
    ring : FrameRing
        Created by :meth:`start` with the hello's channel count.
    events : EventLog
    """

    def __init__(
        self,
        *,
        port: str,
        rate_hz: float | None = None,
        ring_seconds: float = 20.0,
        hello_timeout_s: float = 3.0,
        reconnect: bool = True,
        reconnect_interval_s: float = 0.1,
    ):
        super().__init__(name=f"reader {port}")
        self.port = port
        self.rate_hz_request = rate_hz
        self.ring_seconds = ring_seconds
        self.hello_timeout_s = hello_timeout_s
        self.reconnect = reconnect
        self.reconnect_interval_s = reconnect_interval_s
        self.hello: dict = {}
        self.ring: FrameRing | None = None
        self.events = EventLog()
        self.counters = {name: 0 for name in LINK_COUNTER_NAMES}
        self._decoder = StreamDecoder()
        self._ser: serial.SerialBase | None = None
        self._write_lock = threading.Lock()
        self._replies: queue.Queue = queue.Queue(maxsize=64)
        self._connected = threading.Event()
        # unwrap state (reader thread only after start)
        self._last_raw_seq: int | None = None
        self._last_raw_us: int | None = None
        self._seq = -1
        self._us = 0  # unwrapped device microseconds within the current epoch
        self._epoch_t0_s = 0.0  # t_device_s at the start of the current epoch
        self._last_t_device_s = 0.0
        self._last_frame_host_s: float | None = None
        self._resync_pending = False
        self._after_hello: list = []

    # -- public API (any thread) ------------------------------------------------
    @property
    def n_channels(self) -> int:
        return int(self.hello.get("channels", 0))

    @property
    def rate_hz(self) -> float:
        return float(self.hello.get("rate_hz", 0.0))

    @property
    def adc_bits(self) -> int:
        return int(self.hello.get("adc_bits", 12))

    @property
    def connected(self) -> bool:
        return self._connected.is_set()

    @property
    def drops(self) -> dict:
        """Frames dropped by the decoder, by cause."""
        return dict(self._decoder.drops)

    def all_counters(self) -> dict:
        """Link counters and decoder drops (``drop_<cause>``) in one dict."""
        out = dict(self.counters)
        out.update({f"drop_{cause}": n for cause, n in self._decoder.drops.items()})
        return out

    def start(self) -> None:
        """Open the port, get the hello, start streaming and the reader thread.

        Raises
        ------
        PortError
            Port missing, busy, or no hello within ``hello_timeout_s``.
        """
        self._ser = open_port(self.port)
        try:
            info = self._handshake(self._ser)
        except BaseException:
            self._ser.close()
            raise
        self.hello = info
        problem = _hello_problem(info)
        if problem is not None:
            self._ser.close()
            raise PortError(f"port {self.port}: device hello {problem}")
        channels = info["channels"]
        rate = info["rate_hz"]
        capacity = int(max(4096, rate * self.ring_seconds))
        self.ring = FrameRing(capacity_frames=capacity, n_channels=channels)
        self._event("hello", json.dumps(info))
        if self.rate_hz_request is not None:
            self._write(cmd_rate(self.rate_hz_request))
            self.hello = dict(self.hello, rate_hz=self.rate_hz_request)
        self._write(cmd_start())
        self._handle_items(self._after_hello, time.monotonic())
        self._after_hello = []
        self._connected.set()
        self.start_thread()

    def stop(self) -> None:
        """Stop streaming and the thread; closes the port. Safe to call twice."""
        self.stop_thread(timeout_s=5.0)
        ser = self._ser
        if ser is not None:
            try:
                if ser.is_open:
                    ser.write(cmd_stop())
                    ser.flush()
            except (serial.SerialException, OSError):
                pass
            try:
                ser.close()
            except (serial.SerialException, OSError):
                pass
        if self.ring is not None:
            self.ring.close()

    def send_command(self, line: bytes, *, timeout_s: float = 2.0) -> str:
        """Send one command line and wait for its reply text (``OK ...``/``ERR ...``).

        Runs in the caller's thread; the reader thread delivers the reply.
        Raises :class:`TimeoutError` when no reply comes.
        """
        while not self._replies.empty():
            self._replies.get_nowait()
        self._write(line)
        try:
            return self._replies.get(timeout=timeout_s)
        except queue.Empty:
            raise TimeoutError(f"no reply to {line!r} from {self.port}") from None

    def wait_connected(self, timeout_s: float) -> bool:
        return self._connected.wait(timeout_s)

    # -- internals ------------------------------------------------------------------
    def _event(self, kind: str, text: str) -> None:
        pos = self.ring.written if self.ring is not None else 0
        self.events.append(Event(time.monotonic(), pos, kind, text))

    def _write(self, data: bytes) -> None:
        with self._write_lock:
            ser = self._ser
            if ser is None:
                return
            try:
                ser.write(data)
            except (serial.SerialException, OSError):
                pass  # the reader thread notices the lost port

    def _handshake(self, ser: serial.Serial) -> dict:
        self._decoder.reset()
        ser.reset_input_buffer()
        ser.write(cmd_hello())
        deadline = time.monotonic() + self.hello_timeout_s
        next_ask = time.monotonic() + 0.5
        while time.monotonic() < deadline and not self._stop.is_set():
            try:
                data = ser.read(max(1, ser.in_waiting))
            except (serial.SerialException, OSError) as exc:
                raise PortError(f"port {self.port}: lost while waiting for hello ({exc})") from None
            items = self._decoder.feed(data)
            for k, item in enumerate(items):
                if isinstance(item, Hello):
                    # what came after the hello in the same read is handled once the ring exists
                    self._after_hello = items[k + 1 :]
                    return dict(item.info)
            if time.monotonic() > next_ask:  # a hello may have been cut by a reset
                ser.write(cmd_hello())
                next_ask = time.monotonic() + 0.5
        raise PortError(f"port {self.port}: no hello within {self.hello_timeout_s:g} s (is it a tapcurve device?)")

    def run(self) -> None:
        ser = self._ser
        while not self._stop.is_set():
            try:
                # returns after READ_WINDOW_S with what came, or at once when 64 KiB are there
                data = ser.read(_READ_SIZE)
            except (serial.SerialException, OSError, TypeError) as exc:
                # TypeError: pyserial on a port closed under it
                self._connected.clear()
                self._event("disconnected", f"{self.port}: {exc}")
                ser = self._reopen()
                if ser is None:
                    return
                continue
            if data:
                self._handle(data, time.monotonic())

    def _reopen(self) -> serial.Serial | None:
        with self._write_lock:
            try:
                self._ser.close()
            except (serial.SerialException, OSError):
                pass
        if not self.reconnect:
            self.fail(f"port {self.port} vanished")
            return None
        while not self._stop.wait(self.reconnect_interval_s):
            try:
                ser = _open(self.port, READ_WINDOW_S)
            except (serial.SerialException, OSError, ValueError):
                continue
            with self._write_lock:
                self._ser = ser
            self._decoder.reset()
            self.counters["reconnects"] += 1
            self._resync_pending = True
            self._event("reconnected", self.port)
            self.ring.mark_restart()  # filters of every consumer start afresh here
            self._write(cmd_hello())
            self._write(cmd_start())
            self._connected.set()
            return ser
        return None

    def _handle(self, data: bytes, now: float) -> None:
        self.counters["bytes"] += len(data)
        self._handle_items(self._decoder.feed(data), now)

    def _handle_items(self, items: list, now: float) -> None:
        for item in items:
            if isinstance(item, SampleBlock):
                self._push_samples(item, now)
            elif isinstance(item, Hello):
                info = dict(item.info)
                self._event("hello", json.dumps(info))
                if info.get("channels") != self.n_channels:
                    self.fail(
                        f"port {self.port}: device now sends {info.get('channels')} channels, "
                        f"was {self.n_channels}; frames ignored"
                    )
                    self._event("error", self.error)
                self._resync_pending = True
            elif isinstance(item, Reply):
                words = item.text.split()
                if words[:2] == ["OK", "RATE"] and len(words) == 3:
                    # the device runs at a new rate (asked by us or by someone before us)
                    try:
                        self.hello = dict(self.hello, rate_hz=float(words[2]))
                        self._event("rate", item.text)
                    except ValueError:
                        pass
                if item.text.startswith("OK START") or item.text.startswith("OK STOP"):
                    continue  # our own start/stop, answered
                try:
                    self._replies.put_nowait(item.text)
                except queue.Full:
                    pass
            elif isinstance(item, Note):
                self._event("note", item.text)

    def _push_samples(self, block: SampleBlock, now: float) -> None:
        ring = self.ring
        if block.n_channels != ring.n_channels:
            self.counters["frames_lost"] += len(block)
            return
        raw_seq = block.seq.astype(np.int64)
        raw_us = block.t_us.astype(np.int64)
        n = raw_seq.shape[0]
        d_seq = np.empty(n, dtype=np.int64)
        d_us = np.empty(n, dtype=np.int64)
        d_seq[1:] = np.diff(raw_seq) & 0xFFFF
        d_us[1:] = np.diff(raw_us) & 0xFFFFFFFF
        if self._last_raw_seq is None:
            # the session's first frame: seq keeps the device's value, time starts at 0
            self._seq = int(raw_seq[0]) - 1
            self._us = 0
            d_seq[0], d_us[0] = 1, 0
        else:
            d_seq[0] = (raw_seq[0] - self._last_raw_seq) & 0xFFFF
            d_us[0] = (raw_us[0] - self._last_raw_us) & 0xFFFFFFFF
            if self._resync_pending:
                gap_s = now - (self._last_frame_host_s or now)
                rate = max(self.rate_hz, 1.0)
                kept_running = 1 <= d_seq[0] <= gap_s * rate * 1.5 + 200 and d_us[0] <= (gap_s + 1.0) * 1e6
                if not kept_running:
                    # a new epoch: the device restarted its counters
                    self.counters["reboots"] += 1
                    self._epoch_t0_s = self._last_t_device_s + max(gap_s, 1.0 / rate)
                    self._us = 0
                    d_seq[0], d_us[0] = 1, 0
                    self._event("reboot", f"device counters restarted at raw seq {int(raw_seq[0])}")
                    ring.mark_restart()
        self._resync_pending = False

        # A gap of 32768 frames or more folds into the 16-bit seq; the device clock (32 bit)
        # says how many frames the gap really spans, so add the whole wraps it hides.
        rate = max(self.rate_hz, 1e-3)
        expected = d_us * (rate * 1e-6)
        long_gap = expected > 0x7000
        if long_gap.any():
            wraps = np.rint((expected[long_gap] - d_seq[long_gap]) / 65536.0).astype(np.int64)
            d_seq[long_gap] += 65536 * np.maximum(wraps, 0)
        # a zero or backward step is not a wrap: keep the column increasing, count it
        odd = (d_seq == 0) | ((d_seq > 0x8000) & ~long_gap)
        if odd.any():
            self.counters["seq_discontinuities"] += int(odd.sum())
            d_seq[odd] = 1
        lost = int((d_seq - 1).sum())
        seq = self._seq + np.cumsum(d_seq)
        us = self._us + np.cumsum(d_us)
        t_dev = self._epoch_t0_s + us * 1e-6
        self._seq = int(seq[-1])
        self._us = int(us[-1])
        self._last_raw_seq = int(raw_seq[-1])
        self._last_raw_us = int(raw_us[-1])
        self._last_t_device_s = float(t_dev[-1])
        self._last_frame_host_s = now

        status = block.status
        self.counters["frames"] += n
        self.counters["frames_lost"] += lost
        self.counters["late_frames"] += int(np.count_nonzero(status & STATUS_LATE))
        self.counters["tx_overflow_frames"] += int(np.count_nonzero(status & STATUS_TX_OVERFLOW))
        ring.push(
            FrameBlock(
                codes=block.codes,
                seq=seq,
                t_device_s=t_dev,
                t_host_s=np.full(n, now),
                status=status,
            )
        )
