"""What the offline commands share: reading a recording's rig, rate and resistances; writing outputs.

The offline commands (``calibrate``, ``tare``, ``process``) read recordings
through :func:`acquire.store.recording.open_recording` (which recovers a file
a killed recorder left unclosed) and compute segment resistances exactly as
the live path does (:class:`acquire.core.pipeline.Pipeline`), chunk by chunk,
so a long recording is never in memory whole. Every fault a user can cause
raises :class:`acquire.errors.UserError` with one line naming the file, key
or value; warnings go to stderr as ``tapcurve: warning: ...``, reports to
stdout. Threads: the calling (main) thread.
"""
from __future__ import annotations

import errno
import math
import os
import sys
from pathlib import Path
from typing import Sequence, TextIO

import h5py
import numpy as np

from acquire.errors import UserError
from acquire.core.pipeline import iter_processed
from acquire.store.recording import Recording
from acquire.rig import Rig, RigError, parse_rig

__all__ = [
    "recording_rig",
    "check_recording_rig",
    "recording_rate_hz",
    "filtered_intervals",
    "write_text_output",
    "publish_output",
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
        codes, rig=rig, calibration=None, rate_hz=rate_hz, adc_bits=adc_bits, chunk_frames=chunk_frames,
        restarts=rec.restart_frames(),
    ):
        stop = start + len(p)
        for (a, b), dest in zip(intervals, out):
            lo, hi = max(a, start), min(b, stop)
            if hi > lo:
                dest[lo - a:hi - a] = p.filtered_ohm[lo - start:hi - start]
    return out



def publish_output(tmp: Path, out: Path, *, replace: bool) -> None:
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


def write_text_output(out: Path, text: str, *, replace: bool) -> None:
    """Write a whole file, never leaving half of it; never replaces unless asked."""
    tmp = out.with_name(f".{out.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "x", encoding="utf-8") as fh:
            fh.write(text)
        publish_output(tmp, out, replace=replace)
    except FileExistsError:
        raise UserError(f"{out}: exists; choose another --out") from None
    except OSError as exc:
        raise UserError(f"{out}: cannot write ({exc.strerror or exc})") from None
    finally:
        try:
            tmp.unlink()
        except FileNotFoundError:
            pass


