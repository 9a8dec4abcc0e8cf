"""``tapcurve tare``: re-zero a calibration's flat resistances from a recording held flat.

The new flat resistances come from :func:`acquire.core.pipeline.tare_calibration`,
the one definition of tare that the live window uses too. Threads: the
calling (main) thread.
"""
from __future__ import annotations

import os
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

import numpy as np

from acquire.core.calibration import (
    Calibration,
    steady_part,
)
from acquire.errors import UserError
from acquire.core.pipeline import tare_calibration
from acquire.store.recording import open_recording
from acquire.store.outputs import check_output
from acquire.commands.calibrate import holds_from_recording
from acquire.commands.common import (
    MIN_STEADY_FRAMES, TARE_WARN_FRACTION,
    _adc_bits, _warn, filtered_intervals, recording_rate_hz,
    recording_rig, write_text_output,
)

__all__ = ["TareRun", "tare_from_recording", "tare_command"]


@dataclass
class TareRun:
    """What :func:`tare_from_recording` did."""

    calibration: Calibration
    flat_ohm: np.ndarray
    old_r0_ohm: np.ndarray
    old_reading_per_m: np.ndarray
    steady_frames: int
    notes: list[str] = field(default_factory=list)


def tare_from_recording(file: str | os.PathLike, *, calibration: Calibration) -> TareRun:
    """Re-zero ``calibration`` at the flat resistances of a recording.

    The frames used: the steady parts of the recording's ``flat`` holds, or,
    if it has no reference labels at all, the steady part of the whole
    recording. The new flat resistance of each segment is the median.

    Raises
    ------
    UserError
        The recording's rig does not fit the calibration, it has bent holds
        but no flat one, or it has no steady frames.
    """
    notes: list[str] = []
    with open_recording(file, allow_live=False) as rec:
        if rec.recovered:
            notes.append(f"{rec.path}: was left unclosed by its recorder; recovered")
        rig = recording_rig(rec)
        notes.extend(calibration.check_rig(rig))
        n = rec.n_frames
        if n < MIN_STEADY_FRAMES:
            raise UserError(f"{rec.path}: only {n} frames; record the sensor flat for a second or more")
        t = rec.file["raw"]["t_device_s"][:n]
        rate, rate_notes = recording_rate_hz(rec, t_device_s=t[:100_000])
        bits, bit_notes = _adc_bits(rec)
        notes.extend(rate_notes + bit_notes)
        holds, infos = holds_from_recording(rec, rig=rig, rate_hz=rate, adc_bits=bits, only_flat=True)
        bent = [i.label for i in infos if i.note.startswith("not flat")]
        if not holds:
            if bent:
                raise UserError(
                    f"{rec.path}: no usable 'flat' label (labels state bends: {', '.join(repr(b) for b in bent[:5])}); "
                    f"tare needs the sensor held flat"
                )
            if any(i.reference_per_m is not None for i in infos):
                raise UserError(f"{rec.path}: its 'flat' labels have too few steady frames to tare")
            (r,) = filtered_intervals(rec, rig=rig, rate_hz=rate, adc_bits=bits, intervals=[(0, n)])
            mask = steady_part(t, r, float(t[0]), float(t[-1]))
            if mask.sum() < MIN_STEADY_FRAMES:
                raise UserError(f"{rec.path}: the sensor never held still long enough to tare")
            frames = r[mask]
            notes.append(f"{rec.path}: no 'flat' label; taking the whole recording as flat")
        else:
            frames = np.concatenate([h.resistance_ohm for h in holds])
    tared = tare_calibration(calibration, np.where(np.isfinite(frames), frames, np.nan))
    flat = np.asarray(tared.r0_ohm, dtype=np.float64)
    old_reading = calibration.curvature_per_m(flat[None, :])[0]
    change = flat / calibration.r0_ohm - 1.0
    for k in np.flatnonzero(np.abs(change) > TARE_WARN_FRACTION):
        notes.append(
            f"segment {int(k)}: flat resistance moved {100 * change[k]:+.1f} % "
            f"({calibration.r0_ohm[k]:.1f} -> {flat[k]:.1f} ohm); was the sensor really flat?"
        )
    return TareRun(
        calibration=tared, flat_ohm=flat, old_r0_ohm=np.array(calibration.r0_ohm),
        old_reading_per_m=old_reading, steady_frames=int(frames.shape[0]), notes=notes,
    )


def tare_command(
    *,
    file: str,
    calibration_path: str,
    out_path: str,
    stdout: TextIO | None = None,
    stderr: TextIO | None = None,
) -> int:
    """``tapcurve tare FILE --calibration C --out CAL.json``: a new, re-zeroed calibration file.

    The input calibration is never changed; an existing ``--out`` is refused.
    Returns 0.
    """
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    out = Path(out_path)
    check_output(out, option="--out", force=False, inputs=[Path(calibration_path), Path(file)], what="tared calibration", can_force=False)
    cal = Calibration.load(calibration_path)
    run = tare_from_recording(file, calibration=cal)
    for note in run.notes:
        _warn(note, stderr)
    write_text_output(out, run.calibration.to_json(), replace=False)
    p = lambda *a: print(*a, file=stdout)  # noqa: E731
    p(f"tare from {file}: {run.steady_frames} steady frames")
    p("segment  R0 before ohm  R0 now ohm  change %  old calibration read 1/m")
    for k in range(cal.n_segments):
        p(
            f"{k:7d}  {run.old_r0_ohm[k]:13.1f}  {run.flat_ohm[k]:10.1f}  {100 * (run.flat_ohm[k] / run.old_r0_ohm[k] - 1):8.2f}"
            f"  {run.old_reading_per_m[k]:+10.3f}"
        )
    p(f"wrote {out}")
    return 0


# ----------------------------------------------------------------------------- process


