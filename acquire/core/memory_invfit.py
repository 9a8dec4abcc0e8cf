"""Hysteresis identified as the compensator itself: the inverse PI fitted from reading to reference.

:func:`acquire.core.memory_fit.fit_memory` fits the forward model
``x = C[H[u]]`` with the static signal ``u`` as the known input. When ``u``
comes from a filmed reference (markers, mapped through the static law), ``u``
is the noisy side: a few tenths of a per cent of the range per camera frame
(the virtual camera: about 2 1/m RMS on 90 1/m). Noise on the input of play
operators is not averaged out by least squares: small plays follow the noise,
the fit takes part of it for hysteresis and the weights come out biased (the
errors-in-variables problem of regression; e.g. Fuller, "Measurement Error
Models", 1987, ch. 1, from memory). The resistance reading is the clean side
(a fraction of an LSB after the low-pass filter).

So this fits what the pipeline runs, the inverse PI from the creep-compensated
reading ``y = C^-1[x]`` to ``u``::

    u = sum_j v_j F_{q_j}[y],   v_0 > 0,   v_j <= 0 (j >= 1),

a bounded linear least-squares problem over the play outputs of the clean
``y`` (``scipy.optimize.lsq_linear``), the reference noise on the output side
where least squares averages it. ``v_j <= 0`` is the inverse of a PI with
non-negative weights (counter-clockwise loops, Krejci & Kuhnen 2001, from
memory); the forward parameters follow from the same analytic inversion
(:func:`acquire.core.memory.pi_inverse_parameters`, which maps an inverse
back to its forward operator) once the cumulative sums ``v_0 + ... + v_j``
are positive (plays that break it are dropped, largest threshold first).

Rows of other recordings can join the fit (:func:`fit_inverse_pi`'s ``extra``):
the flat holds of a holds recording, met after bends to both sides, carry the
hysteresis offset of large moves that a free motion seldom reverses fully
(see :mod:`acquire.commands.calibrate_memory`). The session then keeps a free
offset of its own, or the plays would absorb the offset between the film's
flat and the holds' (measured on the virtual finger: the film's flat crossing
1.4 to 1.5 % of r0 below the holds', even for the ideal strip).

:func:`best_lag` picks the time shift between reading and reference that
leaves the smallest residual: a clock alignment made on the raw reading of a
strip that creeps is biased (creep delays the reading's centre of mass), and
a reference that lags by tens of ms looks like hysteresis to the fit (a play
with a small threshold is a backlash, which on a moving signal is a delay).

Threads: pure, any thread. Returned arrays are new.
"""
from __future__ import annotations

import numpy as np
from scipy import optimize

from .memory import PlayOperator, Relaxation, pi_inverse_parameters

__all__ = ["INVERSE_FRACTIONS", "fit_inverse_pi", "fit_hysteresis", "shift_reference", "best_lag", "fill_gaps",
           "smooth_in_time", "invert_static_law", "decimate", "creep_terms"]

#: inverse play thresholds as fractions of the reading's span: denser than the forward grid (the
#: inverse's thresholds r'_j = r_j W_j - sum w_i r_i fall between a forward grid's points); the fit
#: keeps few (bounded least squares gives sparse weights). Common practice, no source.
INVERSE_FRACTIONS = (0.0125, 0.025, 0.0375, 0.05, 0.075, 0.1, 0.15, 0.2, 0.3)
_V0_MIN = 1e-3  # v_0 lower bound relative to the static gain: the compensator's linear part stays positive


def fit_inverse_pi(y: np.ndarray, u: np.ndarray, rows: np.ndarray, thresholds, extra=()):
    """Inverse PI ``u ~ sum v_j F_{q_j}[y]`` of one segment; returns (forward thresholds, forward weights, SSE).

    Parameters
    ----------
    y : ndarray, shape (N,)
        Creep-compensated reading (units of x), finite (gaps filled by the caller), frames in order.
    u : ndarray, shape (N,)
        Static signal from the reference (units of x); only ``rows`` are used.
    rows : ndarray of bool, shape (N,)
        Frames to fit (finite ``u``, the training part).
    thresholds : sequence of float
        Inverse play thresholds ``q_j``, increasing, units of y; 0 first.
    extra : sequence of (ndarray (M,), ndarray (M,))
        Other recordings of the same segment, each ``(y_b, u_b)`` as ``y`` and ``u`` (units of x):
        the plays run over all of ``y_b`` (its own history), the frames with finite ``u_b`` are fitted
        too. With any, the main rows get a free offset of ``u`` of their own (fitted, then dropped):
        a filmed session's reference and its reading need not meet the other recordings' flat
        resistance (:class:`acquire.core.calibration_fit.MotionPoints` keeps each session's own).

    Returns
    -------
    (ndarray, ndarray, float)
        Forward thresholds (K',) strictly increasing from 0 and weights (K',)
        (``w_0 > 0``, cumulative sums > 0: a valid :class:`~acquire.core.memory.SegmentMemory`
        PI part), and the sum of squared residuals of the fit (units of u squared).
    """
    q = np.asarray(thresholds, dtype=float)
    plays = PlayOperator(q[None, :]).process(y[:, None])[:, 0, :]
    a, b = plays[rows], u[rows]
    n_main = a.shape[0]
    gain = float(np.dot(a[:, 0], b) / max(np.dot(a[:, 0], a[:, 0]), 1e-300))
    for yb, known in extra:  # rows of other recordings: their own play history, their frames with a known u
        known = np.asarray(known, float)
        pb = PlayOperator(q[None, :]).process(np.asarray(yb, float)[:, None])[:, 0, :]
        a, b = np.vstack([a, pb[np.isfinite(known)]]), np.concatenate([b, known[np.isfinite(known)]])
    lb, ub = np.full(q.size, -np.inf), np.zeros(q.size)
    lb[0], ub[0] = _V0_MIN * max(gain, 1e-12), np.inf
    if len(extra):
        # the main rows' own offset of u, free (sign and size): not part of the memory, dropped below
        a = np.column_stack([a, np.arange(a.shape[0]) < n_main])
        lb, ub = np.append(lb, -np.inf), np.append(ub, np.inf)
    v = optimize.lsq_linear(a, b, bounds=(lb, ub), method="bvls").x
    sse = float(np.sum((a @ v - b) ** 2))
    v = v[:q.size]
    keep = np.concatenate(([True], v[1:] < -1e-9 * v[0]))  # plays with no weight are no plays
    q, v = q[keep], v[keep]
    while q.size > 1 and np.cumsum(v)[-1] <= 1e-6 * v[0]:  # invertible: every cumulative sum > 0
        q, v = q[:-1], v[:-1]
    r, w = pi_inverse_parameters(q[None, :], v[None, :])
    r, w = r[0], w[0]
    strict = np.concatenate(([True], np.diff(r) > 0))  # rounding may merge thresholds: merge their weights
    if not strict.all():
        groups = np.cumsum(strict) - 1
        w = np.bincount(groups, weights=w)
        r = r[strict]
    return r, w, sse


def shift_reference(t_s: np.ndarray, k: np.ndarray, *, lag_s: float) -> np.ndarray:
    """Reference (N, S) read ``lag_s`` later: ``k(t + lag_s)`` by linear interpolation in time.

    NaN where the nearest original frame is NaN or ``t + lag_s`` is outside the session. New array.
    """
    t, k = np.asarray(t_s, float), np.asarray(k, float)
    if lag_s == 0.0:
        return k.copy()
    tq = t + lag_s
    near = np.clip(np.searchsorted(t, tq), 0, t.size - 1)
    out = np.full(k.shape, np.nan)
    for s in range(k.shape[1]):
        ok = np.isfinite(k[:, s])
        if ok.sum() >= 2:
            out[:, s] = np.interp(tq, t[ok], k[ok, s])
            out[~ok[near], s] = np.nan
    out[(tq < t[0]) | (tq > t[-1])] = np.nan
    return out


def best_lag(sse_of_lag, lags_s) -> float:
    """The lag (s) of ``lags_s`` with the smallest ``sse_of_lag(lag)``, refined by a parabola through
    the best grid point and its neighbours (within the grid)."""
    lags = list(lags_s)
    sse = [float(sse_of_lag(g)) for g in lags]
    i = int(np.argmin(sse))
    if 0 < i < len(lags) - 1:
        (x0, x1, x2), (y0, y1, y2) = lags[i - 1:i + 2], sse[i - 1:i + 2]
        den = (x0 - x1) * (x0 - x2) * (x1 - x2)
        a = (x2 * (y1 - y0) + x1 * (y0 - y2) + x0 * (y2 - y1)) / den
        b = (x2 * x2 * (y0 - y1) + x1 * x1 * (y2 - y0) + x0 * x0 * (y1 - y2)) / den
        if a > 0:
            return float(min(max(-b / (2 * a), x0), x2))
    return float(lags[i])


def fit_hysteresis(u, x, *, rate_hz: float, creep_gains, creep_taus_s, heldout_fraction: float = 0.25,
                   holds=()):
    """Every segment's PI part fitted as the compensator (:func:`fit_inverse_pi`), creep taken out first.

    Parameters
    ----------
    u : ndarray, shape (N, S)
        Static signal from the reference (units of x), finite.
    x : ndarray, shape (N, S)
        Reading (relative resistance change); NaN frames are not fitted.
    rate_hz : float
        Frame rate, Hz.
    creep_gains, creep_taus_s : array_like, shape (S,)
        One creep term per segment (gain 0: none), time constants in s.
    heldout_fraction : float
        The last fraction of the frames is left out (for scoring by the caller).
    holds : sequence of (ndarray (M, S), ndarray (M, S))
        Other recordings as ``extra`` rows of :func:`fit_inverse_pi`: reading with the creep already
        taken out, static signal (NaN where unknown); none: the motion alone.

    Returns
    -------
    (list of (thresholds, weights), float, int)
        Forward PI parameters per segment (``((0,), (1,))`` where nothing
        could be fitted), the total sum of squared residuals, the number of
        training frames.
    """
    g = np.asarray(creep_gains, float)
    tau = np.where(g != 0, np.asarray(creep_taus_s, float), 1.0)
    y = Relaxation(g[:, None], tau[:, None], rate_hz=rate_hz, inverse=True).process(x)
    n = y.shape[0]
    n_train = n - int(round(heldout_fraction * n))
    yf = fill_gaps(np.arange(n) / rate_hz, y)
    out, total = [], 0.0
    for s in range(y.shape[1]):
        rows = np.isfinite(y[:, s]) & (np.arange(n) < n_train)
        span = float(np.ptp(yf[:n_train, s]))
        if rows.sum() < 20 or not span > 0:
            out.append(((0.0,), (1.0,)))
            continue
        extra = [(yh[:, s], uh[:, s]) for yh, uh in holds if np.isfinite(uh[:, s]).any()]
        r, w, sse = fit_inverse_pi(yf[:, s], u[:, s], rows, [0.0] + [f * span for f in INVERSE_FRACTIONS], extra)
        out.append((r, w))
        total += sse
    return out, total, n_train


def fill_gaps(t: np.ndarray, a: np.ndarray) -> np.ndarray:
    """``a`` (N, S) with NaN filled by linear interpolation in time per column (0 where a column has nothing)."""
    out = np.array(a, dtype=float)
    for s in range(out.shape[1]):
        ok = np.isfinite(out[:, s])
        out[~ok, s] = np.interp(t[~ok], t[ok], out[ok, s]) if ok.any() else 0.0
    return out


def smooth_in_time(t: np.ndarray, k: np.ndarray, *, sigma_s: float) -> np.ndarray:
    """``k`` (N, S) at even times ``t`` (s) smoothed by a Gaussian of ``sigma_s`` (s), zero phase; NaN kept."""
    from scipy.ndimage import gaussian_filter1d

    k = np.asarray(k, dtype=float)
    sigma = sigma_s / float(np.median(np.diff(t))) if len(t) > 1 else 0.0
    out = gaussian_filter1d(fill_gaps(t, k), sigma, axis=0, mode="nearest") if sigma >= 0.5 else k.copy()
    out[~np.isfinite(k)] = np.nan
    return out


def invert_static_law(calibration, curvature_per_m, *, n_grid: int = 4001) -> np.ndarray:
    """Relative resistance change ``x`` (N, S) the static law of ``calibration`` (a
    :class:`~acquire.core.calibration.Calibration`) maps to ``curvature_per_m`` (N, S).

    The law is monotone increasing (checked when fitted) and continues as a
    straight line beyond the fitted range, so the inverse is a table
    interpolation inside a wide grid and the edge slopes beyond it. NaN stays NaN.
    """
    k = np.asarray(curvature_per_m, dtype=float)
    out = np.full(k.shape, np.nan)
    for s in range(calibration.n_segments):
        lo, hi = float(calibration.x_min[s]), float(calibration.x_max[s])
        pad = max(hi - lo, 1e-6)
        # the law's kinks (flat, the fitted edges) are grid points: exact there, not interpolated across
        xg = np.union1d(np.linspace(max(lo - pad, -0.99), hi + pad, n_grid), [lo, 0.0, hi])
        col = np.zeros((xg.size, calibration.n_segments))
        col[:, s] = xg
        kg = calibration.curvature_per_m(calibration.r0_ohm * (1.0 + col))[:, s]
        inside = np.interp(k[:, s], kg, xg)
        slope_lo = (xg[1] - xg[0]) / (kg[1] - kg[0])
        slope_hi = (xg[-1] - xg[-2]) / (kg[-1] - kg[-2])
        below, above = k[:, s] < kg[0], k[:, s] > kg[-1]
        inside[below] = xg[0] + (k[below, s] - kg[0]) * slope_lo
        inside[above] = xg[-1] + (k[above, s] - kg[-1]) * slope_hi
        out[:, s] = np.where(np.isfinite(k[:, s]), inside, np.nan)
    return out


def decimate(u, x, *, rate_hz: float, target_hz: float):
    """Every k-th frame of ``u`` and ``x`` (about ``target_hz``; plays do not depend on the rate): u, x, rate, k."""
    k = max(1, int(rate_hz // target_hz))
    return u[::k], x[::k], rate_hz / k, k


def creep_terms(gains, taus_s):
    """(gains, taus) (S,) as arrays, 0 and 1 s where a segment has no creep (NaN in: none)."""
    g = np.nan_to_num(np.asarray(gains, float))
    tau = np.nan_to_num(np.asarray(taus_s, float), nan=1.0)
    return g, np.where(g != 0, tau, 1.0)
