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
import threading
import time
from pathlib import Path

from acquire.errors import UserError

__all__ = ["main", "build_parser"]

SAFETY_NOTE = (
    "Safety: pressurised actuators can burst and mains-powered rigs can shock. Follow your lab's rules and "
    "ask a qualified person before running a rig unattended; tapcurve only measures, it does not protect."
)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2, as for every user error
        # "tapcurve record: ..." is printed as "tapcurve: record: ..."
        where = self.prog.removeprefix("tapcurve").strip()
        raise UserError(f"{where}: {message}" if where else message)


def _positive_float(name: str):
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be a number, got {text!r}") from None
        if not (value > 0 and math.isfinite(value)):
            raise argparse.ArgumentTypeError(f"{name} must be positive, got {text!r}")
        return value

    return parse


def _add_publish(p: argparse.ArgumentParser) -> None:
    p.add_argument("--publish", metavar="HOST:PORT", help="serve the shape stream (JSON lines over TCP) here")
    p.add_argument(
        "--publish-allow-remote",
        action="store_true",
        help="allow a non-loopback --publish address (the stream has no authentication)",
    )
    p.add_argument(
        "--publish-rate-hz",
        type=_positive_float("--publish-rate-hz"),
        metavar="HZ",
        help="at most HZ shape-stream messages per second to each client (default: every frame)",
    )


def build_parser() -> argparse.ArgumentParser:
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
    p.add_argument("--duration", type=_positive_float("--duration"), help="stop after S seconds (headless use)")
    _add_publish(p)
    p.add_argument("--label", help="with --record: mark the whole recording as one labelled interval")
    from acquire.sources.live import add_virtual_source_arguments

    add_virtual_source_arguments(p)

    p = sub.add_parser("record", help="headless recording to HDF5")
    p.add_argument("--port", required=True, help="serial port of the sensor board")
    p.add_argument("--rig", required=True, help="rig file (TOML)")
    p.add_argument("--out", required=True, help="recording to create (never overwritten)")
    p.add_argument("--label", help="mark the whole recording as one labelled interval")
    p.add_argument("--duration", type=_positive_float("--duration"), help="record S x the device's rate frames (S seconds of device time when no frame is lost)")
    p.add_argument("--calibration", help="calibration JSON: /derived is written as frames arrive")
    p.add_argument("--quiet", action="store_true", help="no status line")
    _add_publish(p)

    p = sub.add_parser("calibrate", help="fit a calibration from labelled recordings")
    p.add_argument("files", nargs="+", metavar="FILE")
    p.add_argument("--rig", required=True)
    p.add_argument("--out", required=True, metavar="CAL.json")
    p.add_argument("--reference", metavar="TABLE", help="table mapping label names to per-segment curvature")
    p.add_argument("--force", action="store_true", help="overwrite an existing calibration file")

    p = sub.add_parser("tare", help="re-zero a calibration's flat resistances from a flat recording")
    p.add_argument("file", metavar="FILE", help="a recording of the sensor held flat")
    p.add_argument("--calibration", required=True)
    p.add_argument("--out", required=True, metavar="CAL.json")

    p = sub.add_parser("process", help="write a copy of a recording with /derived computed")
    p.add_argument("file", metavar="FILE")
    p.add_argument("--calibration", required=True)
    p.add_argument("--out", required=True, metavar="OUT.h5")
    p.add_argument("--zero-phase", action="store_true", help="forward-backward filtering (offline only)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")

    p = sub.add_parser("replay", help="the live window fed from a recording")
    p.add_argument("file", metavar="FILE")
    p.add_argument("--calibration")
    p.add_argument("--follow", action="store_true", help="keep up with a file that is still being recorded")
    p.add_argument("--speed", type=_positive_float("--speed"), default=1.0, help="playback speed, 0.1 .. 20 (default 1)")
    p.add_argument("--paused", action="store_true", help="open at the first frame without playing")
    p.add_argument("--headless", action="store_true", help="no window: play through, printing a status line")
    p.add_argument("--duration", type=_positive_float("--duration"), help="stop after S seconds")

    p = sub.add_parser("health", help="per-channel wiring health")
    p.add_argument("--port", help="serial port; omit for the virtual finger")
    p.add_argument("--rig", help="rig file (TOML)")
    p.add_argument("--text", action="store_true", help="print the table in the terminal every second")
    p.add_argument("--duration", type=_positive_float("--duration"), help="stop after S seconds")
    p.add_argument("--window", type=_positive_float("--window"), default=2.0, metavar="S",
                   help="seconds of frames judged at each refresh (default 2)")
    add_virtual_source_arguments(p)

    p = sub.add_parser("inspect", help="summary of a recording")
    p.add_argument("file", metavar="FILE")
    p.add_argument("--json", action="store_true", help="machine-readable summary")

    p = sub.add_parser("export", help="shape plot of one time of a recording to PNG or SVG")
    p.add_argument("file", metavar="FILE")
    p.add_argument("--out", required=True, metavar="IMAGE", help=".png or .svg")
    p.add_argument("--time", type=float, default=None, metavar="S", help="device time in s (default: last frame)")
    p.add_argument("--calibration")

    from acquire.virtual.cli import add_virtual_device_arguments

    p = sub.add_parser("virtual-device", help="run the virtual finger on a pseudo-terminal and print its path")
    add_virtual_device_arguments(p)
    return parser


def main(argv: list[str] | None = None) -> int:
    # a write past a file-size limit must fail as an error, not kill the process
    if hasattr(signal, "SIGXFSZ"):
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
        if args.version:
            from acquire.store.recording import software_version

            print(f"tapcurve {software_version()}")
            return 0
        if args.command is None:
            raise UserError("no command given (try: tapcurve --help)")
        handler = _HANDLERS[args.command]
        return int(handler(args) or 0)
    except UserError as exc:
        print(f"tapcurve: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("tapcurve: interrupted", file=sys.stderr)
        return 130


class _StopFlag:
    """Set by SIGINT/SIGTERM so the main thread can finish a recording cleanly."""

    def __init__(self):
        self.event = threading.Event()
        self._old = {}

    def __enter__(self):
        for sig in (signal.SIGINT, signal.SIGTERM):
            self._old[sig] = signal.signal(sig, lambda *_: self.event.set())
        return self

    def __exit__(self, *exc):
        for sig, old in self._old.items():
            signal.signal(sig, old)


def _load_calibration(path: str | None, rig):
    from acquire.core.calibration import load_for_rig

    return load_for_rig(path, rig)


def _make_pipeline(rig, calibration, reader):
    if calibration is None:
        return None
    from acquire.core.pipeline import Pipeline

    return Pipeline(rig=rig, calibration=calibration, rate_hz=reader.rate_hz, adc_bits=reader.adc_bits)


def _start_publisher(args, *, reader, rig, calibration):
    if not getattr(args, "publish", None):
        return None
    from acquire.serve.publish import ShapePublisher

    pub = ShapePublisher.from_address(
        args.publish,
        allow_remote=args.publish_allow_remote,
        ring=reader.ring,
        rig=rig,
        calibration=calibration,
        rate_hz=reader.rate_hz,
        adc_bits=reader.adc_bits,
        counters=reader.all_counters,
        max_rate_hz=getattr(args, "publish_rate_hz", None),
    )
    pub.start()
    return pub


def _cmd_record(args) -> int:
    from acquire.link.reader import SerialReader
    from acquire.store.recorder import Recorder
    from acquire.rig import load_rig

    rig = load_rig(args.rig)
    out = Path(args.out)
    if out.exists():
        raise UserError(f"{out}: exists; tapcurve never overwrites a recording (choose another --out)")
    if not out.parent.is_dir():
        raise UserError(f"{out}: folder {out.parent} does not exist")
    calibration = _load_calibration(args.calibration, rig)
    if args.label is not None:
        from acquire.store.recording import check_label_text

        check_label_text(args.label)  # before anything opens
    if args.publish:
        from acquire.serve.publish import check_address

        check_address(args.publish, allow_remote=args.publish_allow_remote)  # before anything opens
    reader = SerialReader(port=args.port)
    reader.start()
    publisher = None
    recorder = None
    try:
        rig.check_device(channels=reader.n_channels, where=f"device on {args.port}")
        pipeline = _make_pipeline(rig, calibration, reader)
        # bound before the file exists: a refused address leaves no recording behind
        publisher = _start_publisher(args, reader=reader, rig=rig, calibration=calibration)
        max_frames = None if args.duration is None else max(1, int(round(args.duration * reader.rate_hz)))
        recorder = Recorder(
            path=out,
            ring=reader.ring,
            rig_toml=rig.text,
            device_hello=json.dumps(reader.hello),
            channel_names=rig.channels,
            events=reader.events,
            counters=reader.all_counters,
            pipeline=pipeline,
            calibration_json=None if calibration is None else calibration.to_json(),
            label=args.label,
            max_frames=max_frames,
            n_segments=rig.n_segments,
        )
        recorder.start()
        status = _StatusLine(enabled=not args.quiet and sys.stderr.isatty())
        started = time.monotonic()
        # a stalled device must not keep a --duration run going for ever
        host_limit = None if args.duration is None else args.duration * 1.5 + 10.0
        with _StopFlag() as stop:
            while not stop.event.wait(0.2):
                if recorder.reached_max.is_set() or recorder.error or not recorder.running:
                    break
                if host_limit is not None and time.monotonic() - started > host_limit:
                    print(f"tapcurve: {args.port}: device sent too few frames for --duration; stopping", file=sys.stderr)
                    break
                status.show(reader, recorder)
        status.clear()
    finally:
        if publisher is not None:
            publisher.stop()
        reader.stop()
        if recorder is not None:
            recorder.stop()
    c = reader.all_counters()
    print(
        f"{out}: {recorder.frames_written} frames, {c['frames_lost']} lost on the link, "
        f"{sum(v for k, v in c.items() if k.startswith('drop_'))} bad packets, {c['reconnects']} reconnects",
        file=sys.stderr,
    )
    if recorder.error:
        print(f"tapcurve: {recorder.error}", file=sys.stderr)
        return 1
    return 0


class _StatusLine:
    def __init__(self, *, enabled: bool):
        self.enabled = enabled
        self._last = 0.0

    def show(self, reader, recorder) -> None:
        now = time.monotonic()
        if not self.enabled or now - self._last < 1.0:
            return
        self._last = now
        c = reader.all_counters()
        bad = sum(v for k, v in c.items() if k.startswith("drop_"))
        link = "up" if reader.connected else "DOWN"
        sys.stderr.write(
            f"\r{recorder.frames_written} frames  lost {c['frames_lost']}  bad {bad}  "
            f"reconnects {c['reconnects']}  link {link}  {recorder.file_bytes / 1e6:.1f} MB   "
        )
        sys.stderr.flush()

    def clear(self) -> None:
        if self.enabled:
            sys.stderr.write("\n")


def _cmd_inspect(args) -> int:
    from acquire.commands.summary import inspect_summary, format_summary

    summary = inspect_summary(args.file)
    if args.json:
        print(json.dumps(summary, indent=1))
    else:
        print(format_summary(summary))
    return 0


def _cmd_virtual_device(args) -> int:
    from acquire.virtual.cli import run_virtual_device

    return run_virtual_device(args)


def _cmd_calibrate(args) -> int:
    from acquire.commands.offline import calibrate_command

    return calibrate_command(
        files=args.files, rig_path=args.rig, out_path=args.out, reference_path=args.reference, force=args.force
    )


def _cmd_tare(args) -> int:
    from acquire.commands.offline import tare_command

    return tare_command(file=args.file, calibration_path=args.calibration, out_path=args.out)


def _cmd_process(args) -> int:
    from acquire.commands.offline import process_command

    return process_command(
        file=args.file,
        calibration_path=args.calibration,
        out_path=args.out,
        zero_phase=args.zero_phase,
        progress=not args.quiet,
    )


def _cmd_gui(args) -> int:
    from display.app import run_command

    return run_command(args)


_HANDLERS = {
    "record": _cmd_record,
    "inspect": _cmd_inspect,
    "virtual-device": _cmd_virtual_device,
    "calibrate": _cmd_calibrate,
    "tare": _cmd_tare,
    "process": _cmd_process,
    "live": _cmd_gui,
    "replay": _cmd_gui,
    "health": _cmd_gui,
    "export": _cmd_gui,
}

if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
