"""Benchmark: recorder memory stays flat over a long run.

Feeds a FrameRing in-process with 16-channel frames at 25,000 frames/s (wall
clock) while a Recorder writes them, sampling the process's resident memory
every few seconds. Target: flat (no growth beyond noise) over 10 minutes.
Run by hand: ``.venv/bin/python bench/bench_recorder_memory.py`` (default 600 s;
``--quick``: 10 s; ``--seconds`` sets the length either way).
"""
from __future__ import annotations

import argparse
import json
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from acquire.link.frames import FrameBlock, FrameRing
from acquire.store.recorder import Recorder


def rss_mb() -> float:
    with open("/proc/self/statm") as fh:
        pages = int(fh.read().split()[1])
    return pages * 4096 / 1e6


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--seconds", type=float, default=None, help="length of the run (default 600 s, 10 s with --quick)")
    ap.add_argument("--rate-hz", type=float, default=25_000)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    seconds = args.seconds or (10.0 if args.quick else 600.0)
    channels = 16
    ring = FrameRing(capacity_frames=int(args.rate_hz * 20), n_channels=channels)
    rng = np.random.default_rng(0)
    pattern = rng.integers(0, 4096, (5000, channels)).astype(np.uint16)
    samples = []
    with tempfile.TemporaryDirectory() as tmp:
        rec = Recorder(path=Path(tmp) / "mem.h5", ring=ring, rig_toml="", device_hello="{}",
                       channel_names=[f"tap{k}" for k in range(channels)])
        rec.start()
        stop = threading.Event()

        def feed():
            n = 0
            t0 = time.monotonic()
            while not stop.is_set():
                due = int((time.monotonic() - t0) * args.rate_hz) - n
                if due <= 0:
                    time.sleep(0.002)
                    continue
                due = min(due, 5000)
                seq = np.arange(n, n + due)
                ring.push(FrameBlock(codes=pattern[:due], seq=seq, t_device_s=seq / args.rate_hz,
                                     t_host_s=np.full(due, time.monotonic()), status=np.zeros(due, np.uint8)))
                n += due

        feeder = threading.Thread(target=feed)
        feeder.start()
        t0 = time.monotonic()
        step = max(1.0, seconds / 30)
        while time.monotonic() - t0 < seconds:
            time.sleep(step)
            samples.append((time.monotonic() - t0, rss_mb()))
        stop.set()
        feeder.join()
        rec.stop()
        frames = rec.frames_written
        size = (Path(tmp) / "mem.h5").stat().st_size
    t = np.array([s[0] for s in samples])
    m = np.array([s[1] for s in samples])
    half = len(m) // 2
    slope = float(np.polyfit(t[half:], m[half:], 1)[0] * 60) if len(m) >= 4 else 0.0
    result = {
        "seconds": seconds,
        "frames_written": frames,
        "file_mb": size / 1e6,
        "rss_first_mb": float(m[0]),
        "rss_max_mb": float(m.max()),
        "rss_last_mb": float(m[-1]),
        "rss_slope_second_half_mb_per_min": slope,
        "recorder_error": rec.error,
    }
    print(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main()
