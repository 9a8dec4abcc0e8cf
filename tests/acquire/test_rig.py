"""Rig files: the contract's example parses; every bad value names file and key."""
from __future__ import annotations

import numpy as np
import pytest

from acquire.rig import RigError, load_rig, parse_rig

CONTRACT_EXAMPLE = """
[sensor]
segment_lengths_mm = [16.0, 16.0, 16.0, 16.0, 16.0, 16.0]  # tap k to tap k+1, base first

[readout]
kind = "divider"
r_ref_ohm = 10000.0
channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5"]   # what channel k measures
"""


def test_contract_example():
    # the example of the README's rig file section, verbatim
    rig = parse_rig(CONTRACT_EXAMPLE, source="example.toml")
    assert rig.n_segments == 6
    assert np.allclose(rig.segment_lengths_m, 0.016)
    assert rig.sensor_length_m == pytest.approx(0.096)
    assert rig.tap_channels.tolist() == [0, 1, 2, 3, 4, 5]
    assert rig.r_ref_ohm == 10000.0


def test_extra_channel_and_order():
    rig = parse_rig(
        CONTRACT_EXAMPLE.replace(
            '["tap0", "tap1", "tap2", "tap3", "tap4", "tap5"]',
            '["pressure", "tap0", "tap1", "tap2", "tap3", "tap4", "tap5"]',
        )
    )
    assert rig.n_channels == 7
    assert rig.tap_channels.tolist() == [1, 2, 3, 4, 5, 6]


def test_default_rig_loads():
    rig = load_rig(None)
    assert rig.n_segments == 6 and rig.tip_length_m > 0


@pytest.mark.parametrize(
    "change, words",
    [
        (lambda t: t.replace("[sensor]", "[sensor"), "not valid TOML"),
        (lambda t: t.replace("segment_lengths_mm = [16.0, 16.0, 16.0, 16.0, 16.0, 16.0]", ""), "segment_lengths_mm"),
        (lambda t: t.replace("[16.0, 16.0,", "[16.0, -16.0,"), "segment_lengths_mm[1]"),
        (lambda t: t.replace("[16.0, 16.0,", '[16.0, "a",'), "segment_lengths_mm[1]"),
        (lambda t: t.replace('"divider"', '"bridge"'), "kind"),
        (lambda t: t.replace("10000.0", "-1.0"), "r_ref_ohm"),
        (lambda t: t.replace("10000.0", '"ten k"'), "r_ref_ohm"),
        (lambda t: t.replace('"tap5"]', '"tap6"]'), "tap 6"),
        (lambda t: t.replace(', "tap5"]', "]"), "tap5"),
    ],
)
def test_bad_rig_names_the_key(change, words):
    with pytest.raises(RigError) as info:
        parse_rig(change(CONTRACT_EXAMPLE), source="bad.toml")
    msg = str(info.value)
    assert msg.startswith("bad.toml")
    assert words in msg
    assert "\n" not in msg


def test_missing_file(tmp_path):
    with pytest.raises(RigError, match="not found"):
        load_rig(tmp_path / "nope.toml")


def test_device_channel_check():
    rig = parse_rig(CONTRACT_EXAMPLE, source="r.toml")
    rig.check_device(channels=6)
    with pytest.raises(RigError, match="lists 6 channels but the device sends 8"):
        rig.check_device(channels=8)


def test_tap_named_twice():
    with pytest.raises(RigError, match="tap 1 twice"):
        parse_rig(CONTRACT_EXAMPLE.replace('"tap2"', '"tap01"'), source="r.toml")


def test_unknown_keys_warned(tmp_path, capsys):
    p = tmp_path / "typo.toml"
    p.write_text(CONTRACT_EXAMPLE.replace("r_ref_ohm = 10000.0", "r_ref_ohm = 10000.0\nr_ref_ohms = 4700.0")
                 + "\n[filter]\nlowpass_hz = 10\n")
    rig = load_rig(p)
    err = capsys.readouterr().err
    assert "[filter]" in err and "r_ref_ohms" in err
    assert len(rig.warnings) == 2
    assert rig.r_ref_ohm == 10000.0


# ----------------------------------------------------------------------------- bounds
# The ranges are ours (acquire.rig.BOUNDS): common practice, no source. Each
# check below puts a value just outside a documented bound, or a non-finite one,
# and expects one line naming the key and the bound.

FULL = (CONTRACT_EXAMPLE + """
excitation_v = 3.3
scales.pressure = { gain = 0.5, offset = 0.0, unit = "kPa" }

[filters]
spike_window = 3
lowpass_hz = 40.0
lowpass_order = 2

[body]
thickness_above_mm = 7.0
thickness_below_mm = 5.0
tip_length_mm = 14.0
""").replace('"tap5"]', '"tap5", "pressure"]')


@pytest.mark.parametrize(
    "old, new, words",
    [
        ("[16.0, 16.0,", "[1e300, 16.0,", "segment_lengths_mm[0] must be 1 .. 2000 mm"),
        ("[16.0, 16.0,", "[0.5, 16.0,", "segment_lengths_mm[0] must be 1 .. 2000 mm"),
        ("[16.0, 16.0,", "[nan, 16.0,", "segment_lengths_mm[0] must be a finite number"),
        ("[16.0, 16.0,", "[inf, 16.0,", "segment_lengths_mm[0] must be a finite number"),
        ("r_ref_ohm = 10000.0", "r_ref_ohm = 1e12", "r_ref_ohm must be 1 .. 1e+09 ohm"),
        ("r_ref_ohm = 10000.0", "r_ref_ohm = 0.5", "r_ref_ohm must be 1 .. 1e+09 ohm"),
        ("r_ref_ohm = 10000.0", "r_ref_ohm = -1.0", "r_ref_ohm must be positive, 1 .. 1e+09 ohm"),
        ("r_ref_ohm = 10000.0", "r_ref_ohm = nan", "r_ref_ohm must be a finite number"),
        ("excitation_v = 3.3", "excitation_v = 1000.0", "excitation_v must be 0.1 .. 60 V"),
        ("gain = 0.5", "gain = 0.0", "gain must not be 0"),
        ("gain = 0.5", "gain = inf", "gain must be a finite number"),
        ("offset = 0.0", "offset = 1e300", "offset must be -1e+09 .. 1e+09"),
        ("spike_window = 3", "spike_window = 100001", "spike_window must be 1 .. 101 frames"),
        ("spike_window = 3", "spike_window = 4", "spike_window must be odd"),
        ("spike_window = 3", "spike_window = 0", "spike_window must be positive, 1 .. 101 frames"),
        ("spike_window = 3", "spike_window = 3.0", "spike_window must be a whole number"),
        ("lowpass_hz = 40.0", "lowpass_hz = 1e9", "lowpass_hz must be 0 .. 100000 Hz"),
        ("lowpass_hz = 40.0", "lowpass_hz = -1.0", "lowpass_hz must be 0 .. 100000 Hz"),
        ("lowpass_hz = 40.0", "lowpass_hz = nan", "lowpass_hz must be a finite number"),
        ("lowpass_order = 2", "lowpass_order = 9", "lowpass_order must be 1 .. 8"),
        ("thickness_above_mm = 7.0", "thickness_above_mm = 201.0", "thickness_above_mm must be 0 .. 200 mm"),
        ("thickness_below_mm = 5.0", "thickness_below_mm = -1.0", "thickness_below_mm must be 0 .. 200 mm"),
        ("tip_length_mm = 14.0", "tip_length_mm = 1e300", "tip_length_mm must be 0 .. 2000 mm"),
        ("[16.0, 16.0,", "[" + "16.0, " * 300, "segment_lengths_mm must be a list of 1 .. 254 numbers"),
        ('segment_ohm_range = [1.0, 2.0]', 'segment_ohm_range = [1.0, 1e20]', "segment_ohm_range[1] must be"),
    ],
)
def test_every_key_is_bounded(old, new, words):
    text = FULL.replace("[sensor]", "[sensor]\nsegment_ohm_range = [1.0, 2.0]")
    assert old in text
    with pytest.raises(RigError) as info:
        parse_rig(text.replace(old, new, 1), source="bad.toml")
    msg = str(info.value)
    assert msg.startswith("bad.toml: [") and words in msg and "\n" not in msg, msg


def test_bounds_themselves_are_accepted():
    text = (FULL.replace("[16.0, 16.0,", "[1.0, 2000.0,").replace("spike_window = 3", "spike_window = 101")
            .replace("lowpass_hz = 40.0", "lowpass_hz = 0.0").replace("r_ref_ohm = 10000.0", "r_ref_ohm = 1.0"))
    rig = parse_rig(text)
    assert rig.segment_lengths_m[:2].tolist() == [0.001, 2.0]
    assert rig.spike_window == 101 and rig.lowpass_hz == 0.0 and rig.r_ref_ohm == 1.0


# ----------------------------------------------------------------------------- markers, actuation
# Table layouts of the README's rig file section ([markers], [actuation]).

def test_markers_default_one_per_tap():
    rig = parse_rig(CONTRACT_EXAMPLE)
    # S + 1 markers at the taps (the README's rig file section, [markers]): 0, 16, ..., 96 mm
    np.testing.assert_allclose(rig.markers_s_m, np.arange(7) * 0.016)
    assert rig.markers_offset_m.tolist() == [0.0] * 7 and not rig.markers_given
    assert rig.actuation is None


def test_markers_table():
    rig = parse_rig(CONTRACT_EXAMPLE + "\n[markers]\ns_mm = [0, 30, 96]\noffset_mm = [0, 7.5, -5]\n")
    np.testing.assert_allclose(rig.markers_s_m, [0.0, 0.030, 0.096])
    np.testing.assert_allclose(rig.markers_offset_m, [0.0, 0.0075, -0.005])
    assert rig.markers_given
    rig = parse_rig(CONTRACT_EXAMPLE + "\n[markers]\ns_mm = [10, 20]\n")
    assert rig.markers_offset_m.tolist() == [0.0, 0.0]


@pytest.mark.parametrize(
    "table, words",
    [
        ("s_mm = [0, 30, 20]", "s_mm must increase, but s_mm[2] = 20"),
        ("s_mm = [0, 30, 30]", "s_mm must increase"),
        ("s_mm = [0, 97]", "s_mm[1] must be 0 .. 96 mm"),
        ("s_mm = [-1, 30]", "s_mm[0] must be 0 .. 96 mm"),
        ("s_mm = [0, nan]", "s_mm[1] must be a finite number"),
        ("s_mm = [5]", "s_mm must be a list of 2 .."),
        ("offset_mm = [0, 1]", "s_mm must be a list"),
        ("s_mm = [0, 30]\noffset_mm = [0, 1, 2]", "offset_mm has 3 values, s_mm has 2"),
        ("s_mm = [0, 30]\noffset_mm = [0, 1e9]", "offset_mm[1] must be -200 .. 200 mm"),
    ],
)
def test_bad_markers(table, words):
    with pytest.raises(RigError) as info:
        parse_rig(CONTRACT_EXAMPLE + "\n[markers]\n" + table + "\n", source="m.toml")
    msg = str(info.value)
    assert msg.startswith("m.toml: [markers]") and words in msg, msg


ACTUATED = CONTRACT_EXAMPLE.replace('"tap5"]', '"tap5", "pressure"]') + """
[actuation]
channel = "pressure"
unit = "kPa"
per_code = 0.02
offset_code = 100
"""


def test_actuation_table():
    rig = parse_rig(ACTUATED)
    act = rig.actuation
    assert (act.channel, act.index, act.unit, act.per_code, act.offset_code) == ("pressure", 6, "kPa", 0.02, 100.0)
    # the actuation channel is recorded, not a tap: the divider reads channels 0..5 only
    assert rig.tap_channels.tolist() == [0, 1, 2, 3, 4, 5] and act.index not in rig.tap_channels
    codes = np.zeros((2, 7), dtype=np.uint16)
    codes[:, 6] = [100, 600]
    # value = (code - offset_code) * per_code (the README's rig file section, [actuation]): 0 and 500 * 0.02 = 10 kPa
    np.testing.assert_allclose(act.value(codes), [0.0, 10.0])


@pytest.mark.parametrize(
    "old, new, words",
    [
        ('channel = "pressure"', 'channel = "force"', "channel 'force' is not among [readout] channels"),
        ('channel = "pressure"', 'channel = "tap2"', "channel 'tap2' is a tap of the divider"),
        ('channel = "pressure"\n', "", "missing key channel"),
        ("per_code = 0.02", "per_code = 0", "per_code must not be 0"),
        ("per_code = 0.02", "per_code = nan", "per_code must be a finite number"),
        ("per_code = 0.02\n", "", "missing key per_code"),
        ("offset_code = 100", "offset_code = 1e300", "offset_code must be -1e+06 .. 1e+06 codes"),
        ('unit = "kPa"', "unit = 3", "unit must be text"),
    ],
)
def test_bad_actuation(old, new, words):
    with pytest.raises(RigError) as info:
        parse_rig(ACTUATED.replace(old, new), source="a.toml")
    msg = str(info.value)
    assert msg.startswith("a.toml: [actuation]") and words in msg, msg
