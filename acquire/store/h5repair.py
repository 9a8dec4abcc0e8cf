"""Clearing the "open for writing" flags an unclosed SWMR file keeps.

HDF5 marks a file open for (SWMR) writing in the superblock's file
consistency flags and clears them on a clean close. A recorder that was killed
leaves them set, and HDF5 then refuses to open the file normally. The data up
to the last flush is intact, so clearing the flags (what HDF5's own ``h5clear
-s`` tool does) is the repair, with the end-of-allocation address raised to
the file's size where a flush was cut short (``h5clear --increment``). Done here in Python so a user needs
no extra tool: superblock versions 2 and 3 hold the flags at byte 11 and end
with a Jenkins lookup3 checksum over the bytes before it (HDF5 File Format
Specification, version 3.0, section II.A "Superblock").
"""
from __future__ import annotations

import fcntl
import os
import struct

__all__ = ["lookup3", "superblock_flags", "clear_write_flags", "writer_alive"]

_SIGNATURE = b"\x89HDF\r\n\x1a\n"


def _rot(x: int, k: int) -> int:
    return ((x << k) | (x >> (32 - k))) & 0xFFFFFFFF


def lookup3(data: bytes, initval: int = 0) -> int:
    """Bob Jenkins' lookup3 ``hashlittle`` (2006), as HDF5 uses for metadata checksums."""
    m = 0xFFFFFFFF
    length = len(data)
    a = b = c = (0xDEADBEEF + length + initval) & m
    k = 0
    while length > 12:
        a = (a + int.from_bytes(data[k : k + 4], "little")) & m
        b = (b + int.from_bytes(data[k + 4 : k + 8], "little")) & m
        c = (c + int.from_bytes(data[k + 8 : k + 12], "little")) & m
        a = (a - c) & m; a ^= _rot(c, 4); c = (c + b) & m  # noqa: E702
        b = (b - a) & m; b ^= _rot(a, 6); a = (a + c) & m  # noqa: E702
        c = (c - b) & m; c ^= _rot(b, 8); b = (b + a) & m  # noqa: E702
        a = (a - c) & m; a ^= _rot(c, 16); c = (c + b) & m  # noqa: E702
        b = (b - a) & m; b ^= _rot(a, 19); a = (a + c) & m  # noqa: E702
        c = (c - b) & m; c ^= _rot(b, 4); b = (b + a) & m  # noqa: E702
        length -= 12
        k += 12
    if length == 0:
        return c
    tail = data[k:] + bytes(12 - length)  # zero bytes add nothing: same as the fall-through switch
    a = (a + int.from_bytes(tail[0:4], "little")) & m
    b = (b + int.from_bytes(tail[4:8], "little")) & m
    c = (c + int.from_bytes(tail[8:12], "little")) & m
    c ^= b; c = (c - _rot(b, 14)) & m  # noqa: E702
    a ^= c; a = (a - _rot(c, 11)) & m  # noqa: E702
    b ^= a; b = (b - _rot(a, 25)) & m  # noqa: E702
    c ^= b; c = (c - _rot(b, 16)) & m  # noqa: E702
    a ^= c; a = (a - _rot(c, 4)) & m  # noqa: E702
    b ^= a; b = (b - _rot(a, 14)) & m  # noqa: E702
    c ^= b; c = (c - _rot(b, 24)) & m  # noqa: E702
    return c


def _superblock(fh) -> tuple[int, bytes, int]:
    """(offset, bytes up to the checksum, stored checksum) of a v2/v3 superblock."""
    # the superblock sits at 0 or at a power of two from 512 on (after a user block)
    size = os.fstat(fh.fileno()).st_size
    offset = 0
    while offset < size:
        fh.seek(offset)
        head = fh.read(12)
        if head[:8] == _SIGNATURE:
            if len(head) < 12:
                raise ValueError("file ends inside the superblock")
            version = head[8]
            if version not in (2, 3):
                raise _OldSuperblock(f"superblock version {version} has no flags to clear")
            size_offsets = head[9]
            body_len = 12 + 4 * size_offsets
            fh.seek(offset)
            body = fh.read(body_len + 4)
            if len(body) < body_len + 4:
                raise ValueError("file ends inside the superblock")
            (stored,) = struct.unpack_from("<I", body, body_len)
            return offset, body[:body_len], stored
        offset = 512 if offset == 0 else offset * 2
    raise ValueError("no HDF5 superblock found")


class _OldSuperblock(ValueError):
    """Superblock versions 0 and 1 (files made without SWMR features) keep no write flags."""


def superblock_flags(path: str | os.PathLike) -> int:
    """The file consistency flags byte (0 for a cleanly closed file or an old-format one)."""
    with open(path, "rb") as fh:
        try:
            _, body, _ = _superblock(fh)
        except _OldSuperblock:
            return 0
    return body[11]


def writer_alive(path: str | os.PathLike) -> bool:
    """True if a process holds a lock on the file: a tapcurve recorder still writing it.

    HDF5 itself gives up its lock once SWMR writing starts, so the recorder
    holds one of its own for as long as it writes.
    """
    fd = os.open(path, os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return True
    else:
        fcntl.flock(fd, fcntl.LOCK_UN)
        return False
    finally:
        os.close(fd)


def _raise_eoa(body: bytearray, file_size: int) -> None:
    """Set the superblock's end-of-file address to at least the file's size (in place).

    A writer killed during a flush may have written data and the metadata that
    points to it, but not yet the larger end-of-allocation address: HDF5 then
    refuses to read past it ("addr overflow"). What ``h5clear --increment``
    does, without the extra margin: the bytes are on disk, the address only
    has to admit them. Field order (HDF5 File Format Specification 3.0, II.A,
    superblock v2/v3): base address, extension address, end-of-file address,
    root object header address, each ``size of offsets`` bytes, little-endian.
    """
    size_offsets = body[9]
    base_at, eoa_at = 12, 12 + 2 * size_offsets
    base = int.from_bytes(body[base_at:base_at + size_offsets], "little")
    eoa = int.from_bytes(body[eoa_at:eoa_at + size_offsets], "little")
    wanted = file_size - base  # addresses are relative to the base address
    if wanted > eoa:
        body[eoa_at:eoa_at + size_offsets] = wanted.to_bytes(size_offsets, "little")


def clear_write_flags(path: str | os.PathLike) -> bool:
    """Clear the open-for-writing flags of an unclosed file; True if anything changed.

    Only call this when no writer is alive (:func:`writer_alive`). The
    checksum is verified before the patch, so a damaged superblock is left
    untouched (``ValueError``). The end-of-allocation address is raised to the
    file's size where a killed flush left it short (:func:`_raise_eoa`).
    """
    with open(path, "r+b") as fh:
        offset, body, stored = _superblock(fh)
        if lookup3(body) != stored:
            raise ValueError("superblock checksum does not match: not repairing")
        if body[11] == 0:
            return False
        patched = bytearray(body)
        patched[11] = 0
        _raise_eoa(patched, os.fstat(fh.fileno()).st_size)
        patched = bytes(patched)
        fh.seek(offset)
        fh.write(patched + struct.pack("<I", lookup3(patched)))
        fh.flush()
        os.fsync(fh.fileno())
    return True
