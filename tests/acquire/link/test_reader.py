"""The serial reader against the virtual finger on a real pty: handshake, commands, a port that vanishes."""
from __future__ import annotations

import json
import time

import numpy as np
import pytest

from acquire.link.reader import SerialReader
from acquire.store.recorder import Recorder
from acquire.store.recording import open_recording
from acquire.rig import load_rig


def test_handshake_stream_and_rate(finger, wait_until):
    reader = SerialReader(port=finger.path)
    reader.start()
    try:
        assert reader.n_channels == 6 and reader.rate_hz == 1000
        cur = reader.ring.cursor(from_oldest=True)
        wait_until(lambda: cur.pending >= 500, timeout_s=10, what="500 frames")
        block = cur.read()
        assert (np.diff(block.seq) == 1).all()
        assert np.allclose(np.diff(block.t_device_s), 1e-3)
        # a command and its reply; the reader follows the new rate
        assert reader.send_command(b"RATE 500\n") == "OK RATE 500"
        assert reader.rate_hz == 500
        assert reader.send_command(b"JUMP\n").startswith("ERR")
        cur.read()  # the frames at 1000 Hz, not looked at
        wait_until(lambda: cur.pending >= 200, timeout_s=10, what="frames at 500 Hz")
        after = cur.read()
        assert np.allclose(np.diff(after.t_device_s), 2e-3)
        assert reader.counters["frames_lost"] == 0
    finally:
        reader.stop()


def _record(reader, path):
    rig = load_rig(None)
    rec = Recorder(
        path=path,
        ring=reader.ring,
        rig_toml=rig.text,
        device_hello=json.dumps(reader.hello),
        channel_names=rig.channels,
        events=reader.events,
        counters=reader.all_counters,
    )
    rec.start()
    return rec


def test_device_reboots_recording_goes_on(finger, tmp_path, wait_until):
    reader = SerialReader(port=finger.path)
    reader.start()
    rec = _record(reader, tmp_path / "reboot.h5")
    try:
        wait_until(lambda: reader.counters["frames"] >= 500, timeout_s=10, what="frames before the outage")
        finger.vanish(outage_s=0.5, reboot=True)  # cable pulled, board reset, plugged in again
        wait_until(lambda: reader.counters["reboots"] == 1, timeout_s=15, what="the reader to see the reboot")
        n_at_reboot = reader.counters["frames"]
        wait_until(lambda: reader.counters["frames"] >= n_at_reboot + 500, timeout_s=10,
                   what="frames after the reboot")
    finally:
        reader.stop()
        rec.stop()
    assert rec.error is None
    with open_recording(tmp_path / "reboot.h5") as f:
        block = f.frames()
        kinds = [e[2] for e in f.events()]
        reboot_row = next(e[1] for e in f.events() if e[2] == "reboot")
    assert {"disconnected", "reconnected", "reboot"} <= set(kinds)
    # one column, one meaning: seq and device time keep increasing through the new epoch
    assert (np.diff(block.seq) == 1).all()
    dt = np.diff(block.t_device_s)
    assert (dt > 0).all()
    # the new epoch starts where the host's clock says: the device-time step is the host-time gap between
    # the last frame before and the first after (however long the reconnect took), at least the outage
    jump = block.t_device_s[reboot_row] - block.t_device_s[reboot_row - 1]
    host_gap = block.t_host_s[reboot_row] - block.t_host_s[reboot_row - 1]
    assert jump == pytest.approx(host_gap, abs=1e-6)
    assert jump > 0.4
    assert reader.counters["frames_lost"] == 0


def test_cable_pulled_device_kept_running(finger, tmp_path, wait_until):
    reader = SerialReader(port=finger.path)
    reader.start()
    try:
        cur = reader.ring.cursor(from_oldest=True)  # every frame of the run (the ring holds 20 s)
        wait_until(lambda: reader.counters["frames"] >= 300, timeout_s=10, what="frames before the outage")
        finger.vanish(outage_s=0.4, reboot=False)
        wait_until(lambda: reader.counters["reconnects"] == 1, timeout_s=15, what="the reconnect")
        n = reader.counters["frames"]
        wait_until(lambda: reader.counters["frames"] >= n + 300, timeout_s=10, what="frames after the outage")
        block = cur.read()
    finally:
        reader.stop()
    assert reader.counters["reboots"] == 0 and cur.lost_frames == 0
    # The board kept counting while no one listened: its frames in between are counted as lost, exactly the
    # gaps in seq, and its own clock (1 ms per frame, running on) says the largest gap spans the outage.
    # Device time, not the host's: how long the reconnect takes depends on the machine's load.
    d_seq = np.diff(block.seq)
    assert reader.counters["frames_lost"] == int((d_seq - 1).sum())
    i = int(np.argmax(d_seq))
    gap_s = block.t_device_s[i + 1] - block.t_device_s[i]
    assert d_seq[i] == round(gap_s * 1000)
    assert gap_s > 0.35  # the 0.4 s outage, less at most a generation tick at either end


def test_host_stamps_are_monotonic_clock(finger, wait_until):
    """Host receive times come from CLOCK_MONOTONIC (Python's time.monotonic), which NTP steps,
    daylight-saving changes and manual clock setting do not move (POSIX clock_gettime(2):
    CLOCK_MONOTONIC "cannot be set"). A wall-clock stamp would fall outside this window."""
    reader = SerialReader(port=finger.path)
    before = time.monotonic()
    reader.start()
    try:
        cur = reader.ring.cursor(from_oldest=True)
        wait_until(lambda: cur.pending >= 300, timeout_s=10, what="frames")
        block = cur.read()
        after = time.monotonic()
    finally:
        reader.stop()
    assert before <= block.t_host_s.min() and block.t_host_s.max() <= after
    assert (np.diff(block.t_host_s) >= 0).all()


def test_long_silent_gap_is_counted_not_folded():
    """40 s without frames at 1 kHz: the 16-bit seq folds (40,001 mod 65,536 looks like a step back), but the
    32-bit device clock tells the true gap; the frames are counted as lost, seq jumps by the true amount."""
    from firmware_protocol import SampleBlock

    reader = SerialReader(port="unused")
    reader.hello = {"channels": 1, "rate_hz": 1000.0, "adc_bits": 12}
    from acquire.link.frames import FrameRing

    reader.ring = FrameRing(capacity_frames=1000, n_channels=1)
    cur = reader.ring.cursor()

    def block(seqs, t_us):
        n = len(seqs)
        return SampleBlock(np.array(seqs, np.uint16), np.array(t_us, np.uint32), np.zeros(n, np.uint8),
                           np.zeros((n, 1), np.uint16))

    reader._push_samples(block([7, 8, 9], [7000, 8000, 9000]), 1.0)
    gap = 40_001  # frames 10 .. 40_009 never arrived
    s = 9 + gap
    reader._push_samples(block([s % 65536, (s + 1) % 65536], [s * 1000, (s + 1) * 1000]), 41.0)
    seq = cur.read().seq
    assert seq.tolist() == [7, 8, 9, s, s + 1]
    assert reader.counters["frames_lost"] == gap - 1
    assert reader.counters["seq_discontinuities"] == 0


def test_hello_checks():
    from acquire.link.reader import _hello_problem

    good = {"protocol": 1, "channels": 6, "rate_hz": 1000, "adc_bits": 12, "firmware": "x"}
    assert _hello_problem(good) is None
    for key, bad, words in [("protocol", 2, "protocol 2"), ("adc_bits", "twelve", "adc_bits"),
                            ("adc_bits", 40, "adc_bits 40"), ("channels", 0, "channels 0"),
                            ("rate_hz", -5, "rate_hz -5")]:
        assert words in _hello_problem(dict(good, **{key: bad}))
