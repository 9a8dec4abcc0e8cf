"""The ``tapcurve`` command line: parses arguments and wires the parts together.

Every error a user can cause ends in one line on stderr naming the thing at
fault and exit status 2 (see :class:`acquire.errors.UserError`).
"""
from __future__ import annotations

import argparse
import json
import math
import signal
import sys
import time

from acquire.errors import UserError

__all__ = ["main", "build_parser", "number_in"]

SAFETY_NOTE = (
    "Safety: pressurised actuators can burst and mains-powered rigs can shock. Follow your lab's rules and "
    "ask a qualified person before running a rig unattended; tapcurve only measures, it does not protect."
)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2, as for every user error
        # "tapcurve record: ..." is printed as "tapcurve: record: ..."
        where = self.prog.removeprefix("tapcurve").strip()
        raise UserError(f"{where}: {message}" if where else message)


def number_in(name: str, lo: float, hi: float, *, unit: str = "", lo_open: bool = False):
    """An argparse type: a finite number within [lo, hi] (``(lo, hi]`` with ``lo_open``); the message names the bound."""
    unit_text = f" {unit}" if unit else ""
    bound = f"{'above' if lo_open else 'at least'} {lo:g}{unit_text} and at most {hi:g}{unit_text}"

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be a number, got {text!r}") from None
        ok = math.isfinite(value) and (value > lo if lo_open else value >= lo) and value <= hi
        if not ok:
            raise argparse.ArgumentTypeError(f"{name} {text}: must be {bound}")
        return value

    return parse


#: longest --duration: 30 days, s (a run longer than that is a mistake in the number, common practice, no source)
MAX_DURATION_S = 30 * 86400.0


def _add_publish(p: argparse.ArgumentParser) -> None:
    p.add_argument("--publish", metavar="HOST:PORT", help="serve the shape stream (JSON lines over TCP) here")
    p.add_argument(
        "--publish-allow-remote",
        action="store_true",
        help="allow a non-loopback --publish address (the stream has no authentication)",
    )
    p.add_argument(
        "--publish-rate-hz",
        type=number_in("--publish-rate-hz", 0.0, 100_000.0, unit="Hz", lo_open=True),
        metavar="HZ",
        help="at most HZ shape-stream messages per second to each client (default: every frame)",
    )


#: commands that never run the virtual finger: their parser is built without its options (see build_parser)
_WITHOUT_SIMULATOR = frozenset({"record", "calibrate", "tare", "process", "replay", "ports", "inspect", "export"})


# long on purpose: the whole command line as one table, read top to bottom
def build_parser(*, simulator: bool = True) -> argparse.ArgumentParser:
    """The ``tapcurve`` argument parser.

    ``simulator=False`` leaves out the virtual finger's options (of ``live``,
    ``health`` and ``virtual-device``), which import the simulator: :func:`main`
    builds the parser so for the commands in :data:`_WITHOUT_SIMULATOR`, which
    then start without loading it.
    """
    parser = _Parser(
        prog="tapcurve",
        description="Acquisition, calibration and shape reconstruction for tapped resistive bend sensors.",
        epilog=SAFETY_NOTE,
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser, metavar="COMMAND")

    p = sub.add_parser("live", help="live window (default source: the built-in virtual finger)")
    p.add_argument("--port", help="serial port of the sensor board; omit for the virtual finger")
    p.add_argument("--rig", help="rig file (TOML); default: the built-in demo rig")
    p.add_argument("--calibration", help="calibration JSON")
    p.add_argument("--record", metavar="FILE", help="record to FILE from the start")
    p.add_argument("--headless", action="store_true", help="no window even if a display is available")
    p.add_argument("--duration", type=number_in("--duration", 0.0, MAX_DURATION_S, unit="s", lo_open=True), help="stop after S seconds (headless use)")
    _add_publish(p)
    p.add_argument("--label", help="with --record: mark the whole recording as one labelled interval")
    if simulator:
        from acquire.sources.virtual import add_virtual_source_arguments

        add_virtual_source_arguments(p)

    p = sub.add_parser("record", help="headless recording to HDF5")
    p.add_argument("--port", required=True, help="serial port of the sensor board")
    p.add_argument("--rig", required=True, help="rig file (TOML)")
    p.add_argument("--out", required=True, help="recording to create (never overwritten)")
    p.add_argument("--label", help="mark the whole recording as one labelled interval")
    p.add_argument("--duration", type=number_in("--duration", 0.0, MAX_DURATION_S, unit="s", lo_open=True), help="record S x the device's rate frames (S seconds of device time when no frame is lost)")
    p.add_argument("--calibration", help="calibration JSON: /derived is written as frames arrive")
    p.add_argument("--quiet", action="store_true", help="no status line")
    _add_publish(p)

    p = sub.add_parser("calibrate", help="fit a calibration from labelled recordings and/or filmed motion sessions")
    p.add_argument("files", nargs="*", metavar="FILE", help="recordings with labelled holds")
    p.add_argument("--motion", action="append", nargs=2, metavar=("REC.h5", "MARKERS.csv"), default=[],
                   help="a recording and the marker track filmed during it (repeatable)")
    p.add_argument("--rig", required=True)
    p.add_argument("--out", required=True, metavar="CAL.json")
    p.add_argument("--reference", metavar="TABLE", help="table mapping label names to per-segment curvature")
    p.add_argument("--force", action="store_true", help="overwrite an existing calibration file")
    p.add_argument("--static", action="store_true",
                   help="skip the strip memory fit (creep, hysteresis): a static calibration only")

    p = sub.add_parser("tare", help="re-zero a calibration's flat resistances from a flat recording")
    p.add_argument("file", metavar="FILE", help="a recording of the sensor held flat")
    p.add_argument("--calibration", required=True)
    p.add_argument("--out", required=True, metavar="CAL.json")

    p = sub.add_parser("process", help="write a copy of a recording with /derived computed")
    p.add_argument("file", metavar="FILE")
    p.add_argument("--calibration", required=True)
    p.add_argument("--out", required=True, metavar="OUT.h5")
    p.add_argument("--zero-phase", action="store_true", help="forward-backward filtering (offline only)")
    p.add_argument("--dense-points", action="store_true",
                   help="shape points every millimetre (default: only as dense as the calibrated bends need)")
    p.add_argument("--derived-only", action="store_true",
                   help="write only /derived, linking the raw data of FILE (keep FILE beside the output)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")

    p = sub.add_parser("replay", help="the live window fed from a recording")
    p.add_argument("file", metavar="FILE")
    p.add_argument("--calibration")
    p.add_argument("--follow", action="store_true", help="keep up with a file that is still being recorded")
    p.add_argument("--speed", type=number_in("--speed", 0.1, 20.0), default=1.0, help="playback speed, 0.1 .. 20 (default 1)")
    p.add_argument("--paused", action="store_true", help="open at the first frame without playing")
    p.add_argument("--headless", action="store_true", help="no window: play through, printing a status line")
    p.add_argument("--markers", metavar="MARKERS.csv", help="draw the markers filmed during the recording over the shape")
    p.add_argument("--duration", type=number_in("--duration", 0.0, MAX_DURATION_S, unit="s", lo_open=True), help="stop after S seconds")

    p = sub.add_parser("health", help="per-channel wiring health")
    p.add_argument("--port", help="serial port; omit for the virtual finger")
    p.add_argument("--rig", help="rig file (TOML)")
    p.add_argument("--text", action="store_true", help="print the table in the terminal every second")
    p.add_argument("--calibration", metavar="CAL.json",
                   help="judge the flat reading's drift against this calibration while the sensor is held flat")
    p.add_argument("--duration", type=number_in("--duration", 0.0, MAX_DURATION_S, unit="s", lo_open=True), help="stop after S seconds")
    p.add_argument("--window", type=number_in("--window", 0.1, 60.0, unit="s"), default=2.0, metavar="S",
                   help="seconds of frames judged at each refresh (default 2)")
    if simulator:
        add_virtual_source_arguments(p)

    p = sub.add_parser("ports", help="list the serial ports; with --probe, which ones answer as a tapcurve board")
    p.add_argument("--probe", action="store_true",
                   help="send each free port a hello request (ports another program has open are left alone)")
    p.add_argument("--timeout", type=number_in("--timeout", 0.05, 10.0, unit="s"), default=1.0, metavar="S",
                   help="how long each probed port has to answer (default 1 s)")
    p.add_argument("ports", nargs="*", metavar="PORT", help="also list (and probe) these paths or URLs")

    p = sub.add_parser("inspect", help="summary of a recording")
    p.add_argument("file", metavar="FILE")
    p.add_argument("--json", action="store_true", help="machine-readable summary")

    p = sub.add_parser("export", help="shape plot of one time of a recording to PNG or SVG")
    p.add_argument("file", metavar="FILE")
    p.add_argument("--out", required=True, metavar="IMAGE", help=".png or .svg")
    p.add_argument("--force", action="store_true", help="replace an existing image (never a recording)")
    p.add_argument("--time", type=number_in("--time", -1e9, 1e9, unit="s"), default=None, metavar="S", help="device time in s (default: last frame)")
    p.add_argument("--markers", metavar="MARKERS.csv", help="draw the markers filmed during the recording over the shape")
    p.add_argument("--calibration")

    p = sub.add_parser("virtual-device", help="run the virtual finger on a pseudo-terminal and print its path")
    if simulator:
        from acquire.virtual.cli import add_virtual_device_arguments

        add_virtual_device_arguments(p)
    return parser


def main(argv: list[str] | None = None, *, window_commands=None) -> int:
    """Run one ``tapcurve`` command; returns the exit status (0 ok, 1 a failure while running, 2 bad input).

    ``window_commands(args)`` runs the commands that may open a window (live,
    replay, health, export); the console entry point :func:`display.cli.main`
    passes it, so this package never imports Qt.
    """
    global _WINDOW_COMMANDS
    if window_commands is not None:
        _WINDOW_COMMANDS = window_commands
    # a write past a file-size limit must fail as an error, not kill the process
    if hasattr(signal, "SIGXFSZ"):
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    words = sys.argv[1:] if argv is None else list(argv)
    parser = build_parser(simulator=not (words and words[0] in _WITHOUT_SIMULATOR))
    streams = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = _Output(sys.stdout), _Output(sys.stderr)
    try:
        return _run(parser, argv)
    finally:
        sys.stdout, sys.stderr = streams


class _Output:
    """A standard stream that a terminal gone away cannot break.

    After a hang-up (an SSH session dropping: SIGHUP, then EIO on every write
    to the terminal) the command still closes its recording and returns its
    status as after SIGTERM; what it would have printed goes to /dev/null.
    """

    def __init__(self, stream):
        self._stream = stream

    def _gone(self, exc: OSError) -> bool:
        import errno
        import os

        if exc.errno != errno.EIO:
            return False
        try:  # from now on this stream writes to /dev/null (its buffered text too)
            os.dup2(os.open(os.devnull, os.O_WRONLY), self._stream.fileno())
        except (OSError, ValueError):
            return False
        return True

    def write(self, text: str) -> int:
        try:
            return self._stream.write(text)
        except OSError as exc:
            if not self._gone(exc):
                raise
            return len(text)

    def flush(self) -> None:
        try:
            self._stream.flush()
        except OSError as exc:
            if not self._gone(exc):
                raise

    def __getattr__(self, name):
        return getattr(self._stream, name)


def _run(parser, argv) -> int:
    try:
        args = parser.parse_args(argv)
        if args.version:
            from acquire.about import software_version

            print(f"tapcurve {software_version()}")
            return 0
        if args.command is None:
            raise UserError("no command given (try: tapcurve --help)")
        _check_path_names(args)
        handler = _HANDLERS[args.command]
        return int(handler(args) or 0)
    except UserError as exc:
        print(f"tapcurve: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("tapcurve: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into a program that stopped reading (| head): not an error
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


#: arguments that name files, folders or ports (attribute, how the message names it: "" for a positional)
_PATH_ARGUMENTS = (
    ("file", ""), ("files", ""), ("ports", ""), ("rig", "--rig"), ("calibration", "--calibration"),
    ("reference", "--reference"), ("out", "--out"), ("record", "--record"), ("link", "--link"),
    ("truth", "--truth"), ("markers", "--markers"), ("port", "--port"), ("motion", "--motion"),
)


def _check_path_names(args) -> None:
    """Refuse a path too long for the file system, whatever the command, before anything opens it.

    The operating system's own error (ENAMETOOLONG) comes from the first
    ``stat`` of such a path, wherever in a command that happens; checked here
    once, it is one line naming the argument. URLs (``socket://...``) are not paths.
    """
    from acquire.store.outputs import check_path_name

    for attr, option in _PATH_ARGUMENTS:
        value = getattr(args, attr, None)
        items = value if isinstance(value, list) else [value]
        for item in [v for x in items for v in (x if isinstance(x, list) else [x])]:  # --motion: pairs
            if isinstance(item, str) and "://" not in item:
                check_path_name(item, option=option)


def _cmd_record(args) -> int:
    from acquire.rig import load_rig
    from acquire.session import Session, load_calibration_for
    from acquire.threads.signals import StopSignals
    from acquire.session.status import status_line

    rig = load_rig(args.rig)
    calibration = load_calibration_for(args.calibration, rig)
    session = Session(
        port=args.port, rig=rig, calibration=calibration, view=False,
        record_path=args.out, record_label=args.label, record_option="--out", record_duration_s=args.duration,
        publish=args.publish, publish_rate_hz=args.publish_rate_hz, allow_remote=args.publish_allow_remote,
    )
    with StopSignals() as stop:
        session.start()
        try:
            _wait_recording(session, stop=stop, duration_s=args.duration, quiet=args.quiet, port=args.port,
                            status_line=status_line)
        finally:
            summary = session.stop_recording()
            session.stop()
    c = session.reader.all_counters()
    print(
        f"{summary['path']}: {summary['frames']} frames, {c['frames_lost']} lost on the link, "
        f"{sum(v for k, v in c.items() if k.startswith('drop_'))} bad packets, {c['reconnects']} reconnects",
        file=sys.stderr,
    )
    errors = session.errors()
    for err in errors:
        print(f"tapcurve: {err}", file=sys.stderr)
    return 1 if errors else 0


def _wait_recording(session, *, stop, duration_s, quiet, port, status_line) -> None:
    """Main thread: wait for the frame count, a stop signal or a failure, showing a status line."""
    recorder = session.recorder
    tty = not quiet and sys.stderr.isatty()
    started = time.monotonic()
    # a stalled device must not keep a --duration run going for ever
    host_limit = None if duration_s is None else duration_s * 1.5 + 10.0
    last_line = 0.0
    while not stop.event.wait(0.2):
        if recorder.reached_max.is_set() or session.errors() or not recorder.running:
            break
        if host_limit is not None and time.monotonic() - started > host_limit:
            print(f"tapcurve: {port}: device sent too few frames for --duration; stopping", file=sys.stderr)
            break
        if tty and time.monotonic() - last_line >= 1.0:
            last_line = time.monotonic()
            sys.stderr.write("\r" + status_line(session.status())[:200].ljust(100))
            sys.stderr.flush()
    if tty:
        sys.stderr.write("\n")


def _cmd_inspect(args) -> int:
    from acquire.commands.summary import inspect_summary, format_summary

    summary = inspect_summary(args.file)
    if args.json:
        print(json.dumps(summary, indent=1))
    else:
        print(format_summary(summary))
    return 0


def _cmd_ports(args) -> int:
    from acquire.link.ports import list_ports

    rows = list_ports(probe=args.probe, timeout_s=args.timeout, include=args.ports)
    if not rows:
        print("no serial ports found (a board on USB shows up as /dev/ttyACM* or /dev/ttyUSB*; "
              "one behind a network bridge as socket://HOST:PORT, give it as PORT)")
        return 0
    width = max(len(r.device) for r in rows)
    for r in rows:
        detail = f" ({r.detail})" if r.detail else ""
        print(f"{r.device:<{width}}  {r.status:<14}  {r.description}{detail}")
    return 0


def _cmd_virtual_device(args) -> int:
    from acquire.store.outputs import check_folder, check_output
    from acquire.virtual.cli import run_virtual_device

    # the output rules of every command: the ground truth never replaces a file (a recording least of all)
    if args.truth is not None:
        check_output(args.truth, option="--truth", what="ground truth", inputs=[args.rig] if args.rig else [])
    if args.link is not None:  # the port's symlink: an old symlink is replaced, so only its folder is checked
        check_folder(args.link, option="--link")
    return run_virtual_device(args)


def _cmd_calibrate(args) -> int:
    from acquire.commands.calibrate_command import calibrate_command

    if not args.files and not args.motion:
        raise UserError("calibrate: give recordings with labelled holds, --motion REC.h5 MARKERS.csv, or both")
    return calibrate_command(
        files=args.files, rig_path=args.rig, out_path=args.out, reference_path=args.reference, force=args.force,
        motions=[tuple(m) for m in args.motion], static=args.static,
    )


def _cmd_tare(args) -> int:
    from acquire.commands.tare import tare_command

    return tare_command(file=args.file, calibration_path=args.calibration, out_path=args.out)


def _cmd_process(args) -> int:
    from acquire.commands.process import process_command

    return process_command(
        file=args.file,
        calibration_path=args.calibration,
        out_path=args.out,
        zero_phase=args.zero_phase,
        progress=not args.quiet,
        dense_points=args.dense_points,
        derived_only=args.derived_only,
    )


def _cmd_window(args) -> int:
    if _WINDOW_COMMANDS is None:
        raise UserError(f"{args.command}: the window commands come with the display package (run tapcurve)")
    return int(_WINDOW_COMMANDS(args) or 0)


#: set by the console entry point (display.cli): runs live, replay, health and export; acquire never imports Qt
_WINDOW_COMMANDS = None


_HANDLERS = {
    "record": _cmd_record,
    "inspect": _cmd_inspect,
    "ports": _cmd_ports,
    "virtual-device": _cmd_virtual_device,
    "calibrate": _cmd_calibrate,
    "tare": _cmd_tare,
    "process": _cmd_process,
    "live": _cmd_window,
    "replay": _cmd_window,
    "health": _cmd_window,
    "export": _cmd_window,
}

if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
