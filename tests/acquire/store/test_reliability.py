"""Reliability of recording: killed recorders, a full disk, corrupted streams.

Each test drives the real command line against the virtual finger on a pty.
"""
from __future__ import annotations

import random
import resource
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from acquire.store.recording import open_recording
from acquire.virtual import Faults, VirtualFinger

REPO = Path(__file__).resolve().parents[3]
RIG = REPO / "acquire" / "rigs" / "demo_finger.toml"


def record_cmd(port: str, out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "display.cli", "record", "--port", port, "--rig", str(RIG), "--out", str(out),
            "--quiet", *extra]


def wait_for_file(wait_until, path: Path, proc: subprocess.Popen, timeout_s: float) -> None:
    def there() -> bool:
        if proc.poll() is not None:
            pytest.fail(f"recorder exited early: {proc.stderr.read()}")
        return path.exists()

    wait_until(there, timeout_s=timeout_s, what=f"the recorder to create {path.name}")


def _frames_on_disk(path: Path) -> int:
    """What a reader sees in a recording that is being written (SWMR read, the recorder untouched)."""
    with open_recording(path) as rec:
        assert rec.live  # the writer is alive
        return rec.n_frames


def test_sigkill_at_random_moments(finger, tmp_path, wait_until):
    """20 recorders killed with SIGKILL at random moments: every file opens with h5py and h5dump and
    holds every frame a reader saw on disk just before the kill (SWMR: what was flushed stays). How much a
    kill loses at most (the flush interval) depends on the machine's load: a figure, not checked here."""
    rng = random.Random(20261202)
    h5dump = shutil.which("h5dump")
    seen_before = []
    for k in range(20):
        out = tmp_path / f"killed{k}.h5"
        proc = subprocess.Popen(record_cmd(finger.path, out), stderr=subprocess.PIPE, text=True, cwd=REPO)
        try:
            wait_for_file(wait_until, out, proc, 20)
            time.sleep(rng.uniform(0.05, 1.5))  # the random moment, not a wait for a result
            seen_before.append(_frames_on_disk(out))
            proc.send_signal(signal.SIGKILL)
        finally:
            proc.wait(10)
        with open_recording(out) as rec:
            assert rec.recovered or not rec.live
            n = rec.n_frames
            seq = rec.frames().seq
        assert n >= seen_before[-1], (k, n, seen_before[-1])
        assert n == 0 or (np.diff(seq) == 1).all()
        with h5py.File(out, "r") as f:  # plain h5py after the recovery
            assert f["raw/adc"].shape[0] >= n
        if h5dump:
            res = subprocess.run([h5dump, "-H", str(out)], capture_output=True, timeout=60)
            assert res.returncode == 0, res.stderr
    # the recorder flushes while it records (not only at a clean stop): some reader saw frames on disk
    assert max(seen_before) > 0, seen_before


def test_file_size_limit_stops_recording_cleanly(tmp_path):
    """A write that cannot fit (RLIMIT_FSIZE, as on a full disk): one clear message, and the file
    holds everything up to the stop and opens normally."""
    vf = VirtualFinger(rate_hz=5000, link_path=tmp_path / "finger")
    vf.start()
    try:
        assert vf.wait_ready(timeout_s=10)
        out = tmp_path / "full.h5"
        limit = 500_000  # reached within seconds at 5 kHz, still far more than 5000 frames in

        def small_files():
            resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

        res = subprocess.run(record_cmd(vf.path, out, "--duration", "30"), preexec_fn=small_files,
                             capture_output=True, text=True, timeout=90, cwd=REPO)
    finally:
        vf.stop()
    assert res.returncode == 1, res.stderr
    assert "Traceback" not in res.stderr
    msg = [line for line in res.stderr.splitlines() if line.startswith("tapcurve:")]
    assert len(msg) == 1 and "file size limit" in msg[0] and str(out) in msg[0]
    assert out.stat().st_size <= limit
    with h5py.File(out, "r") as f:  # closed cleanly: no repair needed
        seq = f["raw/seq"][:]
        assert seq.shape[0] > 5000 and (np.diff(seq) == 1).all()
        said = int(msg[0].split("holds the ")[1].split()[0])
        assert said == seq.shape[0]


def test_corrupted_stream_every_good_packet_kept(tmp_path):
    """A link that corrupts 5% of packets and drops 2%: the file holds exactly the packets that
    arrived intact (checked against the device's own record of each frame's fate), nothing else."""
    truth = tmp_path / "truth.h5"
    vf = VirtualFinger(rate_hz=1000, link_path=tmp_path / "finger", truth_path=truth,
                       faults=Faults(corrupt_rate=0.05, drop_rate=0.02), seed=3)
    vf.start()
    out = tmp_path / "noisy.h5"
    try:
        assert vf.wait_ready(timeout_s=10)
        res = subprocess.run(record_cmd(vf.path, out, "--duration", "3"), capture_output=True, text=True,
                             timeout=60, cwd=REPO)
    finally:
        vf.stop()
    assert res.returncode == 0, res.stderr
    with open_recording(out) as rec:
        seq = rec.frames().seq
        codes = rec.frames().codes
        counters = rec.counters()
    with h5py.File(truth, "r") as t:
        names = list(t.keys())
        t_seq = t["seq"][:] if "seq" in t else t["frame"][:]
        fate = t["fate"][:]
        t_codes = t["codes"][:] if "codes" in t else None
    sent = set(t_seq[fate == 0].tolist())
    assert set(seq.tolist()) <= sent | set(t_seq[fate == 1].tolist())  # nothing that was never sent
    got = set(seq.tolist())
    first, last = int(seq[0]), int(seq[-1])
    intact = {s for s in sent if first <= s <= last}
    assert intact <= got, f"good packets lost: {sorted(intact - got)[:10]} ({names})"
    if t_codes is not None:
        index = {int(s): i for i, s in enumerate(t_seq)}
        rows = [index[int(s)] for s in seq]
        assert (codes == t_codes[rows]).all()  # no corrupted packet passed as good
    bad = sum(v for k, v in counters.items() if k.startswith("drop_"))
    assert bad > 0 and counters["frames_lost"] > 0


def _rss_mb(pid: int) -> float | None:
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024
    except FileNotFoundError:
        return None
    return None


@pytest.mark.slow
def test_long_run_sped_up(tmp_path):
    """2 minutes of device time at 1 kHz, sent 8x faster than real time (slow enough for a loaded
    2-core machine): memory flat, seq wrapping and the device's 32-bit microsecond clock wrapping
    (1 min in) handled, file size as expected. bench/bench_long_run.py does the full hour, faster."""
    wrap_in_s = 60.0
    vf = VirtualFinger(rate_hz=1000, time_scale=8, link_path=tmp_path / "finger",
                       clock_start_s=2**32 / 1e6 - wrap_in_s)
    vf.start()
    out = tmp_path / "long.h5"
    rss = []
    try:
        assert vf.wait_ready(timeout_s=10)
        proc = subprocess.Popen(record_cmd(vf.path, out, "--duration", "120"), stderr=subprocess.PIPE,
                                text=True, cwd=REPO)
        while proc.poll() is None:
            value = _rss_mb(proc.pid)
            if value is not None:
                rss.append(value)
            try:
                proc.wait(0.5)  # a sampling interval, not a wait for a result
            except subprocess.TimeoutExpired:
                pass
        err = proc.stderr.read()
    finally:
        vf.stop()
    assert proc.returncode == 0, err
    with open_recording(out) as rec:
        seq = rec.frames().seq
        t = rec.file["raw/t_device_s"][:]
        lost = rec.counters()["frames_lost"]
    assert seq.shape[0] == 120_000 and lost == 0
    assert (np.diff(seq) == 1).all()
    assert np.allclose(np.diff(t), 1e-3, atol=2e-6)  # straight through the 2**32 us wrap
    per_frame = 2 * 6 + 8 + 8 + 8 + 1  # adc, seq, t_device, t_host, status, uncompressed
    # /raw is deflated: smaller than the bare columns, never larger than them plus chunk overhead
    assert 1000 < out.stat().st_size < 1.1 * 120_000 * per_frame
    # memory flat: the second half of the run uses no more than the first half plus noise
    half = len(rss) // 2
    assert len(rss) > 10
    assert max(rss[half:]) < max(rss[:half]) + 8.0, rss
