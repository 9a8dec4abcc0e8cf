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
    # the example of CONTRACTS.md section 3, verbatim
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
