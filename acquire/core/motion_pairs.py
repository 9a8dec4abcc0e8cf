"""Pairs of (resistance, reference curvature) from a filmed motion session, and their bins.

A camera frame's marker curvature is paired with the recording's filtered
resistance at the frame's device time. Three things decide how good the
pairs are, each handled here:

- **Pairing lag** (:func:`pairing_lag`): the marker curvature is
  instantaneous, the filtered resistance comes late by the filters' delay
  (a few ms), and the clock alignment is only as sharp as the motion allows.
  Both shift every pair in time alike, which, while the finger moves, turns
  the law into a loop. The lag that removes it is found from the pairs
  themselves: the residual of a smooth law, regressed on the rate of change
  of curvature, is the lag times that rate.
- **Flat resistance** (:func:`flat_resistance`): where the law crosses
  curvature 0, from a fit with a kink there (a strip responds more weakly to
  the opposite bend, so a smooth curve through flat is biased).
- **Bins** (:func:`bin_motion`): frames binned by resistance (the precise
  variable) on each side of the flat resistance separately, so no bin mixes
  the two bend directions.

Pure; any thread; returned arrays are new and owned by the caller.
"""
from __future__ import annotations

import math

import numpy as np
from scipy.optimize import minimize_scalar

from acquire.core.calibration_fit import MotionPoints

__all__ = ["pairing_lag", "paired_resistance", "recording_covers", "flat_resistance", "bin_motion", "N_BINS", "MIN_BIN_FRAMES",
           "MAX_LAG_S"]

#: bins per segment and side of flat across the resistance range a session covers
N_BINS = 30
#: a bin with fewer camera frames is dropped (the fit weighs bins by their frames, see calibration_fit)
MIN_BIN_FRAMES = 3
#: largest pairing lag searched, s (filters add milliseconds, a good alignment a few more)
MAX_LAG_S = 0.1
#: knots of the smooth law used to find the lag (piecewise linear in resistance, equal-count bins)
_LAW_KNOTS = 24
#: relative window around the flat resistance whose frames place the kink
_FLAT_WINDOW = 0.3
#: most frames the flat resistance's fit uses (every n-th beyond)
_MAX_FLAT_FRAMES = 20_000
#: frames within this curvature of 0 give the first guess of the flat resistance, 1/m
_NEAR_FLAT_PER_M = 3.0


def recording_covers(t_s, t_rec_s, *, settle_s: float, max_gap_factor: float = 2.5) -> np.ndarray:
    """Which times ``t_s`` (s) the recording covers with settled filters, (F,) bool (new array).

    A time is covered when it lies between two recording frames no more than
    ``max_gap_factor`` median intervals apart (frames lost on the link leave
    gaps that interpolation would fill with a straight line) and at least
    ``settle_s`` after the recording's start or the end of its last gap (the
    filters settle again after a jump).
    """
    t, tr = np.asarray(t_s, dtype=float), np.asarray(t_rec_s, dtype=float)
    if tr.size < 2:
        return np.zeros(t.shape, dtype=bool)
    dt = np.diff(tr)
    gap = dt > max_gap_factor * float(np.median(dt))
    resume = np.concatenate([[tr[0]], tr[1:][gap]])        # where the frames start again
    i = np.searchsorted(tr, t, side="right")
    inside = (i > 0) & (i < tr.size)
    ic = np.clip(i, 1, tr.size - 1)
    since = t - resume[np.searchsorted(resume, t, side="right").clip(1) - 1]
    return inside & ~gap[ic - 1] & (since >= settle_s)


def paired_resistance(t_pair_s, t_rec_s, resistance_ohm) -> np.ndarray:
    """Resistance (F, S), ohm, interpolated at device times ``t_pair_s`` (F,), s, from the recording."""
    r = np.asarray(resistance_ohm, dtype=float)
    return np.stack([np.interp(t_pair_s, t_rec_s, r[:, k]) for k in range(r.shape[1])], axis=1)


def _smooth_law(r: np.ndarray, k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Knots (resistance, ohm) and values (1/m) of a smooth law k(r): the means of equal-count bins.

    Linear between the knots; the regression of curvature on resistance (the
    precise variable), so marker noise averages out.
    """
    edges = np.quantile(r, np.linspace(0.0, 1.0, _LAW_KNOTS + 1))
    i = np.clip(np.searchsorted(edges, r, side="right") - 1, 0, _LAW_KNOTS - 1)
    n = np.bincount(i, minlength=_LAW_KNOTS)
    m = n > 0
    rm = np.bincount(i, weights=r, minlength=_LAW_KNOTS)[m] / n[m]
    km = np.bincount(i, weights=k, minlength=_LAW_KNOTS)[m] / n[m]
    return rm, km


def pairing_lag(t_dev_s, curvature_per_m, t_rec_s, resistance_ohm, *, iterations: int = 6,
                tolerance_s: float = 1e-4) -> float:
    """Time to add to the camera frames' device times so that resistance and curvature pair up, s.

    Parameters
    ----------
    t_dev_s : array_like, shape (F,)
        Device time of each camera frame (the clock alignment's), s.
    curvature_per_m : array_like, shape (F, S)
        Marker curvature, 1/m; NaN where not used.
    t_rec_s, resistance_ohm : array_like, shapes (N,), (N, S)
        The recording's device times, s, and filtered resistance, ohm.
    iterations : int
        Most refinement steps.
    tolerance_s : float
        Stop when a step moves the lag less than this, s.

    Returns
    -------
    float
        The lag, s, within +-``MAX_LAG_S``; 0 when the finger never moves
        enough to tell.

    Each step: pair at the current lag, fit a smooth law per segment
    (:func:`_smooth_law`), and regress all segments' residuals (marker minus
    law) on the law's rate of change along the frames; the slope is the time
    by which the resistance still leads (positive) or lags.
    """
    t = np.asarray(t_dev_s, dtype=float)
    kappa = np.asarray(curvature_per_m, dtype=float)
    lag = 0.0
    for _ in range(max(1, int(iterations))):
        r = paired_resistance(t + lag, t_rec_s, resistance_ohm)
        num = den = 0.0
        for s in range(kappa.shape[1]):
            ok = np.isfinite(kappa[:, s]) & np.isfinite(r[:, s])
            if ok.sum() < 4 * _LAW_KNOTS:
                continue
            knots, values = _smooth_law(r[ok, s], kappa[ok, s])
            k_hat = np.interp(r[:, s], knots, values)
            rate = np.gradient(k_hat, t)
            num += float(np.sum((kappa[ok, s] - k_hat[ok]) * rate[ok]))
            den += float(np.sum(rate[ok] ** 2))
        if not den > 0:
            return 0.0
        step = num / den
        lag = float(np.clip(lag + step, -MAX_LAG_S, MAX_LAG_S))
        if abs(step) < tolerance_s:
            break
    return lag


def _kink_cost(r0: float, r: np.ndarray, k: np.ndarray, degree: int) -> float:
    """Least-squares cost of a law through (r0, 0) with its own polynomial on each side."""
    u = r / r0 - 1.0
    up, un = np.maximum(u, 0.0), np.minimum(u, 0.0)
    a = np.stack([up ** p for p in range(1, degree + 1)] + [un ** p for p in range(1, degree + 1)], axis=1)
    # normal equations: 2 degree unknowns, many frames (a small ridge for a side without frames)
    ata = a.T @ a
    ata[np.diag_indices_from(ata)] += 1e-12 * max(float(np.trace(ata)), 1e-300)
    coef = np.linalg.solve(ata, a.T @ k)
    return float(np.sum((a @ coef - k) ** 2))


def flat_resistance(resistance_ohm, curvature_per_m, *, min_frames: int = 10, degree: int = 2,
                    iterations: int = 3) -> float:
    """Resistance where the frames' curvature crosses 0, ohm (NaN: the motion never passes flat).

    A law through (r0, 0) with a quadratic of its own on each side (the kink
    at flat: the opposite bend answers more weakly), fitted by least squares
    of curvature on resistance (the precise variable, so marker noise does not
    bias it) to the frames within ``_FLAT_WINDOW`` (relative) of r0, with r0
    free; a few times over as the window moves. The start is the median
    resistance of the frames within 3 1/m of flat.

    Parameters
    ----------
    resistance_ohm, curvature_per_m : array_like, shape (F,)
        Paired frames of one segment (finite).
    min_frames : int
        Fewer frames near flat (or three times fewer in the window): NaN.
    """
    r, k = np.asarray(resistance_ohm, dtype=float), np.asarray(curvature_per_m, dtype=float)
    near = np.abs(k) < _NEAR_FLAT_PER_M
    if near.sum() < min_frames:
        return math.nan
    r0 = float(np.median(r[near]))
    for _ in range(iterations):
        sel = np.flatnonzero(np.abs(r / r0 - 1.0) <= _FLAT_WINDOW)
        if sel.size < 3 * min_frames or not r0 > 0:
            return math.nan
        sel = sel[::max(1, sel.size // _MAX_FLAT_FRAMES)]   # long sessions: every n-th frame is plenty
        res = minimize_scalar(_kink_cost, bounds=(0.98 * r0, 1.02 * r0), method="bounded",
                              args=(r[sel], k[sel], degree), options={"xatol": 1e-7 * r0})
        moved = abs(res.x / r0 - 1.0)
        r0 = float(res.x)
        if moved < 1e-6:
            break
    return r0 if math.isfinite(r0) and r0 > 0 else math.nan


def _side_bins(r, k, lo, hi, n_bins, min_frames):
    """Mean resistance, mean curvature and frame count of equal-width bins on [lo, hi] with enough frames."""
    if not hi > lo or r.size == 0:
        return np.zeros(0), np.zeros(0), np.zeros(0, dtype=int)
    i = np.clip(((r - lo) / (hi - lo) * n_bins).astype(np.int64), 0, n_bins - 1)
    inside = (r >= lo) & (r <= hi)
    n = np.bincount(i[inside], minlength=n_bins)
    sr = np.bincount(i[inside], weights=r[inside], minlength=n_bins)
    sk = np.bincount(i[inside], weights=k[inside], minlength=n_bins)
    m = n >= min_frames
    return sr[m] / n[m], sk[m] / n[m], n[m]


def _segment_bins(r, k, r0, n_bins, min_frames):
    """Bins of one segment: each side of r0 from r0 to its 0.2 % / 99.8 % point."""
    if r.size < min_frames:
        return np.zeros(0), np.zeros(0), np.zeros(0, dtype=int)
    lo, hi = np.quantile(r, [0.002, 0.998])
    neg = r < r0
    parts = [_side_bins(r[neg], k[neg], min(lo, r0), r0, n_bins, min_frames),
             _side_bins(r[~neg], k[~neg], r0, max(hi, r0), n_bins, min_frames)]
    return tuple(np.concatenate(v) for v in zip(*parts))


def bin_motion(resistance_ohm, curvature_per_m, *, n_bins: int = N_BINS, min_frames: int = MIN_BIN_FRAMES,
               name: str = "") -> MotionPoints:
    """Bin paired frames by resistance per segment, each side of its flat resistance apart.

    Parameters
    ----------
    resistance_ohm, curvature_per_m : array_like, shape (F, S)
        Paired frames (NaN: not used), ohm and 1/m.
    n_bins : int
        Equal-width bins per side, from the flat resistance to the 0.2 %
        (below) and 99.8 % (above) points of the segment's resistance.
    min_frames : int
        Fewer frames make no bin.
    name : str
        For messages.

    Returns
    -------
    MotionPoints
        Relative changes from the session's own flat resistance
        (:func:`flat_resistance`; NaN where the motion never passes flat:
        then that segment has no points).
    """
    r, k = np.asarray(resistance_ohm, dtype=float), np.asarray(curvature_per_m, dtype=float)
    xs, ks, fs, r0s = [], [], [], []
    for s in range(r.shape[1]):
        ok = np.isfinite(r[:, s]) & np.isfinite(k[:, s])
        r0 = flat_resistance(r[ok, s], k[ok, s])
        if math.isfinite(r0):
            rb, kb, nb = _segment_bins(r[ok, s], k[ok, s], r0, n_bins, min_frames)
        else:
            rb, kb, nb = np.zeros(0), np.zeros(0), np.zeros(0, dtype=int)
        xs.append((rb - r0) / r0 if rb.size else np.zeros(0))
        ks.append(kb)
        fs.append(nb)
        r0s.append(r0)
    return MotionPoints(x=xs, reference_per_m=ks, frames=fs, r0_ohm=np.array(r0s), name=name)
