"""Filters: Butterworth response, chunking invariance, spikes, NaN handling, zero-phase offline."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import ndimage, signal

from acquire.errors import UserError
from acquire.core.filters import (
    FilterChain,
    LowPassFilter,
    SpikeFilter,
    butterworth_lowpass_sos,
    centered_median,
    filtfilt_zero_phase,
    sos_steady_state,
)
from acquire.rig import load_rig

RATE = 200.0


def run_chunked(filt, x, rng, *, max_chunk=40):
    out, i = [], 0
    while i < x.shape[0]:
        k = int(rng.integers(1, max_chunk))
        if rng.random() < 0.3:
            k = 1  # plenty of single-frame chunks, as live
        out.append(filt.process(x[i:i + k]))
        i += k
    return np.concatenate(out)


@pytest.mark.parametrize("order", [1, 2, 4])
def test_butterworth_is_minus_3db_at_cutoff(order):
    # Butterworth's maximally flat response |H(j w_c)|^2 = 1/2 at the cut-off, i.e. -3.0103 dB
    # (S. Butterworth, "On the theory of filter amplifiers", Wireless Engineer 7, 1930);
    # the digital design keeps it at the pre-warped cut-off; checked with scipy.signal.sosfreqz.
    f = LowPassFilter(1, cutoff_hz=25.0, rate_hz=RATE, order=order)
    _, h = signal.sosfreqz(f.sos, worN=[25.0, 1.0], fs=RATE)
    db = 20 * np.log10(np.abs(h))
    assert db[0] == pytest.approx(-10 * np.log10(2), abs=1e-6)
    assert db[1] == pytest.approx(0.0, abs=0.01)  # flat pass band


def test_stateful_filter_passes_a_cutoff_sine_at_one_over_root_two():
    # Same definition as above, measured on our stateful filter fed in chunks.
    rng = np.random.default_rng(0)
    t = np.arange(4000) / RATE
    x = np.sin(2 * np.pi * 25.0 * t)[:, None]
    y = run_chunked(LowPassFilter(1, cutoff_hz=25.0, rate_hz=RATE, order=2), x, rng)
    amp = np.sqrt(2 * np.mean(y[1000:, 0] ** 2))  # RMS of the steady part
    assert amp == pytest.approx(1 / np.sqrt(2), rel=2e-3)


def test_chunked_equals_whole_stream_with_nan_gaps():
    # Reference: the same filter fed the whole stream at once (the property the brief asks for).
    rng = np.random.default_rng(2)
    x = 10000.0 + np.cumsum(rng.normal(size=(3000, 6)), axis=0)
    x[500, 1] = np.nan  # isolated: bridged by the median
    x[900:960, 2] = np.nan  # long fault
    x[1500:1503, :] = np.nan
    x[2000, 4] = 1e6  # spike
    whole = FilterChain(6, rate_hz=RATE, spike_window=5, cutoff_hz=25.0, order=2).process(x)
    for seed in range(3):
        chunked = run_chunked(FilterChain(6, rate_hz=RATE, spike_window=5, cutoff_hz=25.0, order=2),
                              x, np.random.default_rng(seed))
        assert np.array_equal(np.isnan(whole), np.isnan(chunked))
        np.testing.assert_allclose(chunked, whole, rtol=1e-12, atol=0, equal_nan=True)


def test_lowpass_starts_at_first_sample_without_step():
    # A constant input must come out constant from the first frame: zi = steady state of x[0]
    # (scipy.signal.sosfilt_zi, "initial conditions for step response steady state").
    x = np.full((50, 3), [10000.0, 5000.0, 20000.0])
    y = LowPassFilter(3, cutoff_hz=10.0, rate_hz=RATE, order=4).process(x)
    np.testing.assert_allclose(y, x, rtol=1e-12)


def test_nan_does_not_poison_the_state():
    # Documented rule: NaN in -> NaN out, and the signal restarts from its next valid sample.
    rng = np.random.default_rng(3)
    x = 100.0 + rng.normal(size=(400, 2))
    x[100:150, 0] = np.nan
    f = LowPassFilter(2, cutoff_hz=20.0, rate_hz=RATE, order=2)
    y = f.process(x)
    assert np.isnan(y[100:150, 0]).all() and np.isfinite(y[150:, 0]).all()
    fresh = LowPassFilter(1, cutoff_hz=20.0, rate_hz=RATE, order=2).process(x[150:, :1])
    np.testing.assert_allclose(y[150:, 0], fresh[:, 0], rtol=1e-12)
    np.testing.assert_allclose(y[:, 1], LowPassFilter(1, cutoff_hz=20.0, rate_hz=RATE).process(x[:, 1:])[:, 0])


def test_spike_filter_removes_an_isolated_spike():
    # Removing isolated spikes with a running median: common practice, no source.
    t = np.arange(300) / RATE
    clean = 10000.0 + 500.0 * np.sin(2 * np.pi * 1.0 * t)
    x = clean.copy()
    x[150] += 50000.0
    y = SpikeFilter(1, window=5).process(x[:, None])[:, 0]
    # a 5-frame median lags a smooth signal by 2 frames; compare with the lagged clean signal
    assert np.max(np.abs(y[10:] - clean[8:-2])) < 5.0


def test_spike_filter_matches_scipy_median_shifted():
    # Reference implementation: scipy.ndimage.median_filter (centred); the causal median at frame i
    # is the centred one at frame i - (window - 1) / 2.
    rng = np.random.default_rng(4)
    x = rng.normal(size=(200, 3))
    causal = SpikeFilter(3, window=7).process(x)
    centred = ndimage.median_filter(x, size=(7, 1), mode="nearest")
    np.testing.assert_allclose(causal[6:], centred[3:-3], rtol=0, atol=0)
    np.testing.assert_allclose(centered_median(x, window=7)[3:-3], centred[3:-3], rtol=0, atol=0)
    np.testing.assert_allclose(causal[0], x[0])  # start-up: median of what there is


def test_spike_filter_ignores_nan_in_window():
    x = np.array([[1.0], [2.0], [np.nan], [4.0], [5.0], [np.nan], [np.nan], [np.nan], [np.nan], [np.nan]])
    y = SpikeFilter(1, window=3).process(x)[:, 0]
    # medians of the valid values in the last 3 frames (hand-computed)
    np.testing.assert_allclose(y[:6], [1.0, 1.5, 1.5, 3.0, 4.5, 4.5])
    assert np.isnan(y[7:]).all()


def test_zero_phase_squares_the_magnitude_and_has_no_lag():
    # Forward-backward filtering squares the magnitude response (-6.02 dB at the cut-off) and
    # has zero phase (F. Gustafsson, "Determining the initial states in forward-backward
    # filtering", IEEE Trans. Signal Processing 44, 1996).
    t = np.arange(6000) / RATE
    x = np.stack([np.sin(2 * np.pi * 25.0 * t), np.sin(2 * np.pi * 2.0 * t)], axis=1)
    y = filtfilt_zero_phase(x, rate_hz=RATE, cutoff_hz=25.0, order=2)
    mid = slice(1000, 5000)
    amp = np.sqrt(2 * np.mean(y[mid, 0] ** 2))
    assert 20 * np.log10(amp) == pytest.approx(-20 * np.log10(2), abs=0.05)
    np.testing.assert_allclose(y[mid, 1], x[mid, 1], atol=2e-3)  # no lag at 2 Hz


def test_zero_phase_handles_nan_runs():
    rng = np.random.default_rng(5)
    x = 50.0 + rng.normal(size=(1000, 2))
    x[300:320, 0] = np.nan
    x[998:, 1] = np.nan
    y = filtfilt_zero_phase(x, rate_hz=RATE, cutoff_hz=10.0, order=2, spike_window=5)
    # the centred 5-frame median reaches 2 frames into each side of the gap
    assert np.isnan(y[302:318, 0]).all()
    assert np.isfinite(np.delete(y[:, 0], np.arange(302, 318))).all()
    assert np.isfinite(y[:998, 1]).all()
    assert abs(np.nanmean(y) - 50.0) < 0.2


def test_cutoff_above_nyquist_is_a_user_error():
    rig = load_rig(None)  # the demo rig: 40 Hz low-pass, needs more than 80 Hz sampling
    with pytest.raises(UserError, match="lowpass_hz"):
        FilterChain.from_rig(rig, rate_hz=40.0, n_signals=6)
    chain = FilterChain.from_rig(rig, rate_hz=RATE, n_signals=6)
    assert chain.lowpass.enabled and chain.spike.window == rig.spike_window


def test_reset_forgets_state():
    rng = np.random.default_rng(6)
    x = rng.normal(size=(100, 2))
    f = FilterChain(2, rate_hz=RATE, spike_window=3, cutoff_hz=30.0, order=2)
    a = f.process(x)
    f.process(rng.normal(size=(37, 2)))
    f.reset()
    np.testing.assert_array_equal(f.process(x), a)


# -- the numpy-only design and block filter, against scipy.signal (the reference library) ------------

CUTOFF_FRACTIONS = (0.002, 0.01, 0.04, 0.1, 0.25, 0.4, 0.49)  # cut-off / sample rate


@pytest.mark.parametrize("order", range(1, 9))
def test_design_equals_scipy_butter(order):
    # Reference: scipy.signal.butter(order, fc, fs=rate, output="sos"), the same sections in the same order.
    for rate in (200.0, 1000.0, 4096.0):
        for frac in CUTOFF_FRACTIONS:
            ours = butterworth_lowpass_sos(order, cutoff_hz=frac * rate, rate_hz=rate)
            ref = signal.butter(order, frac * rate, fs=rate, output="sos")
            np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12, err_msg=f"{order=} {frac=} {rate=}")


@pytest.mark.parametrize("order", [1, 2, 3, 4, 8])
def test_steady_state_equals_scipy_sosfilt_zi(order):
    for frac in CUTOFF_FRACTIONS:
        sos = signal.butter(order, frac, fs=1.0, output="sos")
        ref = signal.sosfilt_zi(sos)
        np.testing.assert_allclose(sos_steady_state(sos), ref, rtol=1e-10, atol=1e-12 * np.abs(ref).max())


def _sosfilt_reference(sos, x):
    # scipy.signal.sosfilt along axis 0, started from the steady state of the first frame
    zi = signal.sosfilt_zi(sos)[:, :, None] * x[0]
    return signal.sosfilt(sos, x, axis=0, zi=zi)[0]


@pytest.mark.parametrize("order", [1, 2, 3, 4, 6, 8])
@pytest.mark.parametrize("frac", [0.005, 0.04, 0.2, 0.45])
def test_block_filter_equals_scipy_sosfilt(order, frac):
    # Reference: scipy.signal.sosfilt with zi. Long enough for the many-block path and a partial slab.
    rng = np.random.default_rng(order)
    x = 10000.0 + np.cumsum(rng.normal(size=(70001, 3)), axis=0)
    f = LowPassFilter(3, cutoff_hz=frac * RATE, rate_hz=RATE, order=order)
    y = f.process(x)
    ref = _sosfilt_reference(f.sos, x)
    scale = np.abs(ref).max()
    np.testing.assert_allclose(y, ref, rtol=0, atol=1e-12 * scale)


@pytest.mark.parametrize("order", [2, 5])
def test_block_filter_is_chunk_invariant(order):
    # Random chunkings from single frames to whole slabs agree with one call (and with scipy).
    rng = np.random.default_rng(10 + order)
    x = 5000.0 + np.cumsum(rng.normal(size=(20000, 4)), axis=0)
    whole = LowPassFilter(4, cutoff_hz=12.0, rate_hz=RATE, order=order).process(x)
    scale = np.abs(whole).max()
    for max_chunk in (3, 25, 100, 5000):
        f = LowPassFilter(4, cutoff_hz=12.0, rate_hz=RATE, order=order)
        chunked = run_chunked(f, x, rng, max_chunk=max_chunk)
        np.testing.assert_allclose(chunked, whole, rtol=0, atol=1e-12 * scale, err_msg=f"{max_chunk=}")
    np.testing.assert_allclose(whole, _sosfilt_reference(signal.butter(order, 12.0, fs=RATE, output="sos"), x),
                               rtol=0, atol=1e-12 * scale)


def test_filter_path_imports_no_scipy():
    # Start-up: the numeric core must not pay for importing scipy (about a second).
    code = (
        "import sys, numpy as np\n"
        "import acquire.core.pipeline\n"
        "from acquire.core.filters import FilterChain\n"
        "from acquire.core.reconstruct import Reconstructor\n"
        "FilterChain(3, rate_hz=1000.0, spike_window=3, cutoff_hz=40.0, order=4).process(np.ones((500, 3)))\n"
        "Reconstructor([0.016] * 6, tip_length_m=0.01).shape_xy(np.zeros((2, 6)))\n"
        "print(sorted(m for m in sys.modules if m.split('.')[0] == 'scipy'))\n"
    )
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60,
                         cwd=Path(__file__).resolve().parents[3])
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "[]"
