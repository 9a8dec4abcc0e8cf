"""One status line for a session or a replay: the same words in the terminal and in the window.

:func:`status_parts` turns the dict of :meth:`acquire.session.Session.status`
(or :meth:`acquire.sources.replay.ReplaySource.status`) into short phrases; the
terminal joins them with `` | ``, the window with a middle dot. Pure; any thread.

A ``flat_drift`` entry (:meth:`acquire.core.drift_live.DriftReadout.as_status`)
adds how far the flat reading has moved since calibration, measured while
the sensor is known to be flat, and whether a tare is due.
"""
from __future__ import annotations

import math
from pathlib import Path

__all__ = ["status_parts", "status_line", "fmt_bytes", "drift_part", "format_age"]


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


def format_age(age_s: float) -> str:
    """How long ago, in words a status line shows: ``"12 s"``, ``"4 min"``, ``"2.5 h"``. Pure."""
    if age_s < 90:
        return f"{age_s:.0f} s"
    if age_s < 5400:
        return f"{age_s / 60:.0f} min"
    return f"{age_s / 3600:.1f} h"


def drift_part(d: dict | None) -> str | None:
    """The flat-drift phrase of a status line, or None when there is nothing to say.

    ``d``: :meth:`acquire.core.drift_live.DriftReadout.as_status`. Says the
    worst segment's drift in % of r0 and the curvature it reads when flat
    (1/m), then ``ok`` or ``TARE DUE``; its age once the sensor is no longer
    held flat. Pure; any thread.
    """
    if not d or d.get("state") in (None, "no calibration", "unknown"):
        return None
    since = "since tare" if d.get("since_tare") else "since calibration"
    if d["state"] == "measuring":
        return "flat drift: measuring (keep the sensor flat)"
    if not d.get("valid", False) or "segment" not in d:
        return "flat drift: no valid flat reading in some segment"
    if d.get("suspicious"):
        text = (f"flat drift {d['drift_pct']:+.1f} % in segment {d['segment']}: more than drift, "
                "CHECK THE STRIP (then calibrate again)")
    else:
        text = (f"flat drift {since} {d['drift_pct']:+.2f} % ({d['curvature_error_per_m']:+.3f} 1/m, "
                f"segment {d['segment']}, limit {d['threshold_per_m']:.2f}): "
                + ("TARE DUE" if d.get("needs_tare") else "ok"))
    if d.get("settling"):
        text += ", still settling"
    if not d.get("flat_now"):
        text += f" ({format_age(d.get('age_s', 0.0))} ago)"
    return text


def status_parts(st: dict, *, latency_s: float | None = None) -> list[str]:
    """Short phrases for a status line; failures of any thread come last, in capitals."""
    parts = _live_parts(st, latency_s) if st.get("mode") == "live" else _replay_parts(st)
    cal = st.get("calibration")
    parts.append(f"calibration: {Path(cal).name if cal and '/' in str(cal) else (cal or 'none')}")
    drift = drift_part(st.get("flat_drift"))
    if drift:
        parts.append(drift)
    for err in st.get("errors", ()):
        parts.append(f"FAILED: {err}")
    return parts


def status_line(st: dict, *, latency_s: float | None = None) -> str:
    """The status as one terminal line."""
    return " | ".join(status_parts(st, latency_s=latency_s))
