"""Labelled holds to a calibration (``tapcurve calibrate``'s fit from holds; the command is in
:mod:`acquire.commands.calibrate_command`).

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
import warnings
from pathlib import Path
from typing import Sequence

import numpy as np

from acquire.commands.calibrate_run import CalibrationRun, HoldInfo, fit_warnings
from acquire.commands.common import (
    MIN_STEADY_FRAMES,
    _adc_bits,
    check_recording_rig,
    filtered_intervals,
    recording_rate_hz,
    recording_rig,
)
from acquire.core.calibration import (
    CalibrationError,
    check_distinct_recordings,
    file_sha256,
)
from acquire.core.calibration_fit import Hold, fit_calibration
from acquire.core.holds import reference_for, steady_part
from acquire.core.labels import LabelError
from acquire.errors import UserError
from acquire.rig import Rig
from acquire.store.recording import Recording, open_recording

# HoldInfo, CalibrationRun and fit_warnings live in acquire.commands.calibrate_run (named here too)
__all__ = ["HoldInfo", "CalibrationRun", "holds_from_recording", "choose_degree", "fit_warnings", "collect_holds",
           "calibrate_files"]


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
    from acquire.commands.calibrate_memory import (
        add_memory,  # the strip's creep and hysteresis, where they help
    )

    return add_memory(CalibrationRun(
        calibration=cal, report=report, degree=degree, cv_rms_per_m=cv, infos=infos, notes=notes,
        recordings=recordings, holds=holds,
    ), files=files, rig=rig, static=static)




# ----------------------------------------------------------------------------- tare


