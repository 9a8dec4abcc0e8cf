"""Benchmark: one live session on the built-in virtual finger, as its status line and a stream client see it.

Run by hand: ``.venv/bin/python bench/bench_session.py`` (``--quick`` for a
short check). A :class:`acquire.session.Session` reads the virtual finger
(1,000 frames/s over its pseudo-terminal, in this process) with a calibration,
the view processing thread and a shape stream on 127.0.0.1; one client asks
for every frame, another for at most ``--client-rate-hz`` messages per second.
Figures, printed as JSON:

- ``frame_rate_hz``: the status line's measured rate (frames received per
  second of host time over the last 2 s), sampled once a second: min, median,
  max. The device's nominal rate is beside it;
- ``processing_latency_ms``: host arrival of the newest frame of a block to
  the end of its processing on the view thread (median, 95th percentile, max
  of the last 256 blocks). No window: ``bench_live.py`` measures to the screen;
- ``stream``: messages per wall second each client received, and for the
  limited one the spacing of the frames it got in device time (the limit is
  defined per device second);
- ``frames_lost``, ``display_lost``: on the link and behind the view thread.

These were assertions in the tests once; they depend on the machine and its
load, so they are figures here.
"""
from __future__ import annotations

import argparse
import json
import os
import socket
import sys
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402


def _calibration(rig):
    from acquire.core.calibration_fit import fit_calibration
    from acquire.virtual import FingerModel

    model = FingerModel(rig=rig, seed=0)
    t = np.arange(200) / 1000.0
    holds = [(float(k), model.with_hold(f"curvature={k}/m").segment_ohm(t)) for k in (-40, -20, 0, 20, 40, 80, 120)]
    return fit_calibration(holds, rig=rig)[0]


class _Client:
    """Reads the shape stream's JSON lines in a thread; keeps (wall s, seq, t_device_s) of each frame message."""

    def __init__(self, port: int, *, max_rate_hz: float | None):
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=10)
        self.sock.settimeout(None)
        if max_rate_hz is not None:
            self.sock.sendall(json.dumps({"max_rate_hz": max_rate_hz}).encode() + b"\n")
        self.got: list[tuple[float, int, float]] = []
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        try:
            for line in self.sock.makefile("rb"):
                msg = json.loads(line)
                if "seq" in msg:
                    self.got.append((time.monotonic(), int(msg["seq"]), float(msg["t_device_s"])))
        except (OSError, ValueError):
            pass

    def close(self) -> None:
        try:
            self.sock.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass
        self.sock.close()
        self._thread.join(5)


def _stats(values, scale: float = 1.0, digits: int = 1) -> dict:
    a = np.asarray([v for v in values if np.isfinite(v)], dtype=float) * scale
    if a.size == 0:
        return {"n": 0}
    return {"min": round(float(a.min()), digits), "median": round(float(np.median(a)), digits),
            "p95": round(float(np.percentile(a, 95)), digits), "max": round(float(a.max()), digits), "n": int(a.size)}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="short run (a check that the benchmark works)")
    ap.add_argument("--seconds", type=float, default=None, help="measuring time (default 10, 3 with --quick)")
    ap.add_argument("--client-rate-hz", type=float, default=10.0, help="the limited client's max_rate_hz")
    args = ap.parse_args(argv)
    seconds = args.seconds or (3.0 if args.quick else 10.0)

    from acquire.rig import load_rig
    from acquire.session import Session

    rig = load_rig(None)
    session = Session(rig=rig, calibration=_calibration(rig), publish="127.0.0.1:0")
    session.start()
    try:
        port = session.publisher.port
        every, limited = _Client(port, max_rate_hz=None), _Client(port, max_rate_hz=args.client_rate_hz)
        session.publisher.wait_for_clients(2, timeout_s=10)
        time.sleep(1.0)  # settle: the 2 s rate window fills, clients are served from here on
        t0 = time.monotonic()
        rates = []
        while time.monotonic() - t0 < seconds:
            time.sleep(1.0)
            rates.append(session.status()["frame_rate_hz"])
        t1 = time.monotonic()
        status = session.status()
        latency = list(session.processing.latency_s)
        every.close()
        limited.close()
    finally:
        session.stop()

    def per_wall_s(client) -> float:
        n = sum(1 for w, _, _ in client.got if t0 <= w < t1)
        return round(n / (t1 - t0), 1)

    spacing = np.diff([t for w, _, t in limited.got if t0 <= w < t1])
    out = {
        "benchmark": "session",
        "quick": args.quick,
        "seconds": round(t1 - t0, 2),
        "nominal_rate_hz": status["nominal_rate_hz"],
        "frame_rate_hz": _stats(rates),
        "processing_latency_ms": _stats(latency, scale=1e3),
        "stream": {
            "every_frame_msgs_per_s": per_wall_s(every),
            "limited_max_rate_hz": args.client_rate_hz,
            "limited_msgs_per_s": per_wall_s(limited),
            "limited_spacing_device_ms": _stats(spacing, scale=1e3, digits=2),
        },
        "frames_lost": status["frames_lost"],
        "display_lost": status["display_lost"],
        "errors": status["errors"],
        "cpus": os.cpu_count(),
    }
    print(json.dumps(out, indent=1))
    return 1 if status["errors"] else 0


if __name__ == "__main__":
    sys.exit(main())
