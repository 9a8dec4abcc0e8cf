"""``tapcurve virtual-device``: run the virtual finger on a pseudo-terminal.

Options are read as text and checked here, so a bad value gives one
:class:`~acquire.errors.UserError` line naming the option.
"""
from __future__ import annotations

import argparse
import math
import signal
import threading
from pathlib import Path

from acquire.errors import UserError
from acquire.rig import load_rig
from acquire.core.labels import parse_hold_label
from acquire.virtual.model import SCENARIOS, Faults

__all__ = ["add_virtual_device_arguments", "run_virtual_device", "add_finger_arguments", "finger_settings_from_args"]

_FAULT_OPTIONS = {
    "open_tap": "--open-tap",
    "short_taps": "--short-taps",
    "noisy_channel": "--noisy-channel",
    "stuck_channel": "--stuck-channel",
    "corrupt_rate": "--corrupt-rate",
    "drop_rate": "--drop-rate",
    "vanish_every_s": "--vanish-every",
    "outage_s": "--outage",
}


def add_finger_arguments(parser, *, title: str) -> None:
    """Options that shape the simulated finger, shared by every command that can run it (main thread).

    Values are kept as text and checked by :func:`finger_settings_from_args`,
    so a bad one gives one line naming its option.
    """
    g = parser.add_argument_group(title)
    g.add_argument("--rate-hz", metavar="HZ", default="1000", help="sample rate at boot (default 1000)")
    g.add_argument("--seed", metavar="N", default="0", help="seed of the sensor's spread, the grasp cycles and the noise")
    g.add_argument("--scenario", metavar="NAME", default="grasp", help=f"time course: {', '.join(SCENARIOS)} (default grasp)")
    g.add_argument("--hold", metavar="LABEL", help="press the finger onto a jig: flat, radius=25mm, curvature=40/m")
    g.add_argument("--open-tap", metavar="K", help="simulated fault: wire from tap K to its ADC input broken")
    g.add_argument("--short-taps", metavar="A,B", help="simulated fault: taps A and B shorted together")
    g.add_argument("--noisy-channel", metavar="K", help="simulated fault: channel K very noisy")
    g.add_argument("--stuck-channel", metavar="K", help="simulated fault: channel K stuck at one code")
    g.add_argument("--corrupt-rate", metavar="P", default="0", help="fraction of packets corrupted on the wire")
    g.add_argument("--drop-rate", metavar="P", default="0", help="fraction of packets never sent")


def finger_settings_from_args(args, rig) -> dict:
    """Checked ``rate_hz``, ``seed``, ``hold``, ``scenario`` and ``faults`` from :func:`add_finger_arguments`.

    Raises UserError naming the option at fault (a fault that does not fit the rig included).
    """
    rate = _number(args.rate_hz, "--rate-hz", low=0.1, high=50000.0)
    seed = _number(args.seed, "--seed", kind=int, low=0)
    if args.scenario not in SCENARIOS:
        raise UserError(f"--scenario {args.scenario!r}: not known (known: {', '.join(SCENARIOS)})")
    if args.hold is not None:
        try:
            parse_hold_label(args.hold)
        except UserError as exc:
            raise UserError(f"--hold: {exc}") from None
    faults = _faults_from(args)
    faults.check(rig, names=_FAULT_OPTIONS)
    return {"rate_hz": rate, "seed": seed, "hold": args.hold, "scenario": args.scenario, "faults": faults}


def add_virtual_device_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the virtual device's options to ``parser`` (main thread, at start-up)."""
    a = parser.add_argument
    a("--rig", metavar="PATH", help="rig file (default: the built-in demo finger)")
    a("--adc-bits", metavar="N", default="12", help="ADC resolution, 8..16 (default 12)")
    a("--time-scale", metavar="X", default="1", help="device seconds per wall second (default 1)")
    a("--link", metavar="PATH", help="where to make the port's symlink (default: a temp folder)")
    a("--truth", metavar="FILE", help="write per-frame ground truth to this HDF5 file")
    a("--clock-start-s", metavar="S", default="0",
      help="device clock reading at boot, s (4294 puts its 32-bit microsecond wrap 1 s in)")
    add_finger_arguments(parser, title="the simulated finger and its faults")
    g = parser.add_argument_group("simulated link faults")
    g.add_argument("--vanish-every", metavar="S", help="the port disappears every S seconds")
    g.add_argument("--outage", metavar="S", default="1", help="how long the port stays away (default 1 s)")


def _number(text, option: str, *, kind=float, low=None, high=None, low_open=False) -> float | int:
    try:
        value = kind(str(text).strip())
    except ValueError:
        what = "a whole number" if kind is int else "a number"
        raise UserError(f"{option} {text!r}: must be {what}") from None
    if kind is float and not math.isfinite(value):
        raise UserError(f"{option} {text!r}: must be finite")
    if low is not None and (value <= low if low_open else value < low):
        raise UserError(f"{option} {text}: must be {'>' if low_open else '>='} {low:g}")
    if high is not None and value > high:
        raise UserError(f"{option} {text}: must be <= {high:g}")
    return value


def _faults_from(args) -> Faults:
    def opt_int(name, option):
        text = getattr(args, name, None)
        return None if text is None else _number(text, option, kind=int)

    short = None
    if getattr(args, "short_taps", None) is not None:
        parts = str(args.short_taps).split(",")
        if len(parts) != 2:
            raise UserError(f"--short-taps {args.short_taps!r}: must be two taps A,B")
        short = tuple(_number(p, "--short-taps", kind=int) for p in parts)
    vanish = getattr(args, "vanish_every", None)
    return Faults(
        open_tap=opt_int("open_tap", "--open-tap"),
        short_taps=short,
        noisy_channel=opt_int("noisy_channel", "--noisy-channel"),
        stuck_channel=opt_int("stuck_channel", "--stuck-channel"),
        corrupt_rate=_number(getattr(args, "corrupt_rate", "0"), "--corrupt-rate", low=0.0),
        drop_rate=_number(getattr(args, "drop_rate", "0"), "--drop-rate", low=0.0),
        vanish_every_s=None if vanish is None else _number(vanish, "--vanish-every", low=0.0, low_open=True),
        outage_s=_number(getattr(args, "outage", "1"), "--outage", low=0.0),
    )


def build_virtual_finger(args):
    """A :class:`VirtualFinger` (not started) from parsed options.

    Raises UserError naming the option at fault.
    """
    from acquire.virtual.device import VirtualFinger

    rig = load_rig(args.rig)
    settings = finger_settings_from_args(args, rig)
    bits = _number(args.adc_bits, "--adc-bits", kind=int, low=8, high=16)
    scale = _number(args.time_scale, "--time-scale", low=0.0, low_open=True, high=1e6)
    _check_out_path(args.link, "--link", symlink=True)
    _check_out_path(args.truth, "--truth", symlink=False)
    return VirtualFinger(
        rig=rig, adc_bits=bits, time_scale=scale, link_path=args.link, truth_path=args.truth, **settings,
        clock_start_s=_number(args.clock_start_s, "--clock-start-s", low=0.0),
    )


def _check_out_path(text, option: str, *, symlink: bool) -> None:
    if text is None:
        return
    path = Path(text)
    if not path.parent.is_dir():
        raise UserError(f"{option} {path}: folder {path.parent} does not exist")
    if symlink and path.exists() and not path.is_symlink():
        raise UserError(f"{option} {path}: exists and is not a symlink; will not replace it")
    if not symlink and path.is_dir():
        raise UserError(f"{option} {path}: is a folder")


def run_virtual_device(args) -> int:
    """Run until SIGINT or SIGTERM; print the port path on one line first.

    Runs in the main thread (it installs signal handlers and restores them).
    Returns 0 after a clean stop.
    """
    dev = build_virtual_finger(args)
    done = threading.Event()
    previous = {}

    def on_signal(signum, frame):
        done.set()

    for sig in (signal.SIGINT, signal.SIGTERM):
        previous[sig] = signal.signal(sig, on_signal)
    try:
        dev.start()
        print(dev.path, flush=True)
        while not done.wait(0.5):
            if dev.error is not None:
                break
    finally:
        try:
            dev.stop()
        finally:
            for sig, handler in previous.items():
                signal.signal(sig, handler)
    return 0
