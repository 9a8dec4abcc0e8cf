"""One label grammar: recording labels, calibration references and the virtual finger's jig holds agree.

The grammar is the contract's (the README's commands and calibration sections: ``flat``, ``radius=25mm``,
``curvature=40/m``, negative values allowed; section 8: ``force=1.2N``,
``force=0N``, ``force=-0.4N``, ``force=350mN``). Expected values are plane
geometry (curvature = 1 / radius) and SI prefixes (1 mN = 1e-3 N, 1 cm = 1e-2 m).
"""
from __future__ import annotations

import argparse

import pytest

from acquire.core import calibration
from acquire.core.labels import (
    LABEL_BYTES,
    LabelError,
    check_label_text,
    parse_force_label,
    parse_hold_label,
    parse_label,
)
from acquire.errors import UserError
from acquire.rig import load_rig
from acquire.store import recording
from acquire.virtual import model as virtual_model
from acquire.virtual.cli import add_finger_arguments, finger_settings_from_args

# shape labels every reader must accept, with the curvature they state (1/m)
SHAPES = [
    ("flat", 0.0),
    ("FLAT", 0.0),
    ("  flat ", 0.0),
    ("radius=25mm", 40.0),
    ("radius=2.5cm", 40.0),
    ("radius=0.025m", 40.0),
    ("Radius = 25mm", 40.0),
    ("radius = -25 mm", -40.0),
    ("radius=-0.05m", -20.0),
    ("radius=1e2mm", 10.0),
    ("radius=0.1mm", 1.0e4),  # the bound itself
    ("curvature=40/m", 40.0),
    ("curvature=40 1/m", 40.0),
    ("curvature=-12.5/m", -12.5),
    ("CURVATURE=0.04/mm", 40.0),
    ("curvature=0.4/cm", 40.0),
    ("curvature=1e4/m", 1.0e4),
    ("curvature=0/m", 0.0),
]

# labels that start like a shape reference but cannot be used: refused everywhere
BAD_SHAPES = [
    "radius=25",  # no unit
    "radius=0mm",
    "radius=25 inch",
    "radius=0.09mm",  # beyond 1e4 1/m
    "radius=1e-300m",
    "curvature=forty/m",
    "curvature=1e9/m",
    "curvature=-1e5/m",
    "curvature=1e999/m",
    "curvature=nan/m",
    "radius=",
]

FORCES = [("force=1.2N", 1.2), ("force=0N", 0.0), ("force=-0.4N", -0.4), ("force=350mN", 0.35),
          ("Force = 2 n", 2.0), ("force=1e3N", 1.0e3)]
BAD_FORCES = ["force=1.2", "force=heavy", "force=1.2kg", "force=1e4N", "force=inf N"]


def hold_via_cli(label):
    """The virtual finger's --hold option, checked as `tapcurve live --hold` and `virtual-device` check it."""
    parser = argparse.ArgumentParser()
    add_finger_arguments(parser, title="finger")
    args = parser.parse_args(["--hold", label])
    return finger_settings_from_args(args, load_rig(None))["hold"]


@pytest.mark.parametrize("text, kappa", SHAPES)
def test_shape_labels_accepted_everywhere(text, kappa):
    assert parse_label(text) == pytest.approx(kappa, rel=1e-12)
    assert calibration.parse_label(text) == pytest.approx(kappa, rel=1e-12)
    assert check_label_text(text) == text.encode("utf-8")
    assert recording.check_label_text(text) == text.encode("utf-8")
    assert parse_hold_label(text) == pytest.approx(kappa, rel=1e-12)
    assert virtual_model.parse_hold_label(text) == pytest.approx(kappa, rel=1e-12)
    assert hold_via_cli(text) == text
    assert parse_force_label(text) is None


@pytest.mark.parametrize("text", BAD_SHAPES)
def test_bad_shape_labels_refused_everywhere(text):
    for check in (parse_label, calibration.parse_label, check_label_text, recording.check_label_text,
                  parse_hold_label, virtual_model.parse_hold_label, hold_via_cli):
        with pytest.raises(UserError) as info:
            check(text)
        msg = str(info.value)
        assert repr(text) in msg and "\n" not in msg, (check, msg)


@pytest.mark.parametrize("text", ["curvature=1e9/m", "radius=0.001mm"])
def test_absurd_curvature_names_the_label(text):
    with pytest.raises(LabelError) as info:
        parse_label(text)
    assert f"label {text!r}" in str(info.value) and "10000 1/m" in str(info.value)


@pytest.mark.parametrize("text, newtons", FORCES)
def test_force_labels(text, newtons):
    assert parse_force_label(text) == pytest.approx(newtons, rel=1e-12)
    assert check_label_text(text) == text.encode("utf-8")
    assert parse_label(text) is None  # a force hold says nothing about shape (the README's rig file section, [actuation])
    with pytest.raises(LabelError, match="states no shape"):
        parse_hold_label(text)


@pytest.mark.parametrize("text", BAD_FORCES)
def test_bad_force_labels(text):
    for check in (parse_force_label, check_label_text):
        with pytest.raises(LabelError) as info:
            check(text)
        assert repr(text) in str(info.value)


@pytest.mark.parametrize("text", ["squeeze test", "grasp 3", "radiusless", "tomato, ripe"])
def test_plain_labels(text):
    # stored, but state no reference: the jig hold parser refuses them
    assert check_label_text(text) == text.encode("utf-8")
    assert parse_label(text) is None and parse_force_label(text) is None
    with pytest.raises(UserError, match="states no shape"):
        hold_via_cli(text)


@pytest.mark.parametrize(
    "text, words",
    [
        ("", "empty"),
        ("   ", "empty"),
        ("two\nlines", "U+000A"),
        ("tab\there", "U+0009"),
        ("bell\x07", "U+0007"),
        ("para\u2029graph", "U+2029"),
        ("x" * (LABEL_BYTES + 1), f"{LABEL_BYTES + 1} bytes"),
        ("\u00e9" * 65, "130 bytes"),  # 2 bytes each in UTF-8 (RFC 3629)
    ],
)
def test_label_text_refused(text, words):
    with pytest.raises(LabelError) as info:
        check_label_text(text)
    msg = str(info.value)
    assert words in msg and "\n" not in msg, msg


def test_recordings_use_the_one_label_check():
    assert recording.check_label_text is check_label_text


def test_label_length_limit_matches_the_recording_field():
    assert LABEL_BYTES == recording.LABEL_BYTES == 128
    assert check_label_text("\u00e9" * 64) == ("\u00e9" * 64).encode("utf-8")  # exactly 128 bytes


def test_label_error_is_a_user_error_and_shared():
    assert issubclass(LabelError, UserError)
    assert calibration.LabelError is LabelError
