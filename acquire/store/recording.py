"""The recording layout (HDF5) and reading recordings back.

Layout version 1 (the project's contract): root attributes ``layout``,
``layout_version``, ``created_utc``, ``software_version``, ``rig_toml``,
``device_hello`` and, when a calibration was used, ``calibration_json``;
groups ``/raw``, ``/labels``, ``/derived`` (with a calibration), and the
project's own ``/events`` and ``/counters``. Every dataset with a unit has a
``units`` attribute.

Files are written with HDF5 1.10 file-format features (``libver=("v110",
"v110")``), the oldest that allows SWMR, so HDF5 1.10 tools such as Debian's
``h5dump`` read them.
"""
from __future__ import annotations

import json
import os
import struct
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from acquire.about import software_version, utc_now_iso
from acquire.core.labels import LABEL_BYTES, check_label_text
from acquire.errors import UserError
from acquire.link.counters import LINK_COUNTER_NAMES
from firmware_protocol import DROP_CAUSES
from acquire.link.frames import FrameBlock
from acquire.store.h5repair import clear_write_flags, superblock_flags, writer_alive

__all__ = [
    "LAYOUT",
    "LAYOUT_VERSION",
    "LABEL_BYTES",
    "EVENT_TEXT_BYTES",
    "COUNTER_NAMES",
    "RecordingError",
    "Label",
    "Recording",
    "open_recording",
    "create_layout",
    "create_derived",
    "DERIVED_OPTIONAL",
    "pack_xy",
    "XY_STEP_M",
    "COMPRESSION",
    "DERIVED_COMPRESSION",
    "check_label_text",
    "software_version",
]

LAYOUT = "tapcurve-recording"
LAYOUT_VERSION = 1
EVENT_TEXT_BYTES = 1024
LIBVER = ("v110", "v110")
#: columns of /counters/values, one row per flush
COUNTER_NAMES = LINK_COUNTER_NAMES + tuple(f"drop_{cause}" for cause in DROP_CAUSES) + ("ring_lost_frames",)


class RecordingError(UserError):
    """A file that is not a readable recording."""


def _chunk_rows(row_bytes: int) -> int:
    # about 16 KiB per chunk: a flush rewrites at most one partly filled chunk per dataset (the room
    # the recorder keeps free before each flush), deflate still finds its runs, replay reads few chunks
    return int(max(64, min(16384, 16384 // max(1, row_bytes))))


#: compression of the large datasets: deflate (in every HDF5 build) after the byte shuffle, level 1
#: for /raw, which is rewritten at every flush (measured in bench/bench_size.py: shuffle halves the
#: size of shape points again; higher levels gain a few per cent there for several times the time)
COMPRESSION = dict(compression="gzip", compression_opts=1, shuffle=True)
#: /derived is written in whole chunks only (acquire.store.recorder._WholeChunks), once each: level 4
#: stores shape points in 14 % fewer bytes than level 1 for about 3 us more per frame (measured on the
#: virtual finger's grasp, 49 points; levels 5-9 gain 3-6 % more for 1.5-4 times the time)
DERIVED_COMPRESSION = dict(compression="gzip", compression_opts=4, shuffle=True)


def _growing(
    group: h5py.Group, name: str, *, dtype, row_shape=(), units: str | None = None, chunk_rows: int | None = None,
    compress: bool = False,
) -> h5py.Dataset:
    row_bytes = int(np.dtype(dtype).itemsize * int(np.prod(row_shape, dtype=np.int64)))
    filters = (DERIVED_COMPRESSION if group.name == "/derived" else COMPRESSION) if compress else {}
    ds = group.create_dataset(
        name,
        shape=(0, *row_shape),
        maxshape=(None, *row_shape),
        dtype=dtype,
        chunks=(chunk_rows or _chunk_rows(row_bytes), *row_shape),
        **filters,
    )
    if units:
        ds.attrs["units"] = units
    return ds


def create_layout(
    f: h5py.File,
    *,
    n_channels: int,
    channel_names: list[str] | tuple[str, ...],
    rig_toml: str,
    device_hello: str,
    calibration_json: str | None,
) -> None:
    """Create every group, dataset and attribute of the layout (all empty, growing).

    Called before SWMR mode is switched on, which allows no new objects later.
    """
    a = f.attrs
    a["layout"] = LAYOUT
    a["layout_version"] = LAYOUT_VERSION
    a["created_utc"] = utc_now_iso()
    a["software_version"] = software_version()
    a["rig_toml"] = rig_toml
    a["device_hello"] = device_hello
    if calibration_json is not None:
        a["calibration_json"] = calibration_json
    raw = f.create_group("raw")
    adc = _growing(raw, "adc", dtype=np.uint16, row_shape=(n_channels,), units="ADC code", compress=True)
    adc.attrs["channels"] = json.dumps(list(channel_names))
    _growing(raw, "seq", dtype=np.int64, compress=True)
    _growing(raw, "t_device_s", dtype=np.float64, units="s", compress=True)
    _growing(raw, "t_host_s", dtype=np.float64, units="s", compress=True)
    _growing(raw, "status", dtype=np.uint8, compress=True)
    labels = f.create_group("labels")
    _growing(labels, "text", dtype=h5py.string_dtype("utf-8", LABEL_BYTES), chunk_rows=16)
    _growing(labels, "t_start_s", dtype=np.float64, units="s", chunk_rows=16)
    _growing(labels, "t_end_s", dtype=np.float64, units="s", chunk_rows=16)
    labels.attrs["time_base"] = "device time, /raw/t_device_s"
    events = f.create_group("events")
    _growing(events, "t_host_s", dtype=np.float64, units="s", chunk_rows=32)
    _growing(events, "frame", dtype=np.int64, chunk_rows=32)
    _growing(events, "kind", dtype=h5py.string_dtype("utf-8", 16), chunk_rows=32)
    _growing(events, "text", dtype=h5py.string_dtype("utf-8", EVENT_TEXT_BYTES), chunk_rows=32)
    clock = f.create_group("clock")
    clock.attrs["about"] = (
        "device-host clock alignment, one row per flush: the lower envelope of t_host_s - t_device_s "
        "and a running straight-line fit through it (acquire/clock.py); host = device + offset + drift * device"
    )
    _growing(clock, "t_device_s", dtype=np.float64, units="s", chunk_rows=256)
    _growing(clock, "offset_s", dtype=np.float64, units="s", chunk_rows=256)
    _growing(clock, "fit_drift_ppm", dtype=np.float64, units="ppm", chunk_rows=256)
    _growing(clock, "fit_offset_s", dtype=np.float64, units="s", chunk_rows=256)
    counters = f.create_group("counters")
    _growing(counters, "t_host_s", dtype=np.float64, units="s", chunk_rows=32)
    values = _growing(counters, "values", dtype=np.int64, row_shape=(len(COUNTER_NAMES),), chunk_rows=32)
    values.attrs["names"] = json.dumps(list(COUNTER_NAMES))
    counters.attrs["about"] = "cumulative counters, one row per flush; the last row is the final count"


def create_derived(
    f: h5py.File, *, n_segments: int, s_m: np.ndarray, tap_index: np.ndarray, with_force: bool = False,
    actuation_unit: str | None = None,
) -> int:
    """Create /derived for a calibration: curvature (N,S), s_m (P,), xy (N,P,2), and optionally the force.

    ``s_m`` and ``tap_index`` are the reconstructor's (its points may run on
    past the sensor into a fingertip); the file keeps the points along the
    sensor only, so ``s_m`` ends at the sensor length as the layout says.
    ``with_force`` (the calibration has a force model) adds ``force_n``
    float32 (N, 2), N; ``actuation_unit`` (not None: the rig has
    ``[actuation]``, whose ``unit`` it is) adds ``actuation`` float32 (N,) in
    that unit. Returns P, the number of points per frame to write.
    """
    tap_index = np.asarray(tap_index, dtype=np.int64)
    n_points = int(tap_index[-1]) + 1
    g = f.create_group("derived")
    _growing(g, "curvature", dtype=np.float32, row_shape=(n_segments,), units="1/m", compress=True)
    s = g.create_dataset("s_m", data=np.asarray(s_m, dtype=np.float64)[:n_points])
    s.attrs["units"] = "m"
    s.attrs["tap_index"] = tap_index  # s_m[tap_index[k]] is tap k; the last is the sensor's end
    xy = _growing(g, "xy", dtype=np.float32, row_shape=(n_points, 2), units="m", compress=True,
                  chunk_rows=max(256, (256 << 10) // (8 * n_points)))  # ~256 KiB: deflate works on long runs
    xy.attrs["step_m"] = XY_STEP_M  # every stored coordinate is a whole multiple of this
    if with_force:
        force = _growing(g, "force_n", dtype=np.float32, row_shape=(2,), units="N", compress=True)
        force.attrs["about"] = "estimated force at the sensor's far end, base frame (x, y), N"
    if actuation_unit is not None:
        act = _growing(g, "actuation", dtype=np.float32, compress=True)
        act.attrs["units"] = str(actuation_unit)
        act.attrs["about"] = "actuation input in the rig's unit ([actuation] of rig_toml)"
    return n_points


#: per-frame datasets of /derived besides curvature and xy, present when computed
DERIVED_OPTIONAL = ("force_n", "actuation")


#: shape points are rounded to whole multiples of this step, m (2^-17 m, about 7.6 um: each coordinate
#: within 3.8 um, a point within 5.4 um, far inside the 0.05 mm the points are spaced for). A fixed
#: absolute step, unlike a number of mantissa bits, leaves small coordinates (near the base) no finer
#: than large ones: the zeroed low bits compress, 32 % fewer bytes than 13 mantissa bits with the same
#: worst error at 0.06-0.12 m (measured on a bench/bench_size.py recording, deflate 1). A power of two
#: keeps the rounding exact in float32 (only the exponent changes) for coordinates under 128 m.
XY_STEP_M = 2.0 ** -17


def pack_xy(xy_m: np.ndarray) -> np.ndarray:
    """Shape points as stored: float32 rounded to the nearest whole multiple of :data:`XY_STEP_M` (new array).

    Parameters
    ----------
    xy_m : array_like
        Shape points, m, any shape.

    Returns
    -------
    numpy.ndarray
        float32, same shape, owned by the caller; each finite value within
        ``XY_STEP_M / 2`` of the input (ties to even); NaN and inf unchanged.

    Pure; any thread.
    """
    a = np.array(xy_m, dtype=np.float32)  # a copy: scaling by a power of two, rounding, scaling back are exact
    scale = np.float32(1.0 / XY_STEP_M)
    a *= scale
    np.rint(a, out=a)
    a /= scale
    return a


@dataclass(frozen=True)
class Label:
    """A labelled interval in device time (s)."""

    text: str
    t_start_s: float
    t_end_s: float


def _as_text(value) -> str:
    return value.decode("utf-8") if isinstance(value, bytes) else str(value)


class Recording:
    """A recording opened for reading. Use as a context manager.

    Attributes
    ----------
    file : h5py.File
    recovered : bool
        True if the file was left unclosed and its write flags were cleared.
    live : bool
        True if a recorder still writes it (opened in SWMR read mode).
    """

    def __init__(self, path: Path, file: h5py.File, *, recovered: bool, live: bool):
        self.path = path
        self.file = file
        self.recovered = recovered
        self.live = live

    def __enter__(self) -> "Recording":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        self.file.close()

    def refresh(self) -> None:
        """See frames a live writer appended since (SWMR readers only)."""
        if self.live:
            for name in ("adc", "seq", "t_device_s", "t_host_s", "status"):
                self.file["raw"][name].refresh()
            for name in ("text", "t_start_s", "t_end_s"):
                self.file["labels"][name].refresh()
            if "derived" in self.file:
                for name in ("curvature", "xy") + DERIVED_OPTIONAL:
                    if name in self.file["derived"]:
                        self.file["derived"][name].refresh()

    @property
    def n_frames(self) -> int:
        # the shortest /raw column: a killed writer may have extended one more than another
        raw = self.file["raw"]
        return int(min(raw[n].shape[0] for n in ("adc", "seq", "t_device_s", "t_host_s", "status")))

    @property
    def n_channels(self) -> int:
        return int(self.file["raw"]["adc"].shape[1])

    @property
    def channel_names(self) -> list[str]:
        text = self.file["raw"]["adc"].attrs.get("channels")
        return json.loads(_as_text(text)) if text is not None else [f"ch{k}" for k in range(self.n_channels)]

    @property
    def rig_toml(self) -> str:
        return _as_text(self.file.attrs["rig_toml"])

    @property
    def hello(self) -> dict:
        try:
            return json.loads(_as_text(self.file.attrs["device_hello"]))
        except (KeyError, json.JSONDecodeError):
            return {}

    @property
    def calibration_json(self) -> str | None:
        value = self.file.attrs.get("calibration_json")
        return None if value is None else _as_text(value)

    @property
    def has_derived(self) -> bool:
        return "derived" in self.file

    def frames(self, start: int = 0, stop: int | None = None) -> FrameBlock:
        """Frames [start, stop) of /raw as a :class:`FrameBlock` (arrays owned by the caller)."""
        n = self.n_frames
        stop = n if stop is None else min(stop, n)
        start = max(0, min(start, stop))
        raw = self.file["raw"]
        return FrameBlock(
            codes=raw["adc"][start:stop],
            seq=raw["seq"][start:stop],
            t_device_s=raw["t_device_s"][start:stop],
            t_host_s=raw["t_host_s"][start:stop],
            status=raw["status"][start:stop],
        )

    def labels(self) -> list[Label]:
        g = self.file["labels"]
        n = min(g["text"].shape[0], g["t_start_s"].shape[0], g["t_end_s"].shape[0])
        texts = g["text"][:n]
        t0 = g["t_start_s"][:n]
        t1 = g["t_end_s"][:n]
        return [Label(_as_text(t), float(a), float(b)) for t, a, b in zip(texts, t0, t1)]

    def events(self) -> list[tuple[float, int, str, str]]:
        if "events" not in self.file:
            return []
        g = self.file["events"]
        n = min(g[k].shape[0] for k in ("t_host_s", "frame", "kind", "text"))
        return [
            (float(t), int(fr), _as_text(k), _as_text(x))
            for t, fr, k, x in zip(g["t_host_s"][:n], g["frame"][:n], g["kind"][:n], g["text"][:n])
        ]

    def restart_frames(self) -> list[int]:
        """Frame indices where the stream started afresh (reconnect, device reboot), sorted."""
        from acquire.link.frames import RESTART_EVENT_KINDS

        return sorted({fr for _, fr, kind, _ in self.events() if kind in RESTART_EVENT_KINDS})

    def clock(self) -> dict | None:
        """The last clock fit: ``drift_ppm``, ``offset_s``, ``points``, ``span_s``; None if absent."""
        if "clock" not in self.file or self.file["clock"]["fit_drift_ppm"].shape[0] == 0:
            return None
        g = self.file["clock"]
        n = g["fit_drift_ppm"].shape[0]
        t = g["t_device_s"]
        return {
            "drift_ppm": float(g["fit_drift_ppm"][n - 1]),
            "offset_s": float(g["fit_offset_s"][n - 1]),
            "points": int(n),
            "span_s": float(t[n - 1] - t[0]),
        }

    def counters(self) -> dict[str, int]:
        """The last counters row (final counts of a closed recording)."""
        if "counters" not in self.file:
            return {}
        values = self.file["counters"]["values"]
        if values.shape[0] == 0:
            return {}
        names = json.loads(_as_text(values.attrs["names"]))
        return dict(zip(names, (int(v) for v in values[values.shape[0] - 1])))


def _check_layout(f: h5py.File, path: Path) -> None:
    layout = f.attrs.get("layout")
    if layout is None or _as_text(layout) != LAYOUT:
        raise RecordingError(f"{path}: not a tapcurve recording (no layout attribute {LAYOUT!r})")
    version = f.attrs.get("layout_version")
    try:
        version = int(version)
    except (TypeError, ValueError):
        raise RecordingError(f"{path}: layout_version {version!r} is not a number") from None
    if version > LAYOUT_VERSION:
        raise RecordingError(
            f"{path}: layout_version {version} is newer than this tapcurve reads ({LAYOUT_VERSION}); upgrade tapcurve"
        )
    for name in ("raw/adc", "raw/seq", "raw/t_device_s", "raw/t_host_s", "raw/status"):
        if name not in f:
            raise RecordingError(f"{path}: missing dataset /{name}")
    for key in ("rig_toml", "device_hello"):
        if key not in f.attrs:
            raise RecordingError(f"{path}: missing root attribute {key}")


def _check_ours_before_repair(p: Path) -> None:
    try:
        with h5py.File(p, "r", libver="latest", swmr=True) as f:
            layout = f.attrs.get("layout")
    except OSError as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise RecordingError(f"{p}: left open for writing and cannot be read ({first})") from None
    if layout is None or _as_text(layout) != LAYOUT:
        raise RecordingError(
            f"{p}: not a tapcurve recording, and marked open for writing by another program (left untouched)"
        )


def open_recording(path: str | os.PathLike, *, allow_live: bool = True) -> Recording:
    """Open a recording for reading, recovering one a killed recorder left.

    A file whose writer is still running is opened in SWMR read mode
    (``Recording.live``); one whose writer died has its write flags cleared
    first, after which plain h5py and h5dump open it too.

    Raises
    ------
    RecordingError
        Missing, not HDF5, truncated, foreign, or a newer layout version.
    """
    p = Path(path)
    if not p.exists():
        raise RecordingError(f"{p}: no such file")
    if not p.is_file():
        raise RecordingError(f"{p}: not a file")
    if not h5py.is_hdf5(p):
        raise RecordingError(f"{p}: not an HDF5 file")
    recovered = False
    live = False
    try:
        flags = superblock_flags(p)
    except (ValueError, OSError, struct.error) as exc:
        raise RecordingError(f"{p}: damaged or truncated HDF5 file ({exc})") from None
    if flags:
        if writer_alive(p):
            if not allow_live:
                raise RecordingError(f"{p}: a recorder is still writing this file")
            live = True
        else:
            # only ever repair our own recordings: look (read-only, SWMR) before touching anything
            _check_ours_before_repair(p)
            try:
                recovered = clear_write_flags(p)
            except (ValueError, OSError) as exc:
                raise RecordingError(f"{p}: left unclosed and cannot be repaired ({exc})") from None
    try:
        if live:
            f = h5py.File(p, "r", libver="latest", swmr=True)
        else:
            f = h5py.File(p, "r")
    except OSError as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise RecordingError(f"{p}: cannot be opened as HDF5 ({first})") from None
    try:
        _check_layout(f, p)
    except BaseException:
        f.close()
        raise
    return Recording(p, f, recovered=recovered, live=live)
