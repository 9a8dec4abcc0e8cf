"""The virtual finger's model against closed forms and independent solvers.

Every check names its source beside it.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_bvp

from acquire.errors import UserError
from acquire.rig import load_rig, parse_rig
from acquire.virtual import Faults, FingerModel
from acquire.virtual.model import parse_hold_label, solve_elastica


@pytest.fixture(scope="module")
def rig():
    return load_rig(None)


@pytest.fixture(scope="module")
def model(rig):
    return FingerModel(rig=rig, seed=1)


# ----------------------------------------------------------------- mechanics


def test_pure_moment_is_circular_arc():
    # Pure bending: curvature = M / (E I) everywhere, so the beam is a circular
    # arc (Gere & Timoshenko, "Mechanics of Materials", 1997, section 5.4);
    # the arc's end point from plane geometry: (sin(kL)/k, (1 - cos(kL))/k).
    ei, length = 3e-3, 0.096
    moments = np.array([-0.05, 0.01, 0.06, 0.12])
    sol = solve_elastica(length_m=length, bending_stiffness_nm2=ei, moment_nm=moments, load_n=0.0)
    assert sol.converged.all()
    k = moments / ei
    np.testing.assert_allclose(sol.kappa_per_m, np.repeat(k[:, None], sol.s_m.size, 1), rtol=1e-9, atol=1e-9)
    tip = np.stack([np.sin(k * length) / k, (1 - np.cos(k * length)) / k], axis=1)
    np.testing.assert_allclose(sol.xy_m[:, -1], tip, atol=1e-9)


def test_table_exact_for_pure_moment(model, rig):
    # Same closed form (Gere & Timoshenko 1997): the table's segment curvatures
    # equal M/EI in every segment when there is no tip load.
    ei, length = model.bending_stiffness_nm2, rig.sensor_length_m
    angles = np.array([-1.2, -0.3, 0.0, 0.7, 2.1, 3.9])
    eq = model.equilibrium(moment_nm=ei * angles / length, load_n=0.0)
    k = angles / length
    np.testing.assert_allclose(eq["curvature_per_m"], np.repeat(k[:, None], rig.n_segments, 1), atol=1e-8)
    safe = np.where(k == 0, 1.0, k)
    tip_x = np.where(k == 0, length, np.sin(k * length) / safe)
    tip_y = np.where(k == 0, 0.0, (1 - np.cos(k * length)) / safe)
    np.testing.assert_allclose(eq["tip_xy_m"], np.stack([tip_x, tip_y], 1), atol=1e-8)


def test_small_tip_load_matches_linear_cantilever():
    # Euler-Bernoulli small deflection of an end-loaded cantilever:
    # delta = P L^3 / (3 E I) (Gere & Timoshenko, "Mechanics of Materials",
    # 1997, table G-1, case 4). The large-deflection correction is O((PL^2/EI)^2).
    ei, length = 2.0, 0.5
    p = 1e-3 * ei / length**2
    sol = solve_elastica(length_m=length, bending_stiffness_nm2=ei, moment_nm=0.0, load_n=p,
                         load_angle_rad=-math.pi / 2)
    delta = -sol.xy_m[0, -1, 1]
    assert delta == pytest.approx(p * length**3 / (3 * ei), rel=1e-5)


def test_large_tip_load_matches_bisshopp_drucker():
    # Bisshopp & Drucker, "Large deflection of cantilever beams", Quarterly of
    # Applied Mathematics 3 (1945) 272-275: for P L^2 / EI = 1 the tip moves
    # down 0.3017 L and in 0.0564 L (values quoted from memory; the
    # independent solve_bvp check below does not depend on them).
    sol = solve_elastica(length_m=1.0, bending_stiffness_nm2=1.0, moment_nm=0.0, load_n=1.0,
                         load_angle_rad=-math.pi / 2, s_m=np.linspace(0, 1, 201))
    assert -sol.xy_m[0, -1, 1] == pytest.approx(0.3017, abs=2e-4)
    assert 1.0 - sol.xy_m[0, -1, 0] == pytest.approx(0.0564, abs=2e-4)


def _bvp_reference(length, ei, moment, load, angle, lever):
    """Independent formulation: first-order moment balance with the tip
    position as unknown parameters, solved by scipy.integrate.solve_bvp
    (Kierzenka & Shampine, ACM TOMS 2001)."""
    fx, fy = load * math.cos(angle), load * math.sin(angle)

    def ode(s, y, p):
        xf = p[0] + lever * np.cos(p[2])
        yf = p[1] + lever * np.sin(p[2])
        m = moment + (xf - y[0]) * fy - (yf - y[1]) * fx
        return np.vstack([np.cos(y[2]), np.sin(y[2]), m / ei])

    def bc(ya, yb, p):
        return np.array([ya[0], ya[1], ya[2], yb[0] - p[0], yb[1] - p[1], yb[2] - p[2]])

    s = np.linspace(0, length, 41)
    k = moment / ei
    guess = np.vstack([s, 0.5 * k * s**2, k * s])
    res = solve_bvp(ode, bc, s, guess, p=[length, 0.0, k * length], tol=1e-8, max_nodes=20000)
    assert res.success, res.message
    return res


@pytest.mark.parametrize(
    "moment_bar, load_bar, angle, lever_bar",
    [
        (0.0, 1.0, -math.pi / 2, 0.0),
        (0.0, 3.0, -math.pi / 2, 0.0),
        (2.0, 1.5, -0.6, 0.15),
        (-0.8, 1.0, 0.4, 0.3),
    ],
)
def test_elastica_against_independent_solve_bvp(moment_bar, load_bar, angle, lever_bar):
    # Reference: scipy.integrate.solve_bvp on a different formulation (see
    # _bvp_reference); the shooting solver must agree on the whole shape.
    length, ei = 0.1, 3e-3
    moment = moment_bar * ei / length
    load = load_bar * ei / length**2
    lever = lever_bar * length
    ref = _bvp_reference(length, ei, moment, load, angle, lever)
    sol = solve_elastica(length_m=length, bending_stiffness_nm2=ei, moment_nm=moment, load_n=load,
                         load_angle_rad=angle, load_lever_m=lever)
    assert sol.converged.all()
    y_ref = ref.sol(sol.s_m)
    np.testing.assert_allclose(sol.xy_m[0, :, 0], y_ref[0], atol=1e-7 * length * 100)
    np.testing.assert_allclose(sol.xy_m[0, :, 1], y_ref[1], atol=1e-7 * length * 100)
    np.testing.assert_allclose(sol.theta_rad[0], y_ref[2], atol=1e-6)


def test_table_interpolation_close_to_direct_solve(model, rig):
    # Reference: this module's own direct solve, itself checked against
    # solve_bvp above. Bilinear interpolation of the table costs little.
    rng = np.random.default_rng(5)
    length, ei = rig.sensor_length_m, model.bending_stiffness_nm2
    angles = rng.uniform(-1.5, 3.0, 300)
    loads = rng.uniform(0.0, 0.7, 300) * model.load_max_n  # the scenarios stay below this
    eq = model.equilibrium(moment_nm=ei * angles / length, load_n=loads)
    sol = model.solve(ei * angles / length, loads)
    theta_taps = sol.theta_rad[:, np.searchsorted(sol.s_m, np.concatenate([[0], np.cumsum(rig.segment_lengths_m)]) - 1e-12)]
    curv = np.diff(theta_taps, axis=1) / rig.segment_lengths_m
    assert np.abs(eq["curvature_per_m"] - curv).max() < 0.05  # 1/m
    assert np.abs(eq["tip_xy_m"] - sol.xy_m[:, -1]).max() < 2e-4  # m


def test_truth_curvature_is_segment_mean(model, rig):
    # Definition: mean curvature = (1/l) * integral of kappa ds over the segment;
    # integral by numpy's trapezoid rule on the direct solution's nodes
    # (reference implementation: numpy.trapezoid).
    t = np.array([2.9, 3.3, 4.4])
    tr = model.truth(t)
    sol = model.solve(tr["moment_nm"], tr["load_n"])
    edges = np.concatenate([[0.0], np.cumsum(rig.segment_lengths_m)])
    for k in range(rig.n_segments):
        sel = (sol.s_m >= edges[k] - 1e-12) & (sol.s_m <= edges[k + 1] + 1e-12)
        mean = np.trapezoid(sol.kappa_per_m[:, sel], sol.s_m[sel], axis=1) / rig.segment_lengths_m[k]
        np.testing.assert_allclose(tr["curvature_per_m"][:, k], mean, atol=0.05)


def test_shape_starts_at_origin_and_ends_at_tip(model, rig):
    # Conventions of the README (rig file: sign convention): curve starts at (0,0) heading +x; arc
    # length of the polyline equals the sensor length (inextensible).
    t = np.linspace(0, 6, 7)
    s, xy = model.shape(t)
    assert s[0] == 0 and s[-1] == pytest.approx(rig.sensor_length_m)
    np.testing.assert_allclose(xy[:, 0], 0.0, atol=1e-12)
    np.testing.assert_allclose(xy[:, -1], model.truth(t)["tip_xy_m"], atol=1e-12)
    chord = np.linalg.norm(np.diff(xy, axis=1), axis=2).sum(axis=1)
    np.testing.assert_allclose(chord, rig.sensor_length_m, rtol=1e-3)


# ----------------------------------------------------------------- time courses and holds


def test_hold_labels():
    # Label grammar of the README's commands and calibration sections; radius r gives curvature 1/r.
    assert parse_hold_label("flat") == 0.0
    assert parse_hold_label("radius=25mm") == pytest.approx(40.0)
    assert parse_hold_label("radius=-0.05m") == pytest.approx(-20.0)
    assert parse_hold_label("curvature=-40/m") == -40.0
    for bad in ("round", "radius=0mm", "radius=25", "curvature=40", "curvature=x/m"):
        with pytest.raises(UserError):
            parse_hold_label(bad)


@pytest.mark.parametrize("label, kappa", [("flat", 0.0), ("radius=25mm", 40.0), ("curvature=-30/m", -30.0)])
def test_hold_is_uniform_arc(rig, label, kappa):
    # Circle of curvature k through (0,0) heading +x: end at (sin(kL)/k,
    # (1 - cos(kL))/k) (plane geometry); the wobble is tiny (< 0.05 1/m).
    m = FingerModel(rig=rig, hold=label)
    t = np.linspace(0, 5, 501)
    tr = m.truth(t)
    c = tr["curvature_per_m"]
    assert np.abs(c - kappa).max() < 0.05
    np.testing.assert_allclose(c, np.repeat(c[:, :1], rig.n_segments, 1))
    k = c[:, 0]
    length = rig.sensor_length_m
    assert (k != 0).all()  # the wobble keeps even "flat" off exactly zero
    np.testing.assert_allclose(tr["tip_xy_m"][:, 0], np.sin(k * length) / k, atol=1e-9)
    np.testing.assert_allclose(tr["tip_xy_m"][:, 1], (1 - np.cos(k * length)) / k, atol=1e-9)


def test_grasp_cycles_smooth_seeded_and_varied(rig):
    # Common practice, no source: a plausible grasp has no jumps at 1 kHz,
    # loads only while closed, and varies between cycles and seeds.
    m = FingerModel(rig=rig, seed=3)
    t = np.arange(0.0, 40.0, 1e-3)
    tr = m.truth(t)
    c = tr["curvature_per_m"]
    assert np.abs(np.diff(c, axis=0)).max() < 0.5  # 1/m per ms
    loaded = tr["load_n"] > 0.02
    assert loaded.any() and (~loaded).any()
    assert c[loaded].mean() > 10.0  # loaded only with the finger closed
    assert c[:, 0].min() < -1.0  # opens to a slight negative bend
    np.testing.assert_array_equal(FingerModel(rig=rig, seed=3).truth(t[::97])["curvature_per_m"], c[::97])
    other = FingerModel(rig=rig, seed=4).truth(t[::97])["curvature_per_m"]
    assert np.abs(other - c[::97]).max() > 1.0


def test_long_runs_are_random_access(rig):
    # Project rule (any chunking, same result): an hour in, the time course is
    # the same whether the hour was evaluated before or not.
    t = np.array([3599.9995, 3600.0, 7200.25])
    fresh = FingerModel(rig=rig, seed=6).truth(t)["curvature_per_m"]
    walked = FingerModel(rig=rig, seed=6)
    walked.truth(np.arange(0.0, 3600.0, 0.5))
    np.testing.assert_array_equal(walked.truth(t)["curvature_per_m"], fresh)


def test_sweep_covers_both_bends(rig):
    # Common practice, no source: a sweep for moving-finger tests goes from a
    # slight negative bend to a strong closure.
    m = FingerModel(rig=rig, scenario="sweep")
    c = m.truth(np.linspace(0, 20, 2001))["curvature_per_m"]
    assert c.min() < -5.0 and c.max() > 35.0


# ----------------------------------------------------------------- electrics


def _nodal_tap_volts(r_ref, r_seg):
    """Reference: solve the divider by nodal analysis with numpy.linalg.solve
    (Kirchhoff's current law at each tap; any circuits text, e.g. Horowitz &
    Hill, "The Art of Electronics", 2015, section 1.2). V_ex = 1, tap S = 0."""
    s = r_seg.shape[0]
    g = 1.0 / r_seg
    a = np.zeros((s, s))
    b = np.zeros(s)
    a[0, 0] += 1.0 / r_ref
    b[0] = 1.0 / r_ref
    for k in range(s):
        a[k, k] += g[k]
        if k + 1 < s:
            a[k, k + 1] -= g[k]
            a[k + 1, k] -= g[k]
            a[k + 1, k + 1] += g[k]
    return np.linalg.solve(a, b)


def test_divider_matches_nodal_analysis(model, rig):
    t = np.array([0.5, 3.0, 4.2])
    v = model.tap_volts(t)
    r = model.segment_ohm(t)
    for i in range(t.size):
        np.testing.assert_allclose(v[i], _nodal_tap_volts(rig.r_ref_ohm, r[i]), rtol=1e-12)
    assert (np.diff(v, axis=1) < 0).all() and (v[:, -1] > 0).all()  # healthy chain order


def test_codes_reproduce_segment_resistance(rig):
    # the readout formula in the README's rig file section by algebra (series current (1 - v0)/r_ref, Ohm's
    # law over each segment): R_k = r_ref (v_k - v_{k+1}) / (1 - v_0).
    # With no noise the only error is quantisation, +-0.5 LSB per code.
    m = FingerModel(rig=rig, seed=2, noise_lsb=0.0)
    t = np.linspace(0, 12, 400)
    codes = m.codes(t, frame_index=np.arange(t.size)).astype(np.float64)
    v = codes[:, rig.tap_channels] / 2**m.adc_bits
    v_next = np.concatenate([v[:, 1:], np.zeros((t.size, 1))], axis=1)
    r_est = rig.r_ref_ohm * (v - v_next) / (1 - v[:, :1])
    r = m.segment_ohm(t)
    lsb = 1.0 / 2**m.adc_bits
    # first-order error bound of the formula for +-0.5 LSB on each code
    bound = rig.r_ref_ohm * (lsb / (1 - v[:, :1]) + np.abs(v - v_next) * 0.5 * lsb / (1 - v[:, :1]) ** 2) * 1.05
    assert (np.abs(r_est - r) <= bound).all()


def test_resistance_response(rig):
    # Model design (common practice for resistive bend sensors, no source):
    # rises with positive bend, weaker for the opposite bend, healthy values
    # inside the rig's segment_ohm_range, flat values spread by about +-5 %.
    flat = FingerModel(rig=rig, seed=7, hold="flat").segment_ohm(np.zeros(1))[0]
    pos = FingerModel(rig=rig, seed=7, hold="curvature=30/m").segment_ohm(np.zeros(1))[0]
    neg = FingerModel(rig=rig, seed=7, hold="curvature=-30/m").segment_ohm(np.zeros(1))[0]
    assert (pos > flat).all() and (neg < flat).all()
    assert ((flat - neg) < 0.6 * (pos - flat)).all()
    spread = flat / flat.mean()
    assert spread.min() > 0.9 and spread.max() < 1.1 and spread.std() > 0.005
    lo, hi = rig.segment_ohm_range
    for scenario in ("grasp", "sweep"):
        r = FingerModel(rig=rig, seed=7, scenario=scenario).segment_ohm(np.arange(0.0, 60.0, 0.01))
        assert r.min() > lo and r.max() < hi


def test_noise_rms_and_chunking(rig):
    # Reference: numpy.std of codes about the noise-free value; the ADC noise
    # is set to 1.2 LSB RMS. Rounding adds 1/12 LSB^2 of variance (uniform
    # quantisation noise, Widrow & Kollar, "Quantization Noise", 2008).
    m = FingerModel(rig=rig, seed=9, hold="flat")
    n = 20000
    t = np.zeros(n)  # static finger: only noise moves the codes
    fi = np.arange(n)
    codes = m.codes(t, frame_index=fi).astype(np.float64)
    clean = m.tap_volts(t[:1])[0] * 2**m.adc_bits
    err = codes[:, rig.tap_channels] - clean
    rms = np.sqrt((err**2).mean(axis=0))
    np.testing.assert_allclose(rms, math.sqrt(1.2**2 + 1 / 12), rtol=0.06)
    assert abs(err.mean()) < 0.05
    # project rule: the same frames give the same codes for any chunking
    t2 = np.linspace(0, 3, 3000)
    whole = m.with_hold(None).codes(t2, frame_index=np.arange(3000))
    parts = [m.with_hold(None).codes(t2[a:b], frame_index=np.arange(a, b))
             for a, b in zip([0, 1, 8, 1000], [1, 8, 1000, 3000])]
    np.testing.assert_array_equal(np.concatenate(parts), whole)


# ----------------------------------------------------------------- faults


def _divider_r(codes, rig, bits):
    v = codes[:, rig.tap_channels].astype(np.float64) / 2**bits
    v_next = np.concatenate([v[:, 1:], np.zeros((v.shape[0], 1))], axis=1)
    return rig.r_ref_ohm * (v - v_next) / (1 - v[:, :1])


def test_fault_short_taps_reads_zero_ohm(rig):
    # Shorted taps are one node: no voltage across the segments between them,
    # so the divider formula of the readout formula in the README's rig file section gives about 0 ohm.
    m = FingerModel(rig=rig, seed=1, faults=Faults(short_taps=(1, 3)))
    healthy = FingerModel(rig=rig, seed=1)
    t = np.linspace(0, 8, 800)
    r = _divider_r(m.codes(t, frame_index=np.arange(800)), rig, m.adc_bits)
    assert np.abs(r[:, 1:3]).max() < 150.0  # a few LSB of noise
    r_ok = healthy.segment_ohm(t)
    assert (r[:, [0, 3, 4, 5]] > 0.5 * r_ok[:, [0, 3, 4, 5]]).all()


def test_fault_open_tap_floats(rig):
    # An unconnected ADC input does not follow the chain (common practice, no
    # source): flat and strongly bent finger give the same reading there,
    # while its healthy neighbours move by hundreds of LSB.
    f = Faults(open_tap=2)
    t = np.linspace(0, 2, 2000)
    fi = np.arange(2000)
    flat = FingerModel(rig=rig, faults=f, hold="flat").codes(t, frame_index=fi).astype(float)
    bent = FingerModel(rig=rig, faults=f, hold="curvature=40/m").codes(t, frame_index=fi).astype(float)
    ch = int(rig.tap_channels[2])
    np.testing.assert_array_equal(flat[:, ch], bent[:, ch])
    others = [int(c) for c in rig.tap_channels if c != ch]
    assert np.abs(bent[:, others].mean(0) - flat[:, others].mean(0)).min() > 30
    assert flat[:, ch].std() > 5.0  # picks up noise, not a clean input


def test_fault_noisy_and_stuck_channels(rig):
    # Reference: numpy.std against the requested 40 LSB RMS extra noise
    # (plus the 1.2 LSB ADC noise, added in quadrature).
    t = np.zeros(20000)
    fi = np.arange(20000)
    m = FingerModel(rig=rig, hold="flat", faults=Faults(noisy_channel=4, stuck_channel=1))
    codes = m.codes(t, frame_index=fi).astype(float)
    assert codes[:, 4].std() == pytest.approx(math.hypot(40.0, 1.2), rel=0.05)
    assert codes[:, 1].std() == 0.0
    assert 1.0 < codes[:, 0].std() < 2.0  # the others are untouched


def test_fault_check_names_the_field(rig):
    with pytest.raises(UserError, match="open_tap"):
        FingerModel(rig=rig, faults=Faults(open_tap=6))
    with pytest.raises(UserError, match="--short-taps"):
        Faults(short_taps=(3, 2)).check(rig, names={"short_taps": "--short-taps"})
    with pytest.raises(UserError, match="drop_rate"):
        Faults(drop_rate=1.5).check(rig)


def test_pressure_channel_follows_actuation():
    # A non-tap channel named "pressure" carries the actuation (the README
    # section 3: recorded like any other, ignored by the divider).
    text = load_rig(None).text.replace(
        'channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5"]',
        'channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5", "pressure"]',
    )
    rig7 = parse_rig(text)
    m = FingerModel(rig=rig7, seed=2)
    t = np.linspace(0, 20, 4000)
    codes = m.codes(t, frame_index=np.arange(t.size)).astype(float)
    moment, _ = m.inputs(t)
    assert np.corrcoef(codes[:, 6], moment)[0, 1] > 0.99
