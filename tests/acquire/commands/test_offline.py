"""`tapcurve calibrate`, `tare` and `process` through the command line, on real recordings.

The recordings are written by the project's own recorder (FrameRing ->
Recorder thread -> HDF5) from codes made with a known law, so every figure the
commands produce can be checked against that law:

- the divider: segment k between taps k and k+1 of a series chain fed through
  r_ref, tap voltage = V_ex * R_below / (r_ref + R_total) (Ohm's law and the
  voltage divider; e.g. Horowitz & Hill, "The Art of Electronics", 3rd ed.
  2015, chapter 1; section from memory), ideal ADC code = round(V / V_ref * 2^N);
- the sensor law, made up for these tests: curvature = 60 x + 30 x^2 for
  x = (R - R0) / R0 >= 0, curvature = 150 x for x < 0;
- a uniform curvature k bends a strip of length L into a circular arc with its
  end at (sin(kL)/k, (1 - cos kL)/k) (circle geometry).

Bad input is run as a subprocess (`python -m display.cli`): exit 2, one line
on stderr naming the thing at fault, no traceback.
"""
from __future__ import annotations

import contextlib
import hashlib
import io
import json
import subprocess
import sys
import textwrap
from datetime import datetime
from pathlib import Path

import h5py
import numpy as np
import pytest

from display.cli import main as cli_main
from acquire.link.frames import FrameBlock, FrameRing
from acquire.store.recorder import Recorder
from acquire.rig import load_rig

REPO = Path(__file__).resolve().parents[3]
RIG_PATH = REPO / "acquire" / "rigs" / "demo_finger.toml"
RATE = 1000.0
BITS = 12
R0 = np.array([5000.0, 5200.0, 4900.0, 5100.0, 5050.0, 4950.0])
C1, C2, D1 = 60.0, 30.0, 150.0  # the made-up law (module docstring)


def x_of_curvature(k):
    """Inverse of the made-up law: relative resistance change for curvature k (1/m)."""
    k = np.asarray(k, dtype=np.float64)
    pos = (-C1 + np.sqrt(C1 * C1 + 4 * C2 * np.maximum(k, 0))) / (2 * C2)
    return np.where(k >= 0, pos, k / D1)


def law(x):
    x = np.asarray(x, dtype=np.float64)
    return np.where(x >= 0, C1 * x + C2 * x * x, D1 * x)


def divider_codes(r_seg, *, r_ref, rng, noise_lsb=0.7):
    """Codes of taps 0..S-1 of a series chain (module docstring: the divider), with ADC noise."""
    below = np.cumsum(r_seg[:, ::-1], axis=1)[:, ::-1]  # tap k to ground
    v = below / (r_ref + below[:, :1])
    x = v * (1 << BITS) + rng.normal(scale=noise_lsb, size=v.shape)
    return np.clip(np.rint(x), 0, (1 << BITS) - 1).astype(np.uint16)


def hold_program(labels_and_k, *, hold_s=1.0, move_s=0.3):
    """Per-frame curvature of a sequence of holds joined by smooth moves, and the label intervals."""
    k_parts, spans = [], []
    t0 = 0.0
    prev = 0.0
    n_hold, n_move = int(hold_s * RATE), int(move_s * RATE)
    for label, k in labels_and_k:
        u = np.arange(n_move) / n_move
        k_parts.append(prev + (k - prev) * (3 * u * u - 2 * u ** 3))  # a smooth move into the hold
        t0 += n_move / RATE
        k_parts.append(np.full(n_hold, float(k)))
        if label is not None:
            spans.append((label, t0 + 0.05, t0 + hold_s - 0.05))
        t0 += n_hold / RATE
        prev = k
    return np.concatenate(k_parts), spans


def write_recording(path, *, curvature, labels, rig_text=None, r0=R0, seed=0, direction=1.0, hello=None):
    """A recording made by the project's Recorder from codes of the made-up law (curvature: (N,) 1/m)."""
    rig = load_rig(RIG_PATH)
    rng = np.random.default_rng(seed)
    x = x_of_curvature(direction * curvature)[:, None]
    r = r0[None, :] * (1.0 + x)
    codes = divider_codes(r, r_ref=rig.r_ref_ohm, rng=rng)
    n = codes.shape[0]
    ring = FrameRing(capacity_frames=n + 10, n_channels=rig.n_channels)
    hello = hello or {"protocol": 1, "firmware": "test", "adc_bits": BITS, "channels": rig.n_channels, "rate_hz": RATE}
    rec = Recorder(
        path=path, ring=ring, rig_toml=rig_text or rig.text, device_hello=json.dumps(hello),
        channel_names=rig.channels, n_segments=rig.n_segments,
    )
    rec.start()
    seq = np.arange(n, dtype=np.int64)
    ring.push(FrameBlock(codes=codes, seq=seq, t_device_s=seq / RATE, t_host_s=seq / RATE,
                         status=np.zeros(n, dtype=np.uint8)))
    for text, a, b in labels:
        rec.add_label(text, t_start_s=a, t_end_s=b)
    rec.stop()
    assert rec.error is None
    return codes


HOLDS = [("flat", 0.0), ("curvature=10/m", 10.0), ("radius=50mm", 20.0), ("jig A", 30.0),
         ("radius=25mm", 40.0), ("flat", 0.0), ("curvature=-10/m", -10.0), ("radius=-40mm", -25.0),
         ("grasp (moving)", 15.0)]
TABLE = '[references]\n"jig A" = 30.0   # every segment, 1/m\n'


@pytest.fixture(scope="module")
def holds_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("holds")
    k, spans = hold_program(HOLDS)
    path = d / "holds.h5"
    write_recording(path, curvature=k, labels=spans)
    (d / "table.toml").write_text(TABLE)
    return path


@pytest.fixture(scope="module")
def calibration(holds_file):
    out = holds_file.parent / "cal.json"
    stdout, stderr = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        code = cli_main(["calibrate", str(holds_file), "--rig", str(RIG_PATH), "--out", str(out),
                         "--reference", str(holds_file.parent / "table.toml")])
    assert code == 0, stderr.getvalue()
    return out, subprocess.CompletedProcess([], code, stdout.getvalue(), stderr.getvalue())


def tapcurve(*args: str, timeout_s: float = 120.0) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "display.cli", *args], capture_output=True, text=True,
                          timeout=timeout_s, cwd=REPO)


def assert_user_error(result, *words):
    """Exit 2, exactly one line on stderr naming the thing at fault, no traceback."""
    assert result.returncode == 2, (result.returncode, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.stderr
    for w in words:
        assert w in lines[0], (w, lines[0])


def run_cli(capsys, *args):
    """The command line in this process (the same main() as the console script)."""
    code = cli_main(list(args))
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


# ----------------------------------------------------------------------------- calibrate


def test_calibrate_recovers_the_law(calibration, holds_file):
    out, run = calibration
    doc = json.loads(out.read_text())
    # flat resistance: the divider inverts exactly up to ADC noise (0.7 LSB over ~1000 frames)
    np.testing.assert_allclose(doc["r0_ohm"], R0, rtol=2e-4)
    from acquire.core.calibration import Calibration

    cal = Calibration.load(out)
    # the fitted law against the made-up one over the calibrated range, per segment
    for kappa in (-25.0, -10.0, -4.0, 5.0, 15.0, 25.0, 35.0, 40.0):
        r = R0 * (1.0 + x_of_curvature(kappa))
        np.testing.assert_allclose(cal.curvature_per_m(r[None, :])[0], kappa, atol=0.15)
    # cross-validation finds the law's own degrees: quadratic for positive bends, linear for negative
    assert "degree up to 2 (positive bends) / 1 (negative bends)" in run.stdout
    assert all((s["degree_positive"], s["degree_negative"]) == (2, 1) for s in doc["fit_report"]["segments"])
    # provenance: the recording's and the rig's SHA-256, computed here with hashlib
    assert doc["recordings"][0]["sha256"] == sha256(holds_file)
    assert doc["recordings"][0]["path"] == str(holds_file)
    assert doc["rig"]["sha256"] == hashlib.sha256(RIG_PATH.read_text(encoding="utf-8").encode()).hexdigest()
    assert doc["model"]["name"] == "two-sided-polynomial"
    assert doc["software_version"]
    datetime.fromisoformat(doc["created_utc"].replace("Z", "+00:00"))
    # the report: one line per segment with points and range, the moving label listed but unused
    lines = run.stdout.splitlines()
    rows = [ln.split() for ln in lines if ln.strip()[:1].isdigit() and len(ln.split()) >= 8]
    assert [int(r[0]) for r in rows] == list(range(6))
    assert all(int(r[1]) == 8 for r in rows)  # 8 holds: "grasp (moving)" states no reference
    assert all(r[3] == "-25.00" and r[5] == "+40.00" for r in rows)
    assert "grasp (moving)" in run.stdout and "states no reference" in run.stdout
    assert "jig A" in run.stdout


def test_calibrate_refuses_existing_output_unless_forced(holds_file, tmp_path, capsys):
    out = tmp_path / "cal.json"
    out.write_text("my old calibration")
    r = tapcurve("calibrate", str(holds_file), "--rig", str(RIG_PATH), "--out", str(out))
    assert_user_error(r, str(out), "exists", "--force")
    assert out.read_text() == "my old calibration"
    code, _, err = run_cli(capsys, "calibrate", str(holds_file), "--rig", str(RIG_PATH), "--out", str(out),
                           "--reference", str(holds_file.parent / "table.toml"), "--force")
    assert code == 0, err
    assert json.loads(out.read_text())["format"] == "tapcurve-calibration"
    # the output can never be one of the inputs, --force or not
    r = tapcurve("calibrate", str(holds_file), "--rig", str(RIG_PATH), "--out", str(holds_file), "--force")
    assert_user_error(r, "input")


def test_calibrate_without_usable_labels(tmp_path):
    path = tmp_path / "moving.h5"
    k, spans = hold_program([("grasp", 20.0), (None, 0.0)])
    write_recording(path, curvature=k, labels=spans)
    r = tapcurve("calibrate", str(path), "--rig", str(RIG_PATH), "--out", str(tmp_path / "c.json"))
    assert_user_error(r, str(path), "no usable labelled holds", "'grasp'")
    assert not (tmp_path / "c.json").exists()


def test_calibrate_label_not_understood(tmp_path):
    path = tmp_path / "typo.h5"
    k, spans = hold_program([("flat", 0.0), ("radius=25mm", 40.0)])
    write_recording(path, curvature=k, labels=spans)
    # the recorder refuses such a label now; a file made by other software may still hold one
    with h5py.File(path, "r+") as f:
        texts = f["labels/text"]
        row = [t.decode() for t in texts[:]].index("radius=25mm")
        texts[row] = "radius=25 mmm".encode()
    r = tapcurve("calibrate", str(path), "--rig", str(RIG_PATH), "--out", str(tmp_path / "c.json"))
    assert_user_error(r, str(path), "radius=25 mmm")


def test_calibrate_rig_disagrees(holds_file, tmp_path):
    rig4 = tmp_path / "four.toml"
    rig4.write_text("[sensor]\nsegment_lengths_mm = [20, 20, 20, 20]\n[readout]\nkind = 'divider'\n"
                    "r_ref_ohm = 10000.0\nchannels = ['tap0', 'tap1', 'tap2', 'tap3']\n")
    r = tapcurve("calibrate", str(holds_file), "--rig", str(rig4), "--out", str(tmp_path / "c.json"))
    assert_user_error(r, str(holds_file), "6 segments", "4")
    # same segments, another reference resistor: the resistances would be wrong
    other = tmp_path / "other_rref.toml"
    other.write_text(RIG_PATH.read_text().replace("r_ref_ohm = 10000.0", "r_ref_ohm = 4700.0"))
    r = tapcurve("calibrate", str(holds_file), "--rig", str(other), "--out", str(tmp_path / "c.json"))
    assert_user_error(r, "r_ref_ohm")


def test_calibrate_resistance_moves_the_wrong_way(tmp_path):
    # the strip mounted the other way round: positive labels lower the resistance
    path = tmp_path / "reversed.h5"
    k, spans = hold_program([("flat", 0.0), ("curvature=10/m", 10.0), ("curvature=20/m", 20.0),
                             ("curvature=-20/m", -20.0)])
    write_recording(path, curvature=k, labels=spans, direction=-1.0)
    r = tapcurve("calibrate", str(path), "--rig", str(RIG_PATH), "--out", str(tmp_path / "c.json"))
    assert_user_error(r, "segment 0", "positive curvature must raise")


def test_calibrate_non_monotone_holds_warn(tmp_path, capsys):
    # two holds labelled the wrong way round (the jig at 30/m labelled 20/m and vice versa):
    # a fit is still possible, with warnings on stderr
    path = tmp_path / "swapped.h5"
    k, _ = hold_program([("flat", 0.0), ("a", 10.0), ("b", 30.0), ("c", 20.0), ("d", 40.0), ("e", -20.0)])
    _, spans = hold_program([("flat", 0.0), ("curvature=10/m", 0), ("curvature=20/m", 0), ("curvature=30/m", 0),
                             ("curvature=40/m", 0), ("curvature=-20/m", 0)])  # same timing, the labels only
    write_recording(path, curvature=k, labels=spans)
    out = tmp_path / "c.json"
    code, _, err = run_cli(capsys, "calibrate", str(path), "--rig", str(RIG_PATH), "--out", str(out))
    assert code == 0, err
    assert "not monotone" in err and "tapcurve: warning:" in err
    assert out.exists()


# ----------------------------------------------------------------------------- tare


def test_tare_moves_only_r0(calibration, tmp_path, capsys):
    cal_path, _ = calibration
    before = sha256(cal_path)
    drift = np.array([1.03, 0.98, 1.01, 1.0, 1.02, 0.99])  # the strip crept since calibrating
    flat = tmp_path / "flat.h5"
    k, spans = hold_program([("flat", 0.0)], hold_s=1.5)
    write_recording(flat, curvature=k, labels=spans, r0=R0 * drift, seed=5)
    out = tmp_path / "tared.json"
    code, stdout, err = run_cli(capsys, "tare", str(flat), "--calibration", str(cal_path), "--out", str(out))
    assert code == 0, err
    assert "R0 before" in stdout
    new, old = json.loads(out.read_text()), json.loads(cal_path.read_text())
    np.testing.assert_allclose(new["r0_ohm"], R0 * drift, rtol=3e-4)
    assert new["model"] == old["model"]  # the law stays, only R0 moves
    assert new["tares"][-1]["r0_ohm_before"] == old["r0_ohm"]
    assert sha256(cal_path) == before  # the input calibration untouched
    # never in place, never over an existing file
    assert_user_error(tapcurve("tare", str(flat), "--calibration", str(cal_path), "--out", str(cal_path)), "input")
    assert_user_error(tapcurve("tare", str(flat), "--calibration", str(cal_path), "--out", str(out)), "exists")
    assert sha256(cal_path) == before


def test_tare_from_an_unlabelled_flat_recording(calibration, tmp_path, capsys):
    # no label at all: the whole recording is taken as flat, and the user is told so
    cal_path, _ = calibration
    flat = tmp_path / "flat_nolabel.h5"
    k, _ = hold_program([(None, 0.0)], hold_s=1.0)
    write_recording(flat, curvature=k, labels=[], r0=R0 * 1.02, seed=9)
    out = tmp_path / "tared.json"
    code, _, err = run_cli(capsys, "tare", str(flat), "--calibration", str(cal_path), "--out", str(out))
    assert code == 0, err
    assert "whole recording" in err
    np.testing.assert_allclose(json.loads(out.read_text())["r0_ohm"], R0 * 1.02, rtol=3e-4)


def test_tare_refuses_a_bent_recording(calibration, tmp_path):
    cal_path, _ = calibration
    bent = tmp_path / "bent.h5"
    k, spans = hold_program([("radius=25mm", 40.0)])
    write_recording(bent, curvature=k, labels=spans)
    r = tapcurve("tare", str(bent), "--calibration", str(cal_path), "--out", str(tmp_path / "t.json"))
    assert_user_error(r, str(bent), "flat", "radius=25mm")


# ----------------------------------------------------------------------------- process


def test_process_writes_derived(calibration, holds_file, tmp_path, capsys):
    cal_path, _ = calibration
    before = sha256(holds_file)
    out = tmp_path / "processed.h5"
    code, stdout, stderr = run_cli(capsys, "process", str(holds_file), "--calibration", str(cal_path),
                                   "--out", str(out), "--quiet")
    assert code == 0, stderr
    assert sha256(holds_file) == before  # the input is only read
    rig = load_rig(RIG_PATH)
    with h5py.File(holds_file, "r") as fi, h5py.File(out, "r") as f:
        n = fi["raw/adc"].shape[0]
        np.testing.assert_array_equal(f["raw/adc"][:], fi["raw/adc"][:])
        np.testing.assert_array_equal(f["labels/text"][:], fi["labels/text"][:])
        for key in ("layout", "layout_version", "rig_toml", "device_hello", "created_utc"):
            assert f.attrs[key] == fi.attrs[key]
        assert json.loads(f.attrs["calibration_json"]) == json.loads(cal_path.read_text())
        d = f["derived"]
        curv, s_m, xy = d["curvature"], d["s_m"], d["xy"]
        # contract, section 4: shapes, dtypes, units
        assert curv.shape == (n, 6) and curv.dtype == np.float32 and curv.attrs["units"] == "1/m"
        assert s_m.dtype == np.float64 and s_m.ndim == 1 and s_m.attrs["units"] == "m"
        assert s_m[0] == 0.0 and np.all(np.diff(s_m) > 0)
        assert xy.shape == (n, s_m.shape[0], 2) and xy.dtype == np.float32 and xy.attrs["units"] == "m"
        tap_end = int(d.attrs["tap_index"][-1])
        assert s_m[tap_end] == pytest.approx(rig.sensor_length_m, abs=1e-12)
        # the README's recording layout: s_m runs from 0 to the sensor length (the fingertip is not part of it)
        assert tap_end == s_m.shape[0] - 1 and s_m[-1] == pytest.approx(rig.sensor_length_m, abs=1e-12)
        # in each hold the curvature is the reference, and the sensor's end lies on the circle
        t = f["raw/t_device_s"][:]
        L = rig.sensor_length_m
        for text, a, b in zip(f["labels/text"][:], f["labels/t_start_s"][:], f["labels/t_end_s"][:]):
            ref = {b"flat": 0.0, b"curvature=10/m": 10.0, b"radius=50mm": 20.0, b"jig A": 30.0,
                   b"radius=25mm": 40.0, b"curvature=-10/m": -10.0, b"radius=-40mm": -25.0}.get(text)
            if ref is None:
                continue
            sel = (t > a + 0.3) & (t < b)  # past the filters' settling
            # mean over the hold: the calibration; single frames: plus ADC noise (0.7 LSB)
            np.testing.assert_allclose(curv[sel].mean(axis=0), ref, atol=0.1)
            np.testing.assert_allclose(curv[sel], ref, atol=0.8)
            end = xy[np.flatnonzero(sel), tap_end, :]
            exact = (np.array([L, 0.0]) if ref == 0 else
                     np.array([np.sin(ref * L) / ref, (1 - np.cos(ref * L)) / ref]))  # circle geometry
            # 0.05/m of mean curvature (noise through the law's kink at flat biases it so)
            # moves the end by about L^2/2 * 0.05/m = 0.23 mm
            assert np.hypot(*(end.mean(axis=0) - exact)) < 3e-4
            assert np.max(np.hypot(*(end - exact).T)) < 1.5e-3
    assert str(out) in stdout


def test_process_refuses_existing_output(calibration, holds_file, tmp_path):
    cal_path, _ = calibration
    out = tmp_path / "exists.h5"
    out.write_bytes(b"someone's data")
    r = tapcurve("process", str(holds_file), "--calibration", str(cal_path), "--out", str(out))
    assert_user_error(r, str(out), "exists")
    assert out.read_bytes() == b"someone's data"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary left behind


def test_process_zero_phase_and_replacing_derived(calibration, holds_file, tmp_path, capsys):
    cal_path, _ = calibration
    first, second = tmp_path / "a.h5", tmp_path / "b.h5"
    assert run_cli(capsys, "process", str(holds_file), "--calibration", str(cal_path), "--out", str(first),
                   "--quiet")[0] == 0
    # the processed copy already has /derived: processing it again replaces it in the new copy
    code, _, err = run_cli(capsys, "process", str(first), "--calibration", str(cal_path), "--out", str(second),
                           "--zero-phase", "--quiet")
    assert code == 0, err
    assert "has /derived already" in err
    with h5py.File(first, "r") as fa, h5py.File(second, "r") as fb:
        assert list(fb["derived"]) == ["curvature", "s_m", "xy"]
        assert fb["derived"].attrs["filter"].startswith("zero-phase")
        ka, kb = fa["derived/curvature"][:], fb["derived/curvature"][:]
        t = fa["raw/t_device_s"][:]
        # the move from flat to 10/m: the causal filters lag behind it, forward-backward
        # filtering has no phase delay (Gustafsson, "Determining the initial states in
        # forward-backward filtering", IEEE Trans. Signal Processing, 1996)
        moving = (t > 1.30) & (t < 1.60)
        u = (t[moving] - 1.30) / 0.3
        truth = 10.0 * (3 * u * u - 2 * u ** 3)  # the move hold_program makes
        err_causal = np.abs(ka[moving, 0] - truth).mean()
        err_zero = np.abs(kb[moving, 0] - truth).mean()
        assert err_zero < 0.5 * err_causal


KILLED_WRITER = textwrap.dedent(
    """
    import json, os, sys, time
    import numpy as np, h5py
    sys.path.insert(0, {repo!r})
    sys.path.insert(0, {tests!r})
    from acquire.link.frames import FrameBlock, FrameRing
    from acquire.store.recorder import Recorder
    from acquire.rig import load_rig
    rig = load_rig({rig!r})
    codes = np.load({codes!r})
    n = codes.shape[0]
    ring = FrameRing(capacity_frames=n, n_channels=6)
    hello = json.dumps({{"protocol": 1, "adc_bits": 12, "channels": 6, "rate_hz": 1000}})
    rec = Recorder(path={path!r}, ring=ring, rig_toml=rig.text, device_hello=hello, channel_names=rig.channels,
                   flush_interval_s=0.05)
    rec.start()
    seq = np.arange(n)
    ring.push(FrameBlock(codes=codes, seq=seq, t_device_s=seq / 1000.0, t_host_s=seq / 1000.0,
                         status=np.zeros(n, np.uint8)))
    rec.add_label("flat", t_start_s=0.0, t_end_s=0.5)
    deadline = time.monotonic() + 20
    while time.monotonic() < deadline:  # until a reader sees every frame on disk
        with h5py.File({path!r}, "r", libver="latest", swmr=True) as f:
            if f["raw/adc"].shape[0] == n and f["labels/text"].shape[0] == 1:
                break
        time.sleep(0.02)
    os._exit(0)  # killed: the file is never closed
    """
)


def test_process_recovers_a_file_left_unclosed(calibration, tmp_path, capsys):
    cal_path, _ = calibration
    k, _ = hold_program([("flat", 0.0), ("x", 20.0)])
    rig = load_rig(RIG_PATH)
    codes = divider_codes(R0[None, :] * (1 + x_of_curvature(k)[:, None]), r_ref=rig.r_ref_ohm,
                          rng=np.random.default_rng(2))
    np.save(tmp_path / "codes.npy", codes)
    path = tmp_path / "killed.h5"
    script = KILLED_WRITER.format(repo=str(REPO), tests=str(Path(__file__).parent), rig=str(RIG_PATH),
                                  codes=str(tmp_path / "codes.npy"), path=str(path))
    subprocess.run([sys.executable, "-c", script], check=True, timeout=60)
    with pytest.raises(OSError):
        h5py.File(path, "r")  # left "open for writing"
    out = tmp_path / "out.h5"
    code, _, err = run_cli(capsys, "process", str(path), "--calibration", str(cal_path), "--out", str(out),
                           "--quiet")
    assert code == 0, err
    assert "recovered" in err
    with h5py.File(out, "r") as f:
        assert f["derived/curvature"].shape == (codes.shape[0], 6)
        np.testing.assert_allclose(f["derived/curvature"][-300:], 20.0, atol=0.3)


def test_process_calibration_for_another_rig(calibration, holds_file, tmp_path):
    cal_path, _ = calibration
    doc = json.loads(cal_path.read_text())
    for key in ("r0_ohm",):
        doc[key] = doc[key][:4]
    doc["model"]["segments"] = doc["model"]["segments"][:4]
    bad = tmp_path / "four.json"
    bad.write_text(json.dumps(doc))
    r = tapcurve("process", str(holds_file), "--calibration", str(bad), "--out", str(tmp_path / "o.h5"))
    assert_user_error(r, "four.json", "4 segments", "6")
    r = tapcurve("process", str(holds_file), "--calibration", str(tmp_path / "none.json"), "--out",
                 str(tmp_path / "o.h5"))
    assert_user_error(r, "none.json", "not found")
    assert not (tmp_path / "o.h5").exists()
