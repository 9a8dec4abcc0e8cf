"""How /derived is stored by the recorder: shape points on a fixed step, and filters every HDF5 reader has.

The rounding is checked against its closed form (nearest whole multiple of
``XY_STEP_M``: at most half a step off), the values against an independent
offline run of the pipeline over the same codes, and the filters against the
filter identifiers the HDF5 format itself defines.
"""
from __future__ import annotations

import json

import h5py
import numpy as np
import pytest

from acquire.core.pipeline import Pipeline, process_arrays, shape_spacing_m
from acquire.link.frames import FrameBlock, FrameRing
from acquire.rig import load_rig
from acquire.store.recorder import Recorder
from acquire.store.recording import XY_STEP_M
from acquire.virtual.builtin import builtin_calibration
from acquire.virtual.model import FingerModel

RATE_HZ = 1000.0
#: predefined filter identifiers: 1 deflate, 2 shuffle (The HDF Group, "HDF5 File Format Specification
#: Version 3.0", section IV.A.2.l, Data Storage - Filter Pipeline Message, 2016)
H5Z_FILTER_DEFLATE, H5Z_FILTER_SHUFFLE = 1, 2


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    """4 s of the virtual finger's grasp (made up for the demo), recorded live in 41 blocks: (path, codes, rig, cal)."""
    rig = load_rig(None)
    cal = builtin_calibration(rig)
    n = 4000
    fi = np.arange(n)
    codes = FingerModel(rig=rig, seed=0).codes(6.0 + fi / RATE_HZ, frame_index=fi)  # 6 s in: the grasp closing
    path = tmp_path_factory.mktemp("derived") / "live.h5"
    ring = FrameRing(capacity_frames=n + 10, n_channels=rig.n_channels)
    pipe = Pipeline(rig=rig, calibration=cal, rate_hz=RATE_HZ, adc_bits=12, spacing_m=shape_spacing_m(cal))
    hello = json.dumps({"protocol": 1, "channels": rig.n_channels, "rate_hz": RATE_HZ, "adc_bits": 12})
    rec = Recorder(path=path, ring=ring, rig_toml=rig.text, device_hello=hello, channel_names=rig.channels,
                   pipeline=pipe, calibration_json=cal.to_json(), flush_interval_s=0.05)
    rec.start()
    for part in np.array_split(fi, 41):
        ring.push(FrameBlock(codes=codes[part], seq=part.astype(np.int64), t_device_s=part / RATE_HZ,
                             t_host_s=part / RATE_HZ, status=np.zeros(part.size, np.uint8)))
    rec.stop()
    assert rec.error is None
    return path, codes, rig, cal


def test_shape_points_are_whole_steps_within_half_a_step_of_the_reconstruction(recorded):
    path, codes, rig, cal = recorded
    ref = process_arrays(codes, rig=rig, calibration=cal, rate_hz=RATE_HZ, adc_bits=12,
                         spacing_m=shape_spacing_m(cal))
    with h5py.File(path, "r") as f:  # plain h5py, as an outside script would
        xy = f["derived/xy"]
        assert xy.dtype == np.float32 and xy.attrs["units"] == "m"
        assert float(xy.attrs["step_m"]) == XY_STEP_M
        stored = xy[:].astype(np.float64)
    assert stored.shape[0] == codes.shape[0]
    steps = stored / XY_STEP_M
    assert np.array_equal(steps, np.round(steps))  # closed form: whole multiples of the step
    expected = np.asarray(ref.xy_m, dtype=np.float64)[:, : stored.shape[1]]
    # rounding to nearest: at most half a step (closed form), plus a few float32 units at 0.1 m (2^-27 m
    # each) between the live run in blocks and the offline run (the pipeline is chunk-invariant)
    assert np.abs(stored - expected).max() <= XY_STEP_M / 2 + 4 * 2.0 ** -27
    assert np.abs(stored - expected).max() > 0  # the rounding did something


def test_derived_and_raw_use_only_deflate_and_shuffle(recorded):
    path = recorded[0]
    with h5py.File(path, "r") as f:
        for name in ("raw/adc", "raw/seq", "raw/t_device_s", "derived/curvature", "derived/xy"):
            plist = f[name].id.get_create_plist()
            ids = {plist.get_filter(k)[0] for k in range(plist.get_nfilters())}
            assert ids == {H5Z_FILTER_DEFLATE, H5Z_FILTER_SHUFFLE}, name
