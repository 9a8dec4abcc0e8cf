"""Benchmark: the numpy low-pass against scipy.signal.sosfilt, offline and in live-sized chunks.

Run by hand: ``.venv/bin/python bench/bench_filters.py`` (``--quick`` for a
short check). Figures, printed as JSON:

- ``offline_ms``: 200,000 frames x 6 signals in one call, best and median of
  repeats, for :class:`acquire.core.filters.LowPassFilter` and for
  ``scipy.signal.sosfilt`` (axis 0, with zi) on the same design. Target: ours
  no slower than scipy's;
- ``live_us_per_call``: median time of one call for chunks of 1 to 20 frames
  (the processing thread's typical chunks at 1 kHz), both ways.

Figures depend on the machine's load; OpenBLAS threads matter for the
offline path (``OPENBLAS_NUM_THREADS=1`` to compare single-core).
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402


def _times_ms(fn, repeats: int, *, unit_s: float = 1e-3) -> tuple[float, float]:
    """Best and median time of ``fn``, in ``unit_s`` (ms by default)."""
    t = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        t.append(time.perf_counter() - t0)
    return round(min(t) / unit_s, 2), round(float(np.median(t)) / unit_s, 2)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="short run (a check that the benchmark works)")
    args = ap.parse_args(argv)
    from scipy import signal

    from acquire.core.filters import LowPassFilter

    frames = 20_000 if args.quick else 200_000
    repeats = 3 if args.quick else 15
    calls = 200 if args.quick else 3000
    rng = np.random.default_rng(0)
    x = 10000.0 + np.cumsum(rng.normal(size=(frames, 6)), axis=0)
    out = {"benchmark": "low-pass filter", "quick": args.quick, "frames": frames, "signals": 6,
           "rate_hz": 1000.0, "cutoff_hz": 40.0, "offline_ms": {}, "live_us_per_call": {},
           "openblas_threads": os.environ.get("OPENBLAS_NUM_THREADS", "default"), "cpus": os.cpu_count()}
    for order in (2, 4):
        f = LowPassFilter(6, cutoff_hz=40.0, rate_hz=1000.0, order=order)
        f.process(x[:1])
        zi = signal.sosfilt_zi(f.sos)[:, :, None] * x[0]
        ours = _times_ms(lambda: f.process(x), repeats)
        ref = _times_ms(lambda: signal.sosfilt(f.sos, x, axis=0, zi=zi), repeats)
        out["offline_ms"][f"order {order}"] = {"numpy_block": ours, "scipy_sosfilt": ref,
                                               "best_ratio": round(ours[0] / ref[0], 2)}
        live = {}
        for n in (1, 2, 5, 10, 20):
            chunk = x[:n].copy()
            z = zi.copy()
            a = _times_ms(lambda: f.process(chunk), calls, unit_s=1e-6)[1]
            b = _times_ms(lambda: signal.sosfilt(f.sos, chunk, axis=0, zi=z), calls, unit_s=1e-6)[1]
            live[f"{n} frames"] = {"numpy_block": round(a, 1), "scipy_sosfilt": round(b, 1)}
        out["live_us_per_call"][f"order {order}"] = live
    print(json.dumps(out, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
