"""Benchmark: bulk stream decoding against a straightforward per-packet Python loop.

Run by hand: ``.venv/bin/python bench/bench_decode.py`` (add ``--quick`` for a
short check). Both sides decode the same bytes: 16-channel sample packets of
12-bit codes. Target: the bulk path at least 30x faster.
"""
from __future__ import annotations

import argparse
import json
import struct
import time

import numpy as np

from firmware_protocol import cobs_decode, crc16, decode_stream, encode_samples_bulk


def per_packet_loop(wire: bytes) -> list:
    """The straightforward way: split at 0x00, then COBS, CRC and fields per packet."""
    out = []
    for frame in wire.split(b"\x00")[:-1]:
        raw = cobs_decode(frame)
        if len(raw) < 3 or crc16(raw[:-2]) != struct.unpack_from("<H", raw, len(raw) - 2)[0]:
            continue
        if raw[0] != 1:
            continue
        seq, t_us, status, n = struct.unpack_from("<HIBB", raw, 1)
        codes = struct.unpack_from(f"<{n}H", raw, 9)
        out.append((seq, t_us, status, codes))
    return out


def best_of(fn, repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--packets", type=int, default=200_000)
    ap.add_argument("--channels", type=int, default=16)
    ap.add_argument("--quick", action="store_true", help="small run that only checks the benchmark works")
    args = ap.parse_args(argv)
    m = 5_000 if args.quick else args.packets
    rng = np.random.default_rng(0)
    codes = rng.integers(0, 4096, (m, args.channels)).astype(np.uint16)
    wire = encode_samples_bulk(
        seq=np.arange(m), t_us=np.arange(m) * 40, status=np.zeros(m, dtype=np.uint8), codes=codes
    )
    items, _ = decode_stream(wire)
    assert sum(len(i) for i in items) == m
    assert len(per_packet_loop(wire)) == m
    repeats = 2 if args.quick else 5
    t_bulk = best_of(lambda: decode_stream(wire), repeats)
    t_loop = best_of(lambda: per_packet_loop(wire), max(1, repeats // 2))
    result = {
        "packets": m,
        "channels": args.channels,
        "bytes": len(wire),
        "bulk_s": t_bulk,
        "loop_s": t_loop,
        "bulk_packets_per_s": m / t_bulk,
        "loop_packets_per_s": m / t_loop,
        "speedup": t_loop / t_bulk,
    }
    print(json.dumps(result, indent=1))
    return result


if __name__ == "__main__":
    main()
