"""The shape stream: real TCP sockets on loopback, a FrameRing fed directly, and one CLI run.

Every line is parsed with Python's json module, the reference reader of RFC 8259
(Bray, "The JavaScript Object Notation (JSON) Data Interchange Format", 2017):
a line that is cut or not valid JSON fails the test.
"""
from __future__ import annotations

import json
import math
import os
import select
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from acquire.errors import UserError
from acquire.link.frames import FrameBlock, FrameRing
from acquire.serve.publish import ShapePublisher, check_address, parse_address
from acquire.rig import load_rig

REPO = Path(__file__).resolve().parents[3]
RIG = REPO / "acquire" / "rigs" / "demo_finger.toml"
N_CH = 6
# a healthy divider chain (v0 > v1 > ... > v5 > 0), 12-bit codes
HEALTHY = np.array([3500, 2900, 2300, 1700, 1100, 500], dtype=np.uint16)
WAIT_S = 10.0  # generous: the machine is shared


def _block(start: int, n: int, codes=HEALTHY) -> FrameBlock:
    seq = np.arange(start, start + n, dtype=np.int64)
    return FrameBlock(
        codes=np.tile(np.asarray(codes, dtype=np.uint16), (n, 1)) + (seq[:, None] % 7).astype(np.uint16),
        seq=seq,
        t_device_s=seq * 1e-3,  # 1 kHz device clock
        t_host_s=np.full(n, time.monotonic()),
        status=np.zeros(n, dtype=np.uint8),
    )


class LineClient:
    """A client that reads lines in its own thread and parses each as JSON."""

    def __init__(self, port: int, *, host: str = "127.0.0.1", family=socket.AF_INET, rcvbuf: int | None = None,
                 read: bool = True):
        self.sock = socket.socket(family, socket.SOCK_STREAM)
        if rcvbuf is not None:  # before connect, so the window is small from the start
            self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, rcvbuf)
        self.sock.connect((host, port))
        self.messages: list[dict] = []
        self.replies: list[dict] = []
        self.cond = threading.Condition()
        self.eof = False
        self.truncated: bytes | None = None  # the tail of a last line that had no line end
        self._thread = None
        if read:
            self.start_reading()

    def start_reading(self) -> None:
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        f = self.sock.makefile("rb")
        try:
            for raw in f:
                if not raw.endswith(b"\n"):  # a stream must end at a line end (checked by the tests)
                    self.truncated = raw[-40:]
                    break
                msg = json.loads(raw.decode("utf-8"))
                with self.cond:
                    (self.messages if "seq" in msg else self.replies).append(msg)
                    self.cond.notify_all()
        except (OSError, ValueError):
            pass
        finally:
            with self.cond:
                self.eof = True
                self.cond.notify_all()

    def send(self, obj) -> None:
        text = obj if isinstance(obj, str) else json.dumps(obj)
        self.sock.sendall(text.encode() + b"\n")

    def wait_seq(self, seq: int, timeout_s: float = WAIT_S) -> bool:
        with self.cond:
            return self.cond.wait_for(lambda: self.eof or (self.messages and self.messages[-1]["seq"] >= seq),
                                      timeout=timeout_s) and not (self.eof and not self.messages)

    def wait_replies(self, n: int, timeout_s: float = WAIT_S) -> list[dict]:
        with self.cond:
            assert self.cond.wait_for(lambda: len(self.replies) >= n, timeout=timeout_s), self.replies
            return list(self.replies)

    def close(self) -> None:
        try:
            self.sock.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass
        self.sock.close()
        if self._thread is not None:
            self._thread.join(5.0)


@pytest.fixture
def ring():
    return FrameRing(capacity_frames=100_000, n_channels=N_CH)


@pytest.fixture
def publisher_factory(ring):
    made = []

    def make(**kw):
        kw.setdefault("address", "127.0.0.1:0")
        kw.setdefault("rate_hz", 1000.0)
        kw.setdefault("announce", False)
        pub = ShapePublisher.from_address(kw.pop("address"), ring=ring, **kw)
        pub.start()
        made.append(pub)
        return pub

    yield make
    for pub in made:
        pub.stop()


def test_raw_messages_arrive_in_order_with_fields(ring, publisher_factory):
    counters = {"frames_lost": 4, "reconnects": 2, "drop_crc": 3, "drop_cobs": 1, "frames": 10}
    pub = publisher_factory(counters=lambda: dict(counters))
    a, b = LineClient(pub.port), LineClient(pub.port)
    assert pub.wait_for_clients(2, timeout_s=WAIT_S)
    pushed = []
    for start in range(0, 300, 7):  # blocks of several frames, as the reader pushes them
        blk = _block(start, 7)
        pushed.append(blk)
        ring.push(blk)
    assert a.wait_seq(300) and b.wait_seq(300)
    expect = FrameBlock.concat(pushed, n_channels=N_CH)
    for c in (a, b):
        msgs = c.messages
        assert [m["seq"] for m in msgs] == expect.seq.tolist()
        assert [m["codes"] for m in msgs] == expect.codes.tolist()
        assert np.allclose([m["t_device_s"] for m in msgs], expect.t_device_s, atol=5e-7)
        m = msgs[-1]
        assert set(m) == {"seq", "t_device_s", "codes", "counters", "dropped"}
        # bad packets = the sum of the decoder's drop causes
        assert m["counters"] == {"frames_lost": 4, "bad_packets": 4, "reconnects": 2, "publisher_lost": 0}
        assert all(x["dropped"] == 0 for x in msgs)
    # one client leaves, another joins: the stream goes on for those connected
    a.close()
    c = LineClient(pub.port)
    assert pub.wait_for_connections(3, timeout_s=WAIT_S)
    ring.push(_block(301, 50))
    assert b.wait_seq(350) and c.wait_seq(350)
    assert [m["seq"] for m in c.messages] == list(range(301, 351))
    assert pub.stats()["connections"] == 3
    b.close()
    c.close()


def _divider_resistance(codes, *, r_ref_ohm: float, adc_bits: int) -> np.ndarray:
    """the readout formula in the README's rig file section: R_k = r_ref (v_k - v_{k+1}) / (1 - v_0), v = code / 2^bits, v_S = 0."""
    v = np.append(np.asarray(codes, dtype=np.float64) / 2**adc_bits, 0.0)
    return r_ref_ohm * (v[:-1] - v[1:]) / (1.0 - v[0])


def test_calibrated_constant_curvature_gives_a_circular_arc(ring, publisher_factory):
    from acquire.core.calibration import Calibration

    rig = load_rig(RIG)
    n_seg = rig.n_segments
    r = _divider_resistance(HEALTHY, r_ref_ohm=rig.r_ref_ohm, adc_bits=12)
    x0, slope = 0.1, 200.0  # relative change and law k = slope * x: every segment reads 20 1/m
    kappa = slope * x0
    cal = Calibration(
        r0_ohm=r / (1.0 + x0), positive=[[slope]] * n_seg, negative=[[slope]] * n_seg,
        x_min=np.full(n_seg, -0.5), x_max=np.full(n_seg, 0.5),
        curvature_min_per_m=np.full(n_seg, -100.0), curvature_max_per_m=np.full(n_seg, 100.0),
        readout_kind="divider", rig={},
    )
    pub = publisher_factory(rig=rig, calibration=cal, adc_bits=12)
    client = LineClient(pub.port)
    assert pub.wait_for_clients(1, timeout_s=WAIT_S)
    seq = np.arange(40, dtype=np.int64)
    ring.push(FrameBlock(codes=np.tile(HEALTHY, (40, 1)), seq=seq, t_device_s=seq * 1e-3,
                         t_host_s=np.zeros(40), status=np.zeros(40, dtype=np.uint8)))
    assert client.wait_seq(39)
    assert [m["seq"] for m in client.messages] == list(range(40))
    m = client.messages[-1]
    assert {"curvature", "s_m", "xy", "tip_xy", "chain_ok", "counters", "dropped"} <= set(m)
    assert m["chain_ok"] is True
    # curvature = slope * (R - R0) / R0 with R from the contract's divider formula (published to 6 digits)
    assert np.allclose(m["curvature"], kappa, rtol=1e-5)
    s = np.asarray(m["s_m"])
    xy = np.asarray(m["xy"])
    length = rig.sensor_length_m
    assert xy.shape == (s.size, 2) and s[0] == 0.0
    assert s[-1] == pytest.approx(length + rig.tip_length_m, abs=1e-7)
    on = s <= length + 1e-9
    # a plane curve of constant curvature k from (0,0) heading +x is the circle arc
    # x = sin(k s)/k, y = (1 - cos(k s))/k (do Carmo, "Differential Geometry of Curves and Surfaces", 1976, 1-5)
    assert np.allclose(xy[on, 0], np.sin(kappa * s[on]) / kappa, atol=1e-6)
    assert np.allclose(xy[on, 1], (1 - np.cos(kappa * s[on])) / kappa, atol=1e-6)
    # rigid tip (rig tip_mode "rigid"): a straight line on along the end heading theta = k L
    theta = kappa * length
    end = np.array([math.sin(theta), 1 - math.cos(theta)]) / kappa
    tip = end + rig.tip_length_m * np.array([math.cos(theta), math.sin(theta)])
    assert np.allclose(m["tip_xy"], tip, atol=1e-6)
    assert np.allclose(xy[-1], tip, atol=1e-6)
    client.close()


def test_a_fault_is_null_not_nan(ring, publisher_factory):
    from acquire.core.calibration import Calibration

    rig = load_rig(RIG)
    n = rig.n_segments
    cal = Calibration(
        r0_ohm=np.full(n, 9000.0), positive=[[100.0]] * n, negative=[[100.0]] * n,
        x_min=np.full(n, -0.5), x_max=np.full(n, 0.5), curvature_min_per_m=np.full(n, -50.0),
        curvature_max_per_m=np.full(n, 50.0), readout_kind="divider", rig={},
    )
    pub = publisher_factory(rig=rig, calibration=cal, adc_bits=12)
    client = LineClient(pub.port)
    assert pub.wait_for_clients(1, timeout_s=WAIT_S)
    # taps out of order for 40 frames: longer than the spike filter bridges, so curvature is missing
    bad = np.array([3500, 1100, 2300, 1700, 2900, 500], dtype=np.uint16)
    seq = np.arange(40, dtype=np.int64)
    ring.push(FrameBlock(codes=np.tile(bad, (40, 1)), seq=seq, t_device_s=seq * 1e-3,
                         t_host_s=np.zeros(40), status=np.zeros(40, dtype=np.uint8)))
    assert client.wait_seq(39)
    m = client.messages[-1]
    assert m["chain_ok"] is False
    assert None in m["curvature"]
    client.close()


def test_stuck_client_loses_whole_messages_and_others_go_on(ring, publisher_factory):
    # small buffers everywhere, so the stuck client's backlog fills within a few hundred messages
    pub = publisher_factory(client_buffer_bytes=16 * 1024, socket_send_buffer_bytes=4096)
    stuck = LineClient(pub.port, rcvbuf=4096, read=False)
    good = LineClient(pub.port)
    assert pub.wait_for_clients(2, timeout_s=WAIT_S)
    total, step = 4000, 20
    # a push that waited for the stuck client would never return (the suite's timeout would end it)
    for start in range(0, total, step):
        ring.push(_block(start, step))
        # the good client keeps pace although the stuck one reads nothing
        assert good.wait_seq(start + step - 1), f"good client stalled at {good.messages[-1:]}"
    assert [m["seq"] for m in good.messages] == list(range(total))
    assert all(m["dropped"] == 0 for m in good.messages)
    by_peer = {c["peer"]: c for c in pub.stats()["clients"]}
    stuck_stats = by_peer[":".join(map(str, stuck.sock.getsockname()[:2]))]
    assert stuck_stats["dropped"] > 0

    # now the stuck client reads: only whole lines, oldest messages dropped, the newest kept
    stuck.start_reading()
    assert stuck.wait_seq(total - 1)
    msgs = stuck.messages
    seqs = [m["seq"] for m in msgs]
    assert seqs == sorted(set(seqs)) and seqs[-1] == total - 1
    assert len(msgs) < total
    # between two received messages, the gap is exactly the growth of "dropped"
    for prev, cur in zip(msgs, msgs[1:]):
        assert cur["dropped"] - prev["dropped"] == cur["seq"] - prev["seq"] - 1, (prev, cur)
    assert msgs[0]["dropped"] == msgs[0]["seq"]  # it was connected from frame 0
    assert len(msgs) + msgs[-1]["dropped"] == total
    stuck.close()
    good.close()


def test_rate_requests(ring, publisher_factory):
    pub = publisher_factory(max_rate_hz=100.0)
    slow, capped, default = LineClient(pub.port), LineClient(pub.port), LineClient(pub.port)
    assert pub.wait_for_clients(3, timeout_s=WAIT_S)
    slow.send("not json")
    slow.send({"max_rate_hz": -1})
    slow.send({"colour": "red"})
    slow.send({"max_rate_hz": 50})
    capped.send({"max_rate_hz": 1000})
    replies = slow.wait_replies(4)
    assert [r["ok"] for r in replies] == [False, False, False, True]
    assert all("error" in r for r in replies[:3]) and replies[3]["max_rate_hz"] == 50.0
    assert capped.wait_replies(1)[0] == {"ok": True, "max_rate_hz": 100.0}  # never above the server's limit
    ring.push(_block(0, 1000))
    for c, last in ((slow, 980), (capped, 990), (default, 990)):
        assert c.wait_seq(last)
    # 1 kHz device clock: 50 Hz is every 20th frame, 100 Hz every 10th (arithmetic, no source needed)
    assert [m["seq"] for m in slow.messages] == list(range(0, 1000, 20))
    assert [m["seq"] for m in capped.messages] == list(range(0, 1000, 10))
    assert [m["seq"] for m in default.messages] == list(range(0, 1000, 10))
    assert all(m["dropped"] == 0 for c in (slow, capped, default) for m in c.messages)
    for c in (slow, capped, default):
        c.close()


@pytest.mark.parametrize(
    "text",
    ["localhost", "127.0.0.1:", "127.0.0.1:abc", "127.0.0.1:70000", "::1:8000", "[::1", "[::1]8000", ":8000"],
)
def test_bad_address_text_names_it(text):
    with pytest.raises(UserError, match="publish address") as info:
        parse_address(text)
    assert text in str(info.value) and "\n" not in str(info.value)


def test_unknown_host_is_a_user_error(ring):
    # .invalid never resolves (Eastlake & Panitz, RFC 2606 "Reserved Top Level DNS Names", 1999)
    with pytest.raises(UserError, match="no-such-host.invalid:8000"):
        ShapePublisher.from_address("no-such-host.invalid:8000", ring=ring, rate_hz=1000.0)


def test_port_in_use_names_the_address(ring):
    taken = socket.socket()
    taken.bind(("127.0.0.1", 0))
    taken.listen(1)
    address = f"127.0.0.1:{taken.getsockname()[1]}"
    pub = ShapePublisher.from_address(address, ring=ring, rate_hz=1000.0, announce=False)
    with pytest.raises(UserError) as info:
        pub.start()
    assert address in str(info.value) and "in use" in str(info.value)
    taken.close()


def test_remote_needs_the_flag_and_warns(ring, capfd):
    with pytest.raises(UserError, match=r"0\.0\.0\.0:0.*loopback"):
        ShapePublisher.from_address("0.0.0.0:0", ring=ring, rate_hz=1000.0)
    # 192.0.2.1 is TEST-NET-1 (Arkko et al., RFC 5737 "IPv4 Address Blocks Reserved for Documentation", 2010)
    with pytest.raises(UserError, match="192.0.2.1:8000"):
        ShapePublisher.from_address("192.0.2.1:8000", ring=ring, rate_hz=1000.0)
    pub = ShapePublisher.from_address("192.0.2.1:8000", allow_remote=True, ring=ring, rate_hz=1000.0)
    with pytest.raises(UserError, match="192.0.2.1:8000: not an address of this computer"):
        pub.start()
    pub = ShapePublisher.from_address("0.0.0.0:0", allow_remote=True, ring=ring, rate_hz=1000.0, announce=False)
    pub.start()
    try:
        err = capfd.readouterr().err
        assert "no authentication" in err and "trusted network" in err
        client = LineClient(pub.port)  # reachable on loopback too
        assert pub.wait_for_clients(1, timeout_s=WAIT_S)
        ring.push(_block(0, 3))
        assert client.wait_seq(2)
        client.close()
    finally:
        pub.stop()


def test_check_address_binds_nothing():
    family, sockaddr = check_address("localhost:0")
    assert sockaddr[0] in ("127.0.0.1", "::1")
    with pytest.raises(UserError, match=r"\[::\]:9000: not a loopback"):
        check_address("[::]:9000")
    assert check_address("[::]:9000", allow_remote=True)[1][0] == "::"


def test_publish_rate_option_is_checked():
    from acquire.commands.cli import build_parser

    base = ["record", "--port", "P", "--rig", "R", "--out", "F", "--publish", "127.0.0.1:0"]
    with pytest.raises(UserError, match="--publish-rate-hz"):
        build_parser().parse_args(base + ["--publish-rate-hz", "0"])
    assert build_parser().parse_args(base + ["--publish-rate-hz", "50"]).publish_rate_hz == 50.0


def test_loopback_ipv6(ring, publisher_factory):
    try:
        probe = socket.socket(socket.AF_INET6)
        probe.bind(("::1", 0))
        probe.close()
    except OSError:
        pytest.skip("no IPv6 loopback on this machine")
    pub = publisher_factory(address="[::1]:0")
    assert pub.bound_address.startswith("[::1]:")
    client = LineClient(pub.port, host="::1", family=socket.AF_INET6)
    assert pub.wait_for_clients(1, timeout_s=WAIT_S)
    ring.push(_block(0, 5))
    assert client.wait_seq(4)
    assert [m["seq"] for m in client.messages] == list(range(5))
    client.close()


def _stderr_lines(proc, lines: list[str], found: threading.Event):
    for line in proc.stderr:
        lines.append(line)
        if "shape stream on" in line:
            found.set()
    found.set()


def test_cli_record_publishes(tmp_path):
    from acquire.core.calibration import Calibration

    rig = load_rig(RIG)
    n = rig.n_segments
    cal_path = tmp_path / "cal.json"
    # a made-up calibration: only the plumbing is under test here
    Calibration(
        r0_ohm=np.full(n, 8000.0), positive=[[50.0]] * n, negative=[[50.0]] * n,
        x_min=np.full(n, -0.9), x_max=np.full(n, 3.0), curvature_min_per_m=np.full(n, -45.0),
        curvature_max_per_m=np.full(n, 150.0), readout_kind="divider", rig={},
    ).save(cal_path)
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    dev = subprocess.Popen(
        [sys.executable, "-m", "display.cli", "virtual-device", "--link", str(tmp_path / "finger")],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO, env=env,
    )
    rec = None
    try:
        ready, _, _ = select.select([dev.stdout], [], [], 60.0)  # bounded: never hang on a silent device
        port = dev.stdout.readline().strip() if ready else ""
        assert port, "virtual-device printed no port"
        out = tmp_path / "rec.h5"
        rec = subprocess.Popen(
            [sys.executable, "-m", "display.cli", "record", "--port", port, "--rig", str(RIG), "--out", str(out),
             "--duration", "2", "--calibration", str(cal_path), "--publish", "127.0.0.1:0"],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO, env=env,
        )
        lines: list[str] = []
        found = threading.Event()
        threading.Thread(target=_stderr_lines, args=(rec, lines, found), daemon=True).start()
        assert found.wait(30.0)
        announce = [ln for ln in lines if "shape stream on" in ln]
        assert announce, "".join(lines)
        address = announce[0].split("shape stream on ")[1].split()[0]
        host, port_text = address.rsplit(":", 1)
        client = LineClient(int(port_text), host=host)
        with client.cond:  # the stream ends when the recording does
            assert client.cond.wait_for(lambda: client.eof, timeout=30.0)
        assert rec.wait(30.0) == 0, "".join(lines)
        msgs = client.messages
        assert client.truncated is None, client.truncated  # whole lines to the end of the stream
        assert len(msgs) > 200  # connected within the 2 s of recording
        seqs = np.array([m["seq"] for m in msgs])
        assert (np.diff(seqs) == 1).all()  # a reading client on a healthy link misses nothing
        m = msgs[-1]
        assert {"seq", "t_device_s", "codes", "curvature", "s_m", "xy", "tip_xy", "counters", "dropped"} <= set(m)
        assert len(m["codes"]) == rig.n_channels and len(m["curvature"]) == n
        assert len(m["xy"]) == len(m["s_m"]) and m["dropped"] == 0
        assert out.exists()
        client.close()
        # a non-loopback address without --publish-allow-remote: exit 2, one line naming it
        bad = subprocess.run(
            [sys.executable, "-m", "display.cli", "record", "--port", port, "--rig", str(RIG),
             "--out", str(tmp_path / "bad.h5"), "--duration", "1", "--publish", "0.0.0.0:0"],
            capture_output=True, text=True, cwd=REPO, env=env, timeout=60,
        )
        assert bad.returncode == 2, bad.stderr
        assert len(bad.stderr.strip().splitlines()) == 1 and "Traceback" not in bad.stderr
        assert "0.0.0.0:0" in bad.stderr and "loopback" in bad.stderr
    finally:
        for proc in (rec, dev):
            if proc is not None and proc.poll() is None:
                proc.terminate()
                try:
                    proc.wait(10)
                except subprocess.TimeoutExpired:
                    proc.kill()


def test_cli_live_headless_limits_the_stream_rate(tmp_path):
    """`tapcurve live --headless --publish 127.0.0.1:0 --publish-rate-hz 10` on the built-in virtual finger
    (1 kHz): a connected client gets 10 messages per second of device time, the unit the limit is defined in
    (acquire/serve/publish.py, "Requests"; device time makes the check independent of the machine's load).
    Without the option it gets every frame, 1 ms apart, so each check below can fail."""
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    proc = subprocess.Popen(
        [sys.executable, "-m", "display.cli", "live", "--headless", "--duration", "3",
         "--publish", "127.0.0.1:0", "--publish-rate-hz", "10"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO, env=env,
    )
    client = None
    try:
        lines: list[str] = []
        found = threading.Event()
        threading.Thread(target=_stderr_lines, args=(proc, lines, found), daemon=True).start()
        assert found.wait(60.0)
        announce = [ln for ln in lines if "shape stream on" in ln]
        assert announce, "".join(lines)
        host, port_text = announce[0].split("shape stream on ")[1].split()[0].rsplit(":", 1)
        client = LineClient(int(port_text), host=host)
        with client.cond:  # the stream ends when the session does (after --duration)
            assert client.cond.wait_for(lambda: client.eof, timeout=60.0)
        assert proc.wait(30.0) == 0, "".join(lines)
    finally:
        if client is not None:
            client.close()
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    msgs = client.messages
    assert client.truncated is None, client.truncated  # whole lines to the end of the stream
    assert len(msgs) >= 5, len(msgs)  # connected for most of the 3 s
    seq = np.array([m["seq"] for m in msgs])
    t = np.array([m["t_device_s"] for m in msgs])
    # 10 messages per device second: (n - 1) intervals over the device time they span (arithmetic)
    assert (len(msgs) - 1) / (t[-1] - t[0]) == pytest.approx(10.0, rel=0.05)
    assert np.diff(t).min() > 0.05  # never two messages within half a period
    if msgs[-1]["counters"]["frames_lost"] == 0:
        # nothing lost on the link: exactly every 100th frame of the 1 kHz device
        assert (np.diff(seq) == 100).all(), np.diff(seq)
    assert all(m["dropped"] == 0 for m in msgs)  # a reading client at 10 Hz loses nothing


def test_calibration_loaded_mid_stream(ring, publisher_factory):
    """Started raw, then given a calibration (as the live window's "Calibration..." does): shapes appear
    from a block boundary on, and no message mixes the two."""
    from acquire.core.calibration import Calibration

    rig = load_rig(RIG)
    n_seg = rig.n_segments
    r = _divider_resistance(HEALTHY, r_ref_ohm=rig.r_ref_ohm, adc_bits=12)
    cal = Calibration(
        r0_ohm=r / 1.1, positive=[[200.0]] * n_seg, negative=[[200.0]] * n_seg,
        x_min=np.full(n_seg, -0.5), x_max=np.full(n_seg, 0.5),
        curvature_min_per_m=np.full(n_seg, -100.0), curvature_max_per_m=np.full(n_seg, 100.0),
        readout_kind="divider", rig={},
    )
    pub = publisher_factory(rig=rig, adc_bits=12)
    client = LineClient(pub.port)
    assert pub.wait_for_clients(1, timeout_s=WAIT_S)

    def push(start, n):
        seq = np.arange(start, start + n, dtype=np.int64)
        ring.push(FrameBlock(codes=np.tile(HEALTHY, (n, 1)), seq=seq, t_device_s=seq * 1e-3,
                             t_host_s=np.zeros(n), status=np.zeros(n, dtype=np.uint8)))

    push(0, 20)
    assert client.wait_seq(19)
    pub.set_calibration(cal)
    push(20, 20)
    assert client.wait_seq(39)
    msgs = client.messages
    assert [m["seq"] for m in msgs] == list(range(40))
    assert "curvature" not in msgs[0]
    assert "curvature" in msgs[-1] and np.allclose(msgs[-1]["curvature"], 20.0, rtol=1e-5)
    first_shaped = next(i for i, m in enumerate(msgs) if "curvature" in m)
    assert all("curvature" in m for m in msgs[first_shaped:])
    client.close()
