"""The first minutes of a fresh clone: ``tapcurve live`` with no options, with or without a usable screen.

Sources: X display names, the local socket /tmp/.X11-unix/X<n> (and Linux's
abstract socket of that name) are from X(7) (X.Org manual, "DISPLAY NAMES");
library-to-package names follow Debian Policy 8.1 ("Run-time shared
libraries"), as :func:`display.screen.debian_package` implements.
"""
from __future__ import annotations

import os
import socket
import subprocess
import sys
from pathlib import Path

import pytest

from acquire.commands.cli import build_parser
from acquire.virtual.builtin import BUILTIN_SOURCE
from display import screen
from display.app import live_session
from display.window import SensorWindow

REPO = Path(__file__).resolve().parents[2]


def _free_display_number(start: int = 87) -> int:
    """A display number no X server listens on here (neither its socket file nor its abstract socket)."""
    for n in list(range(start, 999)):
        if os.path.exists(f"/tmp/.X11-unix/X{n}"):
            continue
        s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        try:
            s.connect(f"\0/tmp/.X11-unix/X{n}")
        except OSError:
            return n
        finally:
            s.close()
    pytest.skip(f"every display number {start}..998 is taken")


def _live_on(display: str, *, duration_s: str) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k not in ("QT_QPA_PLATFORM", "WAYLAND_DISPLAY")}
    env["DISPLAY"] = display
    return subprocess.run([sys.executable, "-m", "display.cli", "live", "--duration", duration_s],
                          capture_output=True, text=True, timeout=120, cwd=REPO, env=env)


def _why_line(res: subprocess.CompletedProcess) -> str:
    """The one line saying why there is no window; the rest is the headless run's own output."""
    assert res.returncode == 0, res.stderr[-2000:]
    assert "Traceback" not in res.stderr and "Qt:" not in res.stderr, res.stderr[-2000:]
    why = [ln for ln in res.stderr.splitlines() if "running headless" in ln]
    assert len(why) == 1, res.stderr
    # it ran headless: the reading line and at least one status line follow
    assert "reading built-in virtual finger" in res.stderr
    assert "frames/s" in res.stderr
    return why[0]


def test_live_with_a_display_that_does_not_exist_says_why_and_runs_headless():
    n = _free_display_number()
    line = _why_line(_live_on(f":{n}", duration_s="3"))
    assert line == (f"tapcurve: display :{n} unreachable (no X server answers at /tmp/.X11-unix/X{n}): "
                    "running headless (acquisition, a status line every second; Ctrl-C stops)")


def test_live_on_a_display_whose_xcb_libraries_are_missing_names_the_packages():
    plugin = screen.xcb_plugin_path()
    missing = None if plugin is None else screen.missing_libraries(plugin)
    if not missing:
        pytest.skip("Qt's xcb plugin finds all its libraries here (or there is no plugin or ldd): the "
                    "missing-library message is checked with a stand-in list in test_screen.py")
    # a listening socket stands in for the X server: the probe only checks that one answers
    n = _free_display_number(start=150)
    server = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    server.bind(f"\0/tmp/.X11-unix/X{n}")  # the abstract name an X server also listens on (Linux)
    server.listen(4)
    try:
        line = _why_line(_live_on(f":{n}", duration_s="2"))
    finally:
        server.close()
    packages = []
    for soname in missing:
        pkg = screen.debian_package(soname)
        if pkg not in packages:
            packages.append(pkg)
    assert line.startswith(f"tapcurve: Qt's xcb plugin lacks {', '.join(missing)} ")
    assert f"(Debian/Ubuntu: sudo apt install {' '.join(packages)})" in line


def test_live_with_no_options_shows_the_calibrated_finger(gui, qtbot, artifacts):
    """What `tapcurve live` builds with no options: the built-in virtual finger, calibrated, drawn at once."""
    args = build_parser().parse_args(["live"])
    session = live_session(args)
    with session:
        w = SensorWindow(source=session)
        qtbot.addWidget(w)
        w.resize(1366, 768)
        w.show()

        def drawn() -> bool:
            x, _ = w.shape.sensor_curve.getData()
            return x is not None and len(x) > 1

        qtbot.waitUntil(drawn, timeout=15000)
        qtbot.waitUntil(lambda: BUILTIN_SOURCE in w.status_text(), timeout=5000)
        w.update_status()
        qtbot.wait(100)
        w.grab().save(str(artifacts / "live_no_options.png"))
        x, y = w.shape.sensor_curve.getData()
        status = w.status_label.text()
        message = w.shape.message
    assert "built-in virtual finger" in session.source_name
    assert f"calibration: {BUILTIN_SOURCE}" in status  # the status says which calibration is in force
    assert "No calibration" not in message
    # the sensor curve starts at the base, (0, 0), heading along +x (README: sign convention)
    assert abs(x[0]) < 1e-9 and abs(y[0]) < 1e-9 and x[1] > 0
