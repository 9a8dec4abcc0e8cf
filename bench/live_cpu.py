"""What a live session costs per frame: the CPU of its own threads, read from /proc (Linux).

Shared by the benchmarks that ask what an optional stage (strip memory, force)
adds to the live path: one :class:`acquire.session.Session` on the built-in
virtual finger (1,000 frames/s over its pseudo-terminal) with the view
processing thread and a recording, as ``tapcurve live --record`` runs them
without a window; the CPU time of its reader, view and recorder threads
(every thread but the main one and the virtual device's, which stands in for
the hardware) divided by the frames read. Sessions with different
calibrations alternate, so a change of the machine's load hits each alike.
"""
from __future__ import annotations

import os
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

__all__ = ["thread_cpu_s", "live_threads_cpu_s", "session_us_per_frame", "compare_sessions"]


def thread_cpu_s(native_id) -> float:
    """CPU time (user + system, s) of one thread of this process, from /proc (Linux); NaN elsewhere."""
    try:
        fields = Path(f"/proc/self/task/{native_id}/stat").read_text().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError, TypeError):
        return float("nan")


def live_threads_cpu_s() -> float:
    """CPU (s) of the live path's threads: every thread but the main one and the virtual device's."""
    main = threading.main_thread().ident
    return sum(thread_cpu_s(t.native_id) for t in threading.enumerate()
               if t.ident != main and not t.name.startswith("virtual"))


def session_us_per_frame(rig, calibration, *, seconds: float, folder: Path) -> float:
    """CPU microseconds per frame of one live session's reader, view and recorder threads."""
    from acquire.session import Session

    session = Session(rig=rig, calibration=calibration, view=True,
                      record_path=folder / f"live-{time.monotonic_ns()}.h5")
    session.start()
    try:
        time.sleep(min(1.0, max(0.3, seconds)))  # settle: first blocks, caches
        ring = session.reader.ring
        cpu0, n0 = live_threads_cpu_s(), ring.written
        time.sleep(seconds)
        cpu1, n1 = live_threads_cpu_s(), ring.written
    finally:
        session.stop()
    return 1e6 * (cpu1 - cpu0) / max(1, n1 - n0)


def compare_sessions(rig, calibrations: dict, *, seconds: float, repeats: int) -> dict:
    """``{name: median us per frame}`` over ``repeats`` rounds of one session per calibration, alternated,
    and ``added_percent`` of the last name over the first."""
    runs = {name: [] for name in calibrations}
    with tempfile.TemporaryDirectory() as tmp:
        for _ in range(repeats):
            for name, cal in calibrations.items():
                runs[name].append(session_us_per_frame(rig, cal, seconds=seconds, folder=Path(tmp)))
    out = {name: round(float(np.median(v)), 2) for name, v in runs.items()}
    first, last = list(out.values())[0], list(out.values())[-1]
    out["added_percent"] = round(100.0 * (last - first) / first, 1)
    out["seconds_per_run"], out["runs"] = seconds, repeats
    return out
