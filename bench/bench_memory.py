"""Benchmark: the strip's memory in the live path (time) and what it buys (accuracy).

- ``live_us_per_frame``: the whole pipeline (readout, filters, memory
  compensation, calibration, reconstruction) in chunks of 10 frames at 1 kHz,
  with a static calibration and with the same calibration carrying a memory
  model (5 play thresholds, one creep term). Target: memory adds at most 20 %.
- ``accuracy`` (not with ``--quick``): the virtual finger's model evaluated
  in process (the same codes the pty device sends, without the pty): labelled
  holds, calibrated by ``calibrate_files`` (memory where it wins held-out) and
  by the static fit alone, then the grasp scenario processed causally; mean
  tip error in % of the sensor length against the finger's own truth (as in
  tests/acquire/test_end_to_end_accuracy.py), for a real strip (creep,
  hysteresis, drift: the virtual finger's defaults) and an ideal one.

Run by hand: ``.venv/bin/python bench/bench_memory.py`` (``--quick``: timing only, short).
Prints figures as JSON.
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from acquire.commands.calibrate import calibrate_files, holds_from_recording  # noqa: E402
from acquire.core.calibration import Calibration, fit_calibration  # noqa: E402
from acquire.core.memory import SegmentMemory, StripMemory  # noqa: E402
from acquire.core.pipeline import Pipeline  # noqa: E402
from acquire.link.frames import FrameBlock, FrameRing  # noqa: E402
from acquire.rig import load_rig  # noqa: E402
from acquire.store.recorder import Recorder  # noqa: E402
from acquire.store.recording import open_recording  # noqa: E402
from acquire.virtual.model import FingerModel  # noqa: E402
from acquire.virtual.strip import StripSettings  # noqa: E402

RATE_HZ = 1000.0
BITS = 12
CHUNK = 10
HOLDS = ["flat", "curvature=15/m", "radius=40mm", "radius=25mm", "radius=20mm", "flat",
         "radius=-100mm", "curvature=-15/m", "radius=-40mm", "flat"]


def demo_calibration(rig, *, memory: bool) -> Calibration:
    """A plausible calibration of the demo rig (made up), with or without a made-up memory."""
    n = rig.n_segments
    seg = SegmentMemory([0.0, 0.02, 0.05, 0.1, 0.2], [0.8, 0.08, 0.06, 0.04, 0.02], [0.05], [4.0])
    return Calibration(
        r0_ohm=np.full(n, 7000.0), positive=[[50.0, -8.0, 1.0]] * n, negative=[[140.0, 10.0]] * n,
        x_min=np.full(n, -0.2), x_max=np.full(n, 1.2), curvature_min_per_m=np.full(n, -25.0),
        curvature_max_per_m=np.full(n, 50.0), readout_kind="divider", rig={"n_segments": n},
        memory=StripMemory([seg] * n).to_dict() if memory else None)


def live_timing(rig, *, seconds: float, repeats: int) -> dict:
    """Microseconds per frame of the pipeline in chunks of CHUNK frames, best of ``repeats``."""
    model = FingerModel(rig=rig, seed=3)
    n = int(seconds * RATE_HZ)
    t = np.arange(n) / RATE_HZ
    codes = model.codes(t, frame_index=np.arange(n))
    out = {}
    for name in ("static", "memory"):
        best = float("inf")
        for _ in range(repeats):
            pipe = Pipeline(rig=rig, calibration=demo_calibration(rig, memory=name == "memory"), rate_hz=RATE_HZ,
                            adc_bits=BITS)
            t0 = time.perf_counter()
            for i in range(0, n, CHUNK):
                pipe.process_codes(codes[i:i + CHUNK])
            best = min(best, (time.perf_counter() - t0) / n)
        out[name] = 1e6 * best
    out["memory_overhead_pct"] = 100.0 * (out["memory"] / out["static"] - 1.0)
    return out


# ----------------------------------------------------------------------------- accuracy


def finger_codes(rig, strip: StripSettings, *, hold_s: float, settle_s: float, grasp_s: float):
    """Codes of labelled holds then the grasp scenario, one strip stream throughout; labels and truth."""
    base = FingerModel(rig=rig, seed=7)
    stream = None if not strip.real else base.real_strip(strip).stream(rate_hz=RATE_HZ)
    parts, labels, frame = [], [], 0
    for label in HOLDS:
        n = int((settle_s + hold_s) * RATE_HZ)
        idx = frame + np.arange(n)
        parts.append(base.with_hold(label).codes(idx / RATE_HZ, frame_index=idx, strip=stream))
        labels.append((label, (frame + settle_s * RATE_HZ) / RATE_HZ, (frame + n - 1) / RATE_HZ))
        frame += n
    holds = np.concatenate(parts)
    n = int(grasp_s * RATE_HZ)
    idx = frame + np.arange(n)
    grasp = base.codes(idx / RATE_HZ, frame_index=idx, strip=stream)
    return holds, labels, grasp, base.truth(idx / RATE_HZ)


def write_recording(path, rig, codes, labels) -> None:
    n = codes.shape[0]
    ring = FrameRing(capacity_frames=n + 10, n_channels=rig.n_channels)
    hello = {"protocol": 1, "firmware": "bench", "adc_bits": BITS, "channels": rig.n_channels, "rate_hz": RATE_HZ}
    rec = Recorder(path=path, ring=ring, rig_toml=rig.text, device_hello=json.dumps(hello),
                   channel_names=rig.channels, n_segments=rig.n_segments)
    rec.start()
    seq = np.arange(n, dtype=np.int64)
    ring.push(FrameBlock(codes=codes, seq=seq, t_device_s=seq / RATE_HZ, t_host_s=seq / RATE_HZ,
                         status=np.zeros(n, dtype=np.uint8)))
    for text, a, b in labels:
        rec.add_label(text, t_start_s=a, t_end_s=b)
    rec.stop()


def tip_error_pct(rig, cal, codes, truth) -> float:
    pipe = Pipeline(rig=rig, calibration=cal, rate_hz=RATE_HZ, adc_bits=BITS)
    p = pipe.process_codes(codes)
    tap_end = int(pipe.reconstructor.tap_index[-1])
    tip = p.xy_m[:, tap_end, :].astype(float)
    return 100.0 * float(np.mean(np.hypot(*(tip - truth["tip_xy_m"]).T))) / float(pipe.s_m[tap_end])


def accuracy(rig, *, hold_s: float, grasp_s: float) -> dict:
    out = {}
    with tempfile.TemporaryDirectory() as d:
        for mode in ("real", "ideal"):
            holds, labels, grasp, truth = finger_codes(rig, StripSettings(mode=mode), hold_s=hold_s, settle_s=0.3,
                                                       grasp_s=grasp_s)
            path = Path(d) / f"holds_{mode}.h5"
            write_recording(path, rig, holds, labels)
            t0 = time.perf_counter()
            run = calibrate_files([path], rig=rig)
            fit_s = time.perf_counter() - t0
            with open_recording(path) as rec:
                h, _ = holds_from_recording(rec, rig=rig, rate_hz=RATE_HZ, adc_bits=BITS)
            static, _ = fit_calibration(h, rig=rig, degree=run.degree)
            rep = run.memory_report
            out[f"{mode} strip"] = {
                "memory model": tip_error_pct(rig, run.calibration, grasp, truth),
                "static model": tip_error_pct(rig, static, grasp, truth),
                "memory kept in segments": [s.segment for s in rep.segments if s.kept] if rep else [],
                "creep pct (tau s)": [f"{s.creep_pct:.2f} ({s.creep_tau_s or 0:.3g})" for s in rep.segments] if rep else [],
                "calibrate_s": fit_s,
            }
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="timing only, short")
    ap.add_argument("--hold-s", type=float, default=6.0, help="seconds per labelled hold (default 6)")
    ap.add_argument("--grasp-s", type=float, default=16.0, help="seconds of the grasp scenario (default 16)")
    args = ap.parse_args()
    rig = load_rig(None)
    figures = {"live_us_per_frame": live_timing(rig, seconds=1.0 if args.quick else 10.0,
                                                  repeats=1 if args.quick else 3)}
    if not args.quick:
        figures["mean_tip_error_pct_of_length"] = accuracy(rig, hold_s=args.hold_s, grasp_s=args.grasp_s)
    print(json.dumps(figures, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
