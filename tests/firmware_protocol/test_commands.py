"""Host command helpers (firmware_protocol/PROTOCOL.md command table)."""
from __future__ import annotations

import pytest

from firmware_protocol import CommandError, cmd_hello, cmd_rate, cmd_start, cmd_stop, parse_command


def test_command_bytes():
    assert cmd_hello() == b"HELLO?\n"
    assert cmd_start() == b"START\n"
    assert cmd_stop() == b"STOP\n"
    assert cmd_rate(500) == b"RATE 500\n"
    assert cmd_rate(12.5) == b"RATE 12.5\n"
    with pytest.raises(ValueError):
        cmd_rate(0)


def test_parse_round_trip():
    for line in (cmd_hello(), cmd_start(), cmd_stop()):
        assert parse_command(line)[1] is None
    assert parse_command(cmd_rate(250)) == ("RATE", 250.0)
    for bad in (b"RATE abc\n", b"RATE -3\n", b"JUMP\n", b"START now\n"):
        with pytest.raises(CommandError):
            parse_command(bad)
