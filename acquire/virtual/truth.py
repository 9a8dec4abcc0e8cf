"""The virtual finger's ground truth file: per-frame truth in a chunked HDF5 file, written as it goes.

Layout ``tapcurve-virtual-truth`` version 1: one row per generated frame
(``boot``, ``seq``, ``t_device_s``, ``curvature_per_m``, ``tip_xy_m``,
``moment_nm``, ``load_n``, ``force_xy_n`` (N, base frame), ``pressure_kpa``,
``hold_curvature_per_m``, ``codes``, ``status``, ``fate``).

Threads: the device thread only.
"""
from __future__ import annotations

import datetime
import json
import time
from pathlib import Path

import numpy as np

from acquire.virtual.link import FATE_NAMES

__all__ = ["TruthWriter", "DEVICE_NAME", "DEMO_TEXT"]

#: the ``device`` key of the hello
DEVICE_NAME = "virtual finger (demo)"
DEMO_TEXT = "one finger of a greenhouse tomato-picking gripper (made up for the demo)"


class TruthWriter:
    """Per-frame ground truth into a chunked HDF5 file (device thread only).

    Parameters
    ----------
    path : Path
        The file (created, replaced if it exists).
    dev : VirtualFinger
        Its rig, seed, scenario, faults and strip settings go into attributes.
    """

    def __init__(self, path: Path, dev):
        import h5py

        self._f = h5py.File(path, "w")
        f = self._f
        s = dev.rig.n_segments
        c = dev.rig.n_channels
        f.attrs["layout"] = "tapcurve-virtual-truth"
        f.attrs["layout_version"] = 1
        f.attrs["created_utc"] = datetime.datetime.now(datetime.timezone.utc).isoformat()
        f.attrs["device"] = DEVICE_NAME
        f.attrs["demo"] = DEMO_TEXT
        f.attrs["scenario"] = dev.scenario
        f.attrs["seed"] = dev.seed
        f.attrs["time_scale"] = dev.time_scale
        f.attrs["rig_toml"] = dev.rig.text
        f.attrs["faults_json"] = json.dumps(dev.faults.as_dict())
        f.attrs["fate_names"] = json.dumps(list(FATE_NAMES))
        f.attrs["strip_json"] = json.dumps(dev.strip_settings.as_dict())
        specs = {
            "boot": ("i4", (), None),
            "seq": ("i8", (), None),
            "t_device_s": ("f8", (), "s"),
            "curvature_per_m": ("f8", (s,), "1/m"),
            "tip_xy_m": ("f8", (2,), "m"),
            "moment_nm": ("f8", (), "N m"),
            "load_n": ("f8", (), "N"),
            "force_xy_n": ("f8", (2,), "N"),
            "pressure_kpa": ("f8", (), "kPa"),
            "hold_curvature_per_m": ("f4", (), "1/m"),
            "codes": ("u2", (c,), None),
            "status": ("u1", (), None),
            "fate": ("u1", (), None),
        }
        self._ds = {}
        for name, (dtype, tail, units) in specs.items():
            ds = f.create_dataset(name, shape=(0,) + tail, maxshape=(None,) + tail, dtype=dtype,
                                  chunks=(4096,) + tail)
            if units:
                ds.attrs["units"] = units
            self._ds[name] = ds
        self._ds["seq"].attrs["meaning"] = "unwrapped sequence number, 0 at each boot"
        self._ds["hold_curvature_per_m"].attrs["meaning"] = "jig curvature when held, NaN otherwise"
        self._ds["force_xy_n"].attrs["meaning"] = "tip force (Fx, Fy) in the base frame"
        self._ds["pressure_kpa"].attrs["meaning"] = "actuation pressure"
        self._pending: list[dict] = []
        self._n_pending = 0
        self._last_flush = time.monotonic()

    def append(self, boot, frame, t, model, codes, status, fate) -> None:
        """Queue one chunk of frames; written by :meth:`flush` (every 16384 frames or 0.5 s)."""
        tr = model.truth(t)
        n = frame.shape[0]
        hold = np.nan if model.hold_curvature_per_m is None else model.hold_curvature_per_m
        self._pending.append({
            "boot": np.full(n, boot), "seq": frame, "t_device_s": t,
            "curvature_per_m": tr["curvature_per_m"], "tip_xy_m": tr["tip_xy_m"],
            "moment_nm": tr["moment_nm"], "load_n": tr["load_n"],
            "force_xy_n": tr["force_xy_n"], "pressure_kpa": tr["pressure_kpa"],
            "hold_curvature_per_m": np.full(n, hold), "codes": codes, "status": status, "fate": fate,
        })
        self._n_pending += n
        if self._n_pending >= 16384:
            self.flush()

    def maybe_flush(self) -> None:
        """Flush if the last flush was over 0.5 s ago."""
        if self._pending and time.monotonic() - self._last_flush > 0.5:
            self.flush()

    def flush(self) -> None:
        """Write the queued frames and flush the file."""
        self._last_flush = time.monotonic()
        if not self._pending:
            return
        for name, ds in self._ds.items():
            block = np.concatenate([p[name] for p in self._pending])
            n0 = ds.shape[0]
            ds.resize(n0 + block.shape[0], axis=0)
            ds[n0:] = block
        self._pending = []
        self._n_pending = 0
        self._f.flush()

    def close(self) -> None:
        """Flush and close the file."""
        try:
            self.flush()
        finally:
            self._f.close()
