"""``tapcurve calibrate``: labelled holds to a calibration file.

Each labelled interval is mapped to its reference curvature (``flat``,
``radius=25mm``, ``curvature=40/m`` or a ``--reference`` table); its steady
part is kept; the fit (:func:`acquire.core.calibration.fit_calibration`,
polynomial degree chosen by leave-one-reference-out cross-validation, see
:func:`choose_degree`) is printed as a report and written as CAL.json.
Threads: the calling (main) thread.
"""
from __future__ import annotations

import math
import os
import sys
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence, TextIO

import numpy as np

from acquire.core.calibration import (
    check_distinct_recordings,
    Calibration,
    CalibrationError,
    FitReport,
    Hold,
    LabelError,
    fit_calibration,
    file_sha256,
    load_reference_table,
    reference_for,
    steady_part,
)
from acquire.errors import UserError
from acquire.store.recording import Recording, open_recording
from acquire.store.outputs import check_output
from acquire.commands.common import (
    MIN_STEADY_FRAMES, _adc_bits, _warn, check_recording_rig, filtered_intervals, recording_rate_hz,
    recording_rig, write_text_output,
)
from acquire.rig import Rig, load_rig

__all__ = ["HoldInfo", "CalibrationRun", "holds_from_recording", "choose_degree", "fit_warnings", "collect_holds",
           "calibrate_files", "calibrate_command"]


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


# long on purpose: one pass over a recording's labels, kept together so each refusal names its label
def holds_from_recording(
    rec: Recording,
    *,
    rig: Rig,
    table: dict | None = None,
    rate_hz: float,
    adc_bits: int,
    only_flat: bool = False,
) -> tuple[list[Hold], list[HoldInfo]]:
    """The holds of a recording: labelled intervals that state a reference curvature.

    Each label is mapped with :func:`acquire.core.calibration.reference_for`; a
    label that states no reference (``grasp``, ``notes``) is listed, not used.
    The steady part of each interval (:func:`acquire.core.calibration.steady_part`
    on the filtered resistances) becomes a :class:`Hold`.

    Parameters
    ----------
    only_flat : bool
        Use only holds whose reference is 0 for every segment (for taring).

    Returns
    -------
    (holds, infos)

    Raises
    ------
    UserError
        A label starts like a reference but cannot be read, or a table entry
        has the wrong number of values (message names the recording and label).
    """
    labels = rec.labels()
    n = rec.n_frames
    t = rec.file["raw"]["t_device_s"][:n]
    t_last = float(t[-1]) if n else 0.0
    infos: list[HoldInfo] = []
    wanted: list[tuple[int, int]] = []
    for lb in labels:
        try:
            ref = reference_for(lb.text, n_segments=rig.n_segments, table=table)
        except (LabelError, CalibrationError) as exc:
            raise UserError(f"{rec.path}: label {lb.text!r} at {lb.t_start_s:.3f} s: {exc}") from None
        t1 = lb.t_end_s
        info = HoldInfo(str(rec.path), lb.text, lb.t_start_s, t1, ref)
        infos.append(info)
        if ref is None:
            info.note = "states no reference; not used"
            continue
        if only_flat and not np.all(ref[np.isfinite(ref)] == 0):
            info.note = "not flat; not used for taring"
            info.reference_per_m = None
            continue
        if not math.isfinite(t1):
            # an interval a killed recorder never closed: it ran to the last frame
            t1 = info.t_end_s = t_last
            info.note = "never closed; taken to end at the last frame"
        a = int(np.searchsorted(t, lb.t_start_s, side="left"))
        b = int(np.searchsorted(t, t1, side="right"))
        info.frames = max(0, b - a)
        wanted.append((a, b))
    ref_infos = [i for i in infos if i.reference_per_m is not None]
    if not ref_infos:
        return [], infos
    res = filtered_intervals(rec, rig=rig, rate_hz=rate_hz, adc_bits=adc_bits, intervals=wanted)
    holds = []
    for info, (a, b), r in zip(ref_infos, wanted, res):
        if b <= a:
            info.note = "no frames in the interval; not used"
            continue
        mask = steady_part(t[a:b], r, info.t_start_s, info.t_end_s)
        info.steady_frames = int(mask.sum())
        if info.steady_frames < MIN_STEADY_FRAMES:
            info.note = (info.note + "; " if info.note else "") + (
                f"only {info.steady_frames} steady frames; not used"
            )
            continue
        info.used = True
        holds.append(Hold(
            reference_per_m=info.reference_per_m,
            resistance_ohm=r[mask],
            label=f"{info.label} ({Path(info.file).name}, {info.t_start_s:.2f} s)",
        ))
    return holds, infos


# ----------------------------------------------------------------------------- calibrate


def _interior_references(refs: np.ndarray) -> list[tuple]:
    """Bent references that lie inside the range of the others, segment by segment.

    Leaving out the largest bend of a side would test extrapolation, which no
    degree does well and which the calibrated range excludes anyway.
    """
    keys = sorted({tuple(np.round(r, 9)) for r in refs})
    out = []
    for key in keys:
        k = np.array(key, dtype=np.float64)
        if not np.any(np.nan_to_num(k) != 0):
            continue
        others = np.array([o for o in keys if o != key], dtype=np.float64)
        with np.errstate(invalid="ignore"):
            pos_ok = (k <= 0) | np.any(others >= k, axis=0)
            neg_ok = (k >= 0) | np.any(others <= k, axis=0)
        if np.all((pos_ok & neg_ok) | ~np.isfinite(k)):
            out.append(key)
    return out


def _cv_errors(holds: Sequence[Hold], *, rig: Rig, degree: int, folds: list[tuple]) -> dict[str, float] | None:
    """Leave-one-reference-out prediction RMS per side (``positive``, ``negative``), 1/m.

    None if some fold cannot be fitted at this degree. The two sides are
    fitted independently, so each side's error does not depend on the other's degree.
    """
    refs = np.array([np.asarray(h.reference_per_m, dtype=np.float64) for h in holds])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a segment NaN throughout a hold
        means = np.array([np.nanmean(h.resistance_ohm, axis=0) for h in holds])
    keys = [tuple(np.round(r, 9)) for r in refs]
    sq = {"positive": 0.0, "negative": 0.0}
    cnt = {"positive": 0, "negative": 0}
    for key in folds:
        keep = [h for h, k in zip(holds, keys) if k != key]
        out = np.array([k == key for k in keys])
        try:
            cal, _ = fit_calibration(keep, rig=rig, degree=degree)
        except CalibrationError:
            return None
        ref = refs[out]
        err = cal.curvature_per_m(means[out]) - ref
        for side, sel in (("positive", ref > 0), ("negative", ref < 0)):
            ok = sel & np.isfinite(err)
            sq[side] += float(np.sum(err[ok] ** 2))
            cnt[side] += int(ok.sum())
    return {side: math.sqrt(sq[side] / cnt[side]) if cnt[side] else math.nan for side in sq}


def choose_degree(
    holds: Sequence[Hold], *, rig: Rig, max_degree: int = 3
) -> tuple[tuple[int, int], dict[int, dict[str, float]]]:
    """Pick the polynomial degree of each side of the calibration by cross-validation.

    For each degree 1 .. ``max_degree`` the fit is repeated leaving out the
    holds of one bent reference at a time (each reference that lies inside
    the range of the others: interpolation is what a calibration is used
    for) and predicting them. Per side (positive, negative bends), the degree
    with the smallest prediction RMS wins; a higher degree must beat the lower
    one by more than 5 %, so noise does not buy flexibility. A side without
    such a reference gets degree 2 (:func:`fit_calibration` lowers it where
    the side has fewer distinct references).

    Returns
    -------
    ((degree_positive, degree_negative), cv_rms_per_m)
        The degrees, and per degree tried the cross-validated RMS of each
        side, 1/m (NaN: nothing to predict on that side).
    """
    refs = np.array([np.asarray(h.reference_per_m, dtype=np.float64) for h in holds])
    folds = _interior_references(refs)
    if not folds:
        return (2, 2), {}
    scores = {}
    for d in range(1, max_degree + 1):
        e = _cv_errors(holds, rig=rig, degree=d, folds=folds)
        if e is not None:
            scores[d] = e
    chosen = []
    for side in ("positive", "negative"):
        tried = [d for d in sorted(scores) if math.isfinite(scores[d][side])]
        if not tried:
            chosen.append(2)
            continue
        best = tried[0]
        for d in tried[1:]:
            if scores[d][side] < 0.95 * scores[best][side]:
                best = d
        chosen.append(best)
    return (chosen[0], chosen[1]), scores


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


def collect_holds(files, *, rig: Rig, table: dict | None = None) -> tuple[list, list, list, list]:
    """Holds, interval infos, provenance and notes of labelled recordings (main thread).

    Every recording is read as the live path would (its rate, ADC bits and
    filters); the same file twice is refused (it would count its holds twice).
    """
    notes: list[str] = []
    holds: list[Hold] = []
    infos: list[HoldInfo] = []
    recordings: list[dict] = []
    for f in files:
        with open_recording(f, allow_live=False) as rec:
            if rec.recovered:
                notes.append(f"{rec.path}: was left unclosed by its recorder; recovered")
            notes.extend(check_recording_rig(recording_rig(rec), rig, where=str(rec.path)))
            n = rec.n_frames
            rate, rate_notes = recording_rate_hz(rec, t_device_s=rec.file["raw"]["t_device_s"][: min(n, 100_000)])
            bits, bit_notes = _adc_bits(rec)
            notes.extend(rate_notes + bit_notes)
            h, i = holds_from_recording(rec, rig=rig, table=table, rate_hz=rate, adc_bits=bits)
            holds.extend(h)
            infos.extend(i)
            # hashed after opening: a recovered file's bytes are those it keeps from now on
            recordings.append({
                "path": str(f),  # as given: the user's own context; the hash identifies the file
                "name": Path(f).name,
                "sha256": file_sha256(f),
                "frames": n,
                "holds": [x.label for x in i if x.used],
            })
            check_distinct_recordings(recordings)  # the same file twice would count its holds twice
    return holds, infos, recordings, notes


def calibrate_files(
    files: Sequence[str | os.PathLike],
    *,
    rig: Rig,
    table: dict | None = None,
    degree: int | tuple[int, int] | None = None,
    static: bool = False,
) -> CalibrationRun:
    """Fit a calibration from labelled recordings.

    Parameters
    ----------
    files : sequence of path
    rig : Rig
        The rig the calibration is for; each recording's own rig must agree
        with it (:func:`check_recording_rig`).
    table : dict, optional
        A reference table (:func:`acquire.core.calibration.load_reference_table`).
    degree : int or (int, int), optional
        Polynomial degree (per side); default: :func:`choose_degree`.

    Raises
    ------
    UserError
        Unreadable recording, rig disagreement, unreadable label, no usable
        hold, or a fit that cannot be made (no flat hold, wrong sign, ...).
    """
    holds, infos, recordings, notes = collect_holds(files, rig=rig, table=table)
    if table is not None:
        seen = {i.label for i in infos}
        unused = [k for k in table if k not in seen]
        if unused:
            notes.append(f"reference table: no label matches {', '.join(repr(k) for k in unused)}")
    if not holds:
        names = ", ".join(str(f) for f in files)
        found = sorted({i.label for i in infos})
        why = (
            f"labels found: {', '.join(repr(x) for x in found[:8])}{' ...' if len(found) > 8 else ''}"
            if found else "no labels at all"
        )
        skipped = [i for i in infos if i.reference_per_m is not None and not i.used]
        if skipped:
            why += f"; {len(skipped)} reference label(s) without enough steady frames"
        raise UserError(
            f"{names}: no usable labelled holds ({why}); label holds flat, radius=25mm, curvature=40/m "
            f"or give --reference TABLE"
        )
    cv: dict = {}
    if degree is None:
        degree, cv = choose_degree(holds, rig=rig)
    degree = (degree, degree) if np.ndim(degree) == 0 else (int(degree[0]), int(degree[1]))
    cal, report = fit_calibration(holds, rig=rig, degree=degree, recordings=recordings)
    from acquire.commands.calibrate_memory import add_memory  # the strip's creep and hysteresis, where they help

    return add_memory(CalibrationRun(
        calibration=cal, report=report, degree=degree, cv_rms_per_m=cv, infos=infos, notes=notes,
        recordings=recordings, holds=holds,
    ), files=files, rig=rig, static=static)




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


def _print_calibration_report(run: CalibrationRun, out: Path, stream: TextIO) -> None:
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


def calibrate_command(
    *,
    files: Sequence[str],
    rig_path: str,
    out_path: str,
    reference_path: str | None = None,
    force: bool = False,
    motions: Sequence[tuple[str, str]] = (),
    static: bool = False,
    stdout: TextIO | None = None,
    stderr: TextIO | None = None,
) -> int:
    """``tapcurve calibrate [FILE...] --rig R --out CAL.json [--motion REC MARKERS]... [--reference TABLE] [--force]``.

    Prints the fit report to ``stdout`` and warnings to ``stderr``; writes
    the calibration and its report picture beside it (CAL.svg). Returns 0.

    Raises
    ------
    UserError
        See :func:`calibrate_files`; also an existing output without ``force``.
    """
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    out = Path(out_path)
    rig = load_rig(rig_path)
    inputs = [Path(f) for f in files] + [Path(p) for m in motions for p in m] + [Path(rig_path)] + (
        [Path(reference_path)] if reference_path else [])
    check_output(out, option="--out", force=force, inputs=inputs, what="calibration", can_force=True)
    from acquire.commands.report_figure import figure_path, report_svg  # the report picture, beside the JSON

    figure = check_output(figure_path(out), option="--out", force=force, inputs=inputs,
                          what="calibration report picture", can_force=True)
    table = load_reference_table(reference_path) if reference_path else None
    from acquire.commands.calibrate_motion import calibrate_with_motion, print_calibration_report

    # holds only: calibrate_with_force (which adds the force model when there are force holds)
    run = calibrate_with_motion(files, motions, rig=rig, table=table, stdout=stdout, stderr=stderr, static=static)
    for note in run.notes:
        _warn(note, stderr)
    for w in fit_warnings(run.report):
        _warn(w, stderr)
    svg = report_svg(run)
    write_text_output(out, run.calibration.to_json(), replace=force)
    write_text_output(figure, svg, replace=force)
    if motions:
        print_calibration_report(run, out, stdout, figure=figure)
    else:
        _print_calibration_report(run, out, stdout)
        print(f"wrote {figure}", file=stdout)
    from acquire.commands.calibrate_memory import print_memory_report

    print_memory_report(run, stdout)
    return 0


# ----------------------------------------------------------------------------- tare


