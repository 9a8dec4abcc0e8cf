"""Wiring-health statistics and verdicts: estimators against closed forms, faults of the virtual finger named."""
from __future__ import annotations

import math

import numpy as np
import pytest

from acquire.link.frames import FrameBlock, FrameRing
from acquire.core.health import (
    FAULT,
    OK,
    WARN,
    HealthMonitor,
    HealthThresholds,
    assess_health,
    excitation_voltage,
    format_health_table,
    hum_rms_lsb,
    noise_rms_lsb,
)
from acquire.rig import load_rig, parse_rig
from acquire.virtual import Faults, FingerModel

RATE_HZ = 1000.0


@pytest.fixture(scope="module")
def rig():
    return load_rig(None)


def _window(model: FingerModel, t0_s: float, *, seconds: float = 2.0):
    t = t0_s + np.arange(int(seconds * RATE_HZ)) / RATE_HZ
    return model.codes(t, frame_index=np.rint(t * RATE_HZ).astype(np.int64)), t


# -------------------------------------------------------------------- estimators


def test_noise_estimate_matches_white_noise_and_ignores_slow_motion():
    # For independent samples, var(x[n+1] - 2 x[n] + x[n-1]) = (1 + 4 + 1) sigma^2 (variance of a sum of
    # independent variables, Bienaymé; any probability textbook, from memory), so sqrt(mean(d2^2)/6) -> sigma.
    rng = np.random.default_rng(7)
    n = 20000
    t = np.arange(n) / RATE_HZ
    sigma = np.array([0.8, 5.0, 30.0])
    slow = 600.0 * np.sin(2 * np.pi * 0.7 * t)[:, None]  # a finger bending: large, slow
    x = 2000.0 + slow + rng.normal(size=(n, 3)) * sigma
    est = noise_rms_lsb(x)
    # relative standard error of an RMS from ~20000 correlated differences is about 1 %
    np.testing.assert_allclose(est, sigma, rtol=0.04)
    # a plain standard deviation would call the moving finger noise (numpy reference)
    assert np.std(x[:, 0]) > 100 * est[0]


def test_hum_estimate_is_the_rms_of_the_sinusoid():
    # RMS of A sin(w t + p) is A / sqrt(2) (definition of RMS, from memory); 50 and 60 Hz add in quadrature.
    rng = np.random.default_rng(3)
    n = 2000
    t = np.arange(n) / RATE_HZ
    a50, a60 = 40.0, 15.0
    x = np.stack(
        [
            1000 + a50 * np.sin(2 * np.pi * 50 * t + 0.3) + rng.normal(size=n),
            1000 + a60 * np.sin(2 * np.pi * 60 * t + 1.1) + 50 * t * t + rng.normal(size=n),
            1000 + rng.normal(size=n) * 5.0,  # no hum: only the noise's projection, ~5 sqrt(2/n)
        ],
        axis=1,
    )
    est = hum_rms_lsb(x, t)
    assert est[0] == pytest.approx(a50 / math.sqrt(2), rel=0.02)
    assert est[1] == pytest.approx(a60 / math.sqrt(2), rel=0.02)
    assert est[2] < 5.0 * math.sqrt(2.0 / n) * 4


def test_hum_not_measured_below_nyquist():
    t = np.arange(500) / 100.0  # 100 Hz cannot resolve 60 Hz (Nyquist-Shannon)
    assert np.isnan(hum_rms_lsb(np.zeros((500, 2)), t)).all()


def test_excitation_voltage_from_rig_or_assumed(rig):
    import re

    bare = re.sub(r"(?m)^excitation_v\s*=.*\n", "", rig.text)
    rig = parse_rig(bare, source="rig without excitation")
    v, assumed = excitation_voltage(rig)
    assert (v, assumed) == (3.3, True)
    text = bare.replace("[readout]\n", "[readout]\nexcitation_v = 5.0\n", 1)
    rig5 = parse_rig(text, source="rig with excitation")
    assert excitation_voltage(rig5) == (5.0, False)
    codes = np.full((200, rig5.n_channels), 1000, dtype=np.uint16) + np.arange(rig5.n_channels)[None, ::-1] * 500
    codes[:, 0] += (np.arange(200) % 2).astype(np.uint16) * 8  # alternating +-4 LSB about the mean
    rep = assess_health(codes, np.arange(200) / RATE_HZ, rig=rig5, adc_bits=12)
    # mV = LSB * V_ex / 2^bits * 1000 (ideal ADC transfer function, from memory)
    ch = rep.channels[0]
    assert ch.noise_mv == pytest.approx(ch.noise_lsb * 5.0 / 4096 * 1000)
    assert not rep.excitation_assumed and not any("assumed" in n for n in rep.notes)
    rep_default = assess_health(codes, np.arange(200) / RATE_HZ, rig=rig, adc_bits=12)
    assert any("3.3 V assumed" in n for n in rep_default.notes)


# -------------------------------------------------------------------- verdicts on the virtual finger

FAULT_CASES = {
    # injected fault -> (word the verdict must use, words it must not use)
    "open tap 3": (Faults(open_tap=3), "open tap"),
    "open tap 1": (Faults(open_tap=1), "open tap"),
    "short 2-4": (Faults(short_taps=(2, 4)), "short"),
    "short 4-ground": (Faults(short_taps=(4, 6)), "short"),
    "noisy channel 2": (Faults(noisy_channel=2), "noise"),
    "stuck channel 4": (Faults(stuck_channel=4), "stuck"),
}
KEYWORDS = ("open tap", "short", "noise", "stuck")


@pytest.mark.parametrize("case", list(FAULT_CASES))
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_each_injected_fault_is_named(rig, case, seed):
    # ground truth: the fault the simulator injects; the model's electrics are the divider of
    # the readout formula in the README's rig file section (Ohm's law), its floating input picks up 50 Hz as real open inputs do
    faults, word = FAULT_CASES[case]
    model = FingerModel(rig=rig, faults=faults, seed=seed)
    for t0 in (0.0, 4.0):
        codes, t = _window(model, t0)
        rep = assess_health(codes, t, rig=rig, adc_bits=12)
        found = rep.findings()
        faults_found = [r for v, _, r in found if v == FAULT]
        assert faults_found, f"{case}: nothing called a fault\n{format_health_table(rep)}"
        text = " | ".join(faults_found).lower()
        assert word in text, format_health_table(rep)
        for other in KEYWORDS:
            if other != word:
                assert other not in text, f"{case}: also blamed {other!r}\n{format_health_table(rep)}"


def test_fault_is_placed_on_the_right_channel_or_segment(rig):
    model = FingerModel(rig=rig, faults=Faults(open_tap=3), seed=0)
    rep = assess_health(*_window(model, 1.0), rig=rig, adc_bits=12)
    assert rep.channels[3].verdict == FAULT and "tap 3" in rep.channels[3].reason
    assert all(c.verdict == OK for c in rep.channels if c.index != 3)

    model = FingerModel(rig=rig, faults=Faults(short_taps=(2, 4)), seed=0)
    rep = assess_health(*_window(model, 1.0), rig=rig, adc_bits=12)
    assert [s.verdict for s in rep.segments] == [OK, OK, FAULT, FAULT, OK, OK]
    assert "tap 2 and tap 4" in rep.segments[2].reason
    # shorted segments read about 0 ohm (divider formula with equal tap voltages)
    assert abs(rep.segments[2].resistance_ohm) < 0.02 * rig.segment_ohm_range[0]

    model = FingerModel(rig=rig, faults=Faults(stuck_channel=4), seed=0)
    rep = assess_health(*_window(model, 1.0), rig=rig, adc_bits=12)
    assert rep.channels[4].verdict == FAULT
    assert rep.channels[4].reason.startswith("channel 4 (tap 4) stuck at ")
    assert "for 2.0 s" in rep.channels[4].reason

    model = FingerModel(rig=rig, faults=Faults(noisy_channel=2), seed=0)
    rep = assess_health(*_window(model, 1.0), rig=rig, adc_bits=12)
    # the simulator adds 40 LSB RMS to its 1.2 LSB: sqrt(40^2 + 1.2^2) ~ 40
    assert rep.channels[2].noise_lsb == pytest.approx(40.0, rel=0.1)
    assert f"noise {rep.channels[2].noise_lsb:.0f} LSB RMS" in rep.channels[2].reason
    assert "(limit 8)" in rep.channels[2].reason


@pytest.mark.parametrize(
    "seed,scenario,hold", [(0, "grasp", None), (1, "grasp", None), (2, "sweep", None), (0, "grasp", "flat"),
                           (3, "grasp", "radius=25mm"), (4, "grasp", "curvature=-20/m")]
)
def test_healthy_finger_is_called_healthy(rig, seed, scenario, hold):
    model = FingerModel(rig=rig, seed=seed, scenario=scenario, hold=hold)
    for t0 in (0.0, 2.5, 6.0, 11.0):
        rep = assess_health(*_window(model, t0), rig=rig, adc_bits=12)
        assert rep.healthy, format_health_table(rep)
        # a healthy divider chain reads v_0 > v_1 > ... > 0 (Ohm's law, voltage divider)
        assert all(s.order_violated_fraction == 0.0 for s in rep.segments)
        assert all(c.noise_lsb < 2.0 for c in rep.channels)  # the simulator's 1.2 LSB


def test_stuck_message_states_value_and_duration(rig):
    n = 3000
    t = np.arange(n) / RATE_HZ
    rng = np.random.default_rng(1)
    base = np.array([3400, 2800, 2250, 1700, 1100, 550], dtype=np.float64)
    codes = np.rint(base + rng.normal(size=(n, 6)) * 1.2).astype(np.uint16)
    codes[:, 4] = 2047
    rep = assess_health(codes, t, rig=rig, adc_bits=12)
    assert rep.channels[4].reason == "channel 4 (tap 4) stuck at 2047 for 3.0 s while other channels change"
    # every channel constant: not blamed on one channel, only a warning
    flat = np.tile(base.astype(np.uint16), (n, 1))
    rep = assess_health(flat, t, rig=rig, adc_bits=12)
    assert {c.verdict for c in rep.channels} == {WARN}


def test_link_counters_give_warnings_and_faults(rig):
    model = FingerModel(rig=rig, seed=0)
    codes, t = _window(model, 0.0)
    rep = assess_health(codes, t, rig=rig, adc_bits=12, counters={"frames": 2000, "frames_lost": 0})
    assert rep.link.verdict == OK and rep.healthy
    rep = assess_health(codes, t, rig=rig, adc_bits=12,
                        counters={"frames": 2000, "frames_lost": 20, "drop_crc": 3, "reconnects": 0})
    assert rep.link.verdict == WARN
    assert "20 frames lost" in rep.link.reason and "3 bad packets (crc 3)" in rep.link.reason
    rep = assess_health(codes, t, rig=rig, adc_bits=12, counters={"frames": 2000, "frames_lost": 500})
    assert rep.link.verdict == FAULT  # 20 % lost, above the 5 % rule of thumb


def test_thresholds_can_be_tightened(rig):
    model = FingerModel(rig=rig, seed=0)
    codes, t = _window(model, 0.0)
    strict = HealthThresholds(noise_warn_lsb=0.5, noise_fault_lsb=1.0)
    rep = assess_health(codes, t, rig=rig, adc_bits=12, thresholds=strict)
    assert all(c.verdict == FAULT and "noise" in c.reason for c in rep.channels)


def test_monitor_gives_the_same_report_for_any_chunking(rig):
    model = FingerModel(rig=rig, faults=Faults(noisy_channel=1), seed=5)
    codes, t = _window(model, 3.0, seconds=3.0)
    n = codes.shape[0]
    reports = []
    for chunk in (1, 37, n):
        ring = FrameRing(capacity_frames=8192, n_channels=rig.n_channels)
        mon = HealthMonitor(cursor=ring.cursor(), rig=rig, adc_bits=12, rate_hz=RATE_HZ, window_s=2.0)
        for i in range(0, n, chunk):
            j = min(n, i + chunk)
            ring.push(FrameBlock(codes=codes[i:j], seq=np.arange(i, j), t_device_s=t[i:j],
                                 t_host_s=t[i:j], status=np.zeros(j - i, dtype=np.uint8)))
            mon.update()
        reports.append(mon.report())
    # reference: assess_health on the last 2 s taken directly
    direct = assess_health(codes[-2000:], t[-2000:], rig=rig, adc_bits=12)
    for rep in reports:
        assert rep.frames == 2000
        assert [c.reason for c in rep.channels] == [c.reason for c in direct.channels]
        np.testing.assert_allclose([c.noise_lsb for c in rep.channels], [c.noise_lsb for c in direct.channels])
    assert reports[0].channels[1].verdict == FAULT


def test_too_few_frames_gives_no_verdict(rig):
    rep = assess_health(np.zeros((5, rig.n_channels), dtype=np.uint16), np.arange(5) / RATE_HZ, rig=rig, adc_bits=12)
    assert rep.healthy and any("no verdicts yet" in n for n in rep.notes)
    assert "channel" in format_health_table(rep)
