"""Consistent Overhead Byte Stuffing (Cheshire & Baker, IEEE/ACM Trans. Networking, 1999).

The encoded form holds no 0x00 byte, so 0x00 can delimit packets on the wire.
Single-packet functions work block by block with ``bytes.find``; the ``*_rows``
functions encode or decode many packets of one length at once with numpy.
"""
from __future__ import annotations

import numpy as np

__all__ = ["cobs_encode", "cobs_decode", "cobs_encode_rows", "cobs_decode_rows", "CobsError"]


class CobsError(ValueError):
    """The bytes are not a valid COBS encoding."""


def cobs_encode(data: bytes) -> bytes:
    """Encode ``data`` with COBS. The result has no 0x00 and no delimiter."""
    out = bytearray()
    start = 0
    n = len(data)
    while True:
        zero = data.find(b"\x00", start, start + 254)
        if zero < 0:
            end = min(start + 254, n)
            block = data[start:end]
            if len(block) == 254:
                out.append(0xFF)
                out += block
                start = end
                if start == n:
                    # a full block at the very end still needs its final code
                    out.append(0x01)
                    return bytes(out)
                continue
            out.append(len(block) + 1)
            out += block
            return bytes(out)
        out.append(zero - start + 1)
        out += data[start:zero]
        start = zero + 1


def cobs_decode(data: bytes) -> bytes:
    """Decode one COBS frame (without its 0x00 delimiter).

    Raises
    ------
    CobsError
        On a 0x00 inside the frame or a code that points past its end.
    """
    if b"\x00" in data:
        raise CobsError("zero byte inside a COBS frame")
    out = bytearray()
    i = 0
    n = len(data)
    while i < n:
        code = data[i]
        end = i + code
        if end > n:
            raise CobsError("COBS code points past the end of the frame")
        out += data[i + 1 : end]
        i = end
        if code != 0xFF and i < n:
            out.append(0)
    return bytes(out)


def cobs_encode_rows(rows: np.ndarray) -> np.ndarray:
    """COBS-encode every row of a (M, L) uint8 array, L <= 253, appending 0x00.

    All rows of one length encode to L + 2 bytes (code byte, data, delimiter),
    so the result is a (M, L + 2) uint8 array: ``result.tobytes()`` is the wire
    stream. Owned by the caller.
    """
    rows = np.asarray(rows, dtype=np.uint8)
    m, length = rows.shape
    if length > 253:
        raise ValueError("cobs_encode_rows handles rows of at most 253 bytes")
    # ext: a virtual zero before the data (the code byte's slot) and after it
    ext = np.zeros((m, length + 2), dtype=np.uint8)
    ext[:, 1 : length + 1] = rows
    pos = np.arange(length + 2, dtype=np.int32)
    zero_pos = np.where(ext == 0, pos, length + 1)
    zero_pos[:, length + 1] = length + 1
    # nearest zero strictly after each position: reverse running minimum, shifted
    after = np.minimum.accumulate(zero_pos[:, ::-1], axis=1)[:, ::-1]
    nxt = np.empty_like(after)
    nxt[:, :-1] = after[:, 1:]
    nxt[:, -1] = length + 1
    out = ext.copy()
    is_zero = ext == 0
    is_zero[:, length + 1] = False
    out[is_zero] = (nxt - pos)[is_zero].astype(np.uint8)
    out[:, length + 1] = 0
    return out


def cobs_decode_rows(frames: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Decode many COBS frames of one length E (no delimiter), E <= 254.

    Parameters
    ----------
    frames : ndarray of uint8, shape (M, E)

    Returns
    -------
    decoded : ndarray of uint8, shape (M, E - 1)
        Valid only where ``ok`` is true. New array, owned by the caller.
    ok : ndarray of bool, shape (M,)
        False for frames whose chain of code bytes does not end exactly at the
        frame's end (a 0xFF code always fails here: with E <= 254 it points
        past the end), so they can take the single-frame path.
    """
    dec_t, ok = cobs_decode_columns(np.ascontiguousarray(np.asarray(frames, dtype=np.uint8).T))
    return np.ascontiguousarray(dec_t.T), ok


def cobs_decode_columns(frames_t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """As :func:`cobs_decode_rows` on transposed data: (E, M) in, (E - 1, M) out.

    Byte position j of every frame is the contiguous row ``frames_t[j]``, so
    one sweep over the E positions decodes all M frames: at each position,
    frames whose next code byte is here get a zero in the data and learn
    where their next code byte is.
    """
    enc_len, m = frames_t.shape
    decoded = frames_t[1:].copy()
    nxt = frames_t[0].astype(np.int16)
    # preallocated temporaries: this loop is the hot path of bulk decoding
    hit = np.empty(m, dtype=bool)
    hit_u8 = hit.view(np.uint8)
    tmp = np.empty(m, dtype=np.uint8)
    for col in range(1, enc_len):
        np.equal(nxt, col, out=hit)
        np.subtract(hit_u8, 1, out=tmp)  # 0x00 where a code byte stands, else 0xFF
        decoded[col - 1] &= tmp
        np.multiply(hit_u8, frames_t[col], out=tmp)
        nxt += tmp
    return decoded, nxt == enc_len
