"""``tapcurve calibrate --motion REC MARKERS``: filmed motion sessions to a calibration.

References: the virtual finger's ground truth (its elastica model's exact
segment curvature and sensor end point, written per frame by the device, never
seen by the host side) and the clock mapping the virtual camera was given
(``acquire.virtual.camera``); the report picture is checked with the standard
library's XML parser (xml.etree).
"""
from __future__ import annotations

import subprocess
import sys
import xml.etree.ElementTree as ET
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import h5py
import numpy as np
import pytest

from acquire.core.align import align_clocks
from acquire.core.markers import fit_marker_frames, read_marker_csv
from acquire.rig import load_rig
from acquire.virtual.camera import Camera, CameraSettings, write_marker_csv
from acquire.virtual.model import FingerModel

REPO = Path(__file__).resolve().parents[3]
SVG = "{http://www.w3.org/2000/svg}"


def tapcurve(*args, timeout_s: float = 180.0) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "display.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout_s, cwd=REPO)


@pytest.fixture(scope="module")
def motion(filmed_motion):
    """One 40 s filmed free-motion session (camera clock offset -5 s, -230 ppm) and one grasp recording
    of the same finger (a different motion) with ground truth, both on the ideal strip (the strip without
    memory: what a static law can reach); made once per run (``filmed_motion``, tests/conftest.py)."""
    return filmed_motion


# --- bad input: one line, exit 2, nothing written -------------------------------------------------

def _bad_csvs(folder: Path, good: Path) -> dict:
    lines = good.read_text().splitlines()
    cases = {
        "empty": ("", "is empty"),
        "header_only": (lines[0] + "\n", "header but no data rows"),
        "non_numeric": ("\n".join([lines[0], lines[1], lines[2].replace(lines[2].split(",")[3], "abc", 1)]) + "\n",
                        "is not a number"),
        "marker_count": ("\n".join(",".join(r.split(",")[:-2]) for r in lines[:50]) + "\n",
                         "has 12 markers, the rig has 13"),
        "never_seen": ("\n".join([lines[0]] + [",".join(r.split(",")[:-2] + ["", ""]) for r in lines[1:50]]) + "\n",
                       "missing in every frame"),
    }
    out = {}
    for name, (text, message) in cases.items():
        path = folder / f"bad_{name}.csv"
        path.write_text(text)
        out[name] = (path, message)
    return out


def test_bad_marker_files_one_line_exit_2_nothing_written(motion, tmp_path):
    bad = _bad_csvs(tmp_path, motion["film"]["markers"])
    with ThreadPoolExecutor(max_workers=3) as pool:  # independent runs, side by side
        runs = {name: pool.submit(tapcurve, "calibrate", "--rig", motion["rig"], "--out",
                                  tmp_path / f"cal_{name}.json", "--motion", motion["film"]["rec"], path)
                for name, (path, _) in bad.items()}
        runs = {name: f.result() for name, f in runs.items()}
    for name, (path, message) in bad.items():
        out = tmp_path / f"cal_{name}.json"
        r = runs[name]
        assert r.returncode == 2, (name, r.stderr)
        assert len(r.stderr.strip().splitlines()) == 1 and str(path) in r.stderr and message in r.stderr, r.stderr
        assert not out.exists() and not out.with_suffix(".svg").exists()


def test_poor_motion_and_no_overlap_refused(motion, tmp_path):
    film = motion["film"]
    out, out_apart = tmp_path / "cal.json", tmp_path / "cal_apart.json"
    # the camera clock 1000 s away (below): no overlap in time
    lines = film["markers"].read_text().splitlines()
    shifted = tmp_path / "shifted.csv"
    shifted.write_text("\n".join([lines[0]] + [f"{float(r.split(',')[0]) + 1000:.6f}," + r.split(",", 1)[1]
                                               for r in lines[1:]]) + "\n")
    with ThreadPoolExecutor(max_workers=2) as pool:  # two refusals, side by side, each with its own output
        # the grasp recording was not filmed: another motion than the markers show
        poor = pool.submit(tapcurve, "calibrate", "--rig", motion["rig"], "--out", out, "--motion",
                           motion["grasp"]["rec"], film["markers"])
        apart = pool.submit(tapcurve, "calibrate", "--rig", motion["rig"], "--out", out_apart, "--motion",
                            film["rec"], shifted)
        poor, apart = poor.result(), apart.result()
    r = poor
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1, r.stderr
    assert "the motion is too poor to align" in r.stderr or "no overlap in time" in r.stderr
    assert f"{motion['grasp']['rec']}/{film['markers']}" in r.stderr
    r = apart
    assert r.returncode == 2 and "no overlap in time" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    for o in (out, out_apart):
        assert not o.exists() and not o.with_suffix(".svg").exists()


def test_never_writes_over_a_recording(motion):
    film = motion["film"]
    before = film["rec"].read_bytes()
    r = tapcurve("calibrate", "--rig", motion["rig"], "--out", film["rec"], "--motion", film["rec"], film["markers"],
                 "--force")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1, r.stderr
    assert str(film["rec"]) in r.stderr and ("input" in r.stderr or "recording" in r.stderr), r.stderr
    assert film["rec"].read_bytes() == before and not film["rec"].with_suffix(".svg").exists()


# --- alignment on the virtual finger's film ---------------------------------------------------------

@pytest.fixture(scope="module")
def long_motion(motion):
    """200 s of the finger's free motion (its truth curvature through a monotone gain plus noise at 1 kHz:
    the recording's relative change, without the strip's memory)."""
    rig = load_rig(motion["rig"])
    model = FingerModel(rig=rig, seed=4, scenario="free")
    t = 5.0 + np.arange(200_000) / 1000.0
    kappa = model.truth(t)["curvature_per_m"]
    rec = 0.04 * np.tanh(kappa / 50) + 0.004 * kappa / 50 + np.random.default_rng(1).normal(0, 2e-4, kappa.shape)
    return rig, model, t, rec


@pytest.mark.parametrize("offset_s, rate_ppm", [(-50.0, 300.0), (-5.0, -450.0), (0.3, 120.0), (40.0, -450.0)])
def test_alignment_on_the_virtual_film(long_motion, tmp_path, offset_s, rate_ppm):
    rig, model, t, rec = long_motion
    settings = CameraSettings(offset_s=offset_s, rate_ppm=rate_ppm, seed=2)
    cam = Camera(settings, rig=rig)
    k = np.arange(int(np.ceil(cam.camera_time(t[0] + 2) * 60)), int(cam.camera_time(t[-1] - 2) * 60))
    path = tmp_path / "film.csv"
    write_marker_csv(path, model, cam.device_time(k / 60.0), settings=settings)
    track = read_marker_csv(path, n_markers=len(rig.markers_s_m))
    fit = fit_marker_frames(track, segment_lengths_m=rig.segment_lengths_m, s_m=rig.markers_s_m)
    a = align_clocks(t - 5.0, rec, track.t_s, np.where(fit.ok[:, None], fit.curvature_per_m, np.nan))
    # truth: the recording's clock reads 0 at model time 5 s, so its offset is the camera's minus 5 s
    print(f"\noffset {offset_s:+.1f} s, {rate_ppm:+.0f} ppm: error {1e3 * (a.offset_s - offset_s + 5):+.2f} ms, "
          f"{a.rate_ppm - rate_ppm:+.1f} ppm")
    assert abs(a.offset_s - (offset_s - 5.0)) < 1 / 60          # within one camera frame
    assert abs(a.rate_ppm - rate_ppm) < 50


# --- the whole command, the report and the picture --------------------------------------------------

@pytest.fixture(scope="module")
def calibrated(motion):
    """``tapcurve calibrate --rig RIG --out cal.json --motion free.h5 free.csv``, run once with the film
    (``filmed_motion``): the calibration's path and the command's stdout."""
    return motion["cal"], motion["calibrate_stdout"]


def test_report_states_the_alignment(calibrated):
    import json

    out, stdout = calibrated
    doc = json.loads(out.read_text())
    (session,) = doc["fit_report"]["motion_sessions"]
    # the camera's clock as the virtual finger set it, against the recording's clock (0 at the first frame)
    with h5py.File(out.parent / "free_truth.h5", "r") as t:
        t0 = float(t["t_device_s"][0])
    true_offset = -5.0 - t0
    t_mid = 30.0 + t0
    err_mid_s = (session["offset_s"] + (1 + session["rate_ppm"] * 1e-6) * t_mid) - (true_offset + (1 - 230e-6) * t_mid)
    print(f"\n{stdout}\nmapping error at mid-session {1e3 * err_mid_s:+.1f} ms")
    # within 3 camera frames at mid-session: the strip's creep delays the resistance (a real lag, not a clock error)
    assert abs(err_mid_s) < 3 / 60
    assert session["frames_used"] > 0.8 * session["frames"] and session["marker_residual_mm"] < 0.3
    for seg in doc["fit_report"]["segments"]:
        assert seg["n_motion_points"] >= 8 and seg["motion_share"] == 1.0 and seg["r0_from"] == "motion"
    assert "offset" in stdout and "ppm" in stdout and "marker residual" in stdout


def test_report_picture_parses_and_holds_the_series(calibrated, motion):
    out, _ = calibrated
    root = ET.parse(out.with_suffix(".svg")).getroot()           # well-formed XML (xml.etree)
    assert root.tag == f"{SVG}svg"
    groups = {g.get("class") for g in root.iter(f"{SVG}g")}
    assert {"motion-points", "motion-residual", "alignment", "markers", "legend"} <= groups
    motion_groups = [g for g in root.iter(f"{SVG}g") if g.get("class") == "motion-points"]
    assert len(motion_groups) == 6 and all(len(list(g)) >= 8 for g in motion_groups)
    assert len([p for p in root.iter(f"{SVG}polyline") if p.get("class") == "fit"]) == 6
    assert any(p.get("class") == "recording" for p in root.iter(f"{SVG}polyline"))


def test_tip_accuracy_from_motion_alone(calibrated, motion, tmp_path):
    out, _ = calibrated
    grasp = motion["grasp"]
    processed = tmp_path / "grasp_processed.h5"
    r = tapcurve("process", grasp["rec"], "--calibration", out, "--out", processed, "--quiet")
    assert r.returncode == 0, r.stderr
    with h5py.File(grasp["rec"], "r") as f:
        seq = f["raw/seq"][:]
    with h5py.File(grasp["truth"], "r") as t:
        tseq = t["seq"][:]
        sel = np.flatnonzero(t["boot"][:] == 1)
        idx = sel[np.searchsorted(tseq[sel], seq)]
        tip_true = t["tip_xy_m"][:][idx]
    with h5py.File(processed, "r") as f:
        end = int(f["derived"].attrs["tap_index"][-1])
        length = float(f["derived/s_m"][end])
        tip = f["derived/xy"][:, end, :].astype(float)
    err = 100.0 * np.hypot(*(tip - tip_true).T) / length
    print(f"\ncalibrated from one 40 s filmed session alone, grasp motion: tip error mean {err.mean():.2f} %, "
          f"max {err.max():.2f} % of the length (target mean <= 1.0 %)")
    assert err.mean() <= TIP_LIMIT_PERCENT


#: the issue's target for a static law from one 40 s free-motion session on the ideal strip (the strip without
#: memory). Measured with the virtual finger: 0.6 .. 0.8 % over seeds 3, 7, 11, of which about 0.6 % is the
#: causal filters' delay and noise (the strip's exact law applied to the same filtered grasp gives 0.61 %)
TIP_LIMIT_PERCENT = 1.0
