"""The per-frame least-squares solve of :mod:`acquire.core.force`, in the base frame.

Each frame's S segment equations ``y_k = (Fy A_k - Fx B_k) / EI_k`` (``y`` the
curvature minus the free curvature, 1/m) are scaled by ``sqrt(w_k)``
(``w_k = 1 / sigma_k**2``) and stacked as ``z = [-b, a, y]`` (3 rows of S, the
design columns of Fx and Fy and the data): ``a = sqrt(w) A / EI``,
``b = sqrt(w) B / EI``. One batched product ``z z^T``
gives every sum the 2 x 2 normal equations need, so the solve costs the same
few array operations for one frame or a million; each frame stands alone
(chunk-invariant, no state).

Axial priors (the component along the unit tangent ``t`` at the contact):

- a fixed Gaussian ``F_a ~ N(mean, sigma**2)`` (``prior_prec = 1 / sigma**2``);
- a friction cone: the force is taken to lie within about ``mu`` times the
  normal force of the contact normal, ``F_a ~ N(0, mu**2 (F_n0**2 + var_n0))``
  with ``F_n0`` and ``var_n0`` the normal component and its variance fitted
  with the axial part held at zero (a first, closed-form pass). At rest it pins
  the unobservable axial part at zero; under load it lets the data move it
  within about ``mu |F_n|`` (Coulomb friction at the contact: a stated
  assumption, not a measurement).

Both are Gaussian in ``F_a``, so they combine by adding precisions. The
normal-equation inverse gives the 1-sigma uncertainties, scaled up by
``sqrt(chi2 / dof)`` when the fit is worse than the stated noise (never down).

Threads: pure functions, any thread. Returned arrays are new, owned by the caller.
"""
from __future__ import annotations

import functools

import numpy as np

__all__ = ["solve_stacked", "solve_one_contact", "solve_contact"]


def solve_stacked(z, tx, ty, inv_sqrt_w, *, prior_prec: float, prior_mean_n: float, friction,
                  inflate: bool):
    """Solve every frame's force from its scaled equations.

    Parameters
    ----------
    z : ndarray, shape (..., 3, S)
        Rows ``-b``, ``a`` (the design columns of Fx and Fy, scaled, 1/m per N)
        and ``y`` (1/m, scaled) of each frame.
    tx, ty : ndarray, shape (...)
        Unit tangent at the contact point (the axial direction).
    inv_sqrt_w : ndarray, shape (S,)
        The curvature noise sigma of each segment, 1/m (unscales the residual).
    prior_prec : float
        Precision of the fixed axial prior, 1/N^2 (0: none).
    prior_mean_n : float
        Its mean, N.
    friction : float or None
        Friction-cone coefficient ``mu`` (None: no cone prior).
    inflate : bool
        Scale the sigmas up by ``sqrt(chi2 / dof)`` when that exceeds 1.

    Returns
    -------
    list
        ``fx, fy, fn, fa, sigma_n, sigma_a, rms_per_m, chi2``, ndarrays of
        shape (...): N, N, N, N, N, N, 1/m, 1. A frame whose equations cannot
        be solved (or has a NaN input) is NaN throughout.
    """
    g = z @ np.swapaxes(z, -1, -2)  # (..., 3, 3): every sum of products, one call
    h11, h12, g1, h22, g2 = (g[..., i, j] for i, j in ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2)))
    txx, tyy, txy = tx * tx, ty * ty, tx * ty
    prec, cone = prior_prec, 0.0
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        if friction is not None:  # first pass: the normal component alone, n = (-ty, tx)
            hnn = h11 * tyy + h22 * txx - 2.0 * h12 * txy
            gn = tx * g2 - ty * g1
            cone = hnn * hnn / ((friction * friction) * (gn * gn + hnn))  # 1 / (mu^2 (F_n0^2 + var_n0))
            prec = prec + cone
        if friction is not None or prior_prec > 0:
            h11 = h11 + prec * txx
            h12 = h12 + prec * txy
            h22 = h22 + prec * tyy
        if prior_prec > 0 and prior_mean_n != 0:
            g1 = g1 + (prior_prec * prior_mean_n) * tx
            g2 = g2 + (prior_prec * prior_mean_n) * ty
        det = h11 * h22 - h12 * h12
        idet = 1.0 / det
        fx = (h22 * g1 - h12 * g2) * idet
        fy = (h11 * g2 - h12 * g1) * idet
        fn = tx * fy - ty * fx
        fa = tx * fx + ty * fy
        # chi-square from the residual itself (yy - F.g would cancel digits): data and priors
        r = z[..., 2, :] - fy[..., None] * z[..., 1, :] - fx[..., None] * z[..., 0, :]
        chi2 = (r * r).sum(-1)
        if friction is not None:
            chi2 += cone * (fa * fa)
        if prior_prec > 0:
            chi2 += prior_prec * (fa - prior_mean_n) ** 2
        var_n = (h22 * tyy + h11 * txx + 2.0 * h12 * txy) * idet
        var_a = (h22 * txx + h11 * tyy - 2.0 * h12 * txy) * idet
        dof = z.shape[-1] - (1 if (prior_prec > 0 or friction is not None) else 2)
        if inflate and dof > 0:
            scale = np.maximum(chi2 * (1.0 / dof), 1.0)
            var_n, var_a = var_n * scale, var_a * scale
        r *= inv_sqrt_w
        rms = np.sqrt((r * r).mean(-1))
        out = [fx, fy, fn, fa, np.sqrt(var_n), np.sqrt(var_a), rms, chi2]
        bad = ~(det > 1e-12 * h11 * h22) | ~np.isfinite(chi2)
    if bad.any():
        for arr in out:
            arr[bad] = np.nan
    return out


def solve_one_contact(out, n_seg: int, inv_sqrt_w, *, prior_prec: float, prior_mean_n: float, friction,
                      inflate: bool):
    """:func:`solve_contact` on one product's columns (see :class:`acquire.core.force.ForceEstimator`).

    Parameters
    ----------
    out : ndarray of float64, shape (N, 3S + 2)
        Per frame ``[Re e_0, Im e_0, ..., Re e_S-1, Im e_S-1, y_0 .. y_S-1, dx/ds, dy/ds]``
        (``y`` scaled by ``sqrt(w)``, 1; the last two: the tangent at the contact, any length).
    n_seg : int
    inv_sqrt_w, prior_prec, prior_mean_n, friction, inflate
        As for :func:`solve_stacked`.

    Returns
    -------
    force_n : ndarray, shape (N, 2)
        (Fx, Fy), N.
    normal_n, axial_n, sigma_normal_n, sigma_axial_n, rms_per_m : ndarray, shape (N,)
    tangent : ndarray, shape (N, 2)
        Unit tangent at the contact. NaN throughout for a frame that cannot be solved.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        d = out[:, 3 * n_seg:].view(np.complex128)[:, 0]
        ct = np.conj(d / np.abs(d))
    force, comp, sigma, rms = solve_contact(
        out[:, :2 * n_seg].view(np.complex128), out[:, 2 * n_seg:3 * n_seg], ct, inv_sqrt_w,
        prior_prec=prior_prec, prior_mean_n=prior_mean_n, friction=friction, inflate=inflate)
    tangent = np.conj(ct).view(np.float64).reshape(-1, 2)
    tangent[np.isnan(force[:, 0])] = np.nan
    return [force, comp.imag.copy(), comp.real.copy(), sigma[:, 0], sigma[:, 1], rms, tangent]


# long on purpose: one closed-form solve read top to bottom (half of it the docstring)
def solve_contact(e, y, ct, inv_sqrt_w, *, prior_prec: float, prior_mean_n: float, friction, inflate: bool,
                  with_sigma: bool = True):
    """:func:`solve_stacked` for one contact point, in complex arithmetic (the live path's few operations).

    Plane vectors are complex numbers ``x + i y``. With ``e_k = sqrt(w_k) (A_k - i B_k) / EI_k``
    each equation reads ``y_k = Im(e_k F)``, so the normal matrix is ``(s I + Q(q)) / 2``
    (``s`` real, ``Q(q)`` the symmetric trace-free matrix of a complex ``q``, ``Q(q)^2 = |q|^2 I``)
    and its inverse ``2 (s I - Q(q)) / (s^2 - |q|^2)``: the 2 x 2 solve, the priors and the
    variances become a handful of complex operations on arrays of N.

    Parameters
    ----------
    e : ndarray of complex128, shape (N, S)
        ``sqrt(w_k) (A_k - i B_k) / EI_k``, 1/m per N (its rows contiguous).
    y : ndarray of float64, shape (N, S)
        Curvature minus the free curvature, scaled by ``sqrt(w)``, 1.
    ct : ndarray of complex128, shape (N,)
        Complex conjugate of the unit tangent at the contact.
    inv_sqrt_w, prior_prec, prior_mean_n, friction, inflate
        As for :func:`solve_stacked`.
    with_sigma : bool
        Also the components, their uncertainties and the residual (False: the
        force alone, in about half the operations, for a view that draws only it).

    Returns
    -------
    force_n : ndarray of float64, shape (N, 2)
        (Fx, Fy), N.
    components : ndarray of complex128, shape (N,), or None
        ``F_a + i F_n``: the axial and normal components, N.
    sigma_n : ndarray of float64, shape (N, 2), or None
        1-sigma of the normal and the axial component, N.
    rms_per_m : ndarray, shape (N,), or None
        RMS curvature residual, 1/m.

    All new arrays; NaN throughout for a frame that cannot be solved.
    """
    n, n_seg = y.shape
    ones = _ones(n_seg)  # sums over the segments as products: fewer calls than reductions
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        s = (e.view(np.float64) ** 2) @ ones[1]  # sum |e|^2
        qm = np.conj((e * e) @ ones[0])  # minus the trace-free part q of the data's normal matrix
        sey = (e * y) @ ones[0]
        prec, cone, priors = prior_prec, 0.0, friction is not None or prior_prec > 0
        if priors:
            tc2 = ct * ct
        if friction is not None:  # first pass: the normal component alone
            hnn = 0.5 * (s + (qm * tc2).real)
            gn = (sey * np.conj(ct)).real
            cone = hnn * hnn / ((friction * friction) * (gn * gn + hnn))  # 1 / (mu^2 (F_n0^2 + var_n0))
            prec = prec + cone
        if priors:
            s = s + prec
            qm = qm - prec * np.conj(tc2)
        g = 2j * np.conj(sey)  # twice the right-hand side, complex
        if prior_prec > 0 and prior_mean_n != 0:
            g = g + (2.0 * prior_prec * prior_mean_n) * np.conj(ct)
        det = s * s - (qm * np.conj(qm)).real  # twice the determinant
        f = (s * g + qm * np.conj(g)) / det  # Fx + i Fy
        bad = ~(det > 1e-12 * s * s)
        force = f.view(np.float64).reshape(n, 2)
        if not with_sigma:
            if bad.any():
                force[bad] = np.nan
            return force, None, None, None
        comp = f * ct  # fa + i fn
        fa = comp.real
        r = y - (e * f[:, None]).imag
        rr = r * r
        chi2 = rr @ ones[2]
        if priors:
            chi2 += prec * (fa * fa) if prior_mean_n == 0 else cone * (fa * fa) + prior_prec * (fa - prior_mean_n) ** 2
        scale = 2.0 / det
        dof = n_seg - (1 if priors else 2)
        if inflate and dof > 0:
            scale *= np.maximum(chi2 * (1.0 / dof), 1.0)
        rq = (qm * tc2).real if priors else (qm * ct * ct).real
        sigma = np.empty((n, 2))
        np.subtract(s, rq, out=sigma[:, 0])
        np.add(s, rq, out=sigma[:, 1])
        sigma *= scale[:, None]
        np.sqrt(sigma, out=sigma)
        res = [force, comp, sigma, np.sqrt(rr @ _rms_weights(inv_sqrt_w))]
        bad |= np.isnan(chi2)
    if bad.any():
        for arr in res:
            arr[bad] = np.nan
    return res


def _rms_weights(inv_sqrt_w) -> np.ndarray:
    """sigma**2 / S: the mean of the unscaled squared residual as a product."""
    w = np.asarray(inv_sqrt_w, dtype=np.float64)
    return w * w * (1.0 / w.size)


@functools.lru_cache(maxsize=16)
def _ones(n_seg: int):
    """(complex ones (S,), real ones (2S,), real ones (S,)), read-only: shared."""
    out = (np.ones(n_seg, dtype=np.complex128), np.ones(2 * n_seg), np.ones(n_seg))
    for arr in out:
        arr.setflags(write=False)
    return out
