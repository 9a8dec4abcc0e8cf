"""Shared test fixtures: the one wait helper, paths to the outside test vectors, offscreen Qt."""
from __future__ import annotations

import json
import os
import time
from pathlib import Path
from typing import Callable

import pytest

# CI has no display; Qt widgets render offscreen (set before any Qt import)
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

REPO = Path(__file__).resolve().parents[1]
SHARED = REPO.parent / "shared"


def _wait_until(cond: Callable[[], object], *, timeout_s: float, what: str, poll_s: float = 0.01):
    """Poll ``cond()`` until it is true; return its value. AssertionError naming ``what`` after ``timeout_s``.

    The condition is checked once more after the deadline has passed, so a
    slow machine that wakes late still sees a result that did arrive. Timeouts
    are limits for a hung part, not speed requirements: make them generous.
    """
    deadline = time.monotonic() + timeout_s
    while True:
        value = cond()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s:g} s waiting for {what}")
        time.sleep(poll_s)


@pytest.fixture(scope="session")
def wait_until():
    """The one wait helper: ``wait_until(cond, *, timeout_s, what, poll_s=0.01)``.

    A fixture (not an import) because pytest runs with ``--import-mode=importlib``,
    where test modules cannot import ``conftest``. Session-scoped, so module- and
    session-scoped fixtures can use it too. For Qt tests that need the event loop
    to run while waiting, use pytest-qt's ``qtbot.waitUntil`` instead.
    """
    return _wait_until


@pytest.fixture(scope="session")
def packet_vectors() -> dict:
    """Packets made outside this project (../shared/vectors/packets.json)."""
    path = SHARED / "vectors" / "packets.json"
    if not path.is_file():
        pytest.skip(f"{path} not present (a user's clone has no ../shared): external vectors skipped")
    return json.loads(path.read_text())


# --- one filmed free motion of the virtual finger, shared by the files that need it ---------------------

#: the rig's markers for filming: each tap and each segment's middle (2S + 1 = 13 markers)
FILM_MARKERS_S_MM = [0, 8, 16, 24, 32, 40, 48, 56, 64, 72, 80, 88, 96]
FILM_SEED = 7
FILM_DURATION_S = 40.0
#: the camera's clock: 5 s behind the device's and 230 ppm slow
FILM_CAMERA = {"seed": 7, "offset_s": -5.0, "rate_ppm": -230.0}


def _tapcurve(*args, timeout_s: float = 180.0):
    import subprocess
    import sys

    env = dict(os.environ, QT_QPA_PLATFORM="offscreen")
    return subprocess.run([sys.executable, "-m", "display.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout_s, cwd=REPO, env=env)


def _record_finger(folder: Path, rig_path: Path, name: str, *, scenario: str, duration_s: float, camera=None):
    """Record the virtual finger (ideal strip, seed FILM_SEED, 8x real time) through the serial path
    (``tapcurve record``), filming it with ``camera`` if given."""
    from acquire.rig import load_rig
    from acquire.virtual import StripSettings, VirtualFinger

    paths = {"rec": folder / f"{name}.h5", "truth": folder / f"{name}_truth.h5",
             "markers": folder / f"{name}.csv" if camera is not None else None}
    # the ideal strip (no memory): no creep lag between the resistance and the curvature the camera sees
    dev = VirtualFinger(rig=load_rig(rig_path), rate_hz=1000, seed=FILM_SEED, scenario=scenario, time_scale=8.0,
                        truth_path=paths["truth"], markers_path=paths["markers"], camera=camera,
                        strip=StripSettings(mode="ideal"))
    dev.start()
    try:
        r = _tapcurve("record", "--port", dev.path, "--rig", rig_path, "--out", paths["rec"],
                      "--duration", duration_s, "--quiet")
        assert r.returncode == 0, r.stderr
    finally:
        dev.stop()
    return paths


def _make_filmed_motion(d: Path) -> None:
    from concurrent.futures import ThreadPoolExecutor

    from acquire.virtual.camera import CameraSettings

    rig_path = d / "rig_middles.toml"
    rig_path.write_text((REPO / "acquire" / "rigs" / "demo_finger.toml").read_text().replace(
        "[body]", f"[markers]\ns_mm = [{', '.join(map(str, FILM_MARKERS_S_MM))}]\n\n[body]"))
    with ThreadPoolExecutor(max_workers=2) as pool:  # two fingers, two ports: the recordings run side by side
        film = pool.submit(_record_finger, d, rig_path, "free", scenario="free", duration_s=FILM_DURATION_S,
                           camera=CameraSettings(**FILM_CAMERA))
        grasp = pool.submit(_record_finger, d, rig_path, "grasp", scenario="grasp", duration_s=16)
        film.result(), grasp.result()
    r = _tapcurve("calibrate", "--rig", rig_path, "--out", d / "cal.json", "--motion", d / "free.h5", d / "free.csv")
    assert r.returncode == 0, r.stderr
    (d / "calibrate_stdout.txt").write_text(r.stdout)


@pytest.fixture(scope="session")
def filmed_motion(tmp_path_factory) -> dict:
    """One 40 s filmed free motion of the virtual finger (ideal strip, seed 7, camera clock offset -5 s and
    -230 ppm), recorded through the serial path with ``tapcurve record``; a grasp recording of the same finger
    (a different motion, not filmed); and the calibration ``tapcurve calibrate --motion`` fits to the film
    (``cal.json``, its report picture and its stdout). Each has the device's ground truth beside it.

    Built once per run: the workers of pytest-xdist share it through their common temporary folder (the first
    to need it builds it under a file lock, the others wait and reuse it). Treat the files as read-only; write
    outputs elsewhere (``tmp_path``)."""
    import fcntl

    base = tmp_path_factory.getbasetemp()
    shared = base.parent if os.environ.get("PYTEST_XDIST_WORKER") else base
    d = shared / "filmed_motion"
    with open(shared / "filmed_motion.lock", "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            if not (d / "done").exists():
                if d.exists():  # a build that failed part way: start again
                    import shutil

                    shutil.rmtree(d)
                d.mkdir()
                _make_filmed_motion(d)
                (d / "done").write_text("")
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)
    return {
        "dir": d, "rig": d / "rig_middles.toml", "seed": FILM_SEED, "duration_s": FILM_DURATION_S,
        "camera": dict(FILM_CAMERA), "cal": d / "cal.json",
        "calibrate_stdout": (d / "calibrate_stdout.txt").read_text(),
        "film": {"rec": d / "free.h5", "truth": d / "free_truth.h5", "markers": d / "free.csv"},
        "grasp": {"rec": d / "grasp.h5", "truth": d / "grasp_truth.h5", "markers": None},
    }
