"""Memory of printed resistive bend strips: hysteresis and creep, simulated and compensated.

Model
-----
Per segment, the relative resistance change ``x = (R - R0) / R0`` is made from
the memory-free static signal ``u`` (the curvature-driven response that the
static monotone calibration maps to curvature; units of x) by two terms in series::

    u --[ Prandtl-Ishlinskii hysteresis H ]--> y --[ relaxation (creep) C ]--> x

*Rate-independent hysteresis.* Loading and unloading of filled-elastomer and
printed strips follow different curves even for very slow bends (e.g. the
review by Amjadi et al., Adv. Funct. Mater. 26, 2016; from memory). The
Prandtl-Ishlinskii (PI) operator is the standard phenomenological model of it
(Krasnosel'skii & Pokrovskii 1989; Brokate & Sprekels, "Hysteresis and Phase
Transitions", 1996, ch. 2; Visintin 1994; all from memory), a weighted sum of
play (backlash) operators::

    H[u] = sum_i w_i F_{r_i}[u],   F_r:  y_n = max(u_n - r, min(u_n + r, y_{n-1})),

thresholds ``0 = r_0 < r_1 < ...`` (units of u), weights ``w_i`` (``w_0`` the
linear part). It is linear in its weights (identification is linear least
squares over the play outputs) and its inverse is again a PI operator
(Krejci & Kuhnen, "Inverting the Prandtl-Ishlinskii hysteresis operator", IEE
Proc. Control Theory Appl. 148(3), 2001; Kuhnen, Eur. J. Control 9(4), 2003;
both from memory)::

    r'_j = sum_{i<=j} w_i (r_j - r_i),  w'_0 = 1 / w_0,  w'_j = -w_j / (W_j W_{j-1}),  W_j = w_0 + ... + w_j,

valid while the initial loading curve rises: ``w_0 > 0`` and every ``W_j > 0``
(checked; the tests verify the formula numerically). PI loops are symmetric;
an asymmetric strip needs the generalised PI operator (not done).

*Creep / relaxation.* After a step bend the resistance keeps moving for
seconds (viscoelastic matrix, slow rearrangement of the conductive network).
First-order relaxation terms (a Prony series, the usual linear viscoelastic
form, e.g. Findley, Lai & Onaran 1976; from memory)::

    x = y + sum_m c_m (z_m - y),    tau_m dz_m/dt = y - z_m.

A step D in y from rest gives ``x = D [(1 - sum c) + sum_m c_m (1 - exp(-t / tau_m))]``:
an instantaneous part, then first-order creep. ``c_m > 0`` creeps further in
the direction of the bend, ``c_m < 0`` overshoots and relaxes back; strips of
different inks and substrates are reported to do either (from memory), so the
sign is free. The settled gain is exactly 1: a static calibration made from
holds stays valid on the compensated signal and the PI alone carries the
static shape. Invertible while the instantaneous gain ``1 - sum c_m > 0``.
Exact for an input held between frames (zero-order hold), so the step
response equals the closed form at the sample times::

    z_m[n] = a_m z_m[n-1] + (1 - a_m) y[n-1],   a_m = exp(-dt / tau_m).

*Compensation.* ``x = C[H[u]]`` with C linear, time-invariant, causal and
invertible, H invertible, so ``u = H^-1[C^-1[x]]``: the inverse relaxation (a
rational causal filter) then the analytic inverse PI.

Not modelled: drift of the flat resistance (a slow offset: re-tare; a creep
term of minutes looks like it), rate-dependent hysteresis, temperature.

Streams
-------
Every operator is stateful, causal and vectorised over frames: ``process``
maps ``(N, S)`` (N frames, S segments, parameters per segment) to the same,
with the same numbers for any chunking (the plays and the relaxation bit for
bit with numpy 2.4 and scipy 1.17, a PI's weighted sum to rounding; the tests
require 1e-12). The play recursion composes clamp maps, ``clamp(clamp(y, a1, b1), a2,
b2) = clamp(y, clamp(a1, a2, b2), clamp(b1, a2, b2))``, so long chunks are an
associative prefix scan (groups of 16 frames in 16 vectorised steps, group
totals by a pairwise scan in O(log N) passes; O(N) work; exact, it only
selects values); short chunks (the live path: 10 frames at 1 kHz) loop over
frames, one ``clip`` per frame on all segments and thresholds. Linear filters
use ``scipy.signal.lfilter`` with state, or for a few frames the same
arithmetic in the same order (first order in Python floats); the small-chunk
kernels are in :mod:`acquire.core.memory_ops`. A chunk without NaN skips the
gap handling. State starts at rest at the first valid
input (plays equal to it, relaxation settled), forward and inverse alike, so
a compensator fed a simulator's output recovers its input from the first
frame. NaN in gives NaN out for that frame and segment; the state continues as
if the input had stayed at its last valid value.

Threads: pure, any thread; instances are not shared between threads (one
thread owns an operator and its state). ``process`` returns new arrays owned by
the caller and keeps no reference to its input. Parameters are dimensionless
(units of x) except time constants (s) and rates (Hz).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from acquire.core.memory_ops import LOOP_MAX as _LOOP_MAX
from acquire.core.memory_ops import PlayWork, block_weights, first_order_coefs, play_small, plays, relax_small

__all__ = ["PlayOperator", "PIOperator", "Relaxation", "MemoryChain", "SegmentMemory", "StripMemory", "pi_inverse_parameters"]


def _signal():  # scipy.signal (about 1 s to import): loaded with the first long chunk, never at start-up
    from scipy import signal
    return signal


def _lfilter_one(b: np.ndarray, a: np.ndarray, x: np.ndarray, zi: np.ndarray):
    """``lfilter(b, a, x, zi=zi)`` of one segment; a short chunk without scipy (the virtual
    finger's first frames must not wait for scipy's import on its device thread)."""
    if x.shape[0] <= _LOOP_MAX:
        b2, a2 = b[:, None], a[:, None]
        y, z = relax_small(x[:, None], zi[:, None], b2, a2, coefs=first_order_coefs(b2, a2))
        return y[:, 0], z[:, 0]
    return _signal().lfilter(b, a, x, zi=zi)


def _lfilter_zi(b: np.ndarray, a: np.ndarray) -> np.ndarray:
    """The state of ``lfilter(b, a)`` at rest under a unit step (what ``scipy.signal.lfilter_zi`` gives).

    The steady state solves ``(I - A^T) zi = b[1:] - a[1:] b[0]`` with ``A`` the
    companion matrix of ``a`` (a[0] = 1), scipy's own formula, in numpy so that
    building a model (the virtual finger's strip at start-up) needs no scipy.
    Checked against scipy in tests/acquire/core/test_memory_ops.py.
    """
    b = np.asarray(b, dtype=np.float64) / a[0]
    a = np.asarray(a, dtype=np.float64) / a[0]
    n = max(len(a), len(b))
    a, b = np.pad(a, (0, n - len(a))), np.pad(b, (0, n - len(b)))
    companion = np.zeros((n - 1, n - 1))
    companion[0] = -a[1:]
    companion[np.arange(1, n - 1), np.arange(n - 2)] = 1.0
    return np.linalg.solve(np.eye(n - 1) - companion.T, b[1:] - a[1:] * b[0])

_KIND = "tapcurve-strip-memory"
_VERSION = 1
_BLOCK = 2048  # frames per pass of the play scan: bounded work arrays, in cache
_SEGMENT_KEYS = ("pi_thresholds", "pi_weights", "creep_gains", "creep_taus_s")


def _per_segment(a, n_segments, name: str) -> np.ndarray:
    """(S, K) float copy of ``a`` given as (S, K), or (K,) / scalar shared by ``n_segments``."""
    arr = np.array(a, dtype=float, ndmin=1)
    if arr.ndim == 1 and n_segments is not None:
        arr = np.repeat(arr[None, :], int(n_segments), axis=0)
    if arr.ndim != 2 or arr.shape[0] < 1 or arr.shape[0] != (n_segments or arr.shape[0]):
        raise ValueError(f"{name}: expected shape ({n_segments or 'segments'}, terms), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name}: values must be finite")
    return arr


def _ffill(x: np.ndarray, last: np.ndarray):
    """Forward-fill NaN per column from ``last`` (S,). Returns (filled, nan mask or None, new last)."""
    mask = np.isnan(x)
    if not mask.any():
        return x, None, x[-1].copy()
    n = x.shape[0]
    idx = np.where(mask, -1, np.arange(n)[:, None])
    np.maximum.accumulate(idx, axis=0, out=idx)
    cols = np.arange(x.shape[1])[None, :]
    filled = np.where(idx >= 0, x[np.maximum(idx, 0), cols], last[None, :])
    return filled, mask, filled[-1].copy()


def _first_valid(x: np.ndarray) -> np.ndarray:
    """First non-NaN value of each column of (N, S); NaN where none."""
    ok = ~np.isnan(x)
    k = np.argmax(ok, axis=0)
    out = x[k, np.arange(x.shape[1])]
    out[~ok.any(axis=0)] = np.nan
    return out


class _Stage:
    """Common stream handling: NaN forward-fill, reset, state."""

    n_segments: int

    def process(self, x) -> np.ndarray:
        """Run a chunk ``x`` (N, S) of frames (units of x, oldest first, NaN = no reading).

        Returns a new array owned by the caller, NaN where the input was NaN.
        """
        x = np.asarray(x, dtype=float)
        if x.ndim != 2 or x.shape[1] != self.n_segments:
            raise ValueError(f"input: expected shape (frames, {self.n_segments}), got {x.shape}")
        if x.shape[0] == 0:
            return self._run(x)
        if not math.isnan(np.add.reduce(x, None)):  # no gap (the common case): nothing to fill
            self._last = x[-1].copy()
            return self._run(x)
        filled, mask, self._last = _ffill(x, self._last)
        out = self._run(filled)
        if mask is not None:
            out[mask] = np.nan
        return out

    def reset(self) -> None:
        """Forget the state: the next valid input starts the operator at rest."""
        self._last = np.full(self.n_segments, np.nan)
        self._reset_core()

    @property
    def state(self) -> dict:
        """Copy of the stream state (dict of arrays; NaN = not started)."""
        return {"last": self._last.copy(), **self._core_state()}

    @state.setter
    def state(self, value: dict) -> None:
        last = np.array(value["last"], dtype=float)
        if last.shape != (self.n_segments,):
            raise ValueError(f"state: 'last' must have shape ({self.n_segments},)")
        self._set_core_state(value)
        self._last = last


class PlayOperator(_Stage):
    """Bank of play (backlash) operators, K thresholds for each of S segments.

    Parameters
    ----------
    thresholds : array_like, shape (S, K), or (K,) with ``n_segments``
        Thresholds r >= 0, units of the input.
    n_segments : int, optional
        Number of segments when ``thresholds`` is shared.

    ``process(u)`` maps (N, S) to play outputs (N, S, K); rate-independent.
    """

    def __init__(self, thresholds, *, n_segments: int | None = None):
        r = _per_segment(thresholds, n_segments, "thresholds")
        if np.any(r < 0):
            raise ValueError("thresholds: must be >= 0")
        self.thresholds = r
        r.setflags(write=False)
        self.n_segments = r.shape[0]
        self._work = PlayWork(r)  # the small path's scratch: this operator's thread only
        self.reset()

    def __getstate__(self) -> dict:  # a copy gets its own scratch (its rows are views of its arrays)
        return {**self.__dict__, "_work": None}

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state, _work=PlayWork(state["thresholds"]))

    def _run(self, u: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
        """Play outputs (N, S, K), or with ``weights`` (S, K) their weighted sums (N, S)."""
        n = u.shape[0]
        if n == 0:
            return np.empty((0,) + (self.thresholds.shape if weights is None else (self.n_segments,)))
        y0, started = self._y, self._started
        if started and n <= _LOOP_MAX:  # the live path: a few frames
            out, self._y = play_small(u, self.thresholds, y0, weights=None if weights is None else self._block_w,
                                      work=self._work)
            return out
        if not started:  # start at rest at the first valid input
            y0 = np.where(np.isnan(y0), _first_valid(u)[:, None], y0)
        if n <= _BLOCK:
            out, y0 = plays(u, self.thresholds, y0, weights, not started)
        else:  # blocks: bounded work arrays, in cache
            parts = []
            for a in range(0, n, _BLOCK):
                p, y0 = plays(u[a:a + _BLOCK], self.thresholds, y0, weights, not started)
                parts.append(p)
            out = np.concatenate(parts)
        self._y = y0.copy()
        if not started:
            out[np.isnan(u)] = np.nan  # no valid input yet: no output
            self._started = not np.isnan(self._y).any()
        return out

    def _reset_core(self) -> None:
        self._y = np.full(self.thresholds.shape, np.nan)
        self._started = False

    def _core_state(self) -> dict:
        return {"plays": self._y.copy()}

    def _set_core_state(self, value: dict) -> None:
        y = np.array(value["plays"], dtype=float)
        if y.shape != self.thresholds.shape:
            raise ValueError(f"state: 'plays' must have shape {self.thresholds.shape}")
        self._y, self._started = y, not np.isnan(y).any()


def pi_inverse_parameters(thresholds, weights):
    """Thresholds and weights (S, K) of the inverse PI operator (Krejci & Kuhnen 2001).

    ``thresholds``, ``weights`` (S, K): non-decreasing from 0, ``w_0 > 0``,
    cumulative sums ``W_j > 0``. Returns new arrays ``r'_j = r_j W_j - sum_{i<=j}
    w_i r_i``, ``w'_0 = 1/w_0``, ``w'_j = -w_j / (W_j W_{j-1})``.
    """
    r, w = np.atleast_2d(np.asarray(thresholds, float)), np.atleast_2d(np.asarray(weights, float))
    _check_pi(r, w)
    cw = np.cumsum(w, axis=1)
    r_inv = r * cw - np.cumsum(w * r, axis=1)
    r_inv[:, 0] = 0.0
    r_inv = np.maximum.accumulate(np.maximum(r_inv, 0.0), axis=1)  # rounding only
    w_inv = np.empty_like(w)
    w_inv[:, 0] = 1.0 / w[:, 0]
    w_inv[:, 1:] = -w[:, 1:] / (cw[:, 1:] * cw[:, :-1])
    return r_inv, w_inv


def _check_pi(r: np.ndarray, w: np.ndarray, key: str = "", strict: bool = False) -> None:
    """(S, K) thresholds and weights of invertible PI operators; ``key`` prefixes the names."""
    if r.shape != w.shape or r.ndim != 2 or r.shape[1] == 0:
        raise ValueError(f"{key}weights: need one weight per threshold (at least one)")
    if not (np.all(np.isfinite(r)) and np.all(np.isfinite(w))):
        raise ValueError(f"{key}weights: thresholds and weights must be finite")
    if np.any(r[:, 0] != 0) or np.any(np.diff(r, axis=1) <= 0 if strict else np.diff(r, axis=1) < 0):
        raise ValueError(f"{key}thresholds: must start at 0 and increase" + (" strictly" if strict else ""))
    if np.any(w[:, 0] <= 0) or np.any(np.cumsum(w, axis=1) <= 0):
        raise ValueError(f"{key}weights: need w_0 > 0 and every cumulative sum > 0 (invertible PI)")


def _check_creep(c: np.ndarray, tau: np.ndarray) -> None:
    """(S, M) creep gains and time constants, s."""
    if tau.shape != c.shape or np.any(tau <= 0):
        raise ValueError("creep_taus_s: need one positive time constant per gain, s")
    if np.any(1.0 - c.sum(axis=1) <= 0):
        raise ValueError("creep_gains: need 1 - sum of gains > 0 (instantaneous gain)")


class PIOperator(PlayOperator):
    """Prandtl-Ishlinskii operator ``y = sum_i w_i F_{r_i}[u]`` per segment.

    Parameters
    ----------
    thresholds : array_like, shape (S, K), or (K,) with ``n_segments``
        ``0 = r_0 <= r_1 <= ...``, units of u.
    weights : array_like, same shape
        ``w_0 > 0`` and cumulative sums > 0 (so the operator is invertible).
    n_segments : int, optional
        Number of segments when the parameters are shared.

    ``process(u)`` maps (N, S) to (N, S).
    """

    def __init__(self, thresholds, weights, *, n_segments: int | None = None):
        super().__init__(thresholds, n_segments=n_segments)
        w = _per_segment(weights, self.n_segments, "weights")
        _check_pi(self.thresholds, w)
        self.weights = w
        w.setflags(write=False)
        self._block_w = block_weights(w)

    def inverse(self) -> PIOperator:
        """The analytic inverse PI operator (new instance, not started)."""
        return PIOperator(*pi_inverse_parameters(self.thresholds, self.weights))

    def _run(self, u: np.ndarray) -> np.ndarray:
        if self._started and 0 < u.shape[0] <= _LOOP_MAX:  # the live path, without the general checks
            out, self._y = play_small(u, self.thresholds, self._y, weights=self._block_w, work=self._work)
            return out
        return PlayOperator._run(self, u, self.weights)


def _creep_polys(c: np.ndarray, tau: np.ndarray, dt_s: float):
    """Numerator and denominator (powers of 1/q) of the relaxation filter y -> x."""
    keep = c != 0
    c, a = c[keep], np.exp(-dt_s / tau[keep])
    den = np.atleast_1d(np.poly(a)).astype(float)
    num = (1.0 - c.sum()) * den
    for m in range(a.size):
        num[1:] += c[m] * (1.0 - a[m]) * np.atleast_1d(np.poly(np.delete(a, m)))
    return num, den


class Relaxation(_Stage):
    """First-order creep/relaxation terms ``x = y + sum_m c_m (z_m - y)``, or their inverse.

    Parameters
    ----------
    gains : array_like, shape (S, M), or (M,) with ``n_segments``
        ``c_m``, dimensionless; ``1 - sum_m c_m > 0``. A zero gain is no term.
    taus_s : array_like, same shape
        Time constants, s, > 0.
    rate_hz : float
        Frame rate, Hz (fixed frame interval ``1 / rate_hz``).
    inverse : bool
        False: y -> x (simulate). True: x -> y (compensate).
    n_segments : int, optional
        Number of segments when the parameters are shared.
    """

    def __init__(self, gains, taus_s, *, rate_hz: float, inverse: bool = False,
                 n_segments: int | None = None):
        c = _per_segment(gains, n_segments, "creep_gains")
        tau = _per_segment(taus_s, c.shape[0], "creep_taus_s")
        _check_creep(c, tau)
        if not (math.isfinite(rate_hz) and rate_hz > 0):
            raise ValueError(f"rate_hz: must be positive, got {rate_hz}")
        self.gains, self.taus_s, self.rate_hz, self.is_inverse = c, tau, float(rate_hz), bool(inverse)
        self.n_segments = c.shape[0]
        self._build()
        self.reset()

    def inverse(self) -> Relaxation:
        """The exact causal inverse (new instance, not started)."""
        return Relaxation(self.gains, self.taus_s, rate_hz=self.rate_hz, inverse=not self.is_inverse)

    def _build(self) -> None:
        polys = [_creep_polys(c, t, 1.0 / self.rate_hz) for c, t in zip(self.gains, self.taus_s)]
        self.order = order = max(len(d) for _, d in polys) - 1
        groups: dict = {}
        self._ba = []
        self._zi_unit = np.zeros((max(order, 1), self.n_segments))
        for s, (num, den) in enumerate(polys):
            if self.is_inverse:
                if np.any(np.abs(np.roots(num)) >= 1.0):
                    raise ValueError(f"creep_gains: segment {s} has no stable inverse at "
                                     f"rate_hz={self.rate_hz:g}")
                num, den = den / num[0], num / num[0]
            b, a = np.pad(num, (0, order + 1 - len(num))), np.pad(den, (0, order + 1 - len(den)))
            self._ba.append((b, a))
            if len(den) == 1:
                continue  # no creep term: identity
            self._zi_unit[:len(den) - 1, s] = _lfilter_zi(num, den)
            groups.setdefault((b.tobytes(), a.tobytes()), (b, a, []))[2].append(s)
        self._groups = [(b, a, np.array(cols)) for b, a, cols in groups.values()]
        self._identity = np.array([len(d) == 1 for _, d in polys])
        creep = np.flatnonzero(~self._identity)  # the small path filters these columns only
        self._creep_cols = None if creep.size == self.n_segments else creep
        self._b = np.array([b for b, _ in self._ba]).T[:, creep].copy()  # (order + 1, columns)
        self._a = np.array([a for _, a in self._ba]).T[:, creep].copy()
        self._coefs = first_order_coefs(self._b, self._a)

    def _run(self, x: np.ndarray) -> np.ndarray:
        n = x.shape[0]
        if self._started and 0 < n <= _LOOP_MAX and self._groups:  # fewer calls than lfilter per segment group
            if self._creep_cols is None:  # every segment creeps (the usual case)
                out, self._zi = relax_small(x, self._zi, self._b, self._a, coefs=self._coefs)
                return out
            return self._run_small(x)
        if not self._groups or n == 0:
            return x.copy()
        if not self._started:
            return self._run_starting(x)
        out = x.copy()
        for b, a, cols in self._groups:
            out[:, cols], self._zi[:, cols] = _signal().lfilter(b, a, x[:, cols], axis=0,
                                                             zi=self._zi[:, cols])
        return out

    def _run_small(self, x: np.ndarray) -> np.ndarray:
        """Few frames: lfilter's recursion vectorised over segments (:func:`relax_small`: the
        same operations in the same order as scipy's C loop, so the same numbers, whatever the chunking)."""
        if self._creep_cols is None:
            out, self._zi = relax_small(x, self._zi, self._b, self._a, coefs=self._coefs)
            return out
        out = x.copy()
        out[:, self._creep_cols], self._zi[:, self._creep_cols] = relax_small(
            x[:, self._creep_cols], self._zi[:, self._creep_cols], self._b, self._a, coefs=self._coefs)
        return out

    def _run_starting(self, x: np.ndarray) -> np.ndarray:
        """Segments whose state is unset start at rest at their first valid (non-NaN) input."""
        out = x.copy()
        for b, a, cols in self._groups:
            for s in cols:
                xs, zi, k = x[:, s], self._zi[:, s], 0
                if np.isnan(zi[0]):
                    ok = ~np.isnan(xs)
                    if not ok.any():
                        out[:, s] = np.nan
                        continue
                    k = int(np.argmax(ok))
                    zi = self._zi_unit[:, s] * xs[k]
                    out[:k, s] = np.nan
                out[k:, s], self._zi[:, s] = _lfilter_one(b, a, xs[k:], zi)
        self._started = not np.isnan(self._zi).any()
        return out

    def _reset_core(self) -> None:
        self._zi = np.full((max(self.order, 1), self.n_segments), np.nan)
        self._zi[:, self._identity] = 0.0  # no creep: nothing to start
        self._started = False

    def _core_state(self) -> dict:
        return {"filter": self._zi.T.copy()}

    def _set_core_state(self, value: dict) -> None:
        zi = np.array(value["filter"], dtype=float).T
        if zi.shape != self._zi.shape:
            raise ValueError(f"state: 'filter' must have shape {self._zi.T.shape}")
        self._zi = np.ascontiguousarray(zi)
        self._started = not np.isnan(zi).any()


class MemoryChain(_Stage):
    """Operators applied in series to a stream (a simulator or a compensator).

    ``stages``: PIOperator / Relaxation instances with the same number of
    segments, applied in order. NaN is handled once at the chain's input.
    """

    def __init__(self, stages):
        self.stages = tuple(stages)
        if not self.stages or any(type(s) not in (PIOperator, Relaxation) for s in self.stages):
            raise ValueError("stages: need at least one PIOperator or Relaxation")
        self.n_segments = self.stages[0].n_segments
        if any(s.n_segments != self.n_segments for s in self.stages):
            raise ValueError("stages: all stages need the same number of segments")
        self.reset()

    def _run(self, x: np.ndarray) -> np.ndarray:
        for st in self.stages:
            x = st._run(x)
        return x

    def _reset_core(self) -> None:
        for st in self.stages:
            st.reset()

    def _core_state(self) -> dict:
        return {"stages": [st._core_state() for st in self.stages]}

    def _set_core_state(self, value: dict) -> None:
        for st, v in zip(self.stages, value["stages"], strict=True):
            st._set_core_state(v)


def _vector(value, key: str) -> np.ndarray:
    if isinstance(value, (str, bytes, dict)) or np.ndim(value) != 1:
        raise ValueError(f"{key}: expected a list of numbers")
    try:
        arr = np.array(value, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{key}: expected a list of numbers") from None
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{key}: values must be finite")
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True)
class SegmentMemory:
    """Memory parameters of one segment (immutable; any thread).

    Parameters
    ----------
    pi_thresholds : array_like, shape (K,)
        ``0 = r_0 < r_1 < ...``, units of x.
    pi_weights : array_like, shape (K,)
        ``w_0 > 0`` and cumulative sums > 0.
    creep_gains : array_like, shape (M,)
        ``c_m``, ``1 - sum c_m > 0``; may be empty.
    creep_taus_s : array_like, shape (M,)
        Time constants, s, > 0.
    """

    pi_thresholds: np.ndarray = (0.0,)
    pi_weights: np.ndarray = (1.0,)
    creep_gains: np.ndarray = ()
    creep_taus_s: np.ndarray = ()

    def __post_init__(self):
        for key in _SEGMENT_KEYS:
            object.__setattr__(self, key, _vector(getattr(self, key), key))
        _check_pi(self.pi_thresholds[None], self.pi_weights[None], "pi_", strict=True)
        _check_creep(self.creep_gains[None], self.creep_taus_s[None])

    def to_dict(self) -> dict:
        """JSON-able dict of plain floats."""
        return {key: [float(v) for v in getattr(self, key)] for key in _SEGMENT_KEYS}


class StripMemory:
    """Hysteresis and creep parameters of every segment of a strip (immutable; any thread).

    Parameters
    ----------
    segments : sequence of SegmentMemory
        One per segment, base first.
    """

    def __init__(self, segments):
        self.segments = tuple(segments)
        if not self.segments or any(not isinstance(s, SegmentMemory) for s in self.segments):
            raise ValueError("segments: need at least one SegmentMemory")

    @property
    def n_segments(self) -> int:
        return len(self.segments)

    @classmethod
    def identity(cls, n_segments: int) -> StripMemory:
        """No memory: x = u for ``n_segments`` segments."""
        return cls([SegmentMemory() for _ in range(int(n_segments))])

    def _padded(self, k1: str, k2: str, fill2: float):
        """(S, K) arrays of two per-segment vectors, padded with (last or 0, 0) terms."""
        n = max(1, max(getattr(s, k1).size for s in self.segments))
        a = np.zeros((self.n_segments, n))
        b = np.full((self.n_segments, n), fill2)
        for i, s in enumerate(self.segments):
            v1, v2 = getattr(s, k1), getattr(s, k2)
            a[i, :v1.size], b[i, :v2.size] = v1, v2
            if k1 == "pi_thresholds":
                a[i, v1.size:] = v1[-1]  # zero-weight plays at the last threshold
        return a, b

    def pi_operator(self) -> PIOperator:
        """The forward PI operator (new, not started)."""
        return PIOperator(*self._padded("pi_thresholds", "pi_weights", 0.0))

    def relaxation(self, *, rate_hz: float) -> Relaxation:
        """The forward relaxation at ``rate_hz``, Hz (new, not started)."""
        tau, c = self._padded("creep_taus_s", "creep_gains", 0.0)
        tau[tau == 0] = 1.0  # padding of zero-gain terms
        return Relaxation(c, tau, rate_hz=rate_hz)

    def simulator(self, *, rate_hz: float) -> MemoryChain:
        """Stateful u -> x (a real strip's memory), frames at ``rate_hz``, Hz."""
        return MemoryChain([self.pi_operator(), self.relaxation(rate_hz=rate_hz)])

    def compensator(self, *, rate_hz: float) -> MemoryChain:
        """Stateful x -> u (causal inverse), frames at ``rate_hz``, Hz.

        Raises ValueError when the inverse relaxation is unstable at this rate.
        """
        return MemoryChain([self.relaxation(rate_hz=rate_hz).inverse(), self.pi_operator().inverse()])

    def forward(self, u, *, rate_hz: float) -> np.ndarray:
        """Whole stream u (N, S) -> x (N, S) from rest; new array."""
        return self.simulator(rate_hz=rate_hz).process(u)

    def compensate(self, x, *, rate_hz: float) -> np.ndarray:
        """Whole stream x (N, S) -> u (N, S) from rest; new array."""
        return self.compensator(rate_hz=rate_hz).process(x)

    def to_dict(self) -> dict:
        """JSON-able dict (``kind``, ``version``, ``segments``)."""
        return {"kind": _KIND, "version": _VERSION, "segments": [s.to_dict() for s in self.segments]}

    @classmethod
    def from_dict(cls, d) -> StripMemory:
        """Inverse of :meth:`to_dict`; one-line ValueError naming the key at fault."""
        if not isinstance(d, dict):
            raise ValueError("strip memory: expected a mapping")
        if d.get("kind") != _KIND:
            raise ValueError(f"strip memory: key 'kind' must be {_KIND!r}")
        if d.get("version") != _VERSION:
            raise ValueError(f"strip memory: key 'version' must be {_VERSION}")
        segs = d.get("segments")
        if not isinstance(segs, list) or not segs:
            raise ValueError("strip memory: key 'segments' must be a non-empty list")
        out = []
        for i, seg in enumerate(segs):
            if not isinstance(seg, dict):
                raise ValueError(f"strip memory: key 'segments[{i}]' must be a mapping")
            try:
                bad = [k for k in _SEGMENT_KEYS if k not in seg] or sorted(set(seg) - set(_SEGMENT_KEYS))
                if bad:
                    raise ValueError(f"{bad[0]}: {'missing' if bad[0] in _SEGMENT_KEYS else 'unknown key'}")
                out.append(SegmentMemory(**seg))
            except ValueError as exc:
                key, _, msg = str(exc).partition(": ")
                raise ValueError(f"strip memory: key 'segments[{i}].{key}': {msg}") from None
        return cls(out)
