"""The frame ring: bounded, never blocks the writer, counts what a slow reader lost."""
from __future__ import annotations

import threading

import numpy as np

from acquire.link.frames import EventLog, Event, FrameBlock, FrameRing


def _block(start: int, n: int, channels: int = 3) -> FrameBlock:
    seq = np.arange(start, start + n, dtype=np.int64)
    return FrameBlock(
        codes=(seq[:, None] + np.arange(channels)).astype(np.uint16),
        seq=seq,
        t_device_s=seq * 1e-3,
        t_host_s=seq * 1e-3,
        status=np.zeros(n, dtype=np.uint8),
    )


def test_wraparound_keeps_order():
    ring = FrameRing(capacity_frames=10, n_channels=3)
    cur = ring.cursor()
    got = []
    for start in range(0, 95, 7):
        ring.push(_block(start, 7))
        got += cur.read().seq.tolist()
    assert got == list(range(0, 98))
    assert cur.lost_frames == 0


def test_slow_reader_loses_oldest_and_counts():
    ring = FrameRing(capacity_frames=10, n_channels=3)
    cur = ring.cursor()
    ring.push(_block(0, 25))
    block = cur.read()
    assert block.seq.tolist() == list(range(15, 25))
    assert cur.lost_frames == 15
    assert (block.codes[:, 0] == block.seq).all()


def test_oversized_push_and_latest():
    ring = FrameRing(capacity_frames=8, n_channels=3)
    ring.push(_block(0, 20))
    assert ring.latest(3).seq.tolist() == [17, 18, 19]
    assert ring.written == 20
    assert ring.cursor(from_oldest=True).read().seq.tolist() == list(range(12, 20))


def test_max_frames_and_wait():
    ring = FrameRing(capacity_frames=100, n_channels=3)
    cur = ring.cursor()
    arrived = threading.Event()

    def consumer():
        if cur.wait(timeout_s=5.0):
            arrived.set()

    t = threading.Thread(target=consumer)
    t.start()
    ring.push(_block(0, 5))
    t.join(5.0)
    assert arrived.is_set()
    assert cur.read(max_frames=2).seq.tolist() == [0, 1]
    assert cur.read().seq.tolist() == [2, 3, 4]


def test_event_log_cursor():
    log = EventLog(capacity=3)
    for k in range(5):
        log.append(Event(float(k), k, "note", str(k)))
    events, nxt = log.since(0)
    assert [e.text for e in events] == ["2", "3", "4"] and nxt == 5
    assert log.since(5) == ([], 5)
