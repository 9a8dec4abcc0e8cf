"""One label grammar on the command line: every command that takes a label accepts and refuses the same texts.

The grammar is the README's (Calibration: labels that state their shape
reference, ``flat``, ``radius=25mm``, ``curvature=40/m``, negative values for
the opposite bend; Force from shape: ``force=0N``, ``force=0.2N``,
``force=350mN`` for force holds; Recording layout: label text is UTF-8 of 128
bytes). The table below is written by hand from it, not computed with
``acquire.core.labels``; the curvatures are plane geometry (curvature =
1 / radius), the forces SI prefixes (1 mN = 1e-3 N).

Commands, each run as ``python -m display.cli`` in a subprocess:

- ``record --label L`` (the virtual finger on a pty as the device);
- ``live --headless --record F --label L`` (the built-in virtual finger);
- ``live --hold L`` (the built-in virtual finger pressed onto a jig, or pushed
  at its end with a known force): a hold must state a reference (a shape or a
  force), and be a label a recording can hold;
- ``calibrate`` of the recordings made on the jig holds: each shape label a
  hold accepted is read back as that hold's reference, with the stated
  curvature.

A refusal is exit 2 with one line on stderr naming the label (no file left);
an acceptance is exit 0 and the label stored as given. The runs are started
in parallel to keep the wall time modest.
"""
from __future__ import annotations

import json
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import h5py
import pytest

from acquire.virtual import VirtualFinger

REPO = Path(__file__).resolve().parents[3]
RIG = REPO / "acquire" / "rigs" / "demo_finger.toml"
LONG = "radius=" + "0" * 189 + "25mm"  # states 40 1/m, but 200 bytes: no recording can hold it
assert len(LONG.encode()) == 200

# text, id, a recording may carry it (record/live --label), the reference it states: a curvature (1/m),
# ("force", N) or None
ROWS = [
    ("radius=2.5cm", "radius-cm", True, 40.0),
    ("FLAT", "FLAT", True, 0.0),
    ("Radius = 25mm", "spaced-radius", True, 40.0),
    ("curvature=40 1/m", "curvature-per-m", True, 40.0),
    ("curvature=-40/m", "negative-curvature", True, -40.0),
    ("force=350mN", "force", True, ("force", 0.35)),
    ("grasp (demo)", "free-text", True, None),
    ("radius=", "radius-empty", False, None),
    ("curvature=abc", "curvature-abc", False, None),
    ("force=heavy", "force-heavy", False, None),
    ("flat\nradius=25mm", "newline", False, None),
    (LONG, "200-bytes", False, None),
]
IDS = [r[1] for r in ROWS]


def _holds(recordable: bool, reference) -> bool:
    """A hold: a label a recording can hold that states a reference (a shape or a force)."""
    return recordable and reference is not None


def _jig(reference) -> bool:
    return isinstance(reference, float)


def _run(argv: list[str]) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "display.cli", *argv], capture_output=True, text=True,
                          timeout=120, cwd=REPO)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Every command on every label, run in parallel; results keyed by (command, row id)."""
    d = tmp_path_factory.mktemp("labels")
    jobs: dict[tuple[str, str], list[str]] = {}
    files: dict[tuple[str, str], Path] = {}
    fingers = []
    try:
        for text, rid, recordable, reference in ROWS:
            if recordable:
                # its own device, so the runs can overlap (a port is opened by one program at a time)
                vf = VirtualFinger(rate_hz=500, link_path=d / f"finger-{rid}")
                vf.start()
                assert vf.wait_ready(timeout_s=30)
                fingers.append(vf)
                port = vf.path
            else:
                port = str(d / "no-such-port")  # the label must be refused before the port is looked at
            files["record", rid] = d / f"record-{rid}.h5"
            jobs["record", rid] = ["record", "--port", port, "--rig", str(RIG), "--out", str(files["record", rid]),
                                   "--label", text, "--duration", "0.2", "--quiet"]
            files["live", rid] = d / f"live-{rid}.h5"
            live = ["live", "--headless", "--duration", "0.6", "--record", str(files["live", rid]), "--label", text]
            if _holds(recordable, reference):
                jobs["live+hold", rid] = live + ["--hold", text]  # one run checks --label and --hold
            else:
                jobs["live", rid] = live
                jobs["hold", rid] = ["live", "--hold", text, "--headless", "--duration", "0.3"]
        with ThreadPoolExecutor(max_workers=4) as pool:
            futures = {key: pool.submit(_run, argv) for key, argv in jobs.items()}
            results = {key: f.result() for key, f in futures.items()}
    finally:
        for vf in fingers:
            vf.stop()
    for (cmd, rid), r in list(results.items()):
        if cmd == "live+hold":
            results["live", rid] = results["hold", rid] = r
    return {"results": results, "files": files, "dir": d}


def _accepted(r: subprocess.CompletedProcess) -> bool:
    return r.returncode == 0


def _assert_refused_naming(r: subprocess.CompletedProcess, text: str) -> None:
    """Exit 2, one line on stderr, naming the label (its first characters, as repr), no traceback."""
    assert r.returncode == 2, (r.returncode, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr
    assert "label" in lines[0] and repr(text)[:10] in lines[0], lines[0]


def _labels_in(path: Path) -> list[str]:
    with h5py.File(path, "r") as f:
        return [x.decode() for x in f["labels/text"][:]]


@pytest.mark.parametrize("command", ["record", "live"])
@pytest.mark.parametrize("text, rid, recordable, reference", ROWS, ids=IDS)
def test_label_while_recording(runs, command, text, rid, recordable, reference):
    r = runs["results"][command, rid]
    out = runs["files"][command, rid]
    if recordable:
        assert _accepted(r), r.stderr
        assert _labels_in(out) == [text]
    else:
        _assert_refused_naming(r, text)
        assert not out.exists()


@pytest.mark.parametrize(
    "text, rid, recordable, reference",
    [pytest.param(*row, id=row[1]) for row in ROWS],
)
def test_live_hold(runs, text, rid, recordable, reference):
    r = runs["results"]["hold", rid]
    if _holds(recordable, reference):
        assert _accepted(r), r.stderr
        with h5py.File(runs["files"]["live", rid], "r") as f:
            hello = json.loads(f.attrs["device_hello"])
        assert hello["hold"].strip() == text.strip()  # the finger held what the label names
    else:
        _assert_refused_naming(r, text)
        assert "--hold" in r.stderr


def test_calibrate_reads_every_hold_label_as_its_reference(runs):
    """The recordings made on the jigs, labelled with the hold's own text: `calibrate` takes each as a jig hold
    with the curvature the table states (min and max over the holds in its fit report)."""
    held = [(rid, k) for text, rid, recordable, k in ROWS if _holds(recordable, k) and _jig(k)]
    paths = [runs["files"]["live", rid] for rid, _ in held]
    assert all(p.exists() for p in paths)
    cal = runs["dir"] / "cal.json"
    r = _run(["calibrate", *map(str, paths), "--rig", str(RIG), "--out", str(cal)])
    assert r.returncode == 0, r.stderr
    for seg in json.loads(cal.read_text())["fit_report"]["segments"]:
        assert seg["n_holds"] == len(held)
        assert seg["curvature_min_per_m"] == pytest.approx(min(k for _, k in held))
        assert seg["curvature_max_per_m"] == pytest.approx(max(k for _, k in held))
