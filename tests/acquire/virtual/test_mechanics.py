"""Pressure, contact force and the rod balance the host fits.

References: the Euler-Bernoulli moment balance of a cantilever,
``EI kappa(s) = M_a + (r_F - r(s)) x F`` (Gere & Timoshenko, Mechanics of
Materials, 1997; a uniform actuation moment adds M_a everywhere); the
small-deflection tip deflection ``P L^3 / (3 EI)`` of a cantilever with an end
load (Roark's Formulas for Stress and Strain, any edition, cantilever with end
load); the rig's ``[actuation]`` code law (``value = (code - offset) * per_code``).
"""
from __future__ import annotations

import math

import h5py
import numpy as np
import pytest
import serial

from acquire.core.force import segment_moment_arms
from acquire.errors import UserError
from acquire.rig import load_rig
from acquire.virtual import FingerModel, StripSettings, VirtualFinger

FORCE_RIG = "acquire/rigs/demo_finger_force.toml"


@pytest.fixture(scope="module")
def rig():
    from pathlib import Path

    return load_rig(str(Path(__file__).resolve().parents[3] / FORCE_RIG))


def _cross(a, f):
    return a[..., 0] * f[1] - a[..., 1] * f[0]


@pytest.mark.parametrize("p_kpa, f_n", [(0.0, 0.3), (30.0, 1.2), (50.0, -0.4)])
def test_force_hold_satisfies_moment_balance(rig, p_kpa, f_n):
    model = FingerModel(rig=rig, hold=f"force={f_n:g}N", pressure_kpa=p_kpa)
    ei, m_a = model.bending_stiffness_nm2, model.actuation_gain_nm_per_kpa * p_kpa
    sol = model.solve(m_a, abs(f_n), load_angle_rad=math.copysign(math.pi / 2, f_n), load_lever_m=0.0)
    f = np.array([0.0, f_n])
    r_tip = sol.xy_m[0, -1]
    for i in (0, 20, 48, 80, 96):  # sections along the finger
        assert ei * sol.kappa_per_m[0, i] == pytest.approx(m_a + _cross(r_tip - sol.xy_m[0, i], f), abs=1e-9)
    # the host's segment form: EI (kappa_k - M_a / EI) = Fy A_k - Fx B_k, on the model's own truth
    t = np.zeros(1)
    tr = model.truth(t)
    s_m, xy = model.shape(t)
    a, b, _ = segment_moment_arms(xy, s_m, segment_lengths_m=rig.segment_lengths_m)
    np.testing.assert_allclose(ei * (tr["curvature_per_m"] - m_a / ei), f[1] * a - f[0] * b, rtol=1e-4, atol=1e-7)
    np.testing.assert_allclose(tr["force_xy_n"], [[0.0, f_n]], atol=1e-12)
    np.testing.assert_allclose(tr["pressure_kpa"], [p_kpa])


def test_scenario_balance_with_lever(rig):
    # The grasp-force scenario's shapes: force at the sensor's end plus the rigid tip (lever).
    model = FingerModel(rig=rig, scenario="grasp-force", seed=2)
    t = np.linspace(0.0, 20.0, 400)
    m_a, load = model.inputs(t)
    k = int(np.argmax(load))
    assert load[k] > 0.1 * model.load_max_n
    sol = model.solve(m_a[k], load[k])
    phi, lever = model.load_angle_rad, model.load_lever_m
    f = load[k] * np.array([math.cos(phi), math.sin(phi)])
    theta_end = sol.theta_rad[0, -1]
    r_f = sol.xy_m[0, -1] + lever * np.array([math.cos(theta_end), math.sin(theta_end)])
    for i in (0, 30, 60, 96):
        assert model.bending_stiffness_nm2 * sol.kappa_per_m[0, i] == pytest.approx(
            m_a[k] + _cross(r_f - sol.xy_m[0, i], f), abs=1e-9)
    np.testing.assert_allclose(model.truth(t)["force_xy_n"][k], f, rtol=1e-12)


def test_small_tip_load_deflection_is_roark(rig):
    # Zero pressure, a small end load P along -y: tip deflection P L^3 / (3 EI) (Roark's, cantilever, end load).
    model = FingerModel(rig=rig, hold="force=-2mN")
    length, ei = rig.sensor_length_m, model.bending_stiffness_nm2
    tip = model.truth(np.zeros(1))["tip_xy_m"][0]
    expected = 2e-3 * length**3 / (3 * ei)
    assert -tip[1] == pytest.approx(expected, rel=1e-3)  # second-order terms ~ (P L^2 / EI)^2 = 1e-5


def test_pressure_channel_codes(rig):
    # code = offset + p / per_code (plus 1.2 LSB noise), read back with the rig's own law.
    model = FingerModel(rig=rig, scenario="grasp-force", seed=1)
    t = np.arange(20000) / 1000.0
    codes = model.codes(t, frame_index=np.arange(t.size))
    p = rig.actuation.value(codes)
    err = p - model.pressure(t)
    assert abs(err.mean()) < 0.01 and err.std() < 2.0 * rig.actuation.per_code
    assert model.pressure(t).max() > 35.0  # the scenario did press


def test_truth_file_carries_force_and_pressure(tmp_path, rig):
    path = tmp_path / "truth.h5"
    with VirtualFinger(rig=rig, hold="force=1.2N", mechanics={"pressure_kpa": 20.0}, truth_path=path,
                       strip=StripSettings(mode="ideal"), time_scale=10.0) as dev:
        port = serial.Serial(dev.path, timeout=0.05)
        try:
            port.write(b"START\n")
            for _ in range(200):
                port.read(65536)
                if dev.counters["frames_generated"] > 500:
                    break
        finally:
            port.close()
    with h5py.File(path, "r") as f:
        np.testing.assert_allclose(f["force_xy_n"][:], np.tile([0.0, 1.2], (f["seq"].shape[0], 1)), atol=1e-12)
        np.testing.assert_allclose(f["pressure_kpa"][:], 20.0)
        assert f["force_xy_n"].attrs["units"] == "N" and f["seq"].shape[0] > 500


def test_force_too_large_is_a_user_error(rig):
    with pytest.raises(UserError, match="does not converge"):
        FingerModel(rig=rig, hold="force=900N")
