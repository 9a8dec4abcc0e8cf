"""Wiring and link faults the virtual finger can show (electrical ones act in the model, link ones in the device).

Pure data; any thread.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields

from acquire.errors import UserError
from acquire.rig import Rig

__all__ = ["Faults"]


@dataclass(frozen=True)
class Faults:
    """Wiring and link faults the virtual finger can show.

    Attributes
    ----------
    open_tap : int or None
        The wire from tap k to its ADC input is broken: that input floats
        (drifts and picks up mains and noise near a seeded level).
    short_taps : (int, int) or None
        Taps a < b shorted together (b may be S, the grounded end): segments
        a .. b-1 read 0 ohm.
    noisy_channel : int or None
        Channel with large extra noise (``noisy_lsb`` RMS).
    stuck_channel : int or None
        Channel whose code never changes.
    corrupt_rate : float
        Fraction of sample packets with flipped bytes on the wire.
    drop_rate : float
        Fraction of sample packets never sent (gaps in seq).
    vanish_every_s : float or None
        The port disappears this often (wall-clock s after each return).
    outage_s : float
        How long the port stays away (wall-clock s).
    noisy_lsb : float
        RMS of the noisy channel's extra noise, in LSB.
    """

    open_tap: int | None = None
    short_taps: tuple[int, int] | None = None
    noisy_channel: int | None = None
    stuck_channel: int | None = None
    corrupt_rate: float = 0.0
    drop_rate: float = 0.0
    vanish_every_s: float | None = None
    outage_s: float = 1.0
    noisy_lsb: float = 40.0

    def check(self, rig: Rig, *, names: dict | None = None) -> None:
        """Raise :class:`UserError` if a fault does not fit ``rig``.

        ``names`` maps field names to how the message names them (the command
        line passes its option names); the field name is used otherwise.
        """
        names = names or {}

        def fail(key: str, value, why: str) -> None:
            raise UserError(f"{names.get(key, 'faults.' + key)} {value}: {why}")

        s = rig.n_segments
        c = rig.n_channels
        if self.open_tap is not None and not 0 <= int(self.open_tap) < s:
            fail("open_tap", self.open_tap, f"the rig's measured taps are 0..{s - 1}")
        if self.short_taps is not None:
            a, b = (int(v) for v in self.short_taps)
            if not 0 <= a < b <= s:
                fail("short_taps", f"{a},{b}", f"need 0 <= A < B <= {s} (tap {s} is ground)")
        for key in ("noisy_channel", "stuck_channel"):
            value = getattr(self, key)
            if value is not None and not 0 <= int(value) < c:
                fail(key, value, f"the rig's channels are 0..{c - 1}")
        for key in ("corrupt_rate", "drop_rate"):
            value = float(getattr(self, key))
            if not 0.0 <= value < 1.0:
                fail(key, value, "must be a fraction, 0 <= p < 1")
        if self.vanish_every_s is not None and not float(self.vanish_every_s) > 0:
            fail("vanish_every_s", self.vanish_every_s, "must be positive seconds")
        if not float(self.outage_s) >= 0 or not math.isfinite(float(self.outage_s)):
            fail("outage_s", self.outage_s, "must be zero or positive seconds")
        if not float(self.noisy_lsb) >= 0:
            fail("noisy_lsb", self.noisy_lsb, "must not be negative")

    def as_dict(self) -> dict:
        """Plain values, for a hello or an HDF5 attribute."""
        out = {}
        for f in fields(self):
            v = getattr(self, f.name)
            out[f.name] = list(v) if isinstance(v, tuple) else v
        return out
