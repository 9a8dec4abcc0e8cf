"""Can a window be shown here? Decided before Qt starts, so a missing screen is one line, not a crash.

Qt aborts the whole process (not an exception) when its platform plugin
cannot start: no display, an X server that is gone, or the xcb plugin missing
system libraries. :func:`probe_display` checks those first, from the
environment, a socket connection and ``ldd``; it never imports Qt.

Rules, in order:

1. ``QT_QPA_PLATFORM`` = ``offscreen`` or ``minimal``: usable (nothing is shown);
   another platform than ``xcb`` or ``wayland`` is taken as the user's choice;
   macOS and Windows always have their desktop.
2. Neither ``DISPLAY`` nor ``WAYLAND_DISPLAY``: not usable.
3. ``DISPLAY`` set: its X server must accept a connection: the local socket
   ``/tmp/.X11-unix/X<n>`` (``:n``, ``unix:n``; also Linux's abstract socket
   of that name), or TCP port 6000 + n (``host:n``) (X Window System
   protocol, X.Org, "Connection Setup"; display names as in X(7)).
4. The xcb platform plugin of the installed PyQt5 must find its system
   libraries (``ldd``); a missing one is named with the Debian/Ubuntu package
   that ships it.
5. Only ``WAYLAND_DISPLAY``: usable if PyQt5 has a Wayland plugin.

Threads: any; blocks up to ``timeout_s`` plus one ``ldd`` run.
"""
from __future__ import annotations

import importlib.util
import os
import re
import shutil
import socket
import subprocess
import sys
from pathlib import Path
from typing import Mapping

__all__ = [
    "probe_display",
    "display_address",
    "x_server_reachable",
    "xcb_plugin_path",
    "missing_libraries",
    "parse_ldd_missing",
    "debian_package",
]

_OFFSCREEN = ("offscreen", "minimal")
_DISPLAY = re.compile(r"^(?P<host>[^:]*):(?P<n>\d+)(?:\.\d+)?$")
#: Debian/Ubuntu packages whose names do not follow the policy rule in debian_package (from memory)
_PACKAGE_EXCEPTIONS = {
    "libglib-2.0.so.0": "libglib2.0-0",
    "libgthread-2.0.so.0": "libglib2.0-0",
    "libgobject-2.0.so.0": "libglib2.0-0",
    "libGLX.so.0": "libglx0",
    "libOpenGL.so.0": "libopengl0",
    "libstdc++.so.6": "libstdc++6",
}


def debian_package(soname: str) -> str:
    """Debian/Ubuntu package that ships a shared library, from its soname.

    Debian Policy 8.1 ("Run-time shared libraries"): the package is the
    soname's library name, lower-cased, without ``.so``, followed by its
    version, with a hyphen between them when the name ends in a digit
    (``libxcb-icccm.so.4`` -> ``libxcb-icccm4``, ``libxkbcommon-x11.so.0`` ->
    ``libxkbcommon-x11-0``). A few libraries packaged otherwise are listed.
    """
    if soname in _PACKAGE_EXCEPTIONS:
        return _PACKAGE_EXCEPTIONS[soname]
    m = re.match(r"^(?P<name>.+)\.so\.(?P<ver>\d+)(?:\.\d+)*$", soname)
    if not m:
        return soname
    name = m.group("name").lower()
    return f"{name}{'-' if name[-1].isdigit() else ''}{m.group('ver')}"


def parse_ldd_missing(text: str) -> list[str]:
    """Sonames ``ldd`` reports as ``not found``, in order, each once."""
    out: list[str] = []
    for line in text.splitlines():
        m = re.match(r"^\s*(\S+)\s+=>\s+not found", line)
        if m and m.group(1) not in out:
            out.append(m.group(1))
    return out


def _pyqt5_plugins() -> list[Path]:
    spec = importlib.util.find_spec("PyQt5")  # finds the package without importing Qt
    if spec is None or not spec.submodule_search_locations:
        return []
    root = Path(next(iter(spec.submodule_search_locations)))
    return [root / "Qt5" / "plugins" / "platforms", root / "Qt" / "plugins" / "platforms"]


def xcb_plugin_path() -> Path | None:
    """PyQt5's xcb platform plugin ``libqxcb.so``, or None if not found."""
    for folder in _pyqt5_plugins():
        if (folder / "libqxcb.so").is_file():
            return folder / "libqxcb.so"
    return None


def missing_libraries(plugin: Path, *, timeout_s: float = 10.0) -> list[str] | None:
    """Sonames ``plugin`` needs that the dynamic linker cannot find; None when ``ldd`` cannot tell."""
    ldd = shutil.which("ldd")
    if ldd is None:
        return None
    try:
        run = subprocess.run([ldd, str(plugin)], capture_output=True, text=True, timeout=timeout_s, check=False)
    except (OSError, subprocess.SubprocessError):
        return None
    return parse_ldd_missing(run.stdout + "\n" + run.stderr)


def display_address(display: str) -> tuple[int, object] | None:
    """Socket family and address of an X display name, or None if the name cannot be read."""
    if display.startswith("/"):  # a socket path (XQuartz on macOS): "/path/to/socket:0"
        return socket.AF_UNIX, display.rsplit(":", 1)[0] if ":" in display else display
    m = _DISPLAY.match(display)
    if not m:
        return None
    host, n = m.group("host"), int(m.group("n"))
    if host in ("", "unix"):
        return socket.AF_UNIX, f"/tmp/.X11-unix/X{n}"
    return socket.AF_INET, (host.strip("[]"), 6000 + n)


def _connects(family: int, address, timeout_s: float) -> bool:
    if family == socket.AF_INET:
        try:
            socket.create_connection(address, timeout=timeout_s).close()
            return True
        except OSError:
            return False
    candidates = [address]
    if os.uname().sysname == "Linux":
        candidates.append("\0" + address)  # the abstract socket many X servers also listen on
    for addr in candidates:
        s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        s.settimeout(timeout_s)
        try:
            s.connect(addr)
            return True
        except OSError:
            continue
        finally:
            s.close()
    return False


def x_server_reachable(display: str, *, timeout_s: float = 0.5) -> tuple[bool, str]:
    """Whether an X server accepts connections for ``display``, with where it was looked for."""
    address = display_address(display)
    if address is None:
        return False, f"display {display} unreachable (cannot read the name; expected e.g. :0 or host:0)"
    family, where = address
    shown = where if family == socket.AF_UNIX else f"{where[0]} port {where[1]}"
    if _connects(family, where, timeout_s):
        return True, f"display {display}"
    return False, f"display {display} unreachable (no X server answers at {shown})"


def _check_xcb() -> tuple[bool, str] | None:
    plugin = xcb_plugin_path()
    missing = None if plugin is None else missing_libraries(plugin)
    if not missing:
        return None
    packages = []
    for soname in missing:
        pkg = debian_package(soname)
        if pkg not in packages:
            packages.append(pkg)
    return False, (f"Qt's xcb plugin lacks {', '.join(missing)} "
                   f"(Debian/Ubuntu: sudo apt install {' '.join(packages)})")


def _wayland_only(env: Mapping[str, str]) -> tuple[bool, str]:
    name = env["WAYLAND_DISPLAY"]
    if any((folder / "libqwayland-generic.so").is_file() for folder in _pyqt5_plugins()):
        return True, f"wayland display {name}"
    return False, f"no X display (DISPLAY is not set; WAYLAND_DISPLAY={name}, but this Qt has no Wayland plugin)"


def probe_display(*, environ: Mapping[str, str] | None = None, timeout_s: float = 0.5) -> tuple[bool, str]:
    """Whether a Qt window can be shown, and why (one line); never imports Qt.

    Parameters
    ----------
    environ : mapping, optional
        Environment to judge (default ``os.environ``).
    timeout_s : float
        For connecting to the X server, s.

    Returns
    -------
    (usable, reason)
        ``reason`` is e.g. ``offscreen (QT_QPA_PLATFORM=offscreen)``,
        ``display :0``, ``no display (DISPLAY is not set)``,
        ``display :99 unreachable (...)`` or the missing xcb libraries with
        the packages to install.
    """
    env = os.environ if environ is None else environ
    platform = env.get("QT_QPA_PLATFORM", "").split(":")[0].strip().lower()
    if platform in _OFFSCREEN:
        return True, f"offscreen (QT_QPA_PLATFORM={platform})"
    if platform and platform not in ("xcb", "wayland", "wayland-egl"):
        return True, f"QT_QPA_PLATFORM={platform} (not checked)"  # eglfs, linuxfb, vnc: the user's choice
    if sys.platform == "darwin" or sys.platform.startswith("win"):
        return True, f"{sys.platform} desktop"
    display = env.get("DISPLAY", "").strip()
    if platform.startswith("wayland") and env.get("WAYLAND_DISPLAY", "").strip():
        return _wayland_only(env)
    if not display:
        if env.get("WAYLAND_DISPLAY", "").strip():
            return _wayland_only(env)
        return False, "no display (DISPLAY is not set)"
    ok, reason = x_server_reachable(display, timeout_s=timeout_s)
    if not ok:
        return False, reason
    return _check_xcb() or (True, reason)
