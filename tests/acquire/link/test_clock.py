"""Device-host clock drift: estimated as frames arrive and stored in the recording."""
from __future__ import annotations

import json
import os
import select
import threading
import time
import tty

import numpy as np
import pytest

import firmware_protocol as fp
from acquire.link.clock import ClockFit
from acquire.link.reader import SerialReader
from acquire.store.recorder import Recorder
from acquire.store.recording import open_recording


def test_fit_recovers_known_drift():
    # synthetic: host = device * (1 + 150e-6) + 0.020 + latency, latency >= 0 (exponential, 2 ms mean)
    rng = np.random.default_rng(4)
    fit = ClockFit()
    for k in range(400):  # 400 batches of 250 frames at 1 kHz: 100 s
        t_dev = (k * 250 + np.arange(250)) * 1e-3
        t_host = t_dev * (1 + 150e-6) + 0.020 + rng.exponential(0.002, 250)
        fit.add_batch(t_dev, t_host)
    drift_ppm, offset_s = fit.estimate()
    assert drift_ppm == pytest.approx(150, abs=2)
    assert offset_s == pytest.approx(0.020, abs=2e-4)


class DriftingBoard:
    """A minimal protocol-v1 board on a pty whose clock runs slow by ``ppm``."""

    def __init__(self, *, ppm: float, rate_hz: float = 1000.0):
        self.master, self.slave = os.openpty()
        tty.setraw(self.slave)
        self.path = os.ttyname(self.slave)
        self.ppm, self.rate = ppm, rate_hz
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self.run, daemon=True)
        self.thread.start()

    def run(self):
        buf, streaming, sent, t0 = b"", False, 0, 0.0
        while not self.stop.is_set():
            if select.select([self.master], [], [], 0.002)[0]:
                buf += os.read(self.master, 1024)
            while b"\n" in buf:
                line, buf = buf.split(b"\n", 1)
                word, _ = fp.parse_command(line + b"\n")
                if word == "HELLO?":
                    info = {"protocol": 1, "firmware": "drift test board", "adc_bits": 12, "channels": 6,
                            "rate_hz": self.rate}
                    os.write(self.master, fp.encode_packet(fp.Hello(info)))
                elif word == "START":
                    streaming, sent, t0 = True, 0, time.monotonic()
                elif word == "STOP":
                    streaming = False
            if streaming:
                # frames leave on the host's schedule; their stamps come from the slow device clock
                due = int((time.monotonic() - t0) * self.rate) - sent
                if due > 0:
                    idx = np.arange(sent, sent + due)
                    t_us = np.round(idx / self.rate * (1 - self.ppm * 1e-6) * 1e6).astype(np.int64)
                    codes = np.tile(np.array([3500, 3000, 2500, 2000, 1500, 1000], np.uint16), (due, 1))
                    os.write(self.master, fp.encode_samples_bulk(seq=idx, t_us=t_us, status=np.zeros(due), codes=codes))
                    sent += due

    def close(self):
        self.stop.set()
        self.thread.join(5)
        os.close(self.master)
        os.close(self.slave)


def test_drift_stored_in_recording(tmp_path, wait_until):
    # a poor clock: 3 % slow, as an internal RC oscillator left uncalibrated may be (common practice, no
    # source). Large on purpose: the fit's error is the host's read latency jitter over the run, a few ms
    # on a loaded machine, i.e. several hundred ppm over 6 s; 3 % keeps that a small fraction of the answer
    board = DriftingBoard(ppm=30000.0)
    reader = SerialReader(port=board.path)
    reader.start()
    out = tmp_path / "drift.h5"
    rec = Recorder(path=out, ring=reader.ring, rig_toml="", device_hello=json.dumps(reader.hello),
                   channel_names=[f"tap{k}" for k in range(6)])
    rec.start()
    try:
        # 6 s at 1 kHz: enough clock points for the fit (a failed recorder ends the wait at once)
        wait_until(lambda: rec.frames_written >= 6000 or rec.wait_finished(0), timeout_s=60,
                   what="6000 frames recorded")
    finally:
        reader.stop()
        rec.stop()
        board.close()
    assert rec.error is None
    with open_recording(out) as f:
        clock = f.clock()
    assert clock is not None and clock["points"] > 10
    # device 30000 ppm slow -> host time advances about 30000 ppm faster than device time (exactly
    # 1 / (1 - 0.03) - 1 = 30928 ppm: the board stamps frames due at host time t with 0.97 t)
    assert clock["drift_ppm"] == pytest.approx(1e6 * (1 / (1 - 0.03) - 1), rel=0.1)
