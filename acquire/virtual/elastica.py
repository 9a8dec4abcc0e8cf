"""Planar elastica of the finger: a cantilever under a uniform actuation moment and a tip force.

Euler-Bernoulli bending, large deflection, inextensible, clamped at s = 0
heading +x, bending stiffness EI (the same in every segment: the per-segment
form ``EI_k (kappa - M_a / EI_k) = (r_F - r(s)) x F`` with equal ``EI_k``).
The bending moment at s is ``EI kappa(s) = M_a + (r_F - r(s)) x F`` where r_F
is the point of contact: the end of the sensor plus a rigid tip of
``load_lever_m`` along the sensor's end heading. Differentiating gives
``theta'' = -(P/EI) sin(phi - theta)`` with theta(0) = 0 and
``theta'(L) = M_a/EI + (P/EI) lever sin(phi - theta(L))``.
The boundary value problem is solved by vectorised shooting (RK4 plus Newton
with the variational equation); :func:`elastica_tables` solves a grid over
(M_a, P) once per parameter set (cached) for per-frame interpolation.

Threads: pure, any thread; returned arrays are new and owned by the caller
(the cached tables are read-only and shared).
"""
from __future__ import annotations

import dataclasses
import functools
import math
from dataclasses import dataclass

import numpy as np

from acquire.virtual.table_cache import load_tables, store_tables

__all__ = ["ElasticaSolution", "solve_elastica", "ElasticaTables", "elastica_tables", "node_grid",
           "bilinear", "arc_xy", "simpson_mean"]


@dataclass(frozen=True)
class ElasticaSolution:
    """Equilibrium shapes of the cantilever, one per load case.

    Arrays are new and owned by the caller.

    Attributes
    ----------
    s_m : ndarray, shape (P,)
        Arc length of the nodes, 0 first, ``length_m`` last.
    theta_rad, kappa_per_m : ndarray, shape (K, P)
        Heading and curvature at the nodes.
    xy_m : ndarray, shape (K, P, 2)
        Node positions in the base frame.
    converged : ndarray of bool, shape (K,)
    """

    s_m: np.ndarray
    theta_rad: np.ndarray
    kappa_per_m: np.ndarray
    xy_m: np.ndarray
    converged: np.ndarray


def _rk4_pass(h, m_bar, p_bar, phi, lever_bar, k0, *, keep_nodes: bool):
    """Integrate theta'' = -p sin(phi - theta) from s = 0 over steps ``h``.

    Non-dimensional (s/L); all arrays of shape (K,). Carries the variational
    state (dtheta/dk0, dtheta'/dk0) for Newton, and x, y when ``keep_nodes``.
    """
    u = np.zeros_like(k0)
    v = k0.copy()
    z = np.zeros_like(k0)
    w = np.ones_like(k0)
    x = np.zeros_like(k0)
    y = np.zeros_like(k0)
    nodes = None
    if keep_nodes:
        nodes = np.empty((4, h.shape[0] + 1, k0.shape[0]))
        nodes[:, 0] = (u, v, x, y)
    for i, hi in enumerate(h.tolist()):
        # stage 1
        a1 = phi - u
        su1, cu1 = np.sin(a1), np.cos(a1)
        du1, dv1 = v, -p_bar * su1
        dz1, dw1 = w, p_bar * cu1 * z
        # stage 2
        u2 = u + 0.5 * hi * du1
        v2 = v + 0.5 * hi * dv1
        z2 = z + 0.5 * hi * dz1
        w2 = w + 0.5 * hi * dw1
        a2 = phi - u2
        su2, cu2 = np.sin(a2), np.cos(a2)
        dv2 = -p_bar * su2
        dw2 = p_bar * cu2 * z2
        # stage 3
        u3 = u + 0.5 * hi * v2
        v3 = v + 0.5 * hi * dv2
        z3 = z + 0.5 * hi * w2
        w3 = w + 0.5 * hi * dw2
        a3 = phi - u3
        su3, cu3 = np.sin(a3), np.cos(a3)
        dv3 = -p_bar * su3
        dw3 = p_bar * cu3 * z3
        # stage 4
        u4 = u + hi * v3
        v4 = v + hi * dv3
        z4 = z + hi * w3
        w4 = w + hi * dw3
        a4 = phi - u4
        su4, cu4 = np.sin(a4), np.cos(a4)
        dv4 = -p_bar * su4
        dw4 = p_bar * cu4 * z4
        if keep_nodes:
            # x' = cos(theta) = cos(phi - a), y' = sin(theta)
            cp, sp = math.cos(phi), math.sin(phi)
            c1, c2, c3, c4 = (cp * cu + sp * su for cu, su in ((cu1, su1), (cu2, su2), (cu3, su3), (cu4, su4)))
            s1, s2, s3, s4 = (sp * cu - cp * su for cu, su in ((cu1, su1), (cu2, su2), (cu3, su3), (cu4, su4)))
            x = x + hi / 6.0 * (c1 + 2 * c2 + 2 * c3 + c4)
            y = y + hi / 6.0 * (s1 + 2 * s2 + 2 * s3 + s4)
        u = u + hi / 6.0 * (du1 + 2 * v2 + 2 * v3 + v4)
        v = v + hi / 6.0 * (dv1 + 2 * dv2 + 2 * dv3 + dv4)
        z = z + hi / 6.0 * (dz1 + 2 * w2 + 2 * w3 + w4)
        w = w + hi / 6.0 * (dw1 + 2 * dw2 + 2 * dw3 + dw4)
        if keep_nodes:
            nodes[:, i + 1] = (u, v, x, y)
    a = phi - u
    residual = v - m_bar - p_bar * lever_bar * np.sin(a)
    slope = w + p_bar * lever_bar * np.cos(a) * z
    return residual, slope, nodes


def _newton(h, m_bar, p_bar, phi, lever_bar, k0, *, tol=1e-11, max_iter=40):
    k0 = np.array(k0, dtype=np.float64, copy=True)
    done = np.zeros(k0.shape, dtype=bool)
    for _ in range(max_iter):
        residual, slope, _ = _rk4_pass(h, m_bar, p_bar, phi, lever_bar, k0, keep_nodes=False)
        done = np.abs(residual) < tol
        if done.all():
            break
        safe = np.where(np.abs(slope) > 1e-12, slope, 1e-12)
        # damped: a step of more than half a radian of root curvature (per L) is cut
        step = np.clip(residual / safe, -0.5, 0.5)
        k0 = k0 - np.where(done, 0.0, step)
    return k0, done


def node_grid(segment_lengths_m: np.ndarray, *, steps_total: int = 96) -> tuple[np.ndarray, np.ndarray]:
    """Node arc lengths (taps included) and the node index of each tap.

    Each segment gets an even number of steps (Simpson), about proportional to
    its length.
    """
    seg = np.asarray(segment_lengths_m, dtype=np.float64)
    length = seg.sum()
    n_sub = np.maximum(2, 2 * np.ceil(steps_total * seg / length / 2.0)).astype(int)
    s = [0.0]
    tap_nodes = [0]
    start = 0.0
    for lk, nk in zip(seg.tolist(), n_sub.tolist()):
        s.extend((start + lk * np.arange(1, nk + 1) / nk).tolist())
        start += lk
        tap_nodes.append(len(s) - 1)
    s_arr = np.asarray(s)
    s_arr[-1] = length
    return s_arr, np.asarray(tap_nodes)


def solve_elastica(
    *,
    length_m: float,
    bending_stiffness_nm2: float,
    moment_nm,
    load_n,
    load_angle_rad: float = -math.pi / 2,
    load_lever_m: float = 0.0,
    s_m: np.ndarray | None = None,
    initial_kappa0_per_m=None,
) -> ElasticaSolution:
    """Solve the cantilever elastica for K load cases at once.

    Parameters
    ----------
    length_m : float
        Flexible length (the sensor).
    bending_stiffness_nm2 : float
        EI in N m^2.
    moment_nm, load_n : array-like, shape (K,) or scalar
        Uniform actuation moment (N m, positive turns toward +y) and tip force
        size (N, along ``load_angle_rad`` from +x).
    load_lever_m : float
        Rigid tip beyond the sensor's end at which the force acts (0: at the end).
    s_m : array, optional
        Node arc lengths, 0 first, ``length_m`` last (default: 97 even nodes).
    initial_kappa0_per_m : array-like, optional
        Starting guess of the root curvature (continuation).

    Runs in the caller's thread. Pure.
    """
    ei = float(bending_stiffness_nm2)
    length = float(length_m)
    m_arr, p_arr = np.broadcast_arrays(np.atleast_1d(np.asarray(moment_nm, dtype=np.float64)),
                                       np.atleast_1d(np.asarray(load_n, dtype=np.float64)))
    m_bar = m_arr * length / ei
    p_bar = p_arr * length**2 / ei
    if s_m is None:
        s_m = np.linspace(0.0, length, 97)
    s_m = np.asarray(s_m, dtype=np.float64)
    h = np.diff(s_m) / length
    lever_bar = float(load_lever_m) / length
    phi = float(load_angle_rad)
    if initial_kappa0_per_m is None:
        # small-deflection guess: theta' = m + p (lever + 1 - s) sin(phi)
        k0 = m_bar + p_bar * (lever_bar + 1.0) * math.sin(phi)
    else:
        k0 = np.broadcast_to(np.asarray(initial_kappa0_per_m, dtype=np.float64) * length, m_bar.shape)
    k0, ok = _newton(h, m_bar, p_bar, phi, lever_bar, k0)
    _, _, nodes = _rk4_pass(h, m_bar, p_bar, phi, lever_bar, k0, keep_nodes=True)
    theta = nodes[0].T.copy()
    kappa = nodes[1].T / length
    xy = np.stack([nodes[2].T, nodes[3].T], axis=-1) * length
    return ElasticaSolution(s_m=s_m.copy(), theta_rad=theta, kappa_per_m=kappa, xy_m=xy, converged=ok)


@dataclass(frozen=True)
class ElasticaTables:
    """Elastica over the (moment, load) grid, reduced to what frames need.

    Row r = i * n_load + j is grid point (moment_grid[i], load_grid[j]).
    """

    moment_grid: np.ndarray  # (nm,)
    load_grid: np.ndarray  # (np,)
    s_m: np.ndarray  # (P,)
    tap_nodes: np.ndarray  # (S+1,)
    theta_taps: np.ndarray  # (nm*np, S+1)
    xy_nodes: np.ndarray  # (nm*np, P*2)
    basis: np.ndarray  # (4, nm*np, S): segment means of k+, k+^2, k-, k-^2


@functools.lru_cache(maxsize=8)
def elastica_tables(
    segment_lengths_m: tuple, ei: float, phi: float, lever_m: float,
    moment_lo: float, moment_hi: float, n_moment: int, load_hi: float, n_load: int,
) -> ElasticaTables:
    """Solve the grid once per parameter set (continuation in load).

    A moment range that spans zero must put a node on it (e.g. a symmetric
    range and an odd ``n_moment``): the relaxed finger (no moment, no load)
    then reads exactly straight instead of an interpolation between two bent
    neighbours. Raises ValueError otherwise.

    Solving takes one to a few seconds, so the tables are also kept on disk
    (:mod:`acquire.virtual.table_cache`, keyed by the parameters and this
    module's code): the next process that starts a virtual finger loads them.
    """
    params = (tuple(float(v) for v in segment_lengths_m), float(ei), float(phi), float(lever_m),
              float(moment_lo), float(moment_hi), int(n_moment), float(load_hi), int(n_load))
    arrays = load_tables(params, _CODE_FILE)
    if arrays is not None and set(arrays) != {f.name for f in dataclasses.fields(ElasticaTables)}:
        arrays = None  # written by another layout of the tables: solve again
    out = ElasticaTables(**arrays) if arrays is not None else _solve_tables(*params)
    if arrays is None:
        store_tables(params, _CODE_FILE, dataclasses.asdict(out))
    for arr in (out.moment_grid, out.load_grid, out.s_m, out.tap_nodes, out.theta_taps, out.xy_nodes, out.basis):
        arr.setflags(write=False)  # shared between models through the cache
    return out


_CODE_FILE = __file__


def _solve_tables(segment_lengths_m, ei, phi, lever_m, moment_lo, moment_hi, n_moment, load_hi, n_load):
    seg = np.asarray(segment_lengths_m)
    length = float(seg.sum())
    s_m, tap_nodes = node_grid(seg)
    moment_grid = np.linspace(moment_lo, moment_hi, n_moment)
    if moment_lo < 0.0 < moment_hi:
        step = (moment_hi - moment_lo) / (n_moment - 1)
        zero = -moment_lo / step
        if abs(zero - round(zero)) > 1e-9:
            raise ValueError(f"moment grid {moment_lo:g} .. {moment_hi:g} N m in {n_moment} nodes has no node at 0")
        moment_grid[int(round(zero))] = 0.0  # exactly, not to rounding
    load_grid = np.linspace(0.0, load_hi, n_load)
    theta = np.empty((n_moment, n_load, s_m.shape[0]))
    kappa = np.empty_like(theta)
    xy = np.empty((n_moment, n_load, s_m.shape[0], 2))
    # load columns in order from 0, guessing each from the previous two, so
    # every point sits on the branch reached by loading the closed finger
    prev = [moment_grid / ei, None]
    for j, load in enumerate(load_grid.tolist()):
        if j >= 2:
            guess = 2.0 * prev[0] - prev[1]
        else:
            guess = prev[0]
        sol = _continue_in_load(length, ei, moment_grid, load_grid[j - 1] if j else 0.0, load,
                                phi, lever_m, s_m, prev[0], guess)
        theta[:, j] = sol.theta_rad
        kappa[:, j] = sol.kappa_per_m
        xy[:, j] = sol.xy_m
        prev = [sol.kappa_per_m[:, 0], prev[0]]
    rows = n_moment * n_load
    theta = theta.reshape(rows, -1)
    kappa = kappa.reshape(rows, -1)
    basis = np.empty((4, rows, seg.shape[0]))
    kp = np.maximum(kappa, 0.0)
    kn = np.minimum(kappa, 0.0)
    for b, f in enumerate((kp, kp * kp, kn, kn * kn)):
        for k in range(seg.shape[0]):
            a, e = tap_nodes[k], tap_nodes[k + 1]
            basis[b, :, k] = simpson_mean(f[:, a : e + 1], s_m[a : e + 1])
    return ElasticaTables(
        moment_grid=moment_grid, load_grid=load_grid, s_m=s_m, tap_nodes=tap_nodes,
        theta_taps=np.ascontiguousarray(theta[:, tap_nodes]),
        xy_nodes=np.ascontiguousarray(xy.reshape(rows, -1)),
        basis=basis,
    )


def _continue_in_load(length, ei, moments, load_from, load_to, phi, lever_m, s_m, k_from, guess):
    """Solve at ``load_to``; points that fail from ``guess`` are walked there
    from ``load_from`` (root curvature ``k_from``) in smaller load steps."""
    sol = solve_elastica(
        length_m=length, bending_stiffness_nm2=ei, moment_nm=moments, load_n=load_to,
        load_angle_rad=phi, load_lever_m=lever_m, s_m=s_m, initial_kappa0_per_m=guess,
    )
    bad = ~sol.converged
    for n_sub in (4, 16, 64):
        if not bad.any():
            break
        k = np.asarray(k_from, dtype=np.float64)[bad]
        ok = np.ones(k.shape, dtype=bool)
        part = None
        for load in np.linspace(load_from, load_to, n_sub + 1)[1:].tolist():
            part = solve_elastica(
                length_m=length, bending_stiffness_nm2=ei, moment_nm=moments[bad], load_n=load,
                load_angle_rad=phi, load_lever_m=lever_m, s_m=s_m, initial_kappa0_per_m=k,
            )
            ok &= part.converged
            k = part.kappa_per_m[:, 0]
        if ok.all():
            for arr, new in ((sol.theta_rad, part.theta_rad), (sol.kappa_per_m, part.kappa_per_m), (sol.xy_m, part.xy_m)):
                arr[bad] = new
            sol.converged[bad] = True
            bad[:] = False
    return sol


def simpson_mean(f: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Mean of f over s (even number of equal steps along the last axis), Simpson's rule."""
    n = s.shape[0] - 1
    hstep = (s[-1] - s[0]) / n
    w = np.ones(n + 1)
    w[1:-1:2] = 4.0
    w[2:-1:2] = 2.0
    return (f @ w) * hstep / 3.0 / (s[-1] - s[0])


def bilinear(x: np.ndarray, grid: np.ndarray):
    """Cell index and weight of x on an even grid (clipped to the grid)."""
    n = grid.shape[0]
    pos = (np.clip(x, grid[0], grid[-1]) - grid[0]) / (grid[1] - grid[0])
    i = np.minimum(pos.astype(np.int64), n - 2)
    return i, pos - i




def arc_xy(kappa, s):
    """Point at arc length s on a circle of curvature kappa from (0,0) heading +x."""
    kappa = np.asarray(kappa, dtype=np.float64)
    s = np.asarray(s, dtype=np.float64)
    ks = kappa * s
    small = np.abs(ks) < 1e-6
    safe = np.where(small, 1.0, kappa)
    x = np.where(small, s * (1 - ks * ks / 6.0), np.sin(ks) / safe)
    y = np.where(small, s * ks / 2.0, (1.0 - np.cos(ks)) / safe)
    return np.stack(np.broadcast_arrays(x, y), axis=-1)
