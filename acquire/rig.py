"""The rig file (TOML): what the sensor is and how it is read out.

Millimetres in the file, SI units in :class:`Rig`. Every problem found while
loading raises :class:`RigError` naming the file and the key at fault.
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

__all__ = ["Rig", "RigError", "load_rig", "parse_rig", "default_rig_text", "READOUT_KINDS"]

READOUT_KINDS = ("divider",)
_TAP = re.compile(r"^tap(\d+)$")


class RigError(UserError):
    """The rig file is unreadable or holds a wrong value."""


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


def _num(table: dict, key: str, where: str, *, default=None, positive=False, nonneg=False) -> float:
    if key not in table:
        if default is None:
            raise RigError(f"{where}: missing key {key}")
        return float(default)
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise RigError(f"{where}: {key} must be a number, got {value!r}")
    if positive and value <= 0:
        raise RigError(f"{where}: {key} must be positive, got {value!r}")
    if nonneg and value < 0:
        raise RigError(f"{where}: {key} must not be negative, got {value!r}")
    return float(value)


def _table(doc: dict, name: str, source: str, *, required: bool) -> dict:
    if name not in doc:
        if required:
            raise RigError(f"{source}: missing table [{name}]")
        return {}
    if not isinstance(doc[name], dict):
        raise RigError(f"{source}: [{name}] must be a table")
    return doc[name]


def parse_rig(text: str, *, source: str = "<rig>") -> Rig:
    """Parse rig TOML text; see :func:`load_rig`."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RigError(f"{source}: not valid TOML ({exc})") from None

    sensor = _table(doc, "sensor", source, required=True)
    readout = _table(doc, "readout", source, required=True)
    filters = _table(doc, "filters", source, required=False)
    body = _table(doc, "body", source, required=False)

    where = f"{source}: [sensor]"
    lengths = sensor.get("segment_lengths_mm")
    if lengths is None:
        raise RigError(f"{where}: missing key segment_lengths_mm")
    if not isinstance(lengths, list) or not lengths:
        raise RigError(f"{where}: segment_lengths_mm must be a non-empty list of numbers")
    for i, v in enumerate(lengths):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise RigError(f"{where}: segment_lengths_mm[{i}] must be a number, got {v!r}")
        if v <= 0:
            raise RigError(f"{where}: segment_lengths_mm[{i}] must be positive, got {v!r}")
    seg_m = np.asarray(lengths, dtype=np.float64) * 1e-3
    name = sensor.get("name", "")
    if not isinstance(name, str):
        raise RigError(f"{where}: name must be text")
    ohm_range = sensor.get("segment_ohm_range", [100.0, 1.0e6])
    if (
        not isinstance(ohm_range, list)
        or len(ohm_range) != 2
        or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in ohm_range)
        or not 0 < ohm_range[0] < ohm_range[1]
    ):
        raise RigError(f"{where}: segment_ohm_range must be [low, high] with 0 < low < high")

    where = f"{source}: [readout]"
    kind = readout.get("kind")
    if kind is None:
        raise RigError(f"{where}: missing key kind")
    if kind not in READOUT_KINDS:
        raise RigError(f"{where}: kind {kind!r} is not known (known: {', '.join(READOUT_KINDS)})")
    r_ref = _num(readout, "r_ref_ohm", where, positive=True)
    excitation_v = _num(readout, "excitation_v", where, positive=True) if "excitation_v" in readout else None
    channels = readout.get("channels")
    if channels is None:
        raise RigError(f"{where}: missing key channels")
    if not isinstance(channels, list) or not channels or not all(isinstance(c, str) and c for c in channels):
        raise RigError(f"{where}: channels must be a non-empty list of names")
    if len(set(channels)) != len(channels):
        raise RigError(f"{where}: channels names a channel twice")
    n_seg = len(seg_m)
    tap_channels = np.full(n_seg, -1, dtype=np.int64)
    for ch, label in enumerate(channels):
        m = _TAP.match(label)
        if not m:
            continue
        k = int(m.group(1))
        if tap_channels[k] >= 0 if k < n_seg else False:
            raise RigError(f"{where}: channels names tap {k} twice ({channels[tap_channels[k]]!r} and {label!r})")
        if k >= n_seg:
            raise RigError(
                f"{where}: channel {label!r} names tap {k}, but [sensor] has {n_seg} segments "
                f"(taps 0..{n_seg - 1} are measured; tap {n_seg} is ground)"
            )
        tap_channels[k] = ch
    missing = [f"tap{k}" for k in range(n_seg) if tap_channels[k] < 0]
    if missing:
        raise RigError(
            f"{where}: channels has no {', '.join(missing)}: a divider with {n_seg} segments "
            f"needs channels tap0..tap{n_seg - 1}"
        )
    scales = readout.get("scales", {})
    if not isinstance(scales, dict):
        raise RigError(f"{where}: scales must be a table")
    for key, spec in scales.items():
        if key not in channels:
            raise RigError(f"{where}: scales.{key} names no channel")
        if not isinstance(spec, dict):
            raise RigError(f"{where}: scales.{key} must be a table with gain, offset, unit")
        _num(spec, "gain", f"{where} scales.{key}", default=1.0)
        _num(spec, "offset", f"{where} scales.{key}", default=0.0)

    where = f"{source}: [filters]"
    spike = filters.get("spike_window", 5)
    if isinstance(spike, bool) or not isinstance(spike, int) or spike < 1 or spike % 2 == 0:
        raise RigError(f"{where}: spike_window must be an odd whole number >= 1, got {spike!r}")
    lowpass_hz = _num(filters, "lowpass_hz", where, default=25.0, nonneg=True)
    order = filters.get("lowpass_order", 2)
    if isinstance(order, bool) or not isinstance(order, int) or not 1 <= order <= 8:
        raise RigError(f"{where}: lowpass_order must be a whole number 1..8, got {order!r}")

    where = f"{source}: [body]"
    above = _num(body, "thickness_above_mm", where, default=0.0, nonneg=True) * 1e-3
    below = _num(body, "thickness_below_mm", where, default=0.0, nonneg=True) * 1e-3
    tip = _num(body, "tip_length_mm", where, default=0.0, nonneg=True) * 1e-3
    tip_mode = body.get("tip_mode", "rigid")
    if tip_mode not in ("rigid", "continue"):
        raise RigError(f"{where}: tip_mode must be \"rigid\" or \"continue\", got {tip_mode!r}")

    warnings = []
    known = {
        "sensor": {"segment_lengths_mm", "name", "segment_ohm_range"},
        "readout": {"kind", "r_ref_ohm", "channels", "scales", "excitation_v"},
        "filters": {"spike_window", "lowpass_hz", "lowpass_order"},
        "body": {"thickness_above_mm", "thickness_below_mm", "tip_length_mm", "tip_mode"},
    }
    for table, value in doc.items():
        if table not in known:
            warnings.append(f"{source}: table [{table}] is not one tapcurve reads (misspelt?)")
            continue
        for key in value:
            if key not in known[table]:
                warnings.append(f"{source}: [{table}] {key} is not a key tapcurve reads (misspelt?); ignored")

    return Rig(
        warnings=tuple(warnings),
        source=source,
        text=text,
        name=name,
        segment_lengths_m=seg_m,
        readout_kind=kind,
        r_ref_ohm=r_ref,
        channels=tuple(channels),
        tap_channels=tap_channels,
        segment_ohm_range=(float(ohm_range[0]), float(ohm_range[1])),
        spike_window=int(spike),
        lowpass_hz=lowpass_hz,
        lowpass_order=int(order),
        thickness_above_m=above,
        thickness_below_m=below,
        tip_length_m=tip,
        tip_mode=tip_mode,
        channel_scales={k: dict(v) for k, v in scales.items()},
        excitation_v=excitation_v,
    )
