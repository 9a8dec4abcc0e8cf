"""Drift of the flat reading: how far it has moved since calibration, and when to tare.

Printed strips drift: the flat resistance wanders over hours and days
(temperature, ageing, moisture). The calibration's law is on the relative
change ``x = R / r0 - 1``, so a drifted flat resistance ``R_flat = r0 (1 + d)``
reads the curvature ``law(d)`` when the strip is flat: that is the error it
adds to every frame, and a tare (:func:`acquire.core.pipeline.tare_calibration`)
takes it away.

When to tare
------------
A uniform curvature error ``dk`` over a sensor of length ``L`` moves its end by
about ``dk L^2 / 2`` (a circular arc's end ``(1 - cos kL) / k`` for small kL),
``dk L / 2`` as a fraction of L. The tip budget for drift is 0.5 % of L, under
the live path's mean tip error of 0.65 % of L (the README's accuracy table;
a project target, no outside source): tare when ``|dk| > 0.01 / L``, for the
demo finger (96 mm) 0.10 1/m. Below the calibration's own RMS residual at the
holds a tare cannot be told from the fit's error, so the threshold is never
below that. Without a known length, 1 % of the calibrated range (common
practice, no source). A flat resistance 10 % or more away from the
calibration's is more than drift: a changed rig, a damaged strip, a loose tap
(the same bound the ``tare`` command warns at).

Still settling
--------------
A flat reading still creeping back after a bend is flagged when its first
and last thirds differ by more than their noise allows *and* by more than
half the threshold in curvature: filtered frames are strongly correlated
(the virtual finger's at 1 kHz: lag-one correlation 0.98, a figure), so a test on noise
alone, with independent frames assumed, calls a still strip moving; and
only a movement comparable to the threshold could change the verdict
(common practice, no source).

Threads: pure; any thread. Returned objects are new and owned by the caller.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

__all__ = ["SegmentDrift", "DriftReport", "flat_drift", "TIP_BUDGET_FRACTION", "RANGE_FRACTION",
           "SUSPICIOUS_FRACTION"]

#: drift may move the tip by this fraction of the sensor length before a tare is due (project target)
TIP_BUDGET_FRACTION = 0.005
#: without a sensor length: tare when the flat error exceeds this fraction of the calibrated range
#: (common practice, no source)
RANGE_FRACTION = 0.01
#: a flat resistance this far (fraction of r0) from the calibration's is more than drift
SUSPICIOUS_FRACTION = 0.10
#: the flat reading still moves if its first and last thirds differ by more than this many
#: standard errors (common practice, no source)
_SETTLING_SIGMAS = 6.0
#: ... and by more than this fraction of the threshold, in curvature (it could change the verdict)
_SETTLING_THRESHOLD_FRACTION = 0.5


@dataclass(frozen=True)
class SegmentDrift:
    """Drift of one segment's flat reading.

    Attributes
    ----------
    segment : int
    r0_ohm, flat_ohm : float
        The calibration's flat resistance and the measured one (median), ohm.
    drift_pct : float
        ``100 (flat / r0 - 1)``, % of r0.
    curvature_error_per_m : float
        What the calibration reads at the measured flat, 1/m (0 without drift).
    threshold_per_m : float
        Tare when ``|curvature_error_per_m|`` exceeds this, 1/m.
    settling : bool
        The reading still moved during the flat stretch (creep after a bend?).
    """

    segment: int
    r0_ohm: float
    flat_ohm: float
    drift_pct: float
    curvature_error_per_m: float
    threshold_per_m: float
    settling: bool

    @property
    def needs_tare(self) -> bool:
        return bool(abs(self.curvature_error_per_m) > self.threshold_per_m)

    @property
    def suspicious(self) -> bool:
        return bool(abs(self.drift_pct) >= 100 * SUSPICIOUS_FRACTION)


@dataclass(frozen=True)
class DriftReport:
    """:func:`flat_drift`'s answer: per segment, and a verdict (immutable; any thread)."""

    segments: tuple
    n_frames: int
    basis: str  # how the threshold was set, in words

    @property
    def needs_tare(self) -> bool:
        """Some segment's flat error is over its threshold."""
        return any(s.needs_tare for s in self.segments)

    @property
    def verdict(self) -> str:
        """One line for a status bar or a health row."""
        bad = [s for s in self.segments if not math.isfinite(s.curvature_error_per_m)]
        if bad:
            return f"segment {bad[0].segment}: no valid flat reading: cannot judge drift"
        odd = [s for s in self.segments if s.suspicious]
        if odd:
            s = odd[0]
            return (f"segment {s.segment}: flat resistance {s.drift_pct:+.1f} % from the calibration's: "
                    "more than drift (other rig, damaged strip, loose tap?): check, then calibrate again")
        worst = max(self.segments, key=lambda s: abs(s.curvature_error_per_m) / s.threshold_per_m)
        what = (f"flat reads {worst.curvature_error_per_m:+.3f} 1/m in segment {worst.segment} "
                f"(drift {worst.drift_pct:+.2f} % of r0; limit {worst.threshold_per_m:.3f} 1/m)")
        settling = " (the reading was still moving: wait until it settles and measure again)" if any(
            s.settling for s in self.segments) else ""
        return ("tare now: " if self.needs_tare else "no tare needed: ") + what + settling

    def text(self) -> str:
        """A table for people, one line per segment, then the verdict."""
        lines = ["segment  r0 ohm     flat ohm   drift % r0  flat reads 1/m  limit 1/m  tare"]
        for s in self.segments:
            lines.append(f"{s.segment:7d}  {s.r0_ohm:9.1f}  {s.flat_ohm:9.1f}  {s.drift_pct:+10.3f}  "
                         f"{s.curvature_error_per_m:+14.3f}  {s.threshold_per_m:9.3f}  "
                         f"{'yes' if s.needs_tare else 'no'}{'  (settling)' if s.settling else ''}")
        lines.append(f"threshold: {self.basis}")
        lines.append(self.verdict)
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """JSON-able dict."""
        return {"n_frames": self.n_frames, "basis": self.basis, "needs_tare": self.needs_tare,
                "verdict": self.verdict,
                "segments": [{**s.__dict__, "needs_tare": s.needs_tare} for s in self.segments]}


def _thresholds(calibration, length_m):
    """(per-segment threshold, 1/m; basis in words)."""
    span = np.asarray(calibration.curvature_max_per_m) - np.asarray(calibration.curvature_min_per_m)
    if length_m is None:
        lengths = (calibration.rig or {}).get("segment_lengths_mm")
        length_m = 1e-3 * float(np.sum(lengths)) if lengths else None
    if length_m:
        base = np.full(calibration.n_segments, 2 * TIP_BUDGET_FRACTION / length_m)
        basis = (f"tip moved by at most {100 * TIP_BUDGET_FRACTION:g} % of the {1e3 * length_m:.0f} mm sensor: "
                 f"{base[0]:.3f} 1/m")
    else:
        base = RANGE_FRACTION * span
        basis = f"{100 * RANGE_FRACTION:g} % of the calibrated range (sensor length unknown)"
    report = getattr(calibration, "report", None)
    if report is not None and len(report.segments) == calibration.n_segments:
        floor = np.array([s.rms_residual_per_m for s in report.segments], dtype=float)
        if np.any(floor > base):
            basis += "; never below the calibration's RMS residual"
        base = np.maximum(base, np.nan_to_num(floor))
    return base, basis


def _settling(r: np.ndarray, calibration, threshold_per_m: np.ndarray) -> np.ndarray:
    """(S,) the first and last thirds of the stretch differ by more than their noise allows, and by
    more than half the threshold in curvature."""
    n = r.shape[0]
    if n < 9:
        return np.zeros(r.shape[1], bool)
    a, b = r[: n // 3], r[-(n // 3):]
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a segment without valid frames: NaN, judged elsewhere
        se = np.sqrt(np.nanvar(a, axis=0) / a.shape[0] + np.nanvar(b, axis=0) / b.shape[0])
        diff = np.abs(np.nanmean(a, axis=0) - np.nanmean(b, axis=0))
        floor = 1e-9 * np.abs(np.nanmean(r, axis=0))  # noiseless data
        moved = calibration.curvature_per_m(np.stack([np.nanmean(a, axis=0), np.nanmean(b, axis=0)]))
        material = np.abs(moved[1] - moved[0]) > _SETTLING_THRESHOLD_FRACTION * threshold_per_m
        return (np.nan_to_num(diff) > _SETTLING_SIGMAS * se + floor) & np.nan_to_num(material)


def flat_drift(calibration, flat_resistance_ohm, *, length_m: float | None = None) -> DriftReport:
    """How far the flat reading has moved since calibration, per segment, and whether to tare.

    Parameters
    ----------
    calibration : acquire.core.calibration.Calibration
    flat_resistance_ohm : array_like, shape (n, S)
        Filtered resistances of frames with the sensor flat, ohm (a ``flat``
        label of a recording, or the last second live); NaN frames are skipped.
    length_m : float, optional
        Sensor length, m, for the threshold; default the calibration's rig
        segment lengths.

    Returns
    -------
    DriftReport

    Raises
    ------
    ValueError
        Wrong shape (not (n, S) with n >= 1).
    """
    r = np.asarray(flat_resistance_ohm, dtype=float)
    if r.ndim != 2 or r.shape[1] != calibration.n_segments or r.shape[0] == 0:
        raise ValueError(f"flat frames: need shape (n, {calibration.n_segments}), got {r.shape}")
    with np.errstate(invalid="ignore"):
        flat = np.array([np.nanmedian(c) if np.isfinite(c).any() else np.nan for c in r.T])
    r0 = np.asarray(calibration.r0_ohm, dtype=float)
    error = calibration.curvature_per_m(flat[None, :])[0]
    threshold, basis = _thresholds(calibration, length_m)
    settling = _settling(r, calibration, threshold)
    segs = tuple(SegmentDrift(segment=k, r0_ohm=float(r0[k]), flat_ohm=float(flat[k]),
                              drift_pct=float(100 * (flat[k] / r0[k] - 1)),
                              curvature_error_per_m=float(error[k]), threshold_per_m=float(threshold[k]),
                              settling=bool(settling[k]))
                 for k in range(calibration.n_segments))
    return DriftReport(segs, int(r.shape[0]), basis)
