"""Calibration from filmed motion sessions: a recording plus the marker track filmed during it.

Per session (:func:`load_motion_session`): the marker track is read
(:func:`acquire.core.markers.read_marker_csv`) and fitted frame by frame
(:func:`acquire.core.markers.fit_marker_frames`: reference curvature per
segment and the base pose); the recording's resistance is filtered as live
(:func:`acquire.commands.common.filtered_intervals`); the camera clock is
aligned with the device clock (:func:`acquire.core.align.align_clocks` on the
relative resistance change against the marker curvature). Camera frames with
a good marker fit are mapped to device time, moved by the pairing lag (the
filters' delay and what the alignment left, found from the pairs:
:func:`acquire.core.motion_pairs.pairing_lag`) and paired with the filtered
resistance interpolated there.

Binning, and why: a session gives thousands of frames, most of them at a few
pause levels. Frames are binned per segment by resistance (the precise
variable: the curvature, the noisy one, is averaged inside each bin, which is
the regression of curvature on resistance the model makes, so marker noise
does not flatten the law), bins of equal width on each side of the flat
resistance (:func:`acquire.core.motion_pairs.bin_motion`). A bin with many
frames counts like one hold (one point at one curvature), one with few frames
less (its mean carries the markers' noise:
:func:`acquire.core.calibration_fit.motion_bin_weight`): the fit is spread
evenly over the range covered, moves included, like a well-chosen set of
jigs, and thousands of frames at a pause do not outweigh a few holds. Each
session's flat resistance is where its frames cross curvature 0 (a fit with a
kink there: :func:`acquire.core.motion_pairs.flat_resistance`), and its bins
enter the fit as relative changes from that, so a drift of the flat
resistance between sessions does not bias the law.

Threads: the calling (main) thread; everything returned is new and owned by
the caller.
"""
from __future__ import annotations

import math
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence, TextIO

import numpy as np

from acquire.commands.calibrate_run import CalibrationRun, fit_warnings
from acquire.commands.common import (
    _adc_bits, _warn, check_recording_rig, filtered_intervals, recording_rate_hz, recording_rig,
)
from acquire.core.align import Alignment, AlignmentError, align_clocks
from acquire.core.calibration import (
    CalibrationError, Hold, check_distinct_recordings, file_sha256, fit_calibration,
)
from acquire.core.calibration_fit import MotionPoints, motion_bin_weight
from acquire.core.markers import MarkerError, MarkerFit, MarkerTrack, fit_marker_frames, read_marker_csv
from acquire.core.motion_pairs import (
    MIN_BIN_FRAMES, N_BINS, bin_motion, paired_resistance, pairing_lag, recording_covers,
)
from acquire.errors import UserError
from acquire.rig import Rig
from acquire.store.recording import open_recording

__all__ = [
    "MotionSession", "MotionCalibrationRun", "MarkerOverlay", "load_motion_session", "bin_motion",
    "choose_degree_motion", "calibrate_with_motion", "marker_overlay", "motion_report_lines",
    "print_calibration_report", "N_BINS", "MIN_BIN_FRAMES", "MAX_RESIDUAL_MM", "MAX_CURVATURE_SD_PER_M",
    "POSE_WINDOW_S",
]

#: frames whose markers fit worse than this RMS distance are not used, mm
MAX_RESIDUAL_MM = 1.0
#: a segment's curvature less certain than this (or than twice its median) in a frame is not used there, 1/m
#: (the fit's own uncertainty at its noise floor of 0.3 mm: an upper bound, about 7 1/m at end segments)
MAX_CURVATURE_SD_PER_M = 25.0
#: frames this close to the recording's start (or the end of a gap of lost frames) are not used: the filters
#: settle, s
SETTLE_S = 0.2
#: points kept per trace for the report picture
TRACE_POINTS = 4000
#: camera time over which the overlay's base pose is the median of the fitted poses, s
POSE_WINDOW_S = 1.0


@dataclass
class MotionSession:
    """One filmed motion session, aligned and binned (see the module docstring).

    Attributes
    ----------
    recording, markers : str
        The two files as given.
    alignment : Alignment
        Camera -> device clock.
    pairing_lag_s : float
        Added to the aligned camera times before pairing with the filtered
        resistance (the filters' delay and what the alignment left),
        s (:func:`acquire.core.motion_pairs.pairing_lag`).
    frames, frames_used : int
        Camera frames in the track; frames kept for the fit.
    marker_residual_mm : float
        RMS of the markers' distance to the fitted shapes over the kept frames, mm.
    points : MotionPoints
        The bins of each segment.
    t_device_s : ndarray, shape (F,)
        Device time of each camera frame's pair (aligned time plus the pairing lag), s.
    curvature_per_m : ndarray, shape (F, S)
        Marker curvature per frame, 1/m; NaN where not used.
    resistance_ohm : ndarray, shape (F, S)
        Filtered resistance at each camera frame's device time, ohm.
    trace_t_s, trace_ohm : ndarray
        The recording's filtered resistance, decimated (for the picture).
    provenance : dict
        Paths and SHA-256 of both files.
    """

    recording: str
    markers: str
    alignment: Alignment
    pairing_lag_s: float
    frames: int
    frames_used: int
    marker_residual_mm: float
    points: MotionPoints
    t_device_s: np.ndarray
    curvature_per_m: np.ndarray
    resistance_ohm: np.ndarray
    trace_t_s: np.ndarray
    trace_ohm: np.ndarray
    provenance: dict

    def report_dict(self) -> dict:
        """What the fit report stores about this session (strict JSON values)."""
        a = self.alignment
        return {
            "recording": self.recording, "markers": self.markers, "offset_s": round(a.offset_s, 6),
            "rate_ppm": round(a.rate_ppm, 3), "sharpness": round(a.sharpness, 3), "score": round(a.score, 4),
            "pairing_lag_s": round(self.pairing_lag_s, 6),
            "frames": self.frames, "frames_used": self.frames_used,
            "marker_residual_mm": round(self.marker_residual_mm, 4),
            "r0_ohm": [None if not math.isfinite(v) else round(float(v), 3) for v in self.points.r0_ohm],
        }


@dataclass
class MotionCalibrationRun(CalibrationRun):
    """A :class:`~acquire.commands.calibrate.CalibrationRun` with the hold and motion points behind it."""

    sessions: list = field(default_factory=list)


# ----------------------------------------------------------------------------- one session


def _read_track(markers_path, rig: Rig) -> MarkerTrack:
    try:
        return read_marker_csv(markers_path, n_markers=len(rig.markers_s_m))
    except MarkerError as exc:
        raise UserError(str(exc)) from None


def _read_recording(rec_path, rig: Rig) -> dict:
    """Device times, filtered resistance (as live) and provenance of a whole recording."""
    with open_recording(rec_path, allow_live=False) as rec:
        notes = check_recording_rig(recording_rig(rec), rig, where=str(rec.path))
        n = rec.n_frames
        t = rec.file["raw"]["t_device_s"][:n].astype(np.float64)
        rate, rate_notes = recording_rate_hz(rec, t_device_s=t[:100_000])
        bits, bit_notes = _adc_bits(rec)
        if n < 3:
            raise UserError(f"{rec_path}: only {n} frames; nothing to align a film with")
        if np.any(np.diff(t) <= 0):
            raise UserError(f"{rec_path}: device time is not increasing throughout (a device restart?); "
                            f"film a session without restarts")
        r = filtered_intervals(rec, rig=rig, rate_hz=rate, adc_bits=bits, intervals=[(0, n)])[0]
        if rec.recovered:
            notes.append(f"{rec.path}: was left unclosed by its recorder; recovered")
    prov = {"path": str(rec_path), "name": Path(rec_path).name, "sha256": file_sha256(rec_path), "frames": n}
    return {"t": t, "r": r, "notes": notes + rate_notes + bit_notes, "provenance": prov}


def _fit_track(track: MarkerTrack, rig: Rig) -> MarkerFit:
    return fit_marker_frames(track, segment_lengths_m=rig.segment_lengths_m, s_m=rig.markers_s_m,
                             offset_m=rig.markers_offset_m)


def _align(where: str, rec: dict, track: MarkerTrack, fit: MarkerFit) -> Alignment:
    """align_clocks on relative resistance change against marker curvature; AlignmentError -> UserError."""
    r = rec["r"]
    with np.errstate(invalid="ignore", divide="ignore"):
        x = r / np.nanmedian(r, axis=0) - 1.0
    kappa = np.where(fit.ok[:, None], fit.curvature_per_m, np.nan)
    try:
        return align_clocks(rec["t"], x, track.t_s, kappa)
    except AlignmentError as exc:
        why = str(exc)
        if why.startswith("no overlap"):
            raise UserError(f"{where}: no overlap in time: {why.removeprefix('no overlap possible: ')}") from None
        raise UserError(f"{where}: the motion is too poor to align: {why}") from None


def _good_frames(fit: MarkerFit, t_dev: np.ndarray, t_rec: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(frame mask, per-segment mask) of the camera frames to use (module constants)."""
    ok = fit.ok & np.isfinite(fit.residual_m)
    med = float(np.median(fit.residual_m[ok])) if ok.any() else 0.0
    limit = min(MAX_RESIDUAL_MM * 1e-3, max(3.0 * med, 0.05e-3))
    frame = ok & (fit.residual_m <= limit) & recording_covers(t_dev, t_rec, settle_s=SETTLE_S)
    sd = np.where(np.isfinite(fit.curvature_sd_per_m) & frame[:, None], fit.curvature_sd_per_m, np.nan)
    with np.errstate(invalid="ignore"):
        typical = np.nan_to_num(np.nanmedian(sd, axis=0), nan=0.0) if frame.any() else np.zeros(sd.shape[1])
    # a segment far less certain than usual in a frame (markers missed there) is left out of it
    seg = frame[:, None] & np.isfinite(fit.curvature_per_m) & (sd <= np.minimum(2.0 * typical, MAX_CURVATURE_SD_PER_M))
    return frame, seg


def load_motion_session(rec_path, markers_path, *, rig: Rig, n_bins: int = N_BINS) -> tuple[MotionSession, list[str]]:
    """Read, fit, align and bin one filmed motion session.

    Parameters
    ----------
    rec_path, markers_path : path
        The recording and the marker CSV filmed during it.
    rig : Rig
        Gives the segments and the markers (``[markers]``).
    n_bins : int
        Bins per segment (:func:`bin_motion`).

    Returns
    -------
    (MotionSession, notes)

    Raises
    ------
    UserError
        One line naming the file(s): an unusable marker file, a recording of
        another rig, no overlap in time, motion too poor to align, too few good frames.
    """
    where = f"{rec_path}/{markers_path}"
    track = _read_track(markers_path, rig)
    rec = _read_recording(rec_path, rig)
    fit = _fit_track(track, rig)
    if fit.ok.sum() < 10:
        raise UserError(f"{markers_path}: only {int(fit.ok.sum())} frames show enough markers to fit a shape; "
                        f"check the rig's [markers] against the film")
    alignment = _align(where, rec, track, fit)
    t_dev = alignment.to_device_time(track.t_s)
    frame, seg = _good_frames(fit, t_dev, rec["t"])
    if frame.sum() < 2 * MIN_BIN_FRAMES:
        raise UserError(f"{where}: only {int(frame.sum())} camera frames fit the markers well inside the "
                        f"recording; film the whole finger, with its markers in view, while recording")
    kappa = np.where(seg, fit.curvature_per_m, np.nan)
    lag = pairing_lag(t_dev, kappa, rec["t"], rec["r"])
    t_pair = t_dev + lag  # where the filtered resistance shows each camera frame's shape
    frame &= recording_covers(t_pair, rec["t"], settle_s=SETTLE_S)
    kappa[~frame] = np.nan
    r_cam = paired_resistance(t_pair, rec["t"], rec["r"])
    points = bin_motion(r_cam, kappa, n_bins=n_bins, name=where)
    step = max(1, rec["t"].size // TRACE_POINTS)
    session = MotionSession(
        recording=str(rec_path), markers=str(markers_path), alignment=alignment, pairing_lag_s=lag,
        frames=int(track.t_s.size),
        frames_used=int(frame.sum()), marker_residual_mm=float(np.sqrt(np.mean(fit.residual_m[frame] ** 2)) * 1e3),
        points=points, t_device_s=t_pair, curvature_per_m=kappa, resistance_ohm=r_cam,
        trace_t_s=rec["t"][::step].copy(), trace_ohm=rec["r"][::step].copy(),
        provenance={**rec["provenance"], "markers": str(markers_path), "markers_name": Path(markers_path).name,
                    "markers_sha256": file_sha256(markers_path), "motion": True},
    )
    return session, rec["notes"]


# ----------------------------------------------------------------------------- degree


def _motion_fold(points: Sequence[MotionPoints], fold: int, n_folds: int, *, keep: bool) -> list[MotionPoints]:
    def pick(a):
        sel = (np.arange(len(a)) % n_folds != fold) if keep else (np.arange(len(a)) % n_folds == fold)
        return a[sel]

    return [MotionPoints(x=[pick(v) for v in p.x], reference_per_m=[pick(v) for v in p.reference_per_m],
                         frames=[pick(v) for v in p.frames], r0_ohm=p.r0_ohm, name=p.name) for p in points]


def choose_degree_motion(holds: Sequence[Hold], points: Sequence[MotionPoints], *, rig: Rig, max_degree: int = 3,
                         n_folds: int = 5) -> tuple[tuple[int, int], dict[int, dict[str, float]]]:
    """Polynomial degree per side by interleaved n-fold cross-validation over the motion bins.

    Every n-th bin (by resistance) is left out in turn and predicted from the
    rest and all holds (interpolation, as the calibration is used); per side
    the degree with the smallest prediction RMS (bins weighted as in the fit)
    wins. Unlike a handful of holds (:func:`acquire.commands.calibrate.choose_degree`,
    where a higher degree must win by 5 %), dozens of bins per side show a
    higher degree's gain even when the markers' noise dominates the RMS, and
    its loss where the range is thinly covered.
    """
    scores: dict[int, dict[str, float]] = {}
    for d in range(1, max_degree + 1):
        sq, cnt = {"positive": 0.0, "negative": 0.0}, {"positive": 0.0, "negative": 0.0}
        try:
            for fold in range(n_folds):
                cal, _ = fit_calibration(holds, rig=rig, degree=d, motion=_motion_fold(points, fold, n_folds, keep=True))
                for p in _motion_fold(points, fold, n_folds, keep=False):
                    for s, (x, k, n) in enumerate(zip(p.x, p.reference_per_m, p.frames)):
                        err, w = _law(cal, s, x) - k, motion_bin_weight(n)
                        for side, sel in (("positive", x > 0), ("negative", x < 0)):
                            sq[side] += float(np.sum(w[sel] * err[sel] ** 2))
                            cnt[side] += float(w[sel].sum())
        except CalibrationError:
            continue
        scores[d] = {side: math.sqrt(sq[side] / cnt[side]) if cnt[side] else math.nan for side in sq}
    chosen = []
    for side in ("positive", "negative"):
        tried = [d for d in sorted(scores) if math.isfinite(scores[d][side])]
        best = tried[0] if tried else 2
        for d in tried[1:]:
            if scores[d][side] < scores[best][side]:
                best = d
        chosen.append(best)
    return (chosen[0], chosen[1]), scores


def _law(cal, segment: int, x: np.ndarray) -> np.ndarray:
    """Curvature of relative changes ``x`` of one segment under ``cal``, 1/m."""
    r = np.full((x.size, cal.n_segments), np.nan)
    r[:, segment] = cal.r0_ohm[segment] * (1.0 + x)
    return cal.curvature_per_m(r)[:, segment]


# ----------------------------------------------------------------------------- the run


def _collect_holds(files, *, rig: Rig, table):
    """Holds, interval infos, provenance and notes of labelled recordings (as calibrate_files reads them)."""
    from acquire.commands.calibrate import collect_holds

    holds, infos, recordings, notes = collect_holds(files, rig=rig, table=table)
    if files and not holds:
        raise UserError(f"{', '.join(map(str, files))}: no usable labelled holds (labels flat, radius=25mm, "
                        f"curvature=40/m); give motion sessions alone, or label the holds")
    return holds, infos, recordings, notes


def calibrate_with_motion(files: Sequence, motions: Sequence[tuple], *, rig: Rig, table: dict | None = None,
                          stdout: TextIO | None = None, stderr: TextIO | None = None,
                          degree: int | tuple[int, int] | None = None, static: bool = False) -> CalibrationRun:
    """Fit a calibration from labelled hold recordings and/or filmed motion sessions.

    Without ``motions`` this is the hold calibration
    (:func:`acquire.commands.calibrate_force.calibrate_with_force`). With
    them, holds (if any) and motion bins are fitted together with the same
    model (:func:`acquire.core.calibration_fit.fit_calibration`); the
    strip-memory and force models are left out (noted).

    Parameters
    ----------
    files : sequence of path
        Labelled hold recordings (may be empty when ``motions`` is not).
    motions : sequence of (recording, markers)
        Filmed motion sessions.

    Raises
    ------
    UserError
        One line naming the file(s) at fault (see :func:`load_motion_session`).
    """
    stdout, stderr = stdout or sys.stdout, stderr or sys.stderr
    if not motions:
        from acquire.commands.calibrate_force import calibrate_with_force

        return calibrate_with_force(files, rig=rig, table=table, stdout=stdout, stderr=stderr, static=static)
    holds, infos, recordings, notes = _collect_holds(files, rig=rig, table=table)
    sessions = []
    for rec_path, markers_path in motions:
        session, more = load_motion_session(rec_path, markers_path, rig=rig)
        sessions.append(session)
        notes.extend(more)
    motion_prov = [s.provenance for s in sessions]
    check_distinct_recordings(motion_prov)
    check_distinct_recordings([{"path": p["markers"], "sha256": p["markers_sha256"]} for p in motion_prov])
    points = [s.points for s in sessions]
    cv: dict = {}
    if degree is None:
        degree, cv = choose_degree_motion(holds, points, rig=rig)
    degree = (degree, degree) if np.ndim(degree) == 0 else (int(degree[0]), int(degree[1]))
    cal, report = fit_calibration(holds, rig=rig, degree=degree, recordings=recordings + motion_prov, motion=points)
    report.motion_sessions = [s.report_dict() for s in sessions]
    notes.append("force models are not fitted from motion sessions")
    run = MotionCalibrationRun(calibration=cal, report=report, degree=degree, cv_rms_per_m=cv, infos=infos,
                               notes=notes, recordings=recordings + motion_prov, holds=holds, sessions=sessions)
    from acquire.commands.calibrate_memory import MotionSeries, add_memory  # creep and hysteresis, where they help

    with_memory = add_memory(run, files=files, rig=rig, static=static, motion=[
        MotionSeries(s.t_device_s, s.resistance_ohm, s.curvature_per_m) for s in sessions])
    if with_memory.calibration.memory is not None:  # memory kept: its law, with this run's motion report
        sessions_report = report.motion_sessions
        run.calibration, run.report = with_memory.calibration, with_memory.report
        run.report.motion_sessions = sessions_report
        if run.calibration.report is not None:
            run.calibration.report.motion_sessions = sessions_report
    run.notes = with_memory.notes
    run.memory_report = getattr(with_memory, "memory_report", None)
    run.memory_note = getattr(with_memory, "memory_note", "")
    return run


# ----------------------------------------------------------------------------- report


def motion_report_lines(report) -> list[str]:
    """Per segment, points from holds and from motion; per motion session, the alignment found."""
    lines = ["fit per segment, holds and filmed motion (residual: model - reference, 1/m):",
             "  segment  holds  motion points  frames  motion share  range 1/m          rms all  holds   motion  R0 from"]
    f = lambda v: "      -" if v is None else f"{v:7.3f}"  # noqa: E731
    for s in report.segments:
        lines.append(
            f"  {s.segment:7d}  {s.n_holds:5d}  {s.n_motion_points:13d}  {s.n_motion_frames:6d}  "
            f"{100 * s.motion_share:11.0f}%  {s.curvature_min_per_m:+7.2f} .. {s.curvature_max_per_m:+7.2f}  "
            f"{s.rms_residual_per_m:7.3f}  {f(s.rms_residual_holds_per_m)} {f(s.rms_residual_motion_per_m)}  "
            f"{s.r0_from}")
    lines.append("motion sessions (camera -> device clock):")
    for m in report.motion_sessions:
        lines.append(
            f"  {Path(m['recording']).name} + {Path(m['markers']).name}: offset {m['offset_s']:+.4f} s, "
            f"rate {m['rate_ppm']:+.1f} ppm, sharpness {m['sharpness']:.1f}, "
            f"pairing lag {1e3 * m.get('pairing_lag_s', 0.0):+.1f} ms, frames used {m['frames_used']} "
            f"of {m['frames']}, marker residual {m['marker_residual_mm']:.3f} mm")
    return lines


def print_calibration_report(run: CalibrationRun, out: Path, stream: TextIO, *, figure: Path | None = None) -> None:
    """The printed report of a calibration with motion sessions (holds only: calibrate's own report)."""
    p = lambda *a: print(*a, file=stream)  # noqa: E731
    used = [i for i in run.infos if i.used]
    if run.infos:
        p(f"labelled intervals: {len(run.infos)}, used as holds: {len(used)}")
    dp, dn = run.degree
    p(f"polynomial degree up to {dp} (positive bends) / {dn} (negative bends)"
      + (", chosen by cross-validation over the motion bins, RMS 1/m:" if run.cv_rms_per_m else ""))
    for d, e in run.cv_rms_per_m.items():
        p(f"  degree {d}: positive {e['positive']:.3f}, negative {e['negative']:.3f}")
    for line in motion_report_lines(run.report):
        p(line)
    warns = fit_warnings(run.report)
    p("warnings:" if warns else "warnings: none")
    for w in warns:
        p(f"  {w}")
    p(f"wrote {out}" + (f" and {figure}" if figure else ""))


# ----------------------------------------------------------------------------- overlay


@dataclass
class MarkerOverlay:
    """Filmed markers in the sensor's base frame at device times (for drawing over a shape).

    Attributes
    ----------
    t_device_s : ndarray, shape (F,)
        Device time of each camera frame, s.
    xy_base_m : ndarray, shape (F, K, 2)
        Observed markers moved into the base frame, m, with the steady base
        pose (the running median of the fitted poses over ``POSE_WINDOW_S``);
        NaN where missed or no frame near has a fit.
    alignment : Alignment
    interval_s : float
        The camera's frame interval in device time (median), s; 0 for a single frame.
    """

    t_device_s: np.ndarray
    xy_base_m: np.ndarray
    alignment: Alignment

    @property
    def interval_s(self) -> float:
        return float(np.median(np.diff(self.t_device_s))) if self.t_device_s.size > 1 else 0.0

    def at(self, t_device_s: float, *, max_gap_s: float | None = None) -> np.ndarray | None:
        """Markers (K, 2), m (new array), of the camera frame nearest ``t_device_s`` (s).

        None when no camera frame lies within ``max_gap_s`` (default: one
        camera interval) or ``t_device_s`` is not finite.
        """
        t = self.t_device_s
        if t.size == 0 or not math.isfinite(t_device_s):
            return None
        gap = self.interval_s if max_gap_s is None else float(max_gap_s)
        i = int(np.clip(np.searchsorted(t, t_device_s), 0, t.size - 1))
        if i > 0 and abs(t[i - 1] - t_device_s) <= abs(t[i] - t_device_s):
            i -= 1
        return self.xy_base_m[i].copy() if abs(t[i] - t_device_s) <= gap else None


def marker_overlay(rec_path, markers_path, *, rig: Rig | None = None) -> MarkerOverlay:
    """Align a marker film with a recording and move its markers into the base frame.

    Parameters
    ----------
    rec_path, markers_path : path
    rig : Rig, optional
        Default: the recording's own rig (its ``[markers]``).

    Returns
    -------
    MarkerOverlay
        New arrays owned by the caller; the camera frames in device time
        (the recording's ``/raw/t_device_s`` clock) and the observed markers
        (wild points too: it shows what was filmed) in the base frame of the
        steady base pose (see ``MarkerOverlay.xy_base_m``).

    Raises
    ------
    UserError
        As :func:`load_motion_session`.

    Runs in the calling thread (reads both files; seconds for a long recording).
    """
    if rig is None:
        with open_recording(rec_path, allow_live=False) as rec:
            rig = recording_rig(rec)
    track = _read_track(markers_path, rig)
    rec = _read_recording(rec_path, rig)
    fit = _fit_track(track, rig)
    if fit.ok.sum() < 10:
        raise UserError(f"{markers_path}: only {int(fit.ok.sum())} frames show enough markers to fit a shape; "
                        f"check the rig's [markers] against the film")
    alignment = _align(f"{rec_path} + {markers_path}", rec, track, fit)
    z = track.xy_m[..., 0] + 1j * track.xy_m[..., 1]
    x0, y0, phi = _steady_pose(track.t_s, fit.pose, fit.ok).T
    base = np.exp(-1j * phi)[:, None] * (z - (x0 + 1j * y0)[:, None])
    xy = np.stack([base.real, base.imag], axis=-1)  # NaN where missed or no pose near
    return MarkerOverlay(t_device_s=alignment.to_device_time(track.t_s), xy_base_m=xy, alignment=alignment)


def _steady_pose(t_s: np.ndarray, pose: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """The base pose (F, 3) per camera frame: the running median of the fitted poses over POSE_WINDOW_S.

    One frame's pose is poorly determined when markers near the base are
    missed (the base angle trades against the first segment's curvature:
    tenths of a radian); the mount moves slowly if at all, so the median of
    its neighbours' poses is the steady one. NaN where no frame within half
    the window has a fit.
    """
    good = ok & np.isfinite(pose).all(axis=1)
    out = np.full(pose.shape, np.nan)
    if not good.any():
        return out
    tg, pg = t_s[good], pose[good].copy()
    pg[:, 2] = np.unwrap(pg[:, 2])
    step = float(np.median(np.diff(tg))) if tg.size > 1 else POSE_WINDOW_S
    half = max(1, round(0.5 * POSE_WINDOW_S / step))
    padded = np.concatenate([np.full((half, 3), np.nan), pg, np.full((half, 3), np.nan)])
    steady = np.empty_like(pg)
    for a in range(0, tg.size, 8192):  # chunks bound the windows' memory on long films
        b = min(a + 8192, tg.size)
        windows = np.lib.stride_tricks.sliding_window_view(padded[a:b + 2 * half], 2 * half + 1, axis=0)
        steady[a:b] = np.nanmedian(windows, axis=-1)
    j = _nearest(tg, t_s)
    near = np.abs(tg[j] - t_s) <= 0.5 * POSE_WINDOW_S
    out[near] = steady[j[near]]
    return out


def _nearest(t: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Index of the nearest element of sorted ``t`` (non-empty) for each of ``x``."""
    if t.size == 1:
        return np.zeros(np.shape(x), dtype=np.intp)
    i = np.clip(np.searchsorted(t, x), 1, t.size - 1)
    return np.where(np.abs(t[i - 1] - x) <= np.abs(t[i] - x), i - 1, i)


def warn_notes(notes: Sequence[str], stderr: TextIO) -> None:
    """Each note as a warning line."""
    for n in notes:
        _warn(n, stderr)
