"""Strip memory: play/PI operators and their inverse, relaxation, streaming, identification, files."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from acquire.core.memory import (MemoryChain, PIOperator, PlayOperator, Relaxation, SegmentMemory,
                                 StripMemory, pi_inverse_parameters)
from acquire.core.memory_fit import fit_memory, hysteresis_band

RATE = 50.0


def run_chunked(op, x, rng, *, max_chunk=60):
    """Feed ``x`` in random chunks (many single frames, as live, some long ones)."""
    out, i = [], 0
    while i < x.shape[0]:
        k = int(rng.integers(1, max_chunk))
        roll = rng.random()
        k = 1 if roll < 0.3 else (int(rng.integers(500, 1500)) if roll > 0.95 else k)
        out.append(op.process(x[i:i + k]))
        i += k
    return np.concatenate(out)


def play_reference(u, r, y0):
    """Plain scalar loop of the play operator's definition (Brokate & Sprekels 1996, from memory)."""
    y, out = y0, []
    for v in u:
        y = max(v - r, min(v + r, y))
        out.append(y)
    return np.array(out)


def random_pi(rng, n_segments, *, signed=False):
    """Thresholds 0 < r_1 < ... and weights with w_0 > 0 and positive cumulative sums."""
    k = int(rng.integers(1, 9))
    r = np.concatenate((np.zeros((n_segments, 1)),
                        np.sort(rng.uniform(0.01, 0.8, (n_segments, k - 1)), axis=1)), axis=1)
    w = rng.uniform(0.0, 0.5, (n_segments, k))
    w[:, 0] = rng.uniform(0.2, 2.0, n_segments)
    if signed and k > 1:  # some negative weights, cumulative sums kept >= 0.1
        w[:, 1:] -= rng.uniform(0.0, 0.4, (n_segments, k - 1))
        w[:, 1:] = np.maximum(w[:, 1:], 0.1 - np.cumsum(w, axis=1)[:, :-1])
    return r, w


def random_input(rng, n, s):
    """Random walk with jumps and holds: reversals of every size."""
    steps = rng.normal(scale=rng.uniform(0.005, 0.1), size=(n, s))
    steps[rng.random((n, s)) < 0.02] *= 30.0
    steps[rng.random((n, s)) < 0.3] = 0.0
    return np.cumsum(steps, axis=0)


# ----------------------------------------------------------------------------- closed forms


@pytest.mark.parametrize("c", [0.2, -0.15])
def test_relaxation_step_response_is_first_order_closed_form(c):
    # First-order lag step response 1 - exp(-t / tau) (closed form of tau z' = y - z); the
    # zero-order-hold discretisation is exact at the sample times (e.g. Franklin, Powell &
    # Workman, "Digital Control of Dynamic Systems", 1998, ch. 4, from memory).
    tau, n0 = 0.5, 10
    y = np.zeros((300, 1))
    y[n0:] = 1.0
    x = Relaxation([[c]], [[tau]], rate_hz=RATE).process(y)
    t = (np.arange(300 - n0)) / RATE
    assert np.allclose(x[:n0], 0.0, atol=1e-15)
    # instantaneous part (1 - c), then creep c (1 - exp(-t/tau)); settles at the step
    assert np.allclose(x[n0:, 0] - (1 - c), c * (1 - np.exp(-t / tau)), rtol=0, atol=1e-12)


def test_two_relaxation_terms_add_their_closed_forms():
    # Superposition of two first-order lags (linearity), same closed form as above.
    c, tau = np.array([0.1, -0.05]), np.array([0.2, 3.0])
    y = np.zeros((500, 1))
    y[1:] = 2.0
    x = Relaxation(c[None], tau[None], rate_hz=RATE).process(y)
    t = np.arange(499) / RATE
    want = 2.0 * ((1 - c.sum()) + (c[:, None] * (1 - np.exp(-t / tau[:, None]))).sum(axis=0))
    assert np.allclose(x[1:, 0], want, rtol=0, atol=1e-12)


def test_play_on_triangle_wave_has_branches_u_minus_r_and_u_plus_r():
    # Play (backlash) operator on a periodic input of amplitude A > r: ascending branch
    # y = u - r, descending y = u + r, horizontal jumps of 2r at the reversals, so the loop is
    # 2r wide in input (Brokate & Sprekels, "Hysteresis and Phase Transitions", 1996, ch. 2;
    # Visintin 1994; both from memory).
    a, r, period = 1.0, 0.3, 400
    ph = np.arange(5 * period) % period / period
    u = a * np.where(ph < 0.5, -1 + 4 * ph, 3 - 4 * ph)  # starts at -A, rising
    y = PlayOperator([[r]]).process(u[:, None])[:, 0, 0]
    rising = np.r_[True, np.diff(u) > 0]
    late = np.arange(u.size) >= period // 2  # after the first peak
    asc = late & rising & (u >= -a + 2 * r)
    desc = late & ~rising & (u <= a - 2 * r)
    assert asc.sum() > 200 and desc.sum() > 200
    assert np.allclose(y[asc], u[asc] - r, atol=1e-12)
    assert np.allclose(y[desc], u[desc] + r, atol=1e-12)
    # loop width in input at output level 0: u = +r rising, u = -r falling
    rise = slice(period + 1, period + period // 2 + 1)  # second cycle, trough to peak
    fall = slice(period + period // 2 + 1, 2 * period)
    up = np.interp(0.0, y[rise], u[rise])
    dn = np.interp(0.0, y[fall][::-1], u[fall][::-1])
    assert up - dn == pytest.approx(2 * r, abs=1e-9)


@pytest.mark.parametrize("n", [1, 7, 25, 1023, 1024, 1025, 5001])
def test_scan_play_equals_plain_loop_exactly(n):
    # Reference: the definition as a scalar Python loop; the scan only selects values (min/max),
    # so it must agree bit for bit.
    rng = np.random.default_rng(n)
    u = random_input(rng, n, 3)
    r = np.array([[0.0, 0.05, 0.4], [0.0, 0.2, 2.0], [0.1, 0.3, 0.5]])
    y = PlayOperator(r).process(u)
    for s in range(3):
        for k in range(3):
            assert np.array_equal(y[:, s, k], play_reference(u[:, s], r[s, k], u[0, s]))


# ----------------------------------------------------------------------------- inverse


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), signed=st.booleans())
def test_pi_inverse_formula_inverts_both_ways(seed, signed):
    # Krejci & Kuhnen, "Inverting the Prandtl-Ishlinskii hysteresis operator", IEE Proc.
    # Control Theory Appl. 148(3), 2001 (from memory): the formula is the thing checked here.
    rng = np.random.default_rng(seed)
    r, w = random_pi(rng, 3, signed=signed)
    u = random_input(rng, 800, 3)
    pi = PIOperator(r, w)
    inv = pi.inverse()
    assert np.allclose(inv.process(pi.process(u)), u, rtol=0, atol=1e-9)
    x = random_input(rng, 800, 3)
    assert np.allclose(PIOperator(r, w).process(pi.inverse().process(x)), x, rtol=0, atol=1e-9)
    # the inverse of the inverse is the operator again (same formula applied twice)
    r2, w2 = pi_inverse_parameters(*pi_inverse_parameters(r, w))
    assert np.allclose(r2, r, atol=1e-12) and np.allclose(w2, w, rtol=1e-12, atol=1e-12)


def test_relaxation_inverse_recovers_input():
    # Exact algebraic inverse of a linear causal filter (the compensator's first stage).
    rng = np.random.default_rng(3)
    y = random_input(rng, 3000, 3)
    rel = Relaxation([[0.2, -0.1], [0.3, 0.0], [-0.2, 0.05]], [[1.0, 5.0], [2.0, 1.0], [0.5, 3.0]],
                     rate_hz=RATE)
    assert np.allclose(rel.inverse().process(rel.process(y)), y, rtol=0, atol=1e-9 * np.abs(y).max())


def test_compensator_recovers_simulator_input_streaming():
    # Inverse of a composition: x = C[H[u]] gives u = H^-1[C^-1[x]] (algebra; the two tests
    # above check each inverse alone). Ragged per-segment terms exercise the padding.
    rng = np.random.default_rng(4)
    u = random_input(rng, 4000, 2)
    mem = StripMemory([SegmentMemory([0, 0.05, 0.2], [0.7, 0.2, 0.1], [0.15], [1.5]),
                       SegmentMemory([0, 0.1], [1.2, -0.3], [-0.1, 0.05], [0.3, 4.0])])
    x = run_chunked(mem.simulator(rate_hz=RATE), u, rng)
    back = run_chunked(mem.compensator(rate_hz=RATE), x, rng)
    assert np.allclose(back, u, rtol=0, atol=1e-9)


def test_identity_memory_passes_input_through_exactly():
    # Definition: a play with r = 0 is the identity (F_0[u] = u), weight 1, no creep terms.
    u = random_input(np.random.default_rng(5), 500, 3)
    mem = StripMemory.identity(3)
    assert np.array_equal(mem.forward(u, rate_hz=RATE), u)
    assert np.array_equal(mem.compensate(u, rate_hz=RATE), u)


def test_unstable_compensator_is_refused():
    # First order: the inverse's pole (a - c) / (1 - c) leaves the unit circle for
    # c > (1 + a) / 2 (algebra of the module's discretisation).
    mem = StripMemory([SegmentMemory(creep_gains=[0.9], creep_taus_s=[0.001])])
    with pytest.raises(ValueError, match="creep_gains"):
        mem.compensator(rate_hz=1000.0)


# ----------------------------------------------------------------------------- streaming


def _with_gaps(u):
    u = u.copy()
    u[:30, 1] = np.nan  # a segment that starts late
    u[700:760, 0] = np.nan
    u[1500:1503, :] = np.nan
    return u


def _operators():
    rng = np.random.default_rng(7)
    r, w = random_pi(rng, 3, signed=True)
    mem = StripMemory([SegmentMemory([0, 0.05, 0.2], [0.7, 0.2, 0.1], [0.15], [1.5]),
                       SegmentMemory([0, 0.1], [1.2, -0.3], [-0.1, 0.05], [0.3, 4.0]),
                       SegmentMemory()])
    rel = Relaxation([[0.2, -0.1], [0.3, 0.0], [0.0, 0.0]], [[1.0, 5.0], [2.0, 1.0], [1.0, 1.0]],
                     rate_hz=RATE)
    return {
        "play": lambda: PlayOperator(r),
        "pi": lambda: PIOperator(r, w),
        "pi_inverse": lambda: PIOperator(r, w).inverse(),
        "relaxation": lambda: rel.inverse().inverse(),
        "relaxation_inverse": lambda: rel.inverse(),
        "simulator": lambda: mem.simulator(rate_hz=RATE),
        "compensator": lambda: mem.compensator(rate_hz=RATE),
        "chain": lambda: MemoryChain([PIOperator(r, w), rel.inverse()]),
    }


@pytest.mark.parametrize("name", list(_operators()))
def test_chunking_does_not_change_output(name):
    # The brief's property: any chunking of a stream gives the whole-stream output to 1e-12.
    make = _operators()[name]
    u = _with_gaps(random_input(np.random.default_rng(8), 3000, 3))
    whole = make().process(u)
    op = make()
    singles = np.concatenate([op.process(u[i:i + 1]) for i in range(len(u))])
    for got in [singles] + [run_chunked(make(), u, np.random.default_rng(s)) for s in range(3)]:
        assert np.array_equal(np.isnan(got), np.isnan(whole))
        assert np.allclose(got, whole, rtol=0, atol=1e-12, equal_nan=True)


@pytest.mark.parametrize("name", ["pi", "relaxation", "compensator"])
def test_nan_frames_give_nan_and_state_holds_last_value(name):
    # The module's rule: NaN in -> NaN out; the memory continues as if the input had stayed at its
    # last valid value (reference: the same stream with the gap filled by that value).
    make = _operators()[name]
    u = random_input(np.random.default_rng(9), 1200, 3)
    gappy, held = u.copy(), u.copy()
    gappy[400:450, 0] = np.nan
    held[400:450, 0] = u[399, 0]
    got, want = make().process(gappy), make().process(held)
    assert np.all(np.isnan(got[400:450, 0]))
    keep = ~np.isnan(gappy)
    assert np.allclose(got[keep], want[keep], rtol=0, atol=1e-12)


def test_state_round_trip_continues_stream():
    # The stream property again: a state handed over continues the stream exactly; reset restarts.
    mem = StripMemory([SegmentMemory([0, 0.1], [0.8, 0.2], [0.2], [1.0])] * 2)
    u = random_input(np.random.default_rng(10), 600, 2)
    a = mem.compensator(rate_hz=RATE)
    first = a.process(u[:300])
    b = mem.compensator(rate_hz=RATE)
    b.state = a.state
    assert np.array_equal(b.process(u[300:]), a.process(u[300:]))
    a.reset()
    assert np.array_equal(a.process(u[:300]), first)


# ----------------------------------------------------------------------------- identification

# Made up for this test (no source): ramps of different speeds to targets on both sides of
# flat, holds of 1 to 15 s, loading and unloading in both directions. (target, ramp s, hold s)
MOVES = [(0.8, 1.5, 12), (0.3, 1.0, 4), (1.0, 0.8, 15), (-0.6, 2.5, 8), (-1.0, 0.6, 3),
         (0.2, 1.5, 10), (-0.3, 0.7, 6), (0.6, 1.2, 2), (0.0, 1.0, 9), (0.9, 0.5, 5),
         (-0.8, 2.0, 14), (0.4, 1.0, 1), (-0.2, 0.8, 7), (0.7, 1.4, 11), (-0.5, 0.9, 4), (0.1, 0.6, 8)]


def made_up_input(rate_hz, repeats=2):
    parts, cur = [np.zeros(int(2 * rate_hz))], 0.0
    for rep in range(repeats):
        for target, ramp_s, hold_s in MOVES:
            target *= 1 - 0.15 * rep
            parts.append(np.linspace(cur, target, int(ramp_s * rate_hz) + 1)[1:])
            parts.append(np.full(int(hold_s * rate_hz), target))
            cur = target
    return np.concatenate(parts)


GRID = [0.0, 0.05, 0.1, 0.2, 0.4]
TRUE = [SegmentMemory(GRID, [0.6, 0.15, 0.1, 0.1, 0.05], [0.15], [2.0]),
        SegmentMemory(GRID, [0.8, 0.0, 0.1, 0.05, 0.05], [-0.1], [0.8])]


def test_fit_recovers_known_creep_and_hysteresis():
    # Data made by the model itself from known parameters plus noise (1e-3 of a range ~2);
    # the fit must give them back within 10 % and beat the static-only model on held-out data.
    u1 = made_up_input(RATE)
    u = np.column_stack([u1, 0.7 * u1])
    x = StripMemory(TRUE).forward(u, rate_hz=RATE)
    x += np.random.default_rng(11).normal(scale=1e-3, size=x.shape)
    x[3000:3020, 0] = np.nan  # readings the readout could not make are left out
    fit, report = fit_memory(u, x, rate_hz=RATE, thresholds=GRID, taus_s=[0.3, 1.0, 3.0, 10.0])
    assert report.warnings == ()
    json.dumps(report.to_dict())  # JSON-able
    assert len(report.text().splitlines()) == 1 + len(TRUE)
    n_train = report.n_train
    for s, (true, got, rep) in enumerate(zip(TRUE, fit.segments, report.segments)):
        assert got.creep_taus_s[0] == pytest.approx(true.creep_taus_s[0], rel=0.1)
        assert got.creep_gains[0] == pytest.approx(true.creep_gains[0], rel=0.1)
        lo, hi = u[:n_train, s].min(), u[:n_train, s].max()
        band = hysteresis_band(true, lo, hi)
        assert rep.hysteresis_band_pct / 100 == pytest.approx(band, rel=0.1)
        # weights aggregated on the generating grid: the initial loading curve's slopes
        assert np.allclose(np.cumsum(got.pi_weights), np.cumsum(true.pi_weights),
                           rtol=0, atol=0.1 * true.pi_weights.sum())
        assert rep.heldout_rms_memory_pct < rep.heldout_rms_static_pct
        assert rep.creep_pct == pytest.approx(100 * abs(true.creep_gains[0]), rel=0.1)


def test_fit_warns_when_terms_cannot_be_identified():
    # The brief's identifiability rules: a steady ramp up never unloads and never holds.
    u = np.linspace(0.0, 1.0, 2000)[:, None]
    x = StripMemory(TRUE[:1]).forward(u, rate_hz=RATE)
    _, report = fit_memory(u, x, rate_hz=RATE, thresholds=GRID, taus_s=[0.3, 1.0, 3.0])
    text = " ".join(report.warnings)
    assert "unloading not seen" in text
    assert "creep not identifiable" in text


def test_hysteresis_band_of_single_play_is_closed_form():
    # One play (weight 1 on r) plus a linear part w_0 on a major loop of amplitude A >= 4r: band
    # 2r at mid-range (Brokate & Sprekels 1996, from memory); output span w_0 A + (A - 2r).
    r, w0, a = 0.1, 0.5, 1.0
    seg = SegmentMemory([0.0, r], [w0, 1.0])
    assert hysteresis_band(seg, 0.0, a) == pytest.approx(2 * r / (w0 * a + a - 2 * r), rel=1e-3)


# ----------------------------------------------------------------------------- files


def test_dict_round_trip_through_json():
    # JSON (RFC 8259) via the json module: Python writes floats by shortest repr, which reads back
    # to the same double, so the round trip is exact.
    mem = StripMemory(TRUE + [SegmentMemory()])
    back = StripMemory.from_dict(json.loads(json.dumps(mem.to_dict())))
    for a, b in zip(mem.segments, back.segments):
        for key in ("pi_thresholds", "pi_weights", "creep_gains", "creep_taus_s"):
            assert np.array_equal(getattr(a, key), getattr(b, key))
    u = random_input(np.random.default_rng(12), 300, 3)
    assert np.array_equal(back.forward(u, rate_hz=RATE), mem.forward(u, rate_hz=RATE))


def _bad(path, value):
    d = StripMemory(TRUE).to_dict()
    target = d
    for p in path[:-1]:
        target = target[p]
    if value is KeyError:
        del target[path[-1]]
    else:
        target[path[-1]] = value
    return d


@pytest.mark.parametrize("path, value, key", [
    (("kind",), "other", "kind"),
    (("version",), 2, "version"),
    (("segments",), [], "segments"),
    (("segments", 0, "pi_weights"), [0.0, 0.5, 0.1, 0.1, 0.05], "segments[0].pi_weights"),
    (("segments", 1, "pi_weights"), [0.5, -0.6, 0.1, 0.1, 0.05], "segments[1].pi_weights"),
    (("segments", 0, "pi_weights"), [0.6, math.nan, 0.1, 0.1, 0.05], "segments[0].pi_weights"),
    (("segments", 0, "pi_weights"), [0.6, 0.1], "segments[0].pi_weights"),
    (("segments", 0, "pi_thresholds"), [0.01, 0.05, 0.1, 0.2, 0.4], "segments[0].pi_thresholds"),
    (("segments", 0, "pi_thresholds"), [0.0, 0.1, 0.05, 0.2, 0.4], "segments[0].pi_thresholds"),
    (("segments", 0, "pi_thresholds"), "0, 0.1", "segments[0].pi_thresholds"),
    (("segments", 0, "creep_taus_s"), [0.0], "segments[0].creep_taus_s"),
    (("segments", 0, "creep_taus_s"), [math.inf], "segments[0].creep_taus_s"),
    (("segments", 0, "creep_taus_s"), [1.0, 2.0], "segments[0].creep_taus_s"),
    (("segments", 1, "creep_gains"), [1.2], "segments[1].creep_gains"),
    (("segments", 1, "creep_gains"), KeyError, "segments[1].creep_gains"),
    (("segments", 1, "creep_gain"), [0.1], "segments[1].creep_gain"),
])
def test_bad_dict_raises_one_line_naming_the_key(path, value, key):
    # Project convention (DEVELOPERS.md): one line naming the key at fault.
    with pytest.raises(ValueError) as info:
        StripMemory.from_dict(_bad(path, value))
    msg = str(info.value)
    assert f"'{key}'" in msg and "\n" not in msg


# ----------------------------------------------------------------------------- creep from holds


def chained_holds(levels, *, rate_hz, hold_s, move_s=0.3):
    """Made-up input (no source): smooth moves between held levels, and their HoldSteps."""
    from acquire.core.memory_fit import HoldStep

    parts, steps, t0, prev = [], [], 0.0, 0.0
    for i, level in enumerate(levels):
        s = np.arange(int(move_s * rate_hz)) / (move_s * rate_hz)
        parts += [prev + (level - prev) * (3 * s * s - 2 * s ** 3), np.full(int(hold_s * rate_hz), level)]
        steps.append(HoldStep(t0 + move_s / 2, t0 + move_s + 0.05, t0 + move_s + hold_s - 0.05, i > 0))
        t0, prev = t0 + move_s + hold_s, level
    return np.concatenate(parts), steps


@pytest.mark.parametrize("c, tau", [(0.15, 1.0), (-0.1, 0.5)])
def test_creep_from_steps_between_holds_matches_the_relaxation(c, tau):
    # Data from the first-order relaxation itself (closed form checked above); the smooth move of
    # 0.3 s acts as a step at its middle to within (T/tau)^2/24 (the lag's ramp response).
    from acquire.core.memory_fit import fit_creep_steps

    u, steps = chained_holds([0.0, 0.1, 0.2, 0.3, 0.4, 0.0, -0.05, -0.1, -0.2, 0.0], rate_hz=1000.0, hold_s=1.8)
    x = Relaxation([[c]], [[tau]], rate_hz=1000.0).process(u[:, None])
    x += np.random.default_rng(2).normal(scale=2e-4, size=x.shape)
    fit = fit_creep_steps(np.arange(u.size) / 1000.0, x, steps, taus_s=[0.1, 0.2, 0.5, 1, 2, 5, 10, 20])
    assert fit.gains[0] == pytest.approx(c, rel=0.1)
    assert fit.taus_s[0] == pytest.approx(tau, rel=0.1)
    assert fit.warnings == ()
    # and an ideal strip shows none
    ideal = fit_creep_steps(np.arange(u.size) / 1000.0, u[:, None] + 0 * x, steps, taus_s=[0.1, 1.0, 10.0])
    assert ideal.gains[0] == 0.0 and np.isnan(ideal.taus_s[0])


def test_creep_from_holds_needs_chained_steps():
    from acquire.core.memory_fit import HoldStep, fit_creep_steps

    u, steps = chained_holds([0.0, 0.3], rate_hz=100.0, hold_s=2.0)
    lone = [HoldStep(s.t_step_s, s.t_start_s, s.t_end_s, False) for s in steps]
    fit = fit_creep_steps(np.arange(u.size) / 100.0, u[:, None], lone, taus_s=[1.0])
    assert "creep not identified" in fit.warnings[0]


def test_holds_compensated_through_a_step_overshoot_keep_their_level():
    # A staircase of holds with instantaneous jig steps (0.5 -> 0 is the largest), through a known
    # memory and then a 2nd-order Butterworth low-pass (scipy.signal.butter, 40 Hz at 1 kHz): the
    # filter overshoots a step by about 4 % of it (a 2nd-order Butterworth's step response,
    # damping zeta = 1/sqrt(2): overshoot exp(-pi zeta / sqrt(1 - zeta^2)) = exp(-pi) = 4.3 %, any control text, e.g.
    # Ogata, Modern Control Engineering, ch. 5). Compensated plainly, the plays keep that false
    # reversal through the flat hold; with the moves kept monotone the flat holds come back.
    from scipy.signal import butter, lfilter

    from acquire.core.memory_steps import compensate_holds

    rate = 1000.0
    seg = SegmentMemory([0.0, 0.02, 0.05], [0.9, 0.06, 0.04], [0.04], [2.0])
    memory = StripMemory([seg])
    levels, hold_s = [0.0, 0.2, 0.5, 0.0, 0.3, 0.0], 2.0
    u = np.repeat(levels, int(hold_s * rate))[:, None]
    t = np.arange(u.shape[0]) / rate
    b, a = butter(2, 40.0, fs=rate)
    x = lfilter(b, a, memory.forward(u, rate_hz=rate), axis=0)

    class Span:
        def __init__(self, i):
            self.t_start_s, self.t_end_s = i * hold_s + 0.3, (i + 1) * hold_s - 0.01

    holds = [Span(i) for i in range(len(levels))]
    plain = memory.compensate(x, rate_hz=rate)
    kept = compensate_holds(memory, t, x, holds, rate_hz=rate)
    flat_after_largest = slice(int(3.5 * hold_s * rate), int(4 * hold_s * rate))
    wrong = abs(float(np.mean(plain[flat_after_largest])))
    assert wrong > 0.002  # the false reversal, remembered (a third of the widest play's threshold)
    for i, level in enumerate(levels):
        part = slice(int((i + 0.5) * hold_s * rate), int((i + 1) * hold_s * rate))
        assert abs(float(np.mean(kept[part])) - level) < wrong / 5
