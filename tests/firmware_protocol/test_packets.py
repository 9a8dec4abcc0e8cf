"""Packets: the independently made vectors, round trips, and the drop causes."""
from __future__ import annotations

import numpy as np
import pytest

from firmware_protocol import (
    Hello,
    Note,
    PacketError,
    Reply,
    SampleBlock,
    Samples,
    StreamDecoder,
    decode_frame,
    decode_stream,
    encode_packet,
    encode_samples_bulk,
)


def _single_cases(vectors):
    return [c for c in vectors["cases"] if "hex" in c]


def test_every_vector_case(packet_vectors):
    # ../shared/vectors/packets.json: encoded by an encoder written outside the project
    seen = 0
    for case in _single_cases(packet_vectors):
        wire = bytes.fromhex(case["hex"])
        assert wire.endswith(b"\x00"), case["name"]
        expect = case["expect"]
        if "error" in expect:
            with pytest.raises(PacketError) as info:
                decode_frame(wire[:-1])
            assert info.value.cause == expect["error"], case["name"]
            items, drops = decode_stream(wire)
            assert items == [] and drops[expect["error"]] == 1, case["name"]
            seen += 1
            continue
        pkt = decode_frame(wire[:-1])
        kind = expect["kind"]
        if kind == "samples":
            assert isinstance(pkt, Samples)
            assert (pkt.seq, pkt.t_us, pkt.status, list(pkt.codes)) == (
                expect["seq"], expect["t_us"], expect["status"], expect["codes"]
            ), case["name"]
            # the stream path gives the same fields
            (block,), _ = decode_stream(wire)
            assert isinstance(block, SampleBlock)
            assert block.codes.tolist() == [expect["codes"]]
        elif kind == "hello":
            assert isinstance(pkt, Hello) and pkt.info == expect["info"]
        elif kind == "reply":
            assert isinstance(pkt, Reply) and pkt.text == expect["text"]
        elif kind == "note":
            assert isinstance(pkt, Note) and pkt.text == expect["text"]
        else:
            pytest.fail(f"vector kind {kind} not handled")
        # our encoder reproduces the outside encoder byte for byte
        assert encode_packet(pkt) == wire, case["name"]
        seen += 1
    assert seen >= 15


def test_vector_stream(packet_vectors):
    case = next(c for c in packet_vectors["cases"] if "stream_hex" in c)
    data = bytes.fromhex(case["stream_hex"])
    for chunk in (1, 3, len(data)):
        dec = StreamDecoder()
        seqs = []
        for i in range(0, len(data), chunk):
            for item in dec.feed(data[i : i + chunk]):
                if isinstance(item, SampleBlock):
                    seqs += item.seq.tolist()
        assert seqs == case["expect_samples_seq"]
        assert dec.dropped >= case["expect_min_dropped"]


def test_bulk_encoder_matches_single():
    rng = np.random.default_rng(11)
    for n in (0, 1, 6, 16, 121, 200):  # 200 channels: packets beyond one COBS block
        m = 30
        codes = rng.integers(0, 65536, (m, n)).astype(np.uint16)
        seq = rng.integers(0, 2**20, m)
        t_us = rng.integers(0, 2**40, m)
        status = rng.integers(0, 4, m)
        wire = encode_samples_bulk(seq=seq, t_us=t_us, status=status, codes=codes)
        single = b"".join(
            encode_packet(Samples(int(s) & 0xFFFF, int(t) & 0xFFFFFFFF, int(st), tuple(c)))
            for s, t, st, c in zip(seq, t_us, status, codes.tolist())
        )
        assert wire == single, n


def test_text_packets_round_trip():
    for pkt in (Hello({"protocol": 1, "channels": 3, "x": "ü"}), Reply("ERR bad rate"), Note("warm")):
        assert decode_frame(encode_packet(pkt)[:-1]) == pkt


def test_body_errors():
    from firmware_protocol.crc import crc16
    import struct

    def frame(raw):
        raw += struct.pack("<H", crc16(raw))
        return encode_packet.__globals__["cobs_encode"](raw)

    with pytest.raises(PacketError) as info:
        decode_frame(frame(b"\x02[1,2]"))  # hello that is JSON but not an object
    assert info.value.cause == "body"
    with pytest.raises(PacketError) as info:
        decode_frame(frame(b"\x03\xff\xfe"))  # reply that is not UTF-8
    assert info.value.cause == "body"
