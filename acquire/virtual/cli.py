"""``tapcurve virtual-device``: run the virtual finger on a pseudo-terminal.

Options are read as text and checked here, so a bad value gives one
:class:`~acquire.errors.UserError` line naming the option.
"""
from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

from acquire.errors import UserError
from acquire.rig import load_rig
from acquire.virtual.camera import CAMERA_BOUNDS, CameraSettings
from acquire.virtual.faults import Faults
from acquire.virtual.model import DEFAULT_ACTUATION_GAIN_NM_PER_KPA, DEFAULT_EI_NM2, check_hold_label
from acquire.virtual.scenarios import SCENARIOS
from acquire.virtual.strip import STRIP_BOUNDS, STRIP_MODES, StripSettings

__all__ = ["add_virtual_device_arguments", "run_virtual_device", "add_finger_arguments", "finger_settings_from_args",
           "build_virtual_finger"]

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
_STRIP_OPTIONS = {
    "mode": "--strip",
    "creep_percent": "--creep-percent",
    "creep_tau_s": "--creep-tau-s",
    "hysteresis_percent": "--hysteresis-percent",
    "drift_percent_per_hour": "--drift-percent-per-hour",
}
_CAMERA_OPTIONS = {"fps": "--camera-fps", "offset_s": "--camera-offset-s", "rate_ppm": "--camera-ppm"}
_EI_BOUNDS = (1e-6, 10.0)  # N m^2: a soft finger's EI is far inside (common practice, no source)
_GAIN_BOUNDS = (1e-7, 1.0)  # N m per kPa


def add_finger_arguments(parser, *, title: str) -> None:
    """Options that shape the simulated finger, shared by every command that can run it (main thread).

    Values are kept as text and checked by :func:`finger_settings_from_args`,
    so a bad one gives one line naming its option.
    """
    g = parser.add_argument_group(title)
    g.add_argument("--rate-hz", metavar="HZ", default="1000", help="sample rate at boot (default 1000)")
    g.add_argument("--seed", metavar="N", default="0", help="seed of the sensor's spread, the grasp cycles and the noise")
    g.add_argument("--scenario", metavar="NAME", default="grasp", help=f"time course: {', '.join(SCENARIOS)} (default grasp)")
    g.add_argument("--hold", metavar="LABEL",
                   help="press the finger onto a jig (flat, radius=25mm, curvature=40/m) or push its end along +y "
                        "(force=1.2N, at --pressure-kpa)")
    _add_strip_arguments(g)
    _add_mechanics_arguments(g)
    g.add_argument("--open-tap", metavar="K", help="simulated fault: wire from tap K to its ADC input broken")
    g.add_argument("--short-taps", metavar="A,B", help="simulated fault: taps A and B shorted together")
    g.add_argument("--noisy-channel", metavar="K", help="simulated fault: channel K very noisy")
    g.add_argument("--stuck-channel", metavar="K", help="simulated fault: channel K stuck at one code")
    g.add_argument("--corrupt-rate", metavar="P", default="0", help="fraction of packets corrupted on the wire")
    g.add_argument("--drop-rate", metavar="P", default="0", help="fraction of packets never sent")


def _add_strip_arguments(g) -> None:
    d = StripSettings()
    g.add_argument("--strip", metavar="KIND", default="real",
                   help="real (creep, hysteresis, drift; the default) or ideal (the static law alone)")
    for key, option in list(_STRIP_OPTIONS.items())[1:]:
        lo, hi, unit = STRIP_BOUNDS[key]
        g.add_argument(option, metavar="X", default=f"{getattr(d, key):g}",
                       help=f"real strip: {key.replace('_', ' ')} ({lo:g}..{hi:g} {unit}; default {getattr(d, key):g})"
                       .replace("%", "%%"))


def _add_mechanics_arguments(g) -> None:
    g.add_argument("--actuation-gain-nm-per-kpa", metavar="G", default=f"{DEFAULT_ACTUATION_GAIN_NM_PER_KPA:g}",
                   help=f"actuation moment per kPa (default {DEFAULT_ACTUATION_GAIN_NM_PER_KPA:g} N m/kPa)")
    g.add_argument("--stiffness-scale", metavar="X", help=f"bending stiffness as a multiple of {DEFAULT_EI_NM2:g} N m^2")
    g.add_argument("--ei-n-m2", metavar="EI", help="bending stiffness EI, N m^2 (instead of --stiffness-scale)")
    g.add_argument("--pressure-kpa", metavar="P", default="0", help="pressure during a force hold, kPa (default 0)")


def _strip_from(args) -> StripSettings:
    mode = str(getattr(args, "strip", "real")).strip().lower()
    if mode not in STRIP_MODES:
        raise UserError(f"--strip {args.strip!r}: must be real or ideal")
    values = {}
    for key, option in list(_STRIP_OPTIONS.items())[1:]:
        lo, hi, _ = STRIP_BOUNDS[key]
        values[key] = _number(getattr(args, key, f"{getattr(StripSettings(), key):g}"), option, low=lo, high=hi)
    return StripSettings(mode=mode, **values).check(names=_STRIP_OPTIONS)


def _mechanics_from(args) -> dict:
    gain = _number(getattr(args, "actuation_gain_nm_per_kpa", f"{DEFAULT_ACTUATION_GAIN_NM_PER_KPA:g}"),
                   "--actuation-gain-nm-per-kpa", low=_GAIN_BOUNDS[0], high=_GAIN_BOUNDS[1])
    scale, ei = getattr(args, "stiffness_scale", None), getattr(args, "ei_n_m2", None)
    if scale is not None and ei is not None:
        raise UserError("--stiffness-scale and --ei-n-m2 both set the stiffness: give one")
    if ei is not None:
        ei = _number(ei, "--ei-n-m2", low=_EI_BOUNDS[0], high=_EI_BOUNDS[1])
    elif scale is not None:
        ei = DEFAULT_EI_NM2 * _number(scale, "--stiffness-scale", low=0.05, high=20.0)
    pressure = _number(getattr(args, "pressure_kpa", "0"), "--pressure-kpa", low=-100.0, high=1000.0)
    return {"bending_stiffness_nm2": DEFAULT_EI_NM2 if ei is None else ei, "actuation_gain_nm_per_kpa": gain,
            "pressure_kpa": pressure}


def finger_settings_from_args(args, rig, *, extended: bool = False) -> dict:
    """Checked ``rate_hz``, ``seed``, ``hold``, ``scenario`` and ``faults`` from :func:`add_finger_arguments`.

    With ``extended`` also ``strip`` (:class:`StripSettings`) and ``mechanics``
    (a dict of :class:`FingerModel` keywords), as :class:`VirtualFinger` takes
    them. The strip and mechanics options are checked either way.

    Raises UserError naming the option at fault (a fault that does not fit the rig included).
    """
    rate = _number(args.rate_hz, "--rate-hz", low=0.1, high=50000.0)
    seed = _number(args.seed, "--seed", kind=int, low=0)
    if args.scenario not in SCENARIOS:
        raise UserError(f"--scenario {args.scenario!r}: not known (known: {', '.join(SCENARIOS)})")
    if args.hold is not None:
        try:
            check_hold_label(args.hold)
        except UserError as exc:
            raise UserError(f"--hold: {exc}") from None
    faults = _faults_from(args)
    faults.check(rig, names=_FAULT_OPTIONS)
    out = {"rate_hz": rate, "seed": seed, "hold": args.hold, "scenario": args.scenario, "faults": faults}
    strip, mechanics = _strip_from(args), _mechanics_from(args)
    if extended:
        out.update(strip=strip, mechanics=mechanics)
    return out


def add_virtual_device_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the virtual device's options to ``parser`` (main thread, at start-up)."""
    a = parser.add_argument
    a("--rig", metavar="PATH", help="rig file (default: the built-in demo finger)")
    a("--adc-bits", metavar="N", default="12", help="ADC resolution, 8..16 (default 12)")
    a("--time-scale", metavar="X", default="1", help="device seconds per wall second (default 1)")
    a("--link", metavar="PATH", help="where to make the port's symlink (default: a temp folder)")
    a("--truth", metavar="FILE", help="write per-frame ground truth to this HDF5 file")
    a("--markers", metavar="FILE.csv", help="film the finger: write a camera marker track (new file)")
    for key, option in _CAMERA_OPTIONS.items():
        lo, hi, unit = CAMERA_BOUNDS[key]
        a(option, metavar="X", default=f"{getattr(CameraSettings(), key):g}",
          help=f"camera {key.replace('_', ' ')} ({lo:g}..{hi:g} {unit}; default {getattr(CameraSettings(), key):g}, made up)")
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
    settings = finger_settings_from_args(args, rig, extended=True)
    bits = _number(args.adc_bits, "--adc-bits", kind=int, low=8, high=16)
    scale = _number(args.time_scale, "--time-scale", low=0.0, low_open=True, high=1e6)
    _check_out_path(args.link, "--link", symlink=True)
    _check_out_path(args.truth, "--truth", symlink=False)
    camera = _camera_from(args, seed=settings["seed"])
    return VirtualFinger(
        rig=rig, adc_bits=bits, time_scale=scale, link_path=args.link, truth_path=args.truth, **settings,
        clock_start_s=_number(args.clock_start_s, "--clock-start-s", low=0.0),
        markers_path=getattr(args, "markers", None), camera=camera,
    )


def _camera_from(args, *, seed: int) -> CameraSettings | None:
    """The camera's settings, or None without ``--markers``; the marker file must be new (check_output)."""
    values = {}
    for key, option in _CAMERA_OPTIONS.items():
        lo, hi, _ = CAMERA_BOUNDS[key]
        dest = option[2:].replace("-", "_")
        values[key] = _number(getattr(args, dest, f"{getattr(CameraSettings(), key):g}"), option, low=lo, high=hi)
    if getattr(args, "markers", None) is None:
        return None
    from acquire.store.outputs import check_output

    check_output(args.markers, option="--markers", what="marker track")
    return CameraSettings(seed=seed, **values).check(names=_CAMERA_OPTIONS)


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
    """Run until SIGINT, SIGTERM or SIGHUP; print the port path on one line first.

    Runs in the main thread (:class:`acquire.threads.signals.StopSignals`
    installs the handlers and restores them). Returns 0 after a clean stop,
    1 if the device thread failed.
    """
    from acquire.threads.signals import StopSignals

    dev = build_virtual_finger(args)
    with StopSignals() as stop:
        try:
            dev.start()
            print(dev.path, flush=True)
            while not stop.event.wait(0.5):
                if dev.error is not None:
                    break
        finally:
            dev.stop()
    if dev.error is not None:
        print(f"tapcurve: virtual finger failed: {dev.error}", file=sys.stderr)
        return 1
    return 0
