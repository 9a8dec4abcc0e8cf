"""Encode many sample packets at once (used by the virtual device and benchmarks)."""
from __future__ import annotations

import numpy as np

from .cobs import cobs_encode_rows
from .crc import crc16_rows
from .packets import KIND_SAMPLES, Samples, encode_packet

__all__ = ["encode_samples_bulk"]


def encode_samples_bulk(*, seq: np.ndarray, t_us: np.ndarray, status: np.ndarray, codes: np.ndarray) -> bytes:
    """Wire bytes of M sample packets, identical to M calls of ``encode_packet``.

    Parameters
    ----------
    seq : array of int, shape (M,)
        Taken modulo 65536.
    t_us : array of int, shape (M,)
        Taken modulo 2**32.
    status : array of int, shape (M,)
    codes : array of uint16, shape (M, C)
    """
    codes = np.asarray(codes, dtype=np.uint16)
    m, n = codes.shape
    raw_len = 11 + 2 * n
    if raw_len > 253:
        # longer packets need more than one COBS block: rare, per packet
        return b"".join(
            encode_packet(Samples(int(s), int(t), int(st), tuple(c)))
            for s, t, st, c in zip(np.asarray(seq), np.asarray(t_us), np.asarray(status), codes.tolist())
        )
    raw = np.empty((m, raw_len), dtype=np.uint8)
    raw[:, 0] = KIND_SAMPLES
    raw[:, 1:3] = (np.asarray(seq, dtype=np.int64) & 0xFFFF).astype("<u2").view(np.uint8).reshape(m, 2)
    raw[:, 3:7] = (np.asarray(t_us, dtype=np.int64) & 0xFFFFFFFF).astype("<u4").view(np.uint8).reshape(m, 4)
    raw[:, 7] = np.asarray(status, dtype=np.uint8)
    raw[:, 8] = n
    raw[:, 9 : 9 + 2 * n] = codes.astype("<u2").view(np.uint8).reshape(m, 2 * n)
    crc = crc16_rows(raw[:, : raw_len - 2])
    raw[:, raw_len - 2] = (crc & 0xFF).astype(np.uint8)
    raw[:, raw_len - 1] = (crc >> 8).astype(np.uint8)
    return cobs_encode_rows(raw).tobytes()
