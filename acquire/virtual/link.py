"""The virtual finger's serial link: a pseudo-terminal behind a stable symlink, its transmit buffer and link faults.

The device keeps its own fd of the pty's slave side open, so the master
never sees EIO while no host has the port open; bytes written then wait in
the pty (and, once it is full, the transmit buffer drops whole packets as a
board's would). Link faults: ``corrupt_rate`` flips 1..3 bytes of a sample
packet on the wire; ``drop_rate`` (applied by the device) never sends it.

Threads: a :class:`PtyLink` belongs to the device thread, except
:attr:`PtyLink.port_name`/``up``, read under the device's lock.
"""
from __future__ import annotations

import errno
import os
import time
import tty
from pathlib import Path

import numpy as np

import firmware_protocol as fp

__all__ = ["PtyLink", "FATE_NAMES", "FATE_SENT", "FATE_CORRUPT", "FATE_DROP", "FATE_OVERFLOW"]

#: what became of each generated frame (truth file ``fate`` values)
FATE_NAMES = ("sent", "corrupted on the wire", "dropped on the wire", "dropped: transmit buffer full")
FATE_SENT, FATE_CORRUPT, FATE_DROP, FATE_OVERFLOW = range(4)
_MAX_LINE = 200  # a command line longer than this is noise


class PtyLink:
    """A pty behind ``link`` (a symlink), with a bounded transmit buffer.

    Parameters
    ----------
    link : Path
        Where the symlink to the pty is made (replaced atomically).
    tx_buffer_bytes : int
        Transmit buffer; whole sample packets that do not fit are dropped.
    packet_bytes : int
        Size of one sample packet on the wire (COBS and delimiter included).
    count : callable
        ``count(**deltas)`` adds to the device's counters.
    """

    def __init__(self, link: Path, *, tx_buffer_bytes: int, packet_bytes: int, count):
        self.link = link
        self.tx_buffer_bytes = int(tx_buffer_bytes)
        self.packet_bytes = int(packet_bytes)
        self._count = count
        self.master = self.slave = -1
        self.name = None
        self.since = time.monotonic()
        self.tx = bytearray()
        self.rx = bytearray()
        self.overflow_pending = False

    def reset_buffers(self) -> None:
        """A board's power-on: nothing queued either way."""
        self.tx = bytearray()
        self.rx = bytearray()
        self.overflow_pending = False

    def open(self) -> str:
        """Make a new pty and point the symlink at it; returns the pty's name."""
        master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(master, False)
        name = os.ttyname(slave)
        tmp = self.link.with_name(f".{self.link.name}.{os.getpid()}.tmp")
        try:
            tmp.unlink()
        except FileNotFoundError:
            pass
        os.symlink(name, tmp)
        os.replace(tmp, self.link)
        self.master, self.slave, self.name = master, slave, name
        self.since = time.monotonic()
        return name

    def close(self) -> None:
        """Remove the symlink and close the pty (the port is gone)."""
        try:
            if self.link is not None and self.link.is_symlink():
                self.link.unlink()
        except FileNotFoundError:
            pass
        for fd in (self.master, self.slave):
            if fd >= 0:
                os.close(fd)
        self.master = self.slave = -1
        self.name = None

    def send_control(self, packet) -> None:
        """Queue a reply or hello (always: they are small and rare) and flush."""
        self.tx += fp.encode_packet(packet)
        if isinstance(packet, fp.Hello):
            self._count(hellos_sent=1)
        self.flush()

    def flush(self) -> None:
        """Write what the pty takes now."""
        while self.tx and self.master >= 0:
            try:
                n = os.write(self.master, self.tx[:65536])
            except BlockingIOError:
                return
            except OSError as exc:
                if exc.errno in (errno.EIO, errno.EAGAIN):
                    return
                raise
            if n <= 0:
                return
            del self.tx[:n]
            self._count(bytes_sent=n)

    def queue_samples(self, keep, *, frame, t_us, status, codes, fate, corrupt_rate: float, rng) -> tuple[int, int]:
        """Put sample packets ``keep`` into the transmit buffer, draining it into the pty between pieces as
        a UART drains while the next sample is taken. What finds no room is dropped (fate overflow) and flags
        the next packet sent. Returns (packets queued, packets corrupted)."""
        pos = n_corrupt = 0
        while pos < keep.size:
            self.flush()
            room = max(0, self.tx_buffer_bytes - len(self.tx)) // self.packet_bytes
            if room == 0:
                break
            part = keep[pos : pos + room]
            pos += part.size
            if self.overflow_pending:
                status[part[0]] |= fp.STATUS_TX_OVERFLOW
                self.overflow_pending = False
            wire = fp.encode_samples_bulk(seq=frame[part], t_us=t_us[part], status=status[part], codes=codes[part])
            if corrupt_rate > 0:
                wire, hit = self._corrupt(wire, part.size, corrupt_rate, rng)
                fate[part[hit]] = FATE_CORRUPT
                n_corrupt += hit.size
            self.tx += wire
        if pos < keep.size:
            fate[keep[pos:]] = FATE_OVERFLOW
            self.overflow_pending = True
        return pos, n_corrupt

    def _corrupt(self, wire: bytes, n: int, rate: float, rng):
        hit = np.flatnonzero(rng.random(n) < rate)
        if not hit.size:
            return wire, hit
        buf = np.frombuffer(bytearray(wire), dtype=np.uint8).reshape(n, self.packet_bytes)
        for row in hit.tolist():
            k = int(rng.integers(1, 4))
            where = rng.integers(0, self.packet_bytes, k)
            buf[row, where] ^= rng.integers(1, 256, k).astype(np.uint8)
        return buf.tobytes(), hit

    def read_lines(self) -> list:
        """Command lines the host sent (stripped, non-empty); a line too long gives ``None`` in their place."""
        try:
            data = os.read(self.master, 4096)
        except (BlockingIOError, InterruptedError):
            return []
        except OSError as exc:
            if exc.errno == errno.EIO:
                return []
            raise
        if not data:
            return []
        self._count(bytes_received=len(data))
        self.rx += data
        lines = []
        while True:
            nl = self.rx.find(b"\n")
            if nl < 0:
                break
            line = bytes(self.rx[:nl]).strip()
            del self.rx[: nl + 1]
            if line:
                lines.append(line)
        if len(self.rx) > _MAX_LINE:
            self.rx.clear()
            lines.append(None)
        return lines
