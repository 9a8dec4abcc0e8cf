"""The virtual finger over a real pseudo-terminal, read with pyserial.

The reference for everything on the wire is wire protocol v1 (the README
section 1) as decoded by ``firmware_protocol.StreamDecoder``; the ground
truth is the device's own record (``truth_for`` and the truth file), which
the model tests check against closed forms.
"""
from __future__ import annotations

import argparse
import os
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
import serial

import firmware_protocol as fp
from acquire.errors import UserError
from acquire.rig import load_rig, parse_rig
from acquire.virtual import Faults, VirtualFinger, add_virtual_device_arguments
from acquire.virtual.cli import build_virtual_finger

TIMEOUT_S = 5.0


class Host:
    """A minimal host: pyserial port plus the protocol's stream decoder."""

    def __init__(self, path: str):
        self.port = serial.Serial(path, timeout=0.01)
        self.dec = fp.StreamDecoder()
        self.items: list = []  # everything decoded, in stream order
        self._mark = 0  # items before this were handed out already

    def close(self) -> None:
        self.port.close()

    def send(self, line: bytes) -> None:
        self.port.write(line)
        self.port.flush()

    def pump(self) -> None:
        self.items.extend(self.dec.feed(self.port.read(65536)))

    def wait_for(self, pred, *, timeout_s: float = TIMEOUT_S):
        """Read until an item satisfying ``pred`` arrives; return it. Sample
        frames after it stay for :meth:`frames`."""
        deadline = time.monotonic() + timeout_s
        while True:
            for k in range(self._mark, len(self.items)):
                if pred(self.items[k]):
                    self._mark = k + 1
                    return self.items[k]
            if time.monotonic() > deadline:
                raise TimeoutError("the awaited packet did not come")
            self.pump()

    def ask(self, line: bytes, pred):
        self.send(line)
        return self.wait_for(pred)

    def reply(self, line: bytes) -> str:
        return self.ask(line, lambda i: isinstance(i, fp.Reply)).text

    def frames(self, *, n: int, timeout_s: float = TIMEOUT_S) -> fp.SampleBlock:
        """The next ``n`` or more sample frames (not handed out before), joined."""
        deadline = time.monotonic() + timeout_s
        blocks = []
        got = 0
        while True:
            for item in self.items[self._mark :]:
                if isinstance(item, fp.SampleBlock):
                    blocks.append(item)
                    got += len(item)
            self._mark = len(self.items)
            if got >= n:
                return _join(blocks)
            if time.monotonic() > deadline:
                raise TimeoutError(f"only {got} of {n} frames came")
            self.pump()


def _join(blocks) -> fp.SampleBlock:
    return fp.SampleBlock(
        np.concatenate([b.seq for b in blocks]), np.concatenate([b.t_us for b in blocks]),
        np.concatenate([b.status for b in blocks]), np.concatenate([b.codes for b in blocks]),
    )


def _samples_between(items, first_pred, last_pred) -> list:
    out, inside = [], False
    for item in items:
        if inside and last_pred(item):
            return out
        if inside and isinstance(item, fp.SampleBlock):
            out.append(item)
        if not inside and first_pred(item):
            inside = True
    raise AssertionError("markers not found")


def _is_reply(text):
    return lambda i: isinstance(i, fp.Reply) and i.text == text


@pytest.fixture
def device():
    dev = VirtualFinger(seed=4)
    dev.start()
    yield dev
    dev.stop()


@pytest.fixture
def host(device):
    h = Host(device.path)
    yield h
    h.close()


# ------------------------------------------------------------------ commands


def test_hello_and_command_replies(device, host):
    # firmware_protocol/PROTOCOL.md: hello keys, one reply per command, OK/ERR texts.
    hello = host.ask(b"HELLO?\n", lambda i: isinstance(i, fp.Hello)).info
    rig = load_rig(None)
    assert hello["protocol"] == 1 and isinstance(hello["firmware"], str)
    assert hello["adc_bits"] == 12 and hello["channels"] == rig.n_channels and hello["rate_hz"] == 1000
    assert hello["device"] == "virtual finger (demo)" and hello["boot"] == 1
    assert host.reply(b"FLY 3\n").startswith("ERR")
    assert host.reply(b"RATE 0\n").startswith("ERR")
    assert host.reply(b"RATE 1e9\n").startswith("ERR")
    assert host.reply(b"RATE 500\n") == "OK RATE 500"
    assert host.reply(b"STOP\n") == "OK STOP"
    hello = host.ask(b"HELLO?\n", lambda i: isinstance(i, fp.Hello)).info
    assert hello["rate_hz"] == 500
    c = device.counters
    assert c["commands"] == 7 and c["command_errors"] == 3


def test_stream_is_contiguous_and_matches_truth(device, host):
    # Sample packets: seq +1 each, t_us +1e6/rate each (firmware_protocol/PROTOCOL.md);
    # codes equal the device's own record of what it made.
    assert host.reply(b"START\n") == "OK START"
    block = host.frames(n=400)
    seq = block.seq.astype(np.int64)
    assert seq[0] == 0
    np.testing.assert_array_equal(np.diff(seq), 1)
    np.testing.assert_array_equal(np.diff(block.t_us.astype(np.int64)), 1000)
    assert not (block.status & fp.STATUS_TX_OVERFLOW).any()
    truth = device.truth_for(1, seq)
    np.testing.assert_array_equal(block.codes, truth["codes"])
    assert host.reply(b"RATE 500\n") == "OK RATE 500"
    more = host.frames(n=200)
    # every frame after the reply is at the new rate, and seq goes on without a gap
    np.testing.assert_array_equal(np.diff(more.t_us.astype(np.int64)), 2000)
    everything = _join([i for i in host.items if isinstance(i, fp.SampleBlock)])
    np.testing.assert_array_equal(np.diff(everything.seq.astype(np.int64)), 1)
    # after OK STOP no sample packet comes before the next answer
    assert host.reply(b"STOP\n") == "OK STOP"
    host.ask(b"HELLO?\n", lambda i: isinstance(i, fp.Hello))
    assert not _samples_between(host.items, _is_reply("OK STOP"), lambda i: isinstance(i, fp.Hello))
    assert host.dec.dropped == 0


def test_set_hold_changes_the_finger(device, host, wait_until):
    # The jig's curvature (label grammar of the README's commands and calibration sections) shows up
    # in the truth of the frames made after the change.
    host.reply(b"START\n")
    host.frames(n=50)
    device.set_hold("curvature=40/m")
    seen = {}

    def held() -> bool:
        seen["block"] = host.frames(n=20)
        seen["truth"] = device.truth_for(1, seen["block"].seq.astype(np.int64))
        return abs(seen["truth"]["curvature_per_m"][-1] - 40.0).max() < 0.05

    wait_until(held, timeout_s=TIMEOUT_S, what="the hold to take effect", poll_s=0.0)
    block, tr = seen["block"], seen["truth"]
    np.testing.assert_array_equal(block.codes, tr["codes"])
    with pytest.raises(UserError):
        device.set_hold("radius=huge")


# ------------------------------------------------------------------ vanish


def test_vanish_and_return_as_rebooted_device(device):
    # The brief's reboot semantics (hello again, seq and clock from 0) and
    # firmware_protocol/PROTOCOL.md (the host unwraps from whatever comes).
    host = Host(device.path)
    try:
        host.reply(b"START\n")
        host.frames(n=100)
        device.vanish(outage_s=0.3)
        assert not os.path.lexists(device.path)
        with pytest.raises(serial.SerialException):
            deadline = time.monotonic() + TIMEOUT_S
            while time.monotonic() < deadline:
                host.port.read(4096)
    finally:
        host.close()
    assert device.wait_ready(boot=2, timeout_s=TIMEOUT_S)
    host = Host(device.path)  # the same path
    try:
        hello = host.ask(b"HELLO?\n", lambda i: isinstance(i, fp.Hello)).info
        assert hello["boot"] == 2
        assert host.reply(b"START\n") == "OK START"
        block = host.frames(n=50)
        assert int(block.seq[0]) == 0  # seq from 0 again
        assert int(block.t_us[0]) < 1_000_000 * TIMEOUT_S * 2  # device clock from 0 at the reboot
        np.testing.assert_array_equal(block.codes, device.truth_for(2, block.seq.astype(np.int64))["codes"])
    finally:
        host.close()
    c = device.counters
    assert c["boots"] == 2 and c["vanishes"] == 1


def test_vanish_without_reboot_leaves_a_seq_gap(device):
    # firmware_protocol/PROTOCOL.md: lost frames show as a jump in seq, never papered over.
    host = Host(device.path)
    host.reply(b"START\n")
    before = host.frames(n=100)
    host.close()
    device.vanish(outage_s=0.2, reboot=False)
    assert device.wait_ready(timeout_s=TIMEOUT_S)
    host = Host(device.path)
    try:
        after = host.frames(n=100)  # still streaming, no START needed
    finally:
        host.close()
    lost = device.counters["frames_lost_outage"]
    assert lost > 0 and device.boot == 1
    assert int(after.seq[0]) > int(before.seq[-1]) + lost - 1


def test_periodic_vanish():
    # Common practice, no source: a flaky cable that comes back again and again.
    with VirtualFinger(faults=Faults(vanish_every_s=0.2, outage_s=0.05)) as dev:
        assert dev.wait_ready(boot=3, timeout_s=TIMEOUT_S)
        assert dev.counters["vanishes"] >= 2


# ------------------------------------------------------------------ link faults and buffers


def test_drop_and_corrupt_rates(tmp_path):
    # Lost and broken packets are what the faults claim: the truth file's fate
    # of each frame against what a host decoded.
    truth = tmp_path / "truth.h5"
    faults = Faults(drop_rate=0.1, corrupt_rate=0.05)
    with VirtualFinger(rate_hz=5000, faults=faults, truth_path=truth, seed=8) as dev:
        host = Host(dev.path)
        host.reply(b"START\n")
        host.frames(n=4000)
        host.reply(b"STOP\n")
        host.close()
    blocks = [i for i in host.items if isinstance(i, fp.SampleBlock)]
    got = _join(blocks)
    with h5py.File(truth, "r") as f:
        fate = f["fate"][:]
        seq_all = f["seq"][:]
        codes_all = f["codes"][:]
    np.testing.assert_array_equal(seq_all, np.arange(seq_all.size))
    n = fate.size
    # binomial counts, 5 sigma
    assert abs(np.count_nonzero(fate == 2) - 0.1 * n) < 5 * np.sqrt(n * 0.1 * 0.9)
    sent = np.count_nonzero(fate != 2)
    assert abs(np.count_nonzero(fate == 1) - 0.05 * sent) < 5 * np.sqrt(sent * 0.05 * 0.95)
    rx = got.seq.astype(np.int64)  # under 65536 frames: no unwrapping needed
    np.testing.assert_array_equal(got.codes, codes_all[rx])
    assert set(fate[rx].tolist()) <= {0, 1}  # dropped frames never arrive
    # a sent frame goes missing only next to a corrupted one (a hit delimiter
    # merges two packets, and the decoder drops both)
    missing = np.setdiff1d(np.flatnonzero(fate == 0), rx)
    missing = missing[missing < rx.max()]
    neighbours = (fate[np.maximum(missing - 1, 0)] == 1) | (fate[np.minimum(missing + 1, n - 1)] == 1)
    assert neighbours.all()
    assert host.dec.dropped >= 0.5 * np.count_nonzero(fate[: rx.max()] == 1)


def test_transmit_buffer_overflow_flags_next_packet(wait_until):
    # firmware_protocol/PROTOCOL.md: whole packets that do not fit are dropped, the
    # next packet carries status bit 1, the gap in seq counts them.
    with VirtualFinger(rate_hz=20000, tx_buffer_bytes=1024) as dev:
        host = Host(dev.path)
        try:
            host.reply(b"START\n")
            # host not reading: the pty fills up
            wait_until(lambda: dev.counters["frames_dropped_tx"] > 0, timeout_s=TIMEOUT_S,
                       what="the transmit buffer to overflow")
            # read again: the first packet that finds room is flagged
            host.wait_for(lambda i: isinstance(i, fp.SampleBlock) and (i.status & fp.STATUS_TX_OVERFLOW).any())
            host.frames(n=2000)  # a steady reader: no more overflow
            host.send(b"STOP\n")
            host.wait_for(_is_reply("OK STOP"), timeout_s=TIMEOUT_S)
            dropped = dev.counters["frames_dropped_tx"]
        finally:
            host.close()
    got = _join([i for i in host.items if isinstance(i, fp.SampleBlock)])
    wire = got.seq.astype(np.int64)
    seq = wire[0] + np.concatenate([[0], np.cumsum(np.diff(wire) % 65536)])  # unwrap
    gaps = np.flatnonzero(np.diff(seq) != 1)
    assert gaps.size > 0
    assert int((np.diff(seq)[gaps] - 1).sum()) == dropped
    assert (got.status[gaps + 1] & fp.STATUS_TX_OVERFLOW).all()
    assert host.dec.dropped == 0


def test_truth_file_matches_stream(tmp_path):
    path = tmp_path / "truth.h5"
    with VirtualFinger(truth_path=path, seed=2, hold="radius=25mm") as dev:
        host = Host(dev.path)
        host.reply(b"START\n")
        block = host.frames(n=300)
        host.reply(b"STOP\n")
        host.close()
        expected = dev.truth_for(1, block.seq.astype(np.int64))
    with h5py.File(path, "r") as f:  # closed cleanly on stop: plain h5py opens it
        assert f.attrs["layout"] == "tapcurve-virtual-truth"
        seq = f["seq"][:]
        assert seq.size >= 300 and (f["boot"][:] == 1).all()
        idx = block.seq.astype(np.int64)
        np.testing.assert_array_equal(f["codes"][:][idx], block.codes)
        np.testing.assert_allclose(f["curvature_per_m"][:][idx], expected["curvature_per_m"])
        np.testing.assert_allclose(f["curvature_per_m"][:], 40.0, atol=0.05)  # radius 25 mm
        np.testing.assert_allclose(f["t_device_s"][:][idx] * 1e6, block.t_us, atol=0.6)
        assert f["curvature_per_m"].attrs["units"] == "1/m"


def test_time_scale_speeds_up_frames_not_timestamps():
    # t_us advances by 1e6 / rate per frame (firmware_protocol/PROTOCOL.md) whatever
    # the pacing. Paced 25x, 10 device seconds take 0.4 s; the only bound checked is
    # "faster than real time" (10 s), which a loaded machine meets by a wide margin.
    with VirtualFinger(time_scale=25.0) as dev:
        host = Host(dev.path)
        try:
            host.reply(b"START\n")
            t0 = time.monotonic()
            block = host.frames(n=10000, timeout_s=60.0)
            wall = time.monotonic() - t0
        finally:
            host.close()
    np.testing.assert_array_equal(np.diff(block.t_us.astype(np.int64)), 1000)
    assert wall < 9.0  # 10 device seconds in less than 10 s of wall time


def test_16_channels_at_25_khz_every_gap_is_flagged():
    # 16 channels at 25,000 frames/s (1.1 MB/s) through the pty with a host reading it. Whether
    # a loaded machine keeps up is a speed figure (bench/bench_record.py); what must hold on any
    # machine is firmware_protocol/PROTOCOL.md's rule: a frame is only ever missing because the
    # transmit buffer was full, and the next packet sent says so (status bit 1).
    text = "\n".join([
        "[sensor]",
        "segment_lengths_mm = [" + ", ".join(["8.0"] * 16) + "]",
        "[readout]",
        'kind = "divider"',
        "r_ref_ohm = 10000.0",
        "channels = [" + ", ".join(f'"tap{k}"' for k in range(16)) + "]",
    ])
    rig = parse_rig(text)
    with VirtualFinger(rig=rig, rate_hz=25000) as dev:
        host = Host(dev.path)
        try:
            host.reply(b"START\n")
            host.frames(n=2500)
            block = host.frames(n=25000)
        finally:
            host.close()
    assert block.codes.shape[1] == 16 and len(block) >= 25000
    gaps = (np.diff(block.seq.astype(np.int64)) % 65536) - 1
    after_gap = np.flatnonzero(gaps > 0) + 1
    assert (block.status[after_gap] & fp.STATUS_TX_OVERFLOW).all()  # every gap flagged by the device
    assert gaps.sum() <= dev.counters["frames_dropped_tx"]  # and counted by it


# ------------------------------------------------------------------ command line


def _parse(argv):
    p = argparse.ArgumentParser()
    add_virtual_device_arguments(p)
    return p.parse_args(argv)


@pytest.mark.parametrize(
    "argv, option",
    [
        (["--open-tap", "9"], "--open-tap"),
        (["--short-taps", "1"], "--short-taps"),
        (["--short-taps", "3,2"], "--short-taps"),
        (["--rate-hz", "fast"], "--rate-hz"),
        (["--adc-bits", "20"], "--adc-bits"),
        (["--hold", "round"], "--hold"),
        (["--scenario", "dance"], "--scenario"),
        (["--drop-rate", "1.5"], "--drop-rate"),
        (["--vanish-every", "0"], "--vanish-every"),
        (["--stuck-channel", "-1"], "--stuck-channel"),
    ],
)
def test_cli_bad_values_name_the_option(argv, option):
    # the README's commands and calibration sections: bad input gives one line naming the value at fault.
    with pytest.raises(UserError, match=option) as info:
        build_virtual_finger(_parse(argv))
    assert "\n" not in str(info.value)


def test_cli_bad_link_folder(tmp_path):
    with pytest.raises(UserError, match="--link"):
        build_virtual_finger(_parse(["--link", str(tmp_path / "nope" / "finger")]))


def test_cli_runs_until_sigterm(tmp_path):
    # the README's commands and calibration sections: prints its path, exits 0 on a clean stop (SIGTERM).
    link = tmp_path / "finger"
    script = (
        "import argparse, sys\n"
        "from acquire.virtual import add_virtual_device_arguments, run_virtual_device\n"
        "p = argparse.ArgumentParser(); add_virtual_device_arguments(p)\n"
        "sys.exit(run_virtual_device(p.parse_args(sys.argv[1:])))\n"
    )
    proc = subprocess.Popen(
        [sys.executable, "-c", script, "--link", str(link), "--hold", "flat", "--seed", "5"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    try:
        path = proc.stdout.readline().strip()
        assert path == str(link)
        host = Host(path)
        try:
            hello = host.ask(b"HELLO?\n", lambda i: isinstance(i, fp.Hello)).info
        finally:
            host.close()
        assert hello["hold"] == "flat"
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=10) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert not os.path.lexists(link)  # cleaned up on the way out
