"""CRC-16/CCITT-FALSE and COBS against outside references."""
from __future__ import annotations

import cobs.cobs as ref_cobs  # reference codec from the package index (PyPI "cobs")
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from firmware_protocol import (
    CobsError,
    cobs_decode,
    cobs_decode_rows,
    cobs_encode,
    cobs_encode_rows,
    crc16,
    crc16_rows,
)


def test_crc_check_value():
    # CRC RevEng catalogue of parametrised CRC algorithms, CRC-16/IBM-3740
    # (alias CRC-16/CCITT-FALSE): check = 0x29B1 for ASCII "123456789"
    assert crc16(b"123456789") == 0x29B1


def test_crc_check_value_in_vectors(packet_vectors):
    # the same check value, as stated by the independently made vectors file
    chk = packet_vectors["crc_check"]
    assert crc16(chk["input_ascii"].encode()) == int(chk["value"], 16)


def test_crc_rows_equals_single():
    # the vectorised form must agree with the scalar form on random messages
    rng = np.random.default_rng(7)
    for length in (1, 2, 9, 41, 200):
        rows = rng.integers(0, 256, (50, length), dtype=np.uint8)
        expect = [crc16(r.tobytes()) for r in rows]
        assert crc16_rows(rows).tolist() == expect


# Cheshire & Baker, "Consistent Overhead Byte Stuffing", IEEE/ACM Trans.
# Networking 7(2), 1999: worked examples of the encoding (as reproduced in the
# paper's figures and widely quoted; exact byte strings from memory). The
# paper's reference code ends a run of 254 non-zero bytes at the very end with
# a final 0x01 code; some encoders (the 'cobs' package among them) omit it.
# Both decode to the same bytes; we follow the paper.
CHESHIRE_BAKER = [
    (b"\x00", b"\x01\x01"),
    (b"\x00\x00", b"\x01\x01\x01"),
    (b"\x11\x22\x00\x33", b"\x03\x11\x22\x02\x33"),
    (b"\x11\x22\x33\x44", b"\x05\x11\x22\x33\x44"),
    (b"\x11\x00\x00\x00", b"\x02\x11\x01\x01\x01"),
    (bytes(range(1, 255)), b"\xff" + bytes(range(1, 255)) + b"\x01"),
    (bytes(range(0, 255)), b"\x01\xff" + bytes(range(1, 255)) + b"\x01"),
]


@pytest.mark.parametrize("raw, encoded", CHESHIRE_BAKER)
def test_cobs_examples(raw, encoded):
    assert cobs_encode(raw) == encoded
    assert cobs_decode(encoded) == raw


@settings(max_examples=400, deadline=None)
@given(st.binary(max_size=700))
def test_cobs_matches_reference_codec(data):
    # property: our codec and the 'cobs' package (PyPI) agree on every input
    enc = cobs_encode(data)
    assert b"\x00" not in enc
    assert cobs_decode(enc) == data
    assert cobs_decode(ref_cobs.encode(data)) == data
    assert ref_cobs.decode(enc) == data


@settings(max_examples=200, deadline=None)
@given(st.binary(min_size=1, max_size=300).filter(lambda b: b"\x00" not in b))
def test_cobs_decode_agrees_on_garbage(frame):
    # on arbitrary frames both codecs accept or refuse alike, and agree when they accept
    try:
        ours = cobs_decode(frame)
    except CobsError:
        ours = None
    try:
        theirs = ref_cobs.decode(frame)
    except ref_cobs.DecodeError:
        theirs = None
    assert ours == theirs


def test_cobs_rows_match_single():
    rng = np.random.default_rng(3)
    for length in (1, 5, 43, 253):
        rows = rng.integers(0, 256, (40, length), dtype=np.uint8)
        rows[rng.random(rows.shape) < 0.2] = 0
        enc = cobs_encode_rows(rows)
        for r, e in zip(rows, enc):
            assert e.tobytes() == cobs_encode(r.tobytes()) + b"\x00"
        dec, ok = cobs_decode_rows(enc[:, :-1])
        assert ok.all()
        assert (dec == rows).all()


def test_cobs_rows_flag_invalid():
    enc = cobs_encode_rows(np.array([[1, 0, 2, 3]], dtype=np.uint8))[:, :-1].copy()
    enc[0, 0] = 9  # the first code now points past the end
    _, ok = cobs_decode_rows(enc)
    assert not ok[0]
    with pytest.raises(CobsError):
        cobs_decode(enc[0].tobytes())
