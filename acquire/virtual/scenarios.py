"""Time courses the virtual finger plays: seeded, random access, pure functions of device time.

All made up for the demo (one finger of a fictional greenhouse tomato-picking
gripper). Each course gives, per device time, the bend angle the actuation
alone would make (rad over the sensor: ``M_a L / EI``) and the tip load as a
fraction of the model's largest load; ``grasp-force`` gives the actuation
pressure (kPa) instead of the angle.

- ``grasp``: rest open, close, load on the fruit, hold, unload, open.
- ``sweep``: a fixed sine sweep of bend and load (for quick looks).
- ``free``: the finger moves freely through both bend directions to about
  the built-in calibration's range, with pauses of different lengths (for
  filming a calibration session).
- ``grasp-force``: pressure rises, the fingertip meets the fruit, the contact
  force grows with the pressure beyond contact, holds, releases. The force is
  a prescribed time course (not solved from a contact constraint); the shape
  is solved under pressure and force together.

Threads: the course objects extend their schedules lazily under a lock, so
the device thread and test threads may evaluate them concurrently.
"""
from __future__ import annotations

import math
import threading

import numpy as np

__all__ = ["SCENARIOS", "smooth_step", "GraspCycles", "FreeMotion", "GraspForce", "sweep"]

#: time courses the model can play
SCENARIOS = ("grasp", "sweep", "free", "grasp-force")

_TWO_PI = 2.0 * math.pi


def smooth_step(x: np.ndarray) -> np.ndarray:
    """0 -> 1 step with zero first and second derivative at both ends (quintic smoothstep)."""
    x = np.clip(x, 0.0, 1.0)
    return x * x * x * (x * (6.0 * x - 15.0) + 10.0)


class _Schedule:
    """Seeded rows of cycle parameters, extended lazily; row i comes from its own generator.

    Subclasses give ``_FIELDS``, ``_row(rng)`` and ``_duration(rows)`` (s per row).
    """

    _FIELDS: tuple = ()
    _TAG = 0

    def __init__(self, seed: int, run: int):
        self._seed = int(seed)
        self._run = int(run)
        self._lock = threading.Lock()
        self._cols = {f: np.zeros(0) for f in self._FIELDS}
        self._start = np.zeros(0)
        self._end = 0.0
        self._extend(64)

    def _row(self, rng) -> list:  # pragma: no cover - abstract
        raise NotImplementedError

    def _duration(self, rows: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _extend(self, n_more: int) -> None:
        n0 = self._start.shape[0]
        rows = np.array([self._row(np.random.default_rng([self._seed, self._run, i, self._TAG]))
                         for i in range(n0, n0 + n_more)])
        for k, f in enumerate(self._FIELDS):
            self._cols[f] = np.concatenate([self._cols[f], rows[:, k]])
        dur = self._duration(rows)
        starts = self._end + np.concatenate([[0.0], np.cumsum(dur)[:-1]])
        self._start = np.concatenate([self._start, starts])
        self._end = float(starts[-1] + dur[-1])

    def _lookup(self, t: np.ndarray, names, next_names=()):
        """Time into the row, the row's values of ``names`` and the next row's of ``next_names`` (dicts)."""
        with self._lock:
            t_max = float(t.max()) if t.size else 0.0
            # the row after t_max must exist too: its start level ends this one
            while self._start[-1] <= t_max:
                self._extend(max(64, self._start.shape[0]))
            starts, cols = self._start, self._cols
        i = np.clip(np.searchsorted(starts, t, side="right") - 1, 0, None)
        return t - starts[i], {f: cols[f][i] for f in names}, {f: cols[f][i + 1] for f in next_names}


class GraspCycles(_Schedule):
    """Seeded grasp cycles: rest open, close, load on the fruit, hold, unload, open (made up)."""

    _FIELDS = ("t_rest", "d_close", "t_settle", "d_ramp", "t_hold", "d_unload", "d_open",
               "k_open", "k_close", "load", "trem_hz", "trem_phase")
    _TAG = 0x6A5D

    def _row(self, rng) -> list:
        u = rng.uniform
        return [u(0.8, 1.6), u(0.45, 0.8), u(0.05, 0.25), u(0.3, 0.6), u(1.0, 2.5), u(0.2, 0.4), u(0.5, 0.8),
                u(-0.6, -0.25), u(1.55, 2.7), u(0.2, 0.55), u(5.0, 9.0), u(0.0, _TWO_PI)]

    def _duration(self, rows):
        return rows[:, :7].sum(axis=1)

    def evaluate(self, t_s) -> tuple[np.ndarray, np.ndarray]:
        """Bend angle (rad) and load (fraction of the largest) at device times ``t_s`` (s); new arrays."""
        t = np.asarray(t_s, dtype=np.float64)
        tau, g, nxt = self._lookup(t, self._FIELDS, ("k_open",))
        a_close = g["t_rest"]
        a_ramp = a_close + g["d_close"] + g["t_settle"]
        a_unload = a_ramp + g["d_ramp"] + g["t_hold"]
        a_open = a_unload + g["d_unload"]
        s_close = smooth_step((tau - a_close) / g["d_close"])
        s_open = smooth_step((tau - a_open) / g["d_open"])
        angle = g["k_open"] + (g["k_close"] - g["k_open"]) * s_close - (g["k_close"] - nxt["k_open"]) * s_open
        # a small pump ripple on the actuation, a little tremble in the contact
        angle = angle * (1.0 + 0.004 * np.sin(_TWO_PI * 11.0 * t))
        on = smooth_step((tau - a_ramp) / g["d_ramp"]) - smooth_step((tau - a_unload) / g["d_unload"])
        load = g["load"] * on * (1.0 + 0.05 * np.sin(_TWO_PI * g["trem_hz"] * t + g["trem_phase"]))
        return angle, load


class FreeMotion(_Schedule):
    """Free bending for a filmed calibration session (made up): moves between seeded curvatures.

    Each row: a move of 0.5 .. 2.0 s (smooth step) to a target curvature,
    then a pause. Targets have a random sign, reach +-``peak_per_m`` now and
    then and spread evenly over the range otherwise, so both bend directions
    are loaded and unloaded from many levels and the moves sweep the range in
    between; about every fifth move goes back to flat and rests there
    1 .. 3 s, as a person filming a calibration would (the flat resistance is
    then well seen). Other pauses: 0.2 .. 3 s (log-uniform). More frequent or
    longer flat rests make the film look repetitive to the clock alignment.
    """

    _FIELDS = ("d_move", "t_pause", "target")
    _TAG = 0xF3EE

    def __init__(self, seed: int, run: int, *, peak_per_m: float = 50.0):
        self.peak_per_m = float(peak_per_m)
        super().__init__(seed, run)

    def _row(self, rng) -> list:
        u = rng.uniform
        kind = rng.random()
        pause = float(np.exp(u(math.log(0.2), math.log(3.0))))
        if kind < 0.2:
            level, pause = 0.0, u(1.0, 3.0)  # back to flat, a rest
        elif kind < 0.3:
            level = 1.0  # full range
        else:
            level = u(0.05, 0.95)
        sign = 1.0 if rng.random() < 0.5 else -1.0
        return [u(0.5, 2.0), pause, sign * level]

    def _duration(self, rows):
        return rows[:, 0] + rows[:, 1]

    def evaluate(self, t_s, *, length_m: float) -> tuple[np.ndarray, np.ndarray]:
        """Bend angle (rad over ``length_m``) and zero load at device times ``t_s`` (s); new arrays.

        Row i pauses at its own target, then moves to the next row's.
        """
        t = np.asarray(t_s, dtype=np.float64)
        tau, g, nxt = self._lookup(t, self._FIELDS, ("target",))
        move = smooth_step((tau - g["t_pause"]) / g["d_move"])
        kappa = self.peak_per_m * (g["target"] + (nxt["target"] - g["target"]) * move)
        return kappa * float(length_m), np.zeros_like(t)


class GraspForce(_Schedule):
    """Grasps with a known contact force (made up): pressure up, contact, hold, release.

    Per cycle: rest at ``p_rest`` for 1 .. 2 s; pressure ramps (smooth step,
    1.0 .. 1.6 s) to ``p_max`` 40 .. 70 kPa; the fingertip meets the fruit at
    ``p_contact`` 15 .. 25 kPa and from there the contact force grows linearly
    with the pressure beyond contact, up to ``f_peak`` (0.3 .. 0.8 of the
    model's largest load); hold 1.5 .. 3 s; release ramp 0.6 .. 1.0 s; the
    force falls with the pressure. The force is prescribed, not solved.
    """

    _FIELDS = ("t_rest", "d_up", "t_hold", "d_down", "p_max", "p_contact", "f_peak")
    _TAG = 0x6F0C

    def _row(self, rng) -> list:
        u = rng.uniform
        return [u(1.0, 2.0), u(1.0, 1.6), u(1.5, 3.0), u(0.6, 1.0), u(40.0, 70.0), u(15.0, 25.0), u(0.3, 0.8)]

    def _duration(self, rows):
        return rows[:, :4].sum(axis=1)

    def evaluate(self, t_s, *, p_rest_kpa: float = 2.0) -> tuple[np.ndarray, np.ndarray]:
        """Pressure (kPa) and tip load (fraction of the largest) at device times ``t_s`` (s); new arrays."""
        t = np.asarray(t_s, dtype=np.float64)
        tau, g, _ = self._lookup(t, self._FIELDS)
        up = smooth_step((tau - g["t_rest"]) / g["d_up"])
        down = smooth_step((tau - g["t_rest"] - g["d_up"] - g["t_hold"]) / g["d_down"])
        p = p_rest_kpa + (g["p_max"] - p_rest_kpa) * (up - down)
        p = p * (1.0 + 0.003 * np.sin(_TWO_PI * 11.0 * t))  # pump ripple
        frac = np.clip((p - g["p_contact"]) / (g["p_max"] - g["p_contact"]), 0.0, 1.0)
        return p, g["f_peak"] * frac


def sweep(t_s) -> tuple[np.ndarray, np.ndarray]:
    """Bend -0.75 .. 3.85 rad every 4 s, load 0 .. 0.4 of the largest every 9.7 s (new arrays)."""
    t = np.asarray(t_s, dtype=np.float64)
    angle = 1.55 + 2.3 * np.sin(_TWO_PI * t / 4.0 - math.pi / 2)
    load = 0.2 * (1.0 - np.cos(_TWO_PI * t / 9.7))
    return angle, load
