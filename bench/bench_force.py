"""Benchmark: what the force estimate adds to the live path.

The live view, the recorder and the shape stream each run a Pipeline on
blocks of a few frames (about 10 at 1 kHz and a 100 Hz pace). Measured on the
demo rig with a pressure channel (6 segments, 1 mm point spacing, 111 shape
points), codes from the virtual finger on a 25 mm jig:

- ``pipeline_us_per_frame``: the whole chain (readout, checks, filters,
  calibration, reconstruction) without a force model;
- ``with_force_us_per_frame``: the same with a force model in the calibration
  (actuation, moment arms, per-frame 2x2 solve);
- ``added_percent``: the difference in % of the first. Target: at most 15 %.

Each figure is the best of several runs (microseconds per frame). Run by
hand: ``.venv/bin/python bench/bench_force.py`` (``--quick`` for a short check).
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from acquire.core.calibration import fit_calibration  # noqa: E402
from acquire.core.force import ForceModel  # noqa: E402
from acquire.core.pipeline import Pipeline  # noqa: E402
from acquire.rig import parse_rig  # noqa: E402
from acquire.virtual import FingerModel  # noqa: E402

RATE_HZ = 1000.0
RIG = Path(__file__).resolve().parents[1] / "acquire" / "rigs" / "demo_finger.toml"


def force_rig():
    text = RIG.read_text().replace('channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5"]',
                                   'channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5", "pressure"]')
    text += '\n[actuation]\nchannel = "pressure"\nunit = "kPa"\nper_code = 0.0244140625\noffset_code = 409.6\n'
    return parse_rig(text, source="bench force rig")


def calibrations(rig):
    model = FingerModel(rig=rig, seed=0)
    t = np.arange(200) / 1000.0
    holds = [(float(k), model.with_hold(f"curvature={k}/m").segment_ohm(t)) for k in (-20, 0, 20, 40, 60)]
    cal, _ = fit_calibration(holds, rig=rig)
    force = ForceModel(rig.segment_lengths_m, np.full(6, 3e-3), np.full((6, 1), 0.5), "kPa")  # made up
    return cal, dataclasses.replace(cal, force=force.to_dict())


def us_per_frame(pipe: Pipeline, codes: np.ndarray, *, block: int, repeats: int) -> float:
    best = float("inf")
    n = codes.shape[0] - codes.shape[0] % block
    for _ in range(repeats):
        t0 = time.perf_counter()
        for i in range(0, n, block):
            pipe.process_codes(codes[i:i + block])
        best = min(best, (time.perf_counter() - t0) / n)
    return 1e6 * best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a short run (checks that it works)")
    ap.add_argument("--block", type=int, default=10, help="frames per block (default 10)")
    args = ap.parse_args()
    rig = force_rig()
    n, repeats = (2000, 2) if args.quick else (20000, 5)
    fi = np.arange(n)
    codes = FingerModel(rig=rig, seed=0).with_hold("radius=25mm").codes(fi / RATE_HZ, frame_index=fi)
    codes[:, 6] = 3200
    static, with_force = calibrations(rig)
    figures = {}
    for name, cal in (("pipeline_us_per_frame", static), ("with_force_us_per_frame", with_force)):
        pipe = Pipeline(rig=rig, calibration=cal, rate_hz=RATE_HZ, adc_bits=12)
        pipe.process_codes(codes[:50])  # first call: caches, imports
        figures[name] = round(us_per_frame(pipe, codes, block=args.block, repeats=repeats), 2)
    base = figures["pipeline_us_per_frame"]
    figures["added_percent"] = round(100.0 * (figures["with_force_us_per_frame"] - base) / base, 1)
    figures["block_frames"] = args.block
    figures["target_added_percent"] = 15.0
    print(json.dumps(figures))


if __name__ == "__main__":
    main()
