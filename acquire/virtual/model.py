"""The virtual finger's physics: mechanics, time courses and readout electrics.

Demo scenario, made up for the demo: one finger of a greenhouse tomato-picking
gripper. A soft bending actuator closes the finger around a fruit; the fruit
pushes back on the fingertip.

Mechanics
    A planar elastica (Euler-Bernoulli bending, large deflection, inextensible)
    of a cantilever clamped at s = 0 heading +x, bending stiffness EI, loaded by
    a uniform actuation moment M_a (a pressurised bending actuator adds M_a/EI
    curvature everywhere) and a tip force of size P in a fixed direction in
    space. The bending moment at s is ``EI kappa(s) = M_a + (r_F - r(s)) x F``
    where r_F is the point of contact: the end of the sensor plus a rigid tip
    of ``load_lever_m`` along the sensor's end heading. Differentiating gives
    ``theta'' = -(P/EI) sin(phi - theta)`` with theta(0) = 0 and
    ``theta'(L) = M_a/EI + (P/EI) lever sin(phi - theta(L))``.
    The boundary value problem is solved by vectorised shooting (RK4 plus
    Newton with the variational equation) on a grid over (M_a, P) once per
    parameter set (cached), then interpolated per frame.

Electrics
    Each segment's resistance rises with local curvature (weaker and saturating
    for the opposite bend), with a seeded spread of flat resistance and gain
    per segment; the local response is integrated over the segment. Then the
    ratiometric divider of CONTRACTS.md section 2, ADC quantisation and noise.

Everything is a pure function of device time (and of the frame index for
noise): the same frames come out for any chunking.
"""
from __future__ import annotations

import functools
import math
import threading
from dataclasses import dataclass, fields

import numpy as np

from acquire.core.labels import parse_hold_label
from acquire.errors import UserError
from acquire.rig import Rig, load_rig

__all__ = [
    "FingerModel",
    "Faults",
    "ElasticaSolution",
    "solve_elastica",
    "parse_hold_label",
    "SCENARIOS",
]

#: time courses the model can play
SCENARIOS = ("grasp", "sweep")

_TWO_PI = 2.0 * math.pi


# --------------------------------------------------------------------------- labels


# The jig label grammar is defined once, in acquire.core.labels; parse_hold_label
# is re-exported here for code that imports it from this module.


# --------------------------------------------------------------------------- faults


@dataclass(frozen=True)
class Faults:
    """Wiring and link faults the virtual finger can show.

    Attributes
    ----------
    open_tap : int or None
        The wire from tap k to its ADC input is broken: that input floats
        (drifts and picks up mains and noise near a seeded level).
    short_taps : (int, int) or None
        Taps a < b shorted together (b may be S, the grounded end): segments
        a .. b-1 read 0 ohm.
    noisy_channel : int or None
        Channel with large extra noise (``noisy_lsb`` RMS).
    stuck_channel : int or None
        Channel whose code never changes.
    corrupt_rate : float
        Fraction of sample packets with flipped bytes on the wire.
    drop_rate : float
        Fraction of sample packets never sent (gaps in seq).
    vanish_every_s : float or None
        The port disappears this often (wall-clock s after each return).
    outage_s : float
        How long the port stays away (wall-clock s).
    noisy_lsb : float
        RMS of the noisy channel's extra noise, in LSB.
    """

    open_tap: int | None = None
    short_taps: tuple[int, int] | None = None
    noisy_channel: int | None = None
    stuck_channel: int | None = None
    corrupt_rate: float = 0.0
    drop_rate: float = 0.0
    vanish_every_s: float | None = None
    outage_s: float = 1.0
    noisy_lsb: float = 40.0

    def check(self, rig: Rig, *, names: dict | None = None) -> None:
        """Raise :class:`UserError` if a fault does not fit ``rig``.

        ``names`` maps field names to how the message names them (the command
        line passes its option names); the field name is used otherwise.
        """
        names = names or {}

        def fail(key: str, value, why: str) -> None:
            raise UserError(f"{names.get(key, 'faults.' + key)} {value}: {why}")

        s = rig.n_segments
        c = rig.n_channels
        if self.open_tap is not None and not 0 <= int(self.open_tap) < s:
            fail("open_tap", self.open_tap, f"the rig's measured taps are 0..{s - 1}")
        if self.short_taps is not None:
            a, b = (int(v) for v in self.short_taps)
            if not 0 <= a < b <= s:
                fail("short_taps", f"{a},{b}", f"need 0 <= A < B <= {s} (tap {s} is ground)")
        for key in ("noisy_channel", "stuck_channel"):
            value = getattr(self, key)
            if value is not None and not 0 <= int(value) < c:
                fail(key, value, f"the rig's channels are 0..{c - 1}")
        for key in ("corrupt_rate", "drop_rate"):
            value = float(getattr(self, key))
            if not 0.0 <= value < 1.0:
                fail(key, value, "must be a fraction, 0 <= p < 1")
        if self.vanish_every_s is not None and not float(self.vanish_every_s) > 0:
            fail("vanish_every_s", self.vanish_every_s, "must be positive seconds")
        if not float(self.outage_s) >= 0 or not math.isfinite(float(self.outage_s)):
            fail("outage_s", self.outage_s, "must be zero or positive seconds")
        if not float(self.noisy_lsb) >= 0:
            fail("noisy_lsb", self.noisy_lsb, "must not be negative")

    def as_dict(self) -> dict:
        """Plain values, for a hello or an HDF5 attribute."""
        out = {}
        for f in fields(self):
            v = getattr(self, f.name)
            out[f.name] = list(v) if isinstance(v, tuple) else v
        return out


# --------------------------------------------------------------------------- elastica


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


def _node_grid(segment_lengths_m: np.ndarray, *, steps_total: int = 96) -> tuple[np.ndarray, np.ndarray]:
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
class _Tables:
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
def _elastica_tables(
    segment_lengths_m: tuple, ei: float, phi: float, lever_m: float,
    moment_lo: float, moment_hi: float, n_moment: int, load_hi: float, n_load: int,
) -> _Tables:
    """Solve the grid once per parameter set (continuation in load)."""
    seg = np.asarray(segment_lengths_m)
    length = float(seg.sum())
    s_m, tap_nodes = _node_grid(seg)
    moment_grid = np.linspace(moment_lo, moment_hi, n_moment)
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
            basis[b, :, k] = _simpson_mean(f[:, a : e + 1], s_m[a : e + 1])
    out = _Tables(
        moment_grid=moment_grid, load_grid=load_grid, s_m=s_m, tap_nodes=tap_nodes,
        theta_taps=np.ascontiguousarray(theta[:, tap_nodes]),
        xy_nodes=np.ascontiguousarray(xy.reshape(rows, -1)),
        basis=basis,
    )
    for arr in (out.moment_grid, out.load_grid, out.s_m, out.tap_nodes, out.theta_taps, out.xy_nodes, out.basis):
        arr.setflags(write=False)  # shared between models through the cache
    return out


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


def _simpson_mean(f: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Mean of f over s (even number of equal steps along the last axis)."""
    n = s.shape[0] - 1
    hstep = (s[-1] - s[0]) / n
    w = np.ones(n + 1)
    w[1:-1:2] = 4.0
    w[2:-1:2] = 2.0
    return (f @ w) * hstep / 3.0 / (s[-1] - s[0])


def _bilinear(x: np.ndarray, grid: np.ndarray):
    """Cell index and weight of x on an even grid (clipped to the grid)."""
    n = grid.shape[0]
    pos = (np.clip(x, grid[0], grid[-1]) - grid[0]) / (grid[1] - grid[0])
    i = np.minimum(pos.astype(np.int64), n - 2)
    return i, pos - i


# --------------------------------------------------------------------------- noise


_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLD = np.uint64(0x9E3779B97F4A7C15)


def _mix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser (Steele, Lea & Flood, 'Fast splittable pseudorandom
    number generators', OOPSLA 2014) on uint64 arrays: counter -> random bits."""
    z = x + _GOLD
    z = (z ^ (z >> np.uint64(30))) * _M1
    z = (z ^ (z >> np.uint64(27))) * _M2
    return z ^ (z >> np.uint64(31))


def _normals(key: int, frame_index: np.ndarray, n_cols: int) -> np.ndarray:
    """Standard normal deviates, shape (N, n_cols), a pure function of
    (key, frame index, column): any chunking of frames gives the same values."""
    fi = np.asarray(frame_index, dtype=np.int64).astype(np.uint64)
    ctr = fi[:, None] * np.uint64(n_cols) + np.arange(n_cols, dtype=np.uint64)[None, :]
    bits = _mix64(ctr ^ np.uint64(key & 0xFFFFFFFFFFFFFFFF))
    u1 = ((bits >> np.uint64(40)).astype(np.float64) + 0.5) * (1.0 / (1 << 24))
    u2 = (bits & np.uint64(0xFFFFFF)).astype(np.float64) * (1.0 / (1 << 24))
    # Box-Muller (Box & Muller, Ann. Math. Statist. 1958)
    return np.sqrt(-2.0 * np.log(u1)) * np.cos(_TWO_PI * u2)


def _key(*parts: int) -> int:
    ss = np.random.SeedSequence([int(p) & 0xFFFFFFFF for p in parts])
    return int(ss.generate_state(1, dtype=np.uint64)[0])


# --------------------------------------------------------------------------- time courses


def _smooth(x: np.ndarray) -> np.ndarray:
    """0 -> 1 step with zero first and second derivative at both ends."""
    x = np.clip(x, 0.0, 1.0)
    return x * x * x * (x * (6.0 * x - 15.0) + 10.0)


class _GraspCycles:
    """Seeded grasp cycles: rest open, close, load on the fruit, hold, unload, open.

    Cycle i's values come from its own seeded generator, so any cycle can be
    made without the ones before; start times are extended lazily (locked:
    the device thread and test threads evaluate concurrently).
    """

    _FIELDS = ("t_rest", "d_close", "t_settle", "d_ramp", "t_hold", "d_unload", "d_open",
               "k_open", "k_close", "load", "trem_hz", "trem_phase")

    def __init__(self, seed: int, run: int):
        self._seed = int(seed)
        self._run = int(run)
        self._lock = threading.Lock()
        self._cols = {f: np.zeros(0) for f in self._FIELDS}
        self._start = np.zeros(0)
        self._end = 0.0
        self._extend(64)

    def _cycle(self, i: int) -> list:
        rng = np.random.default_rng([self._seed, self._run, i, 0x6A5D])
        u = rng.uniform
        return [
            u(0.8, 1.6), u(0.45, 0.8), u(0.05, 0.25), u(0.3, 0.6), u(1.0, 2.5), u(0.2, 0.4), u(0.5, 0.8),
            u(-0.6, -0.25), u(1.55, 2.7), u(0.2, 0.55), u(5.0, 9.0), u(0.0, _TWO_PI),
        ]

    def _extend(self, n_more: int) -> None:
        n0 = self._start.shape[0]
        rows = np.array([self._cycle(i) for i in range(n0, n0 + n_more)])
        for k, f in enumerate(self._FIELDS):
            self._cols[f] = np.concatenate([self._cols[f], rows[:, k]])
        dur = rows[:, :7].sum(axis=1)
        starts = self._end + np.concatenate([[0.0], np.cumsum(dur)[:-1]])
        self._start = np.concatenate([self._start, starts])
        self._end = float(starts[-1] + dur[-1])

    def evaluate(self, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Bend angle (rad, pure-moment equivalent over the sensor) and load
        (fraction of the model's largest load) at times ``t_s``."""
        t = np.asarray(t_s, dtype=np.float64)
        with self._lock:
            t_max = float(t.max()) if t.size else 0.0
            # the cycle after t_max must exist too: its open level ends this one
            while self._start[-1] <= t_max:
                self._extend(max(64, self._start.shape[0]))
            starts = self._start
            cols = self._cols
        i = np.clip(np.searchsorted(starts, t, side="right") - 1, 0, None)
        tau = t - starts[i]
        g = {f: cols[f][i] for f in self._FIELDS}
        k_next = cols["k_open"][i + 1]
        a_close = g["t_rest"]
        a_ramp = a_close + g["d_close"] + g["t_settle"]
        a_unload = a_ramp + g["d_ramp"] + g["t_hold"]
        a_open = a_unload + g["d_unload"]
        s_close = _smooth((tau - a_close) / g["d_close"])
        s_open = _smooth((tau - a_open) / g["d_open"])
        angle = g["k_open"] + (g["k_close"] - g["k_open"]) * s_close - (g["k_close"] - k_next) * s_open
        # a small pump ripple on the actuation, a little tremble in the contact
        angle = angle * (1.0 + 0.004 * np.sin(_TWO_PI * 11.0 * t))
        on = _smooth((tau - a_ramp) / g["d_ramp"]) - _smooth((tau - a_unload) / g["d_unload"])
        load = g["load"] * on * (1.0 + 0.05 * np.sin(_TWO_PI * g["trem_hz"] * t + g["trem_phase"]))
        return angle, load


# --------------------------------------------------------------------------- the model


class FingerModel:
    """Deterministic virtual finger: time courses, mechanics, electrics, ADC.

    Parameters (keyword-only)
    -------------------------
    rig : Rig, optional
        Default: the built-in demo rig (``load_rig(None)``).
    seed : int
        Fixes the sensor's electrical spread, the grasp cycles and the noise.
    adc_bits : int
        ADC resolution (8..16).
    scenario : "grasp" or "sweep"
        Time course played when no hold is set.
    hold : str or None
        Jig label (``flat``, ``radius=25mm``, ``curvature=40/m``): the finger
        is pressed onto a jig of that uniform curvature, with a tiny wobble.
    faults : Faults, optional
        Electrical faults (open tap, shorted taps, noisy/stuck channel) act
        here; link faults are the device's.
    run : int
        Selects another realisation of the time course and noise with the same
        sensor (the device uses its boot counter).
    bending_stiffness_nm2 : float
        EI of the finger (default 3e-3 N m^2: a silicone finger about
        20 mm x 12 mm).
    load_angle_rad : float
        Direction of the tip force from +x (default -0.6 rad: the fruit pushes
        the closed fingertip back outward).
    load_lever_m : float, optional
        Rigid tip beyond the sensor at which the force acts (default: the
        rig's ``tip_length_m``).
    noise_lsb : float
        ADC noise, RMS in LSB.

    All methods are pure functions of their arguments, safe to call from any
    thread; returned arrays are new and owned by the caller.
    """

    def __init__(
        self,
        *,
        rig: Rig | None = None,
        seed: int = 0,
        adc_bits: int = 12,
        scenario: str = "grasp",
        hold: str | None = None,
        faults: Faults | None = None,
        run: int = 0,
        bending_stiffness_nm2: float = 3.0e-3,
        load_angle_rad: float = -0.6,
        load_lever_m: float | None = None,
        noise_lsb: float = 1.2,
    ):
        self.rig = rig if rig is not None else load_rig(None)
        if scenario not in SCENARIOS:
            raise UserError(f"scenario {scenario!r} is not known (known: {', '.join(SCENARIOS)})")
        adc_bits = int(adc_bits)
        if not 8 <= adc_bits <= 16:
            raise UserError(f"adc_bits {adc_bits}: must be 8..16")
        self.faults = faults if faults is not None else Faults()
        self.faults.check(self.rig)
        if not bending_stiffness_nm2 > 0:
            raise UserError(f"bending_stiffness_nm2 {bending_stiffness_nm2}: must be positive")
        self.seed = int(seed)
        self.run = int(run)
        self.adc_bits = adc_bits
        self.scenario = scenario
        self.bending_stiffness_nm2 = float(bending_stiffness_nm2)
        self.load_angle_rad = float(load_angle_rad)
        self.load_lever_m = float(self.rig.tip_length_m if load_lever_m is None else load_lever_m)
        self.noise_lsb = float(noise_lsb)
        self.hold = None
        self.hold_curvature_per_m = None
        if hold is not None:
            self.hold_curvature_per_m = parse_hold_label(hold)
            self.hold = str(hold).strip()

        seg = self.rig.segment_lengths_m
        ei = self.bending_stiffness_nm2
        length = self.rig.sensor_length_m
        #: bend angle over the sensor (rad) the moment grid covers, as M L / EI
        self.bend_range_rad = (-1.5, 4.8)
        #: largest tip load the grid covers, N (P L^2 / EI = 2: clear of the
        #: snap-through that a strongly curled finger meets under more load)
        self.load_max_n = 2.0 * ei / length**2
        self._tables = _elastica_tables(
            tuple(float(v) for v in seg), ei, self.load_angle_rad, self.load_lever_m,
            ei * self.bend_range_rad[0] / length, ei * self.bend_range_rad[1] / length, 64,
            self.load_max_n, 33,
        )
        self._setup_electrics()
        self._cycles = _GraspCycles(self.seed, self.run)
        self._noise_key = _key(self.seed, self.run, 0x4E015E)
        self._fault_key = _key(self.seed, self.run, 0xFA17)
        self._stuck_code = None
        if self.faults.stuck_channel is not None:
            clean = self._channel_volts(np.zeros(1))[0, int(self.faults.stuck_channel)]
            self._stuck_code = int(np.clip(round(clean * 2**adc_bits), 0, 2**adc_bits - 1))

    # ------------------------------------------------------------------ copies

    def with_hold(self, hold: str | None) -> "FingerModel":
        """The same finger with another jig label (or none); shares all tables."""
        new = object.__new__(FingerModel)
        new.__dict__.update(self.__dict__)
        new.hold = None
        new.hold_curvature_per_m = None
        if hold is not None:
            new.hold_curvature_per_m = parse_hold_label(hold)
            new.hold = str(hold).strip()
        return new

    def with_run(self, run: int) -> "FingerModel":
        """The same sensor, another realisation of time course and noise."""
        new = object.__new__(FingerModel)
        new.__dict__.update(self.__dict__)
        new.run = int(run)
        new._cycles = _GraspCycles(self.seed, new.run)
        new._noise_key = _key(self.seed, new.run, 0x4E015E)
        new._fault_key = _key(self.seed, new.run, 0xFA17)
        return new

    # ------------------------------------------------------------------ properties

    @property
    def n_segments(self) -> int:
        return self.rig.n_segments

    @property
    def n_channels(self) -> int:
        return self.rig.n_channels

    @property
    def s_m(self) -> np.ndarray:
        """Arc length of the fine shape grid, m (P,), taps included; a copy."""
        return self._tables.s_m.copy()

    @property
    def flat_ohm(self) -> np.ndarray:
        """Each segment's resistance when flat, ohm (S,); a copy."""
        return self._r0.copy()

    # ------------------------------------------------------------------ mechanics

    def inputs(self, t_s) -> tuple[np.ndarray, np.ndarray]:
        """Actuation moment (N m) and tip load (N) at device times ``t_s`` (s).

        In hold mode: the moment that would bend the free finger to the jig's
        curvature, and no tip load.
        """
        t = np.asarray(t_s, dtype=np.float64)
        ei = self.bending_stiffness_nm2
        if self.hold is not None:
            return ei * self._hold_kappa(t), np.zeros_like(t)
        per_angle = ei / self.rig.sensor_length_m  # moment per radian of pure-moment bend
        if self.scenario == "sweep":
            # bend -0.75 .. 3.85 rad every 4 s, load 0 .. 0.4 of the largest every 9.7 s
            angle = 1.55 + 2.3 * np.sin(_TWO_PI * t / 4.0 - math.pi / 2)
            load = 0.2 * (1.0 - np.cos(_TWO_PI * t / 9.7))
        else:
            angle, load = self._cycles.evaluate(t)
        return per_angle * angle, self.load_max_n * load

    def _hold_kappa(self, t: np.ndarray) -> np.ndarray:
        wobble = 0.02 * np.sin(_TWO_PI * 0.7 * t) + 0.01 * np.sin(_TWO_PI * 3.1 * t + 1.0)
        return self.hold_curvature_per_m + wobble

    def _grid_weights(self, moment: np.ndarray, load: np.ndarray):
        tb = self._tables
        i, fi = _bilinear(moment, tb.moment_grid)
        j, fj = _bilinear(load, tb.load_grid)
        n_load = tb.load_grid.shape[0]
        r00 = i * n_load + j
        return (r00, r00 + 1, r00 + n_load, r00 + n_load + 1), (
            (1 - fi) * (1 - fj), (1 - fi) * fj, fi * (1 - fj), fi * fj)

    @staticmethod
    def _interp(table: np.ndarray, rows, weights) -> np.ndarray:
        out = table[rows[0]] * weights[0][:, None]
        for r, w in zip(rows[1:], weights[1:]):
            out += table[r] * w[:, None]
        return out

    def truth(self, t_s) -> dict:
        """Ground truth at device times ``t_s`` (s), shape (N,).

        Returns
        -------
        dict
            ``t_device_s`` (N,); ``curvature_per_m`` (N, S): exact mean
            curvature of each segment (heading change over the segment / its
            length); ``tip_xy_m`` (N, 2): end of the sensor in the base frame;
            ``moment_nm`` (N,), ``load_n`` (N,).
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        seg = self.rig.segment_lengths_m
        if self.hold is not None:
            kappa = self._hold_kappa(t)
            curv = np.repeat(kappa[:, None], seg.shape[0], axis=1)
            tip = _arc_xy(kappa, self.rig.sensor_length_m)
            moment, load = self.inputs(t)
        else:
            moment, load = self.inputs(t)
            eq = self.equilibrium(moment_nm=moment, load_n=load)
            curv, tip = eq["curvature_per_m"], eq["tip_xy_m"]
        return {"t_device_s": t.copy(), "curvature_per_m": curv, "tip_xy_m": tip, "moment_nm": moment, "load_n": load}

    def equilibrium(self, *, moment_nm, load_n) -> dict:
        """Free finger's shape under given inputs, from the precomputed table.

        ``moment_nm`` and ``load_n`` broadcast to shape (N,); values outside
        the table (``bend_range_rad``, ``load_max_n``) are clipped to it.

        Returns
        -------
        dict
            ``curvature_per_m`` (N, S): mean curvature of each segment;
            ``tip_xy_m`` (N, 2): end of the sensor.
        """
        moment, load = np.broadcast_arrays(np.atleast_1d(np.asarray(moment_nm, dtype=np.float64)),
                                           np.atleast_1d(np.asarray(load_n, dtype=np.float64)))
        rows, w = self._grid_weights(moment, load)
        theta = self._interp(self._tables.theta_taps, rows, w)
        xy = self._tables.xy_nodes
        p = self._tables.s_m.shape[0]
        tip = self._interp(xy[:, 2 * (p - 1) :], rows, w)
        return {"curvature_per_m": np.diff(theta, axis=1) / self.rig.segment_lengths_m[None, :], "tip_xy_m": tip}

    def shape(self, t_s) -> tuple[np.ndarray, np.ndarray]:
        """Fine-grid shape of the sensor at device times ``t_s``.

        Returns
        -------
        s_m : ndarray (P,)
            Arc length of the points, 0 first, sensor length last.
        xy_m : ndarray (N, P, 2)
            Points in the base frame, m.
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        s = self._tables.s_m
        if self.hold is not None:
            kappa = self._hold_kappa(t)
            xy = _arc_xy(kappa[:, None], s[None, :])
        else:
            rows, w = self._grid_weights(*self.inputs(t))
            xy = self._interp(self._tables.xy_nodes, rows, w).reshape(t.shape[0], s.shape[0], 2)
        return s.copy(), xy

    def solve(self, moment_nm, load_n) -> ElasticaSolution:
        """Direct elastica solve (no table) for this finger, on the fine grid."""
        return solve_elastica(
            length_m=self.rig.sensor_length_m, bending_stiffness_nm2=self.bending_stiffness_nm2,
            moment_nm=moment_nm, load_n=load_n, load_angle_rad=self.load_angle_rad,
            load_lever_m=self.load_lever_m, s_m=self._tables.s_m,
        )

    # ------------------------------------------------------------------ electrics

    def _setup_electrics(self) -> None:
        rng = np.random.default_rng([self.seed, 0xE1EC])
        s = self.rig.n_segments
        lo, hi = self.rig.segment_ohm_range
        # flat resistance in the geometric middle of the healthy range, kept
        # far enough from its ends for the whole response (x0.55 .. x2.6)
        nominal = math.sqrt(lo * hi)
        if hi / lo > 2.6 / 0.55 * 1.15:
            nominal = min(max(nominal, lo / 0.55 * 1.07), hi / 2.6 / 1.07)
        self._r0 = nominal * (1.0 + rng.uniform(-0.05, 0.05, s))
        # fractional rise per 1/m of positive bend, its square term, and the
        # weaker, saturating response to the opposite bend
        self._gain = 0.02 * (1.0 + rng.uniform(-0.1, 0.1, s))
        self._beta_pos = 0.006 * (1.0 + rng.uniform(-0.2, 0.2, s))
        self._rho_neg = 0.35 * (1.0 + rng.uniform(-0.15, 0.15, s))
        self._beta_neg = 0.004 * (1.0 + rng.uniform(-0.2, 0.2, s))
        tb = self._tables
        coef = np.stack([self._gain, self._gain * self._beta_pos, self._gain * self._rho_neg,
                         self._gain * self._rho_neg * self._beta_neg])  # (4, S)
        self._dr_table = np.einsum("brs,bs->rs", tb.basis, coef)
        self._dr_table.setflags(write=False)
        rng_f = np.random.default_rng([self.seed, 0xF10A7])
        self._float_level = rng_f.uniform(0.3, 0.7)
        self._float_drift = rng_f.uniform(0.01, 0.04, 3)
        self._float_hz = rng_f.uniform(0.02, 0.3, 3)
        self._float_phase = rng_f.uniform(0.0, _TWO_PI, 3)
        self._tap_of_channel = {int(ch): k for k, ch in enumerate(self.rig.tap_channels.tolist())}

    def _response(self, kappa: np.ndarray) -> np.ndarray:
        """Fractional resistance change for a uniform curvature (N, S)."""
        kp = np.maximum(kappa, 0.0)
        kn = np.minimum(kappa, 0.0)
        return self._gain * (kp + self._beta_pos * kp * kp + self._rho_neg * (kn + self._beta_neg * kn * kn))

    def segment_ohm(self, t_s, *, with_faults: bool = True) -> np.ndarray:
        """Resistance of each segment at device times ``t_s``, ohm (N, S).

        With ``with_faults``, shorted segments read 0 ohm.
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        if self.hold is not None:
            dr = self._response(self._hold_kappa(t)[:, None])
        else:
            rows, w = self._grid_weights(*self.inputs(t))
            dr = self._interp(self._dr_table, rows, w)
        r = self._r0 * np.maximum(1.0 + dr, 0.05)
        if with_faults and self.faults.short_taps is not None:
            a, b = self.faults.short_taps
            r[:, int(a) : int(b)] = 0.0
        return r

    def tap_volts(self, t_s) -> np.ndarray:
        """Divider tap voltages v_k (k = 0 .. S-1) in units of V_ex, (N, S).

        r_ref into tap 0, segments in series, tap S grounded (CONTRACTS.md
        section 2). Wiring faults at the ADC inputs are not applied here.
        """
        r = self.segment_ohm(t_s)
        below = np.cumsum(r[:, ::-1], axis=1)[:, ::-1]  # resistance from tap k to ground
        return below / (self.rig.r_ref_ohm + below[:, :1])

    def _channel_volts(self, t: np.ndarray) -> np.ndarray:
        """Noise-free input of each channel, units of V_ex (N, C)."""
        n = t.shape[0]
        v = np.empty((n, self.rig.n_channels))
        v[:, self.rig.tap_channels] = self.tap_volts(t)
        others = [c for c in range(self.rig.n_channels) if c not in self._tap_of_channel]
        if others:
            moment, _ = self.inputs(t)
            full = self.bending_stiffness_nm2 * 3.85 / self.rig.sensor_length_m
            for c in others:
                if "pressure" in self.rig.channels[c].lower():
                    # actuation pressure, taken as proportional to the moment;
                    # 10 % of full scale at zero (vacuum below)
                    v[:, c] = np.clip(0.1 + 0.8 * moment / full, 0.01, 0.99)
                else:
                    v[:, c] = 0.5
        if self.faults.open_tap is not None:
            c = int(self.rig.tap_channels[int(self.faults.open_tap)])
            drift = sum(a * np.sin(_TWO_PI * f * t + p)
                        for a, f, p in zip(self._float_drift, self._float_hz, self._float_phase))
            mains = 0.012 * np.sin(_TWO_PI * 50.0 * t)
            v[:, c] = self._float_level + drift + mains
        return v

    def codes(self, t_s, *, frame_index) -> np.ndarray:
        """ADC codes at device times ``t_s``, uint16 (N, C).

        ``frame_index`` (N,) ints name the frames for the noise, which is a
        pure function of (seed, run, frame index, channel): the same frames give
        the same codes however they are chunked.
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        fi = np.atleast_1d(np.asarray(frame_index, dtype=np.int64))
        if fi.shape != t.shape:
            raise ValueError("frame_index and t_s must have the same shape")
        full = float(1 << self.adc_bits)
        c = self.rig.n_channels
        x = self._channel_volts(t) * full
        if self.noise_lsb > 0:
            x += self.noise_lsb * _normals(self._noise_key, fi, c)
        f = self.faults
        if f.open_tap is not None:
            ch = int(self.rig.tap_channels[int(f.open_tap)])
            x[:, ch] += 8.0 * _normals(self._fault_key, fi, 1)[:, 0]
        if f.noisy_channel is not None and f.noisy_lsb > 0:
            x[:, int(f.noisy_channel)] += f.noisy_lsb * _normals(self._fault_key ^ 0x5A5A, fi, 1)[:, 0]
        out = np.clip(np.rint(x), 0, full - 1).astype(np.uint16)
        if self._stuck_code is not None:
            out[:, int(f.stuck_channel)] = self._stuck_code
        return out


def _arc_xy(kappa, s):
    """Point at arc length s on a circle of curvature kappa from (0,0) heading +x."""
    kappa = np.asarray(kappa, dtype=np.float64)
    s = np.asarray(s, dtype=np.float64)
    ks = kappa * s
    small = np.abs(ks) < 1e-6
    safe = np.where(small, 1.0, kappa)
    x = np.where(small, s * (1 - ks * ks / 6.0), np.sin(ks) / safe)
    y = np.where(small, s * ks / 2.0, (1.0 - np.cos(ks)) / safe)
    return np.stack(np.broadcast_arrays(x, y), axis=-1)
