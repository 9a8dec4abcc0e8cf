"""The benchmarks in bench/ run (short --quick runs); their figures are checked by hand, not here."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parents[1] / "bench"
SCRIPTS = sorted(p.name for p in BENCH.glob("bench_*.py"))


def test_bench_folder_not_empty():
    assert "bench_decode.py" in SCRIPTS and "bench_record.py" in SCRIPTS


@pytest.mark.parametrize("script", SCRIPTS)
def test_bench_runs_quick(script, tmp_path):
    res = subprocess.run(
        [sys.executable, str(BENCH / script), "--quick"],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=tmp_path,
        env={**__import__("os").environ, "QT_QPA_PLATFORM": "offscreen"},
    )
    assert res.returncode == 0, res.stderr[-2000:]
    assert "{" in res.stdout  # each prints its figures as JSON
