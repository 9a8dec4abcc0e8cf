"""The promises kept under abuse, each through the command line in a subprocess.

Bad input ends in one line on stderr naming the thing at fault and exit status
2, never a traceback; no command writes over a recording, whatever the flags;
stop signals leave a closed recording; a recording that cannot go on stops
cleanly while acquisition goes on. The cases are the ones a fresh clone failed
(huge or non-finite numbers in rig, calibration and reference files, file names
over the file system's limit, outputs naming a recording or the command's own
input, a busy shape-stream port, SIGHUP, a killed ``process``, a file size
limit).

Outside sources: the 255-byte file-name limit is NAME_MAX of Linux file systems
(ext4, XFS, btrfs, tmpfs; POSIX <limits.h> {NAME_MAX}); SIGHUP ("hangup detected
on controlling terminal or death of controlling process") is from signal(7) of the
Linux man-pages; that writes to a terminal that hung up fail with EIO is Linux
behaviour from memory (the hang-up test makes it happen, it does not assume it);
RLIMIT_FSIZE is setrlimit(2).
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import re
import resource
import select
import shutil
import signal
import socket
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np
import pytest

from acquire.link.frames import FrameBlock, FrameRing
from acquire.rig import load_rig
from acquire.store.recorder import Recorder

REPO = Path(__file__).resolve().parents[3]
RIG = REPO / "acquire" / "rigs" / "demo_finger.toml"
#: a name one byte over NAME_MAX (255 bytes on Linux file systems)
LONG = "n" * 256
#: over the root user, file permissions do not stop writing (POSIX: "appropriate privileges")
AS_ROOT = hasattr(os, "geteuid") and os.geteuid() == 0


def _env(**extra: str) -> dict:
    return dict(os.environ, QT_QPA_PLATFORM="offscreen", **extra)


def tapcurve(*args: str, timeout_s: float = 120.0, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "display.cli", *args], capture_output=True, text=True,
                          timeout=timeout_s, cwd=REPO, env=kw.pop("env", _env()), **kw)


def popen(*args: str, **kw) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "display.cli", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, cwd=REPO, env=_env(), **kw)


def one_line_exit_2(res: subprocess.CompletedProcess, *words: str) -> str:
    assert res.returncode == 2, (res.returncode, res.stderr[-2000:])
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr, res.stderr[-2000:]
    for w in words:
        assert w in lines[0], (w, lines[0])
    return lines[0]


def sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def make_calibration(path: Path) -> Path:
    """A calibration of the demo rig, fitted by the project's own fit to holds of a linear made-up sensor."""
    from acquire.core.calibration_fit import fit_calibration

    rig = load_rig(None)
    r0 = np.array([7800.0, 7600.0, 7900.0, 8000.0, 7900.0, 7500.0])
    noise = np.random.default_rng(1).normal(0.0, 1.0, (200, 6))
    holds = [(float(k), r0 * (1.0 + 0.02 * k) + noise) for k in (-40, -20, 0, 20, 40, 80)]
    cal, _ = fit_calibration(holds, rig=rig)
    cal.save(path)
    return path


def make_recording(path: Path, *, frames: int, label: str | None = "flat") -> Path:
    """A closed recording of the demo rig written by the real recorder: the sensor at rest, 1 kHz."""
    rig = load_rig(None)
    ring = FrameRing(capacity_frames=frames + 16, n_channels=6)
    rec = Recorder(path=path, ring=ring, rig_toml=rig.text, channel_names=rig.channels, label=label,
                   device_hello=json.dumps({"protocol": 1, "channels": 6, "rate_hz": 1000, "adc_bits": 12}))
    rec.start()
    seq = np.arange(frames)
    noise = np.random.default_rng(0).integers(-3, 4, (frames, 6))
    codes = (np.array([3400, 2900, 2400, 1900, 1400, 900]) + noise).astype(np.uint16)
    ring.push(FrameBlock(codes=codes, seq=seq, t_device_s=seq * 1e-3, t_host_s=seq * 1e-3,
                         status=np.zeros(frames, np.uint8)))
    rec.stop()
    assert rec.error is None, rec.error
    return path


# ----------------------------------------------------------------------------- refusals: one line, exit 2


@dataclass
class Case:
    args: list[str]
    words: tuple[str, ...]
    guard: tuple[Path, ...] = ()  # copies of the recording, which must come out byte for byte the same
    absent: tuple[Path, ...] = ()  # files the command must not leave behind


def _cases(d: Path) -> dict[str, Case]:
    """Every refusal, by name. ``d`` holds the inputs made by the ``refusals`` fixture; no I/O here."""
    rec, rig, cal = str(d / "rec.h5"), str(RIG), str(d / "cal.json")
    big, spike = str(d / "segment_1e300.toml"), str(d / "spike_100001.toml")
    nan, inf = str(d / "nan.json"), str(d / "inf.json")
    long_h5, long_json = str(d / f"{LONG}.h5"), str(d / f"{LONG}.json")
    under_file = d / "notes.txt"  # a regular file used as a folder: refused even for root
    no_port = "/dev/null-not-a-port"  # every check below comes before a port is opened
    headless = ["--headless", "--duration", "1"]

    def guarded(name: str) -> tuple[str, tuple[Path, ...]]:
        return str(d / name), (d / name,)

    cases = {
        # a segment 1e300 mm long: the rig's bounds name the key
        "rig_segment_1e300-virtual-device": Case(["virtual-device", "--rig", big], ("segment_lengths_mm[5]", "2000")),
        "rig_segment_1e300-live": Case(["live", "--rig", big, *headless], ("segment_lengths_mm[5]",)),
        "rig_segment_1e300-health": Case(["health", "--rig", big, "--text", "--duration", "1"],
                                         ("segment_lengths_mm[5]",)),
        "rig_segment_1e300-calibrate": Case(["calibrate", rec, "--rig", big, "--out", str(d / "c.json")],
                                            ("segment_lengths_mm[5]",), absent=(d / "c.json",)),
        "rig_spike_window_100001": Case(["record", "--port", no_port, "--rig", spike, "--out", str(d / "r.h5")],
                                        ("spike_100001.toml", "spike_window", "101"), absent=(d / "r.h5",)),
        "health_window_1e9": Case(["health", "--window", "1e9", "--text"], ("--window", "60")),
        # NaN and infinity in a calibration's coefficients: refused by every command that loads one
        "calibration_nan-process": Case(["process", rec, "--calibration", nan, "--out", str(d / "p.h5")],
                                        ("nan.json", "positive[0]", "finite"), absent=(d / "p.h5",)),
        "calibration_inf-process": Case(["process", rec, "--calibration", inf, "--out", str(d / "p.h5")],
                                        ("inf.json", "negative[0]", "finite"), absent=(d / "p.h5",)),
        "calibration_inf-tare": Case(["tare", rec, "--calibration", inf, "--out", str(d / "t.json")],
                                     ("inf.json", "finite"), absent=(d / "t.json",)),
        "calibration_nan-record": Case(["record", "--port", no_port, "--rig", rig, "--calibration", nan,
                                        "--out", str(d / "r.h5")], ("nan.json", "finite"), absent=(d / "r.h5",)),
        "calibration_inf-live_record": Case(["live", *headless, "--calibration", inf, "--record", str(d / "l.h5")],
                                            ("inf.json", "finite"), absent=(d / "l.h5",)),
        # live must refuse too, not run on silently without it
        "calibration_nan-live": Case(["live", *headless, "--calibration", nan], ("nan.json", "finite")),
        "calibration_inf-export": Case(["export", rec, "--calibration", inf, "--out", str(d / "e.png")],
                                       ("inf.json", "finite"), absent=(d / "e.png",)),
        "calibration_other_segment_lengths-process": Case(
            ["process", rec, "--calibration", str(d / "lengths_20mm.json"), "--out", str(d / "p.h5")],
            ("lengths_20mm.json", "segment lengths"), absent=(d / "p.h5",)),
        "reference_1e308-calibrate": Case(["calibrate", rec, "--rig", rig, "--out", str(d / "c.json"),
                                           "--reference", str(d / "ref_1e308.toml")],
                                          ("ref_1e308.toml", "flat", "1e+308"), absent=(d / "c.json",)),
        "calibrate_same_file_twice": Case(["calibrate", rec, rec, "--rig", rig, "--out", str(d / "c.json")],
                                          ("rec.h5", "twice"), absent=(d / "c.json",)),
        # labels: a curvature beyond any bend, line breaks and control characters
        "label_curvature_1e9-record": Case(["record", "--port", no_port, "--rig", rig, "--out", str(d / "r.h5"),
                                            "--label", "curvature=1e9/m"], ("curvature=1e9/m",)),
        "label_newline-record": Case(["record", "--port", no_port, "--rig", rig, "--out", str(d / "r.h5"),
                                      "--label", "flat\nradius=25mm"], ("label", "U+000A")),
        "label_control_character-live": Case(["live", *headless, "--record", str(d / "l.h5"),
                                              "--label", "flat\x1b[2J"], ("label", "U+001B"), absent=(d / "l.h5",)),
        # outputs that name a recording, or the command's own input: refused whatever the flags
        "calibrate_out_recording_force": Case(
            ["calibrate", rec, "--rig", rig, "--out", guarded("old1.h5")[0], "--force"], ("old1.h5", "recording"),
            guard=guarded("old1.h5")[1]),
        "calibrate_out_own_input_force": Case(
            ["calibrate", guarded("old2.h5")[0], "--rig", rig, "--out", guarded("old2.h5")[0], "--force"],
            ("old2.h5", "input"), guard=guarded("old2.h5")[1]),
        "virtual_device_truth_recording": Case(["virtual-device", "--truth", guarded("old3.h5")[0]],
                                               ("--truth", "old3.h5", "recording"), guard=guarded("old3.h5")[1]),
        "export_out_own_input": Case(["export", guarded("old4.h5")[0], "--out", guarded("old4.h5")[0]],
                                     ("old4.h5", "input"), guard=guarded("old4.h5")[1]),
        "export_out_own_input_force": Case(["export", guarded("old5.h5")[0], "--out", guarded("old5.h5")[0],
                                            "--force"], ("old5.h5", "input"), guard=guarded("old5.h5")[1]),
        "export_out_recording_force": Case(["export", rec, "--out", guarded("old6.h5")[0], "--force"],
                                           ("old6.h5", "recording"), guard=guarded("old6.h5")[1]),
        "process_out_own_input": Case(["process", guarded("old7.h5")[0], "--calibration", cal,
                                       "--out", guarded("old7.h5")[0]], ("old7.h5", "input"),
                                      guard=guarded("old7.h5")[1]),
        "tare_out_recording": Case(["tare", rec, "--calibration", cal, "--out", guarded("old8.h5")[0]],
                                   ("old8.h5", "recording"), guard=guarded("old8.h5")[1]),
        "record_out_over_recording": Case(["record", "--port", no_port, "--rig", rig, "--out", guarded("old9.h5")[0]],
                                          ("--out", "old9.h5", "recording"), guard=guarded("old9.h5")[1]),
        # folders that cannot take the file: a regular file used as a folder stops root too
        "folder_is_a_file-virtual_device_link": Case(["virtual-device", "--link", str(under_file / "finger")],
                                                     ("--link", "notes.txt", "not a folder")),
        "folder_is_a_file-virtual_device_truth": Case(["virtual-device", "--truth", str(under_file / "t.h5")],
                                                      ("--truth", "notes.txt", "not a folder")),
        "folder_is_a_file-record_out": Case(["record", "--port", no_port, "--rig", rig,
                                             "--out", str(under_file / "r.h5")], ("--out", "not a folder")),
    }
    # names one byte over NAME_MAX, for every command that takes a path
    too_long = {
        "record_out": ["record", "--port", no_port, "--rig", rig, "--out", long_h5],
        "live_record": ["live", *headless, "--record", long_h5],
        "calibrate_out": ["calibrate", rec, "--rig", rig, "--out", long_json],
        "tare_out": ["tare", rec, "--calibration", cal, "--out", long_json],
        "process_out": ["process", rec, "--calibration", cal, "--out", long_h5],
        "export_out": ["export", rec, "--out", str(d / f"{LONG}.png")],
        "inspect": ["inspect", long_h5],
        "replay": ["replay", long_h5, *headless],
        "calibrate_file": ["calibrate", long_h5, "--rig", rig, "--out", str(d / "c.json")],
        "tare_file": ["tare", long_h5, "--calibration", cal, "--out", str(d / "t.json")],
        "process_file": ["process", long_h5, "--calibration", cal, "--out", str(d / "p.h5")],
        "virtual_device_link": ["virtual-device", "--link", str(d / LONG)],
        "virtual_device_truth": ["virtual-device", "--truth", long_h5],
        "ports": ["ports", "--probe", str(d / LONG)],
    }
    for name, args in too_long.items():
        cases[f"name_over_255_bytes-{name}"] = Case(args, ("nnnn", "255"))
    return cases


CASES = _cases(Path("/unused"))  # the names, for the test ids


def _make_inputs(d: Path) -> None:
    make_recording(d / "rec.h5", frames=3000)
    rig_text = RIG.read_text()
    (d / "segment_1e300.toml").write_text(rig_text.replace(
        "segment_lengths_mm = [16.0, 16.0, 16.0, 16.0, 16.0, 16.0]",
        "segment_lengths_mm = [16.0, 16.0, 16.0, 16.0, 16.0, 1e300]"))
    (d / "spike_100001.toml").write_text(rig_text.replace("spike_window = 3 ", "spike_window = 100001 "))
    assert "1e300" in (d / "segment_1e300.toml").read_text() and "100001" in (d / "spike_100001.toml").read_text()
    cal = json.loads(make_calibration(d / "cal.json").read_text())
    bad = json.loads(json.dumps(cal))
    bad["model"]["segments"][0]["positive"][0] = math.nan
    (d / "nan.json").write_text(json.dumps(bad))  # Python writes the JSON extension NaN
    bad = json.loads(json.dumps(cal))
    bad["model"]["segments"][1]["negative"][0] = math.inf
    (d / "inf.json").write_text(json.dumps(bad))  # ... and Infinity
    assert "NaN" in (d / "nan.json").read_text() and "Infinity" in (d / "inf.json").read_text()
    other = json.loads(json.dumps(cal))
    other["rig"]["segment_lengths_mm"] = [20.0] * 6
    (d / "lengths_20mm.json").write_text(json.dumps(other))
    (d / "ref_1e308.toml").write_text("[references]\nflat = 1e308\n")
    (d / "notes.txt").write_text("a file, not a folder\n")


@pytest.fixture(scope="module")
def refusals(tmp_path_factory):
    """Every case of :func:`_cases`, run at once (4 at a time): name -> (result, guarded checksums before)."""
    d = tmp_path_factory.mktemp("abuse")
    _make_inputs(d)
    cases = _cases(d)
    before = {}
    for case in cases.values():
        for p in case.guard:
            shutil.copyfile(d / "rec.h5", p)
            before[p] = sha(p)
    with ThreadPoolExecutor(max_workers=4) as pool:
        futures = {name: pool.submit(tapcurve, *case.args) for name, case in cases.items()}
        results = {name: f.result() for name, f in futures.items()}
    return cases, results, before


@pytest.mark.parametrize("name", list(CASES))
def test_refused_with_one_line(refusals, name):
    cases, results, before = refusals
    case, res = cases[name], results[name]
    one_line_exit_2(res, *case.words)
    for p in case.guard:
        assert sha(p) == before[p], f"{p} changed"
    for p in case.absent:
        assert not p.exists(), f"{p} left behind"


# ----------------------------------------------------------------------------- folders that cannot be written


@pytest.mark.skipif(AS_ROOT, reason="running as root: folder permissions do not stop root from writing "
                                    "(the folder_is_a_file cases cover an unwritable place for root)")
@pytest.mark.parametrize("option", ["--link", "--truth"])
def test_virtual_device_in_a_read_only_folder(tmp_path, option):
    folder = tmp_path / "read_only"
    folder.mkdir()
    folder.chmod(0o555)
    try:
        one_line_exit_2(tapcurve("virtual-device", option, str(folder / "finger")), option, "not writable")
        assert list(folder.iterdir()) == []
    finally:
        folder.chmod(0o755)


# ----------------------------------------------------------------------------- a busy shape-stream port


def test_live_record_with_a_busy_publish_port_leaves_no_file(tmp_path):
    holder = socket.socket()
    holder.bind(("127.0.0.1", 0))  # another program holds the port
    holder.listen(1)
    port = holder.getsockname()[1]
    out = tmp_path / "x.h5"
    try:
        res = tapcurve("live", "--headless", "--duration", "2", "--record", str(out),
                       "--publish", f"127.0.0.1:{port}")
    finally:
        holder.close()
    one_line_exit_2(res, f"127.0.0.1:{port}", "in use")
    assert not out.exists() and list(tmp_path.iterdir()) == []


# ----------------------------------------------------------------------------- SIGHUP like SIGTERM


def _frames_on_disk(path: Path) -> int:
    try:
        with h5py.File(path, "r", libver="latest", swmr=True) as f:
            return int(f["raw/seq"].shape[0])
    except Exception:  # not created yet, or caught between two flushes of the writer
        return 0


def _stop_after_frames(proc: subprocess.Popen, out: Path, sig: int, wait_until) -> tuple[int, str]:
    try:
        wait_until(lambda: _frames_on_disk(out) > 500 or proc.poll() is not None, timeout_s=60,
                   what="500 frames on disk")
        assert proc.poll() is None, proc.stderr.read()
        proc.send_signal(sig)
        code = proc.wait(timeout=60)
        return code, proc.stderr.read()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def _closed_and_readable(out: Path, label: str) -> None:
    # plain h5py, no SWMR and no repair: the writer closed the file
    with h5py.File(out, "r") as f:
        n = {k: f["raw"][k].shape[0] for k in ("adc", "seq", "t_device_s", "t_host_s", "status")}
        assert len(set(n.values())) == 1 and n["seq"] > 500, n
        assert (np.diff(f["raw/seq"][:]) == 1).all()
        assert [x.decode() for x in f["labels/text"][:]] == [label]
        assert float(f["labels/t_end_s"][0]) == pytest.approx(float(f["raw/t_device_s"][-1]))  # the label ended
    h5dump = shutil.which("h5dump")
    if h5dump:  # HDF5's own tool (Debian hdf5-tools; .ci/run installs it)
        res = subprocess.run([h5dump, "-H", str(out)], capture_output=True, text=True, timeout=60)
        assert res.returncode == 0, res.stderr


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP], ids=["SIGTERM", "SIGHUP"])
def test_record_stopped_by_signal_leaves_a_closed_recording(finger, tmp_path, wait_until, sig):
    out = tmp_path / "hangup.h5"
    proc = popen("record", "--port", finger.path, "--rig", str(RIG), "--out", str(out), "--label", "flat")
    code, err = _stop_after_frames(proc, out, sig, wait_until)
    assert code == 0, err  # the same for SIGTERM and SIGHUP: a clean stop
    assert "Traceback" not in err
    _closed_and_readable(out, "flat")


def _hang_up_after_frames(args: list[str], out: Path, wait_until) -> int:
    """Run ``tapcurve args`` on a terminal (a pty), then hang the terminal up once 500 frames are on disk.

    A hang-up closes the terminal (writes to it fail with EIO from then on) and sends SIGHUP (signal(7));
    the pty here is not the child's controlling terminal, so the test sends the signal
    itself right after closing the terminal's other end. Returns the exit status.
    """
    master, slave = os.openpty()
    proc = subprocess.Popen([sys.executable, "-m", "display.cli", *args], stdin=slave, stdout=slave, stderr=slave,
                            cwd=REPO, env=_env(), start_new_session=True)
    os.close(slave)
    seen = bytearray()

    def drain() -> None:  # read what the command writes, as a terminal would
        while select.select([master], [], [], 0)[0]:
            try:
                chunk = os.read(master, 65536)
            except OSError:
                return
            if not chunk:
                return
            seen.extend(chunk)

    try:
        wait_until(lambda: drain() or _frames_on_disk(out) > 500 or proc.poll() is not None, timeout_s=60,
                   what="500 frames on disk")
        assert proc.poll() is None, seen.decode(errors="replace")
        os.close(master)
        master = -1
        proc.send_signal(signal.SIGHUP)
        return proc.wait(timeout=60)
    finally:
        if master >= 0:
            os.close(master)
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_record_hung_up_with_its_terminal_leaves_a_closed_recording(finger, tmp_path, wait_until):
    out = tmp_path / "hangup.h5"
    code = _hang_up_after_frames(["record", "--port", finger.path, "--rig", str(RIG), "--out", str(out),
                                  "--label", "flat"], out, wait_until)
    assert code == 0  # as for SIGTERM (above), although every later write to the terminal failed
    _closed_and_readable(out, "flat")


def test_live_headless_record_hung_up_with_its_terminal_leaves_a_closed_recording(tmp_path, wait_until):
    out = tmp_path / "hangup.h5"
    code = _hang_up_after_frames(["live", "--headless", "--record", str(out), "--label", "flat"], out, wait_until)
    assert code == 0  # as for SIGTERM and Ctrl-C (tests/display/test_live_window.py)
    _closed_and_readable(out, "flat")


# ----------------------------------------------------------------------------- killed runs


def _kill_when(proc, cond, what: str, wait_until, *, must_be_running: bool = False) -> None:
    """SIGKILL ``proc`` once ``cond()`` holds (or it ended by itself); never leaves it running."""
    try:
        wait_until(lambda: cond() or proc.poll() is not None, timeout_s=60, what=what)
        if must_be_running:
            assert proc.poll() is None, "finished before it could be killed: " + proc.stderr.read()
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_killed_process_leaves_no_partial_file_after_the_next_run(tmp_path, wait_until):
    src = make_recording(tmp_path / "long.h5", frames=120_000, label=None)
    cal = str(make_calibration(tmp_path / "cal.json"))
    out = tmp_path / "derived.h5"

    def partials() -> list[Path]:
        return sorted(tmp_path.glob(f".{out.name}.*.partial"))

    proc = popen("process", str(src), "--calibration", cal, "--out", str(out), "--quiet")
    _kill_when(proc, partials, "a .partial file", wait_until, must_be_running=True)
    assert partials() and not out.exists()  # the killed run left its partial file, as a kill does
    res = tapcurve("process", str(src), "--calibration", cal, "--out", str(out), "--quiet")
    assert res.returncode == 0, res.stderr
    assert partials() == []
    with h5py.File(out, "r") as f:
        assert f["derived/curvature"].shape[0] == 120_000


@pytest.mark.skipif(AS_ROOT, reason="running as root: chmod 0444 does not stop root from writing, so the "
                                    "read-only path is not reached")
def test_killed_recording_made_read_only_can_still_be_inspected(finger, tmp_path, wait_until):
    out = tmp_path / "killed.h5"
    proc = popen("record", "--port", finger.path, "--rig", str(RIG), "--out", str(out))
    _kill_when(proc, lambda: _frames_on_disk(out) > 500, "500 frames on disk", wait_until)
    out.chmod(0o444)
    before = sha(out)
    res = tapcurve("inspect", str(out))
    assert res.returncode == 0, res.stderr
    assert "Traceback" not in res.stderr
    frames = int(re.search(r"frames\s+(\d+) over", res.stdout).group(1))
    assert frames >= 500
    assert sha(out) == before  # read-only: opened as it is, not repaired


# ----------------------------------------------------------------------------- no room left


def test_file_size_limit_stops_the_recording_and_live_goes_on(tmp_path):
    """Under a 400 kB file size limit (setrlimit(2) RLIMIT_FSIZE, as a nearly full disk), headless live
    records what fits, stops recording with one message before a write could fail, closes the file
    cleanly, acquires on to the end and exits 1."""
    out = tmp_path / "small.h5"
    limit = 400_000

    def small_files():
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    res = tapcurve("live", "--headless", "--duration", "4", "--record", str(out), preexec_fn=small_files)
    assert res.returncode == 1, res.stderr
    assert "Traceback" not in res.stderr
    stopped = [ln for ln in res.stderr.splitlines() if ln.startswith("tapcurve: recording to")
               and "stopped" in ln]
    assert len(stopped) == 1 and "file size limit" in stopped[0] and str(out) in stopped[0], res.stderr
    assert out.stat().st_size <= limit
    with h5py.File(out, "r") as f:  # closed cleanly: plain h5py, no repair
        seq = f["raw/seq"][:]
    assert seq.shape[0] > 0 and (np.diff(seq) == 1).all()
    said = int(stopped[0].split("holds the ")[1].split()[0])
    assert said == seq.shape[0]
    # acquisition went on after the recording stopped: the last status line still counts frames arriving
    status = [ln for ln in res.stderr.splitlines() if "frames/s" in ln]
    assert status and "FAILED" in status[-1]
    rate = float(re.search(r"([\d.]+) frames/s", status[-1]).group(1))
    assert rate > 100  # the virtual finger sends 1000 frames/s


# ----------------------------------------------------------------------------- what the messages say


def test_live_with_a_user_rig_does_not_claim_the_built_in_finger(tmp_path):
    rig = tmp_path / "my_finger.toml"
    rig.write_text(RIG.read_text().replace("16.0, 16.0, 16.0, 16.0, 16.0, 16.0", "20.0, 20.0, 20.0, 20.0, 20.0, 20.0"))
    res = tapcurve("live", "--rig", str(rig), "--headless", "--duration", "1")
    assert res.returncode == 0, res.stderr
    assert "built-in virtual finger" not in res.stderr
    assert f"with the rig {rig}" in res.stderr
    # its segments are not the built-in finger's, so neither is the built-in calibration
    assert "built-in calibration" not in res.stderr and "calibration: none" in res.stderr


def test_inspect_of_a_short_recording_gives_its_own_duration(finger, tmp_path):
    out = tmp_path / "short.h5"
    res = tapcurve("record", "--port", finger.path, "--rig", str(RIG), "--out", str(out), "--duration", "2.7")
    assert res.returncode == 0, res.stderr
    res = tapcurve("inspect", str(out))
    assert res.returncode == 0, res.stderr
    duration = float(re.search(r"frames\s+\d+ over ([\d.]+) s", res.stdout).group(1))
    assert duration == pytest.approx(2.7, abs=0.01)  # 2700 frames at 1 kHz
    clock = [ln for ln in res.stdout.splitlines() if ln.strip().startswith("clock")]
    if clock and "ppm" not in clock[0]:
        # no drift figure for so short a recording; the length it names is this recording's (to its
        # rounding), not another span such as that of the clock points
        figures = [float(x) for x in re.findall(r"(\d+(?:\.\d+)?) s\b", clock[0])]
        assert any(abs(x - duration) <= 0.05 for x in figures), clock[0]


def test_publish_client_gets_every_frame_until_its_rate_request_is_answered(wait_until):
    """The documented contract of a rate request (acquire/serve/publish.py, "Requests"): the frames sent
    before the reply come at the full rate, every one; from the frame after the reply at most max_rate_hz."""
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    proc = popen("live", "--headless", "--duration", "30", "--publish", f"127.0.0.1:{port}")

    def connect():
        assert proc.poll() is None, proc.stderr.read()
        try:
            return socket.create_connection(("127.0.0.1", port), timeout=30)
        except OSError:  # not bound yet: the session is starting
            return None

    try:
        with wait_until(connect, timeout_s=60, poll_s=0.05, what="the shape stream to accept") as sock:
            sock.sendall(b'{"max_rate_hz": 50}\n')
            lines = sock.makefile("r", encoding="utf-8")
            before, reply = [], None
            for line in lines:
                msg = json.loads(line)
                if "seq" not in msg:
                    reply = msg
                    break
                before.append(msg["seq"])
            after = [json.loads(next(lines))["t_device_s"] for _ in range(40)]
    finally:
        proc.terminate()
        proc.wait(timeout=60)
    assert reply == {"ok": True, "max_rate_hz": 50.0}
    if before:  # how many depends on when the publisher reads the request: often none, up to tens
        assert before == list(range(before[0], before[0] + len(before)))  # every frame, none skipped
    # 50 Hz at most: device-time steps of 20 ms, less at most one 1 ms frame of the device's rate
    assert np.diff(after).min() >= 1 / 50 - 1.5e-3
