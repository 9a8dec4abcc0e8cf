"""Serial ports: which there are, which answer as a tapcurve board, and why one cannot be opened.

:func:`list_ports` lists the system's serial ports (pyserial's
``serial.tools.list_ports.comports``); with ``probe`` it asks each free one
for a hello (``HELLO?``, wire protocol v1) and reports what answered.
:func:`probe_port` does that for one port, a pyserial URL included.
:func:`describe_port_error` turns an exception from opening a port into one
line naming the port and the likely cause.

A port is left alone when another program holds it: either a UUCP-style lock
file ``LCK..<name>`` exists in ``/var/lock`` or ``/run/lock`` (common practice
of serial programs on Linux, no source), or an exclusive open fails (pyserial's
``exclusive=True`` takes a ``flock`` on POSIX).

Threads: every function blocks its caller (at most ``timeout_s`` per probed
port) and shares nothing; run them from any one thread.
"""
from __future__ import annotations

import errno
import socket
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence
from urllib.parse import urlsplit

import serial
import serial.tools.list_ports

import firmware_protocol as fp

__all__ = [
    "PortInfo",
    "LOCK_DIRS",
    "BAUD_RATE",
    "list_ports",
    "probe_port",
    "lock_file",
    "describe_port_error",
]

#: where serial programs leave ``LCK..<name>`` lock files (Filesystem Hierarchy Standard 3.0, /var/lock)
LOCK_DIRS = (Path("/var/lock"), Path("/run/lock"))
#: ignored by USB CDC boards, which run at USB speed; what the reader uses
BAUD_RATE = 921600


@dataclass
class PortInfo:
    """One serial port and, when probed, what it said.

    Attributes
    ----------
    device : str
        Path (``/dev/ttyACM0``) or pyserial URL.
    description, hwid : str
        From the operating system (``n/a`` where it knows nothing).
    status : str
        ``not probed``, ``tapcurve board`` (a hello came back), ``no answer``,
        ``in use`` (lock file or exclusive open refused), or ``error``.
    detail : str
        One line: the board's firmware and channels, or why it was skipped.
    hello : dict or None
        The hello's JSON object when one came back.
    """

    device: str
    description: str = "n/a"
    hwid: str = "n/a"
    status: str = "not probed"
    detail: str = ""
    hello: dict | None = field(default=None)


def lock_file(device: str) -> Path | None:
    """An existing ``LCK..<name>`` lock file for ``device`` in :data:`LOCK_DIRS`, or None."""
    name = Path(device).name
    for folder in LOCK_DIRS:
        p = folder / f"LCK..{name}"
        if p.exists():
            return p
    return None


def list_ports(*, probe: bool = False, timeout_s: float = 1.0, include: Sequence[str] = ()) -> list[PortInfo]:
    """The system's serial ports, sorted by device, optionally probed.

    Parameters
    ----------
    probe : bool
        Open each port no other program holds, send ``HELLO?`` and wait up to
        ``timeout_s`` for a hello (:func:`probe_port`). Off by default: the
        bytes reach whatever is attached.
    timeout_s : float
        Per probed port, s.
    include : sequence of str
        Further ports to list (pseudo-terminals, symlinks, URLs), which the
        system's list does not hold.

    Returns
    -------
    list of PortInfo
    """
    rows = {
        p.device: PortInfo(device=p.device, description=p.description or "n/a", hwid=p.hwid or "n/a")
        for p in serial.tools.list_ports.comports()
    }
    for device in include:
        rows.setdefault(str(device), PortInfo(device=str(device)))
    out = sorted(rows.values(), key=lambda r: r.device)
    if probe:
        for row in out:
            found = probe_port(row.device, timeout_s=timeout_s)
            row.status, row.detail, row.hello = found.status, found.detail, found.hello
    return out


def _open(device: str, timeout_s: float) -> serial.SerialBase:
    if "://" in device:
        return serial.serial_for_url(device, baudrate=BAUD_RATE, timeout=min(timeout_s, 0.05))
    return serial.Serial(device, baudrate=BAUD_RATE, timeout=min(timeout_s, 0.05), exclusive=True)


def _await_hello(port: serial.SerialBase, timeout_s: float) -> dict | None:
    decoder = fp.StreamDecoder()
    port.write(fp.cmd_hello())
    port.flush()
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        for item in decoder.feed(port.read(4096)):
            if isinstance(item, fp.Hello):
                return dict(item.info)
    return None


def probe_port(device: str, *, timeout_s: float = 1.0) -> PortInfo:
    """Ask one port for a hello; never raises for what the port does.

    Skips (status ``in use``) a port with a lock file or that another program
    holds; otherwise opens it, sends ``HELLO?`` and waits up to ``timeout_s``.
    """
    row = PortInfo(device=device)
    lock = None if "://" in device else lock_file(device)
    if lock is not None:
        row.status, row.detail = "in use", f"lock file {lock} exists; left alone"
        return row
    try:
        port = _open(device, timeout_s)
    except (serial.SerialException, OSError, ValueError) as exc:
        line = describe_port_error(device, exc)
        row.status = "in use" if "busy" in line else "error"
        row.detail = line
        return row
    try:
        hello = _await_hello(port, timeout_s)
    except (serial.SerialException, OSError) as exc:
        row.status, row.detail = "error", describe_port_error(device, exc)
        return row
    finally:
        port.close()
    if hello is None:
        row.status, row.detail = "no answer", f"no hello within {timeout_s:g} s (not a tapcurve board, or busy booting)"
    else:
        row.status, row.hello = "tapcurve board", hello
        row.detail = (f"{hello.get('firmware', '?')}, protocol {hello.get('protocol', '?')}, "
                      f"{hello.get('channels', '?')} channels at {hello.get('rate_hz', '?')} Hz")
    return row


def _errno_of(exc: BaseException) -> int | None:
    """The errno of ``exc`` or of the OS error it was raised from (pyserial wraps them)."""
    seen = 0
    while exc is not None and seen < 8:
        if isinstance(getattr(exc, "errno", None), int):
            return exc.errno
        if isinstance(exc, socket.gaierror):
            return None
        exc = exc.__cause__ or exc.__context__
        seen += 1
    return None


def _url_cause(port: str, exc: BaseException) -> str:
    parts = urlsplit(port)
    where = parts.netloc or port
    err = _errno_of(exc)
    text = str(exc)
    if err == errno.ECONNREFUSED or "refused" in text:
        return f"nothing listens at {where} (connection refused; is the serial bridge running?)"
    if err in (errno.EHOSTUNREACH, errno.ENETUNREACH) or "unreachable" in text:
        return f"host {parts.hostname} unreachable (network down or wrong address?)"
    if err == errno.ETIMEDOUT or "timed out" in text:
        return f"no reply from {where} (timed out; host off, or a firewall drops it?)"
    if "Name or service not known" in text or "nodename nor servname" in text or "getaddrinfo" in text:
        return f"unknown host {parts.hostname!r}"
    if "expected" in text or "invalid" in text.lower() or "not supported" in text.lower():
        return f"not a valid port URL ({text.splitlines()[0] if text else type(exc).__name__})"
    return f"cannot connect to {where} ({text.splitlines()[0] if text else type(exc).__name__})"


def _local_cause(exc: BaseException) -> str:
    err = _errno_of(exc)
    text = str(exc)
    if err == errno.ENOENT or "No such file" in text:
        return "not found: no such device (unplugged, or another name? see `tapcurve ports`)"
    if err in (errno.EACCES, errno.EPERM) or "Permission denied" in text:
        return "permission denied (on Linux add your user to the dialout group, then log in again)"
    if err in (errno.EBUSY, errno.EAGAIN) or "exclusively lock" in text or "busy" in text.lower():
        return "busy (another program has it open: a serial monitor, another tapcurve?)"
    if err in (errno.ENOTTY, errno.EINVAL) or "Inappropriate ioctl" in text:
        return "not a serial port"
    if err in (errno.EIO, errno.ENXIO, errno.ENODEV):
        return "input/output error (the device went away: unplugged or reset?)"
    return f"cannot open ({text.splitlines()[0] if text else type(exc).__name__})"


def describe_port_error(port: str, exc: BaseException) -> str:
    """One line naming ``port`` and the likely cause of ``exc`` (raised while opening or using it).

    Local ports: no such device, permission (dialout group), busy, not a
    serial port, device gone. URLs (``socket://``, ``rfc2217://``): nothing
    listening, host unreachable, timed out, unknown host, bad URL.
    """
    cause = _url_cause(port, exc) if "://" in port else _local_cause(exc)
    return f"port {port}: {cause}".replace("\n", " ")
