"""Benchmark: `tapcurve record` keeping 16 channels at 25,000 frames/s through a pty.

Starts the virtual finger as its own process (16-segment rig, 25 kHz: about
1.1 MB/s, a USB full-speed-class stream), runs `tapcurve record --duration`
against it and reads the file back. Target: zero frames lost over 10 s.
Run by hand: ``.venv/bin/python bench/bench_record.py`` (``--quick``: 2 s at 5 kHz).
"""
from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

HERE = Path(__file__).resolve().parent
RIG16 = HERE / "rig16.toml"


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--rate-hz", type=float, default=25_000)
    ap.add_argument("--duration", type=float, default=10.0)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    rate, duration = (5_000.0, 2.0) if args.quick else (args.rate_hz, args.duration)
    with tempfile.TemporaryDirectory() as tmp:
        link = Path(tmp) / "finger"
        dev = subprocess.Popen(
            [sys.executable, "-m", "display.cli", "virtual-device", "--rig", str(RIG16),
             "--rate-hz", str(rate), "--link", str(link)],
            stdout=subprocess.PIPE, text=True,
        )
        try:
            port = dev.stdout.readline().strip()
            out = Path(tmp) / "bench.h5"
            before = resource.getrusage(resource.RUSAGE_CHILDREN)
            t0 = time.monotonic()
            rec = subprocess.run(
                [sys.executable, "-m", "display.cli", "record", "--port", port, "--rig", str(RIG16),
                 "--out", str(out), "--duration", str(duration), "--quiet"],
                capture_output=True, text=True, timeout=duration * 3 + 60,
            )
            wall = time.monotonic() - t0
            after = resource.getrusage(resource.RUSAGE_CHILDREN)
        finally:
            dev.terminate()
            dev.wait(10)
        if rec.returncode != 0:
            raise SystemExit(f"record failed: {rec.stderr}")
        with h5py.File(out, "r") as f:
            seq = f["raw/seq"][:]
            names = json.loads(f["counters/values"].attrs["names"])
            last = dict(zip(names, f["counters/values"][-1].tolist()))
            size = out.stat().st_size
    expected = int(round(duration * rate))
    result = {
        "rate_hz": rate,
        "channels": 16,
        "duration_s": duration,
        "frames_expected": expected,
        "frames_in_file": int(seq.shape[0]),
        "seq_gaps": int(np.count_nonzero(np.diff(seq) != 1)),
        "frames_lost_on_link": last["frames_lost"],
        "bad_packets": sum(v for k, v in last.items() if k.startswith("drop_")),
        "device_tx_overflows": last["tx_overflow_frames"],
        "record_wall_s": wall,
        "record_cpu_s": (after.ru_utime + after.ru_stime) - (before.ru_utime + before.ru_stime),
        "record_max_rss_mb": after.ru_maxrss / 1024,
        "file_mb": size / 1e6,
    }
    print(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main()
