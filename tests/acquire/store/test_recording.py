"""The recording layout, SWMR recovery after a killed writer, h5dump reading it."""
from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import textwrap
import time

import h5py
import numpy as np
import pytest

from acquire.errors import UserError
from acquire.link.frames import FrameBlock, FrameRing
from acquire.store.h5repair import lookup3, superblock_flags
from acquire.store.recorder import Recorder
from acquire.store.recording import RecordingError, open_recording
from acquire.rig import load_rig


def _block(start: int, n: int, channels: int) -> FrameBlock:
    seq = np.arange(start, start + n, dtype=np.int64)
    return FrameBlock(
        codes=(seq[:, None] * 3 + np.arange(channels)).astype(np.uint16) % 4096,
        seq=seq,
        t_device_s=seq * 1e-3,
        t_host_s=np.full(n, 100.0),
        status=np.zeros(n, dtype=np.uint8),
    )


def _recorder(path, ring, **kw):
    rig = load_rig(None)
    return Recorder(
        path=path,
        ring=ring,
        rig_toml=rig.text,
        device_hello=json.dumps({"protocol": 1, "channels": ring.n_channels, "rate_hz": 1000, "extra": "kept"}),
        channel_names=rig.channels,
        **kw,
    )


def test_lookup3_known_values():
    # Bob Jenkins, lookup3.c (2006), driver self-test: hashlittle("", 0) = 0xdeadbeef,
    # hashlittle("Four score and seven years ago", 0) = 0x17770551 (from memory of lookup3.c's driver5).
    assert lookup3(b"", 0) == 0xDEADBEEF
    assert lookup3(b"Four score and seven years ago", 0) == 0x17770551


def test_lookup3_matches_hdf5_superblock(tmp_path):
    # the HDF5 library (via h5py) wrote this checksum itself: our lookup3 must reproduce it
    from acquire.store.h5repair import _superblock

    p = tmp_path / "x.h5"
    with h5py.File(p, "w", libver=("v110", "v110")) as f:
        f["a"] = np.arange(3)
    with open(p, "rb") as fh:
        _, body, stored = _superblock(fh)
    assert lookup3(body) == stored


def test_repair_admits_data_past_a_short_end_of_allocation(tmp_path):
    # A writer killed in a flush can leave data (and the metadata pointing to it) past the end-of-file
    # address it last wrote to the superblock: HDF5 then refuses to read it ("addr overflow"), as seen
    # once after a SIGKILL. Made here by patching a clean SWMR file's superblock (HDF5 File Format
    # Specification 3.0, II.A: flags at byte 11, end-of-file address third of the addresses after byte 12).
    import struct

    from acquire.store.h5repair import _superblock, clear_write_flags

    p = tmp_path / "k.h5"
    with h5py.File(p, "w", libver="latest") as f:
        d = f.create_dataset("x", shape=(0,), maxshape=(None,), chunks=(1000,), dtype="f8")
        f.swmr_mode = True
        for i in range(10):
            d.resize((1000 * (i + 1),))
            d[-1000:] = np.arange(1000) + i
            f.flush()
    with open(p, "r+b") as fh:
        off, body, _ = _superblock(fh)
        at, n = 12 + 2 * body[9], body[9]
        eoa = int.from_bytes(body[at:at + n], "little")
        assert eoa == p.stat().st_size  # a clean close leaves it at the file's end
        cut = bytearray(body)
        cut[11] = 0x05  # open for writing, SWMR
        cut[at:at + n] = (eoa - 4000).to_bytes(n, "little")  # half of the last chunk beyond it
        fh.seek(off)
        fh.write(bytes(cut) + struct.pack("<I", lookup3(bytes(cut))))
    assert clear_write_flags(p)
    assert superblock_flags(p) == 0
    with h5py.File(p, "r") as f:
        np.testing.assert_array_equal(f["x"][-1000:], np.arange(1000) + 9)


def test_layout_and_labels(tmp_path):
    ring = FrameRing(capacity_frames=10_000, n_channels=6)
    path = tmp_path / "r.h5"
    rec = _recorder(path, ring, label="radius=25mm")
    rec.start()
    ring.push(_block(0, 1500, 6))
    rec.add_label("flat", t_start_s=0.1, t_end_s=0.2)
    ring.push(_block(1500, 500, 6))
    rec.stop()
    assert rec.error is None
    with h5py.File(path, "r") as f:  # plain h5py, as an outside script would
        a = f.attrs
        assert a["layout"] == "tapcurve-recording" and a["layout_version"] == 1
        assert json.loads(a["device_hello"])["extra"] == "kept"
        assert "[sensor]" in a["rig_toml"]
        assert f["raw/adc"].shape == (2000, 6) and f["raw/adc"].dtype == np.uint16
        assert f["raw/seq"].dtype == np.int64
        assert (np.diff(f["raw/seq"][:]) == 1).all()
        assert f["raw/t_device_s"].attrs["units"] == "s"
        assert f["raw/t_host_s"].attrs["units"] == "s"
        texts = [t.decode() for t in f["labels/text"][:]]
        assert texts == ["radius=25mm", "flat"]
        assert f["labels/t_end_s"][0] == pytest.approx(1.999)
        assert f["labels/t_start_s"][1] == pytest.approx(0.1)
        assert f["labels/text"].dtype.kind == "S" and f["labels/text"].dtype.itemsize == 128


def test_refuses_to_overwrite(tmp_path):
    path = tmp_path / "r.h5"
    path.write_bytes(b"precious")
    ring = FrameRing(capacity_frames=100, n_channels=6)
    with pytest.raises(UserError, match="exists"):
        _recorder(path, ring).start()
    assert path.read_bytes() == b"precious"


def test_label_too_long(tmp_path):
    ring = FrameRing(capacity_frames=100, n_channels=6)
    with pytest.raises(UserError, match="at most 128"):
        _recorder(tmp_path / "r.h5", ring, label="x" * 129)


WRITER = textwrap.dedent(
    """
    import json, sys, time, os
    import numpy as np
    sys.path.insert(0, {repo!r})
    from acquire.link.frames import FrameBlock, FrameRing
    from acquire.store.recorder import Recorder
    ring = FrameRing(capacity_frames=100000, n_channels=4)
    rec = Recorder(path={path!r}, ring=ring, rig_toml="x", device_hello="{{}}", channel_names=["a","b","c","d"],
                   flush_interval_s=0.1)
    rec.start()
    n = 0
    while True:
        seq = np.arange(n, n + 100)
        ring.push(FrameBlock(codes=np.zeros((100, 4), np.uint16), seq=seq, t_device_s=seq * 1e-3,
                             t_host_s=np.zeros(100), status=np.zeros(100, np.uint8)))
        n += 100
        if n == 3000:
            print("ready", flush=True)
        time.sleep(0.01)
    """
)


def test_killed_writer_file_recovers(tmp_path, wait_until):
    path = tmp_path / "killed.h5"
    repo = str(__import__("pathlib").Path(__file__).resolve().parents[3])
    proc = subprocess.Popen(
        [sys.executable, "-c", WRITER.format(repo=repo, path=str(path))], stdout=subprocess.PIPE, text=True
    )
    try:
        assert proc.stdout.readline().strip() == "ready"
        # while the writer lives, a reader opens it in SWMR mode without touching it
        with open_recording(path) as live:
            assert live.live

            def on_disk() -> bool:
                live.refresh()
                return live.n_frames >= 3000

            wait_until(on_disk, timeout_s=30, what="a flush to put 3000 frames on disk")
            flushed = live.n_frames
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(10)
    assert superblock_flags(path) != 0  # left "open for writing"
    with pytest.raises(OSError):
        h5py.File(path, "r")  # what a user meets without tapcurve
    with open_recording(path) as rec:
        assert rec.recovered
        seq = rec.frames().seq
        # every frame a reader had seen on disk before the kill is there
        assert seq.shape[0] >= flushed and (np.diff(seq) == 1).all()
    with h5py.File(path, "r") as f:  # afterwards plain h5py opens it
        assert f["raw/seq"].shape[0] == seq.shape[0]
    h5dump = shutil.which("h5dump")
    if h5dump is None:
        pytest.skip("h5dump (Debian hdf5-tools) not installed; .ci/run installs it")
    out = subprocess.run([h5dump, "-H", str(path)], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert 'DATASET "adc"' in out.stdout


def test_h5dump_reads_values(tmp_path):
    # h5dump from Debian's hdf5-tools (HDF5 1.10) reads what we wrote, values included
    h5dump = shutil.which("h5dump")
    if h5dump is None:
        pytest.skip("h5dump (Debian hdf5-tools) not installed; .ci/run installs it")
    ring = FrameRing(capacity_frames=1000, n_channels=6)
    path = tmp_path / "r.h5"
    rec = _recorder(path, ring)
    rec.start()
    ring.push(_block(0, 3, 6))
    rec.stop()
    out = subprocess.run([h5dump, "-d", "/raw/adc", str(path)], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert "(2,0): 6, 7, 8, 9, 10, 11" in out.stdout
    out = subprocess.run([h5dump, "-a", "/layout", str(path)], capture_output=True, text=True, timeout=60)
    assert '"tapcurve-recording"' in out.stdout


@pytest.mark.parametrize("content, words", [(b"", "not an HDF5"), (b"\x89HDF\r\n\x1a\n" + b"\0" * 50, "cannot be opened")])
def test_bad_files(tmp_path, content, words):
    p = tmp_path / "bad.h5"
    p.write_bytes(content)
    with pytest.raises(RecordingError, match=words):
        open_recording(p)


def test_foreign_and_newer(tmp_path):
    p = tmp_path / "foreign.h5"
    with h5py.File(p, "w") as f:
        f["x"] = 1
    with pytest.raises(RecordingError, match="not a tapcurve recording"):
        open_recording(p)
    q = tmp_path / "newer.h5"
    ring = FrameRing(capacity_frames=100, n_channels=6)
    rec = _recorder(q, ring)
    rec.start()
    rec.stop()
    with h5py.File(q, "r+") as f:
        f.attrs["layout_version"] = 2
    with pytest.raises(RecordingError, match="newer"):
        open_recording(q)


def test_host_time_never_negative(tmp_path):
    # frames that were in the ring before the file was made: host time counts from the earliest of them
    ring = FrameRing(capacity_frames=1000, n_channels=6)
    block = _block(0, 50, 6)
    block.t_host_s[:] = time.monotonic() - 0.5  # arrived half a second before the recording starts
    ring.push(block)
    rec = _recorder(tmp_path / "r.h5", ring)
    rec.start()
    rec.stop()
    with h5py.File(tmp_path / "r.h5", "r") as f:
        t = f["raw/t_host_s"][:]
    assert t.shape == (50,) and t.min() == 0.0
