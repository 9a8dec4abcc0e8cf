"""Causal, stateful filters for S signals at once, identical for any chunking of a stream.

A filter object keeps the state it needs between calls, so feeding a stream one
frame at a time (live) or a million frames at once (offline) gives the same
output to float precision. Instances are not thread-safe: one thread (the
processing thread) owns a filter. ``process`` returns new arrays owned by the
caller.

NaN handling (a NaN is a reading the readout could not make):

- :class:`SpikeFilter` ignores NaN inside its window (median of the valid
  samples); its output is NaN only when the whole window is NaN.
- :class:`LowPassFilter` gives NaN where its input is NaN, and that signal's
  state restarts (from the steady state of the next valid sample, as at the
  very start). A NaN therefore never poisons the state, and a signal coming
  back after a gap does not sweep in from a stale value.

In :class:`FilterChain` the spike filter comes first, so an isolated NaN frame
is bridged by the median and never reaches the low-pass.
"""
from __future__ import annotations

import math

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from acquire.errors import UserError
from acquire.rig import Rig

__all__ = [
    "SpikeFilter",
    "LowPassFilter",
    "FilterChain",
    "filtfilt_zero_phase",
    "centered_median",
    "butterworth_lowpass_sos",
    "sos_steady_state",
]

_SMALL_BLOCK = 16  # frames: below this, per-call overhead dominates and small-block code paths pay
_BLOCK_FRAMES = 16  # frames per block of the low-pass's block method (bench/bench_filters.py)
_SLAB_FRAMES = 1 << 16  # frames per slab of a long input (bounds the temporary arrays)
# block products go to BLAS in pieces of about this many multiply-adds: a piece stays in cache, and
# BLAS keeps a product this small on one core (threads that wait for the cores of a busy machine cost
# more than they bring here; bench/bench_filters.py)
_PRODUCT_WORK = 200_000


def _nanmedian_last_axis(windows: np.ndarray) -> np.ndarray:
    """Median over the last axis ignoring NaN; NaN when all are NaN. No warnings."""
    srt = np.sort(windows, axis=-1)  # NaN sorts to the end
    w = windows.shape[-1]
    if w and not np.isnan(srt[..., -1]).any():
        # no NaN anywhere (it would sort last): the plain median, the same numbers as below
        if w % 2:
            return srt[..., w // 2].copy()
        return 0.5 * (srt[..., w // 2 - 1] + srt[..., w // 2])
    n_valid = np.count_nonzero(~np.isnan(windows), axis=-1)
    lo = np.maximum((n_valid - 1) // 2, 0)
    hi = np.maximum(n_valid // 2, 0)
    a = np.take_along_axis(srt, lo[..., None], axis=-1)[..., 0]
    b = np.take_along_axis(srt, hi[..., None], axis=-1)[..., 0]
    med = 0.5 * (a + b)
    med[n_valid == 0] = np.nan
    return med


class SpikeFilter:
    """Causal running median over the last ``window`` frames of each signal.

    Removes isolated spikes (up to ``(window - 1) // 2`` frames long) and
    bridges isolated NaN readings, at the price of a delay of about
    ``(window - 1) / 2`` frames on steps. Before ``window`` frames have been
    seen the median is over the frames there are, so the first output equals
    the first input.

    Parameters
    ----------
    n_signals : int
        S, the number of columns.
    window : int
        Frames in the median, >= 1; 1 passes the input through.
    """

    def __init__(self, n_signals: int, *, window: int):
        if int(window) < 1:
            raise ValueError("window must be at least 1")
        self.n_signals = int(n_signals)
        self.window = int(window)
        self.reset()

    def reset(self) -> None:
        """Forget the past (as if no frame had been seen)."""
        self._history = np.full((self.window - 1, self.n_signals), np.nan)

    def process(self, x: np.ndarray) -> np.ndarray:
        """Filter N frames.

        Parameters
        ----------
        x : array_like, shape (N, S)

        Returns
        -------
        ndarray of float64, shape (N, S)
        """
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 2 or x.shape[1] != self.n_signals:
            raise ValueError(f"expected shape (N, {self.n_signals}), got {x.shape}")
        if self.window == 1 or x.shape[0] == 0:
            return x.copy()
        ext = np.concatenate([self._history, x], axis=0)
        n = x.shape[0]
        if n <= _SMALL_BLOCK:
            # live blocks of a few frames: stacking W slices is cheaper than a strided view
            windows = np.stack([ext[k:k + n] for k in range(self.window)], axis=-1)  # (N, S, window)
        else:
            windows = sliding_window_view(ext, self.window, axis=0)  # (N, S, window)
        out = _nanmedian_last_axis(windows)
        self._history = ext[-(self.window - 1):].copy()
        return out


# -- Butterworth design (numpy only: importing scipy.signal costs about a second at start-up) --------


def butterworth_lowpass_sos(order: int, *, cutoff_hz: float, rate_hz: float) -> np.ndarray:
    """Digital Butterworth low-pass as second-order sections.

    The analog prototype's poles (evenly spaced on the left half of the unit
    circle) are scaled to the pre-warped cut-off ``4 tan(pi f_c / f_s)`` (on a
    sample rate normalised to 2), mapped by the bilinear transform (every zero
    lands at z = -1), then grouped into sections: the poles closest to the unit
    circle go last, each pole pair with the nearest zeros, the gain in the first
    section. This is the design ``scipy.signal.butter(order, cutoff_hz,
    fs=rate_hz, output="sos")`` returns (tests compare the two).

    Parameters
    ----------
    order : int
        1 or more.
    cutoff_hz : float
        -3 dB frequency, Hz, in (0, rate_hz / 2).
    rate_hz : float
        Sample rate, Hz.

    Returns
    -------
    ndarray of float64, shape (ceil(order / 2), 6)
        Rows ``b0, b1, b2, 1, a1, a2``; new, owned by the caller.
    """
    n = int(order)
    if n < 1 or not 0.0 < cutoff_hz < 0.5 * rate_hz:
        raise ValueError("order must be >= 1 and the cut-off inside (0, rate_hz / 2)")
    warped = 4.0 * math.tan(math.pi * cutoff_hz / rate_hz)
    analog = -np.exp(1j * np.pi * np.arange(-n + 1, n, 2) / (2 * n)) * warped
    digital = (4.0 + analog) / (4.0 - analog)
    gain = warped ** n * float(np.real(1.0 / np.prod(4.0 - analog)))
    tol = 100 * np.finfo(float).eps
    complex_poles = [complex(p) for p in digital if p.imag > tol * abs(p)]
    real_poles = [float(p.real) for p in digital if abs(p.imag) <= tol * abs(p)]
    zeros = [-1.0] * n
    if n % 2:  # an odd order gets a pole and a zero at the origin: every section has two of each
        real_poles.append(0.0)
        zeros.append(0.0)
    poles = complex_poles + sorted(real_poles)
    sections = []
    while poles:
        sections.append(_next_section(poles, zeros))
    sos = np.array(sections[::-1])
    sos[0, :3] *= gain
    return sos


def _worst(values) -> int:
    # the pole closest to the unit circle (the most resonant), first on ties
    return int(np.argmin([abs(1.0 - abs(v)) for v in values]))


def _next_section(poles: list, zeros: list) -> list:
    """Take the remaining pole closest to the unit circle, its partner and the two nearest zeros."""
    p1 = poles.pop(_worst(poles))
    if isinstance(p1, complex):
        den = [1.0, -2.0 * p1.real, p1.real * p1.real + p1.imag * p1.imag]
    else:
        reals = [i for i, p in enumerate(poles) if not isinstance(p, complex)]
        p2 = poles.pop(reals[_worst([poles[i] for i in reals])])
        den = [1.0, -(p1 + p2), p1 * p2]
    z1 = zeros.pop(int(np.argmin([abs(z - p1) for z in zeros])))
    z2 = zeros.pop(int(np.argmin([abs(z - p1) for z in zeros])))
    return [1.0, -(z1 + z2), z1 * z2] + den


def sos_steady_state(sos: np.ndarray) -> np.ndarray:
    """State of each section (direct form II transposed) after a unit input held for ever.

    The same quantity as ``scipy.signal.sosfilt_zi``. Returns a new (n_sections, 2) array.
    """
    sos = np.asarray(sos, dtype=np.float64)
    zi = np.empty((sos.shape[0], 2))
    level = 1.0  # input of the section
    for k, (b0, b1, b2, a0, a1, a2) in enumerate(sos / sos[:, 3:4]):
        g = (b0 + b1 + b2) / (1.0 + a1 + a2)  # DC gain
        zi[k, 1] = (b2 - a2 * g) * level
        zi[k, 0] = (b1 - a1 * g) * level + zi[k, 1]
        level *= g
    return zi


class _BlockCascade:
    """A cascade of sections run a block of frames at a time, exactly, with numpy only.

    The cascade is one linear state-space system (state: every section's two
    delays, as ``scipy.signal.sosfilt`` keeps them). For a block of n frames
    and state s (2K, S), ``y = T @ x + O @ s`` and ``s' = G @ x + M @ s`` with
    T the lower-triangular Toeplitz matrix of the impulse response, O the
    state-to-output map, G the input-to-state map and M = A**n. Long inputs are
    cut into blocks of ``_BLOCK_FRAMES``: every block's zero-state response is
    one batched product, and the block-end states follow by a parallel prefix
    scan (log2 of the block count steps), so the work is all in BLAS.
    Matrices are cached per block length. Not thread-safe (one owner).
    """

    def __init__(self, sos: np.ndarray):
        sos = np.asarray(sos, dtype=np.float64)
        sos = sos / sos[:, 3:4]
        k2 = 2 * sos.shape[0]
        a = np.zeros((k2, k2))
        b = np.zeros(k2)
        c = np.zeros(k2)
        d = 1.0
        for k, (b0, b1, b2, _a0, a1, a2) in enumerate(sos):
            i = 2 * k
            bk = np.array([b1 - a1 * b0, b2 - a2 * b0])
            a[i:i + 2, :i] = np.outer(bk, c[:i])  # this section's input is the output so far
            a[i:i + 2, i:i + 2] = [[-a1, 1.0], [-a2, 0.0]]
            b[i:i + 2] = bk * d
            c = b0 * c
            c[i] += 1.0
            d = b0 * d
        self.a, self.b, self.c, self.d = a, b, c, d
        self.n_states = k2
        self.unit_state = sos_steady_state(sos).reshape(k2, 1)  # state for a constant input of 1
        self._piece_blocks = max(4, _PRODUCT_WORK // ((_BLOCK_FRAMES + k2 + 1) * _BLOCK_FRAMES))
        self._cache: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self._powers: dict[int, np.ndarray] = {}

    def matrices(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """``([T; G], [O; M])`` for blocks of n frames: (n + 2K, n) and (n + 2K, 2K)."""
        got = self._cache.get(n)
        if got is None:
            got = self._build(n)
            if n <= 2 * _BLOCK_FRAMES:
                self._cache[n] = got
        return got

    def _build(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        k2 = self.n_states
        obs = np.empty((n + 1, k2))  # row i: C A^i
        obs[0] = self.c
        for i in range(n):
            obs[i + 1] = obs[i] @ self.a
        ctrl = np.empty((k2, n))  # column j: A^(n-1-j) B
        v = self.b.copy()
        for j in range(n - 1, -1, -1):
            ctrl[:, j] = v
            v = self.a @ v
        h = np.concatenate([[self.d], obs[:n - 1] @ self.b])  # impulse response
        lag = np.arange(n)[:, None] - np.arange(n)[None, :]
        toeplitz = np.where(lag >= 0, h[np.maximum(lag, 0)], 0.0)
        m = np.linalg.matrix_power(self.a, n)
        return np.vstack([toeplitz, ctrl]), np.vstack([obs[:n], m])

    def run(self, x: np.ndarray, state: np.ndarray) -> np.ndarray:
        """Filter finite x (N, S) from ``state`` (2K, S), updated in place; returns y (N, S), new.

        Runs about the chunk's first sample c: the cascade's DC gain is 1 and
        ``c * unit_state`` is its state for a constant c, so filtering ``x - c``
        from ``state - c * unit_state`` and adding c back is the same filter.
        It keeps the block products small (a 10 kohm level would otherwise
        cancel in them at low cut-offs; common practice, no source).
        """
        c = x[0].copy()
        shift = self.unit_state * c
        state -= shift
        n = x.shape[0]
        if n <= 2 * _BLOCK_FRAMES:
            y = self._one_block(x - c, state)
            y += c
        else:
            # signal-major result (S, N), handed out transposed: an (N, S) view, as sosfilt along axis 0 gives
            yt = np.empty((x.shape[1], n))
            for i in range(0, n, _SLAB_FRAMES):
                self._long(x[i:i + _SLAB_FRAMES], c, state, yt[:, i:i + _SLAB_FRAMES])
            y = yt.T
        state += shift
        return y

    def _one_block(self, x: np.ndarray, state: np.ndarray) -> np.ndarray:
        n = x.shape[0]
        w, om = self.matrices(n)
        r = w @ x
        r += om @ state
        state[...] = r[n:]
        return r[:n]

    def _long(self, x: np.ndarray, c: np.ndarray, state: np.ndarray, out_t: np.ndarray) -> None:
        """Filter x (N, S) - c, add c back, into ``out_t`` (S, N); ``state`` updated in place."""
        n, n_sig = x.shape
        bl, k2 = _BLOCK_FRAMES, self.n_states
        nb = n // bl
        if nb < 2:  # the last slab of a stream can be short
            out_t[...] = (self._one_block(x - c, state) + c).T
            return
        head = nb * bl
        w, om = self.matrices(bl)
        # signal-major rows [the block's frames - c | its start state | c], one per block and signal
        z = np.empty((n_sig, nb, bl + k2 + 1))
        np.subtract(x[:head].T.reshape(n_sig, nb, bl), c[:, None, None], out=z[:, :, :bl])
        z[:, :, -1] = c[:, None]
        ends = np.empty((n_sig, nb, k2))  # each block's end state from a zero start
        g_t = w[bl:].T
        for j in range(0, nb, self._piece_blocks):
            np.matmul(z[:, j:j + self._piece_blocks, :bl], g_t, out=ends[:, j:j + self._piece_blocks])
        ends[:, 0] += state.T @ om[bl:].T
        # inclusive scan of s_j = M s_(j-1) + e_j: after the step of span d, ends[j] holds the
        # sum over the last 2d blocks (Hillis-Steele; M**d is stable, so nothing grows)
        d = 1
        while d < nb:
            ends[:, d:] += ends[:, :-d] @ self._power(d * bl)  # the product is new: no aliasing
            d *= 2
        z[:, 0, bl:-1] = state.T
        z[:, 1:, bl:-1] = ends[:, :-1]
        # y = T (x - c) + O s + c for every block at once
        out3 = out_t[:, :head].reshape(n_sig, nb, bl)
        stacked = self._stacked(bl)
        for j in range(0, nb, self._piece_blocks):
            np.matmul(z[:, j:j + self._piece_blocks], stacked, out=out3[:, j:j + self._piece_blocks])
        state[...] = ends[:, -1].T
        if head < n:
            out_t[:, head:] = (self._one_block(x[head:] - c, state) + c).T

    def _stacked(self, bl: int) -> np.ndarray:
        s = self._powers.get(-bl)
        if s is None:
            w, om = self.matrices(bl)
            s = self._powers[-bl] = np.vstack([w[:bl].T, om[:bl].T, np.ones((1, bl))])  # (bl + 2K + 1, bl)
        return s

    def _power(self, n: int) -> np.ndarray:
        """``(A**n).T``, cached (n > 0)."""
        p = self._powers.get(n)
        if p is None:
            p = self._powers[n] = np.ascontiguousarray(np.linalg.matrix_power(self.a, n).T)
        return p


class LowPassFilter:
    """Butterworth low-pass in second-order sections, state kept between calls.

    Each signal's state starts at the steady state for its first valid sample
    (so a signal sitting at 10 kohm does not rise from 0), and restarts the
    same way after a NaN (see the module docstring).

    Parameters
    ----------
    n_signals : int
    cutoff_hz : float
        -3 dB frequency, Hz; 0 passes the input through.
    rate_hz : float
        Sample rate, Hz; the cut-off must be below half of it.
    order : int
        Filter order, 1..8.

    Raises
    ------
    UserError
        Cut-off not below the Nyquist frequency, or a non-positive rate.
    """

    def __init__(self, n_signals: int, *, cutoff_hz: float, rate_hz: float, order: int = 2):
        self.n_signals = int(n_signals)
        self.cutoff_hz = float(cutoff_hz)
        self.rate_hz = float(rate_hz)
        self.order = int(order)
        if not self.rate_hz > 0:
            raise UserError(f"sample rate must be positive, got {rate_hz!r} Hz")
        if self.cutoff_hz < 0:
            raise UserError(f"low-pass cut-off must not be negative, got {cutoff_hz!r} Hz")
        if self.cutoff_hz > 0 and self.cutoff_hz >= 0.5 * self.rate_hz:
            raise UserError(
                f"low-pass cut-off {self.cutoff_hz:g} Hz must be below half the sample rate "
                f"({0.5 * self.rate_hz:g} Hz)"
            )
        if self.cutoff_hz > 0:
            self.sos = butterworth_lowpass_sos(self.order, cutoff_hz=self.cutoff_hz, rate_hz=self.rate_hz)
            self._cascade = _BlockCascade(self.sos)
            self._zi_unit = self._cascade.unit_state  # (2K, 1), steady state for input 1
        else:
            self.sos = None
        self.reset()

    @property
    def enabled(self) -> bool:
        return self.sos is not None

    def reset(self) -> None:
        """Forget the past; the next valid sample of each signal starts it afresh."""
        if self.sos is not None:
            # (2K, S): the two delays of each section (direct form II transposed), section-major
            self._state = np.zeros((2 * self.sos.shape[0], self.n_signals))
        self._started = np.zeros(self.n_signals, dtype=bool)

    def process(self, x: np.ndarray) -> np.ndarray:
        """Filter N frames.

        Parameters
        ----------
        x : array_like, shape (N, S)

        Returns
        -------
        ndarray of float64, shape (N, S)
            New, owned by the caller (column-major for long inputs, as
            ``scipy.signal.sosfilt`` along axis 0 gives); NaN where the input is NaN.
        """
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 2 or x.shape[1] != self.n_signals:
            raise ValueError(f"expected shape (N, {self.n_signals}), got {x.shape}")
        if self.sos is None or x.shape[0] == 0:
            return x.copy()
        finite = np.isfinite(x)
        if self._started.all() and finite.all():
            # the common case: all signals at once
            return self._cascade.run(x, self._state)
        y = np.full_like(x, np.nan)
        for j in range(self.n_signals):
            self._column(x[:, j:j + 1], finite[:, j], y[:, j:j + 1], j)
        return y

    def _column(self, xj: np.ndarray, ok: np.ndarray, yj: np.ndarray, j: int) -> None:
        n = xj.shape[0]
        state = self._state[:, j:j + 1].copy()
        i = 0
        while i < n:
            if not ok[i]:
                self._started[j] = False
                nxt = np.flatnonzero(ok[i:])
                if nxt.size == 0:
                    break
                i += int(nxt[0])
            bad = np.flatnonzero(~ok[i:])
            stop = n if bad.size == 0 else i + int(bad[0])
            if not self._started[j]:
                state[:] = self._zi_unit * xj[i, 0]
                self._started[j] = True
            yj[i:stop] = self._cascade.run(xj[i:stop], state)
            i = stop
        self._state[:, j:j + 1] = state


class FilterChain:
    """Spike filter, then low-pass: what the processing thread applies to resistances.

    Parameters
    ----------
    n_signals : int
    rate_hz : float
    spike_window : int
        1 = no spike filter.
    cutoff_hz : float
        0 = no low-pass.
    order : int
    """

    def __init__(self, n_signals: int, *, rate_hz: float, spike_window: int, cutoff_hz: float, order: int):
        self.n_signals = int(n_signals)
        self.rate_hz = float(rate_hz)
        self.spike = SpikeFilter(n_signals, window=spike_window)
        self.lowpass = LowPassFilter(n_signals, cutoff_hz=cutoff_hz, rate_hz=rate_hz, order=order)

    @classmethod
    def from_rig(cls, rig: Rig, *, rate_hz: float, n_signals: int) -> "FilterChain":
        """The rig file's ``[filters]`` at the device's sample rate.

        Raises
        ------
        UserError
            The rig's ``lowpass_hz`` is not below half of ``rate_hz``.
        """
        try:
            return cls(
                n_signals,
                rate_hz=rate_hz,
                spike_window=rig.spike_window,
                cutoff_hz=rig.lowpass_hz,
                order=rig.lowpass_order,
            )
        except UserError as exc:
            raise UserError(f"{rig.source}: [filters] lowpass_hz: {exc}") from None

    def process(self, x: np.ndarray) -> np.ndarray:
        """Filter N frames, shape (N, S) -> (N, S) float64 (new array)."""
        return self.lowpass.process(self.spike.process(x))

    def reset(self) -> None:
        self.spike.reset()
        self.lowpass.reset()


def centered_median(x: np.ndarray, *, window: int) -> np.ndarray:
    """Running median centred on each frame (offline; no delay), NaN ignored.

    Near the ends the window holds only the frames there are. Equal to
    :class:`SpikeFilter` output shifted back by ``(window - 1) // 2`` frames.

    Parameters
    ----------
    x : array_like, shape (N, S)
    window : int
        Odd, >= 1.
    """
    x = np.asarray(x, dtype=np.float64)
    if window % 2 == 0 or window < 1:
        raise ValueError("window must be odd and >= 1")
    half = (window - 1) // 2
    if half == 0:
        return x.copy()
    n, n_sig = x.shape
    f = SpikeFilter(n_sig, window=window)
    out = np.empty_like(x)
    chunk = 1 << 16  # bounded memory for the (chunk, S, window) view

    def place(t0: int, y: np.ndarray) -> None:
        # causal output at frame t is the median centred on frame t - half
        c0 = t0 - half
        lo = max(0, -c0)
        hi = min(y.shape[0], n - c0)
        if hi > lo:
            out[c0 + lo:c0 + hi] = y[lo:hi]

    for t0 in range(0, n, chunk):
        place(t0, f.process(x[t0:t0 + chunk]))
    # flush: NaN frames are ignored by the median, so the last windows shrink
    place(n, f.process(np.full((half, n_sig), np.nan)))
    return out


def filtfilt_zero_phase(
    x: np.ndarray,
    *,
    rate_hz: float,
    cutoff_hz: float,
    order: int = 2,
    spike_window: int = 1,
) -> np.ndarray:
    """Offline, zero-phase version of :class:`FilterChain` (opt-in for ``tapcurve process``).

    A centred running median (:func:`centered_median`), then the Butterworth
    low-pass run forwards and backwards (``scipy.signal.sosfiltfilt``), which
    doubles the attenuation in dB and removes the delay. Each run of valid
    samples of each signal is filtered on its own; NaN stay NaN. Runs too
    short for the filter's edge padding are padded less.

    Parameters
    ----------
    x : array_like, shape (N, S)
    rate_hz, cutoff_hz, order, spike_window
        As for :class:`FilterChain`.

    Returns
    -------
    ndarray of float64, shape (N, S), new.
    """
    x = np.asarray(x, dtype=np.float64)
    y = centered_median(x, window=spike_window) if spike_window > 1 else x.copy()
    if cutoff_hz <= 0:
        return y
    from scipy import signal  # offline and opt-in: the live path never pays for this import

    # validates the cut-off the same way as the live filter
    sos = LowPassFilter(1, cutoff_hz=cutoff_hz, rate_hz=rate_hz, order=order).sos
    default_pad = 3 * (2 * sos.shape[0] + 1)  # sosfiltfilt's own default padlen
    for j in range(y.shape[1]):
        col = y[:, j]
        ok = np.isfinite(col)
        if ok.all():
            runs = [(0, col.shape[0])]
        else:
            edges = np.diff(np.concatenate([[0], ok.astype(np.int8), [0]]))
            runs = list(zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)))
        for a, b in runs:
            if b - a < 2:
                continue
            pad = min(default_pad, b - a - 1)
            col[a:b] = signal.sosfiltfilt(sos, col[a:b], padlen=pad)
    return y
