"""What a calibration run did, and its report in words: shared by every way of calibrating.

:class:`CalibrationRun` is what :func:`acquire.commands.calibrate.calibrate_files`
(labelled holds), the motion, memory and force steps hand on to the report
(text here, picture in :mod:`acquire.commands.report_figure`). This module sits
below them all, so none of them imports another to reach it.

Threads: main thread (a command's report).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

import numpy as np

from acquire.core.calibration import Calibration, FitReport
from acquire.core.calibration_fit import Hold
from acquire.core.memory_steps import MemoryReport

__all__ = ["HoldInfo", "CalibrationRun", "MemoryCalibrationRun", "fit_warnings", "print_holds_report",
           "memory_report_lines", "print_memory_report"]


@dataclass
class HoldInfo:
    """One labelled interval seen while looking for holds (for the report).

    Attributes
    ----------
    file : str
    label : str
    t_start_s, t_end_s : float
        Device time, s.
    reference_per_m : ndarray or None
        Per-segment reference curvature, 1/m (None: the label states none).
    frames, steady_frames : int
    used : bool
    note : str
    """

    file: str
    label: str
    t_start_s: float
    t_end_s: float
    reference_per_m: np.ndarray | None
    frames: int = 0
    steady_frames: int = 0
    used: bool = False
    note: str = ""


@dataclass
class CalibrationRun:
    """What :func:`calibrate_files` did (for the report)."""

    calibration: Calibration
    report: FitReport
    degree: tuple[int, int]
    cv_rms_per_m: dict
    infos: list[HoldInfo]
    notes: list[str] = field(default_factory=list)
    recordings: list[dict] = field(default_factory=list)
    holds: list[Hold] = field(default_factory=list)


def _format_ref(ref: np.ndarray | None) -> str:
    if ref is None:
        return "-"
    r = ref[np.isfinite(ref)]
    if r.size and np.all(r == r[0]) and np.isfinite(ref).all():
        return f"{r[0]:+.2f}"
    return "[" + " ".join("nan" if not np.isfinite(v) else f"{v:+.1f}" for v in ref) + "]"


def _segment_list(segs: list[int]) -> str:
    if len(segs) == 1:
        return f"segment {segs[0]}"
    if segs == list(range(segs[0], segs[-1] + 1)):
        return f"segments {segs[0]}-{segs[-1]}"
    return "segments " + ",".join(str(k) for k in segs)


def fit_warnings(report: FitReport) -> list[str]:
    """The fit's warnings, the same text for several segments said once."""
    by_text: dict[str, list[int]] = {}
    for seg in report.segments:
        for w in seg.warnings:
            by_text.setdefault(w, []).append(seg.segment)
    return list(report.warnings) + [f"{_segment_list(segs)}: {w}" for w, segs in by_text.items()]


def print_holds_report(run: CalibrationRun, out: Path, stream: TextIO) -> None:
    """The fit report of a calibration from labelled holds, as `tapcurve calibrate` prints it."""
    p = lambda *a: print(*a, file=stream)  # noqa: E731
    p("labelled intervals:")
    p("  file                      label                     t_start..t_end s   ref 1/m   frames  steady  used")
    for i in run.infos:
        span = f"{i.t_start_s:7.2f}..{i.t_end_s:7.2f}"
        p(
            f"  {Path(i.file).name[:24]:24s}  {i.label[:24]:24s}  {span:17s}  {_format_ref(i.reference_per_m):>8s}  "
            f"{i.frames:6d}  {i.steady_frames:6d}  {'yes' if i.used else 'no'}{'  (' + i.note + ')' if i.note else ''}"
        )
    dp, dn = run.degree
    if run.cv_rms_per_m:
        p(f"polynomial degree up to {dp} (positive bends) / {dn} (negative bends), chosen by "
          f"leave-one-reference-out prediction RMS, 1/m:")
        for side in ("positive", "negative"):
            cells = [
                f"degree {d}: {e[side]:.3f}" for d, e in run.cv_rms_per_m.items() if math.isfinite(e[side])
            ]
            p(f"  {side}: {', '.join(cells) if cells else 'no reference inside the others to predict'}")
    else:
        p(f"polynomial degree up to {dp} / {dn} (no reference inside the others' range to cross-validate with)")
    p("fit per segment (points: holds used; residual: model - reference at the hold means):")
    p("  segment  points  frames  range covered 1/m    rms residual 1/m  % of range  degree +/-")
    for sr in run.report.segments:
        p(
            f"  {sr.segment:7d}  {sr.n_holds:6d}  {sr.n_frames:6d}  {sr.curvature_min_per_m:+8.2f} .. "
            f"{sr.curvature_max_per_m:+8.2f}  {sr.rms_residual_per_m:16.3f}  {sr.rms_residual_percent:10.2f}  "
            f"{sr.degree_positive}/{sr.degree_negative}"
        )
    warns = fit_warnings(run.report)
    p("warnings:" if warns else "warnings: none")
    for w in warns:
        p(f"  {w}")
    p(f"wrote {out}")


@dataclass
class MemoryCalibrationRun(CalibrationRun):
    """A :class:`~acquire.commands.calibrate_run.CalibrationRun` with the memory fit's report (None: not fitted)."""

    memory_report: MemoryReport | None = None
    memory_note: str = ""


def memory_report_lines(run) -> list[str]:
    """The memory part of calibrate's printed report (empty for a run without one)."""
    rep = getattr(run, "memory_report", None)
    note = getattr(run, "memory_note", "")
    if rep is None:
        return [f"memory: {note}"] if note and not note.startswith("memory:") else ([note] if note else [])
    kept = [s.segment for s in rep.segments if s.kept]
    head = (f"memory (creep and hysteresis) kept in segment(s) {', '.join(map(str, kept))}:" if kept
            else "memory (creep and hysteresis): not kept, the calibration is static:")
    return [head, rep.text()]


def print_memory_report(run, stream: TextIO) -> None:
    """Print :func:`memory_report_lines` to ``stream``."""
    for line in memory_report_lines(run):
        print(line, file=stream)
