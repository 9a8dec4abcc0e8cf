"""Fixtures for the acquire tests: the virtual finger on a real pseudo-terminal."""
from __future__ import annotations

import json

import h5py
import numpy as np
import pytest

from acquire.link.reader import SerialReader
from acquire.store.recorder import Recorder
from acquire.virtual import VirtualFinger


@pytest.fixture
def finger(tmp_path):
    """A running virtual finger at 1 kHz; its port is ``finger.path``."""
    vf = VirtualFinger(rate_hz=1000, link_path=tmp_path / "finger")
    vf.start()
    assert vf.wait_ready(timeout_s=10)
    yield vf
    vf.stop()


@pytest.fixture(scope="session")
def record_jig_holds(wait_until):
    """A function that records labelled jig holds from a started virtual finger over its pty.

    ``record(dev, rig, path, holds, *, hold_s, settle_s, rate_hz)``: for each ``(label, curvature_per_m)``
    of ``holds`` the finger goes onto the jig, the host waits until the newest frame it has was made on
    it (frames still in the pty when the jig changed must not start the label, however far the reader
    lags), then ``settle_s`` of frames, then labels the next ``hold_s`` (device seconds) as a person
    pressing label buttons would; SerialReader -> FrameRing -> Recorder into ``path``. Returns the
    reader's counters. The device stays running (on the last jig) for the caller.
    """
    def wait_frames(ring, n: int) -> None:
        target = ring.written + n
        wait_until(lambda: ring.wait(target - 1, 0.05), timeout_s=60, what=f"{n} more frames (ring at {target})")

    def wait_held(ring, dev, k: float) -> None:
        def held() -> bool:
            block = ring.latest(1)
            if len(block) == 0:
                return False
            return bool(np.all(np.abs(dev.truth_for(1, block.seq)["curvature_per_m"][-1] - k) < 0.5))

        wait_until(held, timeout_s=60, what=f"frames held at {k:g} 1/m to reach the host")

    def newest_time_s(ring) -> float:
        return float(ring.latest(1).t_device_s[0])

    def record(dev, rig, path, holds, *, hold_s: float, settle_s: float, rate_hz: float) -> dict:
        reader = SerialReader(port=dev.path)
        reader.start()
        rec = Recorder(path=path, ring=reader.ring, rig_toml=rig.text, device_hello=json.dumps(reader.hello),
                       channel_names=rig.channels, events=reader.events, counters=reader.all_counters,
                       n_segments=rig.n_segments)
        rec.start()
        try:
            wait_frames(reader.ring, int(0.2 * rate_hz))
            for label, k in holds:
                dev.set_hold(label)  # the finger goes onto the next jig
                wait_held(reader.ring, dev, k)
                wait_frames(reader.ring, int(settle_s * rate_hz))
                t0 = newest_time_s(reader.ring)
                wait_frames(reader.ring, int(hold_s * rate_hz))
                rec.add_label(label, t_start_s=t0, t_end_s=newest_time_s(reader.ring))
        finally:
            rec.stop()
            reader.stop()
        assert rec.error is None
        return reader.all_counters()

    return record


@pytest.fixture(scope="session")
def truth_rows():
    """A function: ``truth_rows(path, seq, codes)``, the device truth file's rows (dict of arrays:
    ``curvature_per_m`` (N, S) 1/m, ``tip_xy_m`` (N, 2) m) of recorded frames: boot 1, the same sequence
    numbers; asserts the codes are the same too (the frames crossed the pty bit for bit, so the
    alignment is exact)."""
    def rows(path, seq: np.ndarray, codes: np.ndarray) -> dict:
        with h5py.File(path, "r") as t:
            boot = t["boot"][:]
            tseq = t["seq"][:]
            sel = np.flatnonzero(boot == 1)
            order = sel[np.argsort(tseq[sel])]
            idx = order[np.searchsorted(tseq[order], seq)]
            assert np.array_equal(tseq[idx], seq)
            assert np.array_equal(t["codes"][:][idx], codes)
            return {"curvature_per_m": t["curvature_per_m"][:][idx], "tip_xy_m": t["tip_xy_m"][:][idx]}

    return rows
