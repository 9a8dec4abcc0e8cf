"""The shape stream: newline-delimited JSON over TCP for controllers and other programs.

``tapcurve live`` and ``tapcurve record`` take ``--publish HOST:PORT``; while
they run, a :class:`ShapePublisher` there sends every connected client one
UTF-8 JSON object per line and per frame. Clients connect and leave at any
time, several at once.

Messages
--------
Every frame message has

``seq``
    Unwrapped sequence number (int).
``t_device_s``
    Device time, s since the session's first frame (6 decimals).
``codes``
    ADC code of each channel (list of int).
``counters``
    ``frames_lost`` (on the link), ``bad_packets`` (dropped by the decoder,
    all causes), ``reconnects``, and ``publisher_lost`` (frames this publisher
    itself fell behind on; 0 unless the computer is overloaded).
``dropped``
    Messages this client has lost so far because it read too slowly. Between
    two messages a and b a client receives, ``b.dropped - a.dropped`` of the
    frames in between were lost that way (the rest, if any, were skipped by
    the client's own rate limit or counted in ``counters``).

With a calibration loaded, frame messages also have

``curvature``
    Mean curvature of each segment, 1/m, base first (6 significant digits).
``s_m``
    Arc length of each shape point, m (the same in every message).
``xy``
    Shape points ``[x, y]`` in the base frame, m, at ``s_m`` (0.1 um steps).
``tip_xy``
    The last shape point (the fingertip when the rig describes one), m.
``chain_ok``
    Every wiring check passed for this frame (false: do not trust the shape).
``force_n``
    With a calibration that has a force model: the estimated force at the
    sensor's far end ``[Fx, Fy]``, base frame, N (10 uN steps).

With an ``[actuation]`` table in the rig, frame messages also have
``actuation``, the actuation input in the rig's unit (6 significant digits).

A value that cannot be computed (a broken wire) is ``null``.

Requests
--------
A client may send one JSON object per line. The only request now is
``{"max_rate_hz": 50}``: at most 50 frame messages per second of device time
(every frame if null or 0; never above the publisher's own ``max_rate_hz``,
``--publish-rate-hz`` on the command line). Each request is answered by one
line with ``"ok"``: ``{"ok": true, "max_rate_hz": 50.0}`` or ``{"ok": false,
"error": "..."}``; the new rate holds from the frame after that reply. Lines
without ``seq`` are such replies; frame messages always have ``seq``.

A slow client
-------------
Each client has a bounded outgoing buffer (``client_buffer_bytes``) and the
publisher only ever sends without blocking. When a client's buffer is full,
its oldest messages not yet begun are dropped, whole, to make room (so it gets
the newest frames when it catches up) and counted in its ``dropped``; a
message is never cut. Acquisition, recording and other clients never wait for
it.

Security
--------
The stream has no authentication or encryption. It binds only to loopback
addresses (127.0.0.1, [::1], localhost) unless ``allow_remote`` is given
(``--publish-allow-remote``); then a warning is printed to stderr.

Example client
--------------
::

    import json, socket

    with socket.create_connection(("127.0.0.1", 8765)) as sock:
        sock.sendall(b'{"max_rate_hz": 50}\\n')      # optional: at most 50 messages/s
        for line in sock.makefile("r", encoding="utf-8"):
            msg = json.loads(line)
            if "seq" not in msg:                    # the reply to our request
                continue
            if "tip_xy" in msg and msg["tip_xy"][0] is not None:
                x, y = msg["tip_xy"]
                print(f"{msg['seq']}: tip at x={x * 1e3:.1f} mm, y={y * 1e3:.1f} mm")
            else:
                print(msg["seq"], msg["codes"])     # no calibration: raw codes

Threads
-------
:meth:`ShapePublisher.start` and :meth:`ShapePublisher.stop` run on the
caller's thread (the main thread). One publisher thread does everything else:
it reads its own :class:`~acquire.link.frames.RingCursor`, runs its own
:class:`~acquire.core.pipeline.Pipeline` when calibrated, encodes each frame's JSON
once and fans it out to all clients with non-blocking sends. :meth:`stats`,
:meth:`wait_for_clients` and :meth:`wait_for_connections` may be called from
any thread.
"""
from __future__ import annotations

import errno
import json
import math
import selectors
import socket
import sys
import threading
import time
from collections import deque
from typing import Callable

import numpy as np

from acquire.errors import UserError
from acquire.threads.worker import Worker
from acquire.link.frames import FrameBlock, FrameRing
from acquire.serve.address import _format_address, _is_loopback, check_address, parse_address
from acquire.serve.messages import FrameEncoder

__all__ = ["ShapePublisher", "parse_address", "check_address"]

_MAX_REQUEST_BYTES = 4096  # a request line longer than this is refused
_SEND_CHUNK_BYTES = 256 * 1024  # most bytes joined into one send() call
_MIN_CLIENT_BUFFER_BYTES = 16 * 1024
_SEND_FLAGS = getattr(socket, "MSG_NOSIGNAL", 0)  # a vanished client must not raise SIGPIPE


class _Client:
    """One connection's state (publisher thread only)."""

    __slots__ = (
        "sock", "peer", "queue", "queued_bytes", "inflight", "dropped", "sent", "period_s",
        "next_t_s", "rbuf", "reading",
    )

    def __init__(self, sock: socket.socket, peer: str, period_s: float):
        self.sock = sock
        self.peer = peer
        self.queue: deque = deque()  # (bytes, is_frame): frames get their "dropped" suffix when sent
        self.queued_bytes = 0
        self.inflight = memoryview(b"")  # bytes committed to the socket, possibly a cut line
        self.dropped = 0
        self.sent = 0
        self.period_s = period_s
        self.next_t_s = -math.inf
        self.rbuf = bytearray()
        self.reading = True


class ShapePublisher(Worker):
    """TCP server of the shape stream (module docstring: messages, requests, threads).

    Parameters (keyword-only)
    -------------------------
    address : str
        ``HOST:PORT``; see :func:`parse_address`.
    allow_remote : bool
        Allow a non-loopback address (prints a warning on :meth:`start`).
    ring : FrameRing
        The reader's ring; the publisher reads it from the newest frame on.
    rig : Rig, optional
        Needed with a calibration.
    calibration : Calibration, optional
        With one, messages carry curvature and shape from the publisher's own
        :class:`~acquire.core.pipeline.Pipeline`.
    rate_hz : float
        Device sample rate, Hz (for the pipeline's filters).
    adc_bits : int
        From the device's hello.
    counters : callable returning dict, optional
        Link counters (``SerialReader.all_counters``), called once per block
        on the publisher thread.
    max_rate_hz : float, optional
        Most frame messages per second of device time for any client
        (None: every frame). A client may ask for less.
    client_buffer_bytes : int
        Outgoing buffer per client, bytes, beyond the kernel's socket buffer.
    socket_send_buffer_bytes : int, optional
        Kernel send buffer per client (SO_SNDBUF); None keeps the system's.
    max_clients : int
        Further connections get one error line and are closed.
    announce : bool
        Print the bound address to stderr on :meth:`start` (tests read it
        when the port was 0).

    Raises
    ------
    UserError
        Bad address text, a host that does not resolve, or a non-loopback
        address without ``allow_remote``; the message names the address.
    """

    def __init__(
        self,
        *,
        address: str,
        allow_remote: bool = False,
        ring: FrameRing,
        rig=None,
        calibration=None,
        rate_hz: float,
        adc_bits: int = 12,
        counters: Callable[[], dict] | None = None,
        max_rate_hz: float | None = None,
        client_buffer_bytes: int = 1 << 20,
        socket_send_buffer_bytes: int | None = None,
        max_clients: int = 32,
        announce: bool = True,
    ):
        self.address_text = str(address).strip()
        super().__init__(name=f"shape stream {self.address_text}")
        self._family, self._sockaddr = check_address(self.address_text, allow_remote=allow_remote)
        self.is_loopback = _is_loopback(self._sockaddr)
        if max_rate_hz is not None and not (max_rate_hz > 0 and math.isfinite(max_rate_hz)):
            raise UserError(f"publish rate {max_rate_hz!r}: must be a positive number of Hz")
        if calibration is not None and rig is None:
            raise ValueError("a calibration needs the rig")
        self.ring = ring
        self.rig = rig
        self.calibration = calibration
        self.rate_hz = float(rate_hz)
        self.adc_bits = int(adc_bits)
        self.counters = counters
        self.max_rate_hz = None if max_rate_hz is None else float(max_rate_hz)
        self.client_buffer_bytes = max(int(client_buffer_bytes), _MIN_CLIENT_BUFFER_BYTES)
        self.socket_send_buffer_bytes = socket_send_buffer_bytes
        self.max_clients = int(max_clients)
        self.announce = bool(announce)
        self.bound_address: str | None = None

        self._pipeline = None
        if calibration is not None:
            from acquire.core.pipeline import Pipeline

            self._pipeline = Pipeline(rig=rig, calibration=calibration, rate_hz=rate_hz, adc_bits=adc_bits)
        self._listener: socket.socket | None = None
        self._selector: selectors.BaseSelector | None = None
        self._clients: dict[int, _Client] = {}
        self._cond = threading.Condition()  # guards the statistics below and wakes wait_for_clients
        self._n_clients = 0
        self._connections = 0
        self._frames_read = 0
        self._messages_encoded = 0
        self._cursor = None
        self._last_counters: dict = {}
        self._dropped_closed = 0
        self._new_calibration: tuple | None = None
        self._prepare_formats()

    @classmethod
    def from_address(cls, address: str, **options) -> "ShapePublisher":
        """A publisher for ``HOST:PORT``; keyword options as for the class (nothing is bound yet)."""
        return cls(address=address, **options)

    # -- control (caller's thread) ---------------------------------------------------------
    def start(self) -> None:
        """Bind, listen and start the publisher thread.

        Raises
        ------
        UserError
            The address cannot be bound (port in use, not an address of this
            computer, no permission); the message names it.
        """
        if self._thread is not None:
            raise RuntimeError("publisher already started")
        sock = socket.socket(self._family, socket.SOCK_STREAM)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            sock.bind(self._sockaddr)
            sock.listen(16)
            sock.setblocking(False)
        except OSError as exc:
            sock.close()
            raise UserError(f"publish address {self.address_text}: {self._bind_reason(exc)}") from None
        self._listener = sock
        host, port = sock.getsockname()[:2]
        self.bound_address = _format_address(host, port)
        self._selector = selectors.DefaultSelector()
        self._selector.register(sock, selectors.EVENT_READ, None)
        self._cursor = self.ring.cursor()
        if not self.is_loopback:
            print(
                f"tapcurve: warning: the shape stream on {self.bound_address} has no authentication or "
                "encryption; anyone who can reach this port can read it. Keep it on a trusted network.",
                file=sys.stderr,
                flush=True,
            )
        if self.announce:
            print(f"tapcurve: shape stream on {self.bound_address} (JSON lines over TCP)", file=sys.stderr, flush=True)
        self.name = f"shape stream on {self.bound_address}"
        self.start_thread()

    def stop(self, *, timeout_s: float = 5.0) -> None:
        """Stop the thread and close every connection, each at the end of a line. Safe to call twice."""
        if self.stop_thread(timeout_s=timeout_s):
            self._finish_inflight(timeout_s=0.5)
        for client in list(self._clients.values()):
            self._drop_client(client)
        if self._selector is not None:
            self._selector.close()
            self._selector = None
        if self._listener is not None:
            self._listener.close()
            self._listener = None

    def _finish_inflight(self, *, timeout_s: float) -> None:
        """Send the rest of each client's partly sent output (whole lines), for at most ``timeout_s`` s
        in all: a client that reads ends its stream at a line end, never inside a message.
        Owning thread, after the publisher thread has stopped."""
        deadline = time.monotonic() + timeout_s
        for client in list(self._clients.values()):
            while client.inflight and time.monotonic() < deadline:
                try:
                    n = client.sock.send(client.inflight, _SEND_FLAGS)
                except (BlockingIOError, InterruptedError):
                    time.sleep(0.002)  # the client's window is full: give it a moment
                    continue
                except OSError:
                    break
                client.inflight = client.inflight[n:]

    @property
    def port(self) -> int:
        """The bound port (after :meth:`start`)."""
        if self._listener is None:
            raise RuntimeError("publisher not started")
        return int(self._listener.getsockname()[1])

    def wait_for_clients(self, count: int, *, timeout_s: float) -> bool:
        """Block until at least ``count`` clients are connected (any thread); True if so."""
        with self._cond:
            return self._cond.wait_for(lambda: self._n_clients >= count, timeout=timeout_s)

    def wait_for_connections(self, count: int, *, timeout_s: float) -> bool:
        """Block until at least ``count`` connections have been accepted since :meth:`start`
        (any thread); True if so."""
        with self._cond:
            return self._cond.wait_for(lambda: self._connections >= count, timeout=timeout_s)

    def stats(self) -> dict:
        """Snapshot (any thread): ``clients`` (list of dicts with ``peer``, ``sent``,
        ``dropped``, ``max_rate_hz``), ``connections`` (ever), ``frames_read``,
        ``messages_encoded``, ``publisher_lost``, ``dropped_total``."""
        with self._cond:
            clients = [
                {
                    "peer": c.peer,
                    "sent": c.sent,
                    "dropped": c.dropped,
                    "max_rate_hz": None if c.period_s == 0 else 1.0 / c.period_s,
                }
                for c in list(self._clients.values())
            ]
            return {
                "clients": clients,
                "connections": self._connections,
                "frames_read": self._frames_read,
                "messages_encoded": self._messages_encoded,
                "publisher_lost": 0 if self._cursor is None else self._cursor.lost_frames,
                "dropped_total": self._dropped_closed + sum(c["dropped"] for c in clients),
            }

    # -- set-up helpers --------------------------------------------------------------------------
    @staticmethod
    def _bind_reason(exc: OSError) -> str:
        if exc.errno == errno.EADDRINUSE:
            return "port already in use (choose another port, or 0 for any free one)"
        if exc.errno == errno.EADDRNOTAVAIL:
            return "not an address of this computer"
        if exc.errno == errno.EACCES:
            return "permission denied (ports below 1024 need privileges)"
        return f"cannot listen ({exc.strerror or exc})"

    def _prepare_formats(self) -> None:
        shaped = self._pipeline is not None
        self._encoder = FrameEncoder(
            n_channels=self.ring.n_channels, n_segments=self.rig.n_segments if shaped else None,
            s_m=self._pipeline.s_m if shaped else None, actuation=getattr(self.rig, "actuation", None),
        )

    def set_calibration(self, calibration) -> None:
        """Use ``calibration`` (a new one, or a tared one) from the next frames on.

        Any thread; the publisher thread picks it up between blocks, so no
        message mixes two calibrations. Shapes start appearing in the messages
        if there was no calibration before.
        """
        if calibration is not None and self.rig is None:
            raise ValueError("a calibration needs the rig")
        self._new_calibration = (calibration,)

    def _apply_new_calibration(self) -> None:
        pending, self._new_calibration = self._new_calibration, None
        (calibration,) = pending
        self.calibration = calibration
        if calibration is None:
            self._pipeline = None
        elif self._pipeline is not None:
            self._pipeline.set_calibration(calibration)
        else:
            from acquire.core.pipeline import Pipeline

            self._pipeline = Pipeline(rig=self.rig, calibration=calibration, rate_hz=self.rate_hz, adc_bits=self.adc_bits)
        self._prepare_formats()

    # -- publisher thread ----------------------------------------------------------------------
    def run(self) -> None:
        try:
            while not self._stop.is_set():
                pending_out = any(c.inflight or c.queue for c in self._clients.values())
                timeout_s = 0.005 if pending_out else 0.02
                if self.ring.closed and self._cursor.pending == 0:
                    self._service(timeout_s)  # no more frames: just serve the sockets
                    continue
                self._cursor.wait(timeout_s)
                if self._new_calibration is not None:  # checked after the wait: frames read now get it
                    self._apply_new_calibration()
                block = self._cursor.read(max_frames=max(1000, int(self.rate_hz * 0.1)))
                if len(block):
                    self._publish(block)
                self._service(0.0)
        except Exception as exc:  # never take acquisition down with us: shown in the status line
            self.fail(f"shape stream on {self.bound_address} stopped: {type(exc).__name__}: {exc}")

    def _publish(self, block: FrameBlock) -> None:
        n = len(block)
        with self._cond:
            self._frames_read += n
        if not self._clients:
            return  # nobody listens: skip the work; the pipeline restarts when someone connects
        t = block.t_device_s
        wanted = np.zeros(n, dtype=bool)
        per_client = []
        for client in self._clients.values():
            mask = self._select(client, t)
            per_client.append((client, mask))
            wanted |= mask
        processed = self._pipeline.process(block) if self._pipeline is not None else None
        idx = np.flatnonzero(wanted)
        if idx.size == 0:
            return
        messages = self._encode(block, processed, idx)
        with self._cond:
            self._messages_encoded += len(messages)
        by_frame = dict(zip(idx.tolist(), messages))
        for client, mask in per_client:
            for i in np.flatnonzero(mask).tolist():
                self._enqueue(client, by_frame[i], True)
            self._flush(client)

    def _select(self, client: _Client, t: np.ndarray) -> np.ndarray:
        """Frames this client gets under its rate limit (device time)."""
        period = client.period_s
        if period == 0:
            return np.ones(t.shape[0], dtype=bool)
        mask = np.zeros(t.shape[0], dtype=bool)
        tol = period * 1e-3  # float rounding of device time must not skip a frame
        due = client.next_t_s
        for i, ti in enumerate(t.tolist()):
            if ti < due - 2 * period:
                due = ti  # device time went back (a new session): start again
            if ti >= due - tol:
                mask[i] = True
                due = due + period if math.isfinite(due) else ti + period
                if due <= ti:  # after a gap: one period from this frame on
                    due = ti + period
        client.next_t_s = due
        return mask

    def _counters_part(self) -> str:
        c = self._last_counters
        if self.counters is not None:
            try:
                c = self.counters()
                self._last_counters = c
            except Exception:
                pass  # a counters call racing the reader: keep the previous numbers
        bad = sum(int(v) for k, v in c.items() if k.startswith("drop_"))
        return ',"counters":{"frames_lost":%d,"bad_packets":%d,"reconnects":%d,"publisher_lost":%d}' % (
            int(c.get("frames_lost", 0)), bad, int(c.get("reconnects", 0)), self._cursor.lost_frames,
        )

    def _encode(self, block: FrameBlock, processed, idx: np.ndarray) -> list[bytes]:
        """JSON text (without the closing ``,"dropped":N}``) of frames ``idx``."""
        return self._encoder.encode(block, processed, idx, self._counters_part())

    def _enqueue(self, client: _Client, data: bytes, is_frame: bool) -> None:
        size = len(data) + (24 if is_frame else 0)  # room for the "dropped" suffix
        limit = self.client_buffer_bytes
        kept_replies = []
        while client.queue and client.queued_bytes + len(client.inflight) + size > limit:
            old, old_is_frame = client.queue.popleft()
            client.queued_bytes -= len(old) + (24 if old_is_frame else 0)
            if old_is_frame:
                client.dropped += 1
            else:
                kept_replies.append((old, old_is_frame))  # a reply is tiny and never dropped
        for item in reversed(kept_replies):
            client.queue.appendleft(item)
            client.queued_bytes += len(item[0])
        if is_frame and client.queued_bytes + len(client.inflight) + size > limit and client.queue:
            client.dropped += 1  # only replies are left and still no room
            return
        client.queue.append((data, is_frame))
        client.queued_bytes += size

    def _flush(self, client: _Client) -> None:
        """Send what the socket takes now; never blocks."""
        while True:
            if not client.inflight:
                if not client.queue:
                    return
                parts = []
                total = 0
                suffix = b',"dropped":%d}\n' % client.dropped
                while client.queue and total < _SEND_CHUNK_BYTES:
                    data, is_frame = client.queue.popleft()
                    client.queued_bytes -= len(data) + (24 if is_frame else 0)
                    parts.append(data)
                    if is_frame:
                        parts.append(suffix)
                        client.sent += 1
                    total += len(data)
                client.inflight = memoryview(b"".join(parts))
            try:
                n = client.sock.send(client.inflight, _SEND_FLAGS)
            except (BlockingIOError, InterruptedError):
                return
            except OSError:
                self._drop_client(client)
                return
            client.inflight = client.inflight[n:]
            if client.inflight:
                return  # the kernel buffer is full; the rest goes next time

    def _service(self, timeout_s: float) -> None:
        """Accept connections, read requests, send pending output."""
        for key, _ in self._selector.select(timeout_s):
            if key.data is None:
                self._accept()
            else:
                self._read_requests(key.data)
        for client in list(self._clients.values()):
            if client.inflight or client.queue:
                self._flush(client)

    def _accept(self) -> None:
        while True:
            try:
                sock, addr = self._listener.accept()
            except (BlockingIOError, InterruptedError):
                return
            except OSError:
                return  # e.g. too many open files: the connection is refused, we go on
            sock.setblocking(False)
            peer = _format_address(addr[0], addr[1])
            if len(self._clients) >= self.max_clients:
                try:
                    sock.send(b'{"ok":false,"error":"too many clients (%d)"}\n' % self.max_clients, _SEND_FLAGS)
                except OSError:
                    pass
                sock.close()
                continue
            try:
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)  # a frame is sent when it is ready
                if self.socket_send_buffer_bytes is not None:
                    sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, int(self.socket_send_buffer_bytes))
            except OSError:
                pass
            period = 0.0 if self.max_rate_hz is None else 1.0 / self.max_rate_hz
            client = _Client(sock, peer, period)
            if not self._clients and self._pipeline is not None:
                self._pipeline.reset()  # frames were skipped while nobody listened
            self._selector.register(sock, selectors.EVENT_READ, client)
            with self._cond:
                self._clients[sock.fileno()] = client
                self._n_clients = len(self._clients)
                self._connections += 1
                self._cond.notify_all()

    def _drop_client(self, client: _Client) -> None:
        fd = client.sock.fileno()
        if fd >= 0 and self._clients.get(fd) is client:
            with self._cond:
                del self._clients[fd]
            if client.reading and self._selector is not None:
                try:
                    self._selector.unregister(client.sock)
                except (KeyError, ValueError):
                    pass
        client.sock.close()
        with self._cond:
            self._dropped_closed += client.dropped
            self._n_clients = len(self._clients)
            self._cond.notify_all()

    def _read_requests(self, client: _Client) -> None:
        try:
            data = client.sock.recv(4096)
        except (BlockingIOError, InterruptedError):
            return
        except OSError:
            self._drop_client(client)
            return
        if not data:
            # the client closed its sending side (or left): keep sending until a send fails
            client.reading = False
            self._selector.unregister(client.sock)
            return
        client.rbuf += data
        while True:
            nl = client.rbuf.find(b"\n")
            if nl < 0:
                if len(client.rbuf) > _MAX_REQUEST_BYTES:
                    client.rbuf.clear()
                    self._reply(client, {"ok": False, "error": f"request longer than {_MAX_REQUEST_BYTES} bytes"})
                return
            line = bytes(client.rbuf[:nl]).strip()
            del client.rbuf[: nl + 1]
            if line:
                self._reply(client, self._handle_request(client, line))

    def _handle_request(self, client: _Client, line: bytes) -> dict:
        try:
            req = json.loads(line.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError):
            return {"ok": False, "error": "request is not a JSON object on one line"}
        if not isinstance(req, dict):
            return {"ok": False, "error": "request is not a JSON object on one line"}
        unknown = sorted(set(req) - {"max_rate_hz"})
        if unknown or not req:
            return {"ok": False, "error": f"unknown request key(s) {unknown}; known: max_rate_hz"}
        rate = req["max_rate_hz"]
        if rate is None or rate == 0:
            rate = self.max_rate_hz
        elif isinstance(rate, bool) or not isinstance(rate, (int, float)) or not (rate > 0 and math.isfinite(rate)):
            return {"ok": False, "error": f"max_rate_hz {rate!r}: must be a positive number, 0 or null"}
        elif self.max_rate_hz is not None:
            rate = min(float(rate), self.max_rate_hz)
        client.period_s = 0.0 if rate is None else 1.0 / float(rate)
        client.next_t_s = -math.inf
        return {"ok": True, "max_rate_hz": None if rate is None else float(rate)}

    def _reply(self, client: _Client, reply: dict) -> None:
        self._enqueue(client, (json.dumps(reply, separators=(",", ":")) + "\n").encode(), False)
        self._flush(client)
