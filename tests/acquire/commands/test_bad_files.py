"""Bad files on the command line: one line naming the problem, exit 2, no traceback, nothing changed."""
from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from acquire.link.frames import FrameBlock, FrameRing
from acquire.store.recorder import Recorder
from acquire.rig import load_rig

REPO = Path(__file__).resolve().parents[3]


def tapcurve(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "display.cli", *args], capture_output=True, text=True,
                          timeout=60, cwd=REPO)


def one_line_exit_2(res: subprocess.CompletedProcess, *words: str) -> None:
    assert res.returncode == 2, (res.returncode, res.stderr)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr, res.stderr
    for w in words:
        assert w in lines[0], (w, lines[0])


@pytest.fixture
def recording(tmp_path) -> Path:
    rig = load_rig(None)
    ring = FrameRing(capacity_frames=10_000, n_channels=6)
    path = tmp_path / "good.h5"
    rec = Recorder(path=path, ring=ring, rig_toml=rig.text, device_hello=json.dumps({"channels": 6, "rate_hz": 1000}),
                   channel_names=rig.channels)
    rec.start()
    seq = np.arange(5000)
    ring.push(FrameBlock(codes=np.tile(np.array([3400, 2900, 2400, 1900, 1400, 900], np.uint16), (5000, 1)),
                         seq=seq, t_device_s=seq * 1e-3, t_host_s=np.zeros(5000), status=np.zeros(5000, np.uint8)))
    rec.stop()
    return path


def sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def test_truncated_recording(recording, tmp_path):
    cut = tmp_path / "cut.h5"
    data = recording.read_bytes()
    cut.write_bytes(data[: len(data) // 2])
    before = sha(cut)
    one_line_exit_2(tapcurve("inspect", str(cut)), str(cut))
    assert sha(cut) == before


def test_foreign_hdf5(tmp_path):
    p = tmp_path / "someone_elses.h5"
    with h5py.File(p, "w") as f:
        f["temperature"] = np.arange(10.0)
    one_line_exit_2(tapcurve("inspect", str(p)), str(p), "not a tapcurve recording")


def test_newer_layout(recording):
    with h5py.File(recording, "r+") as f:
        f.attrs["layout_version"] = 7
    one_line_exit_2(tapcurve("inspect", str(recording)), "layout_version 7", "newer")


def test_missing_dataset(recording):
    with h5py.File(recording, "r+") as f:
        del f["raw/seq"]
    one_line_exit_2(tapcurve("inspect", str(recording)), "/raw/seq")


@pytest.mark.parametrize(
    "line, key",
    [
        ('r_ref_ohm = "10k"', "r_ref_ohm"),
        ("r_ref_ohm = true", "r_ref_ohm"),
        ('channels = "tap0 tap1"', "channels"),
    ],
)
def test_rig_with_wrong_types(tmp_path, line, key):
    rig = tmp_path / "typo.toml"
    rig.write_text(
        "[sensor]\nsegment_lengths_mm = [16.0, 16.0]\n[readout]\nkind = 'divider'\n"
        + ("r_ref_ohm = 10000.0\n" if "r_ref" not in line else "")
        + ("channels = ['tap0', 'tap1']\n" if "channels" not in line else "")
        + line + "\n"
    )
    # the rig is read before any port is opened, so no device is needed to see the error
    res = tapcurve("record", "--port", "/dev/null-not-a-port", "--rig", str(rig), "--out", str(tmp_path / "x.h5"))
    one_line_exit_2(res, "typo.toml", key)


@pytest.mark.parametrize("n_bytes", [9, 11, 30, 47, 200])
def test_truncated_in_the_superblock(recording, tmp_path, n_bytes):
    cut = tmp_path / "cut.h5"
    cut.write_bytes(recording.read_bytes()[:n_bytes])
    one_line_exit_2(tapcurve("inspect", str(cut)), str(cut))


def test_foreign_file_left_open_is_not_touched(tmp_path):
    """Another program's HDF5 file, killed while in SWMR write mode: tapcurve refuses it and changes nothing."""
    from acquire.store.h5repair import superblock_flags

    p = tmp_path / "other.h5"
    code = (
        "import h5py, os\n"
        f"f = h5py.File({str(p)!r}, 'w', libver='latest')\n"
        "f.create_dataset('x', shape=(0,), maxshape=(None,), dtype='f8', chunks=(16,))\n"
        "f.swmr_mode = True\nf.flush()\nos._exit(0)\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, timeout=60)
    flags = superblock_flags(p)
    assert flags != 0
    before = sha(p)
    one_line_exit_2(tapcurve("inspect", str(p)), str(p), "not a tapcurve recording")
    assert sha(p) == before and superblock_flags(p) == flags


def test_calibration_for_another_rig(tmp_path):
    """The demo calibration (made with r_ref 10 kOhm) on a rig with another reference resistor: refused."""
    rig_text = (REPO / "acquire" / "rigs" / "demo_finger.toml").read_text().replace("r_ref_ohm = 10000.0", "r_ref_ohm = 4700.0")
    rig = tmp_path / "other.toml"
    rig.write_text(rig_text)
    cal = REPO / "recordings" / "demo_calibration.json"
    res = tapcurve("record", "--port", "/dev/null-not-a-port", "--rig", str(rig), "--out", str(tmp_path / "x.h5"),
                   "--calibration", str(cal))
    one_line_exit_2(res, "r_ref_ohm", "4700")
    assert not (tmp_path / "x.h5").exists()


@pytest.mark.parametrize("label", ["radius=abc", "radius=0mm", "curvature=forty/m"])
def test_unreadable_reference_label_refused_when_recording(tmp_path, label):
    # refused at once, not later by `calibrate`; a free label ("grasp") stays allowed
    res = tapcurve("record", "--port", "/dev/null-not-a-port", "--rig", str(REPO / "acquire" / "rigs" / "demo_finger.toml"),
                   "--out", str(tmp_path / "x.h5"), "--label", label)
    one_line_exit_2(res, label)
