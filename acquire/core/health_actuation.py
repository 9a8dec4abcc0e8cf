"""Wiring health of the actuation channel (``[actuation]``, e.g. a pressure sensor): its verdict in words.

A pressure transducer's output never sits at the ADC's ends while it is
connected and within its range, and it is never exactly still while the
finger moves (its own noise, the pump's ripple): a reading stuck or at an end
is a wiring fault, as it is for a tap. :func:`judge_actuation_channel`
re-words the generic channel verdicts of :func:`acquire.core.health.assess_health`
for that channel, with the value in the rig's unit. Rules of thumb, common
practice, no source (the thresholds are the tap channels').

Threads: pure, any thread.
"""
from __future__ import annotations

from acquire.core.verdicts import FAULT, OK, WARN

__all__ = ["judge_actuation_channel"]


def judge_actuation_channel(ch, *, actuation, at_zero: float, at_full: float, others_vary: int, full_code: int,
                            thresholds) -> None:
    """Replace the verdict of the actuation channel ``ch`` (a ChannelHealth, changed in place).

    Parameters
    ----------
    actuation : acquire.rig.Actuation
    at_zero, at_full : float
        Fraction of frames at code 0 and at full scale.
    others_vary : int
        How many other channels changed in the window.
    full_code : int
        The ADC's full-scale code.
    thresholds : HealthThresholds
    """
    th, unit = thresholds, actuation.unit
    what = f"actuation channel {ch.index} ({ch.name})"

    def in_unit(code) -> str:
        return f"{(float(code) - actuation.offset_code) * actuation.per_code:.4g} {unit}".rstrip()

    kept = [r for r in ch.reasons if "noise" in r or "hum" in r]  # noise and hum keep their words
    kept_level = ch.verdict if kept else OK
    ch.verdict, ch.reasons = OK, []
    stuck = ch.min_code == ch.max_code and ch.constant_s >= th.stuck_s
    sat = at_zero + at_full
    if stuck and 0 < ch.min_code < full_code:
        level = FAULT if others_vary else WARN
        ch.verdict = level
        ch.reasons.append(
            f"{what} stuck at {ch.min_code} ({in_unit(ch.min_code)}) for {ch.constant_s:.1f} s"
            + (" while the taps change: pressure sensor unplugged, unpowered or its output disconnected?"
               if others_vary else ", as are all channels: a very quiet input, or the device repeats one frame?"))
    elif sat > 0:
        low = at_zero >= at_full
        where = "0, the bottom of the ADC range" if low else f"full scale ({full_code})"
        hint = ("below the sensor's output range: unplugged, unpowered or shorted to ground?" if low else
                "above the sensor's output range: over its pressure range, or an open input pulled up?")
        ch.verdict = FAULT if sat >= th.saturation_fault_fraction else WARN
        ch.reasons.append(f"{what} reads {where} ({in_unit(0 if low else full_code)}) in {sat * 100:.0f} % of "
                          f"frames: {hint}")
    for reason in kept:
        ch.reasons.append(reason.replace(f"channel {ch.index}", what, 1))
        ch.verdict = max((ch.verdict, kept_level), key=(OK, WARN, FAULT).index)
