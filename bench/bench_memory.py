"""Benchmark: the strip's memory in the live path (time) and what it buys (accuracy).

- ``live_us_per_frame``: the whole pipeline (readout, filters, memory
  compensation, calibration, reconstruction) in chunks of 10 frames at 1 kHz,
  with a static calibration and with the same calibration carrying a memory
  model (5 play thresholds, one creep term). Target: memory adds at most 20 %
  (``memory_overhead_pct_chunkwise_median``).
- ``live_session``: the whole live path, as ``tapcurve live --record`` runs
  it without a window: CPU microseconds per frame of a live session's reader,
  view and recorder threads on the virtual finger, static and with memory
  (``bench/live_cpu.py``); ``added_percent`` against the same 20 % target.
- ``accuracy`` (not with ``--quick``): the virtual finger's model evaluated
  in process (the same codes the pty device sends, without the pty): labelled
  holds, calibrated by ``calibrate_files`` (memory where it wins held-out) and
  by the static fit alone, also with one 40 s filmed free motion added to the
  holds and with that film alone (no holds), then the grasp scenario processed causally; mean
  tip error in % of the sensor length against the finger's own truth (as in
  tests/acquire/test_end_to_end_accuracy.py), for a real strip (creep,
  hysteresis, drift: the virtual finger's defaults) and an ideal one; the
  finger's made-up sessions from ``--seed`` (default 7).

Run by hand: ``.venv/bin/python bench/bench_memory.py`` (``--quick``: timing only, short).
Prints figures as JSON.
"""
from __future__ import annotations

import argparse
import io
import json
import math
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from acquire.commands.calibrate import calibrate_files, holds_from_recording  # noqa: E402
from acquire.commands import calibrate_memory as cmem  # noqa: E402
from acquire.commands.calibrate_motion import calibrate_with_motion  # noqa: E402
from acquire.core.calibration import Calibration  # noqa: E402
from acquire.core.calibration_fit import fit_calibration  # noqa: E402
from acquire.core.memory import SegmentMemory, StripMemory  # noqa: E402
from acquire.core.pipeline import Pipeline  # noqa: E402
from acquire.link.frames import FrameBlock, FrameRing  # noqa: E402
from acquire.rig import parse_rig  # noqa: E402
from acquire.store.recorder import Recorder  # noqa: E402
from acquire.store.recording import open_recording  # noqa: E402
from acquire.virtual.camera import Camera, CameraSettings, write_marker_csv  # noqa: E402
from acquire.virtual.model import FingerModel  # noqa: E402
from acquire.virtual.strip import StripSettings  # noqa: E402
from bench.live_cpu import compare_sessions  # noqa: E402

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
    """Microseconds per frame of the pipeline in chunks of CHUNK frames, static and with memory.

    The two pipelines take the same chunk one after the other, so a load that comes and goes
    (a shared machine) hits both alike; which one goes first alternates from chunk to chunk,
    because the second runs with the code both share warm (measured with one order throughout:
    the overhead read 3 to 8 points lower with the static pipeline always first than always
    second). Per-chunk times, median over the run (robust to a preemption) and best
    of ``repeats`` runs; the overhead also as the median of per-chunk ratios, over all chunks and
    over the chunks where each pipeline went first. Each pipeline first takes one chunk untimed
    (scipy's import and the memory's start at rest happen once per stream, not per frame).
    """
    model = FingerModel(rig=rig, seed=3)
    n = int(seconds * RATE_HZ)
    t = np.arange(n) / RATE_HZ
    codes = model.codes(t, frame_index=np.arange(n))
    names = ("static", "memory")
    best = {"static": float("inf"), "memory": float("inf"), "ratio": float("inf"),
            "ratio_static_first": float("inf"), "ratio_memory_first": float("inf")}
    clock = time.perf_counter
    for _ in range(repeats):
        pipes = [Pipeline(rig=rig, calibration=demo_calibration(rig, memory=name == "memory"), rate_hz=RATE_HZ,
                          adc_bits=BITS) for name in names]
        for pipe in pipes:
            pipe.process_codes(codes[:CHUNK])
        times = np.empty((2, (n - 1) // CHUNK))
        for j, i in enumerate(range(CHUNK, n, CHUNK)):
            chunk = codes[i:i + CHUNK]
            for k in (j % 2, 1 - j % 2):
                t0 = clock()
                pipes[k].process_codes(chunk)
                times[k, j] = clock() - t0
        med = np.median(times, axis=1) / CHUNK
        ratio = times[1] / times[0]
        best["static"], best["memory"] = min(best["static"], med[0]), min(best["memory"], med[1])
        for key, part in (("ratio", ratio), ("ratio_static_first", ratio[0::2]), ("ratio_memory_first", ratio[1::2])):
            best[key] = min(best[key], float(np.median(part)))
    return {"static": 1e6 * best["static"], "memory": 1e6 * best["memory"],
            "memory_overhead_pct": 100.0 * (best["memory"] / best["static"] - 1.0),
            "memory_overhead_pct_chunkwise_median": 100.0 * (best["ratio"] - 1.0),
            "memory_overhead_pct_chunkwise_median_static_first": 100.0 * (best["ratio_static_first"] - 1.0),
            "memory_overhead_pct_chunkwise_median_memory_first": 100.0 * (best["ratio_memory_first"] - 1.0)}


# ----------------------------------------------------------------------------- accuracy


DEMO_RIG = Path(__file__).resolve().parents[1] / "acquire" / "rigs" / "demo_finger.toml"
CAMERA = CameraSettings(seed=7, offset_s=-5.0, rate_ppm=-230.0)


def filmed_rig():
    """The demo rig with a marker at each tap and each segment's middle (as the motion tests film it)."""
    text = DEMO_RIG.read_text().replace(
        "[body]", "[markers]\ns_mm = [0, 8, 16, 24, 32, 40, 48, 56, 64, 72, 80, 88, 96]\n\n[body]")
    return parse_rig(text, source="bench rig with markers")


def finger_sessions(rig, strip: StripSettings, *, hold_s: float, settle_s: float, motion_s: float, grasp_s: float,
                    seed: int = 7):
    """One strip in three sessions, each a new run of the virtual device (its clock from 0, the strip at
    rest, as ``tapcurve record`` on a new virtual finger): labelled holds, a free motion (filmed), the
    grasp scenario (a different motion). Codes, times, labels; the free model; the grasp's truth.
    ``seed``: the virtual finger's seed (its made-up motions and noise)."""
    base = FingerModel(rig=rig, seed=seed)
    free = FingerModel(rig=rig, seed=seed, scenario="free")

    def stream():
        return None if not strip.real else base.real_strip(strip).stream(rate_hz=RATE_HZ)

    parts, labels, frame, st = [], [], 0, stream()
    for label in HOLDS:
        n = int((settle_s + hold_s) * RATE_HZ)
        idx = frame + np.arange(n)
        parts.append(base.with_hold(label).codes(idx / RATE_HZ, frame_index=idx, strip=st))
        labels.append((label, (frame + settle_s * RATE_HZ) / RATE_HZ, (frame + n - 1) / RATE_HZ))
        frame += n
    out = {"holds": (np.concatenate(parts), np.arange(frame) / RATE_HZ, labels)}
    for name, model, secs in (("motion", free, motion_s), ("grasp", base, grasp_s)):
        idx = np.arange(int(secs * RATE_HZ))
        out[name] = (model.codes(idx / RATE_HZ, frame_index=idx, strip=stream()), idx / RATE_HZ, [])
    out["free_model"] = free
    out["grasp_truth"] = base.truth(out["grasp"][1])
    return out


def write_recording(path, rig, codes, labels, *, t0_s: float = 0.0) -> None:
    n = codes.shape[0]
    ring = FrameRing(capacity_frames=n + 10, n_channels=rig.n_channels)
    hello = {"protocol": 1, "firmware": "bench", "adc_bits": BITS, "channels": rig.n_channels, "rate_hz": RATE_HZ}
    rec = Recorder(path=path, ring=ring, rig_toml=rig.text, device_hello=json.dumps(hello),
                   channel_names=rig.channels, n_segments=rig.n_segments)
    rec.start()
    seq = np.arange(n, dtype=np.int64)
    t = t0_s + seq / RATE_HZ
    ring.push(FrameBlock(codes=codes, seq=seq, t_device_s=t, t_host_s=t,
                         status=np.zeros(n, dtype=np.uint8)))
    for text, a, b in labels:
        rec.add_label(text, t_start_s=a, t_end_s=b)
    rec.stop()


def tip_error_pct(rig, cal, codes, truth) -> float:
    """Mean tip error, % of the sensor length, of ``codes`` processed causally in chunks of CHUNK frames."""
    pipe = Pipeline(rig=rig, calibration=cal, rate_hz=RATE_HZ, adc_bits=BITS)
    p = [pipe.process_codes(codes[i:i + 1000]).xy_m for i in range(0, codes.shape[0], 1000)]
    tap_end = int(pipe.reconstructor.tap_index[-1])
    tip = np.concatenate(p)[:, tap_end, :].astype(float)
    return 100.0 * float(np.mean(np.hypot(*(tip - truth["tip_xy_m"]).T))) / float(pipe.s_m[tap_end])


def session_files(folder: Path, rig, strip: StripSettings, *, hold_s: float, motion_s: float, grasp_s: float,
                  seed: int = 7):
    """:func:`finger_sessions` written as the user would have them: the holds recording, the motion
    recording and its marker CSV (paths), and the grasp's codes and truth (to process and compare)."""
    ses = finger_sessions(rig, strip, hold_s=hold_s, settle_s=0.3, motion_s=motion_s, grasp_s=grasp_s, seed=seed)
    holds_path, rec_path, csv_path = (folder / f"{name}_{strip.mode}{ext}" for name, ext in
                                      (("holds", ".h5"), ("motion", ".h5"), ("markers", ".csv")))
    write_recording(holds_path, rig, ses["holds"][0], ses["holds"][2])
    codes, t, _ = ses["motion"]
    write_recording(rec_path, rig, codes, [], t0_s=float(t[0]))
    _, t_cam = Camera(CAMERA, rig=rig).frames_between(float(t[0]), float(t[-1]))
    write_marker_csv(csv_path, ses["free_model"], t_cam, settings=CAMERA)
    return holds_path, rec_path, csv_path, ses["grasp"][0], ses["grasp_truth"]


def _memory_summary(rep) -> dict:
    if rep is None:
        return {"memory kept in segments": []}
    return {"memory kept in segments": [s.segment for s in rep.segments if s.kept], "held-out": rep.segments[0].heldout,
            "creep pct (tau s)": [f"{s.creep_pct:.2f} ({s.creep_tau_s or 0:.3g})" for s in rep.segments],
            "hysteresis band pct": [None if s.hysteresis_band_pct is None else round(s.hysteresis_band_pct, 2)
                                    for s in rep.segments]}


def accuracy(rig, *, hold_s: float, motion_s: float, grasp_s: float, modes=("real", "ideal"), seed: int = 7) -> dict:
    """Mean tip error on the grasp, % of length: holds alone and holds plus a filmed motion, static and memory."""
    out = {}
    with tempfile.TemporaryDirectory() as d:
        for mode in modes:
            holds_path, rec_path, csv_path, grasp, truth = session_files(
                Path(d), rig, StripSettings(mode=mode), hold_s=hold_s, motion_s=motion_s, grasp_s=grasp_s, seed=seed)
            fig = {}
            t0 = time.perf_counter()
            run = calibrate_files([holds_path], rig=rig)
            fig["holds: calibrate_s"] = time.perf_counter() - t0
            with open_recording(holds_path) as rec:
                h, _ = holds_from_recording(rec, rig=rig, rate_hz=RATE_HZ, adc_bits=BITS)
            static, _ = fit_calibration(h, rig=rig, degree=run.degree)
            fig["holds: static model"] = tip_error_pct(rig, static, grasp, truth)
            fig["holds: memory model"] = tip_error_pct(rig, run.calibration, grasp, truth)
            t0 = time.perf_counter()
            quiet = io.StringIO()
            mrun = calibrate_with_motion([holds_path], [(rec_path, csv_path)], rig=rig, stdout=quiet, stderr=quiet)
            fig["holds+motion: calibrate_s"] = time.perf_counter() - t0
            mstatic = calibrate_with_motion([holds_path], [(rec_path, csv_path)], rig=rig, stdout=quiet,
                                            stderr=quiet, static=True, degree=mrun.degree)
            fig["holds+motion: static model"] = tip_error_pct(rig, mstatic.calibration, grasp, truth)
            fig["holds+motion: memory model"] = tip_error_pct(rig, mrun.calibration, grasp, truth)
            fig.update(_memory_summary(getattr(mrun, "memory_report", None)))
            keep = cmem._KEEP_BELOW  # diagnosis: memory whatever held-out says
            cmem._KEEP_BELOW = math.inf
            try:
                forced = calibrate_with_motion([holds_path], [(rec_path, csv_path)], rig=rig, stdout=quiet,
                                               stderr=quiet, degree=mrun.degree)
            finally:
                cmem._KEEP_BELOW = keep
            fig["holds+motion: memory model kept in every segment (diagnosis)"] = tip_error_pct(
                rig, forced.calibration, grasp, truth)
            film = calibrate_with_motion([], [(rec_path, csv_path)], rig=rig, stdout=quiet, stderr=quiet)
            film_static = calibrate_with_motion([], [(rec_path, csv_path)], rig=rig, stdout=quiet, stderr=quiet,
                                               static=True, degree=film.degree)
            fig["motion alone: static model"] = tip_error_pct(rig, film_static.calibration, grasp, truth)
            fig["motion alone: memory model"] = tip_error_pct(rig, film.calibration, grasp, truth)
            fig["motion alone: memory kept in segments"] = _memory_summary(film.memory_report)[
                "memory kept in segments"]
            out[f"{mode} strip"] = fig
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--session-s", type=float, default=None,
                    help="seconds measured per live session (default 10, 1.5 with --quick)")
    ap.add_argument("--quick", action="store_true", help="timing only, short")
    ap.add_argument("--hold-s", type=float, default=6.0, help="seconds per labelled hold (default 6)")
    ap.add_argument("--motion-s", type=float, default=40.0, help="seconds of the filmed free motion (default 40)")
    ap.add_argument("--grasp-s", type=float, default=16.0, help="seconds of the grasp scenario (default 16)")
    ap.add_argument("--strip", choices=("real", "ideal", "both"), default="both", help="accuracy on which strip")
    ap.add_argument("--seed", type=int, default=7, help="the virtual finger's seed for the accuracy (default 7)")
    ap.add_argument("--accuracy-only", action="store_true", help="skip the timing")
    ap.add_argument("--timing-only", action="store_true", help="skip the accuracy (full-length timing)")
    args = ap.parse_args()
    rig = filmed_rig()
    figures = {}
    if not args.accuracy_only:
        figures["live_us_per_frame"] = live_timing(rig, seconds=1.0 if args.quick else 5.0,
                                                   repeats=2 if args.quick else 5)
        figures["live_session"] = compare_sessions(
            rig, {"static_us_per_frame": demo_calibration(rig, memory=False),
                  "memory_us_per_frame": demo_calibration(rig, memory=True)},
            seconds=args.session_s or (1.5 if args.quick else 10.0), repeats=1 if args.quick else 3)
    if not (args.quick or args.timing_only):
        modes = ("real", "ideal") if args.strip == "both" else (args.strip,)
        figures["mean_tip_error_pct_of_length"] = accuracy(rig, hold_s=args.hold_s, motion_s=args.motion_s,
                                                           grasp_s=args.grasp_s, modes=modes,
                                                           seed=args.seed)
    print(json.dumps(figures, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
