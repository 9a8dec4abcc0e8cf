"""Small-chunk kernels of the strip memory (acquire.core.memory_ops) and the compensator fit
(acquire.core.memory_invfit), against outside references and closed forms."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from acquire.core.memory import PIOperator, SegmentMemory, StripMemory
from acquire.core.memory_invfit import best_lag, fit_inverse_pi, shift_reference
from acquire.core.memory_ops import block_weights, first_order_coefs, play_small, relax_small


@pytest.mark.parametrize("order", [1, 2])
def test_relax_small_equals_scipy_lfilter_bit_for_bit(order):
    # Reference: scipy.signal.lfilter (transposed direct form II) with the same state, chunk by chunk.
    rng = np.random.default_rng(1)
    s = 4
    a = np.array([np.poly(rng.uniform(0.9, 0.999, order)) for _ in range(s)]).T  # (order + 1, S), a[0] = 1
    b = rng.uniform(-1.0, 1.0, (order + 1, s))
    x = rng.normal(size=(200, s))
    want = np.stack([signal.lfilter(b[:, j], a[:, j], x[:, j]) for j in range(s)], axis=1)
    zi, got = np.zeros((order, s)), []
    for i in range(0, 200, 7):
        y, zi = relax_small(x[i:i + 7], zi, b, a, coefs=first_order_coefs(b, a))
        got.append(y)
    assert np.array_equal(np.concatenate(got), want)


def test_play_small_is_the_play_recursion_and_weights_sum():
    # Reference: the play operator's definition, y_n = max(u_n - r, min(u_n + r, y_{n-1}))
    # (Brokate & Sprekels 1996, from memory), as a scalar loop.
    rng = np.random.default_rng(2)
    u = np.cumsum(rng.normal(size=(12, 2)), axis=0)
    r = np.array([[0.0, 0.5, 1.0], [0.0, 0.2, 2.0]])
    w = np.array([[0.7, 0.2, 0.1], [0.5, 0.3, 0.2]])
    plays, end = play_small(u, r, u[0][:, None] + np.zeros_like(r), weights=None)
    for s in range(2):
        for k in range(3):
            y, ref = u[0, s], []
            for v in u[:, s]:
                y = max(v - r[s, k], min(v + r[s, k], y))
                ref.append(y)
            assert np.array_equal(plays[:, s, k], ref)
    assert np.array_equal(end, plays[-1])
    sums, _ = play_small(u, r, u[0][:, None] + np.zeros_like(r), weights=block_weights(w))
    assert np.allclose(sums, np.einsum("nsk,sk->ns", plays, w), rtol=0, atol=1e-12)


def test_inverse_fit_gives_back_a_known_pi():
    # Closed form: the inverse of a PI operator is a PI operator (Krejci & Kuhnen 2001, from memory), so
    # fitting the compensator from H[u] to u on inverse thresholds that contain the exact ones recovers H.
    r, w = np.array([0.0, 0.05, 0.1, 0.2]), np.array([0.7, 0.12, 0.1, 0.08])
    pi = PIOperator(r[None], w[None])
    t = np.linspace(0, 60, 6000)
    u = (0.4 * np.sin(0.7 * t) + 0.25 * np.sin(2.3 * t + 1) * np.sin(0.13 * t))[:, None]
    y = pi.process(u)[:, 0]
    q = pi.inverse().thresholds[0]
    fr, fw, sse = fit_inverse_pi(y, u[:, 0], np.ones(t.size, bool), np.unique(np.r_[q, 0.01, 0.03, 0.3]))
    assert sse < 1e-16 * t.size
    seg = SegmentMemory(fr, fw)
    back = StripMemory([seg]).forward(u, rate_hz=100.0)[:, 0]
    assert np.allclose(back, y, rtol=0, atol=1e-9)


def test_flat_rows_of_another_recording_pin_the_pi_against_the_films_own_offset():
    # Closed form as above (the inverse of a PI is a PI, Krejci & Kuhnen 2001, from memory), now with the
    # film's u off by a constant (its flat is not the holds' flat) and the flat holds of a holds recording
    # (u = 0 after a bend to each side) as extra rows: the offset goes to the film's own column, the PI
    # comes back exactly. Without those rows the plays take the offset for hysteresis.
    r, w = np.array([0.0, 0.05, 0.1, 0.2]), np.array([0.7, 0.12, 0.1, 0.08])
    pi = PIOperator(r[None], w[None])
    t = np.linspace(0, 60, 6000)
    u = (0.4 * np.sin(0.7 * t) + 0.25 * np.sin(2.3 * t + 1) * np.sin(0.13 * t))[:, None]
    y = pi.process(u)[:, 0]
    levels = [0.0, 0.8, 0.0, -0.5, 0.0]  # flat, the largest bend, flat, the opposite bend, flat
    uh = np.concatenate([np.r_[np.linspace(a, b, 50), np.full(200, b)] for a, b in zip([0.0] + levels, levels)])
    yh = PIOperator(r[None], w[None]).process(uh[:, None])[:, 0]  # a recording of its own, from rest
    known = np.where((uh == 0.0) & (np.arange(uh.size) % 250 >= 50), 0.0, np.nan)
    q = np.unique(np.r_[pi.inverse().thresholds[0], 0.01, 0.03, 0.3])
    rows = np.ones(t.size, bool)
    fr, fw, sse = fit_inverse_pi(y, u[:, 0] + 0.03, rows, q, extra=[(yh, known)])
    assert sse < 1e-16 * t.size
    back = StripMemory([SegmentMemory(fr, fw)]).forward(u, rate_hz=100.0)[:, 0]
    assert np.allclose(back, y, rtol=0, atol=1e-9)
    fr, fw, sse = fit_inverse_pi(y, u[:, 0] + 0.03, rows, q)  # the offset left to the plays
    assert sse > 1e-8 * t.size
    back = StripMemory([SegmentMemory(fr, fw)]).forward(u, rate_hz=100.0)[:, 0]
    assert np.max(np.abs(back - y)) > 1e-3


def test_shift_reference_on_a_ramp_and_best_lag_on_a_parabola():
    # Closed forms: a ramp read dt later is the ramp plus slope * dt; a parabola's vertex is -b / 2a.
    t = np.arange(100) * 0.01
    k = np.stack([3.0 * t, -2.0 * t], axis=1)
    got = shift_reference(t, k, lag_s=0.03)
    assert np.allclose(got[:-3], k[:-3] + np.array([3.0, -2.0]) * 0.03, rtol=0, atol=1e-12)
    assert np.isnan(got[-1]).all()  # beyond the session
    assert best_lag(lambda g: (g - 0.037) ** 2 + 1.0, [0.0, 0.02, 0.04, 0.06]) == pytest.approx(0.037, abs=1e-12)


@pytest.mark.parametrize("b, a", [([0.3, -0.25], [1.0, -0.95]), ([1.0, -1.9, 0.905], [1.0, -1.8, 0.81]),
                                  ([0.5], [1.0, -0.5]), ([2.0, 0.4, 0.1], [2.0, -0.6])])
def test_lfilter_zi_is_scipys(b, a):
    # scipy.signal.lfilter_zi (reference library): the rest state under a unit step; ours needs no scipy
    from scipy import signal

    from acquire.core.memory import _lfilter_zi

    np.testing.assert_allclose(_lfilter_zi(np.array(b), np.array(a)), signal.lfilter_zi(b, a), rtol=1e-12, atol=1e-15)
