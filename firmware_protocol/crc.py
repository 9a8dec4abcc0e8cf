"""CRC-16/CCITT-FALSE, for single packets and for many packets at once.

Parameters (CRC RevEng catalogue name CRC-16/IBM-3740, alias CCITT-FALSE):
width 16, poly 0x1021, init 0xFFFF, no reflection, xorout 0x0000,
check 0x29B1 for ASCII "123456789".
"""
from __future__ import annotations

import binascii
import functools

import numpy as np

__all__ = ["crc16", "crc16_rows", "crc16_columns", "CRC_INIT"]

CRC_INIT = 0xFFFF


def crc16(data: bytes, *, init: int = CRC_INIT) -> int:
    """Return the CRC-16/CCITT-FALSE of ``data``.

    ``binascii.crc_hqx`` is the non-reflected 0x1021 CRC with a caller-chosen
    start value; with 0xFFFF it is exactly CCITT-FALSE, computed in C.
    """
    return binascii.crc_hqx(data, init)


def _make_table() -> np.ndarray:
    table = np.zeros(256, dtype=np.uint16)
    for byte in range(256):
        crc = byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) if crc & 0x8000 else (crc << 1)
            crc &= 0xFFFF
        table[byte] = crc
    return table


_TABLE = _make_table()


def crc16_rows(rows: np.ndarray, *, init: int = CRC_INIT) -> np.ndarray:
    """CRC of every row of a 2-D ``uint8`` array, vectorised over rows.

    Parameters
    ----------
    rows : ndarray of uint8, shape (M, L)
        M messages of L bytes each. Not modified; the caller keeps it.

    Returns
    -------
    ndarray of uint16, shape (M,)
    """
    rows = np.asarray(rows, dtype=np.uint8)
    return crc16_columns(np.ascontiguousarray(rows.T), init=init)


@functools.lru_cache(maxsize=8)
def _position_tables(length: int, init: int) -> tuple[np.ndarray, int]:
    """Per-position tables for messages of ``length`` bytes.

    The CRC is linear over GF(2): crc(m) = crc(zeros) ^ XOR_j T_j[m_j], where
    T_j[v] is the effect of value v at position j followed by zero bytes.
    Position terms are independent, so no step waits for the previous one.
    """
    tables = np.empty((length, 256), dtype=np.uint16)
    cur = _TABLE.copy()
    for j in range(length - 1, -1, -1):
        tables[j] = cur
        cur = ((cur << 8) & 0xFFFF) ^ _TABLE[(cur >> 8) & 0xFF]
    return tables, crc16(bytes(length), init=init)


@functools.lru_cache(maxsize=8)
def _pair_tables(length: int, init: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Tables for two positions at once: P_p[(a << 8) | b] = T_2p[a] ^ T_2p+1[b].

    Halves the number of table look-ups (the costly step) at 128 KiB per pair.
    """
    tables, zero_crc = _position_tables(length, init)
    n_pairs = length // 2
    pairs = np.empty((n_pairs, 65536), dtype=np.uint16)
    for p in range(n_pairs):
        pairs[p] = (tables[2 * p][:, None] ^ tables[2 * p + 1][None, :]).ravel()
    return pairs, tables, zero_crc


def crc16_columns(columns: np.ndarray, *, init: int = CRC_INIT) -> np.ndarray:
    """CRC of M messages stored transposed: ``columns[j]`` holds byte j of each.

    Parameters
    ----------
    columns : ndarray of uint8, shape (L, M)

    Returns
    -------
    ndarray of uint16, shape (M,)
    """
    length, m = columns.shape
    pairs, tables, zero_crc = _pair_tables(length, init)
    crc = np.full(m, zero_crc, dtype=np.uint16)
    index = np.empty(m, dtype=np.uint16)
    term = np.empty(m, dtype=np.uint16)
    for p in range(pairs.shape[0]):
        np.left_shift(columns[2 * p], 8, out=index, dtype=np.uint16)
        np.bitwise_or(index, columns[2 * p + 1], out=index)
        np.take(pairs[p], index, out=term)
        crc ^= term
    if length % 2:
        np.take(tables[length - 1], columns[length - 1], out=term)
        crc ^= term
    return crc
