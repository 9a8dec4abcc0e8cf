"""Wire protocol version 1 between a sensor board and the host.

Pure code: bytes in, packets out. No serial port, file, Qt or HDF5 access
happens here, so everything is testable with byte literals. See
``PROTOCOL.md`` beside this file for the protocol in words and ``c/`` for
the device-side encoder in portable C99.
"""
from .cobs import CobsError, cobs_decode, cobs_decode_rows, cobs_encode, cobs_encode_rows
from .commands import COMMANDS, CommandError, cmd_hello, cmd_rate, cmd_start, cmd_stop, parse_command
from .crc import crc16, crc16_rows
from .packets import (
    DROP_CAUSES,
    KIND_HELLO,
    KIND_NOTE,
    KIND_REPLY,
    KIND_SAMPLES,
    PROTOCOL_VERSION,
    STATUS_LATE,
    STATUS_TX_OVERFLOW,
    Hello,
    Note,
    Packet,
    PacketError,
    Reply,
    Samples,
    decode_frame,
    decode_packet,
    encode_packet,
)
from .stream import MAX_FRAME_BYTES, SampleBlock, StreamDecoder, decode_stream
from .encode_bulk import encode_samples_bulk

__all__ = [
    "COMMANDS", "CommandError", "cmd_hello", "cmd_rate", "cmd_start", "cmd_stop", "parse_command",
    "CobsError", "cobs_decode", "cobs_decode_rows", "cobs_encode", "cobs_encode_rows",
    "crc16", "crc16_rows",
    "DROP_CAUSES", "KIND_HELLO", "KIND_NOTE", "KIND_REPLY", "KIND_SAMPLES", "PROTOCOL_VERSION",
    "STATUS_LATE", "STATUS_TX_OVERFLOW",
    "Hello", "Note", "Packet", "PacketError", "Reply", "Samples",
    "decode_frame", "decode_packet", "encode_packet",
    "MAX_FRAME_BYTES", "SampleBlock", "StreamDecoder", "decode_stream",
    "encode_samples_bulk",
]
