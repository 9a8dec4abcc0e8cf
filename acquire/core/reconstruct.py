"""Shape of the sensor from the mean curvature of its segments.

The curve starts at (0, 0) heading along +x; with arc length s from the base,
``theta' = kappa``, ``x' = cos theta``, ``y' = sin theta`` (positive curvature
turns toward +y). Each segment's reading is the *mean* curvature over the
segment, so ``theta`` at every tap is known exactly: ``theta(s_j) = sum of
kappa_k * L_k`` over the segments before tap j. Two ways to fill in between:

``"arcs"``
    Piecewise-constant curvature: a chain of exact circular arcs (closed form,
    ``chord = h * sin(dtheta/2) / (dtheta/2)`` along the mean heading).
``"smooth"`` (default)
    A mean-preserving (area-matching) spline, the histospline: ``theta(s)`` is
    the cubic spline through the exact tap angles ("not-a-knot" ends, which
    impose no value or slope on the curvature at the ends), so the curvature
    ``kappa = theta'`` is a C1 piecewise quadratic whose mean over every
    segment equals that segment's reading exactly. x and y are integrated with
    3-point Gauss-Legendre on every sub-interval (between consecutive output
    points, about ``spacing_m`` long; error far below a micrometre at the
    curvatures a finger reaches).

Everything that depends only on the segment layout is precomputed: per frame
the work is one (N, S) x (S, K) matrix product, a cos/sin and a cumulative sum.

Beyond the sensor an unsensed tip of ``tip_length_m`` may be added: ``"rigid"``
goes straight on; ``"continue"`` keeps the last segment's mean curvature (for
both methods).

Threads: a :class:`Reconstructor` is immutable after construction and may be
shared between threads. Returned arrays are new, owned by the caller.
"""
from __future__ import annotations

import math

import numpy as np

from acquire.rig import Rig

__all__ = ["Reconstructor", "body_outline", "not_a_knot_basis", "METHODS", "TIP_MODES"]

METHODS = ("smooth", "arcs")
TIP_MODES = ("rigid", "continue")
_GAUSS_NODES = 3
_BLOCK_VALUES = 1 << 16  # heading values per internal block of frames


class Reconstructor:
    """Curvature of S segments to shape points, for N frames at once.

    Parameters
    ----------
    segment_lengths_m : array_like, shape (S,)
        Tap k to tap k+1, m, base first.
    spacing_m : float
        Largest distance between output points, m. Every tap is a point.
    method : {"smooth", "arcs"}
    tip_length_m : float
        Unsensed length beyond the last tap, m (0 = none).
    tip_mode : {"rigid", "continue"}

    Attributes
    ----------
    s_m : ndarray of float64, shape (P,)
        Arc length of each point, m: 0 first, the sensor length exactly at
        ``tap_index[-1]``, then the tip points.
    tap_index : ndarray of int, shape (S + 1,)
        Index in ``s_m`` of tap j (tap S = the sensor's far end).
    """

    def __init__(
        self,
        segment_lengths_m,
        *,
        spacing_m: float = 0.001,
        method: str = "smooth",
        tip_length_m: float = 0.0,
        tip_mode: str = "rigid",
    ):
        lengths = np.asarray(segment_lengths_m, dtype=np.float64).reshape(-1)
        if lengths.size == 0 or not np.all(np.isfinite(lengths) & (lengths > 0)):
            raise ValueError("segment lengths must be positive numbers")
        if not spacing_m > 0:
            raise ValueError("spacing_m must be positive")
        if method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}, got {method!r}")
        if tip_mode not in TIP_MODES:
            raise ValueError(f"tip_mode must be one of {TIP_MODES}, got {tip_mode!r}")
        if not tip_length_m >= 0:
            raise ValueError("tip_length_m must not be negative")
        self.segment_lengths_m = lengths
        self.method = method
        self.tip_length_m = float(tip_length_m)
        self.tip_mode = tip_mode
        self.spacing_m = float(spacing_m)
        n_seg = lengths.size
        knots = np.concatenate([[0.0], np.cumsum(lengths)])
        knots[-1] = float(np.sum(lengths))
        self.knots_m = knots
        self.sensor_length_m = float(knots[-1])

        # output points: every tap exactly, uniform steps within a segment
        pts = []
        tap_index = [0]
        for k in range(n_seg):
            n = max(1, math.ceil(lengths[k] / spacing_m - 1e-9))
            pts.append(knots[k] + lengths[k] * np.arange(n) / n)
            tap_index.append(tap_index[-1] + n)
        pts.append([knots[-1]])
        if self.tip_length_m > 0:
            n = max(1, math.ceil(self.tip_length_m / spacing_m - 1e-9))
            pts.append(knots[-1] + self.tip_length_m * np.arange(1, n + 1) / n)
        s = np.concatenate(pts)
        s.setflags(write=False)
        self.s_m = s
        self.tap_index = np.asarray(tap_index, dtype=np.int64)
        self.n_points = int(s.size)

        self._theta_pts = self._theta_matrix(s)  # (P, S)
        if method == "smooth":
            xi, w = np.polynomial.legendre.leggauss(_GAUSS_NODES)
            h = np.diff(s)
            nodes = s[:-1, None] + 0.5 * h[:, None] * (1.0 + xi[None, :])  # (P-1, G)
            # node-major columns (S, G*(P-1)): each node's headings form a contiguous row per frame
            self._theta_nodes = np.ascontiguousarray(self._theta_matrix(nodes.T.reshape(-1)).T)
            self._weights = np.ascontiguousarray(0.5 * h[None, :] * w[:, None])  # (G, P-1)
            self._weights32 = self._weights.astype(np.float32)
        else:
            self._h = np.diff(s)
            self._theta_pts_t = np.ascontiguousarray(self._theta_pts.T)  # (S, P)

    @classmethod
    def from_rig(cls, rig: Rig, *, spacing_m: float = 0.001, method: str = "smooth") -> "Reconstructor":
        """The rig's segments and tip."""
        return cls(
            rig.segment_lengths_m,
            spacing_m=spacing_m,
            method=method,
            tip_length_m=rig.tip_length_m,
            tip_mode=rig.tip_mode,
        )

    @property
    def n_segments(self) -> int:
        return int(self.segment_lengths_m.size)

    # -- linear maps from segment means to theta and kappa

    def _spline(self, s: np.ndarray, *, derivative: int = 0) -> np.ndarray:
        # theta(s) = B(s) @ F with F the exact tap angles: the (M, S+1) basis B (or its slope)
        return not_a_knot_basis(self.knots_m, s, derivative=derivative)

    def _cumulative(self) -> np.ndarray:
        # F_j = sum_{k<j} m_k L_k as a matrix (S+1, S)
        a = np.tril(np.ones((self.n_segments + 1, self.n_segments)), k=-1)
        return a * self.segment_lengths_m[None, :]

    def _theta_matrix(self, s: np.ndarray) -> np.ndarray:
        """(M, S) matrix T with theta(s) = T @ mean_curvature."""
        s = np.asarray(s, dtype=np.float64)
        L = self.sensor_length_m
        inside = np.minimum(s, L)
        if self.method == "arcs":
            t = np.clip(inside[:, None] - self.knots_m[None, :-1], 0.0, self.segment_lengths_m[None, :])
        else:
            t = self._spline(inside) @ self._cumulative()
            # taps exactly (the spline reproduces them up to rounding)
            at_end = s >= L
            t[at_end] = self.segment_lengths_m[None, :]
        if self.tip_mode == "continue":
            t[:, -1] += np.maximum(s - L, 0.0)
        return t

    def heading_matrix(self, s_m) -> np.ndarray:
        """The linear map from mean curvature to the heading the method assumes at arc lengths ``s_m``.

        Parameters
        ----------
        s_m : array_like, shape (M,)
            Arc lengths, m (0 .. sensor length + tip).

        Returns
        -------
        ndarray of float64, shape (M, S)
            ``theta(s_m) = T @ mean_curvature`` (rad per 1/m, i.e. m); new array.
        """
        return self._theta_matrix(np.asarray(s_m, dtype=np.float64).reshape(-1))

    def curvature_at(self, curvature_per_m: np.ndarray, s_m: np.ndarray) -> np.ndarray:
        """The curvature profile the method assumes, at arbitrary arc lengths.

        Parameters
        ----------
        curvature_per_m : array_like, shape (N, S)
            Mean curvature of each segment, 1/m.
        s_m : array_like, shape (M,)
            Arc lengths, m (0 .. sensor length + tip).

        Returns
        -------
        ndarray of float64, shape (N, M), 1/m
        """
        m = np.asarray(curvature_per_m, dtype=np.float64)
        s = np.asarray(s_m, dtype=np.float64).reshape(-1)
        L = self.sensor_length_m
        inside = np.clip(s, 0.0, L)
        if self.method == "arcs":
            seg = np.clip(np.searchsorted(self.knots_m, inside, side="right") - 1, 0, self.n_segments - 1)
            k_mat = np.zeros((s.size, self.n_segments))
            k_mat[np.arange(s.size), seg] = 1.0
        else:
            k_mat = self._spline(inside, derivative=1) @ self._cumulative()
        beyond = s > L
        k_mat[beyond] = 0.0
        if self.tip_mode == "continue":
            k_mat[beyond, -1] = 1.0
        return m @ k_mat.T

    # -- per frame

    def tangent_angle_rad(self, curvature_per_m: np.ndarray) -> np.ndarray:
        """Heading theta at every point, (N, S) 1/m -> (N, P) rad."""
        return np.asarray(curvature_per_m, dtype=np.float64) @ self._theta_pts.T

    def shape_xy(self, curvature_per_m: np.ndarray, *, dtype=np.float64) -> np.ndarray:
        """Shape points of N frames.

        Parameters
        ----------
        curvature_per_m : array_like, shape (N, S)
            Mean curvature of each segment, 1/m.
        dtype : numpy.float64 or numpy.float32
            Of the result. With float32 the headings are still formed in double
            precision, but cos/sin and the running sums are single precision
            (several times faster; heading error about 3e-7 rad, position error
            well below 0.1 um for a sensor of 0.1 m, below what float32 stores).

        Returns
        -------
        ndarray of ``dtype``, shape (N, P, 2)
            x, y in the base frame, m, at arc lengths :attr:`s_m`. A NaN
            curvature makes its whole frame NaN.
        """
        m = np.asarray(curvature_per_m, dtype=np.float64)
        if m.ndim != 2 or m.shape[1] != self.n_segments:
            raise ValueError(f"expected shape (N, {self.n_segments}), got {m.shape}")
        dtype = np.dtype(dtype)
        if dtype not in (np.dtype(np.float64), np.dtype(np.float32)):
            raise ValueError(f"dtype must be float64 or float32, got {dtype}")
        n = m.shape[0]
        out = np.empty((n, self.n_points, 2), dtype=dtype)
        # blocks of frames small enough to stay in cache (large N is memory-bound otherwise)
        step = max(1, _BLOCK_VALUES // (self.n_points * _GAUSS_NODES))
        for i in range(0, n, step):
            self._shape_block(m[i:i + step], out[i:i + step])
        return out

    def _shape_block(self, m: np.ndarray, out: np.ndarray) -> None:
        n = m.shape[0]
        single = out.dtype == np.float32
        out[:, 0, :] = 0.0
        if self.method == "smooth":
            th = (m @ self._theta_nodes).reshape(n, _GAUSS_NODES, self.n_points - 1)
            if single:
                th = th.astype(np.float32)
            w = self._weights32 if single else self._weights
            c = np.cos(th)
            c *= w
            dx = c.sum(axis=1)
            np.sin(th, out=c)
            c *= w
            dy = c.sum(axis=1)
        else:
            th = m @ self._theta_pts_t  # (N, P)
            dth = np.diff(th, axis=1)
            mid = th[:, :-1] + 0.5 * dth
            chord = self._h * np.sinc(dth * (0.5 / np.pi))  # h sin(d/2)/(d/2), exact for an arc
            if single:
                mid = mid.astype(np.float32)
                chord = chord.astype(np.float32)
            dx = chord * np.cos(mid)
            dy = chord * np.sin(mid)
        np.cumsum(dx, axis=1, out=out[:, 1:, 0])
        np.cumsum(dy, axis=1, out=out[:, 1:, 1])


def _knot_slopes(knots: np.ndarray) -> np.ndarray:
    """(n, n) matrix mapping knot values to knot slopes of the "not-a-knot" cubic spline.

    Unknowns: the slopes m_i of a C1 piecewise cubic (Hermite form). Rows:
    C2 at every interior knot, and a continuous third derivative across the
    second and the last-but-one knot (the not-a-knot ends). With 3 knots that
    is the parabola through them, with 2 the straight line (C. de Boor, "A
    Practical Guide to Splines", ch. IV, end conditions).
    """
    n = knots.size
    h = np.diff(knots)
    eye = np.eye(n)
    delta = (eye[1:] - eye[:-1]) / h[:, None]  # (n-1, n): secant slope of interval i, linear in the values
    if n == 2:  # a line
        return np.stack([delta[0], delta[0]])
    a = np.zeros((n, n))
    rhs = np.zeros((n, n))

    def third(i: int):
        # f''' on interval i is 6 (m_i + m_(i+1) - 2 delta_i) / h_i**2: (row over slopes, row over values)
        row = np.zeros(n)
        row[i] = row[i + 1] = 1.0
        return row / h[i] ** 2, 2.0 * delta[i] / h[i] ** 2

    for i in range(1, n - 1):  # C2 at knot i
        a[i, i - 1], a[i, i], a[i, i + 1] = h[i], 2.0 * (h[i - 1] + h[i]), h[i - 1]
        rhs[i] = 3.0 * (h[i] * delta[i - 1] + h[i - 1] * delta[i])
    if n == 3:  # a parabola: no third derivative on either interval
        (a[0], rhs[0]), (a[2], rhs[2]) = third(0), third(1)
    else:
        (r0, v0), (r1, v1) = third(0), third(1)
        a[0], rhs[0] = r0 - r1, v0 - v1
        (r0, v0), (r1, v1) = third(n - 3), third(n - 2)
        a[n - 1], rhs[n - 1] = r0 - r1, v0 - v1
    return np.linalg.solve(a, rhs)


def not_a_knot_basis(knots_m, s_m, *, derivative: int = 0) -> np.ndarray:
    """Basis of the "not-a-knot" cubic spline through the knots, evaluated at ``s_m``.

    Row r, column j: the value (``derivative=1``: the slope) at ``s_m[r]`` of
    the spline through 1 at knot j and 0 at the others, so the spline through
    values F is ``basis @ F``. The spline of
    ``scipy.interpolate.CubicSpline(knots, F, bc_type="not-a-knot")`` (the
    tests compare them); points outside the knots use the end pieces.

    Parameters
    ----------
    knots_m : array_like, shape (n,)
        Increasing, n >= 2, m.
    s_m : array_like, shape (M,)
        m.
    derivative : {0, 1}

    Returns
    -------
    ndarray of float64, shape (M, n)
        New; slopes in 1/m.
    """
    knots = np.asarray(knots_m, dtype=np.float64)
    s = np.asarray(s_m, dtype=np.float64).reshape(-1)
    slopes = _knot_slopes(knots)
    i = np.clip(np.searchsorted(knots, s, side="right") - 1, 0, knots.size - 2)
    h = (knots[i + 1] - knots[i])[:, None]
    t = (s - knots[i])[:, None] / h
    eye = np.eye(knots.size)
    y0, y1, m0, m1 = eye[i], eye[i + 1], slopes[i], slopes[i + 1]
    if derivative == 0:  # cubic Hermite form
        return ((1 + 2 * t) * (1 - t) ** 2 * y0 + t * (1 - t) ** 2 * h * m0
                + t * t * (3 - 2 * t) * y1 - t * t * (1 - t) * h * m1)
    if derivative == 1:
        return 6 * t * (t - 1) / h * (y0 - y1) + (1 - t) * (1 - 3 * t) * m0 + t * (3 * t - 2) * m1
    raise ValueError("derivative must be 0 or 1")


def body_outline(xy: np.ndarray, *, thickness_above_m: float, thickness_below_m: float) -> np.ndarray:
    """Closed outline of the body around the sensor curve, for drawing.

    Offsets the curve along its normal: ``thickness_above_m`` to the left of
    the direction of travel (the +y side at the base, the side positive
    curvature turns toward), ``thickness_below_m`` to the right. Where the
    curvature radius is below a thickness the inner offset folds over itself;
    that is how an offset curve behaves and is left to the drawing.

    Parameters
    ----------
    xy : array_like, shape (N, P, 2)
        Shape points, m.
    thickness_above_m, thickness_below_m : float
        m, >= 0.

    Returns
    -------
    ndarray of float64, shape (N, 2P + 1, 2)
        Upper edge base to tip, lower edge tip to base, then the first point
        again (closed).
    """
    xy = np.asarray(xy, dtype=np.float64)
    if xy.ndim != 3 or xy.shape[2] != 2 or xy.shape[1] < 2:
        raise ValueError(f"expected shape (N, P >= 2, 2), got {xy.shape}")
    tangent = np.gradient(xy, axis=1)
    norm = np.hypot(tangent[..., 0], tangent[..., 1])[..., None]
    with np.errstate(invalid="ignore", divide="ignore"):
        tangent = tangent / norm
    normal = np.stack([-tangent[..., 1], tangent[..., 0]], axis=-1)
    upper = xy + thickness_above_m * normal
    lower = xy - thickness_below_m * normal
    return np.concatenate([upper, lower[:, ::-1], upper[:, :1]], axis=1)
