"""`tapcurve record` and `inspect` end to end through a real pseudo-terminal, and bad input.

The device is the virtual finger, run as its own process (`tapcurve
virtual-device`), so the path is the one a lab uses: pty -> pyserial ->
reader thread -> ring -> recorder thread -> HDF5.
"""
from __future__ import annotations

import os
import select
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import serial

REPO = Path(__file__).resolve().parents[3]
RIG = REPO / "acquire" / "rigs" / "demo_finger.toml"


def tapcurve(*args: str, timeout_s: float = 60.0) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "display.cli", *args],
        capture_output=True,
        text=True,
        timeout=timeout_s,
        cwd=REPO,
    )


def assert_user_error(result: subprocess.CompletedProcess, *words: str) -> None:
    """Exit 2, exactly one line on stderr naming the thing at fault, no traceback."""
    assert result.returncode == 2, (result.returncode, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.stderr
    for w in words:
        assert w in lines[0], (w, lines[0])


@pytest.fixture
def device(tmp_path):
    """A virtual finger process on a pty; yields its port path."""
    proc = subprocess.Popen(
        [sys.executable, "-m", "display.cli", "virtual-device", "--link", str(tmp_path / "finger")],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=REPO,
    )
    # bounded: a device process that never prints its port fails the test instead of hanging it
    ready, _, _ = select.select([proc.stdout], [], [], 60.0)
    line = proc.stdout.readline().strip() if ready else ""
    if not line:
        proc.kill()
        pytest.fail(f"virtual-device printed no port: {proc.stderr.read()}")
    yield line
    proc.terminate()
    try:
        proc.wait(10)
    except subprocess.TimeoutExpired:
        proc.kill()


def test_record_contiguous(device, tmp_path):
    out = tmp_path / "hold.h5"
    r = tapcurve("record", "--port", device, "--rig", str(RIG), "--out", str(out), "--duration", "2", "--label", "flat")
    assert r.returncode == 0, r.stderr
    with h5py.File(out, "r") as f:
        seq = f["raw/seq"][:]
        # 2 s at the device's 1000 Hz: exactly 2000 frames, consecutive
        assert seq.shape == (2000,)
        assert (np.diff(seq) == 1).all()
        assert f["raw/adc"].shape == (2000, 6)
        t = f["raw/t_device_s"][:]
        assert t[0] == 0.0 and np.allclose(np.diff(t), 1e-3)
        assert [x.decode() for x in f["labels/text"][:]] == ["flat"]
        assert f["labels/t_end_s"][0] == pytest.approx(t[-1])
    r = tapcurve("inspect", str(out))
    assert r.returncode == 0, r.stderr
    assert "2000 over" in r.stdout and "flat" in r.stdout and "0 gaps" in r.stdout


def test_output_exists_is_not_overwritten(device, tmp_path):
    out = tmp_path / "old.h5"
    out.write_bytes(b"earlier experiment")
    r = tapcurve("record", "--port", device, "--rig", str(RIG), "--out", str(out), "--duration", "1")
    assert_user_error(r, str(out), "exists")
    assert out.read_bytes() == b"earlier experiment"


@pytest.mark.parametrize(
    "rig_text, words",
    [
        ("[sensor\n", ["bad.toml", "TOML"]),
        ("[sensor]\n[readout]\nkind='divider'\nr_ref_ohm=1e4\nchannels=['tap0']\n", ["bad.toml", "segment_lengths_mm"]),
        (
            "[sensor]\nsegment_lengths_mm=[16,-2]\n[readout]\nkind='divider'\nr_ref_ohm=1e4\nchannels=['tap0','tap1']\n",
            ["bad.toml", "segment_lengths_mm[1]", "positive"],
        ),
        (
            "[sensor]\nsegment_lengths_mm=[16,16,16,16]\n[readout]\nkind='divider'\nr_ref_ohm=1e4\n"
            "channels=['tap0','tap1','tap2','tap3']\n",
            ["bad.toml", "4 channels", "sends 6"],
        ),
    ],
)
def test_bad_rig(device, tmp_path, rig_text, words):
    rig = tmp_path / "bad.toml"
    rig.write_text(rig_text)
    out = tmp_path / "x.h5"
    r = tapcurve("record", "--port", device, "--rig", str(rig), "--out", str(out), "--duration", "1")
    assert_user_error(r, *words)
    assert not out.exists()


def test_port_missing(tmp_path):
    r = tapcurve("record", "--port", str(tmp_path / "ttyNONE"), "--rig", str(RIG), "--out", str(tmp_path / "x.h5"))
    assert_user_error(r, "ttyNONE", "not found")


def test_port_busy(device, tmp_path):
    holder = serial.Serial(device, exclusive=True)  # another program has the port
    try:
        r = tapcurve("record", "--port", device, "--rig", str(RIG), "--out", str(tmp_path / "x.h5"), "--duration", "1")
        assert_user_error(r, device, "busy")
    finally:
        holder.close()


def test_not_a_device(tmp_path):
    # a pty with nothing behind it that speaks the protocol
    master, slave = os.openpty()
    try:
        r = tapcurve("record", "--port", os.ttyname(slave), "--rig", str(RIG), "--out", str(tmp_path / "x.h5"))
        assert_user_error(r, "no hello")
    finally:
        os.close(master)
        os.close(slave)


def test_unknown_command_and_bad_value(tmp_path):
    assert_user_error(tapcurve("fly"), "fly")
    r = tapcurve("record", "--port", "x", "--rig", str(RIG), "--out", str(tmp_path / "x.h5"), "--duration", "-3")
    assert_user_error(r, "--duration")


def test_inspect_bad_files(tmp_path):
    p = tmp_path / "notes.txt"
    p.write_text("not a recording")
    assert_user_error(tapcurve("inspect", str(p)), str(p), "not an HDF5")
    assert_user_error(tapcurve("inspect", str(tmp_path / "gone.h5")), "gone.h5", "no such file")


def test_refused_publish_address_leaves_no_file(device, tmp_path):
    out = tmp_path / "x.h5"
    r = tapcurve("record", "--port", device, "--rig", str(RIG), "--out", str(out), "--duration", "1",
                 "--publish", "0.0.0.0:0")
    assert_user_error(r, "0.0.0.0")
    assert not out.exists()
