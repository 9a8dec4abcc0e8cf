"""Benchmark: bytes per frame of a calibrated 1 kHz recording, raw and derived, and an hour's size.

Records the built-in virtual finger (grasp scenario, made up for the demo) at
1 kHz through a real pty with its built-in calibration, so /derived is
written live, then reads each dataset's stored size from HDF5. "Before" is
the layout of the first release: /raw uncompressed (37 bytes a frame for 6
channels) and /derived uncompressed with shape points every millimetre
(curvature 24 bytes + 97 points x 8 bytes). Target: a calibrated hour at
1 kHz under 0.5 GB. Also printed: each dataset's stored bytes per frame, the
file's overhead (what no dataset holds: mostly the earlier copies of the /raw
chunks each 0.25 s flush rewrites, which a file written in SWMR mode does not
reuse, and metadata), and the recorder thread's CPU (Linux: /proc).

Run by hand: ``.venv/bin/python bench/bench_size.py`` (``--quick``: 4 s; ``--seconds`` sets the
length either way).
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import h5py

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from acquire.rig import load_rig  # noqa: E402
from acquire.session import Session  # noqa: E402
from acquire.sources.virtual import VirtualOptions  # noqa: E402
from acquire.virtual.builtin import builtin_calibration  # noqa: E402
from bench.live_cpu import thread_cpu_s as _thread_cpu_s  # noqa: E402

BEFORE_RAW_B = 2 * 6 + 8 + 8 + 8 + 1
BEFORE_DERIVED_B = 6 * 4 + 97 * 2 * 4


def _stored_bytes(f: h5py.File, group: str) -> int:
    total = 0

    def add(_name, obj):
        nonlocal total
        if isinstance(obj, h5py.Dataset):
            total += obj.id.get_storage_size()

    if group in f:
        f[group].visititems(add)
    return total


def _per_dataset(f: h5py.File, n: int) -> dict[str, float]:
    sizes = {}

    def add(name, obj):
        if isinstance(obj, h5py.Dataset) and obj.maxshape and obj.maxshape[0] is None:
            sizes[name] = round(obj.id.get_storage_size() / n, 2)

    f.visititems(add)
    return {k: v for k, v in sorted(sizes.items()) if v >= 0.05}


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seconds", type=float, default=None, help="recording length (default 30 s, 4 s with --quick)")
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    seconds = args.seconds or (4.0 if args.quick else 30.0)
    rig = load_rig(None)
    cal = builtin_calibration(rig)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "size.h5"
        session = Session(rig=rig, calibration=cal, view=False, record_path=path,
                          virtual_options=VirtualOptions(rate_hz=1000.0))
        session.start()
        thread = getattr(session.recorder, "_thread", None)
        tid = getattr(thread, "native_id", None)
        cpu0, wall0 = _thread_cpu_s(tid), time.monotonic()
        try:
            time.sleep(seconds)
            recorder_cores = (_thread_cpu_s(tid) - cpu0) / (time.monotonic() - wall0)
        finally:
            session.stop_recording()
            session.stop()
        with h5py.File(path, "r") as f:
            n = f["raw/adc"].shape[0]
            raw_b = _stored_bytes(f, "raw") / n
            derived_b = _stored_bytes(f, "derived") / n
            all_b = _stored_bytes(f, "/") / n
            points = f["derived/s_m"].shape[0]
            per_dataset = _per_dataset(f, n)
            xy = f["derived/xy"]
            filters = {"raw": f"{f['raw/adc'].compression} {f['raw/adc'].compression_opts}, shuffle",
                       "derived": f"{xy.compression} {xy.compression_opts}, shuffle",
                       "xy_step_m": float(xy.attrs.get("step_m", float("nan")))}
        file_b = path.stat().st_size / n
    result = {
        "frames": n,
        "shape_points": points,
        "filters": filters,
        "raw_bytes_per_frame": round(raw_b, 1),
        "derived_bytes_per_frame": round(derived_b, 1),
        "other_datasets_bytes_per_frame": round(all_b - raw_b - derived_b, 1),
        "overhead_bytes_per_frame": round(file_b - all_b, 1),
        "file_bytes_per_frame": round(file_b, 1),
        "per_dataset_bytes_per_frame": per_dataset,
        "recorder_thread_cpu_cores": round(recorder_cores, 3),
        "load_average": [round(v, 2) for v in os.getloadavg()],
        "hour_at_1khz_gb": round(file_b * 3.6e6 / 1e9, 3),
        "before_raw_bytes_per_frame": BEFORE_RAW_B,
        "before_derived_bytes_per_frame": BEFORE_DERIVED_B,
        "before_hour_at_1khz_gb": round((BEFORE_RAW_B + BEFORE_DERIVED_B) * 3.6e6 / 1e9, 2),
        "target_hour_gb": 0.5,
    }
    print(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main()
