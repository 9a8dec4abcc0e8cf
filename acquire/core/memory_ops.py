"""Small-chunk kernels of the strip-memory operators (:mod:`acquire.core.memory`).

The live path feeds the memory a few frames at a time (10 at 1 kHz), where a
Python loop over segments and frames, or a call of ``scipy.signal.lfilter``
per segment group, costs more than the arithmetic. These kernels run a short
chunk as one short loop over its frames, each step a few numpy calls on all
segments at once into preallocated arrays:

:func:`relax_small`
    ``lfilter``'s transposed direct form II recursion, the same floating-point
    operations in the same order as scipy's C loop (first order, the usual
    case: a loop in Python floats; higher orders: numpy over segments, the
    products ``x b_k`` formed for the whole chunk first), so a stream gives
    the same numbers whether long chunks go through ``lfilter`` or short ones
    through here. That matters: the relaxation's slow poles amplify any
    difference in rounding (a 2-term filter at 50 Hz with time constants of 1
    and 5 s by about 1e4), so a merely equivalent form (a matrix per chunk)
    would drift from the long-chunk path by 1e-12 and more.
:func:`play_small`
    the play recursion ``y_n = min(max(y_{n-1}, u_n - r), u_n + r)``,
    vectorised over segments and thresholds: one ``clip`` per frame (exact:
    it only selects values) on the flat (S K) row of all plays; a PI's
    weighted sum is one matrix product.

Long chunks of plays go through an associative prefix scan (:func:`plays`;
the algorithm is described in :mod:`acquire.core.memory`).

Threads: pure functions, any thread. Returned arrays are new and owned by the
caller; the state passed in is not modified.
"""
from __future__ import annotations

import numpy as np
from numpy._core import umath

__all__ = ["LOOP_MAX", "block_weights", "first_order_coefs", "PlayWork", "play_small", "plays", "relax_small"]

_clip = umath.clip  # the clip ufunc itself: np.clip adds a Python wrapper per call
LOOP_MAX = 24  # frames: up to this a loop over frames beats the scan and lfilter (per-call overhead)
_SCAN_LEAF = 8  # frames: scan recursion ends in a short loop
_GROUP = 16  # frames per group of the play scan (measured: 8 to 32 about equal)


def relax_small(x: np.ndarray, zi: np.ndarray, b: np.ndarray, a: np.ndarray, *, coefs=None):
    """Filter a short chunk ``x`` (n, S) with per-segment ``b``, ``a`` (M + 1, S), ``a[0] == 1``, M >= 1.

    ``zi`` (M, S): the state. ``coefs``: for M = 1, ``[(b0, b1, a1), ...]`` per column as
    Python floats (:func:`first_order_coefs`), which selects the scalar loop: for a first-order
    filter over a few frames, Python floats beat numpy calls on arrays of a few elements.
    Returns (y (n, S), new state (M, S)), new arrays.
    """
    order = b.shape[0] - 1
    if order == 1 and coefs is not None:
        ys, ends = [], []  # one flat list: numpy reads it faster than nested lists
        put = ys.append
        for col, z, (b0, b1, a1) in zip(x.T.tolist(), zi[0].tolist(), coefs):
            for xn in col:
                yn = z + b0 * xn  # scipy's order: *yn = *Z + *b * *xn; *Z = *xn * b1 - *yn * a1
                z = xn * b1 - yn * a1
                put(yn)
            ends.append(z)
        return np.fromiter(ys, np.float64, len(ys)).reshape(x.shape[1], x.shape[0]).T, np.array([ends])
    xb = x[:, None, :] * b  # (n, M + 1, S): every product x_n b_k of the chunk
    y = np.empty_like(x)
    z = zi.copy()
    for xb_n, y_n in zip(xb, y):
        np.add(z[0], xb_n[0], out=y_n)
        for k in range(order - 1):
            np.add(z[k + 1], xb_n[k + 1], out=z[k])
            z[k] -= y_n * a[k + 1]
        np.subtract(xb_n[order], y_n * a[order], out=z[order - 1])
    return y, z


def first_order_coefs(b: np.ndarray, a: np.ndarray):
    """``[(b0, b1, a1), ...]`` per column of first-order ``b``, ``a`` (2, S); None for other orders."""
    if b.shape[0] != 2:
        return None
    return list(zip(b[0].tolist(), b[1].tolist(), a[1].tolist()))


class PlayWork:
    """Scratch arrays of :func:`play_small` for thresholds ``r`` (S, K) and chunks of up to ``n_max``
    frames, made once per operator and used by its thread only: the column of each play (S K,), the
    signed thresholds ``(-r, +r)`` (2, 1, S K), the clamp bounds and plays of a chunk, and views of
    their rows made once (a view made per frame costs about as much as the frame's ``clip``)."""

    def __init__(self, r: np.ndarray, n_max: int = LOOP_MAX):
        s, k = r.shape
        self.cols = np.repeat(np.arange(s), k)
        self.signed = np.stack([-r, r]).reshape(2, 1, s * k)
        self.bounds = np.empty((2, n_max, s * k))
        self.plays = np.empty((n_max, s * k))
        self.lo_rows, self.hi_rows, self.out_rows = list(self.bounds[0]), list(self.bounds[1]), list(self.plays)


def play_small(u: np.ndarray, r: np.ndarray, y0: np.ndarray, *, weights: np.ndarray | None,
               work: PlayWork | None = None):
    """Plays of a short chunk ``u`` (n, S) with thresholds ``r`` (S, K) from state ``y0`` (S, K).

    ``weights``: None, or the (S K, S) block-diagonal matrix of the weights (:func:`block_weights`).
    ``work``: :class:`PlayWork` of ``r`` for at least n frames (made here when None); its arrays
    are overwritten. Returns (plays (n, S, K), or their weighted sums (n, S) with ``weights``; end
    state (S, K)), new arrays; no NaN in ``u`` or ``y0`` (the caller fills gaps). The plays are the
    recursion's own numbers; the sums equal the long path's to rounding (summed in another order).
    """
    n = u.shape[0]
    if work is None or n > len(work.out_rows):
        work = PlayWork(r, n)
    # both clamp bounds of every frame and play in one call, on flat (S K) rows so that numpy's
    # inner loops run over all plays at once; u + (-r) is u - r exactly (IEEE 754)
    np.add(u.take(work.cols, 1), work.signed, out=work.bounds[:, :n])
    y = y0.reshape(-1)
    for lo_n, hi_n, o in zip(work.lo_rows[:n], work.hi_rows[:n], work.out_rows[:n]):
        _clip(y, lo_n, hi_n, o)  # out positionally: a keyword costs a little per call
        y = o
    end = y.reshape(r.shape).copy()
    if weights is None:
        return work.plays[:n].reshape((n,) + r.shape).copy(), end
    return np.dot(work.plays[:n], weights), end


def block_weights(weights: np.ndarray) -> np.ndarray:
    """(S K, S) matrix with segment s's weights (S, K) in rows s K .. s K + K - 1 of column s."""
    s, k = weights.shape
    mat = np.zeros((s, k, s))
    mat[np.arange(s), :, np.arange(s)] = weights
    return mat.reshape(s * k, s)


# ----------------------------------------------------------------------------- long chunks: the play scan


def _compose_scan(e: np.ndarray) -> np.ndarray:
    """Inclusive prefix compositions of clamp maps ``e`` (n, 2, C) (lower, upper bound), pairwise
    recursive: ``o[k]`` bounds ``map_k o ... o map_0``; a map applied to bounds clamps both."""
    n = e.shape[0]
    o = np.empty_like(e)
    o[0] = e[0]
    if n <= _SCAN_LEAF:
        for k in range(1, n):
            np.maximum(o[k - 1], e[k, 0], out=o[k])
            np.minimum(o[k], e[k, 1], out=o[k])
        return o
    m = n // 2
    odd = e[1:2 * m:2]
    pair = np.maximum(e[0:2 * m:2], odd[:, 0:1])  # even map, then the odd one after it
    np.minimum(pair, odd[:, 1:2], out=pair)
    s = _compose_scan(pair)  # s[j]: maps 0 .. 2j+1
    o[1:2 * m:2] = s
    k = (n - 1) // 2
    if k:
        ev, dst = e[2::2], o[2::2]
        np.maximum(s[:k], ev[:, 0:1], out=dst)
        np.minimum(dst, ev[:, 1:2], out=dst)
    return o


def _bounds(u: np.ndarray, r: np.ndarray, check_nan: bool):
    """Clamp bounds ``(u - r, u + r)``; with ``check_nan`` a NaN input gives (-inf, +inf),
    an identity map: the state is held."""
    lo, hi = u - r, u + r
    if check_nan:
        bad = np.isnan(u)
        np.copyto(lo, -np.inf, where=bad)
        np.copyto(hi, np.inf, where=bad)
    return lo, hi


def _play_loop(u, r, y0, check_nan):
    """Few frames: plays (n, S, K) by the recursion itself, vectorised over S and K."""
    lo, hi = _bounds(u[:, :, None], r, check_nan)
    out = np.empty_like(lo)
    y = y0
    for lo_n, hi_n, o in zip(lo, hi, out):  # iteration makes views faster than indexing
        np.maximum(y, lo_n, out=o)
        np.minimum(o, hi_n, out=o)
        y = o
    return out


def _play_grouped(u, r, y0, check_nan):
    """Plays for n = G * _GROUP frames, laid out (_GROUP, S, K, G): frame g * _GROUP + k at [k, ..., g].

    Within each group of _GROUP frames the prefix compositions are a loop over
    k whose operations run on contiguous (2, S, K, G) slabs; the group totals
    are composed by :func:`_compose_scan`; then every frame is one clamp of the
    state at its group's start.
    """
    n, s = u.shape
    g, L = n // _GROUP, _GROUP
    lo, hi = _bounds(u.reshape(g, L, s).transpose(1, 2, 0)[:, :, None, :], r[:, :, None], check_nan)
    o = np.empty((L, 2) + lo.shape[1:])  # o[k]: bounds of the group's maps 0..k composed
    o[0, 0], o[0, 1] = lo[0], hi[0]
    for k in range(1, L):
        np.maximum(o[k - 1], lo[k], out=o[k])
        np.minimum(o[k], hi[k], out=o[k])
    tot = _compose_scan(np.moveaxis(o[L - 1], -1, 0).reshape(g, 2, -1))
    start = np.empty((g, r.size))  # state at each group's start
    start[0] = y0.reshape(-1)
    np.maximum(start[0], tot[:-1, 0], out=start[1:])
    np.minimum(start[1:], tot[:-1, 1], out=start[1:])
    out = np.empty((L,) + r.shape + (g,))
    np.maximum(start.T.reshape(r.shape + (g,)), o[:, 0], out=out)
    np.minimum(out, o[:, 1], out=out)
    return out


def plays(u, r, y0, weights, check_nan):
    """Plays (n, S, K), or with ``weights`` (S, K) their weighted sums (n, S); and the end state."""
    n = u.shape[0]
    m = 0 if n <= LOOP_MAX else n - n % _GROUP
    parts, y = [], y0
    if m:
        p = _play_grouped(u[:m], r, y0, check_nan)  # (L, S, K, G)
        y = p[-1, :, :, -1]
        p = p.transpose(3, 0, 1, 2).reshape((m,) + r.shape)
        # the same sum on the same layout as below: the same numbers for any chunking
        parts.append(p if weights is None else np.einsum("nsk,sk->ns", p, weights))
    if m < n:
        p = _play_loop(u[m:], r, y, check_nan)
        y = p[-1]
        parts.append(p if weights is None else np.einsum("nsk,sk->ns", p, weights))
    return (parts[0] if len(parts) == 1 else np.concatenate(parts)), y
