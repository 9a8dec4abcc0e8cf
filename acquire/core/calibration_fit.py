"""Fitting a calibration from holds and filmed motion: the per-segment, per-direction monotone polynomial.

See :mod:`acquire.core.calibration` for the model and why it is chosen. Pure;
any thread; returned objects are new.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from acquire.about import software_version, utc_now_iso
from acquire.core.calibration import (
    Calibration,
    CalibrationError,
    FitReport,
    SegmentReport,
    _dpoly,
    _poly,
)
from acquire.rig import Rig

__all__ = ["Hold", "MotionPoints", "fit_calibration", "motion_bin_weight", "MOTION_HALF_FRAMES"]

#: a motion bin of this many camera frames weighs half as much as a hold; a full one (many more frames) like
#: one hold. A bin's mean carries the markers' noise (about 2 1/m a frame on the demo finger) over its
#: frames, next to the law's own roughness: inverse-variance weights with that floor
MOTION_HALF_FRAMES = 10.0


def motion_bin_weight(frames, *, half_frames: float = MOTION_HALF_FRAMES) -> np.ndarray:
    """Weight of motion bins of ``frames`` camera frames each, relative to one hold: ``n / (n + half_frames)``."""
    n = np.asarray(frames, dtype=float)
    return n / (n + float(half_frames)) if half_frames > 0 else np.ones_like(n)


@dataclass
class Hold:
    """Steady frames of one labelled hold.

    Attributes
    ----------
    reference_per_m : ndarray, shape (S,)
        Reference curvature of each segment, 1/m; NaN = unknown (ignored).
    resistance_ohm : ndarray, shape (n, S)
        Steady frames (see :func:`steady_part`).
    label : str
        For messages.
    """

    reference_per_m: np.ndarray
    resistance_ohm: np.ndarray
    label: str = ""


def _monotone(coef: np.ndarray, x_edge: float) -> bool:
    if x_edge == 0:
        return bool(coef[0] > 0)
    u = np.linspace(0.0, x_edge, 257)
    return bool(np.all(_dpoly(coef[None, :], u[:, None])[:, 0] > 0))


def _fit_side(x, kappa, *, degree, side, on_non_monotone, seg, weight=None, is_hold=None
              ) -> tuple[list[float], int, list[str]]:
    """Weighted least squares of one side's polynomial (degree lowered while not monotone).

    The data check (mean x must rise with the reference) looks at hold points
    only: motion points are bin means with noise of their own.
    """
    warnings: list[str] = []
    weight = np.ones_like(x) if weight is None else weight
    is_hold = np.ones(x.shape, dtype=bool) if is_hold is None else is_hold
    n_distinct = np.unique(np.round(kappa, 9)).size
    d = max(1, min(degree, n_distinct))
    x_edge = float(x.max()) if side == "positive" else float(x.min())
    if (side == "positive" and x_edge <= 0) or (side == "negative" and x_edge >= 0):
        raise CalibrationError(
            f"segment {seg}: holds with {side} curvature do not move the resistance the {side} way "
            f"(positive curvature must raise it); check the label signs and the sensor's orientation"
        )
    warnings.extend(_data_monotone(x[is_hold], kappa[is_hold], side=side, seg=seg, on_non_monotone=on_non_monotone))
    if n_distinct <= degree and len(x) > 0:
        warnings.append(
            f"{side} side: only {n_distinct} distinct reference curvature(s); "
            f"degree {d} passes through them, so the residual says little"
        )
    sw = np.sqrt(weight)
    while True:
        a = x[:, None] ** np.arange(1, d + 1)
        coef = np.linalg.lstsq(a * sw[:, None], kappa * sw, rcond=None)[0]
        if _monotone(coef, x_edge):
            return [float(c) for c in coef], d, warnings
        if on_non_monotone == "refuse" or d == 1:
            raise CalibrationError(
                f"segment {seg}: the {side}-side fit (degree {d}) is not monotone over the holds; "
                f"curvature would be ambiguous (check the holds and their labels)"
            )
        warnings.append(f"{side} side: degree {d} fit is not monotone; lowered to degree {d - 1}")
        d -= 1


def _data_monotone(x, kappa, *, side, seg, on_non_monotone) -> list[str]:
    """Mean x per reference must rise with the reference (the data themselves)."""
    warnings = []
    ks = np.unique(kappa)
    xm = np.array([x[kappa == k].mean() for k in ks])
    for i in np.flatnonzero(np.diff(xm) <= 0):
        msg = (
            f"{side} side: resistance does not rise from {ks[i]:+.2f} to {ks[i + 1]:+.2f} 1/m "
            f"(x {xm[i]:+.4f} -> {xm[i + 1]:+.4f}); the data are not monotone"
        )
        if on_non_monotone == "refuse":
            raise CalibrationError(f"segment {seg}: {msg}")
        warnings.append(msg)
    return warnings


@dataclass
class MotionPoints:
    """Points of one filmed motion session: camera frames binned by resistance, per segment.

    Attributes
    ----------
    x : list of ndarray
        Per segment, (B_k,): relative resistance change of each bin,
        ``(R - r0) / r0`` with the session's own flat resistance ``r0``
        (so a drift of the flat resistance between sessions does not matter).
    reference_per_m : list of ndarray
        Per segment, (B_k,): mean marker curvature of each bin, 1/m.
    frames : list of ndarray
        Per segment, (B_k,): camera frames in each bin.
    r0_ohm : ndarray, shape (S,)
        The session's flat resistance per segment, ohm (NaN: not found).
    name : str
        For messages.
    """

    x: list
    reference_per_m: list
    frames: list
    r0_ohm: np.ndarray
    name: str = ""


def _hold_means(holds, n_seg: int):
    """(references (H, S), mean resistances (H, S), frame counts (H, S), labels) of the holds."""
    refs, means, counts, labels = [], [], [], []
    for i, h in enumerate(holds):
        if not isinstance(h, Hold):
            ref, res = h[0], h[1]
            h = Hold(reference_per_m=ref, resistance_ohm=res, label=h[2] if len(h) > 2 else f"hold {i}")
        ref = np.asarray(h.reference_per_m, dtype=np.float64)
        ref = np.full(n_seg, float(ref)) if ref.ndim == 0 else ref
        res = np.asarray(h.resistance_ohm, dtype=np.float64)
        if res.ndim == 1 and n_seg == 1:
            res = res[:, None]
        if ref.shape != (n_seg,) or res.ndim != 2 or res.shape[1] != n_seg:
            raise CalibrationError(
                f"{h.label or f'hold {i}'}: expected {n_seg} segments, got reference {ref.shape} "
                f"and resistance {res.shape}"
            )
        ok = np.isfinite(res)
        cnt = ok.sum(axis=0)
        tot = np.where(ok, res, 0.0).sum(axis=0)
        means.append(np.where(cnt > 0, tot / np.maximum(cnt, 1), np.nan))
        counts.append(cnt)
        refs.append(ref)
        labels.append(h.label or f"hold {i}")
    shape = (0, n_seg)
    return (np.array(refs).reshape(shape if not refs else (len(refs), n_seg)), np.array(means).reshape(-1, n_seg),
            np.array(counts).reshape(-1, n_seg), labels)


@dataclass
class _Points:
    """One segment's points: holds first, then motion bins."""

    x: np.ndarray
    kappa: np.ndarray
    weight: np.ndarray
    is_hold: np.ndarray
    r0: float
    r0_from: str
    hold_frames: int
    motion_frames: int
    labels: list


def _segment_points(k, refs, means, counts, labels, motion, *, motion_weight, half_frames) -> _Points:
    """Hold means and motion bins of segment k as (x, curvature) points, with the flat resistance."""
    use = np.isfinite(refs[:, k]) & np.isfinite(means[:, k])
    kap, rm = refs[use, k], means[use, k]
    flat = kap == 0
    mx = [m.x[k] for m in motion if len(m.x[k])]
    mk = [m.reference_per_m[k] for m in motion if len(m.x[k])]
    mf = [m.frames[k] for m in motion if len(m.x[k])]
    motion_r0 = np.array([m.r0_ohm[k] for m in motion if np.isfinite(m.r0_ohm[k])])
    if flat.any():
        r0, r0_from = float(rm[flat].mean()), "holds"
    elif motion_r0.size:
        r0, r0_from = float(motion_r0.mean()), "motion"
    elif motion:
        raise CalibrationError(f"segment {k}: no flat hold and the motion never passes through flat "
                               f"(curvature 0); R0 cannot be found: film the finger straight too")
    else:
        raise CalibrationError(f"segment {k}: no flat hold (label 'flat'); R0 cannot be found")
    if not r0 > 0:
        raise CalibrationError(f"segment {k}: flat resistance {r0!r} ohm is not positive")
    xm = np.concatenate(mx) if mx else np.zeros(0)
    wm = motion_bin_weight(np.concatenate(mf), half_frames=half_frames) if mf else np.zeros(0)
    return _Points(
        x=np.concatenate([(rm - r0) / r0, xm]), kappa=np.concatenate([kap] + mk),
        weight=np.concatenate([np.ones(kap.size), float(motion_weight) * wm]),
        is_hold=np.arange(kap.size + xm.size) < kap.size, r0=r0, r0_from=r0_from,
        hold_frames=int(counts[use, k].sum()), motion_frames=int(sum(f.sum() for f in mf)),
        labels=[labels[i] for i in np.flatnonzero(use)],
    )


def _side_selection(pts: _Points):
    """Points of each side: holds by the sign of their reference, motion bins by the sign of x."""
    pos = np.where(pts.is_hold, pts.kappa > 0, pts.x > 0)
    neg = np.where(pts.is_hold, pts.kappa < 0, pts.x < 0)
    return {"positive": pos, "negative": neg}


def _fit_segment(k, pts: _Points, *, deg_pos, deg_neg, on_non_monotone, min_holds_per_side):
    """Both sides of segment k: ({side: (coef, degree)}, warnings)."""
    warn: list[str] = []
    h = pts.is_hold
    for i in np.flatnonzero(h & (((pts.kappa > 0) & (pts.x < 0)) | ((pts.kappa < 0) & (pts.x > 0)))):
        warn.append(
            f"hold {pts.labels[i]!r} ({pts.kappa[i]:+.2f} 1/m) moved the resistance the wrong way "
            f"(x = {pts.x[i]:+.4f}); check its label"
        )
    sides = {}
    for side, sel in _side_selection(pts).items():
        if sel.sum() == 0:
            sides[side] = None
            continue
        if (sel & h).sum() < min_holds_per_side and not (sel & ~h).any():
            warn.append(f"{side} side: only {int(sel.sum())} hold(s)")
        coef, d, w = _fit_side(
            pts.x[sel], pts.kappa[sel], degree=deg_pos if side == "positive" else deg_neg, side=side,
            on_non_monotone=on_non_monotone, seg=k, weight=pts.weight[sel], is_hold=h[sel],
        )
        sides[side] = (coef, d)
        warn.extend(w)
    if sides["positive"] is None and sides["negative"] is None:
        raise CalibrationError(f"segment {k}: no bent holds, only flat ones; nothing to fit")
    for side, other in (("positive", "negative"), ("negative", "positive")):
        if sides[side] is None:
            sides[side] = ([sides[other][0][0]], 0)
            warn.append(f"no {side} holds: {side} bends use the {other} side's initial slope, uncalibrated")
    return sides, warn


def _rms(v) -> float | None:
    return float(np.sqrt(np.mean(v ** 2))) if v.size else None


def _segment_report(k, pts: _Points, sides, warn) -> tuple[SegmentReport, tuple]:
    """The report of segment k and its ranges (x_lo, x_hi, k_lo, k_hi)."""
    pos, neg = np.array([sides["positive"][0]]), np.array([sides["negative"][0]])
    model = np.where(pts.x >= 0, _poly(pos, pts.x[:, None])[:, 0], _poly(neg, pts.x[:, None])[:, 0])
    err = model - pts.kappa
    x_hi, x_lo = max(0.0, float(pts.x.max())), min(0.0, float(pts.x.min()))
    k_hi, k_lo = max(0.0, float(pts.kappa.max())), min(0.0, float(pts.kappa.min()))
    rms = float(np.sqrt(np.average(err ** 2, weights=pts.weight)))
    span = k_hi - k_lo
    m = ~pts.is_hold
    return SegmentReport(
        segment=k, n_holds=int(pts.is_hold.sum()), n_frames=pts.hold_frames,
        rms_residual_per_m=rms, rms_residual_percent=100.0 * rms / span if span > 0 else 0.0,
        curvature_min_per_m=k_lo, curvature_max_per_m=k_hi,
        degree_positive=int(sides["positive"][1]), degree_negative=int(sides["negative"][1]), warnings=warn,
        n_motion_points=int(m.sum()), n_motion_frames=pts.motion_frames,
        motion_share=float(pts.weight[m].sum() / pts.weight.sum()),
        rms_residual_holds_per_m=_rms(err[~m]), rms_residual_motion_per_m=_rms(err[m]), r0_from=pts.r0_from,
    ), (x_lo, x_hi, k_lo, k_hi)


# long on purpose: mostly its docstring (the model and its refusals)
def fit_calibration(
    holds: Sequence[Hold | tuple],
    *,
    rig: Rig,
    degree: int | tuple[int, int] = 2,
    on_non_monotone: str = "lower",
    recordings: Sequence[dict] = (),
    min_holds_per_side: int = 2,
    motion: Sequence[MotionPoints] = (),
    motion_weight: float = 1.0,
    motion_half_frames: float = MOTION_HALF_FRAMES,
) -> tuple[Calibration, FitReport]:
    """Fit a calibration from holds and/or filmed motion points (module docstring: model and rules).

    Parameters
    ----------
    holds : sequence of Hold or (reference, resistance) tuples
        ``reference`` is a number (uniform) or shape (S,), 1/m; ``resistance``
        shape (n, S), ohm, steady frames only. A flat hold (reference 0) per
        segment, or motion that passes through flat, is required.
    rig : Rig
        The rig the recordings were made with.
    degree : int or (int, int)
        Highest polynomial degree per side (1..3 sensible); a pair gives the
        positive and the negative side their own.
    on_non_monotone : {"lower", "refuse"}
        Lower the degree with a warning, or raise.
    recordings : sequence of dict
        Provenance, ``{"path": ..., "sha256": ...}`` each.
    min_holds_per_side : int
        Fewer bent holds than this on a side (and no motion there) gives a warning.
    motion : sequence of MotionPoints
        Filmed motion sessions, binned (:class:`MotionPoints`).
    motion_weight : float
        Weight of one full motion bin relative to one hold (each hold mean counts 1).
    motion_half_frames : float
        A bin of this many frames weighs half a full one (:func:`motion_bin_weight`; 0: all alike).

    Returns
    -------
    (Calibration, FitReport)

    Raises
    ------
    CalibrationError
        No flat resistance for a segment, no bent point at all, a wrong sign, a
        refused non-monotone fit, or arrays of the wrong shape.
    """
    if on_non_monotone not in ("lower", "refuse"):
        raise ValueError("on_non_monotone must be 'lower' or 'refuse'")
    deg_pos, deg_neg = (degree, degree) if np.ndim(degree) == 0 else (degree[0], degree[1])
    deg_pos, deg_neg = int(deg_pos), int(deg_neg)
    if min(deg_pos, deg_neg) < 1:
        raise ValueError("degree must be at least 1")
    n_seg = rig.n_segments
    refs, means, counts, labels = _hold_means(holds, n_seg)
    if not labels and not motion:
        raise CalibrationError("no holds to calibrate from")
    r0, pos_c, neg_c, ranges, seg_reports = np.empty(n_seg), [], [], [], []
    for k in range(n_seg):
        pts = _segment_points(k, refs, means, counts, labels, motion, motion_weight=motion_weight,
                              half_frames=motion_half_frames)
        r0[k] = pts.r0
        sides, warn = _fit_segment(k, pts, deg_pos=deg_pos, deg_neg=deg_neg, on_non_monotone=on_non_monotone,
                                   min_holds_per_side=min_holds_per_side)
        pos_c.append(sides["positive"][0])
        neg_c.append(sides["negative"][0])
        rep, rng = _segment_report(k, pts, sides, warn)
        seg_reports.append(rep)
        ranges.append(rng)
    x_lo, x_hi, k_lo, k_hi = (np.array(v) for v in zip(*ranges))
    report = FitReport(segments=seg_reports)
    cal = Calibration(
        r0_ohm=r0,
        positive=pos_c,
        negative=neg_c,
        x_min=x_lo,
        x_max=x_hi,
        curvature_min_per_m=k_lo,
        curvature_max_per_m=k_hi,
        readout_kind=rig.readout_kind,
        rig={
            "name": rig.name, "source": rig.source, "sha256": rig.sha256, "n_segments": n_seg,
            "r_ref_ohm": rig.r_ref_ohm, "segment_lengths_mm": [round(float(v) * 1e3, 6) for v in rig.segment_lengths_m],
        },
        recordings=[dict(r) for r in recordings],
        created_utc=utc_now_iso(),
        software_version=software_version(),
        report=report,
        source="fitted calibration",
    )
    return cal, report
