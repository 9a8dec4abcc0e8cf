"""Benchmark: what the live flat-drift tracker adds to the view path, and its readout on the GUI thread.

Run by hand: ``.venv/bin/python bench/bench_drift.py`` (``--quick`` for a short
check). Figures, printed as JSON:

- ``view_us_per_frame``: :meth:`acquire.sources.feed.DisplayChain.process` on
  blocks of 20 frames at 1 kHz (the view thread's typical block), best and
  median over repeats, for the chain as it is (``no_flat``: no flat interval
  declared, the tracker returns at once), while a flat interval is open
  (``flat_open``: the frames are kept), and with the tracker's push skipped
  (``without_tracker``: the reference);
- ``push_us_per_block``: :meth:`FlatDriftTracker.push` alone on the same
  20-frame blocks, best and median per call, with no flat interval and with
  one open (the part of the view path this adds, measured without the rest);
- ``readout_ms``: one :meth:`FlatDriftTracker.readout` with a new second of flat
  frames to judge (the status timer calls it 4 times a second), best and median.

Figures depend on the machine's load (2 shared cores here: treat them as upper bounds).
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402

from acquire.link.frames import FrameBlock  # noqa: E402


def _blocks(rig, *, seconds: float, rate_hz: float, block: int) -> list:
    from acquire.virtual import FingerModel

    model = FingerModel(rig=rig, seed=0).with_hold("flat")
    n = int(seconds * rate_hz)
    t = np.arange(n) / rate_hz
    codes = model.codes(t, frame_index=np.arange(n)).astype(np.uint16)
    return [FrameBlock(codes=codes[i:i + block], seq=np.arange(i, min(i + block, n), dtype=np.int64),
                       t_device_s=t[i:i + block], t_host_s=t[i:i + block], status=np.zeros(min(block, n - i), np.uint8))
            for i in range(0, n, block)]


def _per_frame_us(make_chain, blocks, repeats: int, *, prepare=None) -> tuple[float, float]:
    frames = sum(len(b) for b in blocks)
    times = []
    for _ in range(repeats):
        chain = make_chain()
        if prepare is not None:
            prepare(chain)
        t0 = time.perf_counter()
        for b in blocks:
            chain.process(b)
        times.append((time.perf_counter() - t0) / frames * 1e6)
    return round(min(times), 2), round(float(np.median(times)), 2)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="short run (a check that the benchmark works)")
    args = ap.parse_args(argv)
    from acquire.rig import load_rig
    from acquire.sources.feed import DisplayChain
    from acquire.virtual.builtin import builtin_calibration

    rig = load_rig(None)
    cal = builtin_calibration(rig)
    rate = 1000.0
    seconds = 3.0 if args.quick else 10.0
    repeats = 2 if args.quick else 7
    blocks = _blocks(rig, seconds=seconds, rate_hz=rate, block=20)

    def make():
        return DisplayChain(rig=rig, calibration=cal, rate_hz=rate, adc_bits=12, window_s=10.0)

    def no_tracker(chain):
        chain.drift.push = lambda *a, **k: None

    out = {"benchmark": "flat drift tracker", "quick": args.quick, "rate_hz": rate, "block_frames": 20,
           "seconds": seconds, "segments": rig.n_segments, "view_us_per_frame": {}, "readout_ms": {}}
    v = out["view_us_per_frame"]
    v["without_tracker"] = _per_frame_us(make, blocks, repeats, prepare=no_tracker)
    v["no_flat"] = _per_frame_us(make, blocks, repeats)
    v["flat_open"] = _per_frame_us(make, blocks, repeats, prepare=lambda c: c.drift.flat_from())
    v["added_flat_open_percent"] = round(100 * (v["flat_open"][0] / v["without_tracker"][0] - 1), 1)

    from acquire.core.drift_live import FlatDriftTracker

    r = make().pipeline.process(FrameBlock.concat(blocks, n_channels=rig.n_channels)).filtered_ohm
    out["push_us_per_block"] = {}
    for name, flat in (("no_flat", False), ("flat_open", True)):
        best = []
        for _ in range(repeats):
            tr = FlatDriftTracker(n_segments=rig.n_segments, rate_hz=rate, calibration=cal)
            if flat:
                tr.flat_from()
            per = []
            for b in blocks:
                rb = r[int(b.seq[0]): int(b.seq[0]) + len(b)]
                t0 = time.perf_counter()
                tr.push(b.t_device_s, rb)
                per.append(time.perf_counter() - t0)
            best.append(float(np.median(per)) * 1e6)
        out["push_us_per_block"][name] = [round(min(best), 1), round(float(np.median(best)), 1)]

    chain = make()
    chain.drift.flat_from()
    times = []
    for b in blocks:
        chain.process(b)
        if b.t_device_s[-1] > 2.5:  # a measurement exists: each readout judges a changed window
            t0 = time.perf_counter()
            ro = chain.drift.readout()
            times.append((time.perf_counter() - t0) * 1e3)
    if times:
        out["readout_ms"] = {"best": round(min(times), 3), "median": round(float(np.median(times)), 3),
                             "state": ro.state}
    print(json.dumps(out, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
