"""Host-to-device command lines (ASCII, ending in ``\\n``) and reply parsing."""
from __future__ import annotations

import math
import re

__all__ = [
    "COMMANDS",
    "cmd_hello",
    "cmd_start",
    "cmd_stop",
    "cmd_rate",
    "parse_command",
    "CommandError",
]

_DECIMAL = re.compile(r"^[0-9]+(\.[0-9]+)?$")

#: every command word of protocol version 1
COMMANDS = ("HELLO?", "START", "STOP", "RATE")


class CommandError(ValueError):
    """A command line that is not part of the protocol."""


def cmd_hello() -> bytes:
    """Ask the device for a hello packet."""
    return b"HELLO?\n"


def cmd_start() -> bytes:
    """Start streaming sample packets."""
    return b"START\n"


def cmd_stop() -> bytes:
    """Stop streaming."""
    return b"STOP\n"


def cmd_rate(rate_hz: float) -> bytes:
    """Set the sample rate in Hz, sent as a plain decimal with at most 3 decimals."""
    rate = float(rate_hz)
    if not (rate > 0 and math.isfinite(rate)):
        raise ValueError(f"rate must be a positive finite number, got {rate_hz!r}")
    text = f"{rate:.3f}".rstrip("0").rstrip(".")
    if text == "0":
        raise ValueError(f"rate {rate_hz!r} rounds to 0 at millihertz resolution")
    return f"RATE {text}\n".encode("ascii")


def parse_command(line: bytes) -> tuple[str, float | None]:
    """Parse one command line as a device would.

    Returns
    -------
    (word, argument)
        ``argument`` is the rate for ``RATE``, else None.

    Raises
    ------
    CommandError
        With the text a device puts after ``ERR``.
    """
    text = line.decode("ascii", errors="replace").strip()
    word, _, arg = text.partition(" ")
    if word in ("HELLO?", "START", "STOP"):
        if arg:
            raise CommandError(f"{word} takes no argument")
        return word, None
    if word == "RATE":
        # plain decimals only, as the C parser reads them: no exponents, inf or underscores
        if not _DECIMAL.match(arg):
            raise CommandError(f"bad rate {arg!r}")
        rate = float(arg)
        if not rate > 0:
            raise CommandError(f"bad rate {arg!r}")
        return word, rate
    raise CommandError(f"unknown command {word!r}")
