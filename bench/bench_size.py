"""Benchmark: bytes per frame of a calibrated 1 kHz recording, raw and derived, and an hour's size.

Records the built-in virtual finger (grasp scenario, made up for the demo) at
1 kHz through a real pty with its built-in calibration, so /derived is
written live, then reads each dataset's stored size from HDF5. "Before" is
the layout of the first release: /raw uncompressed (37 bytes a frame for 6
channels) and /derived uncompressed with shape points every millimetre
(curvature 24 bytes + 97 points x 8 bytes). Target: a calibrated hour at
1 kHz under 0.5 GB.

Run by hand: ``.venv/bin/python bench/bench_size.py`` (``--quick``: 4 s).
"""
from __future__ import annotations

import argparse
import json
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


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seconds", type=float, default=30.0)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    seconds = 4.0 if args.quick else args.seconds
    rig = load_rig(None)
    cal = builtin_calibration(rig)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "size.h5"
        session = Session(rig=rig, calibration=cal, view=False, record_path=path,
                          virtual_options=VirtualOptions(rate_hz=1000.0))
        session.start()
        try:
            time.sleep(seconds)
        finally:
            session.stop_recording()
            session.stop()
        with h5py.File(path, "r") as f:
            n = f["raw/adc"].shape[0]
            raw_b = _stored_bytes(f, "raw") / n
            derived_b = _stored_bytes(f, "derived") / n
            points = f["derived/s_m"].shape[0]
        file_b = path.stat().st_size / n
    result = {
        "frames": n,
        "shape_points": points,
        "raw_bytes_per_frame": round(raw_b, 1),
        "derived_bytes_per_frame": round(derived_b, 1),
        "file_bytes_per_frame": round(file_b, 1),
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
