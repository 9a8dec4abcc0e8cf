"""``tapcurve calibrate``, force part: labelled force holds to the calibration's force model.

A label ``force=1.2N`` (:func:`acquire.core.labels.parse_force_label`) marks a
hold with a known force at the sensor's far end along +y of the base frame,
at whatever actuation the recording shows. Each such hold's steady part
(:func:`acquire.core.holds.steady_part` on the filtered resistances, as for
jig holds) gives, through the curvature calibration fitted from the jig holds
of the same run (and its strip-memory model when it keeps one, run over the
whole recording as the live path runs it), its mean segment curvature and shape
(:class:`acquire.core.reconstruct.Reconstructor`), and the rig's
``[actuation]`` channel its mean actuation: a
:class:`acquire.core.force_fit.ForceHold`. :func:`acquire.core.force_fit.fit_force_model`
fits each segment's stiffness and free curvature; the model goes into the
calibration file under ``force``.

Holds labelled with a shape (flat, radius=, curvature=) are jig holds and
say nothing about force; force holds say nothing about curvature.

Threads: the calling (main) thread.
"""
from __future__ import annotations

import dataclasses
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence, TextIO

import numpy as np

from acquire.commands.common import (
    CHUNK_FRAMES,
    MIN_STEADY_FRAMES,
    SPACING_M,
    _adc_bits,
    _Rows,
    _warn,
    filtered_intervals,
    recording_rate_hz,
)
from acquire.core.calibration import CalibrationError
from acquire.core.force import DEFAULT_AXIAL_FRICTION, DEFAULT_CURVATURE_NOISE_PER_M
from acquire.core.force_fit import (
    ForceCalibrationError,
    ForceFitReport,
    ForceHold,
    fit_force_model,
)
from acquire.core.holds import reference_for, steady_part
from acquire.core.labels import LabelError, parse_force_label
from acquire.core.pipeline import Pipeline
from acquire.core.reconstruct import Reconstructor
from acquire.errors import UserError
from acquire.rig import Rig
from acquire.store.recording import Recording, open_recording

__all__ = [
    "ForceHoldInfo",
    "ForceRun",
    "ONE_LEVEL_FRACTION",
    "check_force_labels",
    "force_holds_from_recording",
    "fit_force_files",
    "calibrate_with_force",
    "format_force_report",
    "force_section",
]

#: hold actuations spread over less than this fraction of the channel's full scale count as one level
#: (a pressure regulator's setting holds to about 1 % of its range; common practice, no source)
ONE_LEVEL_FRACTION = 0.01


@dataclass
class ForceHoldInfo:
    """One ``force=`` interval (for the report).

    Attributes
    ----------
    file, label : str
    t_start_s, t_end_s : float
        Device time, s.
    force_n : float
        Label force along +y, N.
    frames, steady_frames : int
    actuation : float
        Mean actuation over the steady part, in the rig's unit (NaN: unused).
    actuation_std : float
        Its standard deviation over the steady part.
    used : bool
    note : str
    loo_error_n : float
        Error of the force estimated for this hold by a model fitted without it, N.
    """

    file: str
    label: str
    t_start_s: float
    t_end_s: float
    force_n: float
    frames: int = 0
    steady_frames: int = 0
    actuation: float = math.nan
    actuation_std: float = math.nan
    used: bool = False
    note: str = ""
    loo_error_n: float = math.nan


@dataclass
class ForceRun:
    """What :func:`fit_force_files` did."""

    model: object
    report: ForceFitReport
    infos: list[ForceHoldInfo]
    unit: str
    notes: list[str] = field(default_factory=list)


def _names(files) -> str:
    return ", ".join(str(f) for f in files)


def _force_labels(rec: Recording) -> list[tuple]:
    """(label, force N) of every ``force=`` interval; a label that cannot be read raises UserError."""
    out = []
    for lb in rec.labels():
        try:
            f = parse_force_label(lb.text)
        except LabelError as exc:
            raise UserError(f"{rec.path}: label {lb.text!r} at {lb.t_start_s:.3f} s: {exc}") from None
        if f is not None:
            out.append((lb, f))
    return out


def check_force_labels(files: Sequence, *, rig: Rig, table: dict | None = None) -> int:
    """Number of ``force=`` holds in ``files``, after checking that a force model can be fitted at all.

    Raises
    ------
    UserError
        Force holds without an ``[actuation]`` table in the rig, or without
        any jig hold (flat, radius=, curvature=) to calibrate curvature from.
    """
    n_force, n_jig, example = 0, 0, None
    for f in files:
        with open_recording(f, allow_live=False) as rec:
            found = _force_labels(rec)
            n_force += len(found)
            if found and example is None:
                example = f"{found[0][0].text!r} in {Path(f).name}"
            for lb in rec.labels():
                try:
                    n_jig += reference_for(lb.text, n_segments=rig.n_segments, table=table) is not None
                except (LabelError, CalibrationError):
                    n_jig += 1  # calibrate_files names that label
    if n_force and rig.actuation is None:
        raise UserError(
            f"{rig.source}: no [actuation] table, but {_names(files)} hold {n_force} force= label(s) (e.g. "
            f"{example}); a force model needs the actuation channel (add [actuation] channel, unit, per_code)")
    if n_force and not n_jig:
        raise UserError(
            f"{_names(files)}: {n_force} force= hold(s) but no jig hold (flat, radius=25mm, curvature=40/m) to "
            "calibrate curvature from; record jig holds too (or give their recording as another file)")
    return n_force


def _static_intervals(rec: Recording, *, rig: Rig, calibration, rate_hz: float, adc_bits: int,
                      intervals, chunk_frames: int = CHUNK_FRAMES) -> list[np.ndarray]:
    """The static (memory-compensated) resistances of frame ranges, ohm, as the live path computes them.

    The whole recording up to the last range runs through the live filters and
    the calibration's strip-memory compensator (its state needs every frame
    before a range), restarting at the recording's reconnect and reboot
    events; only the frames inside ``intervals`` are kept (new arrays).
    """
    pipe = Pipeline(rig=rig, calibration=dataclasses.replace(calibration, force=None), rate_hz=rate_hz,
                    adc_bits=adc_bits, with_shape=False)
    out = [np.empty((max(0, b - a), rig.n_segments)) for a, b in intervals]
    last = min(rec.n_frames, max((b for _, b in intervals), default=0))
    codes = _Rows(rec.file["raw"]["adc"], last)
    marks = np.asarray(sorted(set(int(r) for r in rec.restart_frames())), dtype=np.int64)
    for start in range(0, last, chunk_frames):
        chunk = np.asarray(codes[start:start + chunk_frames])
        stop = start + chunk.shape[0]
        p = pipe.process_codes(chunk, restarts=marks[(marks >= start) & (marks < stop)] - start)
        for (a, b), dest in zip(intervals, out):
            lo, hi = max(a, start), min(b, stop)
            if hi > lo:
                dest[lo - a:hi - a] = p.static_ohm[lo - start:hi - start]
    return out


def _hold_from_frames(info, *, rig, calibration, recon, n_points, t, r, codes, static=None):
    """A ForceHold from one interval's frames, or None (``info.note`` says why).

    ``r``: filtered resistances (they find the steady part); ``static``: the
    memory-compensated ones the calibration reads when it has a memory model.
    """
    mask = steady_part(t, r, info.t_start_s, info.t_end_s)
    info.steady_frames = int(mask.sum())
    if info.steady_frames < MIN_STEADY_FRAMES:
        info.note = f"only {info.steady_frames} steady frames; not used"
        return None
    k, _ = calibration.evaluate((r if static is None else static)[mask])
    kappa = np.nanmean(k, axis=0)
    p = rig.actuation.value(codes[mask])
    info.actuation, info.actuation_std = float(np.mean(p)), float(np.std(p))
    if not (np.all(np.isfinite(kappa)) and math.isfinite(info.actuation)):
        info.note = "no valid curvature or actuation; not used"
        return None
    info.used = True
    xy = recon.shape_xy(kappa[None, :])[0, :n_points]
    return ForceHold(curvature_per_m=kappa, xy_m=xy, s_m=recon.s_m[:n_points], actuation=info.actuation,
                     force_n=np.array([0.0, info.force_n]))


def force_holds_from_recording(rec: Recording, *, rig: Rig, calibration, rate_hz: float, adc_bits: int,
                               spacing_m: float = SPACING_M) -> tuple[list[ForceHold], list[ForceHoldInfo]]:
    """The force holds of a recording: its ``force=`` intervals through the curvature calibration.

    Parameters
    ----------
    calibration : Calibration
        The curvature calibration (from the jig holds); with a strip-memory
        model the holds are read through it, as the live path reads them.
    spacing_m : float
        Largest spacing of the shape points, m (the live path's default).

    Returns
    -------
    (holds, infos)
        One info per ``force=`` interval; a hold per usable one.
    """
    labels = _force_labels(rec)
    n = rec.n_frames
    t = rec.file["raw"]["t_device_s"][:n]
    infos, wanted = [], []
    for lb, force in labels:
        t1 = lb.t_end_s if math.isfinite(lb.t_end_s) else (float(t[-1]) if n else 0.0)
        info = ForceHoldInfo(str(rec.path), lb.text, lb.t_start_s, t1, force)
        a = int(np.searchsorted(t, lb.t_start_s, side="left"))
        b = int(np.searchsorted(t, t1, side="right"))
        info.frames = max(0, b - a)
        infos.append(info)
        wanted.append((a, b))
    if not infos:
        return [], []
    res = filtered_intervals(rec, rig=rig, rate_hz=rate_hz, adc_bits=adc_bits, intervals=wanted)
    static = [None] * len(wanted)
    if calibration.memory_model is not None:
        static = _static_intervals(rec, rig=rig, calibration=calibration, rate_hz=rate_hz, adc_bits=adc_bits,
                                   intervals=wanted)
    recon = Reconstructor.from_rig(rig, spacing_m=spacing_m)
    n_points = int(recon.tap_index[-1]) + 1
    holds = []
    for info, (a, b), r, st in zip(infos, wanted, res, static):
        if b <= a:
            info.note = "no frames in the interval; not used"
            continue
        hold = _hold_from_frames(info, rig=rig, calibration=calibration, recon=recon, n_points=n_points,
                                 t=t[a:b], r=r, codes=rec.file["raw"]["adc"][a:b], static=st)
        if hold is not None:
            holds.append(hold)
    return holds, infos


def _check_levels(files, infos: list[ForceHoldInfo], rig: Rig, adc_bits: int) -> None:
    """Refuse holds that all sit at one actuation level: stiffness and actuation cannot be told apart."""
    used = [i for i in infos if i.used]
    p = np.array([i.actuation for i in used])
    full_scale = abs(rig.actuation.per_code) * ((1 << adc_bits) - 1)
    noise = float(np.median([i.actuation_std for i in used])) if used else 0.0
    if p.size and np.ptp(p) < max(ONE_LEVEL_FRACTION * full_scale, 3.0 * noise):
        unit = rig.actuation.unit
        raise UserError(
            f"{_names(files)}: all {p.size} force= holds are at one actuation level ({np.mean(p):.4g} {unit}); "
            "record force holds at two or more pressures, force=0N at each, so stiffness and actuation "
            "can be told apart")


def fit_force_files(files: Sequence[str | os.PathLike], *, rig: Rig, calibration, degree: int = 1) -> ForceRun | None:
    """Fit the force model from the ``force=`` holds of ``files`` (None when they hold none).

    Raises
    ------
    UserError
        Unusable holds, all at one actuation level, no loaded hold, or a fit
        that cannot be made (:class:`~acquire.core.force_fit.ForceCalibrationError`);
        the message names the files.
    """
    holds, infos, notes, bits = [], [], [], 12
    for f in files:
        with open_recording(f, allow_live=False) as rec:
            rate, _ = recording_rate_hz(rec)
            bits, _ = _adc_bits(rec)
            h, i = force_holds_from_recording(rec, rig=rig, calibration=calibration, rate_hz=rate, adc_bits=bits)
            holds.extend(h)
            infos.extend(i)
    if not infos:
        return None
    if not holds:
        raise UserError(f"{_names(files)}: {len(infos)} force= hold(s), none with enough steady frames")
    _check_levels(files, infos, rig, bits)
    unit = rig.actuation.unit
    try:
        model, report = fit_force_model(holds, segment_lengths_m=rig.segment_lengths_m, degree=degree,
                                        actuation_unit=unit, **_loo_options(infos))
    except ForceCalibrationError as exc:
        raise UserError(f"{_names(files)}: cannot fit the force model: {exc}") from None
    for info, err in zip([i for i in infos if i.used], report.loo_force_error_n):
        info.loo_error_n = float(err)
    return ForceRun(model=model, report=report, infos=infos, unit=unit, notes=notes)


def format_force_report(run: ForceRun) -> list[str]:
    """The force fit as report lines: per hold, per segment, the held-out error and the warnings."""
    rep, unit = run.report, run.unit or "unit"
    lines = ["force holds (force at the sensor's far end along +y):",
             "  file                      label            force N   actuation      steady  used  held-out error N"]
    for i in run.infos:
        lines.append(
            f"  {Path(i.file).name[:24]:24s}  {i.label[:15]:15s}  {i.force_n:+7.3f}  {i.actuation:9.4g} {unit:4s}"
            f"  {i.steady_frames:6d}  {'yes' if i.used else 'no ':3s}   {i.loo_error_n:8.3g}"
            + (f"  ({i.note})" if i.note else ""))
    lines.append("force model per segment (free curvature = a * actuation; EI: bending stiffness):")
    lines.append(f"  segment  EI N m^2     a 1/m per {unit:6s}  rms residual 1/m  separation")
    for k, ei in enumerate(rep.ei_n_m2):
        lines.append(f"  {k:7d}  {ei:10.4g}  {rep.free_curvature_coeffs[k, 0]:18.4g}  "
                     f"{rep.residual_rms_per_m[k]:16.3g}  {rep.separation[k]:10.3f}")
    lines.append(
        f"held-out force error (each hold predicted by a model fitted without it): rms {rep.loo_rms_n:.3g} N, "
        f"max {rep.loo_max_n:.3g} N, {rep.loo_rms_percent:.2g} % of the {rep.force_range_n:.3g} N range")
    return lines


def calibrate_with_force(files: Sequence[str | os.PathLike], *, rig: Rig, table: dict | None = None,
                         stdout: TextIO, stderr: TextIO, static: bool = False):
    """:func:`acquire.commands.calibrate.calibrate_files`, then the force model when there are force holds.

    Prints the force report to ``stdout`` and its warnings to ``stderr``;
    returns the :class:`~acquire.commands.calibrate.CalibrationRun` with the
    model in its calibration (``force``).

    Raises
    ------
    UserError
        See :func:`check_force_labels`, :func:`fit_force_files` and ``calibrate_files``.
    """
    from acquire.commands.calibrate import calibrate_files

    n_force = check_force_labels(files, rig=rig, table=table)
    run = calibrate_files(files, rig=rig, table=table, static=static)
    if not n_force:
        return run
    force = fit_force_files(files, rig=rig, calibration=run.calibration)
    for line in format_force_report(force):
        print(line, file=stdout)
    for w in [*force.notes, *force.report.warnings]:
        _warn(f"force model: {w}", stderr)
    run.calibration = dataclasses.replace(run.calibration, force=force_section(force))
    return run


def _loo_options(infos: list[ForceHoldInfo]) -> dict:
    """The axial priors :func:`force_section` stores, for the held-out estimates."""
    used = [abs(i.force_n) for i in infos if i.used]
    return {"axial_prior_sigma_n": float(max(used)) if used and max(used) > 0 else 1.0,
            "axial_friction": DEFAULT_AXIAL_FRICTION}


def force_section(run: ForceRun) -> dict:
    """The calibration file's ``force`` section: the model and the estimator options the fit suggests.

    ``estimator.axial_prior_sigma_n``: the largest label force, N (the axial
    force is about zero, give or take the forces the finger was calibrated
    with); ``estimator.axial_friction``: the friction-cone prior (the axial
    force within about this fraction of the normal force, :data:`DEFAULT_AXIAL_FRICTION`);
    ``estimator.curvature_noise_per_m``: the largest segment fit residual, at
    least the default noise, 1/m. The force stage reads them, so live, record,
    replay and process estimate alike.
    """
    noise = max(float(np.max(run.report.residual_rms_per_m)), DEFAULT_CURVATURE_NOISE_PER_M)
    return {**run.model.to_dict(), "estimator": {**_loo_options(run.infos), "curvature_noise_per_m": noise}}
