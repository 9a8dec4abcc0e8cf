"""Force from the bend sensor against beam theory: small- and large-deflection cantilevers.

References (outside the project):
- Euler-Bernoulli cantilever under a tip force P: curvature P (L - s) / EI, tip deflection
  P L^3 / (3 EI) (Roark's Formulas for Stress and Strain, table of beam formulas; Gere &
  Timoshenko, Mechanics of Materials, cantilever with a concentrated end load).
- Large deflection (the elastica): Bisshopp & Drucker, "Large deflection of cantilever beams",
  Quarterly of Applied Mathematics 3, 272-275 (1945). Table values quoted FROM MEMORY, so they
  are checked with a loose tolerance; the reference used for the force checks is the elastica
  solved here with scipy.integrate.solve_bvp, cross-checked by an independent shooting solver.
"""
from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from scipy.integrate import cumulative_simpson, solve_bvp, solve_ivp
from scipy.optimize import root

from acquire.core.force import ForceEstimator, ForceModel, estimate_force, segment_moment_arms
from acquire.core.force_direct import CurvatureForce
from acquire.core.force_fit import ForceCalibrationError, ForceHold, fit_force_model
from acquire.core.reconstruct import Reconstructor

L6 = np.full(6, 0.016)  # six 16 mm segments, the demo rig's layout
LEN = float(L6.sum())
KNOTS = np.concatenate([[0.0], np.cumsum(L6)])
EI = 5e-3  # N m^2: a silicone finger about 15 x 20 mm, E ~ 1 MPa (made up, plausible)


# ----------------------------------------------------------------------------- reference solvers


def cantilever_bvp(alphas):
    """Elastica, L = 1, EI = 1, tip load alpha = P L^2 / EI along +y that keeps its direction.

    theta'' = -alpha cos(theta), theta(0) = 0, theta'(1) = 0 (no moment at the free end);
    state (theta, theta', x, y). Solved with continuation in alpha.
    """
    def bc(za, zb):
        return np.array([za[0], zb[1], za[2], za[3]])

    s = np.linspace(0, 1, 101)
    z = np.zeros((4, s.size))
    z[2] = s
    out, done = {}, 0.0
    for a in sorted(alphas):
        for step in np.linspace(done, a, 4)[1:]:
            sol = solve_bvp(lambda s, z, a=step: np.vstack([z[1], -a * np.cos(z[0]), np.cos(z[0]), np.sin(z[0])]),
                            bc, s, z, tol=1e-9, max_nodes=200000)
            assert sol.status == 0, sol.message
            s, z = sol.x, sol.y
        out[a], done = sol, a
    return out


def shoot(lengths, ei, kappa0, force, *, contact=None, pts=40, steps=1):
    """Independent solver: the moment law integrated segment by segment (solve_ivp), the unknown
    contact position found by root finding. Segmentwise EI and free curvature kappa0 (1/m).

    Returns s (dense, every tap included), xy (P, 2), exact segment-mean curvature (S,).
    """
    lengths = np.asarray(lengths, float)
    knots = np.concatenate([[0.0], np.cumsum(lengths)])
    sc = knots[-1] if contact is None else contact
    breaks = np.unique(np.concatenate([knots, [sc]]))
    s_eval = np.unique(np.concatenate([np.linspace(knots[k], knots[k + 1], pts + 1) for k in range(lengths.size)]))
    f_full = np.asarray(force, float)

    def run(rc, f):
        z, xy, th_knots, r_c = np.zeros(3), np.empty((s_eval.size, 2)), np.zeros(knots.size), None
        for b0, b1 in zip(breaks[:-1], breaks[1:]):
            k = min(np.searchsorted(knots, b0, "right") - 1, lengths.size - 1)
            loaded = b0 < sc

            def rhs(s, z, k=k, loaded=loaded):
                m = ((rc[0] - z[1]) * f[1] - (rc[1] - z[2]) * f[0]) if loaded else 0.0
                return [kappa0[k] + m / ei[k], np.cos(z[0]), np.sin(z[0])]

            sel = (s_eval >= b0) & (s_eval <= b1)
            sol = solve_ivp(rhs, (b0, b1), z, method="DOP853", rtol=1e-12, atol=1e-14,
                            t_eval=s_eval[sel], dense_output=True)
            xy[sel] = sol.y[1:].T
            z = sol.sol(b1)
            if b1 == sc:
                r_c = z[1:].copy()
            th_knots[knots == b1] = z[0]
        return r_c, xy, th_knots

    rc = run(np.zeros(2), 0 * f_full)[0]
    for frac in np.linspace(0, 1, steps + 1)[1:]:
        sol = root(lambda r: run(r, frac * f_full)[0] - r, rc, method="hybr", options={"xtol": 1e-13})
        assert sol.success or np.max(np.abs(sol.fun)) < 1e-12, sol.message
        rc = sol.x
    _, xy, th = run(rc, f_full)
    return s_eval, xy, np.diff(th) / lengths


def arcs_shape(kappa_mean, s):
    """Piecewise circular arcs from the segment means only (elementary geometry: chord of an arc
    h sin(d/2)/(d/2) along the mean heading), at arc lengths s."""
    th = np.concatenate([[0.0], np.cumsum(kappa_mean * L6)])
    taps = np.zeros((7, 2))
    for k in range(6):
        d = kappa_mean[k] * L6[k]
        head = th[k] + d / 2
        taps[k + 1] = taps[k] + L6[k] * np.sinc(d / 2 / np.pi) * np.array([np.cos(head), np.sin(head)])
    k = np.minimum(np.searchsorted(KNOTS, s, "right") - 1, 5)
    ds = s - KNOTS[k]
    d = kappa_mean[k] * ds
    chord, head = ds * np.sinc(d / 2 / np.pi), th[k] + d / 2
    return taps[k] + np.stack([chord * np.cos(head), chord * np.sin(head)], axis=-1)


def uniform_model(ei=EI):
    return ForceModel(L6, np.full(6, ei), np.zeros((6, 1)))


@pytest.fixture(scope="module")
def elastica():
    return cantilever_bvp([0.5, 1.0, 2.0, 5.0])


def bvp_frame(sol, n=481):
    """Dense exact shape (m) and exact segment means (1/m) of the dimensional finger."""
    s = np.linspace(0, 1, n)  # 480 intervals: every tap is a point
    th, _, x, y = sol.sol(s)
    kappa = np.diff(sol.sol(KNOTS / LEN)[0]) / L6
    return s * LEN, np.stack([x, y], axis=-1) * LEN, kappa, th[-1]


# ----------------------------------------------------------------------------- small deflection


@pytest.mark.parametrize("p_n", [0.02, -0.02])
def test_small_deflection_cantilever(p_n):
    # Roark / Gere & Timoshenko: kappa(s) = P (L - s) / EI, tip deflection P L^3 / (3 EI).
    s = np.linspace(0, LEN, 601)
    theta = p_n / EI * (LEN * s - s**2 / 2)
    xy = np.stack([cumulative_simpson(np.cos(theta), x=s, initial=0),
                   cumulative_simpson(np.sin(theta), x=s, initial=0)], axis=-1)
    mid = KNOTS[:-1] + L6 / 2
    kappa = p_n * (LEN - mid) / EI  # exact segment means of a linear profile
    assert np.sign(kappa).tolist() == [np.sign(p_n)] * 6  # +y tip force -> positive curvature (toward +y)
    assert xy[-1, 1] == pytest.approx(p_n * LEN**3 / (3 * EI), rel=1e-3)  # alpha = 0.037: O(alpha^2) off
    res = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0)
    assert res.force_n[0, 1] == pytest.approx(p_n, rel=0.01)
    assert np.hypot(*res.force_n[0]) == pytest.approx(abs(p_n), rel=0.01)
    assert res.normal_n[0] == pytest.approx(p_n, rel=0.01)
    # The axial part P sin(theta_tip) (1.8 % of P here) is not observable on a nearly straight
    # finger: the prior holds it near 0, so F is reported along the tip normal, Fx = -P sin cos.
    th_tip = theta[-1]
    assert res.force_n[0, 0] == pytest.approx(-p_n * np.sin(th_tip) * np.cos(th_tip), rel=0.05)


def test_moment_arms_of_a_straight_finger():
    # Straight rod, tip contact: mean of (L - s) over segment k is L - s_mid (elementary).
    s = np.linspace(0, LEN, 31)
    xy = np.stack([s, np.zeros_like(s)], axis=-1)
    a, b, t = segment_moment_arms(xy, s, segment_lengths_m=L6)
    np.testing.assert_allclose(a[0], LEN - (KNOTS[:-1] + L6 / 2), rtol=1e-12)
    np.testing.assert_allclose(b[0], 0.0, atol=1e-15)
    np.testing.assert_allclose(t[0], [1.0, 0.0], atol=1e-12)
    # contact inside segment 2 at s_c: segments beyond carry nothing, segment 2 carries the
    # mean over its loaded part (elementary integral of s_c - s)
    sc = KNOTS[2] + 0.25 * L6[2]
    a, _, _ = segment_moment_arms(xy, s, segment_lengths_m=L6, contact_s_m=sc)
    d = sc - KNOTS[2]
    np.testing.assert_allclose(a[0, 3:], 0.0, atol=1e-15)
    assert a[0, 2] == pytest.approx(d * d / 2 / L6[2], rel=1e-12)


# ----------------------------------------------------------------------------- large deflection


# Bisshopp & Drucker (1945) table, FROM MEMORY: (alpha, tip deflection / L, shortening / L).
# The brief quoted 0.395 for the alpha = 5 shortening; solve_bvp gives 0.3876. The tolerance
# 0.01 (absolute, in units of L) covers a from-memory value at 3 significant figures.
BISSHOPP_DRUCKER_FROM_MEMORY = [(1.0, 0.302, 0.056), (2.0, 0.494, 0.160), (5.0, 0.714, 0.395)]


@pytest.mark.parametrize("alpha, defl, short", BISSHOPP_DRUCKER_FROM_MEMORY)
def test_elastica_reference(elastica, alpha, defl, short):
    th, _, x, y = elastica[alpha].sol(1.0)
    assert y == pytest.approx(defl, abs=0.01)
    assert 1 - x == pytest.approx(short, abs=0.01)
    # the independent shooting solver agrees with solve_bvp (the reference taken)
    s, xy, kappa = shoot(L6, np.full(6, EI), np.zeros(6), (0.0, alpha * EI / LEN**2), steps=1 if alpha < 2 else 3)
    np.testing.assert_allclose(xy[-1] / LEN, [x, y], atol=1e-7)


@pytest.mark.parametrize("alpha", [0.5, 1.0, 2.0, 5.0])
def test_large_deflection_force_from_exact_shape(elastica, alpha):
    p_n = alpha * EI / LEN**2
    s, xy, kappa, th_tip = bvp_frame(elastica[alpha])
    # moment balance itself: EI * mean curvature == mean moment from the shape (Euler-Bernoulli)
    a, b, _ = segment_moment_arms(xy, s, segment_lengths_m=L6)
    np.testing.assert_allclose(EI * kappa, p_n * a[0], rtol=1e-7)
    # without the axial prior the model is exact: recovers F to solver precision
    exact = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0, axial_prior_sigma_n=np.inf)
    np.testing.assert_allclose(exact.force_n[0], [0.0, p_n], rtol=0, atol=1e-6 * p_n)
    # with the default prior (1 N): the brief's 1 % on the total and the normal component
    res = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0)
    assert np.hypot(*(res.force_n[0] - [0.0, p_n])) < 0.01 * p_n
    assert res.normal_n[0] == pytest.approx(p_n * np.cos(th_tip), rel=0.01)  # n = (-sin, cos) at the tip


def test_actuation_free_curvature_is_removed():
    # made-up per-segment free curvature a_k (1/m per kPa) and stiffness; p = 30 kPa, 0.6 N at the tip
    a_k = np.array([0.30, 0.35, 0.40, 0.40, 0.35, 0.30])
    ei = np.array([6.0, 5.5, 5.0, 4.5, 4.0, 3.5]) * 1e-3
    force = np.array([0.0, 0.6])
    s, xy, kappa = shoot(L6, ei, a_k * 30.0, force)
    model = ForceModel(L6, ei, a_k[:, None], "kPa")
    res = estimate_force(model, kappa[None], xy[None], s, 30.0)
    assert np.hypot(*(res.force_n[0] - force)) < 0.01 * 0.6
    # ignoring the actuation would read the free curvature as a huge force
    wrong = estimate_force(ForceModel(L6, ei, np.zeros((6, 1))), kappa[None], xy[None], s, 30.0)
    assert np.hypot(*(wrong.force_n[0] - force)) > 1.0


@pytest.mark.parametrize("alpha", [0.5, 1.0, 2.0, 5.0])
def test_shape_from_segment_means_only(elastica, alpha, capsys):
    # The live pipeline has only the segment means; piecewise arcs keep every tap heading exact
    # but misplace the points between taps by O(kappa' L_k^2). The moment arms are differences of
    # positions, so each is off by at most about the tip position error, on arms averaging about
    # L/2: tolerance 2 x (tip error / L). Measured (no prior, to see the shape alone): force
    # 0.11 / 0.20 / 0.29 / 0.52 % for tip errors 0.11 / 0.22 / 0.38 / 0.66 % of L.
    p_n = alpha * EI / LEN**2
    _, xy_true, kappa, th_tip = bvp_frame(elastica[alpha])
    s = np.linspace(0, LEN, 31)
    xy = arcs_shape(kappa, s)
    tip_err = np.hypot(*(xy[-1] - xy_true[-1])) / LEN
    res = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0, axial_prior_sigma_n=np.inf)
    err = np.hypot(*(res.force_n[0] - [0.0, p_n])) / p_n
    err_normal = abs(res.normal_n[0] - p_n * np.cos(th_tip)) / p_n
    with capsys.disabled():
        print(f"\nalpha {alpha}: piecewise-arc shape: force error {100 * err:.2f} % (normal "
              f"{100 * err_normal:.2f} %), tip position error {100 * tip_err:.2f} % of L")
    assert err < 2 * tip_err and err_normal < 2 * tip_err
    assert err < 0.015


# ----------------------------------------------------------------------------- axial component


def test_axial_component_weakly_observable_on_a_straight_finger():
    # Stiff finger, small load: alpha = 0.037, tip angle about 0.02 rad (nearly straight).
    ei, force = 0.05, np.array([0.0, 0.2])
    s, xy, kappa = shoot(L6, np.full(6, ei), np.zeros(6), force)
    model = uniform_model(ei)
    res = estimate_force(model, kappa[None], xy[None], s, 0.0)
    assert res.sigma_axial_n[0] > 20 * res.sigma_normal_n[0]
    assert res.sigma_axial_n[0] == pytest.approx(1.0, rel=0.05)  # the prior (default 1 N) dominates
    assert abs(res.axial_n[0]) < 0.05  # stays near the prior mean 0 (true axial 0.004 N)
    assert res.normal_n[0] == pytest.approx(0.2, rel=0.01)
    # a prior mean far off moves the axial estimate, not the normal one beyond 1 %
    off = estimate_force(model, kappa[None], xy[None], s, 0.0, axial_prior_mean_n=0.5)
    assert off.axial_n[0] == pytest.approx(0.5, abs=0.05)
    assert off.normal_n[0] == pytest.approx(0.2, rel=0.01)
    # bent finger (alpha 2): the axial component is observed, its sigma far below the prior's
    s, xy, kappa = shoot(L6, np.full(6, EI), np.zeros(6), (0.0, 2 * EI / LEN**2), steps=2)
    bent = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0)
    assert bent.sigma_axial_n[0] < 0.1


# ----------------------------------------------------------------------------- priors against LAPACK


def _lstsq_reference(kappa, xy, s, model, *, noise, friction=None, prior_sigma=np.inf):
    """The same estimate frame by frame with numpy.linalg.lstsq (LAPACK) on the augmented system.

    Rows: the S curvature equations scaled by 1/noise; the axial prior as one more row
    sqrt(prec) t . F (both priors have mean 0 here). The friction cone's precision comes from a first lstsq of the
    normal component alone, as documented in acquire.core.force_solve.
    """
    a, b, t = segment_moment_arms(xy, s, segment_lengths_m=model.segment_lengths_m)
    out = []
    for j in range(kappa.shape[0]):
        design = np.column_stack([-b[j], a[j]]) / model.ei_n_m2[:, None] / noise
        y = kappa[j] / noise
        n_vec = np.array([-t[j, 1], t[j, 0]])
        prec = 0.0 if np.isinf(prior_sigma) else 1.0 / prior_sigma**2
        if friction is not None:
            col = design @ n_vec
            (fn0,), *_ = np.linalg.lstsq(col[:, None], y, rcond=None)
            var_n0 = 1.0 / (col @ col)
            prec = prec + 1.0 / (friction**2 * (fn0**2 + var_n0))
        if prec > 0:
            design = np.vstack([design, np.sqrt(prec) * t[j]])
            y = np.append(y, 0.0)
        f, *_ = np.linalg.lstsq(design, y, rcond=None)
        out.append(f)
    return np.array(out)


@pytest.mark.parametrize("options", [
    {"axial_prior_sigma_n": np.inf},
    {"axial_prior_sigma_n": 0.3},
    {"axial_prior_sigma_n": np.inf, "axial_friction": 0.5},
    {"axial_prior_sigma_n": 0.2, "axial_friction": 0.5},
])
def test_solve_matches_lapack_lstsq(elastica, options):
    # Weighted least squares with a Gaussian prior is ordinary least squares on the system
    # augmented by one row per prior (any regression text, e.g. Press et al., Numerical Recipes,
    # ch. 15); numpy.linalg.lstsq (LAPACK gelsd) solves that independently of our closed forms.
    rng = np.random.default_rng(4)
    frames = [bvp_frame(elastica[a]) for a in (1.0, 2.0, 5.0)]
    s = frames[0][0]
    idx = rng.integers(0, 3, size=12)
    kappa = np.stack([frames[i][2] for i in idx]) + rng.normal(0, 0.1, (12, 6))
    xy = np.stack([frames[i][1] for i in idx])
    est = ForceEstimator(uniform_model(), s, curvature_noise_per_m=0.1, **options)
    got = est.process(kappa, xy, 0.0)
    ref = _lstsq_reference(kappa, xy, s, uniform_model(), noise=0.1,
                           friction=options.get("axial_friction"), prior_sigma=options["axial_prior_sigma_n"])
    np.testing.assert_allclose(got.force_n, ref, rtol=1e-9, atol=1e-12)
    # the candidate scan's solver (real arithmetic) agrees with the one-contact path (complex arithmetic)
    scan = ForceEstimator(uniform_model(), s, curvature_noise_per_m=0.1, contact_candidates_m=[LEN], **options)
    scan._fast = None  # force the general path
    other = scan.process(kappa, xy, 0.0)
    for name in ("force_n", "normal_n", "axial_n", "sigma_normal_n", "sigma_axial_n", "residual_per_m", "tangent"):
        np.testing.assert_allclose(getattr(other, name), getattr(got, name), rtol=1e-10, atol=1e-13)


def test_friction_cone_pins_the_axial_part_at_rest_and_frees_it_under_load(elastica):
    # At rest (no force) on a bent finger, noise alone moves the axial estimate; the friction cone
    # holds it near zero. Under load the cone allows about mu times the normal force.
    s, xy, kappa, _ = bvp_frame(elastica[2.0])
    rng = np.random.default_rng(5)
    n = 2000
    xy_n = np.broadcast_to(xy, (n,) + xy.shape)
    # the bent shape with the load's curvature removed again: a finger bent by actuation alone
    free = ForceModel(L6, np.full(6, EI), kappa[:, None] / 30.0)
    rest = np.broadcast_to(kappa, (n, 6)) + rng.normal(0, 0.1, (n, 6))
    plain = ForceEstimator(free, s, axial_prior_sigma_n=0.3).process(rest, xy_n, 30.0)
    cone = ForceEstimator(free, s, axial_prior_sigma_n=0.3, axial_friction=0.5).process(rest, xy_n, 30.0)
    assert np.mean(np.abs(cone.axial_n)) < 0.5 * np.mean(np.abs(plain.axial_n))
    assert np.mean(np.abs(cone.normal_n)) <= np.mean(np.abs(plain.normal_n)) * 1.05
    # exact curvatures of the loaded cantilever (alpha 2): the true force is partly axial; with a wide
    # cone (mu 5) the estimate is within 1 % of it, with mu 0.5 the axial part is held to the cone
    alpha_force = np.array([0.0, 2.0 * EI / LEN**2])
    wide = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0, axial_prior_sigma_n=np.inf,
                          axial_friction=5.0)
    assert np.hypot(*(wide.force_n[0] - alpha_force)) < 0.01 * np.hypot(*alpha_force)
    tight = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0, axial_prior_sigma_n=np.inf,
                           axial_friction=0.5)
    assert abs(tight.axial_n[0]) < abs(wide.axial_n[0])
    assert tight.sigma_axial_n[0] < wide.sigma_axial_n[0]


# ----------------------------------------------------------------------------- stream behaviour


def test_vectorised_equals_frame_by_frame_and_chunks(elastica):
    rng = np.random.default_rng(1)
    frames = [bvp_frame(elastica[a]) for a in (0.5, 1.0, 2.0, 5.0)]
    s = frames[0][0]
    idx = rng.integers(0, 4, size=40)
    kappa = np.stack([frames[i][2] for i in idx]) + rng.normal(0, 0.1, (40, 6))
    xy = np.stack([frames[i][1] for i in idx])
    p = np.zeros(40)
    est = ForceEstimator(uniform_model(), s)
    whole = est.process(kappa, xy, p)
    single = [est.process(kappa[i:i + 1], xy[i:i + 1], p[i:i + 1]) for i in range(40)]
    cuts = [0, 3, 4, 17, 40]
    est.reset()
    chunks = [est.process(kappa[a:b], xy[a:b], p[a:b]) for a, b in zip(cuts[:-1], cuts[1:])]
    # same to rounding: BLAS may pick a different kernel for a different number of rows
    # (seen: 8e-15 N on a force of 1e-3 N); 1e-12 N / 1e-12 relative is far below any noise
    for name in ("force_n", "normal_n", "axial_n", "sigma_normal_n", "sigma_axial_n", "residual_per_m", "tangent"):
        ref = getattr(whole, name)
        np.testing.assert_allclose(np.concatenate([getattr(r, name) for r in single]), ref, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(np.concatenate([getattr(r, name) for r in chunks]), ref, rtol=1e-12, atol=1e-12)
    # noise of 0.1 1/m (the default stated noise): residual near it, sigmas consistent
    assert 0.03 < np.median(whole.residual_per_m) < 0.2


def test_uncertainty_matches_the_scatter(elastica):
    # Least-squares statistics (any regression text, e.g. Press et al., Numerical Recipes, ch. 15):
    # with the stated noise equal to the real one, the normal-equation sigma is the scatter of
    # the estimate; 4000 frames give that scatter to about 1.1 % (1/sqrt(2N)), tolerance 5 %.
    s, xy, kappa, _ = bvp_frame(elastica[2.0])
    rng = np.random.default_rng(2)
    n = 4000
    noisy = kappa + rng.normal(0, 0.1, (n, 6))
    xy_n = np.broadcast_to(xy, (n,) + xy.shape)
    est = ForceEstimator(uniform_model(), s, curvature_noise_per_m=0.1, inflate_by_residual=False)
    res = est.process(noisy, xy_n, 0.0)
    assert np.std(res.normal_n) == pytest.approx(np.median(res.sigma_normal_n), rel=0.05)
    # noise 5 x the stated one: the residual inflates the sigmas by sqrt(chi2 / dof), median about
    # 4.1 here (chi2 / 25 is chi-square with 5 dof, whose median is below its mean; measured)
    loud = kappa + rng.normal(0, 0.5, (n, 6))
    plain = est.process(loud, xy_n, 0.0)
    inflated = ForceEstimator(uniform_model(), s, curvature_noise_per_m=0.1).process(loud, xy_n, 0.0)
    ratio = np.median(inflated.sigma_normal_n / plain.sigma_normal_n)
    assert 3.5 < ratio < 6.0
    assert np.std(inflated.normal_n) == pytest.approx(np.sqrt(np.mean(inflated.sigma_normal_n**2)), rel=0.25)


def test_nan_frame_and_bad_shapes(elastica):
    s, xy, kappa, _ = bvp_frame(elastica[1.0])
    k2 = np.stack([kappa, kappa])
    k2[0, 3] = np.nan
    res = estimate_force(uniform_model(), k2, np.stack([xy, xy]), s, 0.0)
    assert np.all(np.isnan(res.force_n[0])) and np.all(np.isfinite(res.force_n[1]))
    est = ForceEstimator(uniform_model(), s)
    with pytest.raises(ValueError, match="xy_m"):
        est.process(kappa[None], xy[None, :-1], 0.0)
    with pytest.raises(ValueError, match="curvature_per_m"):
        est.process(kappa[None, :5], xy[None], 0.0)
    with pytest.raises(ValueError, match="contact_s_m"):
        ForceEstimator(uniform_model(), s, contact_s_m=2 * LEN)


# ----------------------------------------------------------------------------- contact point


def test_known_and_scanned_contact_point():
    sc = KNOTS[3] + 0.5 * L6[3]  # middle of segment 3
    force = np.array([-0.2, 0.8])
    s, xy, kappa = shoot(L6, np.full(6, EI), np.zeros(6), force, contact=sc, steps=2)
    assert np.allclose(kappa[4:], 0.0, atol=1e-9)  # nothing loads the segments beyond contact
    known = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0, contact_s_m=sc)
    assert np.hypot(*(known.force_n[0] - force)) < 0.01 * np.hypot(*force)
    cand = np.linspace(0.004, LEN, 24)  # 4 mm grid, contains sc
    scan = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0, contact_candidates_m=cand)
    assert scan.contact_s_m[0] == pytest.approx(sc, abs=1e-12)
    np.testing.assert_allclose(scan.force_n, known.force_n, rtol=1e-12)
    # assuming the tip instead fits badly: a much larger residual
    tip = estimate_force(uniform_model(), kappa[None], xy[None], s, 0.0)
    assert tip.residual_per_m[0] > 100 * known.residual_per_m[0]


# ----------------------------------------------------------------------------- model file


def test_model_dict_round_trip_and_validation():
    model = ForceModel(L6, np.linspace(3e-3, 6e-3, 6), np.arange(12.0).reshape(6, 2) * 1e-3, "kPa")
    back = ForceModel.from_dict(json.loads(json.dumps(model.to_dict())))
    np.testing.assert_array_equal(back.ei_n_m2, model.ei_n_m2)
    np.testing.assert_array_equal(back.free_curvature_coeffs, model.free_curvature_coeffs)
    assert back.actuation_unit == "kPa" and back.degree == 2
    bad = [("ei_n_m2", [1e-3] * 5 + [0.0]), ("ei_n_m2", [1e-3] * 5 + [float("nan")]),
           ("free_curvature_coeffs", [[0.1, 0.2, 0.3]] * 6), ("segment_lengths_m", [0.016] * 5 + [-1.0])]
    for key, value in bad:
        d = model.to_dict()
        d[key] = value
        with pytest.raises(ValueError, match=key) as exc:
            ForceModel.from_dict(d)
        assert "\n" not in str(exc.value)
    d = model.to_dict()
    del d["ei_n_m2"]
    with pytest.raises(ValueError, match="ei_n_m2"):
        ForceModel.from_dict(d)


# ----------------------------------------------------------------------------- calibration

# Made-up "true" finger for the round trip (labelled as invented values): per-segment
# stiffness, N m^2, and free curvature per kPa, 1/m/kPa.
TRUE_EI = np.array([6.0, 5.5, 5.0, 4.5, 4.0, 3.5]) * 1e-3
TRUE_A = np.array([0.30, 0.35, 0.40, 0.40, 0.35, 0.30])


def make_hold(p_kpa, fy_n, *, ei=TRUE_EI, a=TRUE_A):
    s, xy, kappa = shoot(L6, ei, a * p_kpa, (0.0, fy_n), pts=20)
    return ForceHold(curvature_per_m=kappa, xy_m=xy, s_m=s, actuation=p_kpa, force_n=np.array([0.0, fy_n]))


@pytest.fixture(scope="module")
def holds():
    return [make_hold(p, f) for p in (0.0, 20.0, 40.0) for f in (0.0, -0.4, 0.4, 0.8)]


def test_calibration_round_trip(holds):
    model, report = fit_force_model(holds, segment_lengths_m=L6, actuation_unit="kPa")
    np.testing.assert_allclose(model.ei_n_m2, TRUE_EI, rtol=0.02)  # the brief's 2 %
    np.testing.assert_allclose(model.free_curvature_coeffs[:, 0], TRUE_A, rtol=0.02)
    assert report.warnings == ()
    assert np.all(report.residual_rms_per_m < 1e-3) and np.all(report.separation > 0.3)
    assert report.force_range_n == pytest.approx(0.8)
    assert report.loo_rms_percent < 1.0 and np.all(np.isfinite(report.loo_force_error_n))
    assert len(report.lines()) == 6 + 2
    # the quadratic model on the same (linear) data: b ~ 0, a and EI still within 2 %
    quad, _ = fit_force_model(holds, segment_lengths_m=L6, degree=2)
    np.testing.assert_allclose(quad.ei_n_m2, TRUE_EI, rtol=0.02)
    np.testing.assert_allclose(quad.free_curvature_coeffs[:, 0], TRUE_A, rtol=0.02)
    assert np.all(np.abs(quad.free_curvature_coeffs[:, 1]) * 40 < 0.02 * TRUE_A)


def test_calibration_with_noisy_holds(holds):
    # Hold means of ~100 frames at 0.1 1/m per frame: 0.01 1/m noise (made-up but typical).
    # Over 20 seeds the largest EI error was 1.1 % at this noise (2.2 % at 0.02 1/m): 2 % holds.
    rng = np.random.default_rng(7)
    noisy = [dataclasses.replace(h, curvature_per_m=h.curvature_per_m + rng.normal(0, 0.01, 6)) for h in holds]
    model, report = fit_force_model(noisy, segment_lengths_m=L6)
    np.testing.assert_allclose(model.ei_n_m2, TRUE_EI, rtol=0.02)
    np.testing.assert_allclose(model.free_curvature_coeffs[:, 0], TRUE_A, rtol=0.02)
    assert np.all((report.residual_rms_per_m > 0.003) & (report.residual_rms_per_m < 0.02))  # ~ the noise
    assert report.loo_rms_percent < 5.0


def test_calibration_refusals(holds):
    one_level = [h for h in holds if h.actuation == 20.0]
    with pytest.raises(ForceCalibrationError, match="one actuation level") as exc:
        fit_force_model(one_level, segment_lengths_m=L6)
    assert "\n" not in str(exc.value) and isinstance(exc.value, ValueError)
    unloaded = [h for h in holds if h.force_n[1] == 0.0]
    with pytest.raises(ForceCalibrationError, match="no loaded holds"):
        fit_force_model(unloaded, segment_lengths_m=L6)
    with pytest.raises(ForceCalibrationError, match="fewer than the 3 unknowns"):
        fit_force_model([holds[1], holds[6]], segment_lengths_m=L6, degree=2)
    with pytest.raises(ForceCalibrationError, match="nonzero actuation levels"):
        fit_force_model([h for h in holds if h.actuation != 40.0], segment_lengths_m=L6, degree=2)
    with pytest.raises(ForceCalibrationError, match="no holds"):
        fit_force_model([], segment_lengths_m=L6)
    # labels with the wrong sign make every loaded hold bend against its force: EI < 0
    flipped = [dataclasses.replace(h, force_n=-h.force_n) for h in holds]
    with pytest.raises(ForceCalibrationError, match="stiffness is not positive"):
        fit_force_model(flipped, segment_lengths_m=L6)
    broken = [dataclasses.replace(holds[0], curvature_per_m=np.full(6, np.nan))] + holds[1:]
    with pytest.raises(ForceCalibrationError, match="hold 0"):
        fit_force_model(broken, segment_lengths_m=L6)


def test_calibration_warns_when_force_follows_pressure():
    # Force proportional to pressure on a stiff, weakly actuated finger (shape nearly the same in
    # every hold): the moment column is the pressure column times a constant, so free curvature
    # and stiffness trade off. Fits, but warns.
    ei, a = np.full(6, 0.05), np.full(6, 0.01)
    corr = [make_hold(p, 0.01 * p, ei=ei, a=a) for p in (0.0, 10.0, 20.0, 30.0)]
    _, report = fit_force_model(corr, segment_lengths_m=L6)
    assert np.all(report.separation < 0.05)
    assert any("cannot separate stiffness from actuation" in w for w in report.warnings)


# ----------------------------------------------------------------------------- from curvature alone


def direct(model=None, method="smooth", **options):
    """The live chain's estimator: moment arms from the reconstruction's heading, no shape points."""
    rec = Reconstructor(L6, method=method)
    return CurvatureForce(uniform_model() if model is None else model, rec, **options), rec


@pytest.mark.parametrize("alpha", [0.5, 1.0, 2.0, 5.0])
def test_direct_force_from_exact_segment_means(elastica, alpha):
    # Bisshopp & Drucker's elastica (solve_bvp): fed the exact segment means, the live chain's
    # estimate is within the brief's 1 % with the smooth reconstruction between the taps.
    p_n = alpha * EI / LEN**2
    _, _, kappa, th_tip = bvp_frame(elastica[alpha])
    est, _ = direct(axial_prior_sigma_n=np.inf)
    res = est.process(kappa[None], 0.0)
    assert np.hypot(*(res.force_n[0] - [0.0, p_n])) < 0.01 * p_n
    assert res.normal_n[0] == pytest.approx(p_n * np.cos(th_tip), rel=0.01)
    with_prior = direct()[0].process(kappa[None], 0.0)
    assert np.hypot(*(with_prior.force_n[0] - [0.0, p_n])) < 0.01 * p_n


@pytest.mark.parametrize("method", ["smooth", "arcs"])
def test_direct_arms_equal_dense_shape_arms(elastica, method):
    # Two quadratures of the same heading model: Gauss nodes on the heading (direct) and a cubic
    # spline through shape points every 0.05 mm (the shape-point estimator). They agree to 1e-6.
    frames = [bvp_frame(elastica[a])[2] for a in (0.5, 2.0, 5.0)]
    kappa = np.stack(frames + [np.array([80.0, -60.0, 120.0, 0.0, -90.0, 40.0])])
    est, rec = direct(method=method, curvature_noise_per_m=0.1, axial_friction=0.5)
    dense = Reconstructor(L6, spacing_m=5e-5, method=method)
    ref = ForceEstimator(uniform_model(), dense.s_m, curvature_noise_per_m=0.1, axial_friction=0.5).process(
        kappa, dense.shape_xy(kappa), 0.0)
    got = est.process(kappa, 0.0)
    scale = np.abs(ref.force_n).max()
    np.testing.assert_allclose(got.force_n, ref.force_n, rtol=0, atol=1e-6 * scale)
    np.testing.assert_allclose(got.tangent, ref.tangent, atol=1e-6)  # the points' spline slope: ~1e-7 off
    np.testing.assert_allclose(got.sigma_normal_n, ref.sigma_normal_n, rtol=1e-5)


def test_direct_actuation_and_contact_inside_the_sensor():
    # The independent shooting solver (solve_ivp + root) with free curvature and a contact inside
    # segment 4: the estimate from its exact segment means is within 1 %.
    a_k = np.array([0.30, 0.35, 0.40, 0.40, 0.35, 0.30])
    ei = np.array([6.0, 5.5, 5.0, 4.5, 4.0, 3.5]) * 1e-3
    sc = KNOTS[4] + 0.4 * L6[4]
    force = np.array([-0.1, 0.5])
    _, _, kappa = shoot(L6, ei, a_k * 30.0, force, contact=sc)
    model = ForceModel(L6, ei, a_k[:, None], "kPa")
    est = CurvatureForce(model, Reconstructor(L6), contact_s_m=sc, axial_prior_sigma_n=np.inf)
    res = est.process(kappa[None], [30.0])
    assert np.hypot(*(res.force_n[0] - force)) < 0.01 * np.hypot(*force)
    assert res.contact_s_m[0] == sc


def test_direct_stream_behaviour(elastica):
    rng = np.random.default_rng(7)
    frames = [bvp_frame(elastica[a])[2] for a in (0.5, 1.0, 2.0, 5.0)]
    kappa = np.stack([frames[i] for i in rng.integers(0, 4, size=60)]) + rng.normal(0, 0.1, (60, 6))
    p = rng.uniform(0, 40, 60)
    model = ForceModel(L6, np.full(6, EI), np.full((6, 2), 0.01), "kPa")  # quadratic free curvature
    est, _ = direct(model, axial_friction=0.5, axial_prior_sigma_n=0.5)
    whole = est.process(kappa, p)
    cuts = [0, 1, 9, 10, 33, 60]
    parts = [est.process(kappa[a:b], p[a:b]) for a, b in zip(cuts[:-1], cuts[1:])]
    for name in ("force_n", "normal_n", "axial_n", "sigma_normal_n", "sigma_axial_n", "residual_per_m", "tangent"):
        np.testing.assert_allclose(np.concatenate([getattr(r, name) for r in parts]), getattr(whole, name),
                                   rtol=1e-12, atol=1e-12)
    # the view's shortcut: the same force, with and without the uncertainties
    force, sigma = est.force_and_sigma(kappa, p)
    np.testing.assert_array_equal(force, whole.force_n)
    np.testing.assert_array_equal(sigma, np.column_stack([whole.sigma_normal_n, whole.sigma_axial_n]))
    alone, none = est.force_and_sigma(kappa, p, with_sigma=False)
    np.testing.assert_array_equal(alone, whole.force_n)
    assert none is None
    # a NaN curvature or actuation makes its frame NaN, and only it
    kappa[5, 2], p[7] = np.nan, np.nan
    bad = est.process(kappa, p)
    assert np.isnan(bad.force_n[[5, 7]]).all() and np.isnan(bad.sigma_normal_n[[5, 7]]).all()
    assert np.isfinite(np.delete(bad.force_n, [5, 7], axis=0)).all()
    assert np.isnan(est.force_and_sigma(kappa, p, with_sigma=False)[0][[5, 7]]).all()


def test_direct_refuses_what_it_cannot_use():
    with pytest.raises(ValueError, match="contact_s_m"):
        direct(contact_s_m=2 * LEN)
    with pytest.raises(ValueError, match="segment lengths"):
        CurvatureForce(uniform_model(), Reconstructor(np.full(6, 0.017)))
    with pytest.raises(ValueError, match="curvature_noise_per_m"):
        direct(curvature_noise_per_m=0.0)
    est, _ = direct()
    with pytest.raises(ValueError, match="expected shape"):
        est.process(np.zeros((3, 5)), 0.0)
