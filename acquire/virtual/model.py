"""The virtual finger's model: time courses, mechanics, electrics and ADC glued per frame.

Demo scenario, made up for the demo: one finger of a greenhouse tomato-picking
gripper. A soft bending actuator closes the finger around a fruit; the fruit
pushes back on the fingertip.

Rooms: :mod:`~acquire.virtual.elastica` (the mechanics: a planar
Euler-Bernoulli elastica under a uniform actuation moment and a tip force),
:mod:`~acquire.virtual.scenarios` (time courses),
:mod:`~acquire.virtual.electrics` (the static strip law, divider, ADC noise),
:mod:`~acquire.virtual.strip` (a real strip's creep, hysteresis and drift:
stateful, applied by the device in frame order), :mod:`~acquire.virtual.faults`.

Actuation: ``M_a = gain * p`` uniform along the finger (free curvature
``kappa0 = M_a / EI``); the scenarios other than ``grasp-force`` are written
as moments and their pressure is ``M_a / gain``. Tip force: size P along a
fixed direction (``load_angle_rad`` from +x), at the contact point (the end of
the sensor plus ``load_lever_m`` of rigid tip). A force hold (``force=1.2N``)
pushes the sensor's far end along +y (the label grammar's force direction)
at a set pressure.

Everything here is a pure function of device time (and of the frame index for
noise): the same frames come out for any chunking. The static law
(:meth:`FingerModel.segment_ohm`) is the ideal strip; the real strip path is
:meth:`FingerModel.codes` with ``strip=`` a :class:`~acquire.virtual.strip.StripStream`.
"""
from __future__ import annotations

import math

import numpy as np

from acquire.core.labels import check_label_text, parse_force_label, parse_hold_label
from acquire.errors import UserError
from acquire.rig import Rig, load_rig
from acquire.virtual.elastica import (ElasticaSolution, arc_xy, bilinear, elastica_tables, simpson_mean,
                                      solve_elastica)
from acquire.virtual.electrics import StaticStrip, divider_tap_volts, noise_key, normals
from acquire.virtual.faults import Faults
from acquire.virtual.scenarios import SCENARIOS, FreeMotion, GraspCycles, GraspForce, sweep
from acquire.virtual.strip import RealStrip, StripSettings, StripStream

__all__ = [
    "FingerModel",
    "Faults",
    "ElasticaSolution",
    "solve_elastica",
    "parse_hold_label",
    "SCENARIOS",
    "DEFAULT_EI_NM2",
    "DEFAULT_ACTUATION_GAIN_NM_PER_KPA",
    "check_hold_label",
]

_TWO_PI = 2.0 * math.pi
#: EI of the demo finger, N m^2: a silicone finger about 20 mm x 12 mm (made up; order of
#: magnitude E ~ 1 MPa, I = b h^3 / 12 ~ 3e-9 m^4: common practice, no source)
DEFAULT_EI_NM2 = 3.0e-3
#: actuation moment per kPa, N m / kPa (made up: 60 kPa bends the free demo finger to about 20 1/m)
DEFAULT_ACTUATION_GAIN_NM_PER_KPA = 1.0e-3
_BEND_RANGE_RAD = (-5.0, 5.0)  # the moment grid, as M L / EI (0.1 rad steps): +-52 1/m over the demo finger


def check_hold_label(label: str) -> tuple[str, float]:
    """What a hold label asks of the finger: ``("shape", curvature 1/m)`` or ``("force", N along +y)``.

    Raises LabelError (a UserError) naming the label when it states neither, or when a
    recording could not hold it (the one label check every command applies). Pure.
    """
    check_label_text(label)
    force = parse_force_label(label)
    if force is not None:
        return "force", force
    return "shape", parse_hold_label(label)


class FingerModel:
    """Deterministic virtual finger: time courses, mechanics, electrics, ADC.

    Parameters (keyword-only)
    -------------------------
    rig : Rig, optional
        Default: the built-in demo rig (``load_rig(None)``).
    seed : int
        Fixes the sensor's electrical spread, the time courses and the noise.
    adc_bits : int
        ADC resolution (8..16).
    scenario : str
        Time course played when no hold is set (:data:`SCENARIOS`).
    hold : str or None
        A jig label (``flat``, ``radius=25mm``, ``curvature=40/m``: pressed
        onto a jig of that uniform curvature, with a tiny wobble) or a force
        label (``force=1.2N``: that force on the sensor's far end along +y,
        at ``pressure_kpa``).
    faults : Faults, optional
        Electrical faults act here; link faults are the device's.
    run : int
        Another realisation of time course and noise with the same sensor.
    bending_stiffness_nm2 : float
        EI of the finger, N m^2 (every segment alike).
    load_angle_rad : float
        Direction of the scenarios' tip force from +x (default -0.6 rad: the
        fruit pushes the closed fingertip back outward).
    load_lever_m : float, optional
        Rigid tip beyond the sensor at which the force acts (default: the
        rig's ``tip_length_m``).
    noise_lsb : float
        ADC noise, RMS in LSB (the pressure channel too).
    actuation_gain_nm_per_kpa : float
        Actuation moment per kPa of pressure.
    pressure_kpa : float
        Pressure during a force hold, kPa.

    All methods are pure functions of their arguments, safe to call from any
    thread; returned arrays are new and owned by the caller.
    """

    def __init__(self, *, rig: Rig | None = None, seed: int = 0, adc_bits: int = 12, scenario: str = "grasp",
                 hold: str | None = None, faults: Faults | None = None, run: int = 0,
                 bending_stiffness_nm2: float = DEFAULT_EI_NM2, load_angle_rad: float = -0.6,
                 load_lever_m: float | None = None, noise_lsb: float = 1.2,
                 actuation_gain_nm_per_kpa: float = DEFAULT_ACTUATION_GAIN_NM_PER_KPA, pressure_kpa: float = 0.0):
        self.rig = rig if rig is not None else load_rig(None)
        if scenario not in SCENARIOS:
            raise UserError(f"scenario {scenario!r} is not known (known: {', '.join(SCENARIOS)})")
        adc_bits = int(adc_bits)
        if not 8 <= adc_bits <= 16:
            raise UserError(f"adc_bits {adc_bits}: must be 8..16")
        self.faults = faults if faults is not None else Faults()
        self.faults.check(self.rig)
        for name, value in (("bending_stiffness_nm2", bending_stiffness_nm2),
                            ("actuation_gain_nm_per_kpa", actuation_gain_nm_per_kpa)):
            if not (math.isfinite(value) and value > 0):
                raise UserError(f"{name} {value}: must be positive")
        self.seed, self.run, self.adc_bits, self.scenario = int(seed), int(run), adc_bits, scenario
        self.bending_stiffness_nm2 = float(bending_stiffness_nm2)
        self.actuation_gain_nm_per_kpa = float(actuation_gain_nm_per_kpa)
        self.pressure_kpa = float(pressure_kpa)
        self.load_angle_rad = float(load_angle_rad)
        self.load_lever_m = float(self.rig.tip_length_m if load_lever_m is None else load_lever_m)
        self.noise_lsb = float(noise_lsb)
        ei, length = self.bending_stiffness_nm2, self.rig.sensor_length_m
        #: bend angle over the sensor (rad) the moment grid covers, as M L / EI
        self.bend_range_rad = _BEND_RANGE_RAD
        #: largest tip load the grid covers, N (P L^2 / EI = 2: clear of the
        #: snap-through that a strongly curled finger meets under more load)
        self.load_max_n = 2.0 * ei / length**2
        self._tables = elastica_tables(
            tuple(float(v) for v in self.rig.segment_lengths_m), ei, self.load_angle_rad, self.load_lever_m,
            ei * self.bend_range_rad[0] / length, ei * self.bend_range_rad[1] / length, 101, self.load_max_n, 33,
        )
        self._static = StaticStrip(n_segments=self.rig.n_segments, segment_ohm_range=self.rig.segment_ohm_range,
                                   seed=self.seed, basis=self._tables.basis)
        self._setup_floating()
        self._set_run(self.run)
        self._set_hold(hold)
        self._stuck_code = None
        if self.faults.stuck_channel is not None:
            clean = self._channel_volts(np.zeros(1))[0, int(self.faults.stuck_channel)]
            self._stuck_code = int(np.clip(round(clean * 2**adc_bits), 0, 2**adc_bits - 1))

    # ------------------------------------------------------------------ copies

    def _set_run(self, run: int) -> None:
        self.run = int(run)
        self._cycles = GraspCycles(self.seed, self.run)
        self._free = FreeMotion(self.seed, self.run)
        self._grasp_force = GraspForce(self.seed, self.run)
        self._noise_key = noise_key(self.seed, self.run, 0x4E015E)
        self._fault_key = noise_key(self.seed, self.run, 0xFA17)

    def _set_hold(self, hold: str | None) -> None:
        self.hold = None
        self.hold_curvature_per_m = None
        self.hold_force_n = None
        self._force_hold = None
        if hold is None:
            return
        kind, value = check_hold_label(hold)
        if kind == "shape":
            self.hold_curvature_per_m = value
        else:
            force = value
            self.hold_force_n = force
            self._force_hold = self._solve_force_hold(force)
        self.hold = str(hold).strip()

    def with_hold(self, hold: str | None) -> "FingerModel":
        """The same finger with another hold label (or none); shares all tables."""
        new = object.__new__(FingerModel)
        new.__dict__.update(self.__dict__)
        new._set_hold(hold)
        return new

    def with_run(self, run: int) -> "FingerModel":
        """The same sensor, another realisation of time course and noise."""
        new = object.__new__(FingerModel)
        new.__dict__.update(self.__dict__)
        new._set_run(run)
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
        return np.array(self._static.r0_ohm)

    @property
    def static_strip(self) -> StaticStrip:
        """The memory-free strip law (shared, immutable)."""
        return self._static

    def real_strip(self, settings: StripSettings | None = None) -> RealStrip:
        """This sensor's real strip (creep, hysteresis, drift) with ``settings`` (default: the defaults)."""
        return RealStrip(settings or StripSettings(), span=self._static.calibrated_span(), seed=self.seed)

    # ------------------------------------------------------------------ mechanics

    def pressure(self, t_s) -> np.ndarray:
        """Actuation pressure, kPa, at device times ``t_s`` (s), (N,)."""
        t = np.asarray(t_s, dtype=np.float64)
        if self.hold is None and self.scenario == "grasp-force":
            return self._grasp_force.evaluate(t)[0]
        return self.inputs(t)[0] / self.actuation_gain_nm_per_kpa

    def inputs(self, t_s) -> tuple[np.ndarray, np.ndarray]:
        """Actuation moment (N m) and tip load (N) at device times ``t_s`` (s).

        A jig hold: the moment that would bend the free finger to the jig's
        curvature, and no tip load. A force hold: the set pressure's moment
        and the set force's size.
        """
        t = np.asarray(t_s, dtype=np.float64)
        ei = self.bending_stiffness_nm2
        if self._force_hold is not None:
            m = self.actuation_gain_nm_per_kpa * self.pressure_kpa
            return np.full(t.shape, m), np.full(t.shape, abs(self.hold_force_n))
        if self.hold is not None:
            return ei * self._hold_kappa(t), np.zeros_like(t)
        if self.scenario == "grasp-force":
            p, load = self._grasp_force.evaluate(t)
            return self.actuation_gain_nm_per_kpa * p, self.load_max_n * load
        per_angle = ei / self.rig.sensor_length_m  # moment per radian of pure-moment bend
        if self.scenario == "sweep":
            angle, load = sweep(t)
        elif self.scenario == "free":
            angle, load = self._free.evaluate(t, length_m=self.rig.sensor_length_m)
        else:
            angle, load = self._cycles.evaluate(t)
        return per_angle * angle, self.load_max_n * load

    def force_xy(self, t_s) -> np.ndarray:
        """Tip force (Fx, Fy), N, base frame, at device times ``t_s`` (s), (N, 2)."""
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        _, load = self.inputs(t)
        phi = self._load_angle()
        return np.stack([load * math.cos(phi), load * math.sin(phi)], axis=-1)

    def _load_angle(self) -> float:
        if self._force_hold is not None:
            return math.copysign(math.pi / 2, self.hold_force_n)
        return self.load_angle_rad

    def _hold_kappa(self, t: np.ndarray) -> np.ndarray:
        wobble = 0.02 * np.sin(_TWO_PI * 0.7 * t) + 0.01 * np.sin(_TWO_PI * 3.1 * t + 1.0)
        return self.hold_curvature_per_m + wobble

    def _solve_force_hold(self, force_n: float) -> ElasticaSolution:
        """One direct elastica solve: set pressure, ``force_n`` on the sensor's far end along +y."""
        sol = self.solve(self.actuation_gain_nm_per_kpa * self.pressure_kpa, abs(force_n),
                         load_angle_rad=math.copysign(math.pi / 2, force_n), load_lever_m=0.0)
        if not bool(sol.converged[0]):
            raise UserError(f"hold {force_n:g} N at {self.pressure_kpa:g} kPa: the finger's shape does not converge "
                            "(force too large for this stiffness)")
        return sol

    def _grid_weights(self, moment: np.ndarray, load: np.ndarray):
        tb = self._tables
        i, fi = bilinear(moment, tb.moment_grid)
        j, fj = bilinear(load, tb.load_grid)
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
            ``moment_nm`` (N,), ``load_n`` (N,); ``force_xy_n`` (N, 2): tip
            force in the base frame, N; ``pressure_kpa`` (N,).
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        seg = self.rig.segment_lengths_m
        moment, load = self.inputs(t)
        if self._force_hold is not None:
            sol, taps = self._force_hold, self._tables.tap_nodes
            curv = np.repeat(np.diff(sol.theta_rad[0, taps])[None, :] / seg[None, :], t.shape[0], axis=0)
            tip = np.repeat(sol.xy_m[0, -1][None, :], t.shape[0], axis=0)
        elif self.hold is not None:
            kappa = self._hold_kappa(t)
            curv = np.repeat(kappa[:, None], seg.shape[0], axis=1)
            tip = arc_xy(kappa, self.rig.sensor_length_m)
        else:
            eq = self.equilibrium(moment_nm=moment, load_n=load)
            curv, tip = eq["curvature_per_m"], eq["tip_xy_m"]
        return {"t_device_s": t.copy(), "curvature_per_m": curv, "tip_xy_m": tip, "moment_nm": moment,
                "load_n": load, "force_xy_n": self.force_xy(t), "pressure_kpa": self.pressure(t)}

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
        """Fine-grid shape of the sensor at device times ``t_s`` (the ground truth shape).

        Returns
        -------
        s_m : ndarray (P,)
            Arc length of the points, 0 first, sensor length last.
        xy_m : ndarray (N, P, 2)
            Points in the base frame, m.
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        s = self._tables.s_m
        if self._force_hold is not None:
            xy = np.repeat(self._force_hold.xy_m[:1], t.shape[0], axis=0)
        elif self.hold is not None:
            kappa = self._hold_kappa(t)
            xy = arc_xy(kappa[:, None], s[None, :])
        else:
            rows, w = self._grid_weights(*self.inputs(t))
            xy = self._interp(self._tables.xy_nodes, rows, w).reshape(t.shape[0], s.shape[0], 2)
        return s.copy(), xy

    def solve(self, moment_nm, load_n, *, load_angle_rad: float | None = None,
              load_lever_m: float | None = None) -> ElasticaSolution:
        """Direct elastica solve (no table) for this finger, on the fine grid."""
        return solve_elastica(
            length_m=self.rig.sensor_length_m, bending_stiffness_nm2=self.bending_stiffness_nm2,
            moment_nm=moment_nm, load_n=load_n,
            load_angle_rad=self.load_angle_rad if load_angle_rad is None else load_angle_rad,
            load_lever_m=self.load_lever_m if load_lever_m is None else load_lever_m, s_m=self._tables.s_m,
        )

    # ------------------------------------------------------------------ electrics

    def _setup_floating(self) -> None:
        rng_f = np.random.default_rng([self.seed, 0xF10A7])
        self._float_level = rng_f.uniform(0.3, 0.7)
        self._float_drift = rng_f.uniform(0.01, 0.04, 3)
        self._float_hz = rng_f.uniform(0.02, 0.3, 3)
        self._float_phase = rng_f.uniform(0.0, _TWO_PI, 3)
        self._tap_of_channel = {int(ch): k for k, ch in enumerate(self.rig.tap_channels.tolist())}

    def relative_change(self, t_s) -> np.ndarray:
        """Static (ideal strip) relative resistance change u of each segment at device times ``t_s``, (N, S)."""
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        if self._force_hold is not None:
            taps, s = self._tables.tap_nodes, self._tables.s_m
            local = self._static.response(self._force_hold.kappa_per_m[0][:, None])  # (P, S)
            u = [simpson_mean(local[taps[k]:taps[k + 1] + 1, k], s[taps[k]:taps[k + 1] + 1])
                 for k in range(self.n_segments)]
            return np.repeat(np.asarray(u)[None, :], t.shape[0], axis=0)
        if self.hold is not None:
            return self._static.response(self._hold_kappa(t)[:, None])
        rows, w = self._grid_weights(*self.inputs(t))
        return self._interp(self._static.table, rows, w)

    def segment_ohm(self, t_s, *, with_faults: bool = True, strip: StripStream | None = None) -> np.ndarray:
        """Resistance of each segment at device times ``t_s``, ohm (N, S).

        Without ``strip``: the ideal strip's static law (pure). With ``strip``:
        the real strip, which advances its state (frames in order, one thread).
        With ``with_faults``, shorted segments read 0 ohm.
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        u = self.relative_change(t)
        r = self._static.ohm(u) if strip is None else strip.segment_ohm(t, u, self._static.r0_ohm)
        if with_faults and self.faults.short_taps is not None:
            a, b = self.faults.short_taps
            r[:, int(a) : int(b)] = 0.0
        return r

    def tap_volts(self, t_s, *, strip: StripStream | None = None) -> np.ndarray:
        """Divider tap voltages v_k (k = 0 .. S-1) in units of V_ex, (N, S).

        Wiring faults at the ADC inputs are not applied here.
        """
        return divider_tap_volts(self.segment_ohm(t_s, strip=strip), self.rig.r_ref_ohm)

    def _channel_volts(self, t: np.ndarray, strip: StripStream | None = None) -> np.ndarray:
        """Noise-free input of each channel, units of V_ex (N, C)."""
        v = np.empty((t.shape[0], self.rig.n_channels))
        v[:, self.rig.tap_channels] = self.tap_volts(t, strip=strip)
        act = self.rig.actuation
        for c in (c for c in range(self.rig.n_channels) if c not in self._tap_of_channel):
            if act is not None and c == act.index:
                # the rig's unit is taken as kPa: code = offset + p / per_code
                v[:, c] = (act.offset_code + self.pressure(t) / act.per_code) / float(1 << self.adc_bits)
            elif "pressure" in self.rig.channels[c].lower():
                # actuation pressure, taken as proportional to the moment;
                # 10 % of full scale at zero (vacuum below)
                full = self.bending_stiffness_nm2 * 3.85 / self.rig.sensor_length_m
                v[:, c] = np.clip(0.1 + 0.8 * self.inputs(t)[0] / full, 0.01, 0.99)
            else:
                v[:, c] = 0.5
        if self.faults.open_tap is not None:
            c = int(self.rig.tap_channels[int(self.faults.open_tap)])
            drift = sum(a * np.sin(_TWO_PI * f * t + p)
                        for a, f, p in zip(self._float_drift, self._float_hz, self._float_phase))
            v[:, c] = self._float_level + drift + 0.012 * np.sin(_TWO_PI * 50.0 * t)  # mains
        return v

    def codes(self, t_s, *, frame_index, strip: StripStream | None = None) -> np.ndarray:
        """ADC codes at device times ``t_s``, uint16 (N, C).

        ``frame_index`` (N,) ints name the frames for the noise, which is a
        pure function of (seed, run, frame index, channel): the same frames give
        the same codes however they are chunked. ``strip``: the real strip's
        stream (stateful: frames in order); None for the ideal strip (pure).
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        fi = np.atleast_1d(np.asarray(frame_index, dtype=np.int64))
        if fi.shape != t.shape:
            raise ValueError("frame_index and t_s must have the same shape")
        full = float(1 << self.adc_bits)
        x = self._channel_volts(t, strip) * full
        if self.noise_lsb > 0:
            x += self.noise_lsb * normals(self._noise_key, fi, self.rig.n_channels)
        f = self.faults
        if f.open_tap is not None:
            ch = int(self.rig.tap_channels[int(f.open_tap)])
            x[:, ch] += 8.0 * normals(self._fault_key, fi, 1)[:, 0]
        if f.noisy_channel is not None and f.noisy_lsb > 0:
            x[:, int(f.noisy_channel)] += f.noisy_lsb * normals(self._fault_key ^ 0x5A5A, fi, 1)[:, 0]
        out = np.clip(np.rint(x), 0, full - 1).astype(np.uint16)
        if self._stuck_code is not None:
            out[:, int(f.stuck_channel)] = self._stuck_code
        return out

