"""Make the demo recording and its calibration (synthetic: the built-in virtual finger).

Made up for the demo: one finger of a greenhouse tomato-picking gripper. The
virtual finger runs on a real pseudo-terminal and is recorded through the
same serial path a lab uses (pty -> SerialReader thread -> FrameRing ->
Recorder thread -> HDF5). The finger is pressed onto jigs of known curvature
one after another (labelled holds, as a person pressing label buttons would
mark them), then released to play its grasp scenario (the moving part,
labelled ``grasp (moving)``). Finally ``tapcurve calibrate`` fits a calibration
from the holds.

Usage (from the repository root)::

    .venv/bin/python recordings/make_demo.py            # writes recordings/demo_grasp.h5 and
                                                        # recordings/demo_calibration.json
    .venv/bin/python recordings/make_demo.py --out-dir /tmp/demo --truth /tmp/demo/truth.h5

Existing files are not replaced unless ``--force`` is given. The device's
time stamps advance at the nominal rate whatever ``--time-scale`` is (it
only makes the device send faster than real time, and the host clock
column then runs slow against the device clock). A real-time run takes about 90 s.
The finger's strip is the virtual finger's default real strip (creep,
hysteresis, drift), so the holds wait for the creep to settle.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
sys.path.insert(0, str(REPO))

from acquire.commands.cli import main as tapcurve  # noqa: E402
from acquire.link.reader import SerialReader  # noqa: E402
from acquire.store.recorder import Recorder  # noqa: E402
from acquire.rig import load_rig  # noqa: E402
from acquire.virtual import VirtualFinger  # noqa: E402
from acquire.virtual.builtin import BUILTIN_SEED  # noqa: E402

RIG_PATH = REPO / "acquire" / "rigs" / "demo_finger.toml"
RECORDING = "demo_grasp.h5"
CALIBRATION = "demo_calibration.json"
RATE_HZ = 500.0  # half the live default: the longer holds of a real strip stay under 2 MB
SEED = BUILTIN_SEED  # the built-in calibration's finger: replay falls back to it
# between moving onto a jig and pressing the label button: the real strip creeps (tau about 4 s), so a
# person waits until the reading has settled (1.5 tau: common practice, no source)
SETTLE_S = 6.0
HOLD_S = 1.5
MOVING_S = 12.0
#: the jigs, in the order the finger visits them
HOLDS = ["flat", "curvature=15/m", "radius=40mm", "radius=25mm", "radius=20mm", "flat",
         "radius=-100mm", "curvature=-15/m", "radius=-40mm", "flat"]


def _wait_frames(ring, n: int, timeout_s: float = 60.0) -> None:
    target = ring.written + n
    deadline = time.monotonic() + timeout_s
    while ring.written < target:
        left = deadline - time.monotonic()
        if left <= 0:
            raise SystemExit(f"make_demo: the virtual finger sent only {ring.written} of {target} frames")
        ring.wait(ring.written, min(left, 0.5))


def _newest_s(ring) -> float:
    return float(ring.latest(1).t_device_s[0])


def record_demo(path: Path, *, time_scale: float, truth_path: Path | None) -> dict:
    """Record holds and the moving part into ``path``; returns the link counters."""
    rig = load_rig(RIG_PATH)
    dev = VirtualFinger(rig=rig, rate_hz=RATE_HZ, seed=SEED, hold=HOLDS[0], time_scale=time_scale,
                        truth_path=truth_path)
    dev.start()
    try:
        reader = SerialReader(port=dev.path)
        reader.start()
        rec = Recorder(path=path, ring=reader.ring, rig_toml=rig.text, device_hello=json.dumps(reader.hello),
                       channel_names=rig.channels, events=reader.events, counters=reader.all_counters,
                       n_segments=rig.n_segments)
        rec.start()
        try:
            _wait_frames(reader.ring, int(0.2 * RATE_HZ))
            for label in HOLDS:
                dev.set_hold(label)
                _wait_frames(reader.ring, int(SETTLE_S * RATE_HZ))
                t0 = _newest_s(reader.ring)
                _wait_frames(reader.ring, int(HOLD_S * RATE_HZ))
                rec.add_label(label, t_start_s=t0, t_end_s=_newest_s(reader.ring))
                print(f"  hold {label:16s} {t0:6.2f} .. {_newest_s(reader.ring):6.2f} s", flush=True)
            dev.set_hold(None)
            _wait_frames(reader.ring, int(0.1 * RATE_HZ))
            t0 = _newest_s(reader.ring)
            _wait_frames(reader.ring, int(MOVING_S * RATE_HZ))
            rec.add_label("grasp (moving)", t_start_s=t0, t_end_s=_newest_s(reader.ring))
            print(f"  moving part      {t0:6.2f} .. {_newest_s(reader.ring):6.2f} s", flush=True)
        finally:
            rec.stop()
            reader.stop()
        if rec.error:
            raise SystemExit(f"make_demo: {rec.error}")
        return reader.all_counters()
    finally:
        dev.stop()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--out-dir", type=Path, default=HERE, help="folder for the two files (default: recordings/)")
    ap.add_argument("--time-scale", type=float, default=1.0,
                    help="device seconds per wall second (default 1: real time, as the committed demo)")
    ap.add_argument("--truth", type=Path, help="also write the virtual finger's per-frame ground truth here")
    ap.add_argument("--force", action="store_true", help="replace existing demo files")
    args = ap.parse_args(argv)
    out_dir = args.out_dir
    if not out_dir.is_dir():
        raise SystemExit(f"make_demo: {out_dir}: no such folder")
    recording, calibration = out_dir / RECORDING, out_dir / CALIBRATION
    for p in (recording, calibration) + ((args.truth,) if args.truth else ()):
        if p.exists():
            if not args.force:
                raise SystemExit(f"make_demo: {p} exists (add --force to replace it)")
            p.unlink()
    print(f"recording {recording} through a pseudo-terminal ...", flush=True)
    counters = record_demo(recording, time_scale=args.time_scale, truth_path=args.truth)
    lost = counters["frames_lost"] + sum(v for k, v in counters.items() if k.startswith("drop_"))
    print(f"  {counters['frames']} frames, {lost} lost or dropped, {recording.stat().st_size / 1e6:.2f} MB")
    print(f"calibrating {calibration} ...", flush=True)
    # from the output folder, with relative names: the calibration's provenance holds no
    # path of this machine (the recording's SHA-256 identifies it)
    os.chdir(out_dir)
    code = tapcurve(["calibrate", recording.name, "--rig", os.path.relpath(RIG_PATH, out_dir),
                     "--out", calibration.name])
    return int(code)


if __name__ == "__main__":
    sys.exit(main())
