"""The portable C encoder in firmware_protocol/c/ against the Python side.

The C code is built with the system compiler into a temporary folder, then
driven through two small programs: ``tc_selftest`` (packet specs in, frames
out; CRC; command lines) and ``tc_demo`` (the example main loop on a
simulated board, wire stream on stdout).

Outside references used below:
- the CRC RevEng catalogue of parametrised CRC algorithms, entry
  CRC-16/IBM-3740 (alias CRC-16/CCITT-FALSE): check = 0x29B1 for "123456789";
- Python's ``binascii.crc_hqx`` (standard library): the non-reflected 0x1021
  CRC with a caller-chosen initial value;
- the ``cobs`` package from PyPI, an implementation of Cheshire & Baker's
  COBS (IEEE/ACM Trans. Networking, 1999) independent of this project;
- ``../shared/vectors/packets.json``: packets made by an encoder written
  independently of this project (firmware_protocol/PROTOCOL.md).
"""
from __future__ import annotations

import binascii
import json
import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from cobs import cobs as cobs_ref

import firmware_protocol as fp

C_DIR = Path(fp.__file__).resolve().parent / "c"
SHARED = Path(__file__).resolve().parents[2] / ".." / "shared"
VECTORS = SHARED / "vectors" / "packets.json"

CFLAGS = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2"]
SANITIZE = ["-O1", "-g", "-fsanitize=address,undefined", "-fno-sanitize-recover=all"]
LIB = [str(C_DIR / "tapcurve_proto.c")]

TEXT_KIND = {fp.KIND_HELLO: "H", fp.KIND_REPLY: "R", fp.KIND_NOTE: "N"}


# --------------------------------------------------------------------------
# building
# --------------------------------------------------------------------------


def _find_cc() -> str | None:
    for name in (os.environ.get("CC"), "cc", "gcc", "clang"):
        if name and shutil.which(name):
            return shutil.which(name)
    return None


def _compile(cc: str, flags: list[str], sources: list[str], out: Path, *, link: bool = True) -> None:
    cmd = [cc, *flags, *(() if link else ("-c",)), "-o", str(out), *sources]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, f"{' '.join(cmd)}\n{res.stdout}{res.stderr}"


@pytest.fixture(scope="session")
def c_build(tmp_path_factory) -> dict[str, Path]:
    """All C programs, built once per session with the project's warning flags.

    Address and undefined-behaviour sanitizers are added when the toolchain
    supports them, so an out-of-bounds write fails the test run.
    """
    cc = _find_cc()
    if cc is None:
        pytest.skip("no C compiler (cc, gcc or clang) on PATH: C encoder tests skipped")
    out = tmp_path_factory.mktemp("c_build")
    flags = CFLAGS + SANITIZE
    probe = out / "probe"
    try:
        _compile(cc, flags, [str(C_DIR / "tc_selftest.c"), *LIB], probe)
        ok = subprocess.run([str(probe), "crc"], input=b"", capture_output=True, timeout=30).returncode == 0
    except AssertionError:
        ok = False
    if not ok:
        flags = CFLAGS
    bins = {
        "selftest": out / "tc_selftest",
        "selftest_bitwise": out / "tc_selftest_bitwise",
        "demo": out / "tc_demo",
    }
    _compile(cc, flags, [str(C_DIR / "tc_selftest.c"), *LIB], bins["selftest"])
    _compile(cc, flags + ["-DTC_CRC_BITWISE"], [str(C_DIR / "tc_selftest.c"), *LIB], bins["selftest_bitwise"])
    _compile(cc, flags + ["-DTC_HOST_DEMO"], [str(C_DIR / "example_main.c"), *LIB], bins["demo"])
    # the board variant of the example and a freestanding build of the library
    bins["example_obj"] = out / "example_main.o"
    _compile(cc, CFLAGS, [str(C_DIR / "example_main.c")], bins["example_obj"], link=False)
    bins["lib_obj"] = out / "tapcurve_proto.o"
    _compile(cc, CFLAGS + ["-ffreestanding"], LIB, bins["lib_obj"], link=False)
    return bins


def _run(exe: Path, args: list[str], data: bytes) -> subprocess.CompletedProcess:
    return subprocess.run([str(exe), *args], input=data, capture_output=True, timeout=60)


# --------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------


def _spec(packet) -> str:
    if isinstance(packet, fp.Samples):
        return " ".join(map(str, ("S", packet.seq, packet.t_us, packet.status, *packet.codes)))
    if isinstance(packet, fp.Hello):
        return "H " + packet.text.encode("utf-8").hex()
    if isinstance(packet, fp.Reply):
        return "R " + packet.text.encode("utf-8").hex()
    if isinstance(packet, fp.Note):
        return "N " + packet.text.encode("utf-8").hex()
    raise TypeError(packet)


def _c_frames(exe: Path, specs: list[str]) -> list[bytes]:
    """Frames the C encoder writes for ``specs``, split at their delimiters."""
    res = _run(exe, ["frames"], ("\n".join(specs) + "\n").encode("ascii"))
    assert res.returncode == 0, res.stderr.decode(errors="replace")
    parts = res.stdout.split(b"\x00")
    assert parts[-1] == b"", "output does not end with a delimiter"
    return [p + b"\x00" for p in parts[:-1]]


def _assert_frames_equal(got: list[bytes], want: list[bytes], labels: list[str]) -> None:
    assert len(got) == len(want), f"{len(got)} frames from C, {len(want)} expected"
    for g, w, label in zip(got, want, labels):
        assert g == w, f"{label}:\n C  {g.hex()}\n ref {w.hex()}"


def _ref_decode(frame: bytes) -> tuple[int, bytes]:
    """Kind and body of a wire frame, using only outside code (cobs package,
    binascii.crc_hqx), so a shared mistake in the project's Python and C
    cannot hide."""
    assert frame.endswith(b"\x00") and b"\x00" not in frame[:-1]
    raw = cobs_ref.decode(frame[:-1])
    assert binascii.crc_hqx(raw[:-2], 0xFFFF) == int.from_bytes(raw[-2:], "little")
    return raw[0], raw[1:-2]


def _load_vectors() -> dict:
    if not VECTORS.is_file():
        pytest.skip("../shared not present (a user's clone): external vectors skipped")
    return json.loads(VECTORS.read_text(encoding="utf-8"))


# --------------------------------------------------------------------------
# CRC
# --------------------------------------------------------------------------


@pytest.mark.parametrize("variant", ["selftest", "selftest_bitwise"])
def test_crc_check_value(c_build, variant):
    # CRC RevEng catalogue, CRC-16/IBM-3740 (a.k.a. CCITT-FALSE): check=0x29b1
    res = _run(c_build[variant], ["crc"], b"123456789")
    assert res.returncode == 0
    assert res.stdout.strip() == b"29B1"


@pytest.mark.parametrize("variant", ["selftest", "selftest_bitwise"])
def test_crc_random_data(c_build, variant):
    rng = np.random.default_rng(20240611)
    for length in (0, 1, 2, 17, 255, 1000):
        data = rng.integers(0, 256, length, dtype=np.uint8).tobytes()
        res = _run(c_build[variant], ["crc"], data)
        # Python standard library: binascii.crc_hqx is CRC 0x1021, non-reflected, given init
        assert int(res.stdout, 16) == binascii.crc_hqx(data, 0xFFFF), length


# --------------------------------------------------------------------------
# frames against the independent vectors
# --------------------------------------------------------------------------


def test_vector_samples_match(c_build):
    # shared/vectors/packets.json: encoded by a program independent of this project
    cases = [c for c in _load_vectors()["cases"] if c.get("expect", {}).get("kind") == "samples"]
    assert len(cases) >= 5
    packets = [fp.Samples(e["seq"], e["t_us"], e["status"], tuple(e["codes"])) for e in (c["expect"] for c in cases)]
    got = _c_frames(c_build["selftest"], [_spec(p) for p in packets])
    labels = [c["name"] for c in cases]
    _assert_frames_equal(got, [bytes.fromhex(c["hex"]) for c in cases], labels)
    # and the project's Python encoder agrees with both
    _assert_frames_equal(got, [fp.encode_packet(p) for p in packets], labels)


def test_vector_text_packets_match(c_build):
    # shared/vectors/packets.json: hello, reply and note made independently
    cases = [c for c in _load_vectors()["cases"] if c.get("expect", {}).get("kind") in ("hello", "reply", "note")]
    assert {c["expect"]["kind"] for c in cases} == {"hello", "reply", "note"}
    specs, want = [], []
    for case in cases:
        frame = bytes.fromhex(case["hex"])
        kind, body = _ref_decode(frame)
        expect = case["expect"]
        if expect["kind"] == "hello":
            # the device sends the JSON text it was given; take the vector's own text
            assert json.loads(body.decode("utf-8")) == expect["info"]
        else:
            assert body == expect["text"].encode("utf-8")
        specs.append(f"{TEXT_KIND[kind]} {body.hex()}")
        want.append(frame)
    _assert_frames_equal(_c_frames(c_build["selftest"], specs), want, [c["name"] for c in cases])


# --------------------------------------------------------------------------
# frames against the Python encoder, many random packets
# --------------------------------------------------------------------------


def _random_codes(rng: np.random.Generator, n: int) -> tuple[int, ...]:
    mode = rng.integers(0, 3)
    if mode == 0:  # a 12-bit ADC
        codes = rng.integers(0, 4096, n)
    elif mode == 1:  # full 16-bit range
        codes = rng.integers(0, 65536, n)
    else:  # heavy on zero bytes, the interesting case for COBS
        codes = rng.choice(np.array([0, 0x0100, 0x00FF, 0xFF00, 0x0001, 0xFFFF]), n)
    return tuple(int(c) for c in codes)


def _random_samples(rng: np.random.Generator, count: int) -> list[fp.Samples]:
    out = []
    for _ in range(count):
        band = rng.integers(0, 3)
        n = int(rng.integers(0, 17) if band == 0 else rng.integers(17, 122) if band == 1 else rng.integers(122, 256))
        out.append(
            fp.Samples(
                seq=int(rng.integers(0, 65536)),
                t_us=int(rng.integers(0, 2**32)),
                status=int(rng.integers(0, 4)),
                codes=_random_codes(rng, n),
            )
        )
    return out


def _full_last_block_packet(rng: np.random.Generator) -> fp.Samples:
    """127 channels whose un-stuffed bytes end in a zero and then exactly 254
    non-zero bytes: the COBS case where encoders may differ by a final 0x01."""
    while True:
        rest = rng.integers(1, 256, (126, 2))
        codes = (0x0012, *(int(lo | hi << 8) for lo, hi in rest))
        pkt = fp.Samples(seq=0x0101, t_us=0x01010101, status=1, codes=codes)
        raw = fp.cobs_decode(fp.encode_packet(pkt)[:-1])
        if raw[10] == 0 and 0 not in raw[11:]:
            return pkt


def test_random_samples_match_python(c_build):
    rng = np.random.default_rng(7)
    packets = _random_samples(rng, 400)
    packets.append(_full_last_block_packet(rng))
    packets.append(fp.Samples(seq=65535, t_us=2**32 - 1, status=3, codes=(65535,) * 255))
    packets.append(fp.Samples(seq=0, t_us=0, status=0, codes=(0,) * 255))
    want = [fp.encode_packet(p) for p in packets]
    # the sample really covers multi-block COBS and the trailing-full-block case
    assert sum(len(w) > 256 for w in want) > 50
    assert want[400].endswith(b"\x01\x00")
    got = _c_frames(c_build["selftest"], [_spec(p) for p in packets])
    _assert_frames_equal(got, want, [f"packet {i}: {_spec(p)[:60]}" for i, p in enumerate(packets)])
    for frame, pkt in zip(got, packets):
        # independent decoder (cobs package + binascii) recovers the fields
        kind, body = _ref_decode(frame)
        assert kind == fp.KIND_SAMPLES
        assert int.from_bytes(body[0:2], "little") == pkt.seq
        assert int.from_bytes(body[2:6], "little") == pkt.t_us
        assert body[6] == pkt.status and body[7] == len(pkt.codes)
        assert tuple(np.frombuffer(body[8:], "<u2").tolist()) == pkt.codes


def _random_text(rng: np.random.Generator, max_bytes: int) -> str:
    alphabet = "abcXYZ 0123456789_-.:/{}\"\\" + "µ°éß→✓" + "\U0001F9EA"
    while True:
        text = "".join(rng.choice(list(alphabet), int(rng.integers(0, max_bytes // 2))))
        if len(text.encode("utf-8")) <= max_bytes:
            return text


def test_random_text_packets_match_python(c_build):
    rng = np.random.default_rng(11)
    packets: list = []
    for i in range(150):
        text = _random_text(rng, 512)
        if i % 3 == 0:
            packets.append(fp.Reply(("OK " if i % 2 else "ERR ") + text[:200]))
        elif i % 3 == 1:
            packets.append(fp.Note(text))
        else:
            packets.append(
                fp.Hello({"protocol": 1, "firmware": text[:100], "adc_bits": int(rng.integers(8, 17)),
                          "channels": int(rng.integers(1, 33)), "rate_hz": float(rng.integers(1, 5000)) / 4})
            )
    packets += [fp.Reply(""), fp.Note("x" * 512), fp.Note("y" * 253), fp.Note("z" * 251)]
    want = [fp.encode_packet(p) for p in packets]
    got = _c_frames(c_build["selftest"], [_spec(p) for p in packets])
    _assert_frames_equal(got, want, [repr(p)[:80] for p in packets])


def test_text_longer_than_limit_refused(c_build):
    # TC_TEXT_MAX is 512: the builder must refuse 513 bytes rather than make a
    # frame a host's noise guard (MAX_FRAME_BYTES) may throw away
    ok = _run(c_build["selftest"], ["frames"], b"N " + (b"41" * 512) + b"\n")
    assert ok.returncode == 0 and ok.stdout == fp.encode_packet(fp.Note("A" * 512))
    assert len(ok.stdout) - 1 <= fp.MAX_FRAME_BYTES  # frame without its delimiter
    refused = _run(c_build["selftest"], ["frames"], b"N " + (b"41" * 513) + b"\n")
    assert refused.returncode == 3 and b"refused" in refused.stderr and refused.stdout == b""


def test_bare_cobs_edge_lengths(c_build):
    rng = np.random.default_rng(3)
    datas = []
    for length in (0, 1, 2, 252, 253, 254, 255, 256, 507, 508, 509, 600):
        datas.append(bytes(rng.integers(1, 256, length, dtype=np.uint8)))  # no zeros
        datas.append(bytes(length))  # only zeros
        mixed = rng.integers(0, 256, length, dtype=np.uint8)
        mixed[rng.random(length) < 0.5] = 1
        datas.append(bytes(mixed))
        if length:
            datas.append(bytes(rng.integers(1, 256, length - 1, dtype=np.uint8)) + b"\x00")
    got = _c_frames(c_build["selftest"], ["X " + d.hex() for d in datas])
    want = [fp.cobs_encode(d) + b"\x00" for d in datas]
    _assert_frames_equal(got, want, [f"{len(d)} bytes, {d.count(0)} zeros" for d in datas])
    for frame, data in zip(got, datas):
        # the cobs package (independent implementation) decodes what C wrote
        assert cobs_ref.decode(frame[:-1]) == data


def test_crc_variants_make_identical_frames(c_build):
    rng = np.random.default_rng(5)
    specs = [_spec(p) for p in _random_samples(rng, 40)]
    assert _c_frames(c_build["selftest"], specs) == _c_frames(c_build["selftest_bitwise"], specs)


def test_library_needs_no_runtime_library(c_build):
    # A freestanding build of the library may call nothing outside itself:
    # no malloc, no stdio, not even memcpy.
    nm = shutil.which("nm")
    if nm is None:
        pytest.skip("nm not on PATH: undefined-symbol check skipped")
    res = subprocess.run([nm, "-u", str(c_build["lib_obj"])], capture_output=True, text=True, timeout=30)
    assert res.returncode == 0
    assert res.stdout.split() == []


# --------------------------------------------------------------------------
# command parser
# --------------------------------------------------------------------------


def _c_commands(c_build, data: bytes, cap: int | None = None) -> list[str]:
    res = _run(c_build["selftest"], ["commands", *([] if cap is None else [str(cap)])], data)
    assert res.returncode == 0, res.stderr
    return res.stdout.decode("ascii").splitlines()


def test_command_parser_valid(c_build):
    got = _c_commands(
        c_build,
        b"HELLO?\nSTART\nSTOP\nRATE 500\r\n  RATE\t12.5  \nRATE 0.001\nRATE 007\nRATE 250.\nRATE .5\n"
        b"RATE 12.3456\nRATE 4294967.295\n\n   \nSTART\n",
    )
    assert got == [
        "HELLO", "START", "STOP", "RATE 500000 500", "RATE 12500 12.5", "RATE 1 0.001",
        "RATE 7000 7", "RATE 250000 250", "RATE 500 0.5", "RATE 12346 12.346",
        "RATE 4294967295 4294967.295", "START",
    ]


def test_command_parser_errors(c_build):
    got = _c_commands(
        c_build,
        b"RATE abc\nRATE\nRATE 0\nRATE -5\nRATE 0.0004\nRATE 1e3\nRATE 4294967.296\nRATE 1 2\n"
        b"START now\nHELLO? x\nhello?\nFLY\nSTARTSTOP\n",
    )
    assert got == ["ERR 3 bad rate"] * 8 + ["ERR 2 command takes no argument"] * 2 + ["ERR 1 unknown command"] * 3


def test_command_parser_overlong_line(c_build):
    fits = b"RATE 100" + b" " * 8  # exactly 16 bytes
    got = _c_commands(c_build, fits + b"\n" + b"START" + b"x" * 100 + b"\n" + b"STOP\n" + fits + b" \nSTART\n", cap=16)
    # one ERR for the whole overlong line (not one per chunk), then clean recovery
    assert got == ["RATE 100000 100", "ERR 4 line too long", "STOP", "ERR 4 line too long", "START"]
    # a truncated prefix must not run: "START" hides at the front of an overlong line
    assert _c_commands(c_build, b"START" + b" " * 40 + b"junk\n", cap=32) == ["ERR 4 line too long"]


def test_command_parser_agrees_with_host_parser(c_build):
    # firmware_protocol.parse_command says how the host expects a device to parse
    lines = [b"HELLO?", b"START", b"STOP", b"  START  ", b"RATE 500", b"RATE 12.5", b"RATE 0.25",
             b"RATE abc", b"RATE", b"RATE 0", b"RATE -1", b"START now", b"FOO", b"hello?"]
    got = _c_commands(c_build, b"".join(line + b"\n" for line in lines))
    assert len(got) == len(lines)
    for line, c_out in zip(lines, got):
        try:
            word, rate = fp.parse_command(line)
        except fp.CommandError:
            assert c_out.startswith("ERR"), line
            continue
        if word == "RATE":
            assert c_out.split()[:2] == ["RATE", str(round(rate * 1000))], line
        else:
            assert c_out == word.rstrip("?"), line


# --------------------------------------------------------------------------
# the example main loop on a simulated board
# --------------------------------------------------------------------------


def _demo(c_build, *args) -> tuple[dict, list, fp.StreamDecoder]:
    res = _run(c_build["demo"], [str(a) for a in args], b"")
    assert res.returncode == 0 and res.stderr == b"", res.stderr.decode(errors="replace")
    dec = fp.StreamDecoder()
    items = []
    # odd chunk sizes, as a serial port delivers them
    rng = np.random.default_rng(1)
    data, pos = res.stdout, 0
    while pos < len(data):
        step = int(rng.integers(1, 4096))
        items += dec.feed(data[pos : pos + step])
        pos += step
    blocks = [it for it in items if isinstance(it, fp.SampleBlock)]
    samples = {
        "seq": np.concatenate([b.seq for b in blocks]).astype(np.int64),
        "t_us": np.concatenate([b.t_us for b in blocks]).astype(np.int64),
        "status": np.concatenate([b.status for b in blocks]),
        "codes": np.concatenate([b.codes for b in blocks]),
    }
    controls = [it for it in items if not isinstance(it, fp.SampleBlock)]
    return samples, controls, dec


def test_demo_stream_decodes_contiguously(c_build):
    n = 70_000  # more than 65536: seq wraps; the clock starts 0.3 s before its wrap
    s, controls, dec = _demo(c_build, n, 1000)
    assert dec.dropped == 0 and dec.drops == {cause: 0 for cause in fp.DROP_CAUSES}
    assert len(s["seq"]) == n
    # host-side unwrapping as firmware_protocol/PROTOCOL.md describes: differences modulo the wrap
    assert np.all(np.diff(s["seq"]) % 65536 == 1)
    assert s["seq"][0] == 0 and np.any(np.diff(s["seq"]) < 0)
    assert np.all(np.diff(s["t_us"]) % 2**32 == 1000)  # exact 1 kHz pacing
    assert np.any(np.diff(s["t_us"]) < 0)  # the 32-bit clock wrapped inside the stream
    assert not s["status"].any()
    # a healthy divider chain: v0 > v1 > ... > v5 > 0, 12-bit codes
    codes = s["codes"].astype(np.int64)
    assert codes.shape == (n, 6)
    assert np.all(np.diff(codes, axis=1) < 0) and codes.min() > 0 and codes.max() < 4096
    assert codes[:, 0].max() - codes[:, 0].min() > 50  # and it moves

    hellos = [c for c in controls if isinstance(c, fp.Hello)]
    replies = [c.text for c in controls if isinstance(c, fp.Reply)]
    assert len(hellos) == 3  # at boot, for HELLO? before START and for HELLO? mid-stream
    for h in hellos:
        assert h.info["protocol"] == 1 and h.info["channels"] == 6 and h.info["adc_bits"] == 12
        assert isinstance(h.info["firmware"], str)
    assert [h.info["rate_hz"] for h in hellos] == [500, 500, 1000]
    assert replies == ["ERR bad rate", "OK RATE 1000", "OK START", "OK STOP"]


def test_demo_late_sample_flagged(c_build):
    s, controls, dec = _demo(c_build, 50, 1000, 20)  # sample 20's ADC read stalls 2.5 ms
    assert dec.dropped == 0 and len(s["seq"]) == 50
    assert np.all(np.diff(s["seq"]) % 65536 == 1)  # late is not lost: no seq gap
    late = np.flatnonzero(s["status"] & fp.STATUS_LATE)
    assert late.tolist() == [21]
    gaps = np.diff(s["t_us"]) % 2**32
    assert gaps[20] == 2500 and np.all(np.delete(gaps, 20) == 1000)
    assert not (s["status"] & fp.STATUS_TX_OVERFLOW).any()
    assert any(isinstance(c, fp.Note) and "late" in c.text for c in controls)


def test_demo_transmit_overflow_flagged(c_build):
    # 1 kHz of 25-byte frames is 250 kbit/s: a 230400-baud line falls a little
    # short, so after the queue fills some frames drop and most still go out
    n = 3000
    s, controls, dec = _demo(c_build, n, 1000, -1, 230400)
    assert dec.dropped == 0  # frames are dropped whole on the device, never cut
    steps = np.diff(s["seq"]) % 65536
    first_gap = int(np.argmax(steps > 1))
    assert steps.max() > 1
    # after the first loss, both clean steps and gaps occur: the flag must clear
    assert (steps[first_gap:] == 1).sum() > 100 and (steps[first_gap:] > 1).sum() > 20
    lost = int((steps - 1).sum())
    assert len(s["seq"]) + lost == n
    overflow = (s["status"] & fp.STATUS_TX_OVERFLOW) != 0
    # bit 1 is set exactly on the packets that follow a gap
    assert np.array_equal(overflow[1:], steps > 1)
    assert not overflow[0]
    # control packets wait for room instead of dropping, even on a full queue
    replies = [c.text for c in controls if isinstance(c, fp.Reply)]
    assert replies[-2:] == ["OK START", "OK STOP"]
    assert sum(isinstance(c, fp.Hello) for c in controls) == 3


def test_demo_fractional_rate_does_not_drift(c_build):
    s, controls, dec = _demo(c_build, 1000, "333.333")
    assert dec.dropped == 0 and len(s["seq"]) == 1000
    replies = [c.text for c in controls if isinstance(c, fp.Reply)]
    assert "OK RATE 333.333" in replies
    span = int((s["t_us"][-1] - s["t_us"][0]) % 2**32)
    # 999 periods of 10^9 / 333333 us = 2997002.997 us: no accumulated rounding
    assert abs(span - 999 * 1e9 / 333333) < 1.0
    assert set((np.diff(s["t_us"]) % 2**32).tolist()) <= {3000, 3001}


def test_protocol_document_example(c_build):
    # the worked example in PROTOCOL.md must be what both encoders produce
    doc = (C_DIR.parent / "PROTOCOL.md").read_text(encoding="utf-8")
    wire = "07 01 01 02 40 42 0f 05 02 04 b8 0b 04 08 4c 04 04 01 16 99 00"
    raw = "01 01 02 40 42 0f 00 02 04 b8 0b 00 08 4c 04 00 01 16 99"
    assert wire in doc and raw in doc
    pkt = fp.Samples(seq=513, t_us=1_000_000, status=2, codes=(3000, 2048, 1100, 256))
    assert _c_frames(c_build["selftest"], [_spec(pkt)]) == [bytes.fromhex(wire)]
    assert fp.encode_packet(pkt) == bytes.fromhex(wire)
    assert cobs_ref.decode(bytes.fromhex(wire)[:-1]) == bytes.fromhex(raw)
    reply = "0f 03 4f 4b 20 52 41 54 45 20 35 30 30 7a 2f 00"
    assert reply in doc
    assert _c_frames(c_build["selftest"], [_spec(fp.Reply("OK RATE 500"))]) == [bytes.fromhex(reply)]


def test_demo_refuses_rate_out_of_range(c_build):
    # the example board allows at most 5 kHz; a refused RATE leaves the rate alone
    s, controls, dec = _demo(c_build, 20, 6000)
    replies = [c.text for c in controls if isinstance(c, fp.Reply)]
    assert replies == ["ERR bad rate", "ERR rate out of range", "OK START", "OK STOP"]
    assert np.all(np.diff(s["t_us"]) % 2**32 == 2000)  # still the boot rate, 500 Hz


def test_demo_stream_through_pty_and_record(c_build, tmp_path):
    """The C encoder's output through the host's whole path: pty -> `tapcurve record` -> HDF5.

    A relay thread plays the demo board's byte stream into a real
    pseudo-terminal once the host has asked for a hello; the recording must
    hold the demo's samples, contiguous and unchanged.
    """
    import os
    import select
    import sys
    import threading
    import tty

    import h5py

    stream = _run(c_build["demo"], ["3000", "1000"], b"").stdout
    want, _, _ = _demo(c_build, 3000, 1000)
    master, slave = os.openpty()
    tty.setraw(slave)
    port = os.ttyname(slave)
    stop = threading.Event()

    def relay():
        asked = b""
        while not stop.is_set() and b"HELLO?" not in asked:
            if select.select([master], [], [], 0.1)[0]:
                asked += os.read(master, 1024)
        for i in range(0, len(stream), 4096):  # blocking writes: the pty paces the relay
            if stop.is_set():
                return
            os.write(master, stream[i : i + 4096])
        while not stop.is_set():  # keep reading host commands so the pty never fills
            if select.select([master], [], [], 0.1)[0]:
                os.read(master, 1024)

    thread = threading.Thread(target=relay, daemon=True)
    thread.start()
    rig = tmp_path / "six.toml"
    rig.write_text(
        "[sensor]\nsegment_lengths_mm = [16, 16, 16, 16, 16, 16]\n"
        "[readout]\nkind = 'divider'\nr_ref_ohm = 10000.0\n"
        "channels = ['tap0', 'tap1', 'tap2', 'tap3', 'tap4', 'tap5']\n"
    )
    out = tmp_path / "c_demo.h5"
    try:
        res = subprocess.run(
            [sys.executable, "-m", "display.cli", "record", "--port", port, "--rig", str(rig),
             "--out", str(out), "--duration", "2", "--quiet"],
            capture_output=True, text=True, timeout=60, cwd=Path(__file__).resolve().parents[2],
        )
    finally:
        stop.set()
        thread.join(5)
        os.close(master)
        os.close(slave)
    assert res.returncode == 0, res.stderr
    with h5py.File(out, "r") as f:
        seq = f["raw/seq"][:]
        adc = f["raw/adc"][:]
        t = f["raw/t_device_s"][:]
    assert seq.shape == (2000,) and (np.diff(seq) == 1).all()
    assert seq[0] == want["seq"][0]
    assert (adc == want["codes"][:2000]).all()
    # the demo's clock wraps 0.3 s in: unwrapped time keeps 1 ms steps across it
    assert np.allclose(np.diff(t), 1e-3)
