"""Identification of a strip's memory (PI hysteresis and creep) from data with a known input.

Given a recording where the memory-free static signal ``u`` is known (for
example a reference curvature mapped through the static calibration) and the
measured relative resistance change ``x``, :func:`fit_memory` identifies per
segment the model of :mod:`acquire.core.memory`::

    x = C_{c, tau}[ sum_k w_k F_{r_k}[u] ],   C: x = y + sum_m c_m (z_m - y)

- the PI thresholds ``r_k`` are a grid given by the caller; the weights are
  linear in the model, so with the creep fixed they are a bounded linear
  least-squares problem over the play outputs (``scipy.optimize.lsq_linear``;
  ``w_k >= 0``, ``w_0`` bounded away from 0 so the PI stays invertible);
- with the time constants fixed, the model is linear in the creep gains for
  fixed weights and in the weights for fixed gains (the relaxation is a linear
  filter of ``y = P w``): alternating least squares, on the R factor of one QR
  decomposition of all regressors so each step is tiny;
- each time constant is found by a 1-D search: the caller's grid, then a
  bounded scalar refinement in log(tau) between the best point's neighbours.
  Several creep terms are added greedily.

The last ``heldout_fraction`` of the frames is not used for fitting; the
report compares the held-out error of the static-only model (best gain,
no memory) with that of the fitted memory, both run causally from the start.

Threads: pure, any thread. Returned objects are new and owned by the caller.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import ndimage, optimize, signal

from .memory import PIOperator, PlayOperator, SegmentMemory, StripMemory

__all__ = ["fit_memory", "MemoryFitReport", "SegmentFitReport", "hysteresis_band", "HoldStep", "CreepStepsFit",
           "fit_creep_steps"]

_W0_MIN_REL = 1e-3  # w_0 lower bound, relative to the static gain: keeps the inverse PI bounded
_CREEP_SUM_MAX = 0.9  # cap on sum of creep gains: instantaneous gain >= 0.1 (inverse gain <= 10)
# a hold must last 3 time constants (95 % settled) to show a creep term. Common practice, no source.
_HOLD_TAUS = 3.0
_HOLD_TOL_REL = 1e-2  # u staying within this fraction of its range counts as a hold


@dataclass(frozen=True)
class SegmentFitReport:
    """Fit figures of one segment (percentages of the segment's range of x)."""

    segment: int
    static_gain: float  # best x ~ g u on the training part (the static-only model)
    creep_gains: tuple
    creep_taus_s: tuple
    creep_pct: float  # 100 |sum c_m|: creep after a full-range step, % of the step
    hysteresis_band_pct: float  # widest vertical band of the PI's major loop over u's range, %
    heldout_rms_static_pct: float
    heldout_rms_memory_pct: float
    longest_hold_s: float
    largest_reversal: float  # smallest of the largest rise and largest fall of u, units of u
    warnings: tuple


@dataclass(frozen=True)
class MemoryFitReport:
    """Report of :func:`fit_memory` (immutable; any thread)."""

    segments: tuple
    rate_hz: float
    n_train: int
    n_heldout: int

    @property
    def warnings(self) -> tuple:
        """All segments' warnings, one line each."""
        return tuple(w for s in self.segments for w in s.warnings)

    def to_dict(self) -> dict:
        """JSON-able dict."""
        return {"rate_hz": self.rate_hz, "n_train": self.n_train, "n_heldout": self.n_heldout,
                "segments": [asdict(s) for s in self.segments]}

    def text(self) -> str:
        """A table for people, one line per segment, then the warnings."""
        lines = ["seg  creep%  tau_s    band%  held-out rms% static -> memory"]
        for s in self.segments:
            tau = ",".join(f"{t:.3g}" for t in s.creep_taus_s) or "-"
            lines.append(f"{s.segment:>3} {s.creep_pct:7.2f}  {tau:<8} {s.hysteresis_band_pct:6.2f}"
                         f"  {s.heldout_rms_static_pct:8.3f} -> {s.heldout_rms_memory_pct:.3f}")
        return "\n".join(lines + [f"warning: {w}" for w in self.warnings])


def hysteresis_band(segment: SegmentMemory, u_min: float, u_max: float, *, n_points: int = 2001) -> float:
    """Widest vertical band of the PI part's major loop, as a fraction of its output range.

    The loop is u_min -> u_max -> u_min -> u_max from rest at u_min; the band
    is the largest gap between the descending and the ascending branch at the
    same input, divided by the closed loop's output span. Creep is not
    included (rate-independent part only).
    """
    if not u_max > u_min:
        return 0.0
    up = np.linspace(u_min, u_max, n_points)
    u = np.concatenate((up, up[::-1], up))[:, None]
    y = PIOperator(segment.pi_thresholds[None, :], segment.pi_weights[None, :]).process(u)[:, 0]
    desc, asc = y[n_points:2 * n_points][::-1], y[2 * n_points:]
    span = y[n_points:].max() - y[n_points:].min()  # the closed loop, not the initial curve
    return float(np.max(desc - asc) / span) if span > 0 else 0.0


def fit_memory(u, x, *, rate_hz: float, thresholds, taus_s, n_creep: int = 1,
               heldout_fraction: float = 0.25, hold_tol=None, max_iter: int = 60):
    """Identify per-segment PI hysteresis and creep from a known input.

    Parameters
    ----------
    u : array_like, shape (N, S)
        Memory-free static signal (units of x), finite, frames at ``rate_hz``.
    x : array_like, shape (N, S)
        Measured relative resistance change; NaN frames are left out.
    rate_hz : float
        Frame rate, Hz.
    thresholds : array_like, shape (K,)
        PI threshold grid, units of u, increasing; 0 is added if missing.
    taus_s : array_like
        Grid of creep time constants to search, s (e.g. 0.3, 1, 3, 10).
    n_creep : int
        Number of creep terms (0: hysteresis only), added greedily.
    heldout_fraction : float
        Last fraction of the frames kept out of the fit for the report.
    hold_tol : float, optional
        Width of the band u must stay in to count as a hold (units of u);
        default 1 % of u's range.
    max_iter : int
        Alternating least-squares iterations per evaluation.

    Returns
    -------
    (StripMemory, MemoryFitReport)
    """
    u, x = _check_data(u, x)
    r, taus = _check_grids(thresholds, taus_s, n_creep)
    if not (math.isfinite(rate_hz) and rate_hz > 0):
        raise ValueError(f"rate_hz: must be positive, got {rate_hz}")
    if not 0 <= heldout_fraction < 0.9:
        raise ValueError(f"heldout_fraction: must be in [0, 0.9), got {heldout_fraction}")
    n = u.shape[0]
    n_train = n - int(round(heldout_fraction * n))
    if n_train < 20:
        raise ValueError(f"u: too few frames to fit ({n_train} for training)")
    segs, reps = [], []
    for s in range(u.shape[1]):
        seg, rep = _fit_segment(u[:, s], x[:, s], s, rate_hz=float(rate_hz), r=r, taus=taus,
                                n_creep=n_creep, n_train=n_train, hold_tol=hold_tol, max_iter=max_iter)
        segs.append(seg)
        reps.append(rep)
    report = MemoryFitReport(tuple(reps), float(rate_hz), n_train, n - n_train)
    return StripMemory(segs), report


def _check_data(u, x):
    u, x = np.asarray(u, dtype=float), np.asarray(x, dtype=float)
    if u.ndim != 2 or x.shape != u.shape:
        raise ValueError(f"x: shape {x.shape} must equal u's {u.shape}, (frames, segments)")
    if not np.all(np.isfinite(u)):
        raise ValueError("u: must be finite (the known static input)")
    if np.any(np.isinf(x)):
        raise ValueError("x: must be finite or NaN")
    return u, x


def _check_grids(thresholds, taus_s, n_creep):
    r = np.array(thresholds, dtype=float, ndmin=1)
    if r.ndim != 1 or not np.all(np.isfinite(r)) or np.any(r < 0) or np.any(np.diff(r) <= 0):
        raise ValueError("thresholds: need increasing finite values >= 0")
    if r[0] != 0:
        r = np.concatenate(([0.0], r))
    taus = np.array(taus_s, dtype=float, ndmin=1)
    if int(n_creep) != n_creep or n_creep < 0:
        raise ValueError(f"n_creep: must be a whole number >= 0, got {n_creep}")
    if n_creep and (taus.ndim != 1 or taus.size == 0 or not np.all(np.isfinite(taus)) or np.any(taus <= 0)):
        raise ValueError("taus_s: need a non-empty grid of positive time constants, s")
    return r, np.unique(taus)


def _lowpass_dev(p: np.ndarray, a: float) -> np.ndarray:
    """``z - p`` with ``z[n] = a z[n-1] + (1 - a) p[n-1]`` started at rest (zero-order hold)."""
    z, _ = signal.lfilter([0.0, 1.0 - a], [1.0, -a], p, axis=0, zi=p[:1])
    return z - p


class _Problem:
    """One segment's regressors on the training rows; evaluates taus by alternating least squares."""

    def __init__(self, plays, x, rows, dt_s, w0_min, max_iter):
        self.plays, self.x, self.rows, self.dt_s = plays, x, rows, dt_s
        self.k, self.max_iter = plays.shape[1], max_iter
        self.lb = np.zeros(self.k)
        self.lb[0] = w0_min
        self._dev: dict = {}

    def dev(self, tau: float) -> np.ndarray:
        if tau not in self._dev:
            self._dev[tau] = _lowpass_dev(self.plays, math.exp(-self.dt_s / tau))[self.rows]
        return self._dev[tau]

    def solve(self, taus):
        """(weights, gains, sum of squared residuals, gains capped?) for creep time constants ``taus``."""
        cols = [self.plays[self.rows]] + [self.dev(t) for t in taus] + [self.x[self.rows, None]]
        rr = np.linalg.qr(np.hstack(cols), mode="r")  # same minimisers, tiny matrices
        k, m = self.k, len(taus)
        pm, xr = rr[:, :k], rr[:, -1]
        devs = [rr[:, k * (i + 1):k * (i + 2)] for i in range(m)]
        c, capped, w = np.zeros(m), False, None
        for _ in range(self.max_iter):
            a = pm + sum(ci * d for ci, d in zip(c, devs))
            w_new = optimize.lsq_linear(a, xr, bounds=(self.lb, np.inf), method="bvls").x
            if m:
                g = np.column_stack([d @ w_new for d in devs])
                c_new = np.linalg.lstsq(g, xr - pm @ w_new, rcond=None)[0]
                if c_new.sum() > _CREEP_SUM_MAX:
                    c_new, capped = c_new * (_CREEP_SUM_MAX / c_new.sum()), True
            else:
                c_new = c
            done = w is not None and np.allclose(w_new, w, rtol=1e-7, atol=1e-12) and np.allclose(
                c_new, c, rtol=1e-7, atol=1e-12)
            w, c = w_new, c_new
            if done:
                break
        a = pm + sum(ci * d for ci, d in zip(c, devs))
        return w, c, float(np.sum((a @ w - xr) ** 2)), capped

    def search_tau(self, fixed, grid):
        """Best time constant for a new term given ``fixed`` ones: grid, then refinement in log tau."""
        losses = [self.solve(fixed + [t])[2] for t in grid]
        i = int(np.argmin(losses))
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
        best, best_loss = grid[i], losses[i]
        if hi > lo:
            res = optimize.minimize_scalar(lambda lt: self.solve(fixed + [math.exp(lt)])[2],
                                           bounds=(math.log(lo), math.log(hi)), method="bounded",
                                           options={"xatol": 1e-3})
            if res.fun < best_loss:
                best = math.exp(res.x)
        at_edge = len(grid) > 1 and (best <= grid[0] * 1.001 or best >= grid[-1] / 1.001)
        return best, at_edge


def _fit_segment(u, x, s, *, rate_hz, r, taus, n_creep, n_train, hold_tol, max_iter):
    """(SegmentMemory, SegmentFitReport) for one segment."""
    dt_s = 1.0 / rate_hz
    train = np.zeros(u.size, bool)
    train[:n_train] = True
    rows = train & np.isfinite(x)
    span_u = float(np.ptp(u[:n_train]))
    gain = float(np.dot(u[rows], x[rows]) / np.dot(u[rows], u[rows])) if np.any(u[rows]) else 0.0
    warns = []
    if rows.sum() < 20 or span_u <= 0 or gain <= 0:
        warns.append(f"segment {s}: input does not move or x does not follow it: no memory fitted")
        seg = SegmentMemory()
    else:
        seg, more = _fit_parameters(u, x, rows, dt_s=dt_s, r=r, taus=taus, n_creep=n_creep,
                                    w0_min=_W0_MIN_REL * gain, max_iter=max_iter, s=s)
        warns += more
    return seg, _segment_report(u, x, s, seg, gain, n_train=n_train, rate_hz=rate_hz,
                                hold_tol=hold_tol, warns=warns)


def _fit_parameters(u, x, rows, *, dt_s, r, taus, n_creep, w0_min, max_iter, s):
    plays = PlayOperator(r[None, :]).process(u[:, None])[:, 0, :]
    prob = _Problem(plays, x, rows, dt_s, w0_min, max_iter)
    fixed, warns = [], []
    for _ in range(n_creep):
        tau, at_edge = prob.search_tau(fixed, list(taus))
        fixed.append(tau)
        if at_edge:
            warns.append(f"segment {s}: creep time constant {tau:.3g} s is at the edge of the "
                         f"searched grid ({taus[0]:.3g} to {taus[-1]:.3g} s)")
    w, c, _, capped = prob.solve(fixed)
    if capped:
        warns.append(f"segment {s}: creep gains capped at a sum of {_CREEP_SUM_MAX} (inverse gain <= 10)")
    if w[0] <= w0_min * 1.0001:
        warns.append(f"segment {s}: linear PI weight at its lower bound: the compensation amplifies noise")
    order = np.argsort(fixed)
    seg = SegmentMemory(r, w, c[order], np.asarray(fixed)[order])
    return seg, warns


def _longest_hold(u: np.ndarray, tol: float) -> int:
    """Longest run of frames (a window) whose input stays within a band of width ``tol``."""

    def exists(d):  # some window of d frames with max - min <= tol
        if d > u.size:
            return False
        lo = ndimage.minimum_filter1d(u, d, mode="nearest")
        hi = ndimage.maximum_filter1d(u, d, mode="nearest")
        ok = slice(d // 2, u.size - (d - 1) // 2)  # full windows only
        return bool(np.any(hi[ok] - lo[ok] <= tol))

    good, bad = 1, u.size + 1
    while bad - good > 1:  # bisection: holds of every shorter length exist too
        mid = (good + bad) // 2
        good, bad = (mid, bad) if exists(mid) else (good, mid)
    return good


def _largest_reversal(u: np.ndarray) -> float:
    """Smallest of the largest rise (after a minimum) and the largest fall (after a maximum)."""
    rise = float(np.max(u - np.minimum.accumulate(u)))
    fall = float(np.max(np.maximum.accumulate(u) - u))
    return min(rise, fall)


def _segment_report(u, x, s, seg, gain, *, n_train, rate_hz, hold_tol, warns):
    ut = u[:n_train]
    tol = hold_tol if hold_tol is not None else _HOLD_TOL_REL * float(np.ptp(ut))
    hold_s, reversal = _longest_hold(ut, tol) / rate_hz, _largest_reversal(ut)
    r = seg.pi_thresholds
    unseen = r[(2 * r >= reversal) & (seg.pi_weights != 0) & (r > 0)]
    if r.size > 1 and 2 * r[-1] >= reversal:
        warns.append(f"segment {s}: the input never reverses by more than 2 x the largest threshold "
                     f"({reversal:.3g} <= {2 * r[-1]:.3g}): unloading not seen, weights of thresholds "
                     f">= {unseen.min() if unseen.size else r[-1]:.3g} are not identified")
    for tau in seg.creep_taus_s:
        if hold_s < _HOLD_TAUS * tau:
            warns.append(f"segment {s}: no hold of at least {_HOLD_TAUS} x tau = {_HOLD_TAUS * tau:.3g} s "
                         f"(longest {hold_s:.3g} s): creep not identifiable")
    try:
        sim = StripMemory([seg]).forward(u[:, None], rate_hz=rate_hz)[:, 0]
        StripMemory([seg]).compensator(rate_hz=rate_hz)
    except ValueError as exc:
        warns.append(f"segment {s}: {exc}")
        sim = np.full_like(u, np.nan)
    held = np.arange(u.size) >= n_train
    held &= np.isfinite(x)
    span_x = float(np.nanmax(x) - np.nanmin(x)) or 1.0

    def rms_pct(err):
        return float(100 * np.sqrt(np.mean(err[held] ** 2)) / span_x) if held.any() else math.nan

    return SegmentFitReport(
        segment=s, static_gain=gain, creep_gains=tuple(map(float, seg.creep_gains)),
        creep_taus_s=tuple(map(float, seg.creep_taus_s)),
        creep_pct=float(100 * abs(seg.creep_gains.sum())),
        hysteresis_band_pct=100 * hysteresis_band(seg, float(ut.min()), float(ut.max())),
        heldout_rms_static_pct=rms_pct(x - gain * u), heldout_rms_memory_pct=rms_pct(x - sim),
        longest_hold_s=hold_s, largest_reversal=reversal, warnings=tuple(warns))


# ----------------------------------------------------------------------------- creep from holds

#: a step smaller than this fraction of the segment's range of hold levels says little about creep
#: (common practice, no source)
_MIN_STEP_FRAC = 0.1
#: creep gains below this (1 % of a step) are not told apart from noise and filter settling by
#: holds of a few seconds (common practice, no source)
_MIN_CREEP = 0.01
# a hold of one tau shows 63 % of the creep; the chain's later holds pin the rest of the tail
# (made-up data in the tests: within 10 % with holds of 1.9 tau; the virtual finger's real strip,
# tau 4 s, within about 25 % with holds of 1.5 tau). Common practice, no source.
_STEP_TAUS = 1.0
_ROWS_PER_HOLD = 80  # frames per hold used by the creep fit (evenly spaced): a smooth transient needs few


@dataclass(frozen=True)
class HoldStep:
    """One hold of a recording, for :func:`fit_creep_steps`.

    Attributes
    ----------
    t_step_s : float
        When the jig was applied (the middle of the move into the hold), s.
    t_start_s, t_end_s : float
        The frames of the hold used by the fit (after the move), s.
    chained : bool
        The level before the step is the previous hold's (one move between them,
        nothing else); False for the first hold and after unlabelled motion.
    """

    t_step_s: float
    t_start_s: float
    t_end_s: float
    chained: bool


@dataclass(frozen=True)
class CreepStepsFit:
    """Creep identified from the steps between holds, per segment (:func:`fit_creep_steps`).

    ``gains[s]`` is ``c`` of :class:`~acquire.core.memory.Relaxation` (after a
    step D the reading still moves by ``c D`` with time constant ``taus_s[s]``);
    0 where no creep was seen. ``levels`` (H, S): the settled level of each
    hold, units of x (NaN where the hold had no frames).
    """

    gains: np.ndarray
    taus_s: np.ndarray
    n_steps: np.ndarray
    levels: np.ndarray
    warnings: tuple


def _step_rows(t_s, steps, exclude):
    """Frame indices used (evenly thinned per hold) and the hold of each."""
    rows, hold = [], []
    for h, st in enumerate(steps):
        if h in exclude:
            continue
        idx = np.flatnonzero((t_s >= st.t_start_s) & (t_s <= st.t_end_s))
        if idx.size > _ROWS_PER_HOLD:
            idx = idx[np.linspace(0, idx.size - 1, _ROWS_PER_HOLD).round().astype(int)]
        rows.append(idx)
        hold.append(np.full(idx.size, h))
    return np.concatenate(rows or [np.zeros(0, int)]), np.concatenate(hold or [np.zeros(0, int)])


def _step_tails(t_rows, hold_rows, steps, tau):
    """Each hold's creep tail over its chain, (rows, H): ``exp(-(t - t_step) / tau)`` after its step."""
    chain = np.cumsum([not st.chained for st in steps])
    a = np.zeros((t_rows.size, len(steps)))
    for h, st in enumerate(steps):
        on = (hold_rows >= h) & (chain[hold_rows] == chain[h])
        a[on, h] = np.exp(-(t_rows[on] - st.t_step_s) / tau)
    return a


def _within(v, starts, counts):
    """Hold means of ``v`` (rows grouped by hold, contiguous) and ``v`` minus its hold's mean."""
    means = np.add.reduceat(v, starts, axis=0) / counts[:, None]
    return means, v - np.repeat(means, counts, axis=0)


def _solve_tails(tails, x, hold_rows, n_holds):
    """Levels (H, S), tail amplitudes (H, S) and residual sum of squares (S,) for x (rows, S).

    The level of each hold is eliminated by taking hold means out (the
    within-group least-squares solution), leaving a system in the tails alone:
    the same minimiser as the full design, on an H x H matrix.
    """
    used, starts, counts = np.unique(hold_rows, return_index=True, return_counts=True)
    t_means, t_dev = _within(tails, starts, counts)
    x_means, x_dev = _within(x, starts, counts)
    amp = np.linalg.lstsq(t_dev.T @ t_dev, t_dev.T @ x_dev, rcond=1e-12)[0]
    ssr = np.sum((x_dev - t_dev @ amp) ** 2, axis=0)
    levels = np.full((n_holds, x.shape[1]), np.nan)
    levels[used] = x_means - t_means @ amp
    return levels, amp, ssr


def fit_creep_steps(t_s, x, steps, *, taus_s, exclude=()):
    """Creep gain and time constant per segment from the transients at the start of holds.

    Between holds the reading is modelled as a step at each hold's
    ``t_step_s`` (the move's middle: a ramp of T seconds acts as a step at its
    middle to within (T / tau)^2 / 24, the first-order lag's ramp response) and,
    within a chain of holds, as the first-order relaxation of
    :class:`~acquire.core.memory.Relaxation`: ``x(t) = y_h - sum_j c D_j
    exp(-(t - t_j) / tau)`` over the earlier steps j of the chain, ``D_j = y_j -
    y_{j-1}`` the change of settled level. For a fixed tau this is linear in the
    levels ``y_h`` and the tail amplitudes ``b_j = -c D_j`` (least squares,
    tails free); tau minimises the residual over ``taus_s`` then a bounded
    search in log tau; ``c`` is the least-squares slope of ``-b_j`` on ``D_j``
    over chained steps of at least 10 % of the levels' range.

    Parameters
    ----------
    t_s : array_like, shape (N,)
        Frame times, s.
    x : array_like, shape (N, S)
        Relative resistance change ``R / r0 - 1``; NaN frames are left out.
    steps : sequence of HoldStep
        The holds, in time order.
    taus_s : array_like
        Grid of time constants to search, s.
    exclude : collection of int
        Holds left out (for leave-one-hold-out checks).

    Returns
    -------
    CreepStepsFit
    """
    t, x = np.asarray(t_s, float), np.asarray(x, float)
    taus = np.unique(np.asarray(taus_s, float))
    steps = list(steps)
    rows, hold_rows = _step_rows(t, steps, set(exclude))
    n_s, n_h = x.shape[1], len(steps)
    gains, best_taus = np.zeros(n_s), np.full(n_s, np.nan)
    n_used, levels = np.zeros(n_s, int), np.full((n_h, n_s), np.nan)
    if not rows.size or not any(st.chained for st in steps):
        return CreepStepsFit(gains, best_taus, n_used, levels,
                             ("no hold follows another one directly: creep not identified",))
    xr, tr = x[rows], t[rows]
    ok = np.isfinite(xr)
    whole = ok.all(axis=1)  # rows every segment can use: the grid is searched once for all of them
    grid_ssr = np.array([_solve_tails(_step_tails(tr[whole], hold_rows[whole], steps, tau), xr[whole],
                                      hold_rows[whole], n_h)[2] for tau in taus])
    warns = []
    for s in range(n_s):
        m = ok[:, s]

        def fit(tau, s=s, m=m):
            return _solve_tails(_step_tails(tr[m], hold_rows[m], steps, tau), xr[m, s:s + 1], hold_rows[m], n_h)

        tau, at_edge = _search_log(lambda v: float(fit(v)[2][0]), taus,
                                   losses=grid_ssr[:, s] if np.array_equal(m, whole) else None)
        lev, amp, _ = fit(tau)
        c, n, levels[:, s] = _creep_gain(lev[:, 0], amp[:, 0], steps, exclude)
        n_used[s] = n
        # the part of the creep the holds' frames show: a tail spent before them is no evidence
        gap = float(np.median([st.t_start_s - st.t_step_s for st in steps]))
        if n and abs(c) * math.exp(-gap / tau) < _MIN_CREEP:
            continue  # nothing seen: no creep term
        more = _creep_warnings(s, c, n, tau, at_edge, steps, taus)
        warns += more
        if n and not more:
            gains[s], best_taus[s] = c, tau
    return CreepStepsFit(gains, best_taus, n_used, levels, tuple(warns))


def _creep_warnings(s, c, n, tau, at_edge, steps, taus):
    if n == 0:
        return [f"segment {s}: no step between holds of at least {100 * _MIN_STEP_FRAC:.0f} % "
                "of the range: creep not identified"]
    longest = max(st.t_end_s - st.t_step_s for st in steps)
    if at_edge or longest < _STEP_TAUS * tau:
        return [f"segment {s}: creep time constant {tau:.3g} s needs holds of at least "
                f"{_STEP_TAUS * tau:.3g} s (longest {longest:.3g} s) or lies at the edge of the "
                f"searched {taus[0]:.3g} to {taus[-1]:.3g} s: creep not identifiable, not used"]
    return []


def _search_log(loss, grid, *, losses=None):
    """Minimiser of ``loss`` over ``grid`` (its values ``losses`` if known), refined in log between
    the best point's neighbours."""
    grid = list(grid)
    losses = [loss(v) for v in grid] if losses is None else list(losses)
    i = int(np.argmin(losses))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
    best = grid[i]
    if hi > lo:
        res = optimize.minimize_scalar(lambda lt: loss(math.exp(lt)), bounds=(math.log(lo), math.log(hi)),
                                       method="bounded", options={"xatol": 1e-3})
        if res.fun < losses[i]:
            best = math.exp(res.x)
    at_edge = len(grid) > 1 and (best <= grid[0] * 1.001 or best >= grid[-1] / 1.001)
    return best, at_edge


def _creep_gain(lev, amp, steps, exclude):
    """(c, steps used, levels) from the fitted levels and tail amplitudes of one segment."""
    n_h = len(steps)
    seen = np.isfinite(lev)
    span = np.nanmax(lev) - np.nanmin(lev) if seen.any() else 0.0
    d, b = [], []
    for h in range(1, n_h):
        if steps[h].chained and seen[h] and seen[h - 1] and h not in exclude and h - 1 not in exclude:
            step = lev[h] - lev[h - 1]
            if span > 0 and abs(step) >= _MIN_STEP_FRAC * span:
                d.append(step)
                b.append(amp[h])
    if not d:
        return 0.0, 0, lev
    d, b = np.array(d), np.array(b)
    return float(-np.dot(b, d) / np.dot(d, d)), len(d), lev
