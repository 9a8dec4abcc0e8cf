"""Benchmark: one frame in the live path.

The live view and the recorder hand the numeric core small blocks, often a
single frame. Measured on the built-in demo rig (6 segments, 1 mm point
spacing, a 14 mm tip: 111 shape points):

- ``reconstruct_us``: curvature -> shape points of one frame
  (``Reconstructor.shape_xy``), in single precision as the live pipeline
  runs it, and in double precision. Target: at most 50 us.
- ``pipeline_us``: the whole chain for one frame (``Pipeline.process``:
  readout, wiring checks, spike filter, low-pass, calibration,
  reconstruction), and per frame for blocks of 17 frames (a 60 Hz redraw at
  1 kHz).

Each figure is the best of several runs of many calls (microseconds per
call). Run by hand: ``.venv/bin/python bench/bench_reconstruct.py``
(``--quick`` for a short check).
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from acquire.core.calibration import Calibration  # noqa: E402
from acquire.link.frames import FrameBlock  # noqa: E402
from acquire.core.pipeline import Pipeline  # noqa: E402
from acquire.core.reconstruct import Reconstructor  # noqa: E402
from acquire.rig import load_rig  # noqa: E402
from acquire.virtual.model import FingerModel  # noqa: E402

RATE_HZ = 1000.0
BITS = 12


def best_us(fn, *, calls: int, repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        for _ in range(calls):
            fn()
        best = min(best, (time.perf_counter() - t0) / calls)
    return 1e6 * best


def demo_calibration(rig) -> Calibration:
    """A plausible calibration of the demo rig (made up: cubic for positive bends, quadratic for negative)."""
    n = rig.n_segments
    return Calibration(
        r0_ohm=np.full(n, 7000.0), positive=[[50.0, -8.0, 1.0]] * n, negative=[[140.0, 10.0]] * n,
        x_min=np.full(n, -0.2), x_max=np.full(n, 1.2), curvature_min_per_m=np.full(n, -25.0),
        curvature_max_per_m=np.full(n, 50.0), readout_kind="divider", rig={"n_segments": n},
    )


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small run that only checks the benchmark works")
    args = ap.parse_args(argv)
    calls, repeats = (200, 2) if args.quick else (5000, 5)
    rig = load_rig(None)
    rec = Reconstructor.from_rig(rig)
    k = np.array([[12.0, 18.0, 22.0, 25.0, 20.0, 15.0]])
    frames = 4 * calls + 64
    model = FingerModel(rig=rig, seed=0, adc_bits=BITS)
    i = np.arange(frames)
    codes = model.codes(i / RATE_HZ, frame_index=i)
    blocks = [
        FrameBlock(codes=codes[j:j + 1], seq=i[j:j + 1], t_device_s=i[j:j + 1] / RATE_HZ,
                   t_host_s=i[j:j + 1] / RATE_HZ, status=np.zeros(1, np.uint8))
        for j in range(frames)
    ]
    pipe = Pipeline(rig=rig, calibration=demo_calibration(rig), rate_hz=RATE_HZ, adc_bits=BITS)
    it = iter(blocks * (repeats + 1))
    one = best_us(lambda: pipe.process(next(it)), calls=calls, repeats=repeats)
    pipe17 = Pipeline(rig=rig, calibration=demo_calibration(rig), rate_hz=RATE_HZ, adc_bits=BITS)
    big = [
        FrameBlock(codes=codes[j:j + 17], seq=i[j:j + 17], t_device_s=i[j:j + 17] / RATE_HZ,
                   t_host_s=i[j:j + 17] / RATE_HZ, status=np.zeros(17, np.uint8))
        for j in range(0, frames - 17, 17)
    ]
    it17 = iter(big * (repeats * calls // len(big) + 2))
    block17 = best_us(lambda: pipe17.process(next(it17)), calls=max(1, calls // 4), repeats=repeats) / 17
    result = {
        "shape_points": rec.n_points,
        "segments": rig.n_segments,
        "reconstruct_us_float32": best_us(lambda: rec.shape_xy(k, dtype=np.float32), calls=calls, repeats=repeats),
        "reconstruct_us_float64": best_us(lambda: rec.shape_xy(k), calls=calls, repeats=repeats),
        "pipeline_us_one_frame": one,
        "pipeline_us_per_frame_blocks_of_17": block17,
        "target_reconstruct_us": 50.0,
    }
    print(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main()
