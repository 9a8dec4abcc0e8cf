"""Ports: probing finds the virtual finger, leaves silent and busy ports alone, and errors read as one line.

Real parts: the virtual finger on a real pseudo-terminal (it speaks wire protocol
v1, firmware_protocol/PROTOCOL.md), a bare pty with nobody behind it, and TCP on
127.0.0.1. Errno meanings are POSIX (IEEE Std 1003.1, <errno.h>).
"""
from __future__ import annotations

import errno
import os
import select
import socket

import pytest
import serial

from acquire.link import ports
from acquire.link.ports import PortInfo, describe_port_error, list_ports, probe_port


def test_probe_finds_the_virtual_finger(finger):
    row = probe_port(str(finger.path), timeout_s=3.0)
    assert row.status == "tapcurve board", row.detail
    assert row.hello["protocol"] == 1 and row.hello["firmware"].startswith("tapcurve-virtual")
    assert "protocol 1" in row.detail and "6 channels" in row.detail


def test_list_ports_includes_and_probes(finger):
    rows = list_ports(probe=True, timeout_s=3.0, include=[str(finger.path)])
    mine = [r for r in rows if r.device == str(finger.path)]
    assert len(mine) == 1 and mine[0].status == "tapcurve board"
    assert all(isinstance(r, PortInfo) for r in rows)
    assert [r.device for r in rows] == sorted(r.device for r in rows)


def test_silent_pty_does_not_answer():
    master, slave = os.openpty()
    try:
        row = probe_port(os.ttyname(slave), timeout_s=0.3)
        assert row.status == "no answer" and "0.3 s" in row.detail
        assert os.read(master, 100).startswith(b"HELLO?\n")  # the probe asked, as PROTOCOL.md says
    finally:
        os.close(master)
        os.close(slave)


def test_port_held_by_another_program_is_left_alone():
    master, slave = os.openpty()
    name = os.ttyname(slave)
    holder = serial.Serial(name, exclusive=True)  # flock(LOCK_EX) on POSIX, as pyserial documents
    try:
        row = probe_port(name, timeout_s=0.3)
        assert row.status == "in use" and "busy" in row.detail and name in row.detail
    finally:
        holder.close()
        os.close(master)
        os.close(slave)


def test_lock_file_is_respected(tmp_path, monkeypatch):
    # UUCP-style lock files LCK..<name>: common practice, no source
    master, slave = os.openpty()
    name = os.ttyname(slave)
    (tmp_path / f"LCK..{os.path.basename(name)}").write_text("      4242\n")
    monkeypatch.setattr(ports, "LOCK_DIRS", (tmp_path,))
    try:
        row = probe_port(name, timeout_s=0.3)
        assert row.status == "in use" and "lock file" in row.detail
        assert select.select([master], [], [], 0.2)[0] == []  # nothing was sent to the port
    finally:
        os.close(master)
        os.close(slave)


def _free_tcp_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def test_socket_url_with_nothing_listening():
    url = f"socket://127.0.0.1:{_free_tcp_port()}"
    with pytest.raises(serial.SerialException) as info:
        serial.serial_for_url(url, timeout=0.1)
    line = describe_port_error(url, info.value)
    assert line.startswith(f"port {url}: nothing listens at 127.0.0.1:") and "\n" not in line
    row = probe_port(url, timeout_s=0.3)
    assert row.status == "error" and row.detail == line


@pytest.mark.parametrize(
    "err, words",
    [
        (errno.ENOENT, "no such device"),
        (errno.EACCES, "dialout group"),
        (errno.EBUSY, "busy"),
        (errno.ENOTTY, "not a serial port"),
        (errno.EIO, "went away"),
    ],
)
def test_local_causes(err, words):
    # pyserial raises SerialException from the OSError of open(2) / ioctl(2)
    try:
        try:
            raise OSError(err, os.strerror(err))
        except OSError as os_exc:
            raise serial.SerialException(f"could not open port /dev/ttyX: {os_exc}")
    except serial.SerialException as exc:
        line = describe_port_error("/dev/ttyX", exc)
    assert line.startswith("port /dev/ttyX: ") and words in line and "\n" not in line


def test_missing_device_through_pyserial(tmp_path):
    path = str(tmp_path / "ttyNOPE")
    with pytest.raises(serial.SerialException) as info:
        serial.Serial(path)
    assert describe_port_error(path, info.value) == f"port {path}: not found: no such device (unplugged, or another name? see `tapcurve ports`)"


def test_unknown_host_url():
    exc = serial.SerialException("Could not open port rfc2217://no-such-host.invalid:2217: "
                                 "[Errno -2] Name or service not known")
    line = describe_port_error("rfc2217://no-such-host.invalid:2217", exc)
    assert "unknown host 'no-such-host.invalid'" in line
