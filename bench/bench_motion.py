"""Benchmark: calibrating from a filmed motion session, the steps after reading the files.

A made-up session (the virtual finger's free motion, its exact curvature from
the model): ``--minutes`` of recording at 1 kHz (relative resistance change:
a monotone gain of the curvature plus noise) and a marker track at 120
frames/s of a rig with markers at taps and segment middles (13 markers, 0.1 mm
noise, 2 % missed). Timed: the batched marker fit, the clock alignment,
pairing (with the pairing lag) and binning, the degree choice and the fit. Reading and filtering the
recording is the offline pipeline's cost (``bench_process.py``), added here as
measured by its figure of frames per second when given. Target: the whole
calibration from 10 minutes under 30 s on a 2-core machine.

Run by hand: ``.venv/bin/python bench/bench_motion.py`` (``--quick``: 1 minute).
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from acquire.commands.calibrate_motion import choose_degree_motion  # noqa: E402
from acquire.core.align import align_clocks  # noqa: E402
from acquire.core.calibration_fit import fit_calibration  # noqa: E402
from acquire.core.markers import MarkerTrack, fit_marker_frames, marker_positions  # noqa: E402
from acquire.core.motion_pairs import (  # noqa: E402
    bin_motion,
    paired_resistance,
    pairing_lag,
    recording_covers,
)
from acquire.rig import parse_rig  # noqa: E402
from acquire.virtual.model import FingerModel  # noqa: E402

DEMO = Path(__file__).resolve().parents[1] / "acquire" / "rigs" / "demo_finger.toml"
FPS, RATE_HZ, OFFSET_S, PPM = 120.0, 1000.0, -12.3, 210.0


def session(minutes: float):
    text = DEMO.read_text().replace("[body]", "[markers]\ns_mm = [" + ", ".join(str(8 * i) for i in range(13))
                                    + "]\n\n[body]")
    rig = parse_rig(text, source="bench rig")
    model = FingerModel(rig=rig, seed=3, scenario="free")
    n = int(minutes * 60 * RATE_HZ)
    t = np.arange(n) / RATE_HZ
    kappa = model.truth(t + 5.0)["curvature_per_m"]
    rng = np.random.default_rng(0)
    r0 = 8000.0
    resistance = r0 * (1 + 0.04 * np.tanh(kappa / 50) + 0.004 * kappa / 50 + rng.normal(0, 2e-4, kappa.shape))
    t_cam = np.arange(int((t[-1] - 1.0 - OFFSET_S) / (1 + PPM * 1e-6) * FPS)) / FPS
    t_cam = t_cam[OFFSET_S + (1 + PPM * 1e-6) * t_cam > 0.5]
    t_dev = OFFSET_S + (1 + PPM * 1e-6) * t_cam
    k_cam = np.stack([np.interp(t_dev, t, kappa[:, s]) for s in range(rig.n_segments)], axis=1)
    xy = marker_positions(k_cam, segment_lengths_m=rig.segment_lengths_m, s_m=rig.markers_s_m)
    xy += rng.normal(0, 1e-4, xy.shape)
    xy[rng.random(xy.shape[:2]) < 0.02] = np.nan
    return rig, t, resistance, MarkerTrack(t_s=t_cam, xy_m=xy, source="bench"), k_cam


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="1 minute instead of 10")
    ap.add_argument("--minutes", type=float, default=10.0)
    args = ap.parse_args()
    minutes = 1.0 if args.quick else args.minutes
    rig, t, r, track, k_true = session(minutes)
    times = {}
    t0 = time.perf_counter()
    fit = fit_marker_frames(track, segment_lengths_m=rig.segment_lengths_m, s_m=rig.markers_s_m)
    times["marker fit"] = time.perf_counter() - t0
    kappa = np.where(fit.ok[:, None], fit.curvature_per_m, np.nan)
    t0 = time.perf_counter()
    a = align_clocks(t, r / np.median(r, axis=0) - 1, track.t_s, kappa)
    times["alignment"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    t_dev = a.to_device_time(track.t_s)
    kappa[~recording_covers(t_dev, t, settle_s=0.2)] = np.nan
    lag = pairing_lag(t_dev, kappa, t, r)
    r_cam = paired_resistance(t_dev + lag, t, r)
    points = bin_motion(r_cam, kappa)
    times["pairing and binning"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    degree, _ = choose_degree_motion([], [points], rig=rig)
    fit_calibration([], rig=rig, degree=degree, motion=[points])
    times["degree and fit"] = time.perf_counter() - t0
    total = sum(times.values())
    t_mid = float(np.median(track.t_s))
    mid_err_s = a.offset_s - OFFSET_S + (a.rate_ppm - PPM) * 1e-6 * t_mid  # the synthetic resistance has no delay
    print(f"{minutes:g} min at {RATE_HZ:g} Hz ({t.size} frames), track at {FPS:g} frames/s ({track.t_s.size} frames, "
          f"{track.xy_m.shape[1]} markers)")
    for k, v in times.items():
        print(f"  {k:22s} {v:7.2f} s")
    print(f"  {'total':22s} {total:7.2f} s   (target < 30 s for 10 min; reading and filtering: see bench_process)")
    print(f"alignment error: offset {1e3 * (a.offset_s - OFFSET_S):+.2f} ms, rate {a.rate_ppm - PPM:+.1f} ppm; "
          f"pairing lag {1e3 * lag:+.2f} ms (the alignment's error at mid-track, negated: {-1e3 * mid_err_s:+.2f} ms); "
          f"marker curvature RMS error {np.sqrt(np.nanmean((kappa - k_true) ** 2)):.2f} 1/m")
    import json

    print(json.dumps({"minutes": minutes, "frames": int(t.size), "track_frames": int(track.t_s.size),
                      "times_s": {k: round(v, 3) for k, v in times.items()}, "total_s": round(total, 3),
                      "target_s": 30.0, "offset_error_ms": round(1e3 * (a.offset_s - OFFSET_S), 3),
                      "rate_error_ppm": round(a.rate_ppm - PPM, 2), "pairing_lag_ms": round(1e3 * lag, 3)}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
