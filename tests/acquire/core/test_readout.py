"""Divider readout: codes from ideal resistor chains back to resistances, and the wiring checks."""
from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pytest

from acquire.errors import UserError
from acquire.core.readout import ChainCheck, DividerReadout, make_readout
from acquire.rig import load_rig, parse_rig

ADC_BITS = 12
FULL = (1 << ADC_BITS) - 1


def ideal_codes(r_seg: np.ndarray, r_ref: float, bits: int = ADC_BITS) -> np.ndarray:
    """Tap codes of an ideal divider.

    Tap voltages from Ohm's law for resistors in series (Ohm, "Die galvanische Kette", 1827):
    the chain current is V_ex / (r_ref + sum R), tap k sits above segments k..S-1.
    Ideal ADC transfer, code = floor(V / V_ref * 2^N), clipped to 2^N - 1
    (Kester (ed.), "Data Conversion Handbook", Analog Devices, 2005, ch. 2).
    """
    r_seg = np.atleast_2d(r_seg)
    below = np.cumsum(r_seg[:, ::-1], axis=1)[:, ::-1]  # resistance from tap k to ground
    v = below / (r_ref + below[:, :1])
    return np.minimum(np.floor(v * (1 << bits)), (1 << bits) - 1).astype(np.uint16)


def lsb_bound(r_seg: np.ndarray, r_ref: float, bits: int = ADC_BITS) -> np.ndarray:
    """First-order error bound of R_k for a code error below 1 LSB on every tap."""
    r_seg = np.atleast_2d(r_seg)
    below = np.cumsum(r_seg[:, ::-1], axis=1)[:, ::-1]
    v0 = below[:, :1] / (r_ref + below[:, :1])
    lsb = 1.0 / (1 << bits)
    n_taps = np.ones_like(r_seg) * 2
    n_taps[:, -1] = 1  # v_S = 0 exactly
    return 1.01 * (r_ref * n_taps * lsb / (1 - v0) + r_seg * lsb / (1 - v0))


@pytest.fixture
def rig():
    return load_rig(None)


def test_known_chain_gives_back_its_resistors(rig):
    # Ground truth: resistors chosen here; codes from Ohm's law (see ideal_codes).
    rng = np.random.default_rng(1)
    r_true = rng.uniform(3000.0, 25000.0, size=(200, rig.n_segments))
    codes = ideal_codes(r_true, rig.r_ref_ohm)
    ro = DividerReadout.from_rig(rig, adc_bits=ADC_BITS)
    r = ro.resistance_ohm(codes)
    assert r.shape == (200, rig.n_segments) and r.dtype == np.float64
    err = np.abs(r - r_true)
    assert np.all(err <= lsb_bound(r_true, rig.r_ref_ohm))
    # and quantisation really is what limits it: errors are a sizeable part of the bound
    assert err.max() > 0.1 * lsb_bound(r_true, rig.r_ref_ohm).min()
    assert ro.chain_check(codes).ok.all()


def test_channels_in_any_order_and_non_tap_channels_ignored():
    text = """
[sensor]
segment_lengths_mm = [10.0, 12.0, 14.0]
segment_ohm_range = [500.0, 50000.0]
[readout]
kind = "divider"
r_ref_ohm = 4700.0
channels = ["pressure", "tap2", "tap0", "tap1"]
"""
    rig = parse_rig(text, source="test rig")
    r_true = np.array([[5000.0, 7000.0, 9000.0]])
    taps = ideal_codes(r_true, 4700.0)
    codes = np.zeros((1, 4), dtype=np.uint16)
    codes[:, 0] = 1234  # the pressure channel: must not matter
    codes[:, 1] = taps[:, 2]
    codes[:, 2] = taps[:, 0]
    codes[:, 3] = taps[:, 1]
    ro = make_readout(rig, adc_bits=ADC_BITS)
    r = ro.resistance_ohm(codes)
    assert np.all(np.abs(r - r_true) <= lsb_bound(r_true, 4700.0))
    codes[:, 0] = 4000
    assert np.array_equal(ro.resistance_ohm(codes), r)


def test_swapped_taps_are_flagged(rig):
    # A healthy chain reads v_0 > v_1 > ... > 0 (the readout formula in the README's rig file section, from Ohm's law).
    r_true = np.full((3, rig.n_segments), 10000.0)
    codes = ideal_codes(r_true, rig.r_ref_ohm)
    codes[1, [1, 2]] = codes[1, [2, 1]]  # frame 1: tap 1 and tap 2 wires swapped
    chk = DividerReadout.from_rig(rig, adc_bits=ADC_BITS).chain_check(codes)
    assert chk.ok.tolist() == [True, False, True]
    assert chk.order_violated[1].tolist() == [False, True, False, False, False, False]
    assert not chk.top_at_full_scale.any()


def test_broken_strip_flags_open_chain_without_warnings(rig):
    # Strip broken between tap 2 and tap 3: no current, taps above the break sit at the
    # excitation (full scale), taps below at ground (Ohm's law with I = 0).
    codes = np.zeros((2, rig.n_segments), dtype=np.uint16)
    codes[0] = ideal_codes(np.full((1, 6), 10000.0), rig.r_ref_ohm)[0]
    codes[1, :3] = FULL
    codes[1, 3:] = 0
    ro = DividerReadout.from_rig(rig, adc_bits=ADC_BITS)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no silent divide-by-zero
        r = ro.resistance_ohm(codes)
        chk = ro.chain_check(codes)
    assert np.isfinite(r[0]).all()
    assert np.isnan(r[1]).all()  # current unmeasurable: NaN, not inf
    assert chk.top_at_full_scale.tolist() == [False, True]
    assert chk.saturated[1].all()
    assert chk.order_violated[1, 3:].all()  # v_k <= v_{k+1} (0 <= 0) below the break
    assert chk.out_of_range[1].all()
    assert chk.unusable[1].all() and not chk.unusable[0].any()


def test_shorted_and_out_of_range_segments(rig):
    r_true = np.full((2, rig.n_segments), 10000.0)
    r_true[0, 4] = 1.0  # nearly a short: same code on tap 4 and tap 5
    r_true[1, 2] = 60000.0  # far above the rig's healthy range
    codes = ideal_codes(r_true, rig.r_ref_ohm)
    chk = DividerReadout.from_rig(rig, adc_bits=ADC_BITS).chain_check(codes)
    assert chk.order_violated[0, 4] and chk.out_of_range[0, 4]
    assert chk.out_of_range[1, 2] and not chk.order_violated[1].any()
    assert not chk.unusable[1].any()  # out of range alone is a reading, not a fault
    assert not chk.ok.any()


def test_near_full_scale_top_is_flagged(rig):
    # chain of 6 x 40 kohm against 10 kohm: v_0 = 240/250 = 0.96, healthy; 6 x 400 kohm: 0.996
    ro = DividerReadout(tap_channels=rig.tap_channels, adc_bits=ADC_BITS, r_ref_ohm=10000.0,
                        segment_ohm_range=(100.0, 1e7))
    chk = ro.chain_check(ideal_codes(np.array([[40e3] * 6, [400e3] * 6]), 10000.0))
    assert chk.top_at_full_scale.tolist() == [False, True]


def test_codes_beyond_adc_range_are_nan_and_saturated(rig):
    codes = ideal_codes(np.full((1, 6), 10000.0), rig.r_ref_ohm)
    codes[0, 3] = 5000  # impossible for a 12-bit ADC
    ro = DividerReadout.from_rig(rig, adc_bits=ADC_BITS)
    assert np.isnan(ro.resistance_ohm(codes)).all()
    assert ro.chain_check(codes).saturated[0, 3]


def test_unknown_readout_kind_is_a_user_error(rig):
    other = dataclasses.replace(rig, readout_kind="constant-current")
    with pytest.raises(UserError, match="constant-current"):
        make_readout(other, adc_bits=ADC_BITS)


def test_empty_block(rig):
    ro = make_readout(rig, adc_bits=ADC_BITS)
    codes = np.zeros((0, rig.n_channels), dtype=np.uint16)
    assert ro.resistance_ohm(codes).shape == (0, 6)
    chk = ro.chain_check(codes)
    assert isinstance(chk, ChainCheck) and chk.ok.shape == (0,)
