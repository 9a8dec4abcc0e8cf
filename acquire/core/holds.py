"""Holds: reference tables mapping label names to per-segment curvature, and the steady part of a hold.

Reference table
---------------
Jigs that hold segments at different curvatures are described by a reference
table, a hand-written TOML file (``[references]``, label = number, list or
reference labels) or a CSV file (``label,seg0,seg1,...``); see the README.
``nan`` marks a segment the jig does not define. A table entry wins over
:func:`acquire.core.labels.parse_label` for the same text.

Pure; any thread.
"""
from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

from acquire.core.calibration import CalibrationError
from acquire.core.labels import LabelError, check_curvature, parse_label

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = ["load_reference_table", "reference_for", "steady_part"]


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
