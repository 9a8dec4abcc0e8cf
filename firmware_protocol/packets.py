"""Packet kinds of wire protocol version 1 and their encode/decode.

A decoded packet is ``kind (u8) | body | crc (u16 LE)``; the CRC covers kind
and body. On the wire each packet is COBS-encoded and followed by 0x00.
"""
from __future__ import annotations

import json
import struct
from dataclasses import dataclass, field

import numpy as np

from .cobs import CobsError, cobs_decode, cobs_encode
from .crc import crc16

__all__ = [
    "PROTOCOL_VERSION",
    "KIND_SAMPLES",
    "KIND_HELLO",
    "KIND_REPLY",
    "KIND_NOTE",
    "STATUS_LATE",
    "STATUS_TX_OVERFLOW",
    "DROP_CAUSES",
    "Samples",
    "Hello",
    "Reply",
    "Note",
    "Packet",
    "PacketError",
    "encode_packet",
    "decode_packet",
    "decode_frame",
]

PROTOCOL_VERSION = 1
KIND_SAMPLES = 0x01
KIND_HELLO = 0x02
KIND_REPLY = 0x03
KIND_NOTE = 0x04

STATUS_LATE = 0x01  #: bit 0: sample taken late (ADC overrun)
STATUS_TX_OVERFLOW = 0x02  #: bit 1: device transmit buffer overflowed since the previous packet

#: causes for which a decoder drops a frame, in the order they are checked
DROP_CAUSES = ("cobs", "short", "crc", "kind", "length", "body")

_SAMPLES_HEAD = struct.Struct("<BHIBB")  # kind, seq, t_us, status, n


@dataclass(frozen=True)
class Samples:
    """One multiplexed ADC frame: ``codes[k]`` is channel k's reading."""

    seq: int
    t_us: int
    status: int
    codes: tuple[int, ...]


@dataclass(frozen=True)
class Hello:
    """The device's self-description (JSON object, extra keys kept in ``info``)."""

    info: dict = field(default_factory=dict)

    @property
    def text(self) -> str:
        return json.dumps(self.info)


@dataclass(frozen=True)
class Reply:
    """Answer to one host command; text starts with ``OK`` or ``ERR``."""

    text: str

    @property
    def ok(self) -> bool:
        return self.text.startswith("OK")


@dataclass(frozen=True)
class Note:
    """Text the firmware wants logged."""

    text: str


Packet = Samples | Hello | Reply | Note


class PacketError(ValueError):
    """A frame that must be dropped; ``cause`` is one of :data:`DROP_CAUSES`.

    ``cobs``: not valid COBS; ``short``: under 3 bytes; ``crc``: checksum
    mismatch; ``kind``: unknown kind byte; ``length``: a samples body whose
    size disagrees with its ``n``; ``body``: a text packet that is not UTF-8,
    or a hello that is not a JSON object.
    """

    def __init__(self, cause: str, message: str):
        super().__init__(message)
        self.cause = cause


def _body(packet: Packet) -> bytes:
    if isinstance(packet, Samples):
        n = len(packet.codes)
        if n > 255:
            raise ValueError("a samples packet holds at most 255 channels")
        head = _SAMPLES_HEAD.pack(
            KIND_SAMPLES, packet.seq & 0xFFFF, packet.t_us & 0xFFFFFFFF, packet.status & 0xFF, n
        )
        return head + np.asarray(packet.codes, dtype="<u2").tobytes()
    if isinstance(packet, Hello):
        return bytes([KIND_HELLO]) + json.dumps(packet.info).encode("utf-8")
    if isinstance(packet, Reply):
        return bytes([KIND_REPLY]) + packet.text.encode("utf-8")
    if isinstance(packet, Note):
        return bytes([KIND_NOTE]) + packet.text.encode("utf-8")
    raise TypeError(f"not a packet: {packet!r}")


def encode_packet(packet: Packet) -> bytes:
    """Return the wire bytes of ``packet``: COBS frame plus 0x00 delimiter."""
    raw = _body(packet)
    raw += struct.pack("<H", crc16(raw))
    return cobs_encode(raw) + b"\x00"


def decode_packet(raw: bytes) -> Packet:
    """Decode an un-stuffed packet (kind, body, crc).

    Raises
    ------
    PacketError
        With cause ``short``, ``crc``, ``kind`` or ``length``.
    """
    if len(raw) < 3:
        raise PacketError("short", f"packet of {len(raw)} bytes is too short for kind and crc")
    (crc,) = struct.unpack_from("<H", raw, len(raw) - 2)
    if crc16(raw[:-2]) != crc:
        raise PacketError("crc", "crc mismatch")
    kind = raw[0]
    body = raw[1:-2]
    if kind == KIND_SAMPLES:
        if len(body) < 8:
            raise PacketError("length", "samples packet shorter than its header")
        seq, t_us, status, n = struct.unpack_from("<HIBB", body)
        if len(body) != 8 + 2 * n:
            raise PacketError("length", f"samples packet says {n} codes but holds {(len(body) - 8) / 2:g}")
        codes = tuple(np.frombuffer(body, dtype="<u2", offset=8).tolist())
        return Samples(seq=seq, t_us=t_us, status=status, codes=codes)
    if kind in (KIND_HELLO, KIND_REPLY, KIND_NOTE):
        try:
            text = body.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise PacketError("body", f"text packet is not UTF-8: {exc}") from None
        if kind == KIND_REPLY:
            return Reply(text)
        if kind == KIND_NOTE:
            return Note(text)
        try:
            info = json.loads(text)
        except json.JSONDecodeError as exc:
            raise PacketError("body", f"hello is not JSON: {exc}") from None
        if not isinstance(info, dict):
            raise PacketError("body", "hello is not a JSON object")
        return Hello(info)
    raise PacketError("kind", f"unknown packet kind 0x{kind:02x}")


def decode_frame(frame: bytes) -> Packet:
    """Decode one COBS frame (without its 0x00 delimiter) into a packet."""
    try:
        raw = cobs_decode(frame)
    except CobsError as exc:
        raise PacketError("cobs", str(exc)) from None
    return decode_packet(raw)
