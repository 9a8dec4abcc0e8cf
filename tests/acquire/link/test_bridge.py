"""A board behind a network bridge: the virtual finger's pty served on 127.0.0.1 TCP, recorded through
pyserial's ``socket://`` URL; and ``tapcurve ports --probe`` finding the finger's pty.

The bridge is either a few lines of Python of our own (always) or socat, the
usual serial-to-TCP tool (where installed; .ci/run installs it). Wire protocol
v1 is firmware_protocol/PROTOCOL.md; ``socket://host:port`` is pyserial's URL
handler ("URL Handlers" in the pyserial documentation).
"""
from __future__ import annotations

import os
import selectors
import shutil
import socket
import subprocess
import sys
import threading
import tty
from pathlib import Path

import h5py
import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[3]
RIG = REPO / "acquire" / "rigs" / "demo_finger.toml"


def tapcurve(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "display.cli", *args], capture_output=True, text=True,
                          timeout=120, cwd=REPO)


class PythonBridge:
    """Bytes both ways between one TCP client on 127.0.0.1 and a serial device path, until stopped."""

    def __init__(self, device: str):
        self.device = device
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.port = self.listener.getsockname()[1]
        self.stopping = threading.Event()
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self._run, name="tcp bridge", daemon=True)
        self.thread.start()

    def _run(self) -> None:
        try:
            self.listener.settimeout(0.2)
            while not self.stopping.is_set():
                try:
                    conn, _ = self.listener.accept()
                except socket.timeout:
                    continue
                with conn:
                    self._shuttle(conn)
        except BaseException as exc:  # reported by stop()
            self.error = exc

    def _shuttle(self, conn: socket.socket) -> None:
        fd = os.open(self.device, os.O_RDWR | os.O_NOCTTY | os.O_NONBLOCK)
        try:
            tty.setraw(fd)  # bytes as they are: no echo, no line editing (termios(3))
            conn.setblocking(False)
            sel = selectors.DefaultSelector()
            sel.register(fd, selectors.EVENT_READ, "device")
            sel.register(conn, selectors.EVENT_READ, "client")
            while not self.stopping.is_set():
                for key, _ in sel.select(0.2):
                    if key.data == "device":
                        try:
                            data = os.read(fd, 65536)
                        except BlockingIOError:
                            continue
                        conn.setblocking(True)
                        conn.sendall(data)
                        conn.setblocking(False)
                    else:
                        try:
                            data = conn.recv(65536)
                        except BlockingIOError:
                            continue
                        if not data:  # the client went away
                            return
                        os.write(fd, data)
        except (BrokenPipeError, ConnectionResetError):
            return
        finally:
            os.close(fd)

    def stop(self) -> None:
        self.stopping.set()
        self.thread.join(10)
        self.listener.close()
        if self.error is not None:
            raise self.error


class SocatBridge:
    """socat between a TCP port on 127.0.0.1 and the device (raw, no echo)."""

    def __init__(self, device: str):
        probe = socket.create_server(("127.0.0.1", 0))
        self.port = probe.getsockname()[1]
        probe.close()
        self.proc = subprocess.Popen(
            ["socat", f"TCP-LISTEN:{self.port},bind=127.0.0.1,reuseaddr", f"FILE:{device},raw,echo=0"],
            stderr=subprocess.PIPE, text=True)

    def stop(self) -> None:
        self.proc.terminate()
        self.proc.wait(10)


@pytest.fixture(params=["python", "socat"])
def bridge(request, finger, wait_until):
    if request.param == "socat":
        if shutil.which("socat") is None:
            pytest.skip("socat is not installed (Debian package socat; .ci/run installs it)")
        b = SocatBridge(finger.path)
        # socat serves one connection and exits: wait for its port without connecting to it
        wait_until(lambda: _port_listening(b.port) or b.proc.poll() is not None, timeout_s=30,
                   what="socat to listen")
        assert b.proc.poll() is None, b.proc.stderr.read()
    else:
        b = PythonBridge(finger.path)
    yield b
    b.stop()


def _port_listening(port: int) -> bool:
    """Whether something listens on 127.0.0.1:port, from the kernel's table (Linux /proc/net/tcp)."""
    try:
        rows = Path("/proc/net/tcp").read_text().splitlines()[1:]
    except OSError:
        return True  # no way to look: let the connection attempt decide
    for row in rows:
        local, state = row.split()[1], row.split()[3]
        if state == "0A" and int(local.split(":")[1], 16) == port:  # 0A: TCP_LISTEN (include/net/tcp_states.h)
            return True
    return False


def test_record_through_a_tcp_bridge(bridge, tmp_path):
    out = tmp_path / "bridged.h5"
    res = tapcurve("record", "--port", f"socket://127.0.0.1:{bridge.port}", "--rig", str(RIG),
                   "--out", str(out), "--duration", "1")
    assert res.returncode == 0, res.stderr
    with h5py.File(out, "r") as f:
        seq = f["raw/seq"][:]
        t = f["raw/t_device_s"][:]
    assert seq.shape[0] == 1000  # --duration 1 at the device's 1000 Hz: 1000 frames
    assert (np.diff(seq) == 1).all()  # contiguous: nothing lost on the way
    assert np.allclose(np.diff(t), 1e-3)


def test_ports_probe_finds_the_virtual_finger_by_its_pty(finger):
    pty = finger.port_name
    assert pty and pty.startswith("/dev/")
    res = tapcurve("ports", "--probe", "--timeout", "2", pty)
    assert res.returncode == 0, res.stderr
    rows = [ln for ln in res.stdout.splitlines() if ln.split()[:1] == [pty]]
    assert len(rows) == 1, res.stdout
    assert "tapcurve board" in rows[0] and "protocol 1" in rows[0] and "6 channels" in rows[0]
