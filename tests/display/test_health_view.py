"""The health window on the virtual finger: each injected fault named in its row, a healthy rig called healthy."""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from acquire.session import Session
from acquire.sources.virtual import VirtualOptions
from acquire.virtual import Faults
from display.health_view import HealthWindow

REPO = Path(__file__).resolve().parents[2]
KEYWORDS = ("open tap", "short", "noise", "stuck")

# injected fault -> (row that must carry it, word it must use); the fault is the simulator's ground truth
CASES = {
    "open": (Faults(open_tap=3), "channel 3", "open tap"),
    "short": (Faults(short_taps=(1, 3)), "segment 1", "short"),
    "noisy": (Faults(noisy_channel=2), "channel 2", "noise"),
    "stuck": (Faults(stuck_channel=4), "channel 4", "stuck"),
}


def _judge(qtbot, rig, faults, *, seed=0):
    with Session(rig=rig, virtual_options=VirtualOptions(faults=faults, seed=seed)) as session:
        w = HealthWindow(session=session, window_s=1.2, refresh_s=0.25)
        qtbot.addWidget(w)
        w.show()
        qtbot.waitUntil(lambda: w.report is not None and w.report.frames >= 1150, timeout=30000)
        w.refresh()
        rows = w.row_texts()
        summary = w.summary.text()
        w.resize(1366, 768)
        shot = w.grab()
        w.close()
    return rows, summary, shot


@pytest.mark.parametrize("case", list(CASES))
def test_health_view_names_each_injected_fault(gui, qtbot, rig, artifacts, case):
    faults, where, word = CASES[case]
    rows, summary, shot = _judge(qtbot, rig, faults)
    shot.save(str(artifacts / f"health_{case}.png"))
    table = "\n".join(" | ".join(r) for r in rows)
    row = next(r for r in rows if r[0].startswith(where))
    assert row[1] == "FAULT" and word in row[2].lower(), table
    blamed = " ".join(r[2].lower() for r in rows if r[1] == "FAULT")
    for other in KEYWORDS:
        if other != word:
            assert other not in blamed, table
    assert summary.startswith("FAULT") and word in summary.lower()


def test_health_view_calls_a_healthy_rig_healthy(gui, qtbot, rig, artifacts):
    rows, summary, shot = _judge(qtbot, rig, None, seed=2)
    shot.save(str(artifacts / "health_healthy.png"))
    assert all(r[1] == "OK" for r in rows), "\n".join(" | ".join(r) for r in rows)
    assert summary.startswith("wiring healthy")
    assert rows[-1][0] == "link" and "0 lost" in rows[-1][2]


def test_health_text_mode_prints_the_table(tmp_path):
    env = dict(os.environ, PYTHONPATH=str(REPO))
    # long enough for a loaded machine to start the virtual finger and fill a 1 s window
    r = subprocess.run([sys.executable, "-m", "display.cli", "health", "--text", "--duration", "6",
                        "--window", "1", "--stuck-channel", "1"], env=env, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    tables = [t for t in r.stdout.split("\n\n") if t.strip()]
    judged = [t for t in tables if "no frames yet" not in t and "no verdicts yet" not in t]
    assert len(tables) >= 2 and judged, r.stdout[-2000:]
    assert "channel 1 (tap 1) stuck at" in judged[-1] and "overall: FAULT" in judged[-1]
    # the demo rig states its excitation voltage, so nothing is assumed
    assert "excitation 3.3 V" in judged[-1] and "not in the rig file" not in judged[-1]
