"""The rig file (TOML): what the sensor is and how it is read out.

Millimetres in the file, SI units in :class:`Rig`. Every problem found while
loading raises :class:`RigError` naming the file, the key and, for a value out
of range, the bound. Every numeric key has a documented range (:data:`BOUNDS`);
NaN and infinities are refused everywhere.

Optional tables besides ``[sensor]`` and ``[readout]``: ``[filters]``,
``[body]``, ``[markers]`` (camera markers: ``s_mm`` arc lengths, increasing,
within the sensor; ``offset_mm`` distances from the sensor line along +y,
default 0; without the table one marker per tap, S + 1 of them) and
``[actuation]`` (``channel`` among ``[readout] channels``, not a tap; ``unit``
text; ``per_code`` unit per ADC code, not 0; ``offset_code`` the code that
reads zero).
"""
from __future__ import annotations

import hashlib
import math
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

from acquire.errors import UserError

__all__ = ["Rig", "RigError", "Actuation", "load_rig", "parse_rig", "default_rig_text", "READOUT_KINDS", "BOUNDS"]

READOUT_KINDS = ("divider",)
_TAP = re.compile(r"^tap(\d+)$")

#: documented range of every numeric key, ``"table.key": (low, high, unit)``,
#: both ends allowed. Wide enough for any bench rig, narrow enough that a typo
#: (a length in micrometres, an extra zero group) is caught here, not later as
#: a traceback or a calculation that runs for minutes (common practice, no source).
BOUNDS = {
    "sensor.segment_lengths_mm": (1.0, 2000.0, "mm"),
    "sensor.segment_ohm_range": (0.01, 1.0e9, "ohm"),
    "readout.r_ref_ohm": (1.0, 1.0e9, "ohm"),
    "readout.excitation_v": (0.1, 60.0, "V"),
    "readout.scales.gain": (-1.0e9, 1.0e9, ""),
    "readout.scales.offset": (-1.0e9, 1.0e9, ""),
    "filters.spike_window": (1, 101, "frames"),
    "filters.lowpass_hz": (0.0, 1.0e5, "Hz"),
    "filters.lowpass_order": (1, 8, ""),
    "body.thickness_above_mm": (0.0, 200.0, "mm"),
    "body.thickness_below_mm": (0.0, 200.0, "mm"),
    "body.tip_length_mm": (0.0, 2000.0, "mm"),
    "markers.offset_mm": (-200.0, 200.0, "mm"),
    "actuation.per_code": (-1.0e9, 1.0e9, "unit per code"),
    "actuation.offset_code": (-1.0e6, 1.0e6, "codes"),
}
#: a samples packet of wire protocol v1 holds at most 255 channels
MAX_CHANNELS = 255
MAX_MARKERS = 256
MAX_TEXT = 200

_KNOWN = {
    "sensor": {"segment_lengths_mm", "name", "segment_ohm_range"},
    "readout": {"kind", "r_ref_ohm", "channels", "scales", "excitation_v"},
    "filters": {"spike_window", "lowpass_hz", "lowpass_order"},
    "body": {"thickness_above_mm", "thickness_below_mm", "tip_length_mm", "tip_mode"},
    "markers": {"s_mm", "offset_mm"},
    "actuation": {"channel", "unit", "per_code", "offset_code"},
}


class RigError(UserError):
    """The rig file is unreadable or holds a wrong value."""


@dataclass(frozen=True)
class Actuation:
    """The recorded actuation input (``[actuation]``).

    Attributes
    ----------
    channel : str
        Its name in ``[readout] channels``.
    index : int
        Its channel index (a column of the ADC frames; never a tap).
    unit : str
        Text shown beside values.
    per_code, offset_code : float
        ``value = (code - offset_code) * per_code``, in ``unit``.
    """

    channel: str
    index: int
    unit: str
    per_code: float
    offset_code: float

    def value(self, codes) -> np.ndarray:
        """Actuation in :attr:`unit` from frames ``codes`` (N, C) -> (N,), new float64 array."""
        c = np.asarray(codes)[..., self.index].astype(np.float64)
        return (c - self.offset_code) * self.per_code


@dataclass(frozen=True, eq=False)
class Rig:
    """A loaded rig file.

    Attributes
    ----------
    segment_lengths_m : ndarray of float64, shape (S,)
        Tap k to tap k+1, base first.
    channels : tuple of str
        What channel k measures (``tapK`` or another name such as ``pressure``).
    tap_channels : ndarray of int, shape (S,)
        Channel index that measures tap k, k = 0 .. S-1.
    markers_s_m, markers_offset_m : ndarray of float64, shape (K,)
        Camera markers: arc length from the base, m, and distance from the
        sensor line along +y, m. Default: one per tap (K = S + 1), offset 0.
    markers_given : bool
        The file has a ``[markers]`` table.
    actuation : Actuation or None
        The ``[actuation]`` table.
    text : str
        The file's text as read (stored in recordings).
    """

    source: str
    text: str
    name: str
    segment_lengths_m: np.ndarray
    readout_kind: str
    r_ref_ohm: float
    channels: tuple[str, ...]
    tap_channels: np.ndarray
    segment_ohm_range: tuple[float, float]
    spike_window: int
    lowpass_hz: float
    lowpass_order: int
    thickness_above_m: float
    thickness_below_m: float
    tip_length_m: float
    tip_mode: str
    channel_scales: dict = field(default_factory=dict)
    excitation_v: float | None = None
    warnings: tuple[str, ...] = ()
    markers_s_m: np.ndarray | None = None
    markers_offset_m: np.ndarray | None = None
    markers_given: bool = False
    actuation: Actuation | None = None

    def __post_init__(self):
        if self.markers_s_m is None:
            taps = np.concatenate([[0.0], np.cumsum(self.segment_lengths_m)])
            object.__setattr__(self, "markers_s_m", taps)
        if self.markers_offset_m is None:
            object.__setattr__(self, "markers_offset_m", np.zeros_like(self.markers_s_m))

    @property
    def n_segments(self) -> int:
        return int(self.segment_lengths_m.shape[0])

    @property
    def n_channels(self) -> int:
        return len(self.channels)

    @property
    def sensor_length_m(self) -> float:
        return float(self.segment_lengths_m.sum())

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.text.encode("utf-8")).hexdigest()

    def check_device(self, *, channels: int, where: str = "device") -> None:
        """Raise :class:`RigError` if the device's channel count disagrees with the rig."""
        if int(channels) != self.n_channels:
            raise RigError(
                f"{self.source}: [readout] channels lists {self.n_channels} channels "
                f"but the {where} sends {channels}"
            )


def default_rig_text() -> str:
    """Text of the built-in demo rig (the virtual finger's)."""
    return (Path(__file__).resolve().parent / "rigs" / "demo_finger.toml").read_text(encoding="utf-8")


def load_rig(path: str | Path | None, *, warn=None) -> Rig:
    """Load a rig file; ``None`` gives the built-in demo rig.

    Keys and tables tapcurve does not read (misspelt ones, most likely) are
    reported on ``warn`` (default: stderr), one line each, and ignored.

    Raises
    ------
    RigError
        File missing or unreadable, broken TOML, or a wrong value.
    """
    if path is None:
        return parse_rig(default_rig_text(), source="built-in demo rig")
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise RigError(f"{p}: rig file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise RigError(f"{p}: cannot read rig file ({exc})") from None
    rig = parse_rig(text, source=str(p))
    for line in rig.warnings:
        print(f"tapcurve: warning: {line}", file=warn or sys.stderr)
    return rig


# ----------------------------------------------------------------------------- value checks

def _bounded(value, key: str, where: str, bound: str, *, integer: bool = False, nonzero: bool = False) -> float:
    """``value`` checked against ``BOUNDS[bound]``; ``key`` is how the message names it."""
    low, high, unit = BOUNDS[bound]
    kind = "whole number" if integer else "number"
    if isinstance(value, bool) or not isinstance(value, (int, float)) or (integer and not isinstance(value, int)):
        raise RigError(f"{where}: {key} must be a {kind}, got {value!r}")
    if not math.isfinite(value):
        raise RigError(f"{where}: {key} must be a finite number, got {value!r}")
    if not low <= value <= high:
        sign = "positive, " if value <= 0 < low else ""
        raise RigError(f"{where}: {key} must be {sign}{low:g} .. {high:g}{' ' + unit if unit else ''}, got {value!r}")
    if nonzero and value == 0:
        raise RigError(f"{where}: {key} must not be 0")
    return value


def _num(table: dict, key: str, where: str, bound: str, *, default=None, integer=False, nonzero=False):
    if key not in table:
        if default is None:
            raise RigError(f"{where}: missing key {key}")
        return default
    return _bounded(table[key], key, where, bound, integer=integer, nonzero=nonzero)


def _text(table: dict, key: str, where: str, *, default: str | None = None) -> str:
    if key not in table:
        if default is None:
            raise RigError(f"{where}: missing key {key}")
        return default
    value = table[key]
    if not isinstance(value, str):
        raise RigError(f"{where}: {key} must be text, got {value!r}")
    if len(value) > MAX_TEXT or any(ord(c) < 32 or ord(c) == 127 for c in value):
        raise RigError(f"{where}: {key} must be one line of at most {MAX_TEXT} characters")
    return value


def _num_list(table: dict, key: str, where: str, bound: str, *, min_len: int = 1, max_len: int) -> list:
    values = table.get(key)
    if values is None:
        raise RigError(f"{where}: missing key {key}")
    if not isinstance(values, list) or not min_len <= len(values) <= max_len:
        raise RigError(f"{where}: {key} must be a list of {min_len} .. {max_len} numbers")
    return [_bounded(v, f"{key}[{i}]", where, bound) for i, v in enumerate(values)]


def _table(doc: dict, name: str, source: str, *, required: bool) -> dict:
    if name not in doc:
        if required:
            raise RigError(f"{source}: missing table [{name}]")
        return {}
    if not isinstance(doc[name], dict):
        raise RigError(f"{source}: [{name}] must be a table")
    return doc[name]


# ----------------------------------------------------------------------------- tables

def _sensor(sensor: dict, where: str) -> dict:
    lengths = _num_list(sensor, "segment_lengths_mm", where, "sensor.segment_lengths_mm", max_len=MAX_CHANNELS - 1)
    name = _text(sensor, "name", where, default="")
    ohm_range = sensor.get("segment_ohm_range", [100.0, 1.0e6])
    if not isinstance(ohm_range, list) or len(ohm_range) != 2:
        raise RigError(f"{where}: segment_ohm_range must be [low, high] with 0 < low < high")
    lo, hi = (_bounded(v, f"segment_ohm_range[{i}]", where, "sensor.segment_ohm_range") for i, v in enumerate(ohm_range))
    if not lo < hi:
        raise RigError(f"{where}: segment_ohm_range must be [low, high] with 0 < low < high, got {ohm_range!r}")
    return {"segment_lengths_m": np.asarray(lengths, dtype=np.float64) * 1e-3, "name": name,
            "segment_ohm_range": (float(lo), float(hi))}


def _channels(readout: dict, where: str) -> list[str]:
    channels = readout.get("channels")
    if channels is None:
        raise RigError(f"{where}: missing key channels")
    if not isinstance(channels, list) or not channels or not all(isinstance(c, str) and c for c in channels):
        raise RigError(f"{where}: channels must be a non-empty list of names")
    if len(channels) > MAX_CHANNELS:
        raise RigError(f"{where}: channels lists {len(channels)} channels; a device sends at most {MAX_CHANNELS}")
    if len(set(channels)) != len(channels):
        raise RigError(f"{where}: channels names a channel twice")
    for c in channels:
        _text({"channels": c}, "channels", where)
    return channels


def _tap_channels(channels: list[str], n_seg: int, where: str) -> np.ndarray:
    tap_channels = np.full(n_seg, -1, dtype=np.int64)
    for ch, label in enumerate(channels):
        m = _TAP.match(label)
        if not m:
            continue
        k = int(m.group(1))
        if k >= n_seg:
            raise RigError(
                f"{where}: channel {label!r} names tap {k}, but [sensor] has {n_seg} segments "
                f"(taps 0..{n_seg - 1} are measured; tap {n_seg} is ground)"
            )
        if tap_channels[k] >= 0:
            raise RigError(f"{where}: channels names tap {k} twice ({channels[tap_channels[k]]!r} and {label!r})")
        tap_channels[k] = ch
    missing = [f"tap{k}" for k in range(n_seg) if tap_channels[k] < 0]
    if missing:
        raise RigError(
            f"{where}: channels has no {', '.join(missing)}: a divider with {n_seg} segments "
            f"needs channels tap0..tap{n_seg - 1}"
        )
    return tap_channels


def _scales(readout: dict, channels: list[str], where: str) -> dict:
    scales = readout.get("scales", {})
    if not isinstance(scales, dict):
        raise RigError(f"{where}: scales must be a table")
    for key, spec in scales.items():
        if key not in channels:
            raise RigError(f"{where}: scales.{key} names no channel")
        if not isinstance(spec, dict):
            raise RigError(f"{where}: scales.{key} must be a table with gain, offset, unit")
        _num(spec, "gain", f"{where} scales.{key}", "readout.scales.gain", default=1.0, nonzero=True)
        _num(spec, "offset", f"{where} scales.{key}", "readout.scales.offset", default=0.0)
    return {k: dict(v) for k, v in scales.items()}


def _readout(readout: dict, n_seg: int, where: str) -> dict:
    kind = readout.get("kind")
    if kind is None:
        raise RigError(f"{where}: missing key kind")
    if kind not in READOUT_KINDS:
        raise RigError(f"{where}: kind {kind!r} is not known (known: {', '.join(READOUT_KINDS)})")
    channels = _channels(readout, where)
    excitation = readout.get("excitation_v")
    return {
        "readout_kind": kind,
        "r_ref_ohm": float(_num(readout, "r_ref_ohm", where, "readout.r_ref_ohm")),
        "excitation_v": None if excitation is None else float(_num(readout, "excitation_v", where, "readout.excitation_v")),
        "channels": tuple(channels),
        "tap_channels": _tap_channels(channels, n_seg, where),
        "channel_scales": _scales(readout, channels, where),
    }


def _filters(filters: dict, where: str) -> dict:
    spike = _num(filters, "spike_window", where, "filters.spike_window", default=5, integer=True)
    if spike % 2 == 0:
        raise RigError(f"{where}: spike_window must be odd (1 = off), got {spike!r}")
    return {
        "spike_window": int(spike),
        "lowpass_hz": float(_num(filters, "lowpass_hz", where, "filters.lowpass_hz", default=25.0)),
        "lowpass_order": int(_num(filters, "lowpass_order", where, "filters.lowpass_order", default=2, integer=True)),
    }


def _body(body: dict, where: str) -> dict:
    tip_mode = body.get("tip_mode", "rigid")
    if tip_mode not in ("rigid", "continue"):
        raise RigError(f"{where}: tip_mode must be \"rigid\" or \"continue\", got {tip_mode!r}")
    return {
        "thickness_above_m": float(_num(body, "thickness_above_mm", where, "body.thickness_above_mm", default=0.0)) * 1e-3,
        "thickness_below_m": float(_num(body, "thickness_below_mm", where, "body.thickness_below_mm", default=0.0)) * 1e-3,
        "tip_length_m": float(_num(body, "tip_length_mm", where, "body.tip_length_mm", default=0.0)) * 1e-3,
        "tip_mode": tip_mode,
    }


def _markers(markers: dict | None, length_mm: float, where: str) -> dict:
    if markers is None:
        return {}
    s = markers.get("s_mm")
    if not isinstance(s, list) or not 2 <= len(s) <= MAX_MARKERS:
        raise RigError(f"{where}: s_mm must be a list of 2 .. {MAX_MARKERS} arc lengths, mm")
    for i, v in enumerate(s):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise RigError(f"{where}: s_mm[{i}] must be a finite number, got {v!r}")
        if not 0.0 <= v <= length_mm * (1 + 1e-12):
            raise RigError(f"{where}: s_mm[{i}] must be 0 .. {length_mm:g} mm (the sensor's length), got {v!r}")
        if i and not v > s[i - 1]:
            raise RigError(f"{where}: s_mm must increase, but s_mm[{i}] = {v!r} follows {s[i - 1]!r}")
    offsets = [0.0] * len(s)
    if "offset_mm" in markers:
        offsets = _num_list(markers, "offset_mm", where, "markers.offset_mm", max_len=MAX_MARKERS)
        if len(offsets) != len(s):
            raise RigError(f"{where}: offset_mm has {len(offsets)} values, s_mm has {len(s)}")
    return {"markers_s_m": np.asarray(s, dtype=np.float64) * 1e-3,
            "markers_offset_m": np.asarray(offsets, dtype=np.float64) * 1e-3, "markers_given": True}


def _actuation(act: dict | None, channels: tuple[str, ...], where: str) -> dict:
    if act is None:
        return {}
    name = _text(act, "channel", where)
    if name not in channels:
        raise RigError(f"{where}: channel {name!r} is not among [readout] channels ({', '.join(channels)})")
    if _TAP.match(name):
        raise RigError(f"{where}: channel {name!r} is a tap of the divider; the actuation needs a channel of its own")
    return {"actuation": Actuation(
        channel=name,
        index=channels.index(name),
        unit=_text(act, "unit", where, default=""),
        per_code=float(_num(act, "per_code", where, "actuation.per_code", nonzero=True)),
        offset_code=float(_num(act, "offset_code", where, "actuation.offset_code", default=0.0)),
    )}


def _unknown_keys(doc: dict, source: str) -> tuple[str, ...]:
    warnings = []
    for table, value in doc.items():
        if table not in _KNOWN:
            warnings.append(f"{source}: table [{table}] is not one tapcurve reads (misspelt?)")
            continue
        for key in value:
            if key not in _KNOWN[table]:
                warnings.append(f"{source}: [{table}] {key} is not a key tapcurve reads (misspelt?); ignored")
    return tuple(warnings)


def parse_rig(text: str, *, source: str = "<rig>") -> Rig:
    """Parse rig TOML text; see :func:`load_rig`."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RigError(f"{source}: not valid TOML ({exc})") from None
    tables = {name: _table(doc, name, source, required=name in ("sensor", "readout")) for name in _KNOWN}
    sensor = _sensor(tables["sensor"], f"{source}: [sensor]")
    n_seg = len(sensor["segment_lengths_m"])
    readout = _readout(tables["readout"], n_seg, f"{source}: [readout]")
    length_mm = float(sensor["segment_lengths_m"].sum()) * 1e3
    return Rig(
        source=source,
        text=text,
        warnings=_unknown_keys(doc, source),
        **sensor,
        **readout,
        **_filters(tables["filters"], f"{source}: [filters]"),
        **_body(tables["body"], f"{source}: [body]"),
        **_markers(tables["markers"] if "markers" in doc else None, length_mm, f"{source}: [markers]"),
        **_actuation(tables["actuation"] if "actuation" in doc else None, readout["channels"], f"{source}: [actuation]"),
    )
