"""Label grammar: the one definition of what a label may say and what it states.

A label marks an interval of a recording. Some labels state a reference:

Shape references (jig holds for the curvature calibration), read by :func:`parse_label`:

- ``flat`` -> 0 1/m
- ``radius=25mm`` -> 1 / 0.025 m = 40 1/m; units ``mm``, ``cm`` or ``m``; a
  negative radius bends the other way.
- ``curvature=40/m`` -> 40 1/m; units ``/m`` (or ``1/m``), ``/cm``, ``/mm``;
  negative allowed.

Force references (force calibration holds), read by :func:`parse_force_label`:

- ``force=1.2N``, ``force=0N``, ``force=-0.4N``, ``force=350mN``: a known force
  at the sensor's far end along +y of the base frame, newtons.

Case and spaces around ``=`` and before the unit do not matter. Any other text
is a plain label and states nothing (``None``), except text that starts like a
reference (``radius=``, ``curvature=``, ``force=``) but cannot be read, or
states an absurd value, which raises :class:`LabelError` naming the label
rather than being dropped silently.

Bounds: ``|curvature| <= MAX_CURVATURE_PER_M`` (a radius of at least 0.1 mm),
``|force| <= MAX_FORCE_N``.

Every label must also fit a recording (:func:`check_label_text`): not empty,
at most :data:`LABEL_BYTES` bytes of UTF-8, no line breaks or other control
characters.

Threads: pure functions, any thread.
"""
from __future__ import annotations

import math
import re
import unicodedata

from acquire.errors import UserError

__all__ = [
    "LabelError",
    "LABEL_BYTES",
    "MAX_CURVATURE_PER_M",
    "MAX_FORCE_N",
    "parse_label",
    "parse_force_label",
    "parse_hold_label",
    "check_label_text",
    "check_curvature",
]

#: fixed length of the label field in recordings (HDF5 fixed-length UTF-8)
LABEL_BYTES = 128
#: largest reference curvature, 1/m: a radius of 0.1 mm; beyond it a label is a typo
MAX_CURVATURE_PER_M = 1.0e4
#: largest reference force, N: far beyond any soft finger (common practice, no source)
MAX_FORCE_N = 1.0e3

_NUM = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_RADIUS = re.compile(rf"^radius\s*=\s*({_NUM})\s*(mm|cm|m)$", re.IGNORECASE)
_CURV = re.compile(rf"^curvature\s*=\s*({_NUM})\s*(?:1\s*)?/\s*(mm|cm|m)$", re.IGNORECASE)
_FORCE = re.compile(rf"^force\s*=\s*({_NUM})\s*(mN|N)$", re.IGNORECASE)
_SHAPE_START = re.compile(r"^(radius|curvature)\s*=", re.IGNORECASE)
_FORCE_START = re.compile(r"^force\s*=", re.IGNORECASE)
_TO_M = {"mm": 1e-3, "cm": 1e-2, "m": 1.0}
_SHAPE_HINT = "write e.g. flat, radius=25mm, radius=-2.5cm or curvature=40/m"


class LabelError(UserError):
    """A label cannot be stored, or looks like a reference but cannot be read."""


def check_curvature(value: float, *, what: str) -> float:
    """``value`` (1/m) if finite and within :data:`MAX_CURVATURE_PER_M`; else LabelError naming ``what``."""
    if not math.isfinite(value) or abs(value) > MAX_CURVATURE_PER_M:
        raise LabelError(
            f"{what}: curvature {value:g} 1/m is beyond +-{MAX_CURVATURE_PER_M:g} 1/m "
            f"(a radius under 0.1 mm); a typo?"
        )
    return float(value)


def parse_label(text: str) -> float | None:
    """Uniform reference curvature a label states, 1/m, or None if it states no shape.

    Raises
    ------
    LabelError
        The label starts with ``radius=`` or ``curvature=`` but is not
        readable, states a zero radius, or a curvature beyond the bound.
    """
    t = str(text).strip()
    if t.lower() == "flat":
        return 0.0
    what = f"label {text!r}"
    m = _RADIUS.match(t)
    if m:
        radius_m = float(m.group(1)) * _TO_M[m.group(2).lower()]
        if radius_m == 0 or not math.isfinite(radius_m):
            raise LabelError(f"{what}: radius must be a non-zero number")
        return check_curvature(1.0 / radius_m, what=what)
    m = _CURV.match(t)
    if m:
        return check_curvature(float(m.group(1)) / _TO_M[m.group(2).lower()], what=what)
    if _SHAPE_START.match(t):
        raise LabelError(f"{what}: cannot read it as a reference ({_SHAPE_HINT})")
    return None


def parse_force_label(text: str) -> float | None:
    """Force a label states, N (``force=1.2N``, ``force=350mN``), or None if it states none.

    Raises
    ------
    LabelError
        The label starts with ``force=`` but is not readable or states a
        force beyond :data:`MAX_FORCE_N`.
    """
    t = str(text).strip()
    m = _FORCE.match(t)
    if m:
        value = float(m.group(1)) * (1e-3 if m.group(2).lower() == "mn" else 1.0)
        if not math.isfinite(value) or abs(value) > MAX_FORCE_N:
            raise LabelError(f"label {text!r}: force {value:g} N is beyond +-{MAX_FORCE_N:g} N; a typo?")
        return value
    if _FORCE_START.match(t):
        raise LabelError(f"label {text!r}: cannot read it as a force (write e.g. force=1.2N, force=350mN, force=0N)")
    return None


def parse_hold_label(text: str) -> float:
    """Curvature (1/m) of a label that must state a shape, as a jig hold does.

    Raises
    ------
    LabelError
        The label states no shape, or :func:`parse_label` refuses it.
    """
    value = parse_label(text)
    if value is None:
        raise LabelError(f"label {text!r} states no shape ({_SHAPE_HINT})")
    return value


def check_label_text(text: str) -> bytes:
    """UTF-8 bytes of a label that a recording can hold; refuses what it cannot.

    Refused: empty (after stripping spaces), more than :data:`LABEL_BYTES`
    bytes of UTF-8, line breaks or other control characters (Unicode
    categories Cc, Zl, Zp: they break one-line messages and tables), and text that starts like a
    reference but cannot be read (:func:`parse_label`, :func:`parse_force_label`).

    Raises
    ------
    LabelError
        One line naming the label.
    """
    if not isinstance(text, str):
        raise LabelError(f"label {text!r}: must be text")
    if not text.strip():
        raise LabelError("label is empty")
    bad = next((c for c in text if unicodedata.category(c) in ("Cc", "Zl", "Zp")), None)
    if bad is not None:
        raise LabelError(f"label {text[:40]!r}: holds control character U+{ord(bad):04X}; labels are one line of text")
    try:
        data = text.encode("utf-8")
    except UnicodeEncodeError:
        raise LabelError(f"label {text[:40]!r}: not valid Unicode text") from None
    if len(data) > LABEL_BYTES:
        raise LabelError(
            f"label {text[:30]!r}... is {len(data)} bytes of UTF-8; labels hold at most {LABEL_BYTES}"
        )
    parse_label(text)
    parse_force_label(text)
    return data
