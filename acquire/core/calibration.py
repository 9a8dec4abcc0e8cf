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
table (TOML or CSV; the README and :mod:`acquire.core.holds` give the format).

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

import dataclasses
import hashlib
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np

from acquire.core.labels import MAX_CURVATURE_PER_M, LabelError, parse_label
from acquire.about import software_version, utc_now_iso
from acquire.errors import UserError
from acquire.rig import BOUNDS, MAX_CHANNELS, Rig

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
    n_motion_points, n_motion_frames, motion_share : int, int, float
        Filmed-motion points (frames binned by resistance), their camera frames, their weight share 0..1.
    rms_residual_holds_per_m, rms_residual_motion_per_m : float or None
        Residual over hold / motion points alone, 1/m; None: no such points.
    r0_from : str
        Where the flat resistance came from: ``holds`` or ``motion``.
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
    n_motion_points: int = 0
    n_motion_frames: int = 0
    motion_share: float = 0.0
    rms_residual_holds_per_m: float | None = None
    rms_residual_motion_per_m: float | None = None
    r0_from: str = "holds"


@dataclass
class FitReport:
    """What :func:`fit_calibration` did, per segment, with warnings; one dict per filmed motion session
    (files, ``offset_s``, ``rate_ppm``, ``sharpness``, frames used, ``marker_residual_mm``)."""

    segments: list[SegmentReport]
    warnings: list[str] = field(default_factory=list)
    motion_sessions: list[dict] = field(default_factory=list)

    @property
    def all_warnings(self) -> list[str]:
        out = list(self.warnings)
        for s in self.segments:
            out.extend(f"segment {s.segment}: {w}" for w in s.warnings)
        return out

    def to_dict(self) -> dict:
        return {"segments": [dataclasses.asdict(s) for s in self.segments], "warnings": list(self.warnings),
                "motion_sessions": [dict(m) for m in self.motion_sessions]}

    @classmethod
    def from_dict(cls, d: dict) -> "FitReport":
        return cls(segments=[SegmentReport(**s) for s in d["segments"]], warnings=list(d.get("warnings", [])),
                   motion_sessions=[dict(m) for m in d.get("motion_sessions", [])])

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


def _optional_model(d: dict | None, key: str, source: str, n_segments: int):
    """The memory or force model a calibration file carries, checked; None without one."""
    if d is None:
        return None
    if key == "memory":
        from acquire.core.memory import StripMemory as model_class
    else:
        from acquire.core.force import ForceModel as model_class
    try:
        model = model_class.from_dict(d)
    except (ValueError, TypeError, KeyError) as exc:
        raise CalibrationError(f"{source}: {key}: {exc}") from None
    if model.n_segments != n_segments:
        raise CalibrationError(f"{source}: {key} has {model.n_segments} segments, the calibration {n_segments}")
    return model


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

def file_sha256(path: str | Path) -> str:
    """Hex SHA-256 of a file's bytes (for calibration provenance)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


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
    memory : dict or None
        The strip's creep and hysteresis, per segment (:class:`acquire.core.memory.StripMemory`
        as a dict), or None for a memory-free (static) calibration such as every older file.
    force : dict or None
        The finger's stiffness and free curvature under actuation
        (:class:`acquire.core.force.ForceModel` as a dict), or None.
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
    memory: dict | None = None
    force: dict | None = None

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
        set_(self, "_memory_model", _optional_model(self.memory, "memory", self.source, self.n_segments))
        set_(self, "_force_model", _optional_model(self.force, "force", self.source, self.n_segments))

    @property
    def memory_model(self):
        """The :class:`~acquire.core.memory.StripMemory` of this calibration, or None (static)."""
        return self._memory_model

    @property
    def force_model(self):
        """The :class:`~acquire.core.force.ForceModel` of this calibration, or None."""
        return self._force_model

    @property
    def n_segments(self) -> int:
        return int(self.r0_ohm.shape[0])

    # -- use

    def evaluate(self, resistance_ohm: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Curvature and out-of-range flags of N frames (any thread; new arrays).

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
        return self.evaluate_relative((r - self.r0_ohm) / self.r0_ohm)

    def evaluate_relative(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """As :meth:`evaluate`, from ``x = (R - r0) / r0`` (N, S), dimensionless (the memory stage's output); any thread."""
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
        record = {"utc": utc_now_iso(), "r0_ohm_before": [float(v) for v in self.r0_ohm]}
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
            **({} if self.memory is None else {"memory": self.memory}),
            **({} if self.force is None else {"force": self.force}),
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
                memory=d.get("memory"),
                force=d.get("force"),
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


_MOVED = {"Hold": "calibration_fit", "fit_calibration": "calibration_fit", "load_reference_table": "holds",
          "reference_for": "holds", "steady_part": "holds"}


def __getattr__(name: str):
    """The fit and the hold helpers live in their own modules (which import this one); their names
    stay importable from here for scripts written against earlier releases (PEP 562, on first use)."""
    if name in _MOVED:
        import importlib

        return getattr(importlib.import_module(f"acquire.core.{_MOVED[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
