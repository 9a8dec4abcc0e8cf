"""The force at one contact point straight from the segment curvatures: no shape points.

:class:`acquire.core.force.ForceEstimator` takes the moment arms from shape
points (any shape, any contact candidates). The live chain needs only the
known contact point, and there the arms follow from the heading alone. With
``z(s) = x(s) + i y(s)`` and ``z' = exp(i theta)``, the segment-mean arm of
segment k about the contact ``s_c`` is, swapping the order of integration::

    A_k + i B_k = (1 / L_k) int_{lo_k}^{hi_k} (z(s_c) - z(s)) ds
                = int_0^{s_c} exp(i theta(u)) w_k(u) du,
    w_k(u) = clip(u - lo_k, 0, hi_k - lo_k) / L_k,

``lo_k``, ``hi_k`` the segment's ends clipped at ``s_c``. Between the taps the
heading of either reconstruction method is a polynomial in s (a cubic for
``"smooth"``, linear for ``"arcs"``) and ``w_k`` is linear, so Gauss-Legendre
nodes on every segment integrate it to far below a micrometre (checked in the
tests against the shape-point arms). The heading at the nodes is linear in
the curvature (:meth:`acquire.core.reconstruct.Reconstructor.heading_matrix`),
so a block of frames costs a product for the headings, their cosine and
sine, and one product from those and the curvature to every scaled equation
and the contact tangent, then the closed-form solve of
:func:`acquire.core.force_solve.solve_contact`.
Without shape points the live view can leave the shape to the frames it draws.

Threads: :class:`CurvatureForce` is immutable after construction; pure, any
thread. Returned arrays are new, owned by the caller.
"""
from __future__ import annotations

import numpy as np

from .force import ForceModel, ForceResult, solve_settings
from .force_solve import solve_contact

__all__ = ["CurvatureForce", "NODES_PER_SEGMENT"]

#: Gauss-Legendre nodes per segment: exact for a heading polynomial up to degree 2G - 2 in the
#: arc length; the exponential of a cubic heading that turns by 2 rad over a segment is met to about 1e-9
NODES_PER_SEGMENT = 6


class CurvatureForce:
    """Force at the sensor's far end (or a given arc length) from segment curvature and actuation.

    Parameters
    ----------
    model : ForceModel
    reconstructor : acquire.core.reconstruct.Reconstructor
        Its heading model between the taps (the one the shapes use); its
        segment lengths must be the model's.
    contact_s_m : float, optional
        Arc length of the contact, m, in (0, sensor length]; default the far end.
    **options
        The estimator options of :class:`acquire.core.force.ForceEstimator`
        (``axial_prior_sigma_n``, ``axial_prior_mean_n``, ``axial_friction``,
        ``curvature_noise_per_m``, ``inflate_by_residual``).

    Threads: immutable after construction; pure, any thread.
    """

    def __init__(self, model: ForceModel, reconstructor, *, contact_s_m=None, **options):
        st = solve_settings(model, **options)
        lengths = np.asarray(reconstructor.segment_lengths_m, dtype=np.float64)
        if lengths.shape != model.segment_lengths_m.shape or not np.allclose(lengths, model.segment_lengths_m,
                                                                                rtol=1e-9, atol=0.0):
            raise ValueError("the force model's segment lengths are not the reconstruction's")
        self.model = model
        total = float(reconstructor.sensor_length_m)
        self.contact_s_m = total if contact_s_m is None else float(contact_s_m)
        if not 0.0 < self.contact_s_m <= total:
            raise ValueError(f"contact_s_m must be in (0, {total:g}] m, got {contact_s_m!r}")
        self._inv_sw, self._options = st.inv_sqrt_w, st.solve_options()
        nodes, weights = _arm_nodes(reconstructor.knots_m, self.contact_s_m)
        n_seg, deg, m = model.n_segments, model.degree, nodes.size + 1
        # [kappa, p, p^2] -> the heading at the nodes and the contact (M)
        self._heading = np.ascontiguousarray(reconstructor.heading_matrix(np.append(nodes, self.contact_s_m)).T)
        # [cos theta (M), sin theta (M), kappa, p, p^2] -> [Re e_0, Im e_0, .., y (S), tx, -ty]: e_k
        # interleaved and the conjugate tangent, so both are complex views of the product
        w = np.zeros((2 * m + n_seg + deg, 3 * n_seg + 2))
        arm = weights * st.scale_ab[None, :]  # (M - 1, S): A_k + i B_k = sum_j arm_jk exp(i theta_j)
        w[:m - 1, 0:2 * n_seg:2] = arm  # Re e = A: the cos part
        w[m:2 * m - 1, 1:2 * n_seg:2] = -arm  # Im e = -B: the sin part
        w[2 * m + np.arange(n_seg), 2 * n_seg + np.arange(n_seg)] = st.sqrt_w
        for i in range(deg):
            w[2 * m + n_seg + i, 2 * n_seg:3 * n_seg] = -st.sqrt_w * model.free_curvature_coeffs[:, i]
        w[m - 1, 3 * n_seg] = 1.0  # cos and -sin at the contact: conj(t)
        w[2 * m - 1, 3 * n_seg + 1] = -1.0
        self._weights = w
        self._n_nodes = m
        for arr in (self._heading, self._weights):
            arr.setflags(write=False)

    def process(self, curvature_per_m, actuation) -> ForceResult:
        """Estimate the force of N frames.

        Parameters
        ----------
        curvature_per_m : array_like, shape (N, S)
            Measured mean curvature of each segment, 1/m.
        actuation : float or array_like, shape (N,)
            Actuation p of each frame, in the model's unit.

        Returns
        -------
        ForceResult
            New arrays, owned by the caller. A NaN input makes its frame NaN.
        """
        rows, n_seg = self._rows(curvature_per_m, actuation)
        ct = rows[:, 3 * n_seg:].view(np.complex128)[:, 0]
        force, comp, sigma, rms = solve_contact(rows[:, :2 * n_seg].view(np.complex128), rows[:, 2 * n_seg:3 * n_seg],
                                                ct, self._inv_sw, **self._options)
        tangent = np.conj(ct).view(np.float64).reshape(-1, 2)
        tangent[np.isnan(force[:, 0])] = np.nan
        return ForceResult(force, comp.imag.copy(), comp.real.copy(), sigma[:, 0], sigma[:, 1], rms, tangent,
                           np.full(force.shape[0], self.contact_s_m))

    def force_and_sigma(self, curvature_per_m, actuation, *, with_sigma: bool = True):
        """Only the force (N, 2), N, and the 1-sigma of its normal and axial components (N, 2), N.

        The same numbers as :meth:`process` without the rest of the result;
        ``with_sigma=False`` skips the uncertainties (None) for about half the
        work, for a view that draws the force alone.
        """
        rows, n_seg = self._rows(curvature_per_m, actuation)
        force, _, sigma, _ = solve_contact(
            rows[:, :2 * n_seg].view(np.complex128), rows[:, 2 * n_seg:3 * n_seg],
            rows[:, 3 * n_seg:].view(np.complex128)[:, 0], self._inv_sw, with_sigma=with_sigma, **self._options)
        return force, sigma

    def _rows(self, curvature_per_m, actuation):
        """(N, 3S + 2): [Re e_0, Im e_0, .., y (S), Re conj(t), Im conj(t)], and S."""
        kappa = np.asarray(curvature_per_m, dtype=np.float64)
        n_seg, m = self.model.n_segments, self._n_nodes
        if kappa.ndim != 2 or kappa.shape[1] != n_seg:
            raise ValueError(f"curvature_per_m: expected shape (N, {n_seg}), got {kappa.shape}")
        n = kappa.shape[0]
        buf = np.empty((n, 2 * m + n_seg + self.model.degree))
        buf[:, 2 * m:2 * m + n_seg] = kappa
        buf[:, 2 * m + n_seg] = actuation
        if self.model.degree == 2:
            buf[:, -1] = buf[:, 2 * m + n_seg] ** 2
        theta = kappa @ self._heading
        np.cos(theta, out=buf[:, :m])
        np.sin(theta, out=buf[:, m:2 * m])
        return buf @ self._weights, n_seg


def _arm_nodes(knots_m: np.ndarray, contact_s_m: float):
    """Gauss nodes (M,) on every segment up to the contact and their arm weights (M, S), m."""
    xi, gw = np.polynomial.legendre.leggauss(NODES_PER_SEGMENT)
    lo = knots_m[:-1]
    hi = np.minimum(knots_m[1:], contact_s_m)
    lengths = np.diff(knots_m)
    nodes, weights = [], []
    for a, b in zip(lo, hi):
        if b <= a:
            break
        nodes.append(a + 0.5 * (b - a) * (1.0 + xi))
        weights.append(0.5 * (b - a) * gw)
    u, w = np.concatenate(nodes), np.concatenate(weights)
    frac = np.clip(u[:, None] - lo[None, :], 0.0, np.clip(hi - lo, 0.0, None)[None, :]) / lengths[None, :]
    return u, w[:, None] * frac
