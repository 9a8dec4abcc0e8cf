"""``tapcurve inspect``: what a recording holds, in a few lines."""
from __future__ import annotations

import json
import math

import numpy as np

from acquire.store.recording import open_recording

__all__ = ["inspect_summary", "format_summary"]


def inspect_summary(path) -> dict:
    """Summary of a recording as plain data (JSON-ready).

    Opens (and if needed recovers) the file; reads the time and sequence
    columns, not the codes.
    """
    with open_recording(path) as rec:
        n = rec.n_frames
        raw = rec.file["raw"]
        seq = raw["seq"][:n]
        t_dev = raw["t_device_s"][:n]
        hello = rec.hello
        gaps = int(np.count_nonzero(np.diff(seq) != 1)) if n > 1 else 0
        missing = int((np.diff(seq) - 1).clip(min=0).sum()) if n > 1 else 0
        duration = float(t_dev[-1] - t_dev[0]) if n > 1 else 0.0
        rate = (n - 1) / duration if duration > 0 else float(hello.get("rate_hz", 0.0))
        cal = rec.calibration_json
        cal_info = None
        if cal is not None:
            try:
                doc = json.loads(cal)
                model = doc.get("model")
                name = model.get("name", "?") if isinstance(model, dict) else model
                cal_info = {"model": name, "created_utc": doc.get("created_utc"),
                            "rig_sha256": (doc.get("rig") or {}).get("sha256") if isinstance(doc.get("rig"), dict) else None}
            except json.JSONDecodeError:
                cal_info = {"error": "calibration_json is not JSON"}
        return {
            "file": str(rec.path),
            "recovered": rec.recovered,
            "still_recording": rec.live,
            "created_utc": str(rec.file.attrs.get("created_utc", "")),
            "software_version": str(rec.file.attrs.get("software_version", "")),
            "device": hello,
            "frames": n,
            "channels": rec.channel_names,
            "duration_s": duration,
            "rate_hz": rate,
            "seq_first": int(seq[0]) if n else None,
            "seq_last": int(seq[-1]) if n else None,
            "seq_gaps": gaps,
            "frames_missing_by_seq": missing,
            "counters": rec.counters(),
            "labels": [
                {"text": lb.text, "t_start_s": lb.t_start_s, "t_end_s": lb.t_end_s} for lb in rec.labels()
            ],
            "events": [
                {"t_host_s": t, "frame": fr, "kind": k, "text": x} for t, fr, k, x in rec.events()
            ],
            "calibration": cal_info,
            "clock": rec.clock(),
            "derived": rec.has_derived,
            "derived_force": rec.has_derived and "force_n" in rec.file["derived"],
            "actuation": _actuation_summary(rec, n),
            "flat_drift": _flat_drift_summary(rec),
        }


def _flat_drift_summary(rec) -> dict | None:
    """How far the flat reading moved since the recording's calibration, from its ``flat`` labels (or None)."""
    if rec.calibration_json is None or rec.n_frames == 0:
        return None
    from acquire.commands.common import _adc_bits, filtered_intervals, recording_rate_hz, recording_rig
    from acquire.core.calibration import Calibration, CalibrationError
    from acquire.core.drift import flat_drift
    from acquire.core.labels import LabelError, parse_label

    def is_flat(text: str) -> bool:
        try:
            return parse_label(text) == 0.0
        except LabelError:
            return False

    t = rec.file["raw"]["t_device_s"][: rec.n_frames]
    spans = [(int(np.searchsorted(t, lb.t_start_s)), int(np.searchsorted(t, lb.t_end_s)))
             for lb in rec.labels() if is_flat(lb.text)]
    spans = [(a, b) for a, b in spans if b - a >= 10]
    if not spans:
        return None
    try:
        cal = Calibration.from_json(rec.calibration_json, source=f"{rec.path}: calibration_json")
        rig = recording_rig(rec)
        rate, _ = recording_rate_hz(rec, t_device_s=t[:100_000])
        bits, _ = _adc_bits(rec)
        # the second half of each flat hold: the strip has settled there
        frames = filtered_intervals(rec, rig=rig, rate_hz=rate, adc_bits=bits,
                                    intervals=[((a + b) // 2, b) for a, b in spans])
        report = flat_drift(cal, np.concatenate(frames))
    except (CalibrationError, ValueError) as exc:
        return {"verdict": f"not measured ({exc})", "needs_tare": False}
    return {"verdict": report.verdict, "needs_tare": bool(report.needs_tare)}


_COLUMN_CHUNK = 65536  # rows read at a time for one channel's range


def _actuation_summary(rec, n: int) -> dict | None:
    """The rig's ``[actuation]``: channel, unit and the range recorded (in its unit); None without one."""
    from acquire.rig import RigError, parse_rig

    try:
        act = parse_rig(rec.rig_toml, source=str(rec.path)).actuation
    except RigError:
        return None
    if act is None:
        return None
    lo, hi = math.inf, -math.inf
    adc = rec.file["raw"]["adc"]
    for start in range(0, n, _COLUMN_CHUNK):
        v = act.value(adc[start:min(n, start + _COLUMN_CHUNK)])
        lo, hi = min(lo, float(v.min())), max(hi, float(v.max()))
    return {"channel": act.channel, "unit": act.unit, "min": lo if n else None, "max": hi if n else None}


def format_summary(s: dict) -> str:
    """Human-readable form of :func:`inspect_summary`."""
    lines = [f"{s['file']}"]
    if s["recovered"]:
        lines.append("  (was left unclosed by a stopped recorder; recovered: it now opens anywhere)")
    if s["still_recording"]:
        lines.append("  (a recorder is still writing this file; figures are as of now)")
    dev = s["device"]
    lines.append(
        f"  device      {dev.get('firmware', '?')}, {dev.get('channels', '?')} channels, "
        f"{dev.get('adc_bits', '?')}-bit, nominal {dev.get('rate_hz', '?')} Hz"
    )
    lines.append(f"  created     {s['created_utc']} (tapcurve {s['software_version']})")
    lines.append(f"  frames      {s['frames']} over {s['duration_s']:.3f} s ({s['rate_hz']:.1f} frames/s)")
    lines.append(f"  channels    {', '.join(s['channels'])}")
    if s["frames"]:
        lines.append(
            f"  seq         {s['seq_first']} .. {s['seq_last']}, {s['seq_gaps']} gaps, "
            f"{s['frames_missing_by_seq']} frames missing"
        )
    c = s["counters"]
    if c:
        bad = sum(v for k, v in c.items() if k.startswith("drop_"))
        causes = ", ".join(f"{k[5:]} {v}" for k, v in c.items() if k.startswith("drop_") and v)
        lines.append(
            f"  link        {c.get('frames_lost', 0)} frames lost, {bad} bad packets"
            + (f" ({causes})" if causes else "")
            + f", {c.get('reconnects', 0)} reconnects, {c.get('reboots', 0)} device reboots"
        )
        lines.append(
            f"  device flags {c.get('late_frames', 0)} late samples, {c.get('tx_overflow_frames', 0)} transmit overflows"
        )
    if s["labels"]:
        lines.append(f"  labels      {len(s['labels'])}")
        for lb in s["labels"]:
            lines.append(f"    {lb['t_start_s']:9.3f} .. {lb['t_end_s']:9.3f} s  {lb['text']}")
    else:
        lines.append("  labels      none")
    events = [e for e in s["events"] if e["kind"] != "hello"]
    if events:
        lines.append(f"  events      {len(events)}")
        for e in events[:20]:
            lines.append(f"    {e['t_host_s']:9.3f} s  frame {e['frame']:>8}  {e['kind']}: {e['text']}")
        if len(events) > 20:
            lines.append(f"    ... {len(events) - 20} more")
    clock = s.get("clock")
    if clock and clock["span_s"] < 60.0:
        # over seconds, link latency jitter (ms) dwarfs any clock drift (us)
        lines.append(f"  clock       no drift estimate: the recording spans {s['duration_s']:.1f} s of device time "
                     "(a clock drift shows over a minute or more)")
    elif clock and clock["points"] >= 2 and clock["drift_ppm"] == clock["drift_ppm"]:
        lines.append(
            f"  clock       host - device drift {clock['drift_ppm']:+.1f} ppm, offset {clock['offset_s'] * 1e3:.2f} ms "
            f"(fit over {clock['span_s']:.0f} s of device time, {clock['points']} points)"
        )
    if s["calibration"]:
        cal = s["calibration"]
        lines.append(f"  calibration {cal.get('model', '?')} from {cal.get('created_utc', '?')}")
    else:
        lines.append("  calibration none")
    act = s.get("actuation")
    if act:
        span = f"{act['min']:.4g} .. {act['max']:.4g} {act['unit']}" if act["min"] is not None else "no frames"
        lines.append(f"  actuation   channel {act['channel']} ({act['unit'] or 'no unit'}), recorded {span}")
    drift = s.get("flat_drift")
    if drift:
        lines.append(f"  flat drift  {drift['verdict']} (from the flat labels, against the recording's calibration)")
    derived = "no"
    if s["derived"]:
        derived = "yes, with force_n (estimated force, N)" if s.get("derived_force") else "yes, no force"
    lines.append(f"  derived     {derived}")
    return "\n".join(lines)
