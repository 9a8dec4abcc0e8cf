"""Benchmark: a 1-hour recording at 1 kHz, sped up by the virtual finger.

The virtual finger sends an hour of 1 kHz frames 60x faster than real time,
its 32-bit microsecond clock set to wrap half way; `tapcurve record` writes
them. Reports resident memory of the recorder over the run, frames, seq and
time continuity, file size, and reopens the file as replay would.
Run by hand: ``.venv/bin/python bench/bench_long_run.py`` (about 70 s;
``--quick``: one minute of device time at 20x).
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from acquire.store.recording import open_recording
from acquire.virtual import VirtualFinger

REPO = Path(__file__).resolve().parents[1]


def rss_mb(pid: int) -> float | None:
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024
    except FileNotFoundError:
        return None
    return None


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--device-seconds", type=float, default=3600.0)
    ap.add_argument("--time-scale", type=float, default=60.0)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    seconds, scale = (60.0, 20.0) if args.quick else (args.device_seconds, args.time_scale)
    rate = 1000.0
    with tempfile.TemporaryDirectory() as tmp:
        vf = VirtualFinger(rate_hz=rate, time_scale=scale, link_path=Path(tmp) / "finger",
                           clock_start_s=2**32 / 1e6 - seconds / 2)
        vf.start()
        out = Path(tmp) / "hour.h5"
        samples = []
        t0 = time.monotonic()
        try:
            assert vf.wait_ready(timeout_s=10)
            proc = subprocess.Popen(
                [sys.executable, "-m", "display.cli", "record", "--port", vf.path,
                 "--rig", str(REPO / "acquire" / "rigs" / "demo_finger.toml"), "--out", str(out),
                 "--duration", str(seconds), "--quiet"],
                stderr=subprocess.PIPE, text=True,
            )
            while proc.poll() is None:
                m = rss_mb(proc.pid)
                if m is not None:
                    samples.append((time.monotonic() - t0, m))
                try:
                    proc.wait(1.0)
                except subprocess.TimeoutExpired:
                    pass
            err = proc.stderr.read()
        finally:
            vf.stop()
        wall = time.monotonic() - t0
        if proc.returncode != 0:
            raise SystemExit(f"record failed: {err}")
        t_open = time.monotonic()
        with open_recording(out) as rec:
            n = rec.n_frames
            seq = rec.file["raw/seq"][:]
            t = rec.file["raw/t_device_s"][:]
            last = rec.frames(n - 1000, n)  # what replay reads: a window, not the whole file
            counters = rec.counters()
        open_s = time.monotonic() - t_open
        size = out.stat().st_size
    m = np.array([s[1] for s in samples])
    half = len(m) // 2
    result = {
        "device_seconds": seconds,
        "time_scale": scale,
        "wall_s": wall,
        "frames": int(n),
        "frames_expected": int(seconds * rate),
        "frames_lost": counters.get("frames_lost"),
        "seq_contiguous": bool((np.diff(seq) == 1).all()),
        "t_device_steps_ok": bool(np.allclose(np.diff(t), 1 / rate, atol=2e-6)),
        "seq_wraps": int(seconds * rate // 65536),
        "device_clock_wraps": 1,
        "file_mb": size / 1e6,
        "file_bytes_per_frame": size / max(n, 1),
        "rss_first_half_max_mb": float(m[:half].max()) if half else None,
        "rss_second_half_max_mb": float(m[half:].max()) if half else None,
        "reopen_and_read_window_s": open_s,
        "last_window_frames": len(last),
    }
    print(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main()
