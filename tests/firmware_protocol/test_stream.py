"""The stream decoder: any chunking, garbage, the bulk path equal to the per-frame path."""
from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from firmware_protocol import (
    Hello,
    Note,
    SampleBlock,
    Samples,
    StreamDecoder,
    decode_frame,
    decode_stream,
    encode_packet,
    encode_samples_bulk,
)


def _samples(items):
    out = []
    for it in items:
        if isinstance(it, SampleBlock):
            out += list(zip(it.seq.tolist(), it.t_us.tolist(), it.status.tolist(), map(tuple, it.codes.tolist())))
    return out


def _stream(m=300, n=6, seed=0):
    rng = np.random.default_rng(seed)
    codes = rng.integers(0, 4096, (m, n)).astype(np.uint16)
    seq = np.arange(m) + 65400  # crosses the 16-bit wrap
    t_us = (np.arange(m) * 1000 + 2**32 - 50_000) % 2**32
    status = rng.integers(0, 4, m)
    wire = encode_samples_bulk(seq=seq, t_us=t_us, status=status, codes=codes)
    expect = list(zip((seq & 0xFFFF).tolist(), t_us.tolist(), status.tolist(), map(tuple, codes.tolist())))
    return wire, expect


def test_bulk_equals_per_frame_loop():
    wire, expect = _stream(m=2000, n=16)
    items, drops = decode_stream(wire)
    assert _samples(items) == expect
    assert sum(drops.values()) == 0
    # the straightforward loop over frames gives the same packets
    loop = [decode_frame(f) for f in wire.split(b"\x00")[:-1]]
    assert [(p.seq, p.t_us, p.status, p.codes) for p in loop] == expect


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(min_value=1, max_value=97), min_size=1, max_size=40))
def test_any_chunking_same_packets(sizes):
    wire, expect = _stream(m=120)
    dec = StreamDecoder()
    got, pos, k = [], 0, 0
    while pos < len(wire):
        step = sizes[k % len(sizes)]
        got += dec.feed(wire[pos : pos + step])
        pos += step
        k += 1
    assert _samples(got) == expect
    assert dec.dropped == 0


def test_order_kept_between_kinds():
    wire, expect = _stream(m=40)
    hello = encode_packet(Hello({"protocol": 1, "channels": 6}))
    note = encode_packet(Note("half way"))
    half = wire.index(b"\x00", len(wire) // 2) + 1
    items, _ = decode_stream(hello + wire[:half] + note + wire[half:])
    kinds = [type(i).__name__ for i in items]
    assert kinds == ["Hello", "SampleBlock", "Note", "SampleBlock"]
    assert _samples(items) == expect


def test_mixed_channel_counts():
    a = encode_packet(Samples(1, 10, 0, (1, 2, 3)))
    b = encode_packet(Samples(2, 20, 0, (4, 5)))
    items, _ = decode_stream(a * 5 + b * 5 + a)
    assert [len(i) for i in items] == [5, 5, 1]
    assert [i.n_channels for i in items] == [3, 2, 3]


def test_garbage_between_packets_counted_and_packets_kept():
    wire, expect = _stream(m=200)
    frames = [f + b"\x00" for f in wire.split(b"\x00")[:-1]]
    rng = np.random.default_rng(5)
    noisy = b""
    for i, f in enumerate(frames):
        if i % 10 == 5:
            noisy += rng.integers(1, 256, 7, dtype=np.uint8).tobytes() + b"\x00"  # junk frame
        noisy += f
    items, drops = decode_stream(noisy)
    assert _samples(items) == expect
    assert sum(drops.values()) == 20


def test_noise_without_delimiter_is_bounded():
    dec = StreamDecoder(max_frame_bytes=600)
    dec.feed(b"\x01" * 5000)
    assert dec.drops["cobs"] == 1
    wire, expect = _stream(m=10)
    assert _samples(dec.feed(b"\x00" + wire)) == expect


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=400), st.integers(min_value=1, max_value=64))
def test_arbitrary_bytes_never_crash(junk, chunk):
    # property: arbitrary bytes neither crash the decoder nor make it invent sample packets
    wire, expect = _stream(m=5)
    data = junk + b"\x00" + wire
    dec = StreamDecoder()
    got = []
    for i in range(0, len(data), chunk):
        got += dec.feed(data[i : i + chunk])
    assert _samples(got)[-5:] == expect


def test_overlong_frame_same_for_any_chunking():
    # a frame longer than any legal packet counts once as "cobs", whether it comes whole or in pieces
    wire, expect = _stream(m=5)
    junk = b"\x05" * 6000 + b"\x00"
    for chunk in (7, 13, 600, 4500, len(junk) + len(wire)):
        dec = StreamDecoder()
        data = junk + wire
        got = []
        for i in range(0, len(data), chunk):
            got += dec.feed(data[i : i + chunk])
        assert _samples(got) == expect, chunk
        assert dec.drops["cobs"] == 1, (chunk, dec.drops)


def test_long_hello_is_kept():
    # a hello may carry many extra keys (firmware_protocol/PROTOCOL.md): 2 kB of JSON decodes whole
    info = {"protocol": 1, "channels": 6, "rate_hz": 1000, "adc_bits": 12, "notes": "x" * 2000}
    dec = StreamDecoder()
    items = []
    wire = encode_packet(Hello(info))
    for i in range(0, len(wire), 100):
        items += dec.feed(wire[i : i + 100])
    assert items == [Hello(info)] and dec.dropped == 0


def test_noise_is_fast_enough_and_invents_nothing():
    # 200 kB of random noise: no packet appears (CRC-16 gate), the decoder keeps going
    rng = np.random.default_rng(9)
    noise = rng.integers(0, 256, 200_000, dtype=np.uint8).tobytes()
    items, drops = decode_stream(noise + b"\x00")
    assert not any(isinstance(i, SampleBlock) for i in items)
    assert sum(drops.values()) > 100
