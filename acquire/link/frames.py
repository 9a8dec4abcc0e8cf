"""Frames as arrays, and the bounded ring that hands them from the reader to everyone else.

The reader thread is the only writer of a :class:`FrameRing`; any number of
consumers (recorder, processing, display, publisher) read it through their own
:class:`RingCursor`. The writer never waits for a consumer: a consumer that
falls more than the ring's capacity behind loses the oldest frames, and its
cursor counts them.
"""
from __future__ import annotations

import threading
from collections import deque
from dataclasses import dataclass, field

import numpy as np

__all__ = ["FrameBlock", "FrameRing", "RingCursor", "EventLog", "Event", "RESTART_EVENT_KINDS"]

#: link events after which the stream starts afresh (the reader marks the ring there)
RESTART_EVENT_KINDS = ("reconnected", "reboot")


@dataclass
class FrameBlock:
    """N consecutive frames of C channels.

    Attributes
    ----------
    codes : ndarray of uint16, shape (N, C)
        ADC codes as received.
    seq : ndarray of int64, shape (N,)
        Unwrapped sequence numbers.
    t_device_s : ndarray of float64, shape (N,)
        Unwrapped device time, s since the first frame of the session.
    t_host_s : ndarray of float64, shape (N,)
        Host receive time (monotonic clock), s since the session's epoch.
    status : ndarray of uint8, shape (N,)
        Status byte of each frame.
    restarts : ndarray of int64, shape (K,)
        Offsets in this block of frames where the stream starts afresh (after
        a reconnect or a device reboot): every consumer's filters restart
        there, so live, recorded and offline results agree.

    Arrays handed out by a ring are copies owned by the receiver.
    """

    codes: np.ndarray
    seq: np.ndarray
    t_device_s: np.ndarray
    t_host_s: np.ndarray
    status: np.ndarray
    restarts: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))

    def __len__(self) -> int:
        return int(self.seq.shape[0])

    @property
    def n_channels(self) -> int:
        return int(self.codes.shape[1])

    @classmethod
    def empty(cls, n_channels: int) -> "FrameBlock":
        return cls(
            codes=np.zeros((0, n_channels), dtype=np.uint16),
            seq=np.zeros(0, dtype=np.int64),
            t_device_s=np.zeros(0, dtype=np.float64),
            t_host_s=np.zeros(0, dtype=np.float64),
            status=np.zeros(0, dtype=np.uint8),
        )

    @classmethod
    def concat(cls, blocks: list["FrameBlock"], *, n_channels: int) -> "FrameBlock":
        if not blocks:
            return cls.empty(n_channels)
        if len(blocks) == 1:
            return blocks[0]
        offsets = np.cumsum([0] + [len(b) for b in blocks[:-1]])
        return cls(
            codes=np.concatenate([b.codes for b in blocks]),
            seq=np.concatenate([b.seq for b in blocks]),
            t_device_s=np.concatenate([b.t_device_s for b in blocks]),
            t_host_s=np.concatenate([b.t_host_s for b in blocks]),
            status=np.concatenate([b.status for b in blocks]),
            restarts=np.concatenate([b.restarts + o for b, o in zip(blocks, offsets)]).astype(np.int64),
        )

    def slice(self, start: int, stop: int) -> "FrameBlock":
        start, stop, _ = slice(start, stop).indices(len(self))
        r = self.restarts
        return FrameBlock(
            self.codes[start:stop],
            self.seq[start:stop],
            self.t_device_s[start:stop],
            self.t_host_s[start:stop],
            self.status[start:stop],
            restarts=r[(r >= start) & (r < stop)] - start,
        )


class FrameRing:
    """Preallocated ring of frames: one writer thread, many readers.

    Parameters
    ----------
    capacity_frames : int
        Frames kept; memory is fixed at construction
        (about ``capacity_frames * (2 * n_channels + 25)`` bytes).
    n_channels : int
    """

    def __init__(self, *, capacity_frames: int, n_channels: int):
        if capacity_frames < 1:
            raise ValueError("capacity_frames must be at least 1")
        self.capacity = int(capacity_frames)
        self.n_channels = int(n_channels)
        self._codes = np.zeros((self.capacity, self.n_channels), dtype=np.uint16)
        self._seq = np.zeros(self.capacity, dtype=np.int64)
        self._t_dev = np.zeros(self.capacity, dtype=np.float64)
        self._t_host = np.zeros(self.capacity, dtype=np.float64)
        self._status = np.zeros(self.capacity, dtype=np.uint8)
        self._written = 0  # frames ever written; position of the next frame
        self._restarts: deque[int] = deque(maxlen=1024)  # positions where the stream starts afresh
        self._cond = threading.Condition()
        self._closed = False

    @property
    def written(self) -> int:
        """Frames written since the ring was made."""
        return self._written

    @property
    def closed(self) -> bool:
        return self._closed

    def push(self, block: FrameBlock) -> None:
        """Append frames (writer thread only). Never blocks on readers."""
        n = len(block)
        if n == 0:
            return
        if block.n_channels != self.n_channels:
            raise ValueError(f"block has {block.n_channels} channels, ring has {self.n_channels}")
        if n > self.capacity:
            block = block.slice(n - self.capacity, n)
            skipped = n - self.capacity
            n = self.capacity
        else:
            skipped = 0
        with self._cond:
            start = (self._written + skipped) % self.capacity
            first = min(n, self.capacity - start)
            for dst, src in (
                (self._codes, block.codes),
                (self._seq, block.seq),
                (self._t_dev, block.t_device_s),
                (self._t_host, block.t_host_s),
                (self._status, block.status),
            ):
                dst[start : start + first] = src[:first]
                if first < n:
                    dst[: n - first] = src[first:]
            self._written += skipped + n
            self._cond.notify_all()

    def mark_restart(self) -> None:
        """Mark the next frame as a fresh start of the stream (writer thread only).

        Called by the reader after a reconnect or a device reboot; readers see
        it as :attr:`FrameBlock.restarts`.
        """
        with self._cond:
            if not self._restarts or self._restarts[-1] != self._written:
                self._restarts.append(self._written)

    def close(self) -> None:
        """Tell waiting readers that no more frames will come."""
        with self._cond:
            self._closed = True
            self._cond.notify_all()

    def cursor(self, *, from_oldest: bool = False) -> "RingCursor":
        """A new reader position: at the newest frame, or at the oldest still held."""
        with self._cond:
            pos = max(0, self._written - self.capacity) if from_oldest else self._written
        return RingCursor(self, pos)

    def wait(self, position: int, timeout_s: float) -> bool:
        """Wait until frames past ``position`` exist or the ring closes; True if there are frames."""
        with self._cond:
            if self._written <= position and not self._closed:
                self._cond.wait(timeout_s)
            return self._written > position

    def _copy(self, start: int, stop: int) -> FrameBlock:
        # caller holds the lock; [start, stop) is within the last ``capacity`` frames
        n = stop - start
        i0 = start % self.capacity
        idx = (i0 + np.arange(n)) % self.capacity if i0 + n > self.capacity else slice(i0, i0 + n)
        marks = [p - start for p in self._restarts if start <= p < stop]
        return FrameBlock(
            codes=self._codes[idx].copy(),
            seq=self._seq[idx].copy(),
            t_device_s=self._t_dev[idx].copy(),
            t_host_s=self._t_host[idx].copy(),
            status=self._status[idx].copy(),
            restarts=np.array(marks, dtype=np.int64),
        )

    def t_host_at(self, position: int) -> float | None:
        """Host time of the frame at ``position`` if the ring still holds it, else None."""
        with self._cond:
            if not max(0, self._written - self.capacity) <= position < self._written:
                return None
            return float(self._t_host[position % self.capacity])

    def latest(self, n_frames: int) -> FrameBlock:
        """Copy of the newest ``n_frames`` frames (fewer if the ring holds fewer)."""
        with self._cond:
            stop = self._written
            start = max(0, stop - min(n_frames, self.capacity))
            return self._copy(start, stop)


class RingCursor:
    """One consumer's read position in a :class:`FrameRing`.

    Attributes
    ----------
    position : int
        Index of the next frame this consumer will read.
    lost_frames : int
        Frames overwritten before this consumer read them.
    """

    def __init__(self, ring: FrameRing, position: int):
        self.ring = ring
        self.position = position
        self.lost_frames = 0

    def read(self, *, max_frames: int | None = None) -> FrameBlock:
        """Frames written since the last read (copies, owned by the caller)."""
        ring = self.ring
        with ring._cond:
            stop = ring._written
            oldest = max(0, stop - ring.capacity)
            if self.position < oldest:
                self.lost_frames += oldest - self.position
                self.position = oldest
            if max_frames is not None:
                stop = min(stop, self.position + max_frames)
            block = ring._copy(self.position, stop)
            self.position = stop
        return block

    def wait(self, timeout_s: float) -> bool:
        """Block up to ``timeout_s`` for new frames; True when some are there."""
        return self.ring.wait(self.position, timeout_s)

    @property
    def pending(self) -> int:
        return self.ring.written - self.position


@dataclass(frozen=True)
class Event:
    """Something that happened to the device link, for the record and the screen.

    Attributes
    ----------
    t_host_s : float
        Host time (session epoch, monotonic), s.
    frame_index : int
        Ring position of the next frame at the time of the event.
    kind : str
        ``hello``, ``disconnected``, ``reconnected``, ``reboot``, ``note``,
        ``reply``, ``error`` or ``info``.
    text : str
    """

    t_host_s: float
    frame_index: int
    kind: str
    text: str


class EventLog:
    """Bounded, thread-safe log of :class:`Event`; readers keep their own index."""

    def __init__(self, *, capacity: int = 4096):
        self._events: deque[Event] = deque(maxlen=capacity)
        self._count = 0
        self._lock = threading.Lock()

    def append(self, event: Event) -> None:
        with self._lock:
            self._events.append(event)
            self._count += 1

    @property
    def count(self) -> int:
        return self._count

    def since(self, index: int) -> tuple[list[Event], int]:
        """Events numbered ``index`` and later still held, and the next index."""
        with self._lock:
            first = self._count - len(self._events)
            start = max(index, first)
            return list(self._events)[start - first :], self._count
