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

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy import signal

from acquire.errors import UserError
from acquire.rig import Rig

__all__ = ["SpikeFilter", "LowPassFilter", "FilterChain", "filtfilt_zero_phase", "centered_median"]

_SMALL_BLOCK = 16  # frames: below this, per-call overhead dominates and small-block code paths pay


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
            self.sos = signal.butter(self.order, self.cutoff_hz, btype="low", output="sos", fs=self.rate_hz)
            self._zi_unit = signal.sosfilt_zi(self.sos)  # (n_sections, 2), steady state for input 1
            self._sos_rows = [tuple(float(c) for c in row) for row in self.sos]
        else:
            self.sos = None
        self.reset()

    @property
    def enabled(self) -> bool:
        return self.sos is not None

    def reset(self) -> None:
        """Forget the past; the next valid sample of each signal starts it afresh."""
        if self.sos is not None:
            self._zi = np.zeros((self.sos.shape[0], 2, self.n_signals))
        self._started = np.zeros(self.n_signals, dtype=bool)

    def process(self, x: np.ndarray) -> np.ndarray:
        """Filter N frames.

        Parameters
        ----------
        x : array_like, shape (N, S)

        Returns
        -------
        ndarray of float64, shape (N, S)
            NaN where the input is NaN.
        """
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 2 or x.shape[1] != self.n_signals:
            raise ValueError(f"expected shape (N, {self.n_signals}), got {x.shape}")
        if self.sos is None or x.shape[0] == 0:
            return x.copy()
        finite = np.isfinite(x)
        if self._started.all() and finite.all():
            if x.shape[0] * self.sos.shape[0] <= 4:
                return self._few_frames(x)
            # the common case: one call for all signals
            y, self._zi = signal.sosfilt(self.sos, x, axis=0, zi=self._zi)
            return y
        y = np.full_like(x, np.nan)
        for j in range(self.n_signals):
            self._column(x[:, j], finite[:, j], y[:, j], j)
        return y

    def _few_frames(self, x: np.ndarray) -> np.ndarray:
        # the recursion sosfilt runs (direct form II transposed, the same operations in the same
        # order), vectorised over signals: for a frame or two it costs a fraction of sosfilt's call
        zi = self._zi
        y = np.empty_like(x)
        for i in range(x.shape[0]):
            v = x[i]
            for k, (b0, b1, b2, _a0, a1, a2) in enumerate(self._sos_rows):
                out = b0 * v + zi[k, 0]
                zi[k, 0] = b1 * v - a1 * out + zi[k, 1]
                zi[k, 1] = b2 * v - a2 * out
                v = out
            y[i] = v
        return y

    def _column(self, xj: np.ndarray, ok: np.ndarray, yj: np.ndarray, j: int) -> None:
        n = xj.shape[0]
        i = 0
        while i < n:
            if not ok[i]:
                self._started[j] = False
                nxt = np.flatnonzero(ok[i:])
                if nxt.size == 0:
                    return
                i += int(nxt[0])
            bad = np.flatnonzero(~ok[i:])
            stop = n if bad.size == 0 else i + int(bad[0])
            if not self._started[j]:
                self._zi[:, :, j] = self._zi_unit * xj[i]
                self._started[j] = True
            yj[i:stop], zi = signal.sosfilt(self.sos, xj[i:stop], zi=self._zi[:, :, j])
            self._zi[:, :, j] = zi
            i = stop


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
