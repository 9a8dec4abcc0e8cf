"""The virtual finger films itself: camera markers along the finger, as a marker CSV.

A camera looks at the finger's plane and tracks markers (marker K at arc
length ``rig.markers_s_m[K]``, ``rig.markers_offset_m[K]`` along the +y
normal of the curve). It samples the finger's true shape (the model's ground
truth) at its own frame times and writes the project's marker CSV (RFC 4180):
header ``t_s,m0_x_mm,m0_y_mm,...``, one row per camera frame, ``t_s`` the
camera's own clock, positions in the camera's image plane in mm, both cells of
a marker empty where it was not detected.

What makes it a camera rather than the truth (defaults made up for the demo):

- pose: the base frame seen turned by ``angle_rad`` and shifted by
  ``shift_mm``, plus a slow wobble of the base of ``wobble_mm`` (the finger's
  mount is not perfectly rigid);
- clock: ``t_cam = (t_device - offset_s) / (1 + rate_ppm * 1e-6)``, frames at
  ``k / fps`` on the camera clock (defaults: offset 7.3 s, +120 ppm, 60
  frames/s; made up);
- pixel noise ``noise_mm`` 1-sigma per coordinate (0.1 mm: common practice,
  no source; about a pixel at a 100 mm field of view filmed in full HD);
- missed detections, ``missing`` per marker per frame (2 %: common practice,
  no source);
- wild points, ``wild`` per marker per frame (0.1 %: a reflection picked up
  as the marker, displaced 5 .. 20 mm in a random direction; made up).

The randomness is a pure function of (seed, camera frame index, marker), so
any chunking of frames gives the same file.

Threads: :class:`Camera` is immutable and pure (any thread); a
:class:`MarkerWriter` belongs to one thread (the device thread while it runs).
"""
from __future__ import annotations

import csv
import math
import os
from dataclasses import dataclass, fields
from pathlib import Path

import numpy as np

from acquire.errors import UserError
from acquire.rig import Rig
from acquire.virtual.electrics import noise_key, normals, uniforms

__all__ = ["CameraSettings", "Camera", "MarkerWriter", "write_marker_csv", "CAMERA_BOUNDS"]

#: (low, high, unit) of the settable camera values, named in messages
CAMERA_BOUNDS = {
    "fps": (20.0, 240.0, "frames/s"),
    "offset_s": (-60.0, 60.0, "s"),
    "rate_ppm": (-500.0, 500.0, "ppm"),
    "noise_mm": (0.0, 5.0, "mm"),
    "missing": (0.0, 0.5, "(fraction)"),
    "wild": (0.0, 0.1, "(fraction)"),
    "wobble_mm": (0.0, 5.0, "mm"),
}
_WILD_MM = (5.0, 20.0)
_WOBBLE_HZ = (0.13, 0.31)  # slow sway of the mount (made up)


@dataclass(frozen=True)
class CameraSettings:
    """The camera's pose, clock and imperfections (defaults made up for the demo; see the module text).

    Attributes
    ----------
    fps : float
        Frames per second of the camera's clock, 20..240.
    offset_s, rate_ppm : float
        Clock: ``t_cam = (t_device - offset_s) / (1 + rate_ppm * 1e-6)``.
    angle_rad : float
        Rotation of the base frame in the image.
    shift_mm : (float, float)
        Where the base (s = 0) is in the image, mm.
    wobble_mm : float
        Amplitude of the base's slow wobble, mm.
    noise_mm : float
        Position noise, 1-sigma per coordinate, mm.
    missing, wild : float
        Per marker per frame: probability of a missed detection, of a wild point.
    seed : int
        Seeds the noise, misses and wild points.
    """

    fps: float = 60.0
    offset_s: float = 7.3
    rate_ppm: float = 120.0
    angle_rad: float = 0.41
    shift_mm: tuple = (62.0, -18.5)
    wobble_mm: float = 0.2
    noise_mm: float = 0.1
    missing: float = 0.02
    wild: float = 0.001
    seed: int = 0

    def check(self, *, names: dict | None = None) -> "CameraSettings":
        """Return self if every value is within :data:`CAMERA_BOUNDS`; else UserError naming it."""
        names = names or {}
        for key, (lo, hi, unit) in CAMERA_BOUNDS.items():
            v = float(getattr(self, key))
            if not (math.isfinite(v) and lo <= v <= hi):
                raise UserError(f"{names.get(key, 'camera.' + key)} {v:g}: must be {lo:g}..{hi:g} {unit}")
        return self

    def as_dict(self) -> dict:
        """Plain values."""
        return {f.name: (list(v) if isinstance(v := getattr(self, f.name), tuple) else v) for f in fields(self)}


class Camera:
    """Films markers on a finger model (immutable, pure).

    Parameters
    ----------
    settings : CameraSettings
    rig : Rig
        Gives the markers (``markers_s_m``, ``markers_offset_m``).
    """

    def __init__(self, settings: CameraSettings, *, rig: Rig):
        self.settings = settings.check()
        self.rig = rig
        self.marker_s_m = np.array(rig.markers_s_m, dtype=np.float64)
        self.marker_offset_m = np.array(rig.markers_offset_m, dtype=np.float64)
        self._key = noise_key(settings.seed, 0xCA3E)
        rng = np.random.default_rng([settings.seed, 0xCA3F])
        self._wobble_phase = rng.uniform(0.0, 2.0 * math.pi, (2, 2))

    @property
    def n_markers(self) -> int:
        return self.marker_s_m.shape[0]

    # -- clock -----------------------------------------------------------------------------
    def camera_time(self, t_device_s) -> np.ndarray:
        """Camera clock, s, at device times (s)."""
        s = self.settings
        return (np.asarray(t_device_s, dtype=np.float64) - s.offset_s) / (1.0 + s.rate_ppm * 1e-6)

    def device_time(self, t_camera_s) -> np.ndarray:
        """Device time, s, at camera clock readings (s): the inverse of :meth:`camera_time`."""
        s = self.settings
        return np.asarray(t_camera_s, dtype=np.float64) * (1.0 + s.rate_ppm * 1e-6) + s.offset_s

    def frames_between(self, t_from_s: float, t_to_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Camera frames whose device time is in [t_from_s, t_to_s): frame indices k (camera clock k / fps)
        and their device times, s."""
        fps = self.settings.fps
        k0 = math.ceil(float(self.camera_time(t_from_s)) * fps - 1e-9)
        k1 = math.ceil(float(self.camera_time(t_to_s)) * fps - 1e-9)
        k = np.arange(k0, max(k0, k1), dtype=np.int64)
        return k, self.device_time(k / fps)

    # -- geometry --------------------------------------------------------------------------
    def markers_base(self, s_m: np.ndarray, xy_m: np.ndarray) -> np.ndarray:
        """Marker positions (F, K, 2), m, base frame, from shapes ``xy_m`` (F, P, 2) on arc lengths ``s_m`` (P,).

        Points on the curve at ``markers_s_m`` (cubic spline through the shape
        points), moved ``markers_offset_m`` along the +y normal.
        """
        from scipy.interpolate import CubicSpline  # only when filming: not at start-up

        spline = CubicSpline(s_m, xy_m, axis=1)
        p = spline(self.marker_s_m)  # (F, K, 2)
        d = spline(self.marker_s_m, 1)
        d /= np.linalg.norm(d, axis=-1, keepdims=True)
        normal = np.stack([-d[..., 1], d[..., 0]], axis=-1)
        return p + self.marker_offset_m[None, :, None] * normal

    def to_image(self, xy_base_m: np.ndarray, t_device_s: np.ndarray) -> np.ndarray:
        """Base-frame points (F, K, 2), m -> image plane (F, K, 2), mm: wobble, turn, shift."""
        s = self.settings
        t = np.asarray(t_device_s, dtype=np.float64)[:, None]
        w = s.wobble_mm * 0.5 * sum(np.sin(2 * math.pi * f * t + self._wobble_phase[i])
                                   for i, f in enumerate(_WOBBLE_HZ))  # (F, 2), mm
        c, sn = math.cos(s.angle_rad), math.sin(s.angle_rad)
        p = xy_base_m * 1e3 + w[:, None, :]
        x = c * p[..., 0] - sn * p[..., 1] + s.shift_mm[0]
        y = sn * p[..., 0] + c * p[..., 1] + s.shift_mm[1]
        return np.stack([x, y], axis=-1)

    def detect(self, xy_mm: np.ndarray, frame_index: np.ndarray) -> np.ndarray:
        """Noise, wild points and misses on image points (F, K, 2), mm; NaN where missed. New array."""
        s = self.settings
        k = self.n_markers
        out = xy_mm + s.noise_mm * normals(self._key, frame_index, 2 * k).reshape(-1, k, 2)
        u = uniforms(self._key ^ 0x3A3A, frame_index, 4 * k).reshape(-1, k, 4)
        wild = u[..., 0] < s.wild
        size = _WILD_MM[0] + (_WILD_MM[1] - _WILD_MM[0]) * u[..., 1]
        ang = 2 * math.pi * u[..., 2]
        out[..., 0] += np.where(wild, size * np.cos(ang), 0.0)
        out[..., 1] += np.where(wild, size * np.sin(ang), 0.0)
        out[u[..., 3] < s.missing] = np.nan
        return out

    def film(self, model, t_device_s, frame_index) -> tuple[np.ndarray, np.ndarray]:
        """Camera times (F,), s, and detected markers (F, K, 2), mm (NaN: missed) at device times ``t_device_s``."""
        t = np.atleast_1d(np.asarray(t_device_s, dtype=np.float64))
        s_m, xy = model.shape(t)
        image = self.to_image(self.markers_base(s_m, xy), t)
        return self.camera_time(t), self.detect(image, np.atleast_1d(frame_index))


def _header(n_markers: int) -> list:
    return ["t_s"] + [f"m{k}_{a}_mm" for k in range(n_markers) for a in ("x", "y")]


class MarkerWriter:
    """Writes a marker CSV row by row (one thread); refuses an existing file.

    Parameters
    ----------
    path : str or os.PathLike
    camera : Camera
    """

    def __init__(self, path, camera: Camera):
        self.path = Path(path)
        self.camera = camera
        self.rows = 0
        self._fh = open(self.path, "x", newline="", encoding="utf-8")  # noqa: SIM115 - closed in close()
        self._csv = csv.writer(self._fh, lineterminator="\r\n")  # RFC 4180 line ends
        self._csv.writerow(_header(camera.n_markers))

    def film(self, model, t_from_s: float, t_to_s: float) -> int:
        """Film the camera frames whose device times fall in [t_from_s, t_to_s); returns rows written."""
        k, t = self.camera.frames_between(t_from_s, t_to_s)
        if not k.size:
            return 0
        return self.write(*self.camera.film(model, t, k))

    def write(self, t_cam_s: np.ndarray, xy_mm: np.ndarray) -> int:
        """Append rows: camera times (F,), s, markers (F, K, 2), mm, NaN -> empty cells."""
        flat = xy_mm.reshape(xy_mm.shape[0], -1)
        for tc, row in zip(t_cam_s.tolist(), flat.tolist()):
            self._csv.writerow([f"{tc:.6f}"] + ["" if v != v else f"{v:.4f}" for v in row])
        self.rows += flat.shape[0]
        return flat.shape[0]

    def close(self) -> None:
        """Flush and close the file (complete)."""
        if not self._fh.closed:
            self._fh.flush()
            os.fsync(self._fh.fileno())
            self._fh.close()


def write_marker_csv(path, model, t_device_s, *, settings: CameraSettings | None = None) -> int:
    """Film ``model`` at device times ``t_device_s`` (s; one camera frame each) into a new marker CSV.

    Camera frame k is the k-th time given (the noise is a function of k).
    Returns the rows written. Raises FileExistsError for an existing file
    (commands check with :func:`acquire.store.outputs.check_output` first).
    Runs in the caller's thread.
    """
    camera = Camera(settings or CameraSettings(), rig=model.rig)
    t = np.atleast_1d(np.asarray(t_device_s, dtype=np.float64))
    writer = MarkerWriter(path, camera)
    try:
        for a in range(0, t.shape[0], 4096):
            writer.write(*camera.film(model, t[a:a + 4096], np.arange(a, min(a + 4096, t.shape[0]))))
    finally:
        writer.close()
    return writer.rows
