"""Offline commands: ``tapcurve calibrate``, ``tapcurve tare`` and ``tapcurve process``.

All three read recordings through :func:`acquire.store.recording.open_recording`
(which recovers a file a killed recorder left unclosed) and compute segment
resistances exactly as the live path does: the rig's readout, then its spike
filter and low-pass (:class:`acquire.core.pipeline.Pipeline`), chunk by chunk, so a
long recording is never in memory whole.

- :func:`calibrate_command` maps each labelled interval to its reference
  curvature (``flat``, ``radius=25mm``, ``curvature=40/m`` or a ``--reference``
  table), keeps its steady part, fits (:func:`acquire.core.calibration.fit_calibration`,
  polynomial degree chosen by leave-one-reference-out cross-validation, see
  :func:`choose_degree`), prints the fit report and writes CAL.json.
- :func:`tare_command` re-zeroes a calibration's flat resistances from a
  recording of the sensor held flat and writes a new calibration file.
- :func:`process_command` writes a copy of a recording with ``/derived``
  (curvature, s_m, xy) computed; the input is never modified.

Every fault a user can cause raises :class:`acquire.errors.UserError` with one
line naming the file, key or value; the command line prints it and exits 2.
Warnings go to stderr as ``tapcurve: warning: ...`` lines, reports to stdout.

Threads: everything here runs in the calling (main) thread.
"""
from __future__ import annotations

import datetime as _dt
import errno
import math
import os
import sys
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence, TextIO

import h5py
import numpy as np

from acquire.core.calibration import (
    Calibration,
    CalibrationError,
    FitReport,
    Hold,
    LabelError,
    fit_calibration,
    file_sha256,
    load_reference_table,
    reference_for,
    software_version,
    steady_part,
)
from acquire.errors import UserError
from acquire.core.pipeline import iter_processed
from acquire.core.reconstruct import Reconstructor
from acquire.store.recording import LIBVER, Recording, create_derived, open_recording
from acquire.rig import Rig, RigError, load_rig, parse_rig

__all__ = [
    "HoldInfo",
    "CalibrationRun",
    "TareRun",
    "recording_rig",
    "check_recording_rig",
    "recording_rate_hz",
    "filtered_intervals",
    "holds_from_recording",
    "choose_degree",
    "fit_warnings",
    "calibrate_files",
    "tare_calibration",
    "process_recording",
    "calibrate_command",
    "tare_command",
    "process_command",
    "SPACING_M",
    "CHUNK_FRAMES",
]

#: spacing of shape points written by ``process``, m (the live path's default)
SPACING_M = 0.001
#: frames per chunk offline: about 15 MB of shape points at a time
CHUNK_FRAMES = 16384
#: fewer steady frames than this make a hold too short to use
MIN_STEADY_FRAMES = 10
#: a tare that moves a flat resistance by more than this fraction is suspicious
TARE_WARN_FRACTION = 0.10
#: progress bars for files of at least this many frames
PROGRESS_MIN_FRAMES = 2 * CHUNK_FRAMES
#: without a terminal, progress lines only for files this long
PROGRESS_LOG_MIN_FRAMES = 1_000_000


def _warn(text: str, stream: TextIO | None = None) -> None:
    print(f"tapcurve: warning: {text}", file=stream or sys.stderr)


# ----------------------------------------------------------------------------- recordings


class _Rows:
    """The first ``n`` rows of a dataset, sliced on demand (a killed writer may
    leave one /raw column longer than the others)."""

    def __init__(self, ds: h5py.Dataset, n: int):
        self._ds = ds
        self.shape = (int(n),) + tuple(ds.shape[1:])

    def __getitem__(self, item: slice) -> np.ndarray:
        start, stop, _ = item.indices(self.shape[0])
        return self._ds[start:stop]


def recording_rig(rec: Recording) -> Rig:
    """The rig a recording was made with (its root attribute ``rig_toml``).

    Raises
    ------
    RigError
        The stored rig text is not a valid rig file (message names the recording).
    """
    return parse_rig(rec.rig_toml, source=f"{rec.path} (rig_toml)")


def check_recording_rig(recorded: Rig, given: Rig, *, where: str) -> list[str]:
    """Check that a recording's rig and the rig given agree on what matters.

    The segment count, channel count, readout kind, tap channels and reference
    resistor must agree (they decide the resistances and which curvature is
    whose). Other differences (lengths, filters, body) only give a note.

    Returns
    -------
    list of str
        Notes (warnings) that do not stop the command.

    Raises
    ------
    RigError
        The two disagree on the electrics or the segments.
    """
    def fail(what: str) -> None:
        raise RigError(f"{where}: recorded with a rig that {what} than {given.source}")

    if recorded.n_segments != given.n_segments:
        fail(f"has {recorded.n_segments} segments, {given.n_segments} in the rig file; other segments")
    if recorded.n_channels != given.n_channels:
        fail(f"has {recorded.n_channels} channels; other channels")
    if recorded.readout_kind != given.readout_kind:
        fail(f"uses readout kind {recorded.readout_kind!r}; another readout")
    if not np.array_equal(recorded.tap_channels, given.tap_channels):
        fail("measures the taps on other channels; other wiring")
    if not math.isclose(recorded.r_ref_ohm, given.r_ref_ohm, rel_tol=1e-9):
        fail(f"has r_ref_ohm = {recorded.r_ref_ohm:g}; another reference resistor")
    notes = []
    if recorded.text != given.text:
        diffs = []
        if not np.allclose(recorded.segment_lengths_m, given.segment_lengths_m, rtol=0, atol=1e-9):
            diffs.append("segment lengths")
        if (recorded.spike_window, recorded.lowpass_hz, recorded.lowpass_order) != (
            given.spike_window, given.lowpass_hz, given.lowpass_order
        ):
            diffs.append("filters (the given rig's are used)")
        what = ", ".join(diffs) if diffs else "text only"
        notes.append(f"{where}: its rig text differs from {given.source} ({what}); segments and readout agree")
    return notes


def recording_rate_hz(rec: Recording, *, t_device_s: np.ndarray | None = None) -> tuple[float, list[str]]:
    """Sample rate of a recording, Hz, and notes.

    The hello's ``rate_hz``, unless the frames' device times say otherwise
    (median step differing by more than 1 %: the rate was changed with
    ``RATE``), then the measured one, with a note.

    Raises
    ------
    UserError
        Neither the hello nor the frames give a rate.
    """
    hello_rate = rec.hello.get("rate_hz")
    try:
        hello_rate = float(hello_rate)
    except (TypeError, ValueError):
        hello_rate = math.nan
    t = t_device_s
    if t is None:
        n = rec.n_frames
        t = rec.file["raw"]["t_device_s"][: min(n, 100_000)]
    measured = math.nan
    if t.shape[0] > 2:
        step = float(np.median(np.diff(t)))
        if step > 0:
            measured = 1.0 / step
    if math.isfinite(hello_rate) and hello_rate > 0:
        if not math.isfinite(measured) or abs(measured - hello_rate) <= 0.01 * hello_rate:
            return hello_rate, []
        return measured, [
            f"{rec.path}: frames arrive at {measured:.6g} Hz, the hello says {hello_rate:g} Hz; using {measured:.6g} Hz"
        ]
    if math.isfinite(measured):
        return measured, [f"{rec.path}: hello has no rate_hz; using {measured:.6g} Hz from the frame times"]
    raise UserError(f"{rec.path}: no sample rate (hello has no rate_hz and there are too few frames)")


def _adc_bits(rec: Recording) -> tuple[int, list[str]]:
    bits = rec.hello.get("adc_bits")
    if isinstance(bits, int) and 1 <= bits <= 16:
        return bits, []
    return 12, [f"{rec.path}: hello has no valid adc_bits ({bits!r}); assuming 12"]


def filtered_intervals(
    rec: Recording,
    *,
    rig: Rig,
    rate_hz: float,
    adc_bits: int,
    intervals: Sequence[tuple[int, int]],
    chunk_frames: int = CHUNK_FRAMES,
) -> list[np.ndarray]:
    """Filtered segment resistances of some frame ranges of a recording.

    The whole recording runs through the live path's readout and filters (so
    each range sees the filter state the live view had), chunk by chunk; only
    the frames inside ``intervals`` are kept.

    Parameters
    ----------
    intervals : sequence of (start, stop)
        Frame index ranges (may overlap).

    Returns
    -------
    list of ndarray of float64, shape (stop - start, S)
        Ohm, NaN where the readout could not measure; new arrays, owned by the caller.
    """
    n = rec.n_frames
    out = [np.empty((max(0, b - a), rig.n_segments)) for a, b in intervals]
    last = max((b for _, b in intervals), default=0)
    codes = _Rows(rec.file["raw"]["adc"], min(n, last))
    for start, p in iter_processed(
        codes, rig=rig, calibration=None, rate_hz=rate_hz, adc_bits=adc_bits, chunk_frames=chunk_frames
    ):
        stop = start + len(p)
        for (a, b), dest in zip(intervals, out):
            lo, hi = max(a, start), min(b, stop)
            if hi > lo:
                dest[lo - a:hi - a] = p.filtered_ohm[lo - start:hi - start]
    return out


@dataclass
class HoldInfo:
    """One labelled interval seen while looking for holds (for the report).

    Attributes
    ----------
    file : str
    label : str
    t_start_s, t_end_s : float
        Device time, s.
    reference_per_m : ndarray or None
        Per-segment reference curvature, 1/m (None: the label states none).
    frames, steady_frames : int
    used : bool
    note : str
    """

    file: str
    label: str
    t_start_s: float
    t_end_s: float
    reference_per_m: np.ndarray | None
    frames: int = 0
    steady_frames: int = 0
    used: bool = False
    note: str = ""


def holds_from_recording(
    rec: Recording,
    *,
    rig: Rig,
    table: dict | None = None,
    rate_hz: float,
    adc_bits: int,
    only_flat: bool = False,
) -> tuple[list[Hold], list[HoldInfo]]:
    """The holds of a recording: labelled intervals that state a reference curvature.

    Each label is mapped with :func:`acquire.core.calibration.reference_for`; a
    label that states no reference (``grasp``, ``notes``) is listed, not used.
    The steady part of each interval (:func:`acquire.core.calibration.steady_part`
    on the filtered resistances) becomes a :class:`Hold`.

    Parameters
    ----------
    only_flat : bool
        Use only holds whose reference is 0 for every segment (for taring).

    Returns
    -------
    (holds, infos)

    Raises
    ------
    UserError
        A label starts like a reference but cannot be read, or a table entry
        has the wrong number of values (message names the recording and label).
    """
    labels = rec.labels()
    n = rec.n_frames
    t = rec.file["raw"]["t_device_s"][:n]
    t_last = float(t[-1]) if n else 0.0
    infos: list[HoldInfo] = []
    wanted: list[tuple[int, int]] = []
    for lb in labels:
        try:
            ref = reference_for(lb.text, n_segments=rig.n_segments, table=table)
        except (LabelError, CalibrationError) as exc:
            raise UserError(f"{rec.path}: label {lb.text!r} at {lb.t_start_s:.3f} s: {exc}") from None
        t1 = lb.t_end_s
        info = HoldInfo(str(rec.path), lb.text, lb.t_start_s, t1, ref)
        infos.append(info)
        if ref is None:
            info.note = "states no reference; not used"
            continue
        if only_flat and not np.all(ref[np.isfinite(ref)] == 0):
            info.note = "not flat; not used for taring"
            info.reference_per_m = None
            continue
        if not math.isfinite(t1):
            # an interval a killed recorder never closed: it ran to the last frame
            t1 = info.t_end_s = t_last
            info.note = "never closed; taken to end at the last frame"
        a = int(np.searchsorted(t, lb.t_start_s, side="left"))
        b = int(np.searchsorted(t, t1, side="right"))
        info.frames = max(0, b - a)
        wanted.append((a, b))
    ref_infos = [i for i in infos if i.reference_per_m is not None]
    if not ref_infos:
        return [], infos
    res = filtered_intervals(rec, rig=rig, rate_hz=rate_hz, adc_bits=adc_bits, intervals=wanted)
    holds = []
    for info, (a, b), r in zip(ref_infos, wanted, res):
        if b <= a:
            info.note = "no frames in the interval; not used"
            continue
        mask = steady_part(t[a:b], r, info.t_start_s, info.t_end_s)
        info.steady_frames = int(mask.sum())
        if info.steady_frames < MIN_STEADY_FRAMES:
            info.note = (info.note + "; " if info.note else "") + (
                f"only {info.steady_frames} steady frames; not used"
            )
            continue
        info.used = True
        holds.append(Hold(
            reference_per_m=info.reference_per_m,
            resistance_ohm=r[mask],
            label=f"{info.label} ({Path(info.file).name}, {info.t_start_s:.2f} s)",
        ))
    return holds, infos


# ----------------------------------------------------------------------------- calibrate


def _interior_references(refs: np.ndarray) -> list[tuple]:
    """Bent references that lie inside the range of the others, segment by segment.

    Leaving out the largest bend of a side would test extrapolation, which no
    degree does well and which the calibrated range excludes anyway.
    """
    keys = sorted({tuple(np.round(r, 9)) for r in refs})
    out = []
    for key in keys:
        k = np.array(key, dtype=np.float64)
        if not np.any(np.nan_to_num(k) != 0):
            continue
        others = np.array([o for o in keys if o != key], dtype=np.float64)
        with np.errstate(invalid="ignore"):
            pos_ok = (k <= 0) | np.any(others >= k, axis=0)
            neg_ok = (k >= 0) | np.any(others <= k, axis=0)
        if np.all((pos_ok & neg_ok) | ~np.isfinite(k)):
            out.append(key)
    return out


def _cv_errors(holds: Sequence[Hold], *, rig: Rig, degree: int, folds: list[tuple]) -> dict[str, float] | None:
    """Leave-one-reference-out prediction RMS per side (``positive``, ``negative``), 1/m.

    None if some fold cannot be fitted at this degree. The two sides are
    fitted independently, so each side's error does not depend on the other's degree.
    """
    refs = np.array([np.asarray(h.reference_per_m, dtype=np.float64) for h in holds])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a segment NaN throughout a hold
        means = np.array([np.nanmean(h.resistance_ohm, axis=0) for h in holds])
    keys = [tuple(np.round(r, 9)) for r in refs]
    sq = {"positive": 0.0, "negative": 0.0}
    cnt = {"positive": 0, "negative": 0}
    for key in folds:
        keep = [h for h, k in zip(holds, keys) if k != key]
        out = np.array([k == key for k in keys])
        try:
            cal, _ = fit_calibration(keep, rig=rig, degree=degree)
        except CalibrationError:
            return None
        ref = refs[out]
        err = cal.curvature_per_m(means[out]) - ref
        for side, sel in (("positive", ref > 0), ("negative", ref < 0)):
            ok = sel & np.isfinite(err)
            sq[side] += float(np.sum(err[ok] ** 2))
            cnt[side] += int(ok.sum())
    return {side: math.sqrt(sq[side] / cnt[side]) if cnt[side] else math.nan for side in sq}


def choose_degree(
    holds: Sequence[Hold], *, rig: Rig, max_degree: int = 3
) -> tuple[tuple[int, int], dict[int, dict[str, float]]]:
    """Pick the polynomial degree of each side of the calibration by cross-validation.

    For each degree 1 .. ``max_degree`` the fit is repeated leaving out the
    holds of one bent reference at a time (each reference that lies inside
    the range of the others: interpolation is what a calibration is used
    for) and predicting them. Per side (positive, negative bends), the degree
    with the smallest prediction RMS wins; a higher degree must beat the lower
    one by more than 5 %, so noise does not buy flexibility. A side without
    such a reference gets degree 2 (:func:`fit_calibration` lowers it where
    the side has fewer distinct references).

    Returns
    -------
    ((degree_positive, degree_negative), cv_rms_per_m)
        The degrees, and per degree tried the cross-validated RMS of each
        side, 1/m (NaN: nothing to predict on that side).
    """
    refs = np.array([np.asarray(h.reference_per_m, dtype=np.float64) for h in holds])
    folds = _interior_references(refs)
    if not folds:
        return (2, 2), {}
    scores = {}
    for d in range(1, max_degree + 1):
        e = _cv_errors(holds, rig=rig, degree=d, folds=folds)
        if e is not None:
            scores[d] = e
    chosen = []
    for side in ("positive", "negative"):
        tried = [d for d in sorted(scores) if math.isfinite(scores[d][side])]
        if not tried:
            chosen.append(2)
            continue
        best = tried[0]
        for d in tried[1:]:
            if scores[d][side] < 0.95 * scores[best][side]:
                best = d
        chosen.append(best)
    return (chosen[0], chosen[1]), scores


@dataclass
class CalibrationRun:
    """What :func:`calibrate_files` did (for the report)."""

    calibration: Calibration
    report: FitReport
    degree: tuple[int, int]
    cv_rms_per_m: dict
    infos: list[HoldInfo]
    notes: list[str] = field(default_factory=list)
    recordings: list[dict] = field(default_factory=list)


def calibrate_files(
    files: Sequence[str | os.PathLike],
    *,
    rig: Rig,
    table: dict | None = None,
    degree: int | tuple[int, int] | None = None,
) -> CalibrationRun:
    """Fit a calibration from labelled recordings.

    Parameters
    ----------
    files : sequence of path
    rig : Rig
        The rig the calibration is for; each recording's own rig must agree
        with it (:func:`check_recording_rig`).
    table : dict, optional
        A reference table (:func:`acquire.core.calibration.load_reference_table`).
    degree : int or (int, int), optional
        Polynomial degree (per side); default: :func:`choose_degree`.

    Raises
    ------
    UserError
        Unreadable recording, rig disagreement, unreadable label, no usable
        hold, or a fit that cannot be made (no flat hold, wrong sign, ...).
    """
    notes: list[str] = []
    holds: list[Hold] = []
    infos: list[HoldInfo] = []
    recordings: list[dict] = []
    for f in files:
        with open_recording(f, allow_live=False) as rec:
            if rec.recovered:
                notes.append(f"{rec.path}: was left unclosed by its recorder; recovered")
            notes.extend(check_recording_rig(recording_rig(rec), rig, where=str(rec.path)))
            n = rec.n_frames
            rate, rate_notes = recording_rate_hz(rec, t_device_s=rec.file["raw"]["t_device_s"][: min(n, 100_000)])
            bits, bit_notes = _adc_bits(rec)
            notes.extend(rate_notes + bit_notes)
            h, i = holds_from_recording(rec, rig=rig, table=table, rate_hz=rate, adc_bits=bits)
            holds.extend(h)
            infos.extend(i)
            # hashed after opening: a recovered file's bytes are those it keeps from now on
            recordings.append({
                "path": str(f),  # as given: the user's own context; the hash identifies the file
                "name": Path(f).name,
                "sha256": file_sha256(f),
                "frames": n,
                "holds": [x.label for x in i if x.used],
            })
    if table is not None:
        seen = {i.label for i in infos}
        unused = [k for k in table if k not in seen]
        if unused:
            notes.append(f"reference table: no label matches {', '.join(repr(k) for k in unused)}")
    if not holds:
        names = ", ".join(str(f) for f in files)
        found = sorted({i.label for i in infos})
        why = (
            f"labels found: {', '.join(repr(x) for x in found[:8])}{' ...' if len(found) > 8 else ''}"
            if found else "no labels at all"
        )
        skipped = [i for i in infos if i.reference_per_m is not None and not i.used]
        if skipped:
            why += f"; {len(skipped)} reference label(s) without enough steady frames"
        raise UserError(
            f"{names}: no usable labelled holds ({why}); label holds flat, radius=25mm, curvature=40/m "
            f"or give --reference TABLE"
        )
    cv: dict = {}
    if degree is None:
        degree, cv = choose_degree(holds, rig=rig)
    degree = (degree, degree) if np.ndim(degree) == 0 else (int(degree[0]), int(degree[1]))
    cal, report = fit_calibration(holds, rig=rig, degree=degree, recordings=recordings)
    return CalibrationRun(
        calibration=cal, report=report, degree=degree, cv_rms_per_m=cv, infos=infos, notes=notes,
        recordings=recordings,
    )


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def _check_new_output(out: Path, *, force: bool, inputs: Sequence[Path], what: str, can_force: bool = True) -> None:
    if not out.parent.is_dir():
        raise UserError(f"{out}: folder {out.parent} does not exist")
    for p in inputs:
        if _same_file(out, Path(p)) or Path(os.path.abspath(out)) == Path(os.path.abspath(p)):
            raise UserError(f"{out}: is also an input ({p}); write the {what} to another file")
    if out.exists() and not force:
        hint = " (or add --force to replace it)" if can_force else "; tapcurve never overwrites it"
        raise UserError(f"{out}: exists; choose another --out{hint}")
    if out.is_dir():
        raise UserError(f"{out}: is a folder")


def _publish(tmp: Path, out: Path, *, replace: bool) -> None:
    """Give a complete temporary file its final name; an existing ``out`` only if ``replace``.

    Raises FileExistsError when ``out`` exists and may not be replaced.
    """
    if replace:
        os.replace(tmp, out)
        return
    try:
        os.link(tmp, out)  # atomic, and fails if out appeared meanwhile
    except FileExistsError:
        raise
    except OSError as exc:
        if exc.errno not in (errno.EPERM, errno.EOPNOTSUPP, errno.ENOTSUP, errno.EXDEV, errno.EMLINK, errno.ENOSYS):
            raise
        # a file system without hard links (FAT, some network shares): check, then rename
        if out.exists():
            raise FileExistsError(errno.EEXIST, "exists", str(out)) from None
        os.replace(tmp, out)


def _write_text(out: Path, text: str, *, replace: bool) -> None:
    """Write a whole file, never leaving half of it; never replaces unless asked."""
    tmp = out.with_name(f".{out.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "x", encoding="utf-8") as fh:
            fh.write(text)
        _publish(tmp, out, replace=replace)
    except FileExistsError:
        raise UserError(f"{out}: exists; choose another --out") from None
    except OSError as exc:
        raise UserError(f"{out}: cannot write ({exc.strerror or exc})") from None
    finally:
        try:
            tmp.unlink()
        except FileNotFoundError:
            pass


def _format_ref(ref: np.ndarray | None) -> str:
    if ref is None:
        return "-"
    r = ref[np.isfinite(ref)]
    if r.size and np.all(r == r[0]) and np.isfinite(ref).all():
        return f"{r[0]:+.2f}"
    return "[" + " ".join("nan" if not np.isfinite(v) else f"{v:+.1f}" for v in ref) + "]"


def _segment_list(segs: list[int]) -> str:
    if len(segs) == 1:
        return f"segment {segs[0]}"
    if segs == list(range(segs[0], segs[-1] + 1)):
        return f"segments {segs[0]}-{segs[-1]}"
    return "segments " + ",".join(str(k) for k in segs)


def fit_warnings(report: FitReport) -> list[str]:
    """The fit's warnings, the same text for several segments said once."""
    by_text: dict[str, list[int]] = {}
    for seg in report.segments:
        for w in seg.warnings:
            by_text.setdefault(w, []).append(seg.segment)
    return list(report.warnings) + [f"{_segment_list(segs)}: {w}" for w, segs in by_text.items()]


def _print_calibration_report(run: CalibrationRun, out: Path, stream: TextIO) -> None:
    p = lambda *a: print(*a, file=stream)  # noqa: E731
    p("labelled intervals:")
    p("  file                      label                     t_start..t_end s   ref 1/m   frames  steady  used")
    for i in run.infos:
        span = f"{i.t_start_s:7.2f}..{i.t_end_s:7.2f}"
        p(
            f"  {Path(i.file).name[:24]:24s}  {i.label[:24]:24s}  {span:17s}  {_format_ref(i.reference_per_m):>8s}  "
            f"{i.frames:6d}  {i.steady_frames:6d}  {'yes' if i.used else 'no'}{'  (' + i.note + ')' if i.note else ''}"
        )
    dp, dn = run.degree
    if run.cv_rms_per_m:
        p(f"polynomial degree up to {dp} (positive bends) / {dn} (negative bends), chosen by "
          f"leave-one-reference-out prediction RMS, 1/m:")
        for side in ("positive", "negative"):
            cells = [
                f"degree {d}: {e[side]:.3f}" for d, e in run.cv_rms_per_m.items() if math.isfinite(e[side])
            ]
            p(f"  {side}: {', '.join(cells) if cells else 'no reference inside the others to predict'}")
    else:
        p(f"polynomial degree up to {dp} / {dn} (no reference inside the others' range to cross-validate with)")
    p("fit per segment (points: holds used; residual: model - reference at the hold means):")
    p("  segment  points  frames  range covered 1/m    rms residual 1/m  % of range  degree +/-")
    for sr in run.report.segments:
        p(
            f"  {sr.segment:7d}  {sr.n_holds:6d}  {sr.n_frames:6d}  {sr.curvature_min_per_m:+8.2f} .. "
            f"{sr.curvature_max_per_m:+8.2f}  {sr.rms_residual_per_m:16.3f}  {sr.rms_residual_percent:10.2f}  "
            f"{sr.degree_positive}/{sr.degree_negative}"
        )
    warns = fit_warnings(run.report)
    p("warnings:" if warns else "warnings: none")
    for w in warns:
        p(f"  {w}")
    p(f"wrote {out}")


def calibrate_command(
    *,
    files: Sequence[str],
    rig_path: str,
    out_path: str,
    reference_path: str | None = None,
    force: bool = False,
    stdout: TextIO | None = None,
    stderr: TextIO | None = None,
) -> int:
    """``tapcurve calibrate FILE... --rig R --out CAL.json [--reference TABLE] [--force]``.

    Prints the fit report to ``stdout`` and warnings to ``stderr``; writes
    the calibration. Returns 0.

    Raises
    ------
    UserError
        See :func:`calibrate_files`; also an existing output without ``force``.
    """
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    out = Path(out_path)
    rig = load_rig(rig_path)
    inputs = [Path(f) for f in files] + [Path(rig_path)] + ([Path(reference_path)] if reference_path else [])
    _check_new_output(out, force=force, inputs=inputs, what="calibration")
    table = load_reference_table(reference_path) if reference_path else None
    run = calibrate_files(files, rig=rig, table=table)
    for note in run.notes:
        _warn(note, stderr)
    for w in fit_warnings(run.report):
        _warn(w, stderr)
    _write_text(out, run.calibration.to_json(), replace=force)
    _print_calibration_report(run, out, stdout)
    return 0


# ----------------------------------------------------------------------------- tare


@dataclass
class TareRun:
    """What :func:`tare_calibration` did."""

    calibration: Calibration
    flat_ohm: np.ndarray
    old_r0_ohm: np.ndarray
    old_reading_per_m: np.ndarray
    steady_frames: int
    notes: list[str] = field(default_factory=list)


def tare_calibration(file: str | os.PathLike, *, calibration: Calibration) -> TareRun:
    """Re-zero ``calibration`` at the flat resistances of a recording.

    The frames used: the steady parts of the recording's ``flat`` holds, or,
    if it has no reference labels at all, the steady part of the whole
    recording. The new flat resistance of each segment is the median.

    Raises
    ------
    UserError
        The recording's rig does not fit the calibration, it has bent holds
        but no flat one, or it has no steady frames.
    """
    notes: list[str] = []
    with open_recording(file, allow_live=False) as rec:
        if rec.recovered:
            notes.append(f"{rec.path}: was left unclosed by its recorder; recovered")
        rig = recording_rig(rec)
        notes.extend(calibration.check_rig(rig))
        n = rec.n_frames
        if n < MIN_STEADY_FRAMES:
            raise UserError(f"{rec.path}: only {n} frames; record the sensor flat for a second or more")
        t = rec.file["raw"]["t_device_s"][:n]
        rate, rate_notes = recording_rate_hz(rec, t_device_s=t[:100_000])
        bits, bit_notes = _adc_bits(rec)
        notes.extend(rate_notes + bit_notes)
        holds, infos = holds_from_recording(rec, rig=rig, rate_hz=rate, adc_bits=bits, only_flat=True)
        bent = [i.label for i in infos if i.note.startswith("not flat")]
        if not holds:
            if bent:
                raise UserError(
                    f"{rec.path}: no usable 'flat' label (labels state bends: {', '.join(repr(b) for b in bent[:5])}); "
                    f"tare needs the sensor held flat"
                )
            if any(i.reference_per_m is not None for i in infos):
                raise UserError(f"{rec.path}: its 'flat' labels have too few steady frames to tare")
            (r,) = filtered_intervals(rec, rig=rig, rate_hz=rate, adc_bits=bits, intervals=[(0, n)])
            mask = steady_part(t, r, float(t[0]), float(t[-1]))
            if mask.sum() < MIN_STEADY_FRAMES:
                raise UserError(f"{rec.path}: the sensor never held still long enough to tare")
            frames = r[mask]
            notes.append(f"{rec.path}: no 'flat' label; taking the whole recording as flat")
        else:
            frames = np.concatenate([h.resistance_ohm for h in holds])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # an all-NaN segment: tared() names it
        flat = np.nanmedian(np.where(np.isfinite(frames), frames, np.nan), axis=0)
    old_reading = calibration.curvature_per_m(flat[None, :])[0]
    tared = calibration.tared(flat)
    change = flat / calibration.r0_ohm - 1.0
    for k in np.flatnonzero(np.abs(change) > TARE_WARN_FRACTION):
        notes.append(
            f"segment {int(k)}: flat resistance moved {100 * change[k]:+.1f} % "
            f"({calibration.r0_ohm[k]:.1f} -> {flat[k]:.1f} ohm); was the sensor really flat?"
        )
    return TareRun(
        calibration=tared, flat_ohm=flat, old_r0_ohm=np.array(calibration.r0_ohm),
        old_reading_per_m=old_reading, steady_frames=int(frames.shape[0]), notes=notes,
    )


def tare_command(
    *,
    file: str,
    calibration_path: str,
    out_path: str,
    stdout: TextIO | None = None,
    stderr: TextIO | None = None,
) -> int:
    """``tapcurve tare FILE --calibration C --out CAL.json``: a new, re-zeroed calibration file.

    The input calibration is never changed; an existing ``--out`` is refused.
    Returns 0.
    """
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    out = Path(out_path)
    _check_new_output(
        out, force=False, inputs=[Path(calibration_path), Path(file)], what="tared calibration", can_force=False
    )
    cal = Calibration.load(calibration_path)
    run = tare_calibration(file, calibration=cal)
    for note in run.notes:
        _warn(note, stderr)
    _write_text(out, run.calibration.to_json(), replace=False)
    p = lambda *a: print(*a, file=stdout)  # noqa: E731
    p(f"tare from {file}: {run.steady_frames} steady frames")
    p("segment  R0 before ohm  R0 now ohm  change %  old calibration read 1/m")
    for k in range(cal.n_segments):
        p(
            f"{k:7d}  {run.old_r0_ohm[k]:13.1f}  {run.flat_ohm[k]:10.1f}  {100 * (run.flat_ohm[k] / run.old_r0_ohm[k] - 1):8.2f}"
            f"  {run.old_reading_per_m[k]:+10.3f}"
        )
    p(f"wrote {out}")
    return 0


# ----------------------------------------------------------------------------- process


class _Progress:
    """A progress bar on a terminal, or sparse progress lines in a log."""

    def __init__(self, *, total: int, enabled: bool, stream: TextIO, label: str):
        self.total = max(1, int(total))
        self.stream = stream
        tty = enabled and bool(getattr(stream, "isatty", lambda: False)())
        self.mode = None
        if enabled and tty and total >= PROGRESS_MIN_FRAMES:
            self.mode = "bar"
        elif enabled and total >= PROGRESS_LOG_MIN_FRAMES:
            self.mode = "lines"
        self.label = label
        self._next_line = 0.25

    def update(self, done: int) -> None:
        f = min(1.0, done / self.total)
        if self.mode == "bar":
            width = 30
            fill = int(round(f * width))
            self.stream.write(f"\r{self.label} [{'#' * fill}{'.' * (width - fill)}] {100 * f:5.1f} %")
            self.stream.flush()
        elif self.mode == "lines" and f >= self._next_line:
            self.stream.write(f"tapcurve: {self.label}: {100 * f:.0f} % ({done} of {self.total} frames)\n")
            self.stream.flush()
            while self._next_line <= f:
                self._next_line += 0.25

    def close(self) -> None:
        if self.mode == "bar":
            self.stream.write("\n")
            self.stream.flush()


def _copy_attrs(src, dst, *, skip=()) -> None:
    for key, value in src.attrs.items():
        if key not in skip:
            dst.attrs[key] = value


def _utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def process_recording(
    file: str | os.PathLike,
    *,
    calibration_path: str | os.PathLike,
    out_path: str | os.PathLike,
    zero_phase: bool = False,
    progress: bool = False,
    chunk_frames: int = CHUNK_FRAMES,
    progress_stream: TextIO | None = None,
) -> dict:
    """Write a copy of a recording with ``/derived`` computed from a calibration.

    The copy holds every group of ``file`` except its old ``/derived`` (if
    any), the root attributes with ``calibration_json`` set to the calibration
    used, and a new ``/derived``: ``curvature`` float32 (N, S) 1/m, ``s_m``
    float64 (P,) m, ``xy`` float32 (N, P, 2) m, each with ``units``. The copy is
    written under a temporary name and appears under ``out_path`` only when
    complete. ``file`` is only read (but recovered first if a killed recorder
    left it unclosed).

    Parameters
    ----------
    zero_phase : bool
        Forward-backward filters (no delay, offline only) instead of the live
        path's causal ones; needs 8 * S bytes per frame in memory.
    progress : bool
        Allow a progress bar (shown on a terminal for long files).

    Returns
    -------
    dict
        ``frames``, ``nan_frames`` (frames without a shape), ``outside_frames``
        (per segment, beyond the calibrated range), ``filter``, ``notes``.

    Raises
    ------
    UserError
        ``out_path`` exists or cannot be written, the recording is missing,
        unreadable or still being written, the calibration is unreadable or
        does not fit the recording's rig.
    """
    src_path = Path(file)
    out = Path(out_path)
    _check_new_output(
        out, force=False, inputs=[src_path, Path(calibration_path)], what="processed copy", can_force=False
    )
    cal = Calibration.load(calibration_path)
    cal_sha = file_sha256(calibration_path)
    notes: list[str] = []
    with open_recording(src_path, allow_live=False) as rec:
        if rec.recovered:
            notes.append(f"{rec.path}: was left unclosed by its recorder; recovered before reading")
        rig = recording_rig(rec)
        notes.extend(cal.check_rig(rig))
        n = rec.n_frames
        raw = rec.file["raw"]
        rate, rate_notes = recording_rate_hz(rec, t_device_s=raw["t_device_s"][: min(n, 100_000)])
        bits, bit_notes = _adc_bits(rec)
        notes.extend(rate_notes + bit_notes)
        if rec.has_derived:
            notes.append(f"{rec.path}: has /derived already; the copy gets a new one")
        recon = Reconstructor.from_rig(rig, spacing_m=SPACING_M)
        s_m = recon.s_m
        src_sha = file_sha256(src_path)
        tmp = out.with_name(f".{out.name}.{os.getpid()}.partial")
        try:
            fo = h5py.File(tmp, "w-", libver=LIBVER)
        except (OSError, FileExistsError) as exc:
            raise UserError(f"{out}: cannot create ({exc})") from None
        outside = np.zeros(rig.n_segments, dtype=np.int64)
        nan_frames = 0
        bar = _Progress(total=n, enabled=progress, stream=progress_stream or sys.stderr, label=f"processing {src_path.name}")
        try:
            with fo:
                fi = rec.file
                _copy_attrs(fi, fo, skip=("calibration_json",))
                fo.attrs["calibration_json"] = cal.to_json()
                for name in fi:
                    if name != "derived":
                        fi.copy(fi[name], fo, name=name)
                # a killed writer may have extended one /raw column further than the rest
                for name, ds in fo["raw"].items():
                    if isinstance(ds, h5py.Dataset) and ds.shape and ds.shape[0] > n and ds.maxshape[0] is None:
                        ds.resize(n, axis=0)
                n_points = create_derived(fo, n_segments=rig.n_segments, s_m=s_m, tap_index=recon.tap_index)
                g = fo["derived"]
                curv, xy = g["curvature"], g["xy"]
                curv.resize(n, axis=0)
                xy.resize(n, axis=0)
                for start, p in iter_processed(
                    _Rows(raw["adc"], n), rig=rig, calibration=cal, rate_hz=rate, adc_bits=bits,
                    spacing_m=SPACING_M, zero_phase=zero_phase, chunk_frames=chunk_frames,
                ):
                    stop = start + len(p)
                    curv[start:stop] = p.curvature_per_m
                    xy[start:stop] = p.xy_m[:, :n_points]
                    outside += p.outside_calibration.sum(axis=0)
                    nan_frames += int(np.count_nonzero(~np.isfinite(p.curvature_per_m).all(axis=1)))
                    bar.update(stop)
                a = g.attrs
                a["filter"] = "zero-phase (forward-backward, offline)" if zero_phase else "causal (as live)"
                a["spike_window"] = rig.spike_window
                a["lowpass_hz"] = rig.lowpass_hz
                a["lowpass_order"] = rig.lowpass_order
                a["rate_hz"] = rate
                a["method"] = "smooth"
                a["processed_utc"] = _utc_now()
                a["software_version"] = software_version()
                a["source_file"] = src_path.name
                a["source_sha256"] = src_sha
                a["calibration_file"] = Path(calibration_path).name
                a["calibration_sha256"] = cal_sha
                a["frames_without_shape"] = nan_frames
                a["frames_outside_calibration"] = outside
                a["tap_index"] = recon.tap_index
            bar.close()
            try:
                _publish(tmp, out, replace=False)  # never replaces a file that appeared meanwhile
            except FileExistsError:
                raise UserError(f"{out}: exists; tapcurve never overwrites (choose another --out)") from None
            except OSError as exc:
                raise UserError(f"{out}: cannot write ({exc.strerror or exc})") from None
        except OSError as exc:  # disk full and the like while writing the copy
            raise UserError(f"{out}: writing failed ({str(exc).splitlines()[0] if str(exc) else exc})") from None
        finally:
            try:
                tmp.unlink()
            except FileNotFoundError:
                pass
    for k in np.flatnonzero(outside):
        notes.append(
            f"segment {int(k)}: {int(outside[k])} of {n} frames ({100.0 * outside[k] / max(n, 1):.1f} %) beyond the "
            f"calibrated range {cal.curvature_min_per_m[k]:.2f} .. {cal.curvature_max_per_m[k]:.2f} 1/m (extrapolated)"
        )
    if nan_frames:
        notes.append(f"{nan_frames} of {n} frames have no shape (unmeasurable readings: open tap, short, saturation)")
    return {
        "frames": n,
        "nan_frames": nan_frames,
        "outside_frames": outside.tolist(),
        "filter": "zero-phase" if zero_phase else "causal",
        "notes": notes,
    }


def process_command(
    *,
    file: str,
    calibration_path: str,
    out_path: str,
    zero_phase: bool = False,
    progress: bool = True,
    stdout: TextIO | None = None,
    stderr: TextIO | None = None,
) -> int:
    """``tapcurve process FILE --calibration CAL --out OUT.h5 [--zero-phase] [--quiet]``. Returns 0."""
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    summary = process_recording(
        file, calibration_path=calibration_path, out_path=out_path, zero_phase=zero_phase,
        progress=progress, progress_stream=stderr,
    )
    for note in summary["notes"]:
        _warn(note, stderr)
    print(
        f"{out_path}: {summary['frames']} frames with /derived ({summary['filter']} filters, "
        f"calibration {calibration_path})",
        file=stdout,
    )
    return 0
