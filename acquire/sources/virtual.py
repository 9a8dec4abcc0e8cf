"""The built-in virtual finger as a session's source: its options on the command line."""
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the parser is built without numpy: --help stays fast
    from acquire.rig import Rig

__all__ = ["VirtualOptions", "add_virtual_source_arguments", "virtual_options_from_args"]


@dataclass(frozen=True)
class VirtualOptions:
    """How to run the built-in virtual finger when no port is given.

    Attributes
    ----------
    rate_hz : float
        Sample rate, Hz.
    seed : int
    hold : str or None
        Jig label (``flat``, ``radius=25mm``, ``curvature=40/m``) or None for
        the moving scenario.
    scenario : str
        ``grasp`` or ``sweep``.
    faults : acquire.virtual.Faults or None
        Simulated wiring and link faults.
    strip : acquire.virtual.StripSettings or None
        Real strip behaviour (creep, hysteresis, drift; the finger's default) or ideal.
    mechanics : dict or None
        Bending stiffness, actuation gain and pressure of the simulated finger.
    max_chunk_s : float
        Longest time between the finger's writes to its port, wall s (it
        writes the frames due in chunks; benchmarks shorten it).
    """

    rate_hz: float = 1000.0
    seed: int = 0
    hold: str | None = None
    scenario: str = "grasp"
    faults: object = None
    strip: object = None
    mechanics: object = None
    max_chunk_s: float = 0.02


# ----------------------------------------------------------------------------- the feed



def add_virtual_source_arguments(parser) -> None:
    """Options of the built-in virtual finger for commands whose source defaults to it (main thread)."""
    from acquire.virtual.cli import add_finger_arguments

    add_finger_arguments(parser, title="built-in virtual finger (used without --port; simulated, for demos and tests)")


def virtual_options_from_args(args, rig: Rig) -> VirtualOptions:
    """The :class:`VirtualOptions` the parsed options ask for, checked against ``rig``.

    Raises
    ------
    UserError
        A bad value, a fault that does not fit the rig, or an unknown hold label or scenario (the message
        names the option).
    """
    from acquire.virtual.cli import finger_settings_from_args

    return VirtualOptions(**finger_settings_from_args(args, rig, extended=True))

