"""Coverage-guided fuzzing of the stream decoder with atheris (libFuzzer for Python).

Each input is split into a chunk-size byte and a payload; the payload is fed to
a StreamDecoder in chunks of that size, then the same bytes in one piece. The
harness fails on any exception, on a drop count or packet list that depends
on the chunking, or on a sample packet that does not re-encode to bytes that
occur in the input (a packet that was never sent).

Run by hand (not part of the test suite; needs ``pip install atheris``):

    .venv/bin/python bench/fuzz_decoder.py -runs=1000000 -max_len=2048

``--quick`` runs 2,000 inputs for the benchmark smoke test.
"""
from __future__ import annotations

import json
import sys
import time

import atheris
import numpy  # noqa: F401  imported first so that only our code is instrumented

with atheris.instrument_imports(include=["firmware_protocol"]):
    import firmware_protocol as fp
    from firmware_protocol import Hello, Note, Reply, SampleBlock, Samples, StreamDecoder, encode_packet

_seen = {"inputs": 0, "packets": 0, "runs": None, "t0": time.monotonic()}


def _report() -> None:
    # libFuzzer ends the process with C exit(): report from inside the last run
    print(json.dumps({"inputs": _seen["inputs"], "packets_checked": _seen["packets"],
                      "seconds": round(time.monotonic() - _seen["t0"], 1)}), flush=True)


def _as_packets(items):
    out = []
    for it in items:
        if isinstance(it, SampleBlock):
            for s, t, st, c in zip(it.seq.tolist(), it.t_us.tolist(), it.status.tolist(), it.codes.tolist()):
                out.append(Samples(s, t, st, tuple(c)))
        else:
            out.append(it)
    return out


def test_one_input(data: bytes) -> None:
    _seen["inputs"] += 1
    if _seen["runs"] is not None and _seen["inputs"] >= _seen["runs"]:
        _report()
    if not data:
        return
    chunk = 8 + 4 * data[0]  # 8..1028 bytes per feed, as serial reads deliver them
    payload = data[1:]
    dec = StreamDecoder()
    got = []
    for i in range(0, len(payload), chunk):
        got += dec.feed(payload[i : i + chunk])
    whole = StreamDecoder()
    ref = whole.feed(payload)
    a, b = _as_packets(got), _as_packets(ref)
    if a != b or dec.drops != whole.drops:
        raise AssertionError("result depends on chunking")
    for pkt in a:
        _seen["packets"] += 1
        wire = encode_packet(pkt)[:-1]
        if isinstance(pkt, (Samples, Reply, Note)) and wire not in payload:
            # a decoded packet must come from bytes that were in the stream
            raise AssertionError(f"packet not in input: {pkt!r}")
        if isinstance(pkt, Hello) and not isinstance(pkt.info, dict):
            raise AssertionError("hello info is not a dict")


def _seed_corpus() -> str:
    """A temporary corpus of valid streams, so fuzzing starts from real packets."""
    import os
    import tempfile

    import numpy as np

    folder = tempfile.mkdtemp(prefix="tapcurve-fuzz-")
    rng = np.random.default_rng(1)
    seeds = []
    for n in (0, 1, 6, 16, 130):
        codes = rng.integers(0, 4096, (3, n)).astype(np.uint16)
        seeds.append(fp.encode_samples_bulk(seq=np.arange(65534, 65537), t_us=np.arange(3) * 1000,
                                            status=np.array([0, 1, 3]), codes=codes))
    seeds.append(encode_packet(Hello({"protocol": 1, "channels": 6, "rate_hz": 1000, "adc_bits": 12})))
    seeds.append(encode_packet(Reply("OK RATE 500")) + encode_packet(Note("warm")))
    seeds.append(b"\x13\x37\xff\x00" + seeds[2][:7] + seeds[2])
    for k, seed in enumerate(seeds):
        with open(os.path.join(folder, f"seed{k}"), "wb") as fh:
            fh.write(bytes([k * 37 % 256]) + seed)
    return folder


def main() -> None:
    argv = list(sys.argv)
    if "--quick" in argv:
        argv = [a for a in argv if a != "--quick"] + ["-runs=2000", "-max_len=1024"]
    for a in argv:
        if a.startswith("-runs="):
            _seen["runs"] = int(a.split("=", 1)[1])
    if not any(not a.startswith("-") for a in argv[1:]):
        argv.append(_seed_corpus())
    atheris.Setup(argv, test_one_input)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
