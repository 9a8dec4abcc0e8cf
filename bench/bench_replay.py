"""Benchmark: opening and scrubbing a long recording in the replay window.

Run by hand: ``.venv/bin/python bench/bench_replay.py`` (``--quick`` for a
short check). Makes a synthetic 30-minute, 1 kHz, 6-channel recording (3
minutes with ``--quick``) in a temporary folder, in the recording layout and
with a calibration, from the virtual finger's model (made up, demo data), then
times on Qt's ``offscreen`` platform:

- ``open_s``: from starting the replay source to the first frame drawn in the
  window (target < 2 s), and ``source_open_s`` for the file alone;
- ``scrub_ms``: seeks to random times, request to the frame shown (the worker
  reads and filters the window of history before that time);
- ``play_20x``: device seconds advanced per wall second at 20x;
- ``play``: at 1x and 10x (the speeds the window tests use), device seconds
  per wall second from the frames drawn (slope of a straight-line fit,
  ``numpy.polyfit``, the first 0.1 s of start-up left out) and the median
  frames advanced per redraw (at 10x with a 60 Hz timer about 10 x 16.7).
Figures are printed as JSON.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402


def make_recording(path: Path, *, minutes: float, rate_hz: float = 1000.0, chunk: int = 200_000) -> dict:
    """Write a recording of the virtual finger's model straight with h5py, in the layout. Returns facts."""
    import h5py

    from acquire.core.calibration_fit import fit_calibration
    from acquire.rig import load_rig
    from acquire.store.recording import LIBVER, create_layout
    from acquire.virtual import FingerModel

    rig = load_rig(None)
    model = FingerModel(rig=rig, seed=0)
    t_hold = np.arange(200) / 1000.0
    holds = [(float(k), model.with_hold(f"curvature={k}/m").segment_ohm(t_hold)) for k in (-40, -20, 0, 20, 40, 80, 120)]
    cal = fit_calibration(holds, rig=rig)[0]
    n = int(minutes * 60 * rate_hz)
    t0 = time.perf_counter()
    with h5py.File(path, "w", libver=LIBVER) as f:
        hello = {"protocol": 1, "firmware": "bench (synthetic)", "adc_bits": 12, "channels": rig.n_channels,
                 "rate_hz": rate_hz, "demo": "synthetic benchmark recording (made up)"}
        create_layout(f, n_channels=rig.n_channels, channel_names=rig.channels, rig_toml=rig.text,
                      device_hello=json.dumps(hello), calibration_json=cal.to_json())
        raw = f["raw"]
        for name in ("adc", "seq", "t_device_s", "t_host_s", "status"):
            raw[name].resize(n, axis=0)
        for i in range(0, n, chunk):
            j = min(n, i + chunk)
            idx = np.arange(i, j, dtype=np.int64)
            t = idx / rate_hz
            raw["adc"][i:j] = model.codes(t, frame_index=idx)
            raw["seq"][i:j] = idx
            raw["t_device_s"][i:j] = t
            raw["t_host_s"][i:j] = t + 0.002
            raw["status"][i:j] = 0
        g = f["labels"]
        k = 30
        starts = np.linspace(10.0, n / rate_hz - 20.0, k)
        texts = [("flat" if m % 3 == 0 else f"radius={20 + m}mm" if m % 3 == 1 else f"grasp {m} (demo)") for m in range(k)]
        for name, values in (("text", np.array([x.encode() for x in texts], dtype=g["text"].dtype)),
                             ("t_start_s", starts), ("t_end_s", starts + 5.0)):
            g[name].resize(k, axis=0)
            g[name][:] = values
    return {"frames": n, "minutes": minutes, "write_s": time.perf_counter() - t0, "bytes": path.stat().st_size}


# long on purpose: a benchmark's one procedure, read top to bottom
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="3-minute recording, fewer scrubs")
    ap.add_argument("--minutes", type=float, default=None)
    ap.add_argument("--file", help="use this recording instead of making one")
    args = ap.parse_args(argv)
    minutes = args.minutes or (3.0 if args.quick else 30.0)

    from PyQt5 import QtCore

    from acquire.sources.replay import ReplaySource
    from display.app import make_app
    from display.window import SensorWindow

    app = make_app()
    with tempfile.TemporaryDirectory(prefix="tapcurve-bench-") as tmp:
        if args.file:
            path = Path(args.file)
            facts = {"frames": None, "bytes": path.stat().st_size}
        else:
            path = Path(tmp) / "long.h5"
            facts = make_recording(path, minutes=minutes)

        def pump_until(cond, timeout_s=30.0):
            # run the Qt loop in 2 ms slices (it sleeps while idle, so CPU figures stay honest)
            deadline = time.monotonic() + timeout_s
            loop = QtCore.QEventLoop()
            while not cond():
                if time.monotonic() > deadline:
                    raise TimeoutError("benchmark step timed out")
                QtCore.QTimer.singleShot(2, loop.quit)
                loop.exec_()

        # warm the imports (scipy, h5py, the filters) once: a user's first open pays them too, reported apart
        t = time.perf_counter()
        warm = ReplaySource(path=path).start()
        warm.wait_ready()
        cold_s = time.perf_counter() - t
        warm.stop()

        t = time.perf_counter()
        src = ReplaySource(path=path).start()
        src.wait_ready()
        source_open_s = time.perf_counter() - t
        window = SensorWindow(source=src)
        window.resize(1366, 768)
        window.show()
        pump_until(lambda: window.current is not None)
        open_s = time.perf_counter() - t

        rng = np.random.default_rng(0)
        duration = src.t_last_s - src.t_first_s
        scrubs = []
        for target in rng.uniform(0.0, duration, 10 if args.quick else 40):
            t = time.perf_counter()
            window.seek(target)
            want = src.t_first_s + target
            pump_until(lambda: window.current is not None and abs(window.current.t_device_s - want) < 0.0015)
            scrubs.append(time.perf_counter() - t)
        scrubs = np.array(scrubs) * 1e3

        play = {}
        for speed in (1.0, 10.0):
            window.seek(10.0)
            pump_until(lambda: abs(window.current.t_device_s - (src.t_first_s + 10.0)) < 0.0015)
            window.set_speed(speed)
            pump_until(lambda: src.wait_idle(0.001) and src.speed == speed)
            window.drawn.clear()
            t0 = time.monotonic()
            src.play()
            pump_until(lambda: time.monotonic() - t0 >= (1.0 if args.quick else 3.0))
            src.pause()
            drawn = list(window.drawn)
            seqs = np.array([d[0] for d in drawn], dtype=float)
            t_dev = np.array([d[1] for d in drawn])
            wall = np.array([d[3] for d in drawn])
            late = wall > wall[0] + 0.1
            rate = float(np.polyfit(wall[late], t_dev[late], 1)[0]) if late.sum() >= 3 else float("nan")
            play[f"{speed:g}x"] = {
                "speed_reached": round(rate, 3),
                "frames_per_redraw_median": float(np.median(np.diff(seqs))) if seqs.size > 1 else None,
                "redraws": int(seqs.size),
                "in_order": bool(np.all(np.diff(seqs) > 0)),
            }

        window.seek(10.0)
        pump_until(lambda: abs(window.current.t_device_s - (src.t_first_s + 10.0)) < 0.0015)
        window.set_speed(20.0)
        t_dev0, t0 = window.current.t_device_s, time.monotonic()
        cpu0 = time.process_time()
        src.play()
        pump_until(lambda: time.monotonic() - t0 >= (1.0 if args.quick else 3.0))
        src.pause()
        wall = time.monotonic() - t0
        speed = (window.current.t_device_s - t_dev0) / wall
        play_cpu = (time.process_time() - cpu0) / wall
        window.close()
        src.stop()

    out = {
        "benchmark": "replay",
        "quick": args.quick,
        "recording": {k: (round(v, 3) if isinstance(v, float) else v) for k, v in facts.items()},
        "first_open_with_imports_s": round(cold_s, 3),
        "source_open_s": round(source_open_s, 3),
        "open_s": round(open_s, 3),
        "open_target_s": 2.0,
        "scrub_ms": {"median": round(float(np.median(scrubs)), 1), "p95": round(float(np.percentile(scrubs, 95)), 1),
                     "max": round(float(scrubs.max()), 1), "n": int(scrubs.size)},
        "play": play,
        "play_20x": {"speed_reached": round(speed, 2), "process_cpu_cores": round(play_cpu, 2)},
        "cpus": os.cpu_count(),
    }
    out["meets_open_target"] = out["open_s"] < 2.0
    print(json.dumps(out, indent=1))
    del app
    return 0


if __name__ == "__main__":
    sys.exit(main())
