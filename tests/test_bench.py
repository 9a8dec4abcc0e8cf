"""The benchmarks in bench/ run (short --quick runs); their figures are checked by hand, not here.

Where a script has an option for a shorter run than its ``--quick`` (fewer runs, fewer seconds), the
smoke test uses it too (SMOKE_ARGS): it only shows that each benchmark runs through and prints its figures.
"""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parents[1] / "bench"
SCRIPTS = sorted(p.name for p in BENCH.glob("bench_*.py"))
#: shorter than --quick, through each script's own options (every phase still runs)
SMOKE_ARGS = {
    "bench_force.py": ["--session-s", "0.3"],
    "bench_live.py": ["--seconds", "0.5", "--load-seconds", "1"],
    "bench_memory.py": ["--session-s", "0.3"],
    "bench_recorder_memory.py": ["--seconds", "3"],
    "bench_replay.py": ["--minutes", "1"],
    "bench_session.py": ["--seconds", "1"],
    "bench_size.py": ["--seconds", "1.5"],
    "bench_startup.py": ["--runs", "1"],
}


def test_bench_folder_not_empty():
    assert "bench_decode.py" in SCRIPTS and "bench_record.py" in SCRIPTS
    assert set(SMOKE_ARGS) <= set(SCRIPTS)  # no option meant for a script that is gone


@pytest.mark.parametrize("script", SCRIPTS)
def test_bench_runs_quick(script, tmp_path):
    res = subprocess.run(
        [sys.executable, str(BENCH / script), "--quick", *SMOKE_ARGS.get(script, [])],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=tmp_path,
        env={**__import__("os").environ, "QT_QPA_PLATFORM": "offscreen"},
    )
    assert res.returncode == 0, res.stderr[-2000:]
    assert "{" in res.stdout  # each prints its figures as JSON
