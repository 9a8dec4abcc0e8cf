"""Time alignment of a camera clock with a recording's device clock.

A filmed motion session has two clocks: the camera's (marker CSV ``t_s``)
and the device's (the recording). They differ by an offset (up to about a
minute) and a rate (up to a few hundred ppm):

    t_device = offset_s + (1 + rate_ppm * 1e-6) * t_camera

:func:`align_clocks` finds both by comparing, per segment, the recording's
relative resistance change with the marker curvature of the same segment.
The two are related by an unknown monotone increasing gain, so each signal
is first replaced by its empirical distribution function (its rank in
[0, 1]), which any such gain leaves unchanged. Then:

1. coarse: both rank signals are averaged into bins of a common uniform
   grid, and for a small set of candidate rates the normalised
   cross-correlation over all offsets is computed with FFTs
   (:mod:`scipy.fft`), counting only lags where the overlap covers at least
   half of the camera's samples;
2. fine: offset and rate are refined with :func:`scipy.optimize.minimize`
   (Nelder-Mead) maximising the mean per-segment Pearson correlation between
   the camera ranks and the recording ranks interpolated at the mapped times.

Everything here is pure (no I/O, no globals) and may run on any thread.
Returned arrays are new and owned by the caller; inputs are not modified.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft
from scipy import optimize
from scipy.ndimage import uniform_filter1d

__all__ = ["AlignmentError", "Alignment", "align_clocks"]

_ADVICE = ("film a session where the finger bends clearly, in both directions, "
           "with pauses of different lengths, and keep the recording running throughout")
_MAX_RATES = 21          # candidate rates of the coarse search at most
_MIN_OVERLAP = 0.5       # share of the camera samples a lag must overlap
_MAX_REFINE_FRAMES = 50_000


class AlignmentError(ValueError):
    """The two clocks cannot be aligned from the data given; one line saying why and what to do."""


@dataclass(frozen=True)
class Alignment:
    """Camera -> device clock mapping ``t_device = offset_s + (1 + rate_ppm*1e-6) * t_cam``.

    Attributes
    ----------
    offset_s : float
        Device time at camera time 0, s.
    rate_ppm : float
        How much faster the device clock runs than the camera's, ppm.
    score : float
        Mean over the used segments of the Pearson correlation between the
        camera and recording rank signals at the solution (1 is perfect).
    sharpness : float
        Peak coarse correlation divided by the best coarse correlation at
        lags farther from the peak than three times its half-width at half
        maximum (at the best coarse rate); capped at 100. Near 1 the match is
        ambiguous (e.g. periodic motion); random motion gives well above 2.
    n_frames_used : int
        Camera frames inside the recording at the solution with a usable value.
    """

    offset_s: float
    rate_ppm: float
    score: float
    sharpness: float
    n_frames_used: int

    def to_device_time(self, t_cam_s) -> np.ndarray:
        """Device time (s, new array) of camera times ``t_cam_s`` (s)."""
        return self.offset_s + (1.0 + self.rate_ppm * 1e-6) * np.asarray(t_cam_s, dtype=float)


def align_clocks(t_rec_s, signal_rec, t_cam_s, signal_cam, *, max_offset_s: float = 60.0,
                 max_rate_ppm: float = 500.0, min_motion_per_m: float = 5.0,
                 min_score: float = 0.5, min_sharpness: float = 2.0,
                 grid_step_s: float | None = None) -> Alignment:
    """Find offset and rate between the camera clock and the device clock.

    Parameters
    ----------
    t_rec_s : array_like, shape (N,)
        Device time of each recording frame, s, strictly increasing.
    signal_rec : array_like, shape (N, S)
        Relative resistance change per segment (any monotone increasing
        function of curvature; units do not matter). NaN allowed.
    t_cam_s : array_like, shape (F,)
        Camera time of each camera frame, s, strictly increasing.
    signal_cam : array_like, shape (F, S)
        Marker curvature per segment, 1/m; NaN where undetermined.
    max_offset_s : float
        Largest |offset_s| searched, s.
    max_rate_ppm : float
        Largest |rate_ppm| searched.
    min_motion_per_m : float
        A segment is used only if its camera curvature spans at least this
        much between its 5th and 95th percentiles, 1/m.
    min_score, min_sharpness : float
        Below these the match is rejected (see :class:`Alignment`).
    grid_step_s : float, optional
        Coarse grid step, s; default the larger of 20 ms and the median camera
        frame interval (widened so that at most 21 candidate rates are needed).

    Returns
    -------
    Alignment

    Raises
    ------
    AlignmentError
        Bad times, no usable segment (too little motion), no possible overlap
        within the limits, or a weak or ambiguous match. One line, with advice.

    Notes
    -----
    Pure; runs on the caller's thread.
    """
    t_rec, x_rec, t_cam, x_cam = _check_inputs(t_rec_s, signal_rec, t_cam_s, signal_cam)
    max_ratio, max_off = float(max_rate_ppm) * 1e-6, float(max_offset_s)
    lo = min(t_cam[0] * (1 - max_ratio), t_cam[0] * (1 + max_ratio)) - max_off
    hi = max(t_cam[-1] * (1 - max_ratio), t_cam[-1] * (1 + max_ratio)) + max_off
    keep = (t_rec >= lo - 1.0) & (t_rec <= hi + 1.0)
    if keep.sum() < 2:
        raise AlignmentError(f"no overlap possible: the recording ({t_rec[0]:.3f} to {t_rec[-1]:.3f} s) "
                             f"does not reach the camera times ({t_cam[0]:.3f} to {t_cam[-1]:.3f} s) "
                             f"within +-{max_off:g} s; check that the files belong together")
    t_rec, x_rec = t_rec[keep], x_rec[keep]
    use = _usable_segments(x_rec, x_cam, float(min_motion_per_m))
    r_rec, r_cam = _ranks(x_rec[:, use]), _ranks(x_cam[:, use])
    cam_dt = float(np.median(np.diff(t_cam)))
    rec_dt = float(np.median(np.diff(t_rec)))
    width = int(round(cam_dt / rec_dt)) | 1             # odd: a centred, zero-phase average
    if width > 1:
        r_rec = _nan_smooth(r_rec, width)
    span = t_cam[-1] - t_cam[0]
    dt = max(grid_step_s or max(0.02, cam_dt), 2 * max_ratio * span / (_MAX_RATES - 1))
    off0, rate0, peak, sharp = _coarse(t_rec, r_rec, t_cam, r_cam, dt, max_off, max_ratio)
    off, rate, score = _refine(t_rec, r_rec, rec_dt, t_cam, r_cam, off0, rate0, dt,
                               max(dt / max(span, dt), 1e-9), max_off, max_ratio)
    t_dev = off + (1 + rate) * t_cam
    n_used = int(((t_dev >= t_rec[0]) & (t_dev <= t_rec[-1]) & np.isfinite(r_cam).any(axis=1)).sum())
    if score < min_score:
        raise AlignmentError(f"the best match correlates only {score:.2f} (need {min_score:g}): "
                             f"the recording and the camera do not show the same motion; {_ADVICE}")
    if sharp < min_sharpness:
        raise AlignmentError(f"the match is not distinct (peak {peak:.2f} is only {sharp:.2f} times the "
                             f"best other; need {min_sharpness:g}), as with repetitive motion; {_ADVICE}")
    return Alignment(offset_s=off, rate_ppm=rate * 1e6, score=float(score), sharpness=sharp,
                     n_frames_used=n_used)


def _check_inputs(t_rec_s, signal_rec, t_cam_s, signal_cam):
    t_rec, t_cam = np.asarray(t_rec_s, dtype=float), np.asarray(t_cam_s, dtype=float)
    x_rec, x_cam = np.asarray(signal_rec, dtype=float), np.asarray(signal_cam, dtype=float)
    x_rec = x_rec[:, None] if x_rec.ndim == 1 else x_rec
    x_cam = x_cam[:, None] if x_cam.ndim == 1 else x_cam
    for name, t, x in (("recording", t_rec, x_rec), ("camera", t_cam, x_cam)):
        if t.ndim != 1 or x.ndim != 2 or x.shape[0] != t.size:
            raise ValueError(f"{name}: times (n,) and signal (n, S) must match, got {t.shape} and {x.shape}")
        if t.size < 3:
            raise AlignmentError(f"the {name} has only {t.size} frames; {_ADVICE}")
        if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
            raise AlignmentError(f"the {name} times are not finite and strictly increasing")
    if x_rec.shape[1] != x_cam.shape[1]:
        raise ValueError(f"recording has {x_rec.shape[1]} segments, camera {x_cam.shape[1]}")
    return t_rec, x_rec, t_cam, x_cam


def _usable_segments(x_rec, x_cam, min_motion):
    """Segments with enough camera motion and a recording signal that varies."""
    spread = np.array([np.ptp(np.nanpercentile(c, [5, 95])) if np.isfinite(c).sum() > 2 else 0.0
                       for c in x_cam.T])
    varies = np.array([np.isfinite(r).sum() > 2 and np.nanstd(r) > 0 for r in x_rec.T])
    use = (spread >= min_motion) & varies
    if not use.any():
        raise AlignmentError(f"too little motion to align: the marker curvature spans at most "
                             f"{np.nanmax(np.append(spread, 0)):.2g} 1/m per segment (need "
                             f"{min_motion:g}) or the recording does not vary; {_ADVICE}")
    return use


def _ranks(x, n_q: int = 1001):
    """Empirical distribution function per column, in [0, 1]; NaN stays NaN.

    Quantiles of (a subsample of) the finite values and linear interpolation:
    O(n) and invariant to any monotone increasing gain.
    """
    out = np.full(x.shape, np.nan)
    probs = np.linspace(0.0, 1.0, n_q)
    for c in range(x.shape[1]):
        col = x[:, c]
        fin = np.isfinite(col)
        vals = col[fin][:: max(1, int(fin.sum()) // 200_000)]
        q, first = np.unique(np.quantile(vals, probs), return_index=True)
        out[fin, c] = np.interp(col[fin], q, probs[first]) if q.size > 1 else 0.5
    return out


def _nan_smooth(x, width):
    """Centred moving average along axis 0, ignoring NaN."""
    fin = np.isfinite(x)
    num = uniform_filter1d(np.where(fin, x, 0.0), width, axis=0, mode="nearest")
    den = uniform_filter1d(fin.astype(float), width, axis=0, mode="nearest")
    return np.where(fin & (den > 0), num / np.maximum(den, 1e-12), np.nan)


def _bin(t, x, t0, dt, n):
    """Per-column means of x in bins [t0 + i dt, t0 + (i+1) dt), i < n; standardised.

    Returns (values (S, n) with 0 where empty, mask (S, n) float)."""
    i = np.floor((t - t0) / dt).astype(np.int64)
    inside = (i >= 0) & (i < n)
    vals, mask = np.zeros((x.shape[1], n)), np.zeros((x.shape[1], n))
    for c in range(x.shape[1]):
        fin = inside & np.isfinite(x[:, c])
        cnt = np.bincount(i[fin], minlength=n)[:n]
        tot = np.bincount(i[fin], weights=x[fin, c], minlength=n)[:n]
        m = cnt > 0
        if m.sum() > 1:
            v = tot[m] / cnt[m]
            vals[c, m] = (v - v.mean()) / max(v.std(), 1e-12)
            mask[c, m] = 1.0
    return vals, mask


def _coarse(t_rec, r_rec, t_cam, r_cam, dt, max_off, max_ratio):
    """Best (offset, rate) on the grid, its correlation and sharpness (FFT cross-correlation)."""
    t0 = t_rec[0]
    n_a = int(np.floor((t_rec[-1] - t0) / dt)) + 1
    a, ma = _bin(t_rec, r_rec, t0, dt, n_a)
    n_b = int(np.ceil((t_cam[-1] - t_cam[0]) * (1 + max_ratio) / dt)) + 1
    n_fft = sfft.next_fast_len(n_a + n_b)
    A, A2, MA = (sfft.rfft(v, n_fft, axis=1) for v in (a, a * a, ma))
    lag = np.arange(n_fft)
    lag = np.where(lag < n_a, lag, lag - n_fft)           # circular index -> lag in bins
    rates = np.linspace(-max_ratio, max_ratio, min(_MAX_RATES, max(1, int(np.ceil(
        2 * max_ratio * (t_cam[-1] - t_cam[0]) / dt)) + 1))) if max_ratio > 0 else np.zeros(1)
    best = (-np.inf, None)
    for rate in rates:
        u = (1 + rate) * t_cam
        b, mb = _bin(u, r_cam, u[0], dt, n_b)
        B, B2, MB = (np.conj(sfft.rfft(v, n_fft, axis=1)) for v in (b, b * b, mb))
        num, ea, eb, n = (sfft.irfft((X * Y).sum(axis=0), n_fft)
                          for X, Y in ((A, B), (A2, MB), (MA, B2), (MA, MB)))
        off = t0 + lag * dt - u[0]
        ok = (np.abs(off) <= max_off) & (n >= _MIN_OVERLAP * mb.sum()) & (ea > 0) & (eb > 0)
        ncc = np.where(ok, num / np.sqrt(np.maximum(ea * eb, 1e-300)), -np.inf)
        i = int(np.argmax(ncc))
        if ncc[i] > best[0]:
            best = (ncc[i], (off[i], rate, ncc, lag, i))
    if best[1] is None or not np.isfinite(best[0]):
        raise AlignmentError(f"no overlap possible: within +-{max_off:g} s the camera times never "
                             f"cover half of their span inside the recording; check that the files "
                             f"belong together or raise max_offset_s")
    off, rate, ncc, lag, i = best[1]
    return off, rate, best[0], _sharpness(ncc, lag, i)


def _sharpness(ncc, lag, i):
    """Peak / best correlation farther from the peak than 3 half-widths at half maximum; <= 100."""
    order = np.argsort(lag)
    c, k = ncc[order], int(np.flatnonzero(order == i)[0])
    peak = c[k]
    below = np.flatnonzero(c <= 0.5 * peak)
    left, right = below[below < k], below[below > k]
    half = max(k - (left[-1] if left.size else 0), (right[0] if right.size else c.size - 1) - k, 1)
    outside = np.concatenate([c[:max(k - 3 * half, 0)], c[k + 3 * half + 1:]])
    outside = outside[np.isfinite(outside)]
    other = outside.max() if outside.size else 0.0
    return float(min(peak / max(other, peak / 100.0), 100.0))


def _refine(t_rec, r_rec, rec_dt, t_cam, r_cam, off0, rate0, dt, drate, max_off, max_ratio):
    """Nelder-Mead on (offset at the camera mid time, rate), maximising mean correlation.

    The recording ranks are put once on a uniform grid (step rec_dt) so that
    each evaluation interpolates by index.
    """
    step = max(1, t_cam.size // _MAX_REFINE_FRAMES)
    tc, rc = t_cam[::step], r_cam[::step]
    t_mid = float(np.median(tc))
    scale = np.array([dt, drate])
    n_grid = int((t_rec[-1] - t_rec[0]) / rec_dt) + 1
    t_grid = t_rec[0] + np.arange(n_grid) * rec_dt
    grid = np.stack([np.interp(t_grid, t_rec, r_rec[:, c]) for c in range(r_rec.shape[1])], axis=1)
    # frames lost on the link: no straight line across the gap
    j = np.clip(np.searchsorted(t_rec, t_grid, side="right"), 1, t_rec.size - 1)
    grid[np.diff(t_rec)[j - 1] > 2.5 * rec_dt] = np.nan

    def corr(x):
        off_mid, rate = x * scale
        u = (off_mid + (1 + rate) * (tc - t_mid) - t_rec[0]) / rec_dt
        inside = (u >= 0) & (u <= n_grid - 1)
        # the rate stays within its stated bound (2 % slack): a step-sized margin would double it on short films
        if (abs(off_mid - (1 + rate) * t_mid) > max_off + dt or abs(rate) > 1.02 * max_ratio + 1e-9
                or inside.sum() < _MIN_OVERLAP * tc.size):
            return 1.0
        i = np.minimum(u[inside].astype(np.int64), n_grid - 2)
        f = (u[inside] - i)[:, None]
        xr, y = grid[i] * (1 - f) + grid[i + 1] * f, rc[inside]
        scores = []
        for c in range(rc.shape[1]):
            fin = np.isfinite(y[:, c]) & np.isfinite(xr[:, c])
            if fin.sum() > 2 and np.std(y[fin, c]) > 0 and np.std(xr[fin, c]) > 0:
                scores.append(np.corrcoef(xr[fin, c], y[fin, c])[0, 1])
        return -float(np.mean(scores)) if scores else 1.0

    x0 = np.array([off0 + (1 + rate0) * t_mid, rate0]) / scale
    res = optimize.minimize(corr, x0, method="Nelder-Mead",
                            options={"xatol": 1e-3, "fatol": 1e-9, "maxiter": 600,
                                     "initial_simplex": x0 + np.array([[0, 0], [1, 0], [0, 1]])})
    off_mid, rate = res.x * scale
    return float(off_mid - (1 + rate) * t_mid), float(rate), -corr(res.x)
