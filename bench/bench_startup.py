"""Benchmark: how long the commands take to start, each in a fresh interpreter.

Run by hand: ``.venv/bin/python bench/bench_startup.py`` (``--quick``: fewer
runs). Each case runs ``--runs`` times (default 5) in a new Python process and
the median wall time is reported, with the imports that cost most in one
extra run under ``python -X importtime``. Cases:

- ``--help``, ``inspect recordings/demo_grasp.h5``, ``virtual-device --help``,
  ``live --help``: target at most 0.5 s (``--help`` and ``inspect``);
- ``process, first frame (proxy)``: ``import acquire.core.pipeline, h5py``, what
  ``process`` loads before it reads the first frame: target at most 0.8 s;
- ``process demo recording``: the whole ``process`` of the demo recording
  (about 30 s of frames) to a temporary file, for scale;
- ``virtual-device, port ready``: ``virtual-device`` (real strip, the default)
  until it prints its port's path, the moment a ``record --port`` could open it;
  no target of its own (it should stay near ``--help``).

The command line is ``python -m acquire.commands.cli`` unless ``--cmd`` names
another module (``--cmd display.cli``). Prints a table, then the figures as JSON.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "recordings" / "demo_grasp.h5"
DEMO_CAL = REPO / "recordings" / "demo_calibration.json"
READY_LINE = "<until the first line>"  # a case that runs until its first line of output, then is stopped
TARGETS_S = {"--help": 0.5, "inspect": 0.5, "process, first frame (proxy)": 0.8}


def _cases(cmd: str, out_dir: Path) -> dict[str, list[str]]:
    cli = ["-m", cmd]
    return {
        "--help": cli + ["--help"],
        "inspect": cli + ["inspect", str(DEMO)],
        "virtual-device --help": cli + ["virtual-device", "--help"],
        "live --help": cli + ["live", "--help"],
        "virtual-device, port ready": [READY_LINE, *cli, "virtual-device"],
        "process, first frame (proxy)": ["-c", "import acquire.core.pipeline, h5py"],
        "process demo recording": cli + ["process", str(DEMO), "--calibration", str(DEMO_CAL),
                                         "--out", str(out_dir / "processed.h5"), "--quiet"],
    }


def _env() -> dict:
    return {**os.environ, "PYTHONPATH": str(REPO), "QT_QPA_PLATFORM": "offscreen"}


def _run_until_line(args: list[str], cwd: Path) -> float:
    """Wall time from start to the command's first line on stdout; the command is then stopped (SIGTERM)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, *args], cwd=cwd, env=_env(), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        line = proc.stdout.readline()
        wall = time.perf_counter() - t0
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    if not line:
        raise SystemExit(f"{' '.join(args)} printed nothing: {proc.stderr.read()[-500:]}")
    return wall


def _run_once(args: list[str], cwd: Path) -> float:
    if args and args[0] == READY_LINE:
        return _run_until_line(args[1:], cwd)
    for f in cwd.glob("processed*.h5"):  # process never overwrites: start clean each run
        f.unlink()
    t0 = time.perf_counter()
    res = subprocess.run([sys.executable, *args], cwd=cwd, env=_env(), capture_output=True, text=True, timeout=300)
    wall = time.perf_counter() - t0
    if res.returncode != 0:
        raise SystemExit(f"{' '.join(args)} failed ({res.returncode}): {res.stderr[-500:]}")
    return wall


def _top_imports(args: list[str], cwd: Path, *, n: int = 5) -> list[tuple[str, float]]:
    """The packages that cost most to import (sum of their modules' own times, s), from ``-X importtime``."""
    if args and args[0] == READY_LINE:  # a command that runs on: its imports until it is stopped
        args = ["-c", "import acquire.commands.cli, acquire.virtual.device"]
    for f in cwd.glob("processed*.h5"):
        f.unlink()
    res = subprocess.run([sys.executable, "-X", "importtime", *args], cwd=cwd, env=_env(),
                         capture_output=True, text=True, timeout=300)
    cost: dict[str, float] = {}
    for line in res.stderr.splitlines():
        m = re.match(r"import time:\s+(\d+) \|\s+(\d+) \| *(\S+)", line)
        if m:
            name = m.group(3).split(".")[0]
            cost[name] = cost.get(name, 0.0) + int(m.group(1)) * 1e-6
    return sorted(cost.items(), key=lambda kv: -kv[1])[:n]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="two runs per case, the demo process skipped")
    ap.add_argument("--runs", type=int, default=None, help="runs per case (default 5, --quick 2)")
    ap.add_argument("--cmd", default="acquire.commands.cli", help="module of the command line")
    args = ap.parse_args(argv)
    runs = args.runs or (2 if args.quick else 5)
    results = {}
    with tempfile.TemporaryDirectory() as tmp:
        cwd = Path(tmp)
        for name, case in _cases(args.cmd, cwd).items():
            if args.quick and name == "process demo recording":
                continue
            walls = [_run_once(case, cwd) for _ in range(runs)]
            results[name] = {
                "median_s": round(statistics.median(walls), 3),
                "min_s": round(min(walls), 3),
                "target_s": TARGETS_S.get(name),
                "top_imports_s": [[k, round(v, 3)] for k, v in _top_imports(case, cwd)],
            }
    baseline = _run_once(["-c", "pass"], Path.cwd())
    print(f"{'case':32s} {'median s':>9s} {'target s':>9s}  top imports (own time per package, s)")
    for name, r in results.items():
        target = f"{r['target_s']:.1f}" if r["target_s"] else "-"
        tops = ", ".join(f"{k} {v:.2f}" for k, v in r["top_imports_s"][:4])
        print(f"{name:32s} {r['median_s']:9.3f} {target:>9s}  {tops}")
    out = {"benchmark": "start-up", "quick": args.quick, "runs": runs, "cmd": args.cmd,
           "bare_python_s": round(baseline, 3), "cases": results,
           "meets_targets": all(r["median_s"] <= r["target_s"] for r in results.values() if r["target_s"])}
    print(json.dumps(out, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
