"""/derived/force_n and /derived/actuation: written live by the recorder and by ``process``, read by outside tools.

The layout is the README's contract; the values are checked against an
independent offline run of the pipeline (the same numbers live and offline),
the actuation against the rig's linear scale ``(code - offset_code) *
per_code`` computed here by hand, and the file against plain h5py (as an
outside script would read it). Also: ``inspect`` reports the actuation channel,
its unit and range and whether the force is in /derived; the wiring health
names a stuck or out-of-range pressure channel.
"""
from __future__ import annotations

import dataclasses
import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from acquire.core.calibration_fit import fit_calibration
from acquire.core.force import ForceModel
from acquire.core.health import FAULT, assess_health
from acquire.core.pipeline import Pipeline, process_arrays
from acquire.link.frames import FrameBlock, FrameRing
from acquire.rig import parse_rig
from acquire.store.recorder import Recorder
from acquire.store.recording import COMPRESSION
from acquire.virtual import FingerModel

REPO = Path(__file__).resolve().parents[3]
RATE_HZ = 1000.0
PER_CODE, OFFSET = 0.0244140625, 409.6


def tapcurve(*args) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "display.cli", *args], capture_output=True, text=True,
                          timeout=300, cwd=REPO)


@pytest.fixture(scope="module")
def rig():
    text = (REPO / "acquire" / "rigs" / "demo_finger.toml").read_text().replace(
        'channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5"]',
        'channels = ["tap0", "tap1", "tap2", "tap3", "tap4", "tap5", "pressure"]',
    ) + f'\n[actuation]\nchannel = "pressure"\nunit = "kPa"\nper_code = {PER_CODE}\noffset_code = {OFFSET}\n'
    return parse_rig(text, source="force rig")


@pytest.fixture(scope="module")
def calibrations(rig):
    """(static, with a force model): fitted to the virtual finger's jig resistances; a made-up force model."""
    model = FingerModel(rig=rig, seed=0)
    t = np.arange(200) / 1000.0
    holds = [(float(k), model.with_hold(f"curvature={k}/m").segment_ohm(t)) for k in (-20, 0, 20, 40, 60)]
    cal, _ = fit_calibration(holds, rig=rig)
    force = ForceModel(rig.segment_lengths_m, np.full(6, 3e-3), np.full((6, 1), 0.5), "kPa")
    return cal, dataclasses.replace(cal, force=force.to_dict())


def _codes(rig, n: int) -> np.ndarray:
    fi = np.arange(n)
    codes = FingerModel(rig=rig, seed=0).with_hold("radius=25mm").codes(fi / RATE_HZ, frame_index=fi)
    codes[:, 6] = np.round(2000 + 800 * np.sin(2 * np.pi * fi / 1500.0))  # the pressure goes up and down
    return codes


def _record(path, rig, cal, codes, *, blocks: int = 37):
    n = codes.shape[0]
    ring = FrameRing(capacity_frames=n + 10, n_channels=rig.n_channels)
    pipe = Pipeline(rig=rig, calibration=cal, rate_hz=RATE_HZ, adc_bits=12)
    hello = json.dumps({"protocol": 1, "channels": rig.n_channels, "rate_hz": RATE_HZ, "adc_bits": 12})
    rec = Recorder(path=path, ring=ring, rig_toml=rig.text, device_hello=hello, channel_names=rig.channels,
                   pipeline=pipe, calibration_json=cal.to_json(), flush_interval_s=0.05)
    rec.start()
    fi = np.arange(n)
    for part in np.array_split(fi, blocks):  # live: small blocks, flushed as they come
        ring.push(FrameBlock(codes=codes[part], seq=part.astype(np.int64), t_device_s=part / RATE_HZ,
                             t_host_s=part / RATE_HZ, status=np.zeros(part.size, np.uint8)))
    rec.stop()
    assert rec.error is None


@pytest.fixture(scope="module")
def recorded(tmp_path_factory, rig, calibrations):
    d = tmp_path_factory.mktemp("force_layout")
    codes = _codes(rig, 4000)
    _record(d / "live.h5", rig, calibrations[1], codes)
    return d, codes


def test_recorder_writes_force_and_actuation(recorded, rig, calibrations):
    d, codes = recorded
    ref = process_arrays(codes, rig=rig, calibration=calibrations[1], rate_hz=RATE_HZ, adc_bits=12)
    with h5py.File(d / "live.h5", "r") as f:  # plain h5py, as an outside script would
        force, act = f["derived/force_n"], f["derived/actuation"]
        assert force.dtype == np.float32 and force.shape == (4000, 2) and force.attrs["units"] == "N"
        assert act.dtype == np.float32 and act.shape == (4000,) and act.attrs["units"] == "kPa"
        for ds in (force, act):  # compressed like the rest of /derived
            assert ds.compression == COMPRESSION["compression"] and ds.shuffle
        # live in 37 blocks equals one offline pass (the pipeline is chunk-invariant)
        np.testing.assert_allclose(force[:], ref.force_n, rtol=1e-5, atol=1e-6)
        # the rig's linear scale, by hand
        np.testing.assert_allclose(act[:], (codes[:, 6] - OFFSET) * PER_CODE, rtol=1e-6)
        assert np.isfinite(force[:]).all() and np.ptp(force[:, 1]) > 0.01  # the force follows the pressure


def test_process_writes_the_same(recorded, tmp_path, calibrations):
    d, _ = recorded
    cal = tmp_path / "cal.json"
    calibrations[1].save(cal)
    out = tmp_path / "processed.h5"
    res = tapcurve("process", str(d / "live.h5"), "--calibration", str(cal), "--out", str(out), "--dense-points")
    assert res.returncode == 0, res.stderr
    with h5py.File(out, "r") as f, h5py.File(d / "live.h5", "r") as g:
        assert f["derived/force_n"].attrs["units"] == "N" and f["derived/actuation"].attrs["units"] == "kPa"
        np.testing.assert_allclose(f["derived/force_n"][:], g["derived/force_n"][:], rtol=1e-5, atol=1e-6)
        np.testing.assert_array_equal(f["derived/actuation"][:], g["derived/actuation"][:])


def test_no_force_model_gives_actuation_only(tmp_path, rig, calibrations):
    _record(tmp_path / "static.h5", rig, calibrations[0], _codes(rig, 500), blocks=3)
    with h5py.File(tmp_path / "static.h5", "r") as f:
        assert "force_n" not in f["derived"] and f["derived/actuation"].shape == (500,)


def test_inspect_shows_actuation_and_force(recorded):
    d, codes = recorded
    res = tapcurve("inspect", str(d / "live.h5"))
    assert res.returncode == 0, res.stderr
    lo, hi = ((codes[:, 6].min() - OFFSET) * PER_CODE, (codes[:, 6].max() - OFFSET) * PER_CODE)
    assert f"actuation   channel pressure (kPa), recorded {lo:.4g} .. {hi:.4g} kPa" in res.stdout
    assert "derived     yes, with force_n" in res.stdout


def _health(rig, codes):
    t = np.arange(codes.shape[0]) / RATE_HZ
    report = assess_health(codes, t, rig=rig, adc_bits=12)
    return report.channels[6]


def test_health_names_a_stuck_pressure_channel(rig):
    codes = _codes(rig, 2000)
    codes[:, 6] = 1234  # the taps move (noise), the pressure never does
    ch = _health(rig, codes)
    assert ch.verdict == FAULT
    assert "actuation channel 6 (pressure) stuck at 1234" in ch.reason and "pressure sensor unplugged" in ch.reason
    assert f"{(1234 - OFFSET) * PER_CODE:.4g} kPa" in ch.reason


@pytest.mark.parametrize("code, words", [(0, "below the sensor's output range"), (4095, "over its pressure range")])
def test_health_names_a_pressure_channel_out_of_range(rig, code, words):
    codes = _codes(rig, 2000)
    codes[:, 6] = code
    codes[::7, 6] = code + (1 if code == 0 else -1)  # not stuck: at the rail most of the time
    ch = _health(rig, codes)
    assert ch.verdict == FAULT and words in ch.reason and "actuation channel 6 (pressure)" in ch.reason


def test_health_of_a_healthy_pressure_channel(rig):
    ch = _health(rig, _codes(rig, 2000))
    assert ch.verdict == "ok", ch.reason
