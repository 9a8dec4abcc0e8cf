"""Benchmark: `tapcurve process` against a straightforward per-frame Python pipeline.

Both sides do the same work on the same recording (the virtual finger's grasp
scenario, 6 segments, 200,000 frames at 1 kHz, made up for the demo): divider
readout, a running median of 5, the rig's Butterworth low-pass (second-order
sections, direct form II transposed), the two-sided polynomial calibration,
and the smooth reconstruction (the same heading matrices, 3-point
Gauss-Legendre per 1 mm), then /derived written to HDF5. The per-frame side
is what one writes first: a Python loop over frames with numpy on each
frame's few values, results written once at the end; it runs on the first
``--loop-frames`` frames and its time is scaled to the whole recording (its
cost per frame is constant). The two results are compared, so the loop does
the same work. Target: `process` at least 20x faster.

``process_s`` is the command's work in this process (``process_recording``:
opening, copying the recording, computing, writing); ``cli_s`` is one run of
the ``tapcurve process`` command line, interpreter start-up and imports
included. Run by hand: ``.venv/bin/python bench/bench_process.py``
(``--quick``: 20,000 frames).
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np
from scipy import signal

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from acquire.commands.common import SPACING_M
from acquire.commands.process import process_recording  # noqa: E402
from acquire.core.calibration_fit import Hold, fit_calibration  # noqa: E402
from acquire.core.labels import parse_label  # noqa: E402
from acquire.core.pipeline import process_arrays  # noqa: E402
from acquire.core.reconstruct import Reconstructor  # noqa: E402
from acquire.rig import load_rig  # noqa: E402
from acquire.store.recording import LIBVER, create_layout  # noqa: E402
from acquire.virtual.model import FingerModel  # noqa: E402

RATE_HZ = 1000.0
BITS = 12
HOLDS = ["flat", "curvature=15/m", "radius=40mm", "radius=25mm", "radius=20mm", "curvature=-15/m", "radius=-40mm"]


def make_recording(path: Path, *, rig, n_frames: int, seed: int = 1) -> None:
    """A recording of the virtual finger's grasp scenario (codes from its model, no serial link)."""
    model = FingerModel(rig=rig, seed=seed, adc_bits=BITS)
    with h5py.File(path, "w-", libver=LIBVER) as f:
        create_layout(
            f, n_channels=rig.n_channels, channel_names=rig.channels, rig_toml=rig.text,
            device_hello=json.dumps({"protocol": 1, "channels": rig.n_channels, "rate_hz": RATE_HZ,
                                     "adc_bits": BITS, "device": "virtual finger (demo)"}),
            calibration_json=None,
        )
        raw = f["raw"]
        for name in ("adc", "seq", "t_device_s", "t_host_s", "status"):
            raw[name].resize(n_frames, axis=0)
        step = 50_000
        for a in range(0, n_frames, step):
            b = min(n_frames, a + step)
            i = np.arange(a, b)
            t = i / RATE_HZ
            raw["adc"][a:b] = model.codes(t, frame_index=i)
            raw["seq"][a:b] = i
            raw["t_device_s"][a:b] = t
            raw["t_host_s"][a:b] = t
            raw["status"][a:b] = 0


def make_calibration(path: Path, *, rig) -> None:
    model = FingerModel(rig=rig, seed=1, adc_bits=BITS)
    holds = []
    for k, label in enumerate(HOLDS):
        m = model.with_hold(label)
        i = np.arange(k * 1000, (k + 1) * 1000)
        p = process_arrays(m.codes(i / RATE_HZ, frame_index=i), rig=rig, calibration=None,
                           rate_hz=RATE_HZ, adc_bits=BITS)
        holds.append(Hold(reference_per_m=np.full(rig.n_segments, parse_label(label)),
                          resistance_ohm=p.filtered_ohm[300:], label=label))
    cal, _ = fit_calibration(holds, rig=rig, degree=3)
    path.write_text(cal.to_json())


def per_frame_pipeline(codes: np.ndarray, *, rig, cal, out_path: Path) -> tuple[np.ndarray, np.ndarray]:
    """The straightforward way: one frame at a time, the same steps, written once at the end."""
    taps = rig.tap_channels
    r_ref = rig.r_ref_ohm
    sos = signal.butter(rig.lowpass_order, rig.lowpass_hz, btype="low", output="sos", fs=RATE_HZ)
    zi_unit = signal.sosfilt_zi(sos)
    rec = Reconstructor.from_rig(rig, spacing_m=SPACING_M)
    g = 3
    t_nodes = rec._theta_nodes  # (S, G*(P-1)), the same heading matrix the library uses
    w = rec._weights  # (G, P-1)
    n_pts = rec.n_points
    r0 = np.asarray(cal.r0_ohm)
    pos = [np.r_[np.asarray(c)[::-1], 0.0] for c in cal.positive]  # np.polyval order, no constant
    neg = [np.r_[np.asarray(c)[::-1], 0.0] for c in cal.negative]
    d_pos = [np.polyder(c) for c in pos]
    d_neg = [np.polyder(c) for c in neg]
    x_lo, x_hi = np.asarray(cal.x_min), np.asarray(cal.x_max)
    n, s = codes.shape[0], rig.n_segments
    curv = np.empty((n, s), dtype=np.float32)
    xy = np.empty((n, n_pts, 2), dtype=np.float32)
    history: list[np.ndarray] = []
    z = None
    full = float(1 << BITS)
    for i in range(n):
        v = codes[i, taps] / full
        drops = v - np.append(v[1:], 0.0)
        r = r_ref * drops / (1.0 - v[0])
        history.append(r)
        if len(history) > rig.spike_window:
            history.pop(0)
        x = np.median(np.array(history), axis=0)
        if z is None:
            z = zi_unit[:, :, None] * x[None, None, :]
        for j, (b0, b1, b2, _a0, a1, a2) in enumerate(sos):
            y = b0 * x + z[j, 0]
            z[j, 0] = b1 * x - a1 * y + z[j, 1]
            z[j, 1] = b2 * x - a2 * y
            x = y
        rel = (x - r0) / r0
        k = np.empty(s)
        for seg in range(s):
            u = rel[seg]
            if u >= 0:
                e = min(u, x_hi[seg])
                k[seg] = np.polyval(pos[seg], e) + np.polyval(d_pos[seg], e) * (u - e)
            else:
                e = max(u, x_lo[seg])
                k[seg] = np.polyval(neg[seg], e) + np.polyval(d_neg[seg], e) * (u - e)
        th = (k @ t_nodes).reshape(g, n_pts - 1)
        dx = (np.cos(th) * w).sum(axis=0)
        dy = (np.sin(th) * w).sum(axis=0)
        curv[i] = k
        xy[i, 0] = 0.0
        xy[i, 1:, 0] = np.cumsum(dx)
        xy[i, 1:, 1] = np.cumsum(dy)
    with h5py.File(out_path, "w") as f:
        f["curvature"] = curv
        f["xy"] = xy
    return curv, xy


def simple_script(codes: np.ndarray, *, rig, r0_ohm: np.ndarray, slope_per_m: np.ndarray, out_path: Path) -> None:
    """The plainest per-frame script a lab writes first (the reference of the whole-command comparison).

    Per frame: codes, segment resistance (divider), a linear calibration
    (curvature = slope * relative change), the exact arcs of each segment at 31
    points along the sensor; everything written once at the end. No filters.
    """
    taps = rig.tap_channels
    lengths = np.asarray(rig.segment_lengths_m)
    s_pts = np.linspace(0.0, lengths.sum(), 31)
    edges = np.r_[0.0, np.cumsum(lengths)]
    seg_of = np.minimum(np.searchsorted(edges, s_pts, side="right") - 1, lengths.size - 1)
    n = codes.shape[0]
    xy = np.empty((n, 31, 2), dtype=np.float32)
    curv = np.empty((n, lengths.size), dtype=np.float32)
    full = float(1 << BITS)
    for i in range(n):
        v = codes[i, taps] / full
        r = rig.r_ref_ohm * (v - np.append(v[1:], 0.0)) / (1.0 - v[0])
        k = slope_per_m * (r / r0_ohm - 1.0)
        theta0 = np.r_[0.0, np.cumsum(k * lengths)]  # heading at each tap
        x0 = np.zeros(lengths.size + 1)
        y0 = np.zeros(lengths.size + 1)
        for j in range(lengths.size):  # end of each arc from its start
            kj, lj, t = k[j], lengths[j], theta0[j]
            if abs(kj) < 1e-9:
                x0[j + 1], y0[j + 1] = x0[j] + lj * np.cos(t), y0[j] + lj * np.sin(t)
            else:
                x0[j + 1] = x0[j] + (np.sin(t + kj * lj) - np.sin(t)) / kj
                y0[j + 1] = y0[j] - (np.cos(t + kj * lj) - np.cos(t)) / kj
        for m, (sp, j) in enumerate(zip(s_pts, seg_of)):
            ds, kj, t = sp - edges[j], k[j], theta0[j]
            if abs(kj) < 1e-9:
                xy[i, m] = (x0[j] + ds * np.cos(t), y0[j] + ds * np.sin(t))
            else:
                xy[i, m] = (x0[j] + (np.sin(t + kj * ds) - np.sin(t)) / kj, y0[j] - (np.cos(t + kj * ds) - np.cos(t)) / kj)
        curv[i] = k
    with h5py.File(out_path, "w") as f:
        f["curvature"] = curv
        f["xy"] = xy


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--frames", type=int, default=200_000)
    ap.add_argument("--loop-frames", type=int, default=20_000, help="frames the per-frame loop runs on")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--quick", action="store_true", help="small run that only checks the benchmark works")
    args = ap.parse_args(argv)
    n = 20_000 if args.quick else args.frames
    n_loop = min(n, 2_000 if args.quick else args.loop_frames)
    repeats = 1 if args.quick else args.repeats
    from acquire.core.calibration import Calibration

    rig = load_rig(None)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        src, cal_path = tmp / "grasp.h5", tmp / "cal.json"
        make_recording(src, rig=rig, n_frames=n)
        make_calibration(cal_path, rig=rig)
        cal = Calibration.load(cal_path)

        best = float("inf")
        for r in range(repeats):
            out = tmp / f"out{r}.h5"
            t0 = time.perf_counter()
            process_recording(src, calibration_path=cal_path, out_path=out, dense_points=True)
            best = min(best, time.perf_counter() - t0)
        out_bytes = out.stat().st_size

        cli_out = tmp / "cli.h5"
        t0 = time.perf_counter()
        res = subprocess.run(
            [sys.executable, "-m", "display.cli", "process", str(src), "--calibration", str(cal_path),
             "--out", str(cli_out), "--quiet"],
            capture_output=True, text=True, cwd=REPO, timeout=600,
        )
        cli_s = time.perf_counter() - t0
        if res.returncode != 0:
            raise SystemExit(f"tapcurve process failed: {res.stderr}")

        with h5py.File(src, "r") as f:
            codes = f["raw/adc"][:n_loop]
        t0 = time.perf_counter()
        curv, xy = per_frame_pipeline(codes, rig=rig, cal=cal, out_path=tmp / "loop.h5")
        loop_s = time.perf_counter() - t0
        slope = np.array([c[0] for c in cal.positive])  # the calibration's initial slope: a linear law
        t0 = time.perf_counter()
        simple_script(codes, rig=rig, r0_ohm=np.asarray(cal.r0_ohm), slope_per_m=slope, out_path=tmp / "simple.h5")
        simple_per_frame = (time.perf_counter() - t0) / n_loop
        with h5py.File(out, "r") as f:
            d_curv = float(np.max(np.abs(f["derived/curvature"][:n_loop] - curv)))
            stored = f["derived/xy"][:n_loop]  # points along the sensor (the file leaves out the fingertip)
            d_xy = float(np.max(np.abs(stored - xy[:, : stored.shape[1]])))
    # the same work: equal to float32 rounding (single-precision trig on the library side)
    if d_curv > 1e-3 or d_xy > 5e-6:  # stored points keep the 2^-17 m step of /derived/xy (acquire.store.recording.pack_xy)
        raise SystemExit(f"per-frame loop and process disagree: curvature {d_curv:g} 1/m, xy {d_xy:g} m")
    loop_per_frame = loop_s / n_loop
    result = {
        "frames": n,
        "segments": rig.n_segments,
        "shape_points": int(xy.shape[1]),
        "output_bytes": out_bytes,
        "process_s": best,
        "process_frames_per_s": n / best,
        "cli_s": cli_s,
        "loop_frames_run": n_loop,
        "loop_us_per_frame": 1e6 * loop_per_frame,
        "loop_s_for_all_frames": loop_per_frame * n,
        "max_diff_curvature_per_m": d_curv,
        "max_diff_xy_m": d_xy,
        "speedup": loop_per_frame * n / best,
        "speedup_vs_cli": loop_per_frame * n / cli_s,
        "target_speedup": 20.0,
        "simple_script_us_per_frame": 1e6 * simple_per_frame,
        "simple_script_s_for_all_frames": simple_per_frame * n,
        "cli_speedup_vs_simple_script": simple_per_frame * n / cli_s,
        "cli_target_vs_simple_script": "8x (goal 20x)",
    }
    print(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main()
