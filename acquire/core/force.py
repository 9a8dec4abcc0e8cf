"""External force on a soft finger from its tapped bend sensor.

Model
-----
A quasi-static planar Kirchhoff rod with the Euler-Bernoulli law: at every
section s the bending moment ``M(s) = EI(s) (kappa(s) - kappa_free(s, p))``
balances the moment of an external force ``F = (Fx, Fy)`` (N, base frame)
applied at the contact point ``r_c = r(s_c)``::

    M(s) = (x_c - x(s)) Fy - (y_c - y(s)) Fx     for s < s_c, 0 beyond.

The contact is the sensor's far end (``s_c`` = the sensor length) unless
given; it may lie on an unsensed tip beyond the sensor if the shape points
reach it. Frame conventions are the project's: the curve starts at (0, 0)
heading +x, ``theta' = kappa``, positive curvature turns toward +y, so a +y
force on the tip of a straight finger gives ``M > 0``, positive curvature.

Averaged over segment k (length ``L_k``, stiffness ``EI_k``, free curvature
``kappa0_k(p) = sum_i c_ki p**i``, i = 1..degree, p the actuation)::

    kappa_k - kappa0_k(p) = (Fy A_k - Fx B_k) / EI_k

with ``A_k``, ``B_k`` the segment means of ``(x_c - x(s))`` and
``(y_c - y(s))`` (zero beyond ``s_c``), m. They are linear in the shape
points: the weights of a spline quadrature depend only on the arc lengths and
are computed once. ``kappa_k`` is the sensor's segment *mean* curvature, which
is what a tapped sensor reads, so no pointwise curvature is needed.

Estimation
----------
The force is solved for in the contact frame: ``t`` the unit tangent of the
curve at ``s_c`` (from the shape points), ``n`` = ``t`` turned +90 deg, and
``F = F_n n + F_a t``. The S segment equations (2 unknowns) are solved by
weighted least squares (weight ``1 / sigma_k**2``, ``sigma_k`` the curvature
noise, 1/m) with priors on the axial component: the axial force's moment
arms ``t x (r_c - r)`` vanish on a straight finger, so without a prior it is
unobservable there, and on a bent finger its moment profile is close to the
normal force's, so curvature errors of a few hundredths of 1/m move it by
tens of percent. Two Gaussian priors, both optional, combine:

- a fixed one, ``F_a ~ N(mean, sigma**2)`` (``axial_prior_sigma_n``);
- a friction cone (``axial_friction`` = mu): the axial force is taken to lie
  within about mu times the normal force, ``F_a ~ N(0, mu**2 (F_n0**2 +
  var_n0))`` with ``F_n0`` the normal component fitted with no axial part. A
  stated assumption about the contact (Coulomb friction), not a measurement:
  it pins the axial part at zero when nothing pushes, and lets the data move
  it within the cone under load.

The 2 x 2 normal equations are solved in closed form per frame, vectorised
(:mod:`acquire.core.force_solve`); their inverse gives the 1-sigma
uncertainties (given the priors), scaled up by the residual when the fit is
worse than the stated noise (never down). With one contact point the
quadrature weights, stiffness, noise weights and free-curvature
coefficients are folded into one matrix at construction, so a block of
frames costs one matrix product and a few dozen array operations.

An unknown contact point may be estimated by scanning candidate arc lengths
and keeping, per frame, the one with the smallest chi-square.

Threads: everything here is pure; a :class:`ForceEstimator` is immutable after
construction and may be shared between threads. Returned arrays are new and
owned by the caller.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import make_interp_spline

from .force_solve import solve_one_contact, solve_stacked

__all__ = [
    "ForceModel",
    "ForceResult",
    "ForceEstimator",
    "estimate_force",
    "segment_moment_arms",
    "SolveSettings",
    "solve_settings",
    "QUADRATURES",
    "DEFAULT_AXIAL_PRIOR_SIGMA_N",
    "DEFAULT_AXIAL_FRICTION",
    "DEFAULT_CURVATURE_NOISE_PER_M",
]

QUADRATURES = ("cubic", "linear")
# Order of the forces a soft finger exerts (0.1 to a few N): a prior that says
# "about zero, give or take a newton" along the finger. Common practice, no source.
DEFAULT_AXIAL_PRIOR_SIGMA_N = 1.0
# Friction-cone prior a calibration stores: the axial force is within about half the normal force
# (Coulomb friction of a silicone or rubber fingertip on everyday objects is of order 0.3 to 1).
# Common practice, no source; an option, stated in the README.
DEFAULT_AXIAL_FRICTION = 0.5
# Order of a calibrated, low-passed resistive bend sensor's curvature noise per
# frame. Common practice, no source; pass the rig's measured value.
DEFAULT_CURVATURE_NOISE_PER_M = 0.1
_MODEL_KIND = "tapcurve-force-model"
_MODEL_VERSION = 1
_BASIS_CHUNK = 256  # spline basis columns per pass (bounds memory for dense shapes)
_BLOCK_VALUES = 1 << 17  # frames x candidates x segments per internal block


# ----------------------------------------------------------------------------- model


@dataclass(frozen=True)
class ForceModel:
    """Stiffness and free curvature of each segment.

    Parameters
    ----------
    segment_lengths_m : array_like, shape (S,)
        Tap k to tap k+1, m, base first.
    ei_n_m2 : array_like, shape (S,)
        Bending stiffness EI of each segment, N m^2, > 0.
    free_curvature_coeffs : array_like, shape (S, D)
        ``kappa0_k(p) = sum_i coeffs[k, i] * p**(i + 1)``, 1/m per actuation
        unit**(i+1); D = 1 (linear) or 2 (quadratic). No constant term: the
        curvature calibration's tare makes the relaxed finger read zero.
    actuation_unit : str
        Unit of the actuation p the coefficients refer to (e.g. "kPa"), a label.

    Arrays are copied and made read-only; the model is immutable (any thread).
    """

    segment_lengths_m: np.ndarray
    ei_n_m2: np.ndarray
    free_curvature_coeffs: np.ndarray
    actuation_unit: str = ""

    def __post_init__(self):
        lengths = _finite_array(self.segment_lengths_m, "segment_lengths_m", ndim=1)
        s = lengths.size
        if s == 0 or not np.all(lengths > 0):
            raise ValueError("force model: key 'segment_lengths_m' must be positive lengths, m")
        ei = _finite_array(self.ei_n_m2, "ei_n_m2", ndim=1)
        if ei.shape != (s,) or not np.all(ei > 0):
            raise ValueError(f"force model: key 'ei_n_m2' must be {s} positive stiffnesses, N m^2")
        coeffs = _finite_array(self.free_curvature_coeffs, "free_curvature_coeffs", ndim=2)
        if coeffs.shape[0] != s or coeffs.shape[1] not in (1, 2):
            raise ValueError(f"force model: key 'free_curvature_coeffs' must have shape ({s}, 1 or 2)")
        if not isinstance(self.actuation_unit, str):
            raise ValueError("force model: key 'actuation_unit' must be a string")
        for name, arr in (("segment_lengths_m", lengths), ("ei_n_m2", ei), ("free_curvature_coeffs", coeffs)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    @property
    def n_segments(self) -> int:
        return int(self.segment_lengths_m.size)

    @property
    def degree(self) -> int:
        """Degree of the free-curvature polynomial in the actuation (1 or 2)."""
        return int(self.free_curvature_coeffs.shape[1])

    def free_curvature_per_m(self, actuation) -> np.ndarray:
        """``kappa0_k(p)`` for N actuation values: (N,) -> new (N, S) array, 1/m."""
        p = np.asarray(actuation, dtype=np.float64).reshape(-1)
        powers = p[:, None] ** np.arange(1, self.degree + 1)  # (N, D)
        return powers @ self.free_curvature_coeffs.T

    def to_dict(self) -> dict:
        """JSON-able dict (lists of floats)."""
        return {
            "kind": _MODEL_KIND,
            "version": _MODEL_VERSION,
            "segment_lengths_m": self.segment_lengths_m.tolist(),
            "ei_n_m2": self.ei_n_m2.tolist(),
            "free_curvature_coeffs": self.free_curvature_coeffs.tolist(),
            "actuation_unit": self.actuation_unit,
        }

    @classmethod
    def from_dict(cls, data) -> "ForceModel":
        """Inverse of :meth:`to_dict`; a one-line ValueError names the bad key."""
        if not isinstance(data, dict):
            raise ValueError("force model: expected a JSON object")
        if data.get("kind", _MODEL_KIND) != _MODEL_KIND:
            raise ValueError(f"force model: key 'kind' must be {_MODEL_KIND!r}")
        if data.get("version", _MODEL_VERSION) != _MODEL_VERSION:
            raise ValueError(f"force model: key 'version' must be {_MODEL_VERSION}")
        for key in ("segment_lengths_m", "ei_n_m2", "free_curvature_coeffs"):
            if key not in data:
                raise ValueError(f"force model: missing key {key!r}")
        return cls(
            segment_lengths_m=data["segment_lengths_m"],
            ei_n_m2=data["ei_n_m2"],
            free_curvature_coeffs=data["free_curvature_coeffs"],
            actuation_unit=data.get("actuation_unit", ""),
        )


def _finite_array(value, key: str, *, ndim: int) -> np.ndarray:
    try:
        arr = np.array(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"force model: key {key!r} must be numbers") from None
    if arr.ndim != ndim or not np.all(np.isfinite(arr)):
        raise ValueError(f"force model: key {key!r} must be a {ndim}-d array of finite numbers")
    return arr


# ----------------------------------------------------------------------------- result


@dataclass(frozen=True)
class ForceResult:
    """Force estimates of N frames (all arrays new, owned by the caller).

    Attributes
    ----------
    force_n : ndarray, shape (N, 2)
        (Fx, Fy) in the base frame, N.
    normal_n, axial_n : ndarray, shape (N,)
        Components along the contact normal ``n`` and tangent ``t``, N.
    sigma_normal_n, sigma_axial_n : ndarray, shape (N,)
        1-sigma uncertainties of those components, N.
    residual_per_m : ndarray, shape (N,)
        RMS over the segments of the curvature residual, 1/m.
    tangent : ndarray, shape (N, 2)
        Unit tangent ``t`` at the contact point (the axial direction).
    contact_s_m : ndarray, shape (N,)
        Arc length of the contact point used (scanned or given), m.

    A frame with a NaN input, or whose equations cannot be solved, is NaN.
    """

    force_n: np.ndarray
    normal_n: np.ndarray
    axial_n: np.ndarray
    sigma_normal_n: np.ndarray
    sigma_axial_n: np.ndarray
    residual_per_m: np.ndarray
    tangent: np.ndarray
    contact_s_m: np.ndarray


@dataclass(frozen=True)
class SolveSettings:
    """The estimator options in the form the solve uses (see :func:`solve_settings`)."""

    sqrt_w: np.ndarray  # (S,) 1 / curvature noise, m
    inv_sqrt_w: np.ndarray  # (S,) curvature noise, 1/m
    scale_ab: np.ndarray  # (S,) sqrt(w) / EI: moment arm (m) to scaled equation, per N
    prior_prec: float  # 1/N^2, 0 for none
    prior_mean_n: float
    friction: float | None
    inflate: bool

    def solve_options(self) -> dict:
        """Keywords of :func:`acquire.core.force_solve.solve_contact` and friends."""
        return {"prior_prec": self.prior_prec, "prior_mean_n": self.prior_mean_n, "friction": self.friction,
                "inflate": self.inflate}


def solve_settings(model, *, axial_prior_sigma_n: float = DEFAULT_AXIAL_PRIOR_SIGMA_N, axial_prior_mean_n: float = 0.0,
                   axial_friction: float | None = None, curvature_noise_per_m=DEFAULT_CURVATURE_NOISE_PER_M,
                   inflate_by_residual: bool = True) -> SolveSettings:
    """Check the estimator options (see :class:`ForceEstimator`) against ``model``; ValueError names the bad one."""
    if not isinstance(model, ForceModel):
        raise TypeError("model must be a ForceModel")
    if not axial_prior_sigma_n > 0:
        raise ValueError("axial_prior_sigma_n must be positive (inf for no prior), N")
    if axial_friction is not None and not (math.isfinite(axial_friction) and axial_friction > 0):
        raise ValueError("axial_friction must be a positive finite number (or None)")
    noise = np.broadcast_to(np.asarray(curvature_noise_per_m, dtype=np.float64), (model.n_segments,))
    if not np.all(np.isfinite(noise) & (noise > 0)):
        raise ValueError("curvature_noise_per_m must be positive and finite, 1/m")
    sw = 1.0 / noise
    return SolveSettings(
        sqrt_w=sw, inv_sqrt_w=noise.copy(), scale_ab=sw / model.ei_n_m2,
        prior_prec=0.0 if math.isinf(axial_prior_sigma_n) else 1.0 / axial_prior_sigma_n**2,
        prior_mean_n=float(axial_prior_mean_n),
        friction=None if axial_friction is None else float(axial_friction),
        inflate=bool(inflate_by_residual))


# ----------------------------------------------------------------------------- geometry


def _check_s(s_m, sensor_length_m: float) -> np.ndarray:
    s = np.array(s_m, dtype=np.float64).reshape(-1)
    if s.size < 2 or not np.all(np.isfinite(s)) or not np.all(np.diff(s) > 0):
        raise ValueError("s_m must be at least 2 finite, increasing arc lengths, m")
    tol = 1e-9 * sensor_length_m
    if abs(s[0]) > tol or s[-1] < sensor_length_m - tol:
        raise ValueError(f"s_m must run from 0 to at least the sensor length {sensor_length_m:g} m")
    return s


def _arm_matrix(s: np.ndarray, lengths: np.ndarray, contact_s_m: float, quadrature: str) -> np.ndarray:
    """Weights W, shape (2P, 2S+2): ``xy.reshape(N, 2P) @ W`` = [A (S), B (S), dx/ds, dy/ds] at s_c.

    The point values are interpolated by a spline (not-a-knot cubic, or
    piecewise linear) whose integrals and end slope are linear functionals of
    the values; the spline is built on unit vectors, a chunk of them at a time.
    """
    p, n_seg = s.size, lengths.size
    knots = np.concatenate([[0.0], np.cumsum(lengths)])
    lo, hi = knots[:-1], np.minimum(knots[1:], contact_s_m)
    order = 3 if quadrature == "cubic" and p >= 4 else 1
    q = np.zeros((n_seg, p))  # integral over [lo, hi] of each basis function
    e = np.zeros(p)  # value at s_c
    d = np.zeros(p)  # slope at s_c
    for j0 in range(0, p, _BASIS_CHUNK):
        j1 = min(p, j0 + _BASIS_CHUNK)
        basis = np.zeros((p, j1 - j0))
        basis[np.arange(j0, j1), np.arange(j1 - j0)] = 1.0
        spl = make_interp_spline(s, basis, k=order)
        for k in np.flatnonzero(hi > lo):
            q[k, j0:j1] = spl.integrate(lo[k], hi[k])
        e[j0:j1] = spl(contact_s_m)
        d[j0:j1] = spl(contact_s_m, nu=1)
    frac = np.clip(hi - lo, 0.0, None) / lengths
    g = frac[:, None] * e[None, :] - q / lengths[:, None]  # (S, P): mean of (v_c - v(s)) 1[s < s_c]
    w = np.zeros((2 * p, 2 * n_seg + 2))
    w[0::2, :n_seg] = g.T
    w[1::2, n_seg:2 * n_seg] = g.T
    w[0::2, 2 * n_seg] = d
    w[1::2, 2 * n_seg + 1] = d
    return w


def segment_moment_arms(xy_m, s_m, *, segment_lengths_m, contact_s_m=None, quadrature: str = "cubic"):
    """Segment-mean moment arms of N shapes.

    Pure, any thread.

    Parameters
    ----------
    xy_m : array_like, shape (N, P, 2) or (P, 2)
        Shape points, m, base frame, at arc lengths ``s_m``.
    s_m : array_like, shape (P,)
        Increasing, from 0 to at least the sensor length, m.
    segment_lengths_m : array_like, shape (S,)
    contact_s_m : float, optional
        Arc length of the contact point, m; default the sensor length.
    quadrature : {"cubic", "linear"}

    Returns
    -------
    a_m, b_m : ndarray, shape (N, S)
        Segment means of ``x_c - x(s)`` and ``y_c - y(s)`` (zero beyond s_c),
        m: the segment-mean moment is ``Fy * a_m - Fx * b_m``.
    tangent : ndarray, shape (N, 2)
        Unit tangent at the contact point.
    """
    lengths = np.asarray(segment_lengths_m, dtype=np.float64).reshape(-1)
    geom = _Geometry(lengths, s_m, contact_s_m, None, quadrature)
    xy = np.asarray(xy_m, dtype=np.float64)
    a, b, t = geom.arms(xy.reshape(-1, geom.n_points, 2))
    return np.ascontiguousarray(a[:, 0]), np.ascontiguousarray(b[:, 0]), t[:, 0]


class _Geometry:
    """Validated layout, contact points (C, most distal first) and their quadrature weights."""

    def __init__(self, lengths, s_m, contact_s_m, candidates_m, quadrature):
        if quadrature not in QUADRATURES:
            raise ValueError(f"quadrature must be one of {QUADRATURES}, got {quadrature!r}")
        if lengths.size == 0 or not np.all(np.isfinite(lengths) & (lengths > 0)):
            raise ValueError("segment_lengths_m must be positive lengths, m")
        self.lengths = lengths
        self.s = _check_s(s_m, float(lengths.sum()))
        self.s.setflags(write=False)
        self.n_points = self.s.size
        if candidates_m is not None:
            if contact_s_m is not None:
                raise ValueError("give contact_s_m or contact_candidates_m, not both")
            cand = np.unique(np.asarray(candidates_m, dtype=np.float64).reshape(-1))[::-1]
            if cand.size == 0:
                raise ValueError("contact_candidates_m is empty")
        else:
            cand = [float(lengths.sum()) if contact_s_m is None else contact_s_m]
        self.contacts_m = np.array([self._check_contact(c) for c in cand])
        self.contacts_m.setflags(write=False)
        # one product for every candidate: columns [A (S), B (S), dx/ds, dy/ds] per candidate
        self.weights = np.concatenate([_arm_matrix(self.s, lengths, c, quadrature) for c in self.contacts_m], axis=1)

    def _check_contact(self, value) -> float:
        c = float(value)
        if not (0.0 < c <= self.s[-1]):
            raise ValueError(f"contact_s_m must be in (0, {self.s[-1]:g}] m, got {value!r}")
        return c

    def arms(self, xy: np.ndarray):
        """(n, P, 2) -> A, B (n, C, S), unit tangent (n, C, 2)."""
        n_seg, n = self.lengths.size, xy.shape[0]
        out = (xy.reshape(n, 2 * self.n_points) @ self.weights).reshape(n, self.contacts_m.size, 2 * n_seg + 2)
        t = out[..., 2 * n_seg:]
        with np.errstate(invalid="ignore", divide="ignore"):
            t = t / np.hypot(t[..., 0], t[..., 1])[..., None]
        return out[..., :n_seg], out[..., n_seg:2 * n_seg], t


# ----------------------------------------------------------------------------- estimator


class ForceEstimator:
    """Force at the contact point from segment curvatures and shape, N frames at once.

    Every frame is solved on its own, so the estimator keeps no state: feeding
    a stream one frame at a time or in any chunks gives the same result.
    :meth:`reset` exists for uniformity with the stateful filters.

    Parameters
    ----------
    model : ForceModel
    s_m : array_like, shape (P,)
        Arc lengths of the shape points, m (e.g. the reconstructor's ``s_m``).
    contact_s_m : float, optional
        Known contact point, m; default the sensor's far end.
    contact_candidates_m : array_like, optional
        Scan these contact points instead and keep, per frame, the one with the
        smallest chi-square (ties go to the most distal). Excludes ``contact_s_m``.
    axial_prior_sigma_n : float
        Prior 1-sigma of the axial component, N (``inf``: no fixed prior).
    axial_prior_mean_n : float
        Prior mean of the axial component, N.
    axial_friction : float, optional
        Friction-cone prior on the axial component: it is taken to be within
        about this many times the normal component (Coulomb friction at the
        contact, ``mu``; a stated assumption). Combines with the fixed prior.
        None (default): no cone prior. See :mod:`acquire.core.force_solve`.
    curvature_noise_per_m : float or array_like, shape (S,)
        1-sigma noise of each segment's curvature per frame, 1/m.
    inflate_by_residual : bool
        Scale the uncertainties by ``sqrt(chi2 / dof)`` when that exceeds 1.
    quadrature : {"cubic", "linear"}
        Interpolation of the shape between its points for the moment arms.

    With one contact point (known or the far end) every per-frame step is one
    matrix product with weights fixed at construction, then a closed-form
    2 x 2 solve: a few array operations per call whatever the frame count.

    Threads: immutable after construction; pure, any thread.
    """

    def __init__(
        self,
        model: ForceModel,
        s_m,
        *,
        contact_s_m=None,
        contact_candidates_m=None,
        axial_prior_sigma_n: float = DEFAULT_AXIAL_PRIOR_SIGMA_N,
        axial_prior_mean_n: float = 0.0,
        axial_friction: float | None = None,
        curvature_noise_per_m=DEFAULT_CURVATURE_NOISE_PER_M,
        inflate_by_residual: bool = True,
        quadrature: str = "cubic",
    ):
        st = solve_settings(model, axial_prior_sigma_n=axial_prior_sigma_n, axial_prior_mean_n=axial_prior_mean_n,
                            axial_friction=axial_friction, curvature_noise_per_m=curvature_noise_per_m,
                            inflate_by_residual=inflate_by_residual)
        self.model = model
        self._geom = _Geometry(model.segment_lengths_m, s_m, contact_s_m, contact_candidates_m, quadrature)
        self.s_m = self._geom.s
        self.contacts_m = self._geom.contacts_m
        n_seg, n_pts, n_c = model.n_segments, self._geom.n_points, self.contacts_m.size
        self._sw, self._inv_sw, self._scale_ab = st.sqrt_w, st.inv_sqrt_w, st.scale_ab
        self._prior_prec, self._prior_mean, self._friction, self._inflate = (
            st.prior_prec, st.prior_mean_n, st.friction, st.inflate)
        self._fast = self._fast_weights() if n_c == 1 else None
        # frames per internal block: bounds the temporaries to about 1 MB each
        width = (2 * n_pts + n_seg + model.degree) if n_c == 1 else n_c * n_seg * 3
        self._block = max(1, _BLOCK_VALUES // width)

    def _fast_weights(self) -> np.ndarray:
        """(2P + S + D, 3S + 2): [xy, kappa, p**1..D] -> [Re e, Im e interleaved, y, dx/ds, dy/ds].

        ``e_k = sqrt(w_k) (A_k - i B_k) / EI_k`` and ``y = sqrt(w) (kappa - sum_i c_i p**i)`` at the
        one contact point (see :func:`acquire.core.force_solve.solve_one_contact`).
        """
        n_seg, n_pts, deg = self.model.n_segments, self._geom.n_points, self.model.degree
        w = np.zeros((2 * n_pts + n_seg + deg, 3 * n_seg + 2))
        arm = self._geom.weights  # (2P, 2S + 2): [A, B, dx, dy]
        w[:2 * n_pts, 0:2 * n_seg:2] = arm[:, :n_seg] * self._scale_ab
        w[:2 * n_pts, 1:2 * n_seg:2] = -arm[:, n_seg:2 * n_seg] * self._scale_ab
        w[:2 * n_pts, 3 * n_seg:] = arm[:, 2 * n_seg:]
        rows = 2 * n_pts + np.arange(n_seg)
        w[rows, 2 * n_seg + np.arange(n_seg)] = self._sw
        for i in range(deg):
            w[2 * n_pts + n_seg + i, 2 * n_seg:3 * n_seg] = -self._sw * self.model.free_curvature_coeffs[:, i]
        w.setflags(write=False)
        return w

    @property
    def n_points(self) -> int:
        return self._geom.n_points

    def reset(self) -> None:
        """No state to clear (each frame stands alone)."""

    def process(self, curvature_per_m, xy_m, actuation) -> ForceResult:
        """Estimate the force of N frames.

        Parameters
        ----------
        curvature_per_m : array_like, shape (N, S)
            Measured mean curvature of each segment, 1/m.
        xy_m : array_like, shape (N, P, 2)
            Shape points at :attr:`s_m`, m, base frame (float32 or float64).
        actuation : float or array_like, shape (N,)
            Actuation p of each frame, in the model's unit.

        Returns
        -------
        ForceResult
            New arrays, owned by the caller. Pure, any thread.
        """
        kappa = np.asarray(curvature_per_m, dtype=np.float64)
        s_count = self.model.n_segments
        if kappa.ndim != 2 or kappa.shape[1] != s_count:
            raise ValueError(f"curvature_per_m: expected shape (N, {s_count}), got {kappa.shape}")
        n = kappa.shape[0]
        xy = np.asarray(xy_m)
        if xy.shape != (n, self.n_points, 2):
            raise ValueError(f"xy_m: expected shape ({n}, {self.n_points}, 2), got {xy.shape}")
        p = np.asarray(actuation, dtype=np.float64)
        if p.shape != (n,):
            p = np.broadcast_to(p, (n,))
        solve = self._fast_solve if self._fast is not None else self._scan_solve
        if n <= self._block:
            return ForceResult(*solve(kappa, xy, p))
        parts = [np.empty((n, 2)), *(np.empty(n) for _ in range(5)), np.empty((n, 2)), np.empty(n)]
        for i in range(0, n, self._block):
            j = i + self._block
            for dst, src in zip(parts, solve(kappa[i:j], xy[i:j], p[i:j])):
                dst[i:j] = src
        return ForceResult(*parts)

    def _fast_solve(self, kappa, xy, p):
        n, n_seg = kappa.shape
        cols = [xy.reshape(n, -1), kappa, p[:, None]]
        if self.model.degree == 2:
            cols.append((p * p)[:, None])
        out = np.concatenate(cols, axis=1, dtype=np.float64) @ self._fast  # (n, 3S + 2)
        force, fn, fa, sn, sa, rms, t = solve_one_contact(
            out, n_seg, self._inv_sw, prior_prec=self._prior_prec, prior_mean_n=self._prior_mean,
            friction=self._friction, inflate=self._inflate)
        return force, fn, fa, sn, sa, rms, t, np.full(n, self.contacts_m[0])

    def _scan_solve(self, kappa, xy, p):
        """Every candidate contact point, then per frame the one of least chi-square."""
        a, b, t = self._geom.arms(np.asarray(xy, dtype=np.float64))  # (n, C, S), (n, C, 2)
        y = (kappa - self.model.free_curvature_per_m(p)) * self._sw
        z = np.stack([b * -self._scale_ab, a * self._scale_ab, np.broadcast_to(y[:, None, :], a.shape)], axis=2)
        fx, fy, fn, fa, sn, sa, rms, chi2 = solve_stacked(
            z, t[..., 0], t[..., 1], self._inv_sw, prior_prec=self._prior_prec, prior_mean_n=self._prior_mean,
            friction=self._friction, inflate=self._inflate)
        # per frame the candidate of least chi-square; first (most distal) on ties or all-NaN
        pick = np.argmin(np.where(np.isnan(chi2), np.inf, chi2), axis=1)
        rows = np.arange(pick.size)
        fx, fy, fn, fa, sn, sa, rms, t = (v[rows, pick] for v in (fx, fy, fn, fa, sn, sa, rms, t))
        return np.stack([fx, fy], axis=1), fn, fa, sn, sa, rms, t, self.contacts_m[pick]


def estimate_force(model: ForceModel, curvature_per_m, xy_m, s_m, actuation, **options) -> ForceResult:
    """One-shot :meth:`ForceEstimator.process`; ``options`` are the estimator's keywords.

    Pure, any thread. Building the estimator computes the quadrature weights;
    reuse a :class:`ForceEstimator` for a stream.
    """
    return ForceEstimator(model, s_m, **options).process(curvature_per_m, xy_m, actuation)
