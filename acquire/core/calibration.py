"""Calibration: segment resistance to segment mean curvature, fitted from labelled holds.

Reference labels
----------------
A labelled interval of a recording whose sensor was held at a known shape is a
*hold*. The label grammar (``flat``, ``radius=25mm``, ``curvature=40/m``) and
its bounds are :mod:`acquire.core.labels`; :func:`parse_label` and
:class:`LabelError` are re-exported here.

Reference table
---------------
Jigs that hold segments at different curvatures are described by a reference
table, a hand-written TOML file::

    # curvature of each segment in the jig, base segment first, 1/m
    [references]
    "jig A" = [40.0, 40.0, 20.0, 0.0, 0.0, 0.0]
    "jig B" = 25.0                  # one number: every segment
    "jig C" = ["radius=50mm", "radius=50mm", "flat", "flat", nan, nan]

or a CSV file with one row per label, ``label,seg0,seg1,...`` (a first row whose
first cell is ``label`` is a header; lines starting with ``#`` are comments).
Each entry is a number in 1/m or a reference label as above; ``nan`` marks a
segment the jig does not define (that segment ignores the hold). A table entry
wins over :func:`parse_label` for the same text.

Model
-----
Per segment, with ``R0`` the mean resistance of the flat holds (required) and
the relative change ``x = (R - R0) / R0``::

    curvature = c1 x + c2 x**2 + ... + cD x**D     for x >= 0 (coefficients "positive")
    curvature = d1 x + d2 x**2 + ... + dD x**D     for x <  0 (coefficients "negative")

fitted by least squares to the hold means, one point per hold, each side on its
own, because the two bend directions of a strip respond differently. Why this
model: it is zero at flat by construction (so re-taring only moves ``R0``), it
averages noise and hysteresis between repeated holds instead of threading
through them, it yields an honest residual, and a low degree (default 2) cannot
oscillate between holds. It must be increasing over the fitted range (positive
curvature raises resistance): the derivative is checked on a dense grid; a
non-monotone fit is refused (``on_non_monotone="refuse"``) or the degree is
lowered with a warning (default), down to a straight line, which is refused if
its slope is not positive. The degree on a side is at most the number of
distinct reference curvatures on it. A side without holds borrows the other
side's initial slope (warned). Beyond the fitted range of x the curve goes on
as a straight line with the slope at the edge (extrapolated, flagged by
:meth:`Calibration.evaluate`, never clipped).

Threads: everything here is pure computation on arguments and may run on any
thread; :class:`Calibration` is immutable. Returned arrays are new, owned by
the caller.
"""
from __future__ import annotations

import csv
import dataclasses
import hashlib
import importlib.metadata
import json
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Sequence

import numpy as np

from acquire.core.labels import MAX_CURVATURE_PER_M, LabelError, check_curvature, parse_label
from acquire.errors import UserError
from acquire.rig import BOUNDS, MAX_CHANNELS, Rig

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = [
    "CalibrationError",
    "LabelError",
    "parse_label",
    "load_reference_table",
    "reference_for",
    "steady_part",
    "Hold",
    "SegmentReport",
    "FitReport",
    "Calibration",
    "fit_calibration",
    "load_for_rig",
    "check_calibration_dict",
    "check_distinct_recordings",
    "software_version",
    "file_sha256",
    "MODEL_NAME",
    "FORMAT_NAME",
]

FORMAT_NAME = "tapcurve-calibration"
FORMAT_VERSION = 1
MODEL_NAME = "two-sided-polynomial"
RANGE_MARGIN = 0.02  # fraction of the calibrated span tolerated before flagging "outside"


class CalibrationError(UserError):
    """A calibration cannot be fitted, read or used with this rig."""


# ----------------------------------------------------------------------------- labels
# The label grammar lives in acquire.core.labels; parse_label and LabelError are
# re-exported here for code that imports them from this module.


def _entry(value, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise CalibrationError(f"{where}: {value!r} is not a curvature")
    text = value.strip() if isinstance(value, str) else None
    if text is not None and text.lower() in ("nan", ""):
        return math.nan
    try:
        k = float(value)
    except ValueError:
        try:
            k = parse_label(text)
        except LabelError as exc:
            raise CalibrationError(f"{where}: {exc}") from None
        if k is None:
            raise CalibrationError(f"{where}: {value!r} is neither a number (1/m) nor a reference label")
        return k
    if math.isnan(k):
        return k
    try:
        return check_curvature(k, what=where)
    except LabelError as exc:
        raise CalibrationError(str(exc)) from None


def load_reference_table(path: str | Path) -> dict[str, list[float]]:
    """Read a reference table (format in the module docstring).

    Returns
    -------
    dict
        Label -> list of per-segment curvatures, 1/m (NaN = not defined). A
        one-element list means every segment.

    Raises
    ------
    CalibrationError
        Missing file, broken TOML/CSV or an unreadable entry (message names the
        file and the label).
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise CalibrationError(f"{p}: reference table not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise CalibrationError(f"{p}: cannot read reference table ({exc})") from None
    table: dict[str, list[float]] = {}
    if p.suffix.lower() == ".csv":
        rows = [r for r in csv.reader(text.splitlines()) if r and not r[0].lstrip().startswith("#")]
        if rows and rows[0][0].strip().lower() == "label":
            rows = rows[1:]
        for line, row in enumerate(rows, 1):
            label = row[0].strip()
            cells = [c for c in row[1:] if c.strip() != ""] if len(row) > 1 else []
            if not label or not cells:
                raise CalibrationError(f"{p}: row {line} needs a label and at least one curvature")
            table[label] = [_entry(c, f"{p}: label {label!r}") for c in cells]
        return table
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CalibrationError(f"{p}: not valid TOML ({exc})") from None
    refs = doc.get("references")
    if not isinstance(refs, dict):
        raise CalibrationError(f"{p}: missing table [references]")
    for label, value in refs.items():
        where = f"{p}: [references] {label!r}"
        values = value if isinstance(value, list) else [value]
        if not values:
            raise CalibrationError(f"{where}: empty list")
        table[label] = [_entry(v, where) for v in values]
    return table


def reference_for(label: str, *, n_segments: int, table: dict[str, list[float]] | None = None) -> np.ndarray | None:
    """Per-segment reference curvature of a label, shape (S,) float64 1/m, or None.

    The table (if given) is looked up first, then :func:`parse_label`.

    Raises
    ------
    CalibrationError
        The table entry has neither 1 nor ``n_segments`` values.
    LabelError
        See :func:`parse_label`.
    """
    if table is not None and label in table:
        values = table[label]
        if len(values) == 1:
            return np.full(n_segments, float(values[0]))
        if len(values) != n_segments:
            raise CalibrationError(
                f"reference table: label {label!r} has {len(values)} values, the rig has {n_segments} segments"
            )
        return np.asarray(values, dtype=np.float64)
    k = parse_label(label)
    return None if k is None else np.full(n_segments, k)


# ----------------------------------------------------------------------------- steady part

def steady_part(
    t_s: np.ndarray,
    values: np.ndarray,
    t_start: float,
    t_end: float,
    *,
    trim_s: float = 0.25,
    window_s: float = 0.2,
    std_factor: float = 3.0,
) -> np.ndarray:
    """Frames of a labelled interval where the sensor was holding still.

    Rule: (1) keep frames with ``t_start + trim <= t <= t_end - trim``, where
    ``trim = min(trim_s, 0.25 * (t_end - t_start))`` (people move the finger
    into and out of the hold around the label's edges); (2) compute for every
    signal the moving standard deviation over a centred window of ``window_s``
    (at least 3 frames, shorter at the ends of the interval); (3) reject
    frames where any signal's moving std exceeds ``std_factor`` times that
    signal's median moving std within the interval (its noise level; plus a
    floor of 1e-9 of the signal's size, for noiseless data); (4) reject frames
    with a non-finite value. Slow creep passes, transients do not. If more
    than half the interval is moving, the noise level is overestimated and
    the rule keeps too much: label holds, not movements.

    Parameters
    ----------
    t_s : array_like, shape (N,)
        Frame times, s, increasing.
    values : array_like, shape (N, S) or (N,)
        Signals (e.g. segment resistances, ohm).
    t_start, t_end : float
        The labelled interval, s, same clock as ``t_s``.

    Returns
    -------
    ndarray of bool, shape (N,)
    """
    t = np.asarray(t_s, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    if v.ndim == 1:
        v = v[:, None]
    mask = np.zeros(t.shape[0], dtype=bool)
    dur = float(t_end) - float(t_start)
    if not dur > 0:
        return mask
    trim = min(float(trim_s), 0.25 * dur)
    idx = np.flatnonzero((t >= t_start + trim) & (t <= t_end - trim))
    n = idx.size
    if n == 0:
        return mask
    seg = v[idx]
    finite = np.isfinite(seg).all(axis=1)
    if n < 3:
        mask[idx[finite]] = True
        return mask
    dt = float(np.median(np.diff(t[idx])))
    w = 3 if not dt > 0 else max(3, int(round(window_s / dt)))
    half = min(w // 2, (n - 1) // 2)
    centre = np.nanmedian(seg, axis=0)
    centre = np.where(np.isfinite(centre), centre, 0.0)
    d = np.where(np.isfinite(seg), seg - centre, 0.0)  # centred: no cancellation in the variance
    c1 = np.concatenate([np.zeros((1, d.shape[1])), np.cumsum(d, axis=0)])
    c2 = np.concatenate([np.zeros((1, d.shape[1])), np.cumsum(d * d, axis=0)])
    i = np.arange(n)
    lo = np.maximum(i - half, 0)
    hi = np.minimum(i + half + 1, n)
    cnt = (hi - lo)[:, None]
    mean = (c1[hi] - c1[lo]) / cnt
    var = np.maximum((c2[hi] - c2[lo]) / cnt - mean * mean, 0.0)
    mstd = np.sqrt(var)
    level = np.median(mstd, axis=0)
    floor = 1e-9 * np.abs(centre) + 1e-300
    bad = (mstd > std_factor * level + floor).any(axis=1) | ~finite
    mask[idx[~bad]] = True
    return mask


# ----------------------------------------------------------------------------- reports

@dataclass
class SegmentReport:
    """Fit quality of one segment.

    Attributes
    ----------
    n_holds, n_frames : int
        Holds (points) and frames behind them.
    rms_residual_per_m : float
        RMS of (model - reference) over the hold means, 1/m.
    rms_residual_percent : float
        The same, in % of the calibrated span ``curvature_max - curvature_min``.
    curvature_min_per_m, curvature_max_per_m : float
        Range covered by the references, 1/m.
    degree_positive, degree_negative : int
        Polynomial degree used on each side.
    warnings : list of str
    """

    segment: int
    n_holds: int
    n_frames: int
    rms_residual_per_m: float
    rms_residual_percent: float
    curvature_min_per_m: float
    curvature_max_per_m: float
    degree_positive: int
    degree_negative: int
    warnings: list[str] = field(default_factory=list)


@dataclass
class FitReport:
    """What :func:`fit_calibration` did, per segment, with warnings."""

    segments: list[SegmentReport]
    warnings: list[str] = field(default_factory=list)

    @property
    def all_warnings(self) -> list[str]:
        out = list(self.warnings)
        for s in self.segments:
            out.extend(f"segment {s.segment}: {w}" for w in s.warnings)
        return out

    def to_dict(self) -> dict:
        return {"segments": [dataclasses.asdict(s) for s in self.segments], "warnings": list(self.warnings)}

    @classmethod
    def from_dict(cls, d: dict) -> "FitReport":
        return cls(segments=[SegmentReport(**s) for s in d["segments"]], warnings=list(d.get("warnings", [])))

    def summary(self) -> str:
        """Human-readable table, one line per segment, then the warnings."""
        lines = ["segment  holds  frames  range 1/m          rms 1/m   rms %   degree +/-"]
        for s in self.segments:
            lines.append(
                f"{s.segment:7d}  {s.n_holds:5d}  {s.n_frames:6d}  "
                f"{s.curvature_min_per_m:7.2f} .. {s.curvature_max_per_m:7.2f}  "
                f"{s.rms_residual_per_m:7.3f}  {s.rms_residual_percent:6.2f}   "
                f"{s.degree_positive}/{s.degree_negative}"
            )
        lines.extend(f"warning: {w}" for w in self.all_warnings)
        return "\n".join(lines)


# ----------------------------------------------------------------------------- file checks

#: what a calibration file must hold: (key, kind, low, high). ``[]`` stands for
#: every element of a list; kind ``list`` bounds a list's length, ``num`` a
#: finite number, ``int`` a whole number; a trailing ``?`` makes the key
#: optional. Curvature bounds are the label bounds; rig bounds are the rig
#: file's; the coefficient bound is far beyond any real strip (a relative
#: change of 1 meaning 1e6 1/m): common practice, no source.
_FILE_SCHEMA = (
    ("r0_ohm", "list", 1, MAX_CHANNELS - 1),
    ("r0_ohm[]", "num", *BOUNDS["sensor.segment_ohm_range"][:2]),
    ("model.segments", "list", 1, MAX_CHANNELS - 1),
    ("model.segments[].positive", "list", 1, 8),
    ("model.segments[].negative", "list", 1, 8),
    ("model.segments[].positive[]", "num", -1e6, 1e6),
    ("model.segments[].negative[]", "num", -1e6, 1e6),
    ("model.segments[].x_min", "num", -1.0, 0.0),
    ("model.segments[].x_max", "num", 0.0, 1e3),
    ("model.segments[].curvature_min_per_m", "num", -MAX_CURVATURE_PER_M, 0.0),
    ("model.segments[].curvature_max_per_m", "num", 0.0, MAX_CURVATURE_PER_M),
    ("rig.r_ref_ohm?", "num", *BOUNDS["readout.r_ref_ohm"][:2]),
    ("rig.n_segments?", "int", 1, MAX_CHANNELS - 1),
    ("rig.segment_lengths_mm[]?", "num", *BOUNDS["sensor.segment_lengths_mm"][:2]),
    ("tares[].r0_ohm_before[]?", "num", *BOUNDS["sensor.segment_ohm_range"][:2]),
)
_MISSING = object()


def _walk(node, parts: list[str], name: str, source: str):
    """(key name, value) of every element ``parts`` reaches; _MISSING where a key is absent."""
    if not parts:
        yield name, node
        return
    head, rest = parts[0], parts[1:]
    if node is _MISSING:
        yield name, _MISSING
    elif head == "[]":
        if not isinstance(node, list):
            raise CalibrationError(f"{source}: {name} must be a list")
        for i, item in enumerate(node):
            yield from _walk(item, rest, f"{name}[{i}]", source)
    elif not isinstance(node, dict):
        raise CalibrationError(f"{source}: {name} must be an object")
    else:
        yield from _walk(node.get(head, _MISSING), rest, f"{name}.{head}" if name else head, source)


def _check_value(name: str, value, kind: str, low, high, source: str) -> None:
    if kind == "list":
        if not isinstance(value, list) or not low <= len(value) <= high:
            raise CalibrationError(f"{source}: {name} must be a list of {low} .. {high} values")
        return
    if isinstance(value, bool) or not isinstance(value, (int, float)) or (kind == "int" and not isinstance(value, int)):
        raise CalibrationError(f"{source}: {name} must be a {'whole number' if kind == 'int' else 'number'}, got {value!r}")
    if not math.isfinite(value):
        raise CalibrationError(f"{source}: {name} must be a finite number, got {value!r}")
    if not low <= value <= high:
        raise CalibrationError(f"{source}: {name} = {value!r} is outside {low:g} .. {high:g}")


def check_calibration_dict(d: dict, *, source: str) -> None:
    """Check a parsed calibration file against the module's schema table.

    Raises
    ------
    CalibrationError
        One line naming ``source`` and the key at fault: missing, of the
        wrong type, not finite (NaN, Infinity) or outside its bound.
    """
    for key, kind, low, high in _FILE_SCHEMA:
        optional = key.endswith("?")
        parts = key.rstrip("?").replace("[]", ".[]").split(".")
        for name, value in _walk(d, parts, "", source):
            if value is _MISSING:
                if optional:
                    continue
                raise CalibrationError(f"{source}: missing key {name}")
            _check_value(name, value, kind, low, high, source)


def check_distinct_recordings(recordings: Sequence[dict]) -> None:
    """Refuse the same recording given twice (it would count its holds twice).

    Parameters
    ----------
    recordings : sequence of dict
        ``path`` and ``sha256`` of each input, in the order given.

    Raises
    ------
    CalibrationError
        Names the second file and the first one with the same content.
    """
    seen: dict[str, str] = {}
    for r in recordings:
        if r["sha256"] in seen:
            raise CalibrationError(
                f"{r['path']}: the same recording as {seen[r['sha256']]} (identical content); "
                f"given twice, its holds would count twice"
            )
        seen[r["sha256"]] = str(r["path"])


# ----------------------------------------------------------------------------- calibration

def software_version() -> str:
    """Installed tapcurve version, or ``unknown`` when running from a source tree."""
    try:
        return importlib.metadata.version("tapcurve")
    except importlib.metadata.PackageNotFoundError:
        return "unknown (not installed)"


def file_sha256(path: str | Path) -> str:
    """Hex SHA-256 of a file's bytes (for calibration provenance)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _utc_now() -> str:
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def _poly(coef: np.ndarray, x: np.ndarray) -> np.ndarray:
    # sum_d coef[..., d] * x**(d+1), Horner; coef (S, D), x (..., S)
    y = np.zeros_like(x)
    for d in range(coef.shape[-1] - 1, -1, -1):
        y = (y + coef[..., d]) * x
    return y


def _dpoly(coef: np.ndarray, x: np.ndarray) -> np.ndarray:
    y = np.zeros_like(x)
    for d in range(coef.shape[-1] - 1, -1, -1):
        y = y * x + (d + 1) * coef[..., d]
    return y


def _pad(rows: list[list[float]]) -> np.ndarray:
    width = max(1, max(len(r) for r in rows))
    out = np.zeros((len(rows), width))
    for i, r in enumerate(rows):
        out[i, : len(r)] = r
    return out


@dataclass(frozen=True, eq=False, kw_only=True)
class Calibration:
    """Resistance-to-curvature law of every segment, with where it came from.

    Immutable; :meth:`tared` returns a new one. Build with
    :func:`fit_calibration` or :meth:`from_json` / :meth:`load`.

    Attributes
    ----------
    r0_ohm : ndarray of float64, shape (S,)
        Flat resistance of each segment, ohm.
    positive, negative : list of list of float
        Coefficients c1..cD per segment for x >= 0 and x < 0 (module docstring).
    x_min, x_max : ndarray, shape (S,)
        Fitted range of the relative change x (x_min <= 0 <= x_max).
    curvature_min_per_m, curvature_max_per_m : ndarray, shape (S,)
        Calibrated curvature range, 1/m.
    readout_kind : str
    rig : dict
        ``name``, ``source``, ``sha256``, ``n_segments`` of the rig fitted with.
    recordings : list of dict
        ``path`` and ``sha256`` of each recording used.
    created_utc, software_version : str
    tares : list of dict
        Re-zeroing history: ``utc``, ``r0_ohm_before``.
    report : FitReport or None
    source : str
        Where it was loaded from (for messages); not saved.
    """

    r0_ohm: np.ndarray
    positive: list
    negative: list
    x_min: np.ndarray
    x_max: np.ndarray
    curvature_min_per_m: np.ndarray
    curvature_max_per_m: np.ndarray
    readout_kind: str
    rig: dict
    recordings: list = field(default_factory=list)
    created_utc: str = ""
    software_version: str = ""
    tares: list = field(default_factory=list)
    report: FitReport | None = None
    source: str = "calibration"

    def __post_init__(self):
        set_ = object.__setattr__
        for name in ("r0_ohm", "x_min", "x_max", "curvature_min_per_m", "curvature_max_per_m"):
            arr = np.array(getattr(self, name), dtype=np.float64)
            arr.setflags(write=False)
            set_(self, name, arr)
        pos = _pad(self.positive)
        neg = _pad(self.negative)
        set_(self, "_pos", pos)
        set_(self, "_neg", neg)
        # value and slope at the edges, for the straight continuation beyond them
        set_(self, "_k_hi", _poly(pos, self.x_max))
        set_(self, "_s_hi", _dpoly(pos, self.x_max))
        set_(self, "_k_lo", _poly(neg, self.x_min))
        set_(self, "_s_lo", _dpoly(neg, self.x_min))
        span = self.curvature_max_per_m - self.curvature_min_per_m
        set_(self, "_margin", RANGE_MARGIN * span)

    @property
    def n_segments(self) -> int:
        return int(self.r0_ohm.shape[0])

    # -- use

    def evaluate(self, resistance_ohm: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Curvature and out-of-range flags of N frames.

        Parameters
        ----------
        resistance_ohm : array_like, shape (N, S)

        Returns
        -------
        curvature_per_m : ndarray of float64, shape (N, S)
            NaN where the resistance is NaN.
        outside : ndarray of bool, shape (N, S)
            The curvature lies beyond the calibrated range by more than 2 % of
            its span (extrapolated on a straight line, not clipped).
        """
        r = np.asarray(resistance_ohm, dtype=np.float64)
        if r.ndim != 2 or r.shape[1] != self.n_segments:
            raise ValueError(f"expected shape (N, {self.n_segments}), got {r.shape}")
        x = (r - self.r0_ohm) / self.r0_ohm
        with np.errstate(invalid="ignore"):
            xp = np.minimum(x, self.x_max)
            xn = np.maximum(x, self.x_min)
            kp = _poly(self._pos, xp) + self._s_hi * (x - xp)
            kn = _poly(self._neg, xn) + self._s_lo * (x - xn)
            k = np.where(x >= 0, kp, kn)
            k[np.isnan(x)] = np.nan
            outside = (k > self.curvature_max_per_m + self._margin) | (k < self.curvature_min_per_m - self._margin)
        return k, outside

    def curvature_per_m(self, resistance_ohm: np.ndarray) -> np.ndarray:
        """Mean curvature of each segment, (N, S) ohm -> (N, S) float64 1/m (see :meth:`evaluate`)."""
        return self.evaluate(resistance_ohm)[0]

    def coverage_warnings(self, resistance_ohm: np.ndarray) -> list[str]:
        """One warning per segment whose frames leave the calibrated range (for offline reports)."""
        _, outside = self.evaluate(resistance_ohm)
        n = outside.shape[0]
        out = []
        for k in range(self.n_segments):
            c = int(outside[:, k].sum())
            if c:
                out.append(
                    f"segment {k}: {c} of {n} frames ({100.0 * c / n:.1f} %) beyond the calibrated range "
                    f"{self.curvature_min_per_m[k]:.2f} .. {self.curvature_max_per_m[k]:.2f} 1/m (extrapolated)"
                )
        return out

    def tared(self, flat_resistance_ohm: np.ndarray) -> "Calibration":
        """The same law re-zeroed at new flat resistances.

        Resistive strips drift and creep; their relative response stays, so only
        ``R0`` moves. The old ``R0`` goes into :attr:`tares`.

        Parameters
        ----------
        flat_resistance_ohm : array_like, shape (S,)
            Ohm, all finite and positive.

        Raises
        ------
        CalibrationError
            Wrong length or a non-finite / non-positive value.
        """
        r0 = np.asarray(flat_resistance_ohm, dtype=np.float64).reshape(-1)
        if r0.shape[0] != self.n_segments:
            raise CalibrationError(
                f"{self.source}: tare needs {self.n_segments} flat resistances, got {r0.shape[0]}"
            )
        bad = np.flatnonzero(~(np.isfinite(r0) & (r0 > 0)))
        if bad.size:
            raise CalibrationError(
                f"{self.source}: cannot tare: segment {int(bad[0])} has no valid flat resistance ({r0[bad[0]]!r})"
            )
        record = {"utc": _utc_now(), "r0_ohm_before": [float(v) for v in self.r0_ohm]}
        return dataclasses.replace(self, r0_ohm=r0, tares=[*self.tares, record])

    def check_rig(self, rig: Rig) -> list[str]:
        """Check that this calibration fits the rig.

        Returns
        -------
        list of str
            Notes that do not stop use (the rig file's text differs).

        Raises
        ------
        CalibrationError
            Segment count, segment lengths, readout kind or r_ref_ohm disagree.
        """
        if rig.n_segments != self.n_segments:
            raise CalibrationError(
                f"{self.source}: calibration has {self.n_segments} segments, rig {rig.source} has {rig.n_segments}"
            )
        if rig.readout_kind != self.readout_kind:
            raise CalibrationError(
                f"{self.source}: calibration was made with readout kind {self.readout_kind!r}, "
                f"rig {rig.source} has {rig.readout_kind!r}"
            )
        r_ref = self.rig.get("r_ref_ohm")
        if r_ref is not None and not math.isclose(float(r_ref), rig.r_ref_ohm, rel_tol=1e-6):
            # resistances scale with r_ref: flat resistances and fits would be wrong
            raise CalibrationError(
                f"{self.source}: calibration was made with r_ref_ohm = {float(r_ref):g}, "
                f"rig {rig.source} has {rig.r_ref_ohm:g}"
            )
        lengths = self.rig.get("segment_lengths_mm")
        if lengths is not None and (
            len(lengths) != rig.n_segments
            or not np.allclose(np.asarray(lengths, dtype=np.float64) * 1e-3, rig.segment_lengths_m, rtol=0, atol=1e-7)
        ):
            # curvature is heading change over a segment's length: another length, another law
            rig_mm = [round(float(v) * 1e3, 6) for v in rig.segment_lengths_m]
            raise CalibrationError(
                f"{self.source}: calibration was made for segment lengths {lengths} mm, "
                f"rig {rig.source} has {rig_mm} mm"
            )
        notes = []
        if self.rig.get("sha256") and self.rig["sha256"] != rig.sha256:
            notes.append(f"{self.source}: made with a different rig file ({self.rig.get('source', '?')}) than {rig.source}")
        return notes

    # -- files

    def to_dict(self) -> dict:
        segments = []
        for k in range(self.n_segments):
            segments.append({
                "positive": [float(c) for c in self.positive[k]],
                "negative": [float(c) for c in self.negative[k]],
                "x_min": float(self.x_min[k]),
                "x_max": float(self.x_max[k]),
                "curvature_min_per_m": float(self.curvature_min_per_m[k]),
                "curvature_max_per_m": float(self.curvature_max_per_m[k]),
            })
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "created_utc": self.created_utc,
            "software_version": self.software_version,
            "rig": dict(self.rig),
            "readout_kind": self.readout_kind,
            "recordings": [dict(r) for r in self.recordings],
            "r0_ohm": [float(v) for v in self.r0_ohm],
            "model": {
                "name": MODEL_NAME,
                "variable": "x = (R - r0_ohm) / r0_ohm",
                "law": "curvature_per_m = sum_d c[d-1] * x**d; 'positive' for x >= 0, 'negative' for x < 0; "
                       "straight line with the edge slope beyond [x_min, x_max]",
                "segments": segments,
            },
            "tares": [dict(t) for t in self.tares],
            "fit_report": None if self.report is None else self.report.to_dict(),
        }

    def to_json(self) -> str:
        """The calibration as JSON text (strict JSON: no NaN)."""
        return json.dumps(self.to_dict(), indent=2, allow_nan=False) + "\n"

    @classmethod
    def from_json(cls, text: str, *, source: str = "calibration") -> "Calibration":
        """Parse :meth:`to_json` output.

        Raises
        ------
        CalibrationError
            Not JSON, not a calibration, or a missing or wrong key.
        """
        try:
            d = json.loads(text)
        except json.JSONDecodeError as exc:
            raise CalibrationError(f"{source}: not valid JSON ({exc})") from None
        if not isinstance(d, dict) or d.get("format") != FORMAT_NAME:
            raise CalibrationError(f"{source}: not a tapcurve calibration (key format is not {FORMAT_NAME!r})")
        if d.get("format_version") != FORMAT_VERSION:
            raise CalibrationError(f"{source}: format_version {d.get('format_version')!r} is not supported")
        check_calibration_dict(d, source=source)
        try:
            model = d["model"]
            if model.get("name") != MODEL_NAME:
                raise CalibrationError(f"{source}: model.name {model.get('name')!r} is not known")
            segs = model["segments"]
            r0 = [float(v) for v in d["r0_ohm"]]
            if len(segs) != len(r0) or not r0:
                raise CalibrationError(f"{source}: model.segments and r0_ohm differ in length")
            if not all(math.isfinite(v) and v > 0 for v in r0):
                raise CalibrationError(f"{source}: r0_ohm must be positive numbers")
            for k, s in enumerate(segs):
                if not s["positive"] or not s["negative"]:
                    raise CalibrationError(f"{source}: model.segments[{k}] needs positive and negative coefficients")
            report = d.get("fit_report")
            return cls(
                r0_ohm=np.array(r0),
                positive=[[float(c) for c in s["positive"]] for s in segs],
                negative=[[float(c) for c in s["negative"]] for s in segs],
                x_min=np.array([float(s["x_min"]) for s in segs]),
                x_max=np.array([float(s["x_max"]) for s in segs]),
                curvature_min_per_m=np.array([float(s["curvature_min_per_m"]) for s in segs]),
                curvature_max_per_m=np.array([float(s["curvature_max_per_m"]) for s in segs]),
                readout_kind=str(d["readout_kind"]),
                rig=dict(d.get("rig", {})),
                recordings=list(d.get("recordings", [])),
                created_utc=str(d.get("created_utc", "")),
                software_version=str(d.get("software_version", "")),
                tares=list(d.get("tares", [])),
                report=None if report is None else FitReport.from_dict(report),
                source=source,
            )
        except CalibrationError:
            raise
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise CalibrationError(f"{source}: missing or wrong key ({type(exc).__name__}: {exc})") from None

    @classmethod
    def load(cls, path: str | Path) -> "Calibration":
        """Read a calibration file (see :meth:`from_json`)."""
        p = Path(path)
        try:
            text = p.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise CalibrationError(f"{p}: calibration file not found") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise CalibrationError(f"{p}: cannot read calibration file ({exc})") from None
        return cls.from_json(text, source=str(p))

    def save(self, path: str | Path) -> None:
        """Write :meth:`to_json` to a file."""
        p = Path(path)
        try:
            p.write_text(self.to_json(), encoding="utf-8")
        except OSError as exc:
            raise CalibrationError(f"{p}: cannot write calibration ({exc})") from None


# ----------------------------------------------------------------------------- fitting

@dataclass
class Hold:
    """Steady frames of one labelled hold.

    Attributes
    ----------
    reference_per_m : ndarray, shape (S,)
        Reference curvature of each segment, 1/m; NaN = unknown (ignored).
    resistance_ohm : ndarray, shape (n, S)
        Steady frames (see :func:`steady_part`).
    label : str
        For messages.
    """

    reference_per_m: np.ndarray
    resistance_ohm: np.ndarray
    label: str = ""


def _monotone(coef: np.ndarray, x_edge: float) -> bool:
    if x_edge == 0:
        return bool(coef[0] > 0)
    u = np.linspace(0.0, x_edge, 257)
    return bool(np.all(_dpoly(coef[None, :], u[:, None])[:, 0] > 0))


def _fit_side(x, kappa, *, degree, side, on_non_monotone, seg) -> tuple[list[float], int, list[str]]:
    warnings: list[str] = []
    n_distinct = np.unique(np.round(kappa, 9)).size
    d = max(1, min(degree, n_distinct))
    x_edge = float(x.max()) if side == "positive" else float(x.min())
    if (side == "positive" and x_edge <= 0) or (side == "negative" and x_edge >= 0):
        raise CalibrationError(
            f"segment {seg}: holds with {side} curvature do not move the resistance the {side} way "
            f"(positive curvature must raise it); check the label signs and the sensor's orientation"
        )
    # the data themselves: mean x per reference must rise with the reference
    ks = np.unique(kappa)
    xm = np.array([x[kappa == k].mean() for k in ks])
    for i in np.flatnonzero(np.diff(xm) <= 0):
        msg = (
            f"{side} side: resistance does not rise from {ks[i]:+.2f} to {ks[i + 1]:+.2f} 1/m "
            f"(x {xm[i]:+.4f} -> {xm[i + 1]:+.4f}); the data are not monotone"
        )
        if on_non_monotone == "refuse":
            raise CalibrationError(f"segment {seg}: {msg}")
        warnings.append(msg)
    if n_distinct <= degree and len(x) > 0:
        warnings.append(
            f"{side} side: only {n_distinct} distinct reference curvature(s); "
            f"degree {d} passes through them, so the residual says little"
        )
    while True:
        a = x[:, None] ** np.arange(1, d + 1)
        coef = np.linalg.lstsq(a, kappa, rcond=None)[0]
        if _monotone(coef, x_edge):
            return [float(c) for c in coef], d, warnings
        if on_non_monotone == "refuse" or d == 1:
            raise CalibrationError(
                f"segment {seg}: the {side}-side fit (degree {d}) is not monotone over the holds; "
                f"curvature would be ambiguous (check the holds and their labels)"
            )
        warnings.append(f"{side} side: degree {d} fit is not monotone; lowered to degree {d - 1}")
        d -= 1


def fit_calibration(
    holds: Sequence[Hold | tuple],
    *,
    rig: Rig,
    degree: int | tuple[int, int] = 2,
    on_non_monotone: str = "lower",
    recordings: Sequence[dict] = (),
    min_holds_per_side: int = 2,
) -> tuple[Calibration, FitReport]:
    """Fit a calibration from holds (module docstring: model and rules).

    Parameters
    ----------
    holds : sequence of Hold or (reference, resistance) tuples
        ``reference`` is a number (uniform) or shape (S,), 1/m; ``resistance``
        shape (n, S), ohm, steady frames only. At least one flat hold
        (reference 0) per segment is required.
    rig : Rig
        The rig the recordings were made with.
    degree : int or (int, int)
        Highest polynomial degree per side (1..3 sensible); a pair gives the
        positive and the negative side their own.
    on_non_monotone : {"lower", "refuse"}
        Lower the degree with a warning, or raise.
    recordings : sequence of dict
        Provenance, ``{"path": ..., "sha256": ...}`` each.
    min_holds_per_side : int
        Fewer bent holds than this on a side gives a warning.

    Returns
    -------
    (Calibration, FitReport)

    Raises
    ------
    CalibrationError
        No flat hold for a segment, no bent hold at all, a wrong sign, a
        refused non-monotone fit, or arrays of the wrong shape.
    """
    if on_non_monotone not in ("lower", "refuse"):
        raise ValueError("on_non_monotone must be 'lower' or 'refuse'")
    deg_pos, deg_neg = (degree, degree) if np.ndim(degree) == 0 else (degree[0], degree[1])
    deg_pos, deg_neg = int(deg_pos), int(deg_neg)
    if min(deg_pos, deg_neg) < 1:
        raise ValueError("degree must be at least 1")
    n_seg = rig.n_segments
    refs, means, counts, labels = [], [], [], []
    for i, h in enumerate(holds):
        if not isinstance(h, Hold):
            ref, res = h[0], h[1]
            h = Hold(reference_per_m=ref, resistance_ohm=res, label=h[2] if len(h) > 2 else f"hold {i}")
        ref = np.asarray(h.reference_per_m, dtype=np.float64)
        ref = np.full(n_seg, float(ref)) if ref.ndim == 0 else ref
        res = np.asarray(h.resistance_ohm, dtype=np.float64)
        if res.ndim == 1 and n_seg == 1:
            res = res[:, None]
        if ref.shape != (n_seg,) or res.ndim != 2 or res.shape[1] != n_seg:
            raise CalibrationError(
                f"{h.label or f'hold {i}'}: expected {n_seg} segments, got reference {ref.shape} "
                f"and resistance {res.shape}"
            )
        ok = np.isfinite(res)
        cnt = ok.sum(axis=0)
        s = np.where(ok, res, 0.0).sum(axis=0)
        means.append(np.where(cnt > 0, s / np.maximum(cnt, 1), np.nan))
        counts.append(cnt)
        refs.append(ref)
        labels.append(h.label or f"hold {i}")
    if not refs:
        raise CalibrationError("no holds to calibrate from")
    refs_a = np.array(refs)  # (H, S)
    means_a = np.array(means)
    counts_a = np.array(counts)

    r0 = np.empty(n_seg)
    pos_c, neg_c, x_lo, x_hi, k_lo, k_hi = [], [], np.zeros(n_seg), np.zeros(n_seg), np.zeros(n_seg), np.zeros(n_seg)
    seg_reports = []
    for k in range(n_seg):
        use = np.isfinite(refs_a[:, k]) & np.isfinite(means_a[:, k])
        kap = refs_a[use, k]
        rm = means_a[use, k]
        flat = kap == 0
        if not flat.any():
            raise CalibrationError(f"segment {k}: no flat hold (label 'flat'); R0 cannot be found")
        r0[k] = rm[flat].mean()
        if not r0[k] > 0:
            raise CalibrationError(f"segment {k}: flat resistance {r0[k]!r} ohm is not positive")
        x = (rm - r0[k]) / r0[k]
        warn: list[str] = []
        used_labels = [labels[i] for i in np.flatnonzero(use)]
        for i in np.flatnonzero(((kap > 0) & (x < 0)) | ((kap < 0) & (x > 0))):
            warn.append(
                f"hold {used_labels[i]!r} ({kap[i]:+.2f} 1/m) moved the resistance the wrong way "
                f"(x = {x[i]:+.4f}); check its label"
            )
        sides = {}
        for side, sel in (("positive", kap > 0), ("negative", kap < 0)):
            if sel.sum() == 0:
                sides[side] = None
                continue
            if sel.sum() < min_holds_per_side:
                warn.append(f"{side} side: only {int(sel.sum())} hold(s)")
            sides[side] = _fit_side(
                x[sel], kap[sel], degree=deg_pos if side == "positive" else deg_neg, side=side,
                on_non_monotone=on_non_monotone, seg=k,
            )
            warn.extend(sides[side][2])
        if sides["positive"] is None and sides["negative"] is None:
            raise CalibrationError(f"segment {k}: no bent holds, only flat ones; nothing to fit")
        for side, other in (("positive", "negative"), ("negative", "positive")):
            if sides[side] is None:
                slope = sides[other][0][0]
                sides[side] = ([slope], 0, [])
                warn.append(f"no {side} holds: {side} bends use the {other} side's initial slope, uncalibrated")
        pos_c.append(sides["positive"][0])
        neg_c.append(sides["negative"][0])
        x_hi[k] = max(0.0, float(x[kap > 0].max())) if (kap > 0).any() else 0.0
        x_lo[k] = min(0.0, float(x[kap < 0].min())) if (kap < 0).any() else 0.0
        k_hi[k] = max(0.0, float(kap.max()))
        k_lo[k] = min(0.0, float(kap.min()))
        model = np.where(
            x >= 0, _poly(np.array([pos_c[-1]]), x[:, None])[:, 0], _poly(np.array([neg_c[-1]]), x[:, None])[:, 0]
        )
        rms = float(np.sqrt(np.mean((model - kap) ** 2)))
        span = k_hi[k] - k_lo[k]
        seg_reports.append(SegmentReport(
            segment=k,
            n_holds=int(use.sum()),
            n_frames=int(counts_a[use, k].sum()),
            rms_residual_per_m=rms,
            rms_residual_percent=100.0 * rms / span if span > 0 else 0.0,
            curvature_min_per_m=float(k_lo[k]),
            curvature_max_per_m=float(k_hi[k]),
            degree_positive=int(sides["positive"][1]),
            degree_negative=int(sides["negative"][1]),
            warnings=warn,
        ))
    report = FitReport(segments=seg_reports)
    cal = Calibration(
        r0_ohm=r0,
        positive=pos_c,
        negative=neg_c,
        x_min=x_lo,
        x_max=x_hi,
        curvature_min_per_m=k_lo,
        curvature_max_per_m=k_hi,
        readout_kind=rig.readout_kind,
        rig={
            "name": rig.name, "source": rig.source, "sha256": rig.sha256, "n_segments": n_seg,
            "r_ref_ohm": rig.r_ref_ohm, "segment_lengths_mm": [round(float(v) * 1e3, 6) for v in rig.segment_lengths_m],
        },
        recordings=[dict(r) for r in recordings],
        created_utc=_utc_now(),
        software_version=software_version(),
        report=report,
        source="fitted calibration",
    )
    return cal, report


def load_for_rig(path, rig: Rig, *, warn=None):
    """Load a calibration file and check it against ``rig``; None for None.

    Notes that do not stop use (a different rig file text) go to ``warn``
    (default: stderr), one line each; other segment lengths, segment count,
    readout kind or r_ref_ohm stop it.

    Raises
    ------
    UserError
        Missing or unreadable file, or it does not fit the rig.
    """
    if path is None:
        return None
    import sys

    cal = Calibration.load(path)
    for note in cal.check_rig(rig):
        print(f"tapcurve: warning: {note}", file=warn or sys.stderr)
    return cal
