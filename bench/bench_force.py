"""Benchmark: what the force estimate adds to the live path.

The live view, the recorder and the shape stream each run a Pipeline on
blocks of a few frames (about 10 at 1 kHz and a 100 Hz pace). Measured on the
demo rig with a pressure channel (6 segments, 1 mm point spacing, 111 shape
points), codes from the virtual finger on a 25 mm jig, for two chains:
``with_shapes`` (what the recorder and the shape stream run) and
``view_without_shapes`` (the live window's chain, which leaves the shape to
the frames it draws: the force needs no shape points). Each gives:

- ``pipeline_us_per_frame``: the whole chain (readout, checks, filters,
  calibration, reconstruction) without a force model;
- ``with_force_us_per_frame``: the same with a force model in the calibration
  (actuation, moment arms, per-frame 2x2 solve);
- ``added_percent``: the difference in % of the first (best runs), and
  ``added_percent_median_of_runs`` the median over runs of each run's own
  ratio (the pipelines' blocks alternate within a run). Target: at most 15 %;
- ``force_stage_us_per_frame``: the force stage alone on the same blocks
  (its share without the noise of a difference of two timings), and
  ``stage_percent_of_pipeline`` that in % of the pipeline without force.

The force model carries the estimator options ``tapcurve calibrate`` stores
(fixed axial prior, friction cone, curvature noise), so the timed path is the
one a calibrated finger runs. Each figure is the best of several runs
(microseconds per frame). Run by hand:
``.venv/bin/python bench/bench_force.py`` (``--quick`` for a short check).
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

from acquire.core.calibration_fit import fit_calibration  # noqa: E402
from acquire.core.force import ForceModel  # noqa: E402
from acquire.core.pipeline import Pipeline  # noqa: E402
from acquire.rig import parse_rig  # noqa: E402
from acquire.virtual import FingerModel  # noqa: E402
from bench.live_cpu import compare_sessions  # noqa: E402

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
    estimator = {"axial_prior_sigma_n": 0.2, "axial_friction": 0.5, "curvature_noise_per_m": 0.1}
    return cal, dataclasses.replace(cal, force={**force.to_dict(), "estimator": estimator})


def interleaved_us_per_frame(pipes: dict, codes: np.ndarray, *, block: int) -> dict:
    """One pass over ``codes`` in blocks, each block through every pipeline in turn: microseconds per frame each.

    Alternating block by block makes a change of the machine's load hit every pipeline alike.
    """
    n = codes.shape[0] - codes.shape[0] % block
    total = dict.fromkeys(pipes, 0.0)
    clock = time.thread_time  # CPU time of this thread: other processes on the machine do not count
    for i in range(0, n, block):
        part = codes[i:i + block]
        for name, pipe in pipes.items():
            t0 = clock()
            pipe.process_codes(part)
            total[name] += clock() - t0
    return {name: 1e6 * v / n for name, v in total.items()}


def stage_us_per_frame(pipe: Pipeline, codes: np.ndarray, *, block: int) -> float:
    """The force stage alone on the blocks' curvature and actuation, microseconds per frame."""
    n = codes.shape[0] - codes.shape[0] % block
    out = pipe.process_codes(codes[:n])
    act = pipe.filters.process(pipe._read(codes[:n])[2])[:, -1]  # the filtered actuation the stage is given
    k = out.curvature_per_m.astype(np.float64)
    cal, stage = pipe.calibration, pipe.force
    t0 = time.thread_time()
    for i in range(0, n, block):
        stage.process(cal, k[i:i + block], act[i:i + block])
    return 1e6 * (time.thread_time() - t0) / n


def measure(rig, codes, static, with_force, *, with_shape: bool, block: int, repeats: int) -> dict:
    """The figures of one chain (with or without shape points), best of ``repeats`` interleaved runs."""
    pipes = {}
    for name, cal in (("pipeline_us_per_frame", static), ("with_force_us_per_frame", with_force)):
        pipes[name] = Pipeline(rig=rig, calibration=cal, rate_hz=RATE_HZ, adc_bits=12, with_shape=with_shape,
                               with_force_sigma=with_shape)
        pipes[name].process_codes(codes[:50])  # first call: caches, imports
    best = dict.fromkeys([*pipes, "force_stage_us_per_frame"], float("inf"))
    added = []
    for _ in range(repeats):
        for pipe in pipes.values():
            pipe.reset()
        run = interleaved_us_per_frame(pipes, codes, block=block)
        added.append(100.0 * (run["with_force_us_per_frame"] / run["pipeline_us_per_frame"] - 1.0))
        for name, v in run.items():
            best[name] = min(best[name], v)
        stage_pipe = Pipeline(rig=rig, calibration=with_force, rate_hz=RATE_HZ, adc_bits=12, with_shape=with_shape,
                              with_force_sigma=with_shape)
        best["force_stage_us_per_frame"] = min(best["force_stage_us_per_frame"],
                                               stage_us_per_frame(stage_pipe, codes, block=block))
    figures = {name: round(v, 2) for name, v in best.items()}
    base = figures["pipeline_us_per_frame"]
    figures["added_percent"] = round(100.0 * (figures["with_force_us_per_frame"] - base) / base, 1)
    figures["added_percent_median_of_runs"] = round(float(np.median(added)), 1)
    figures["stage_percent_of_pipeline"] = round(100.0 * figures["force_stage_us_per_frame"] / base, 1)
    return figures


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--session-s", type=float, default=None,
                    help="seconds measured per live session (default 10, 1.5 with --quick)")
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
    for chain, with_shape in (("with_shapes", True), ("view_without_shapes", False)):
        figures[chain] = measure(rig, codes, static, with_force, with_shape=with_shape, block=args.block,
                                 repeats=repeats)
    figures["block_frames"] = args.block
    figures["session"] = compare_sessions(
        rig, {"live_us_per_frame": static, "live_with_force_us_per_frame": with_force},
        seconds=args.session_s or (1.5 if args.quick else 10.0), repeats=1 if args.quick else 3)
    figures["target_added_percent"] = 15.0
    print(json.dumps(figures))


if __name__ == "__main__":
    main()
