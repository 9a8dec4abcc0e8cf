"""One status line for a session or a replay: the same words in the terminal and in the window.

:func:`status_parts` turns the dict of :meth:`acquire.session.Session.status`
(or :meth:`acquire.sources.replay.ReplaySource.status`) into short phrases; the
terminal joins them with `` | ``, the window with a middle dot. Pure; any thread.
"""
from __future__ import annotations

import math
from pathlib import Path

__all__ = ["status_parts", "status_line", "fmt_bytes"]


def fmt_bytes(n: float) -> str:
    """Bytes as kB, MB or GB, for people."""
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{int(n)} B"


def _live_parts(st: dict, latency_s: float | None) -> list[str]:
    parts = []
    if st.get("recording"):
        parts.append(f"● REC {Path(st['recording']).name} {fmt_bytes(st['recording_bytes'])} "
                     f"({st['recording_frames']} frames)")
    else:
        parts.append("not recording")
    rate = st.get("frame_rate_hz", math.nan)
    parts.append(f"{rate:.1f} frames/s" if math.isfinite(rate) else "-- frames/s")
    parts.append(f"lost {st['frames_lost']}")
    parts.append(f"bad packets {st['bad_packets']}")
    parts.append(f"reconnects {st['reconnects']}")
    lat = st.get("latency_s", math.nan) if latency_s is None or not math.isfinite(latency_s) else latency_s
    parts.append(f"latency {lat * 1e3:.0f} ms" if math.isfinite(lat) else "latency -- ms")
    if not st.get("connected", True):
        parts.append("LINK DOWN")
    if st.get("label"):
        parts.append(f"label ‘{st['label']}’ open")
    return parts


def _replay_parts(st: dict) -> list[str]:
    parts = [
        f"t {st['position_s']:.3f} s of {st['duration_s']:.3f} s",
        f"frame {st['position_index'] + 1} of {st['frames']}",
        ("▶ " if st["playing"] else "❚❚ ") + f"{st['speed']:g}×",
    ]
    if st.get("following"):
        parts.append("following the growing file" if st.get("file_live") else "follow (file closed)")
    parts.append(f"lost on the link {st['frames_lost']}")
    parts.append(f"bad packets {st['bad_packets']}")
    if st.get("recovered"):
        parts.append("file was left unclosed: recovered")
    return parts


def status_parts(st: dict, *, latency_s: float | None = None) -> list[str]:
    """Short phrases for a status line; failures of any thread come last, in capitals."""
    parts = _live_parts(st, latency_s) if st.get("mode") == "live" else _replay_parts(st)
    cal = st.get("calibration")
    parts.append(f"calibration: {Path(cal).name if cal and '/' in str(cal) else (cal or 'none')}")
    for err in st.get("errors", ()):
        parts.append(f"FAILED: {err}")
    return parts


def status_line(st: dict, *, latency_s: float | None = None) -> str:
    """The status as one terminal line."""
    return " | ".join(status_parts(st, latency_s=latency_s))
