"""The shape stream's ``force_n`` and ``actuation``: real sockets on 127.0.0.1, read with the json module.

Reference: the same frames through an offline pipeline (the publisher's
numbers must be the pipeline's, to the message's 10 uN steps), and the rig's
linear actuation scale computed by hand.
"""
from __future__ import annotations

import dataclasses
import json
import socket
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from acquire.core.calibration_fit import fit_calibration
from acquire.core.force import ForceModel
from acquire.core.pipeline import process_arrays
from acquire.link.frames import FrameBlock, FrameRing
from acquire.rig import parse_rig
from acquire.serve.publish import ShapePublisher
from acquire.virtual import FingerModel

REPO = Path(__file__).resolve().parents[3]
PER_CODE, OFFSET = 0.0244140625, 409.6
N = 600


@pytest.fixture(scope="module")
def rig():
    text = (REPO / "acquire" / "rigs" / "demo_finger.toml").read_text().replace(
        'channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5"]',
        'channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5", "pressure"]',
    ) + f'\n[actuation]\nchannel = "pressure"\nunit = "kPa"\nper_code = {PER_CODE}\noffset_code = {OFFSET}\n'
    return parse_rig(text, source="force rig")


@pytest.fixture(scope="module")
def calibration(rig):
    model = FingerModel(rig=rig, seed=0)
    t = np.arange(200) / 1000.0
    holds = [(float(k), model.with_hold(f"curvature={k}/m").segment_ohm(t)) for k in (-20, 0, 20, 40, 60)]
    cal, _ = fit_calibration(holds, rig=rig)
    force = ForceModel(rig.segment_lengths_m, np.full(6, 3e-3), np.full((6, 1), 0.5), "kPa")  # made up
    return dataclasses.replace(cal, force=force.to_dict())


@pytest.fixture(scope="module")
def codes(rig):
    fi = np.arange(N)
    c = FingerModel(rig=rig, seed=0).with_hold("radius=25mm").codes(fi / 1000.0, frame_index=fi)
    c[:, 6] = np.round(2000 + 800 * np.sin(2 * np.pi * fi / 400.0))
    return c


def _read(port: int, n: int):
    """Connect; a reader thread collects the first ``n`` frame messages (``done`` set then, or on an error)."""
    msgs: list[dict] = []
    done = threading.Event()
    sock = socket.create_connection(("127.0.0.1", port), timeout=30)

    def reader():
        try:
            for line in sock.makefile("r", encoding="utf-8"):
                m = json.loads(line)
                if "seq" in m:
                    msgs.append(m)
                if len(msgs) >= n:
                    break
        except (OSError, ValueError) as exc:  # shown by the waiting test
            msgs.append({"error": f"{type(exc).__name__}: {exc}; line {line[:300]!r}"})
        done.set()

    threading.Thread(target=reader, daemon=True).start()
    return sock, msgs, done


@pytest.mark.parametrize("calibrated", [True, False])
def test_messages_carry_force_and_actuation(rig, calibration, codes, calibrated):
    ring = FrameRing(capacity_frames=10_000, n_channels=rig.n_channels)
    pub = ShapePublisher(address="127.0.0.1:0", ring=ring, rig=rig, calibration=calibration if calibrated else None,
                         rate_hz=1000.0, announce=False, client_buffer_bytes=64 << 20)  # no drops in a burst
    pub.start()
    try:
        sock, msgs, done = _read(pub.port, N)
        assert pub.wait_for_clients(1, timeout_s=30)
        fi = np.arange(N)
        for part in np.array_split(fi, 60):
            ring.push(FrameBlock(codes=codes[part], seq=part.astype(np.int64), t_device_s=part / 1000.0,
                                 t_host_s=np.full(part.size, time.monotonic()), status=np.zeros(part.size, np.uint8)))
        assert done.wait(30), f"{len(msgs)} of {N} messages; publisher: {pub.error} {pub.stats()}"
        sock.close()
        assert "error" not in msgs[-1], msgs[-1]
    finally:
        pub.stop()
    act = np.array([m["actuation"] for m in msgs])
    np.testing.assert_allclose(act, (codes[:, 6] - OFFSET) * PER_CODE, rtol=1e-5)  # the rig's scale, 6 digits
    if not calibrated:
        assert all("force_n" not in m and "curvature" not in m for m in msgs)
        return
    ref = process_arrays(codes, rig=rig, calibration=calibration, rate_hz=1000.0, adc_bits=12)
    force = np.array([m["force_n"] for m in msgs], dtype=np.float64)
    np.testing.assert_allclose(force, ref.force_n, atol=6e-6)  # printed in 10 uN steps
    assert np.ptp(force[:, 1]) > 0.01
