"""Display check before Qt starts: offscreen, no display, a dead X display, missing xcb libraries.

Sources: X display names and the local socket /tmp/.X11-unix/X<n> and TCP port
6000 + n are from X(7) (X.Org manual, "DISPLAY NAMES"); package naming is Debian
Policy 8.1 ("Run-time shared libraries"); the package names in the table are
the Debian/Ubuntu names of those libraries (from memory; `apt-file search`
confirms them on a Debian machine).
"""
from __future__ import annotations

import os
import socket
import subprocess
import sys
from pathlib import Path

import pytest

from display import screen
from display.screen import debian_package, parse_ldd_missing, probe_display

REPO = Path(__file__).resolve().parents[2]


def _free_display_number() -> int:
    for n in range(91, 999):
        if not os.path.exists(f"/tmp/.X11-unix/X{n}"):
            s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            try:
                s.connect(f"\0/tmp/.X11-unix/X{n}")
            except OSError:
                return n
            finally:
                s.close()
    pytest.skip("every display number 91..998 is taken")


def test_offscreen_is_usable():
    assert probe_display(environ={"QT_QPA_PLATFORM": "offscreen"}) == (True, "offscreen (QT_QPA_PLATFORM=offscreen)")
    assert probe_display(environ={"QT_QPA_PLATFORM": "minimal", "DISPLAY": ":12345"})[0]


def test_no_display():
    assert probe_display(environ={}) == (False, "no display (DISPLAY is not set)")
    assert probe_display(environ={"DISPLAY": "  "}) == (False, "no display (DISPLAY is not set)")


def test_local_display_that_does_not_exist():
    n = _free_display_number()
    usable, reason = probe_display(environ={"DISPLAY": f":{n}"})
    assert not usable
    assert reason == f"display :{n} unreachable (no X server answers at /tmp/.X11-unix/X{n})"


def test_tcp_display_that_does_not_exist():
    # host:n is TCP port 6000 + n; find an n whose port nothing listens on
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    if port < 6000:
        pytest.skip("the free port the system gave is below 6000")
    usable, reason = probe_display(environ={"DISPLAY": f"127.0.0.1:{port - 6000}.0"})
    assert not usable and reason.startswith(f"display 127.0.0.1:{port - 6000}.0 unreachable")
    assert f"127.0.0.1 port {port}" in reason


def test_listening_x_socket_passes_then_xcb_libraries_are_checked(tmp_path, monkeypatch):
    # a listening socket stands in for the X server (only the connection is checked)
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(1)
    port = server.getsockname()[1]
    if port < 6000:
        server.close()
        pytest.skip("the free port the system gave is below 6000")
    try:
        monkeypatch.setattr(screen, "xcb_plugin_path", lambda: tmp_path / "libqxcb.so")
        monkeypatch.setattr(screen, "missing_libraries", lambda plugin: [])
        assert probe_display(environ={"DISPLAY": f"127.0.0.1:{port - 6000}"}) == (True, f"display 127.0.0.1:{port - 6000}")
        monkeypatch.setattr(screen, "missing_libraries",
                            lambda plugin: ["libxcb-icccm.so.4", "libxkbcommon-x11.so.0", "libxcb-xinerama.so.0"])
        usable, reason = probe_display(environ={"DISPLAY": f"127.0.0.1:{port - 6000}"})
        assert not usable
        assert reason == ("Qt's xcb plugin lacks libxcb-icccm.so.4, libxkbcommon-x11.so.0, libxcb-xinerama.so.0 "
                          "(Debian/Ubuntu: sudo apt install libxcb-icccm4 libxkbcommon-x11-0 libxcb-xinerama0)")
    finally:
        server.close()


LDD_OUTPUT = """\
\tlinux-vdso.so.1 (0x00007ffd4b7f5000)
\tlibQt5XcbQpa.so.5 => /venv/PyQt5/Qt5/plugins/platforms/../../lib/libQt5XcbQpa.so.5 (0x00007f2c8e000000)
\tlibxcb-icccm.so.4 => not found
\tlibxcb-keysyms.so.1 => not found
\tlibxcb-xinerama.so.0 => not found
\tlibxkbcommon-x11.so.0 => not found
\tlibxcb-icccm.so.4 => not found
\tlibc.so.6 => /lib/x86_64-linux-gnu/libc.so.6 (0x00007f2c8dc00000)
"""


def test_parse_ldd_output():
    assert parse_ldd_missing(LDD_OUTPUT) == [
        "libxcb-icccm.so.4", "libxcb-keysyms.so.1", "libxcb-xinerama.so.0", "libxkbcommon-x11.so.0"]
    assert parse_ldd_missing("\tlibc.so.6 => /lib/libc.so.6 (0x1)\n") == []


@pytest.mark.parametrize(
    "soname, package",
    [
        ("libxcb-icccm.so.4", "libxcb-icccm4"),
        ("libxcb-keysyms.so.1", "libxcb-keysyms1"),
        ("libxcb-xinerama.so.0", "libxcb-xinerama0"),
        ("libxcb-image.so.0", "libxcb-image0"),
        ("libxcb-render-util.so.0", "libxcb-render-util0"),
        ("libxcb-randr.so.0", "libxcb-randr0"),
        ("libxcb-xkb.so.1", "libxcb-xkb1"),
        ("libxkbcommon-x11.so.0", "libxkbcommon-x11-0"),
        ("libxkbcommon.so.0", "libxkbcommon0"),
        ("libX11-xcb.so.1", "libx11-xcb1"),
        ("libX11.so.6", "libx11-6"),
        ("libdbus-1.so.3", "libdbus-1-3"),
        ("libfontconfig.so.1", "libfontconfig1"),
        ("libGL.so.1", "libgl1"),
        ("libEGL.so.1", "libegl1"),
        ("libglib-2.0.so.0", "libglib2.0-0"),
    ],
)
def test_soname_to_debian_package(soname, package):
    assert debian_package(soname) == package


def test_no_qt_import():
    # probing must work where importing Qt would abort the process
    code = ("import sys, display.screen as s; print(s.probe_display(environ={'DISPLAY': ':0'}) is not None); "
            "print(sorted(m for m in sys.modules if m.startswith(('PyQt5', 'pyqtgraph'))))")
    run = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, timeout=60)
    assert run.returncode == 0, run.stderr
    assert run.stdout.splitlines() == ["True", "[]"]


def test_real_plugin_check_runs():
    # on this machine: either no PyQt5 xcb plugin / no ldd (None or skipped) or a list of sonames
    plugin = screen.xcb_plugin_path()
    if plugin is None:
        pytest.skip("PyQt5's xcb plugin is not installed here")
    missing = screen.missing_libraries(plugin)
    assert missing is None or all(".so" in m for m in missing)
