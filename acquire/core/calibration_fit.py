"""Fitting a calibration from holds: the per-segment, per-direction monotone polynomial.

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

__all__ = ["Hold", "fit_calibration"]


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


def _fit_side(x, kappa, *, degree, side, on_non_monotone, seg) -> tuple[list[float], int, list[str]]:
    warnings: list[str] = []
    n_distinct = np.unique(np.round(kappa, 9)).size
    d = max(1, min(degree, n_distinct))
    x_edge = float(x.max()) if side == "positive" else float(x.min())
    if (side == "positive" and x_edge <= 0) or (side == "negative" and x_edge >= 0):
        raise CalibrationError(
            f"segment {seg}: holds with {side} curvature do not move the resistance the {side} way "
            f"(positive curvature must raise it); check the label signs and the sensor's orientation"
        )
    # the data themselves: mean x per reference must rise with the reference
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
    if n_distinct <= degree and len(x) > 0:
        warnings.append(
            f"{side} side: only {n_distinct} distinct reference curvature(s); "
            f"degree {d} passes through them, so the residual says little"
        )
    while True:
        a = x[:, None] ** np.arange(1, d + 1)
        coef = np.linalg.lstsq(a, kappa, rcond=None)[0]
        if _monotone(coef, x_edge):
            return [float(c) for c in coef], d, warnings
        if on_non_monotone == "refuse" or d == 1:
            raise CalibrationError(
                f"segment {seg}: the {side}-side fit (degree {d}) is not monotone over the holds; "
                f"curvature would be ambiguous (check the holds and their labels)"
            )
        warnings.append(f"{side} side: degree {d} fit is not monotone; lowered to degree {d - 1}")
        d -= 1


def fit_calibration(
    holds: Sequence[Hold | tuple],
    *,
    rig: Rig,
    degree: int | tuple[int, int] = 2,
    on_non_monotone: str = "lower",
    recordings: Sequence[dict] = (),
    min_holds_per_side: int = 2,
) -> tuple[Calibration, FitReport]:
    """Fit a calibration from holds (module docstring: model and rules).

    Parameters
    ----------
    holds : sequence of Hold or (reference, resistance) tuples
        ``reference`` is a number (uniform) or shape (S,), 1/m; ``resistance``
        shape (n, S), ohm, steady frames only. At least one flat hold
        (reference 0) per segment is required.
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
        Fewer bent holds than this on a side gives a warning.

    Returns
    -------
    (Calibration, FitReport)

    Raises
    ------
    CalibrationError
        No flat hold for a segment, no bent hold at all, a wrong sign, a
        refused non-monotone fit, or arrays of the wrong shape.
    """
    if on_non_monotone not in ("lower", "refuse"):
        raise ValueError("on_non_monotone must be 'lower' or 'refuse'")
    deg_pos, deg_neg = (degree, degree) if np.ndim(degree) == 0 else (degree[0], degree[1])
    deg_pos, deg_neg = int(deg_pos), int(deg_neg)
    if min(deg_pos, deg_neg) < 1:
        raise ValueError("degree must be at least 1")
    n_seg = rig.n_segments
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
        s = np.where(ok, res, 0.0).sum(axis=0)
        means.append(np.where(cnt > 0, s / np.maximum(cnt, 1), np.nan))
        counts.append(cnt)
        refs.append(ref)
        labels.append(h.label or f"hold {i}")
    if not refs:
        raise CalibrationError("no holds to calibrate from")
    refs_a = np.array(refs)  # (H, S)
    means_a = np.array(means)
    counts_a = np.array(counts)

    r0 = np.empty(n_seg)
    pos_c, neg_c, x_lo, x_hi, k_lo, k_hi = [], [], np.zeros(n_seg), np.zeros(n_seg), np.zeros(n_seg), np.zeros(n_seg)
    seg_reports = []
    for k in range(n_seg):
        use = np.isfinite(refs_a[:, k]) & np.isfinite(means_a[:, k])
        kap = refs_a[use, k]
        rm = means_a[use, k]
        flat = kap == 0
        if not flat.any():
            raise CalibrationError(f"segment {k}: no flat hold (label 'flat'); R0 cannot be found")
        r0[k] = rm[flat].mean()
        if not r0[k] > 0:
            raise CalibrationError(f"segment {k}: flat resistance {r0[k]!r} ohm is not positive")
        x = (rm - r0[k]) / r0[k]
        warn: list[str] = []
        used_labels = [labels[i] for i in np.flatnonzero(use)]
        for i in np.flatnonzero(((kap > 0) & (x < 0)) | ((kap < 0) & (x > 0))):
            warn.append(
                f"hold {used_labels[i]!r} ({kap[i]:+.2f} 1/m) moved the resistance the wrong way "
                f"(x = {x[i]:+.4f}); check its label"
            )
        sides = {}
        for side, sel in (("positive", kap > 0), ("negative", kap < 0)):
            if sel.sum() == 0:
                sides[side] = None
                continue
            if sel.sum() < min_holds_per_side:
                warn.append(f"{side} side: only {int(sel.sum())} hold(s)")
            sides[side] = _fit_side(
                x[sel], kap[sel], degree=deg_pos if side == "positive" else deg_neg, side=side,
                on_non_monotone=on_non_monotone, seg=k,
            )
            warn.extend(sides[side][2])
        if sides["positive"] is None and sides["negative"] is None:
            raise CalibrationError(f"segment {k}: no bent holds, only flat ones; nothing to fit")
        for side, other in (("positive", "negative"), ("negative", "positive")):
            if sides[side] is None:
                slope = sides[other][0][0]
                sides[side] = ([slope], 0, [])
                warn.append(f"no {side} holds: {side} bends use the {other} side's initial slope, uncalibrated")
        pos_c.append(sides["positive"][0])
        neg_c.append(sides["negative"][0])
        x_hi[k] = max(0.0, float(x[kap > 0].max())) if (kap > 0).any() else 0.0
        x_lo[k] = min(0.0, float(x[kap < 0].min())) if (kap < 0).any() else 0.0
        k_hi[k] = max(0.0, float(kap.max()))
        k_lo[k] = min(0.0, float(kap.min()))
        model = np.where(
            x >= 0, _poly(np.array([pos_c[-1]]), x[:, None])[:, 0], _poly(np.array([neg_c[-1]]), x[:, None])[:, 0]
        )
        rms = float(np.sqrt(np.mean((model - kap) ** 2)))
        span = k_hi[k] - k_lo[k]
        seg_reports.append(SegmentReport(
            segment=k,
            n_holds=int(use.sum()),
            n_frames=int(counts_a[use, k].sum()),
            rms_residual_per_m=rms,
            rms_residual_percent=100.0 * rms / span if span > 0 else 0.0,
            curvature_min_per_m=float(k_lo[k]),
            curvature_max_per_m=float(k_hi[k]),
            degree_positive=int(sides["positive"][1]),
            degree_negative=int(sides["negative"][1]),
            warnings=warn,
        ))
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

