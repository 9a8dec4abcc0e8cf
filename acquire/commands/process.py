"""``tapcurve process``: a copy of a recording with ``/derived`` computed (the input is never modified).

Threads: the calling (main) thread.
"""
from __future__ import annotations

import glob
import os
import sys
from pathlib import Path
from typing import TextIO

import h5py
import numpy as np

from acquire.core.calibration import (
    Calibration,
    file_sha256,
)
from acquire.about import utc_now_iso
from acquire.about import software_version
from acquire.errors import UserError
from acquire.core.pipeline import iter_processed, shape_spacing_m
from acquire.core.reconstruct import Reconstructor
from acquire.store.recording import DERIVED_OPTIONAL, LIBVER, create_derived, open_recording, pack_xy
from acquire.store.outputs import check_output
from acquire.commands.common import (
    CHUNK_FRAMES, PROGRESS_MIN_FRAMES, SPACING_M, _Rows, _adc_bits, _warn, publish_output, recording_rate_hz,
    recording_rig,
)

__all__ = ["process_recording", "process_command"]


def _progress(*, total: int, enabled: bool, stream: TextIO, label: str):
    """A progress bar (tqdm) on a terminal for long files; nothing in a log or for short files."""
    from tqdm import tqdm

    tty = bool(getattr(stream, "isatty", lambda: False)())
    show = enabled and tty and total >= PROGRESS_MIN_FRAMES
    return tqdm(total=int(total), disable=not show, file=stream, desc=label, unit=" frames", unit_scale=True,
                leave=False, mininterval=0.25)


def _copy_attrs(src, dst, *, skip=()) -> None:
    for key, value in src.attrs.items():
        if key not in skip:
            dst.attrs[key] = value


def _partial_path(out: Path) -> Path:
    """A temporary name beside ``out``; partial files of killed runs (their process gone) are removed."""
    for old in out.parent.glob(f".{glob.escape(out.name)}.*.partial"):
        try:
            pid = int(old.name[len(out.name) + 2:-len(".partial")])
            os.kill(pid, 0)  # still running: not ours to remove
        except ProcessLookupError:
            old.unlink(missing_ok=True)
        except (ValueError, PermissionError, OSError):
            pass
    return out.with_name(f".{out.name}.{os.getpid()}.partial")


def _copy_or_link(fi: h5py.File, fo: h5py.File, *, n: int, src_path: Path, out: Path, derived_only: bool) -> None:
    """Everything but /derived: copied, or linked to the source file (HDF5 external links)."""
    for name in fi:
        if name == "derived":
            continue
        if derived_only:
            # relative to the output's folder: HDF5 looks for a relative target beside the linking file
            fo[name] = h5py.ExternalLink(os.path.relpath(src_path.resolve(), out.resolve().parent), f"/{name}")
        else:
            fi.copy(fi[name], fo, name=name)
    if derived_only:
        return
    # a killed writer may have extended one /raw column further than the rest
    for ds in fo["raw"].values():
        if isinstance(ds, h5py.Dataset) and ds.shape and ds.shape[0] > n and ds.maxshape[0] is None:
            ds.resize(n, axis=0)


def _write_derived(fo, rec, *, rig, cal, recon, n, rate, bits, spacing_m, zero_phase, chunk_frames, bar):
    """Compute /derived chunk by chunk; returns (frames beyond the calibration per segment, frames without shape)."""
    n_points = create_derived(
        fo, n_segments=rig.n_segments, s_m=recon.s_m, tap_index=recon.tap_index,
        with_force=cal.force_model is not None, actuation_unit=None if rig.actuation is None else rig.actuation.unit,
    )
    g = fo["derived"]
    curv, xy = g["curvature"], g["xy"]
    extra = [g[name] for name in DERIVED_OPTIONAL if name in g]
    for ds in [curv, xy, *extra]:
        ds.resize(n, axis=0)
    outside = np.zeros(rig.n_segments, dtype=np.int64)
    nan_frames = 0
    for start, p in iter_processed(
        _Rows(rec.file["raw"]["adc"], n), rig=rig, calibration=cal, rate_hz=rate, adc_bits=bits,
        spacing_m=spacing_m, zero_phase=zero_phase, chunk_frames=chunk_frames, restarts=rec.restart_frames(),
    ):
        stop = start + len(p)
        curv[start:stop] = p.curvature_per_m
        xy[start:stop] = pack_xy(p.xy_m[:, :n_points])
        for ds in extra:  # force_n, actuation
            value = getattr(p, ds.name.rsplit("/", 1)[-1])
            ds[start:stop] = np.nan if value is None else value
        outside += p.outside_calibration.sum(axis=0)
        nan_frames += int(np.count_nonzero(~np.isfinite(p.curvature_per_m).all(axis=1)))
        bar.update(stop - bar.n)
    return outside, nan_frames


def _describe_derived(g, *, rig, rate, zero_phase, src_path, src_sha, calibration_path, cal_sha, nan_frames,
                      outside, recon, derived_only) -> None:
    a = g.attrs
    a["filter"] = "zero-phase (forward-backward, offline)" if zero_phase else "causal (as live)"
    a["spike_window"] = rig.spike_window
    a["lowpass_hz"] = rig.lowpass_hz
    a["lowpass_order"] = rig.lowpass_order
    a["rate_hz"] = rate
    a["method"] = "smooth"
    a["processed_utc"] = utc_now_iso()
    a["software_version"] = software_version()
    a["source_file"] = src_path.name
    a["source_sha256"] = src_sha
    a["calibration_file"] = Path(calibration_path).name
    a["calibration_sha256"] = cal_sha
    a["frames_without_shape"] = nan_frames
    a["frames_outside_calibration"] = outside
    a["tap_index"] = recon.tap_index
    a["raw_linked_from_source"] = bool(derived_only)


def _notes_after(outside, nan_frames, n, cal) -> list[str]:
    notes = []
    for k in np.flatnonzero(outside):
        notes.append(
            f"segment {int(k)}: {int(outside[k])} of {n} frames ({100.0 * outside[k] / max(n, 1):.1f} %) beyond the "
            f"calibrated range {cal.curvature_min_per_m[k]:.2f} .. {cal.curvature_max_per_m[k]:.2f} 1/m (extrapolated)"
        )
    if nan_frames:
        notes.append(f"{nan_frames} of {n} frames have no shape (unmeasurable readings: open tap, short, saturation)")
    return notes


# long on purpose: mostly its docstring; the work is four calls
def process_recording(
    file: str | os.PathLike,
    *,
    calibration_path: str | os.PathLike,
    out_path: str | os.PathLike,
    zero_phase: bool = False,
    progress: bool = False,
    chunk_frames: int = CHUNK_FRAMES,
    progress_stream: TextIO | None = None,
    dense_points: bool = False,
    derived_only: bool = False,
) -> dict:
    """Write a copy of a recording with ``/derived`` computed from a calibration.

    The copy holds every group of ``file`` except its old ``/derived`` (if
    any), the root attributes with ``calibration_json`` set to the calibration
    used, and a new ``/derived``: ``curvature`` float32 (N, S) 1/m, ``s_m``
    float64 (P,) m, ``xy`` float32 (N, P, 2) m, with a force model
    ``force_n`` float32 (N, 2) N, with a rig ``[actuation]`` ``actuation``
    float32 (N,) in its unit, each with ``units``. The copy is
    written under a temporary name and appears under ``out_path`` only when
    complete (the input is never modified; a recovered input is one a killed
    recorder left unclosed).

    Parameters
    ----------
    zero_phase : bool
        Forward-backward filters (no delay, offline only) instead of the live
        path's causal ones; needs 8 * S bytes per frame in memory.
    progress : bool
        Allow a progress bar (shown on a terminal for long files).
    dense_points : bool
        Shape points every millimetre instead of only as dense as the
        calibrated curvature range needs (:func:`acquire.core.pipeline.shape_spacing_m`).
    derived_only : bool
        Write only /derived; every other group is an HDF5 external link to
        ``file`` (which must then stay beside the output, under its name).

    Returns
    -------
    dict
        ``frames``, ``nan_frames`` (frames without a shape), ``outside_frames``
        (per segment, beyond the calibrated range), ``filter``, ``points``, ``notes``.

    Raises
    ------
    UserError
        ``out_path`` exists or cannot be written, the recording is missing,
        unreadable or still being written, the calibration is unreadable or
        does not fit the recording's rig.
    """
    src_path = Path(file)
    out = check_output(out_path, option="--out", inputs=[src_path, Path(calibration_path)], what="processed copy")
    cal = Calibration.load(calibration_path)
    cal_sha = file_sha256(calibration_path)
    notes: list[str] = []
    with open_recording(src_path, allow_live=False) as rec:
        if rec.recovered:
            notes.append(f"{rec.path}: was left unclosed by its recorder; recovered before reading")
        rig = recording_rig(rec)
        notes.extend(cal.check_rig(rig))
        n = rec.n_frames
        rate, rate_notes = recording_rate_hz(rec, t_device_s=rec.file["raw"]["t_device_s"][: min(n, 100_000)])
        bits, bit_notes = _adc_bits(rec)
        notes.extend(rate_notes + bit_notes)
        if rec.has_derived:
            notes.append(f"{rec.path}: has /derived already; the copy gets a new one")
        spacing_m = SPACING_M if dense_points else shape_spacing_m(cal)
        recon = Reconstructor.from_rig(rig, spacing_m=spacing_m)
        src_sha = file_sha256(src_path)
        tmp = _partial_path(out)
        try:
            fo = h5py.File(tmp, "w-", libver=LIBVER)
        except (OSError, FileExistsError) as exc:
            raise UserError(f"{out}: cannot create ({exc})") from None
        bar = _progress(total=n, enabled=progress, stream=progress_stream or sys.stderr, label=f"processing {src_path.name}")
        try:
            with fo:
                fi = rec.file
                _copy_attrs(fi, fo, skip=("calibration_json",))
                fo.attrs["calibration_json"] = cal.to_json()
                _copy_or_link(fi, fo, n=n, src_path=src_path, out=out, derived_only=derived_only)
                outside, nan_frames = _write_derived(
                    fo, rec, rig=rig, cal=cal, recon=recon, n=n, rate=rate, bits=bits, spacing_m=spacing_m,
                    zero_phase=zero_phase, chunk_frames=chunk_frames, bar=bar,
                )
                _describe_derived(
                    fo["derived"], rig=rig, rate=rate, zero_phase=zero_phase, src_path=src_path, src_sha=src_sha,
                    calibration_path=calibration_path, cal_sha=cal_sha, nan_frames=nan_frames, outside=outside,
                    recon=recon, derived_only=derived_only,
                )
            bar.close()
            try:
                publish_output(tmp, out, replace=False)  # never replaces a file that appeared meanwhile
            except FileExistsError:
                raise UserError(f"{out}: exists; tapcurve never overwrites (choose another --out)") from None
            except OSError as exc:
                raise UserError(f"{out}: cannot write ({exc.strerror or exc})") from None
        except OSError as exc:  # disk full and the like while writing the copy
            raise UserError(f"{out}: writing failed ({str(exc).splitlines()[0] if str(exc) else exc})") from None
        finally:
            tmp.unlink(missing_ok=True)
    notes += _notes_after(outside, nan_frames, n, cal)
    return {
        "frames": n,
        "nan_frames": nan_frames,
        "outside_frames": outside.tolist(),
        "filter": "zero-phase" if zero_phase else "causal",
        "points": int(recon.tap_index[-1]) + 1,
        "notes": notes,
    }


def process_command(
    *,
    file: str,
    calibration_path: str,
    out_path: str,
    zero_phase: bool = False,
    progress: bool = True,
    dense_points: bool = False,
    derived_only: bool = False,
    stdout: TextIO | None = None,
    stderr: TextIO | None = None,
) -> int:
    """``tapcurve process FILE --calibration CAL --out OUT.h5 [--zero-phase] [--dense-points] [--derived-only]``."""
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    summary = process_recording(
        file, calibration_path=calibration_path, out_path=out_path, zero_phase=zero_phase,
        progress=progress, progress_stream=stderr, dense_points=dense_points, derived_only=derived_only,
    )
    for note in summary["notes"]:
        _warn(note, stderr)
    print(
        f"{out_path}: {summary['frames']} frames with /derived ({summary['points']} shape points a frame, "
        f"{summary['filter']} filters, calibration {calibration_path})"
        + (f"; raw data linked from {file}, keep it beside" if derived_only else ""),
        file=stdout,
    )
    return 0

