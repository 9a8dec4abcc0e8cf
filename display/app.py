"""``tapcurve live | replay | health | export``: windows when a display is there, the terminal otherwise.

:func:`run_command` runs on the main thread, which becomes the Qt GUI thread
when a window opens. Ctrl-C (SIGINT) and SIGTERM close the Qt application
(a 100 ms timer lets Python see the signal while Qt waits), and so does
closing the window; in every case the session is stopped afterwards, so a
recording is closed with its labels ended.

Display detection (Linux and other X11/Wayland systems): a display is there
when ``$DISPLAY`` or ``$WAYLAND_DISPLAY`` is set, or when ``QT_QPA_PLATFORM``
is set explicitly (``offscreen`` runs the real window without a screen, as the
tests do). Without one, ``live`` and ``replay`` run headless with a status line
every second, ``health`` prints its table every second, and ``export`` renders
with the offscreen platform.
"""
from __future__ import annotations

import math
import os
import sys
import time

from acquire.errors import UserError
from acquire.threads.signals import StopSignals
from acquire.session.status import drift_part, status_line

__all__ = ["run_command", "display_available", "make_app", "exec_app", "live_session"]


def display_available() -> tuple[bool, str]:
    """(usable, why): whether a Qt window can be shown, decided before Qt starts (see :mod:`display.screen`)."""
    from display.screen import probe_display

    return probe_display()


#: Qt messages that say nothing to a user of tapcurve (the offscreen platform, a root session)
_QUIET_QT = ("XDG_RUNTIME_DIR not set", "does not support propagateSizeHints")


def _qt_message(mode, context, message) -> None:
    if any(q in message for q in _QUIET_QT):
        return
    sys.stderr.write(f"Qt: {message}\n")


def make_app():
    """The QApplication (created once) with our pyqtgraph options; the caller keeps a reference."""
    from PyQt5 import QtCore, QtWidgets

    from .theme import configure_pyqtgraph

    QtCore.qInstallMessageHandler(_qt_message)
    app = QtWidgets.QApplication.instance()
    if app is None:
        app = QtWidgets.QApplication(["tapcurve"])
        app.setApplicationName("tapcurve")
    configure_pyqtgraph()
    return app


def exec_app(app, *, stop: StopSignals, duration_s: float | None = None) -> bool:
    """Run the Qt event loop until the last window closes, a signal, or ``duration_s``.

    Returns True if a signal ended it (or came before it started).
    """
    from PyQt5 import QtCore

    if stop.event.is_set():
        return True
    stop.add_hook(app.quit)
    # Qt's loop is C++: without a periodic return to Python a signal waits for the next event
    wake = QtCore.QTimer()
    wake.timeout.connect(lambda: None)
    wake.start(100)
    if duration_s is not None:
        QtCore.QTimer.singleShot(int(duration_s * 1000), app.quit)
    try:
        if not stop.event.is_set():
            app.exec_()
    finally:
        wake.stop()
        stop.remove_hook(app.quit)
    return stop.event.is_set()


def _say(text: str) -> None:
    print(f"tapcurve: {text}", file=sys.stderr, flush=True)


def _fmt_mb(n: int) -> str:
    return f"{n / 1e6:.1f} MB"


# ----------------------------------------------------------------------------- live


def live_session(args):
    """The (not yet started) :class:`~acquire.session.Session` that ``tapcurve live`` runs for ``args``.

    Checks the rig, the calibration and the virtual finger's options (UserError
    on bad input). With no ``--port`` and no ``--calibration``, the default
    virtual finger on a rig wired like the built-in one comes with its built-in
    calibration, so the finger is drawn at once. Main thread.
    """
    from acquire.rig import load_rig
    from acquire.session import Session, load_calibration_for
    from acquire.sources.virtual import virtual_options_from_args

    rig = load_rig(args.rig)
    calibration = load_calibration_for(args.calibration, rig)
    vo = virtual_options_from_args(args, rig) if args.port is None else None
    if calibration is None and vo is not None:
        from acquire.virtual.builtin import BUILTIN_SEED, builtin_calibration

        if vo.seed == BUILTIN_SEED:  # the simulated finger comes calibrated: the finger bends at once
            calibration = builtin_calibration(rig)
    return Session(
        port=args.port, rig=rig, calibration=calibration, record_path=args.record, record_label=args.label,
        publish=args.publish, publish_rate_hz=args.publish_rate_hz, allow_remote=args.publish_allow_remote,
        virtual_options=vo,
    )


def _live(args, stop: StopSignals) -> int:
    record = args.record
    session = live_session(args)
    have_display, why = display_available()
    windowed = have_display and not args.headless
    if not windowed and not args.headless:
        _say(f"{why}: running headless (acquisition{' and recording' if record else ''}, a status line "
             "every second; Ctrl-C stops)")
    app = make_app() if windowed else None
    session.start()
    _say(f"reading {session.source_name} at {session.rate_hz:g} Hz")
    if record is not None:
        _say(f"recording to {record}")
    summary = None
    try:
        if windowed:
            from .window import SensorWindow

            window = SensorWindow(source=session)
            window.show()
            exec_app(app, stop=stop, duration_s=args.duration)
            window.close()
        else:
            _live_headless(session, stop=stop, duration_s=args.duration)
    finally:
        try:
            summary = session.stop_recording()
        finally:
            session.stop()
    return _report(session, summary)


def _report(session, summary) -> int:
    """Say what was recorded and what failed; 1 if any thread of the session failed."""
    if summary is not None:
        labels = summary["labels"]
        _say(f"{summary['path']}: {summary['frames']} frames, {_fmt_mb(summary['bytes'])}, {len(labels)} labels")
    errors = session.errors()
    for err in errors:
        _say(err)
    return 1 if errors else 0


def _tick(stop: StopSignals, started: float, duration_s: float | None) -> bool:
    """Wait up to a second (less at the end of ``duration_s``); False when it is time to stop."""
    wait = 1.0
    if duration_s is not None:
        left = started + duration_s - time.monotonic()
        if left <= 0:
            return False
        wait = min(wait, left)
    return not stop.event.wait(wait)


def _known_flat(session, was_flat: bool) -> bool:
    """Tell the drift tracker when the sensor is known flat (a flat hold or an open flat label), as the window does."""
    from acquire.core.drift_live import is_flat_label

    vo = session.virtual_options
    flat = (session.port is None and vo is not None and is_flat_label(vo.hold)) or is_flat_label(session.open_label)
    if session.chain is not None and flat != was_flat:
        (session.chain.drift.flat_from if flat else session.chain.drift.flat_until)(-math.inf if flat else math.nan)
    return flat


def _live_headless(session, *, stop: StopSignals, duration_s: float | None) -> None:
    # a failed recording is shown and acquisition goes on, as in the window
    tty = sys.stderr.isatty()
    started = time.monotonic()
    flat = False
    while _tick(stop, started, duration_s):
        flat = _known_flat(session, flat)
        line = status_line(session.status())
        if tty:
            sys.stderr.write("\r" + line[:200].ljust(120))
        else:
            sys.stderr.write(line + "\n")
        sys.stderr.flush()
    if tty:
        sys.stderr.write("\n")


# ----------------------------------------------------------------------------- replay


def _replay(args, stop: StopSignals) -> int:
    from acquire.sources.replay import ReplaySource

    if not 0.1 <= args.speed <= 20.0:
        raise UserError(f"--speed {args.speed:g}: must be 0.1 .. 20")
    markers = None
    if getattr(args, "markers", None):  # checked (and aligned) before anything opens
        from acquire.commands.calibrate_motion import marker_overlay

        markers = marker_overlay(args.file, args.markers)
    have_display, why = display_available()
    windowed = have_display and not args.headless
    if not windowed and not args.headless:
        _say(f"{why}: replaying headless at {args.speed:g}× with a status line every second (Ctrl-C stops)")
    app = make_app() if windowed else None
    src = ReplaySource(path=args.file, calibration=args.calibration, follow=args.follow).start()
    try:
        src.wait_ready()
        if src.recovered:
            _say(f"{args.file}: was left unclosed by a stopped recorder; recovered")
        src.set_speed(args.speed)
        if not args.paused:
            src.play()
        if windowed:
            from .window import SensorWindow

            window = SensorWindow(source=src, markers=markers)
            window.show()
            exec_app(app, stop=stop, duration_s=args.duration)
            window.close()
        else:
            _replay_headless(src, stop=stop, duration_s=args.duration)
    finally:
        src.stop()
    return 0


def _replay_headless(src, *, stop: StopSignals, duration_s: float | None) -> None:
    started = time.monotonic()
    while _tick(stop, started, duration_s):
        st = src.status()
        labels = [lab.text for lab in src.labels if lab.t_start_s <= src.position_s <= lab.t_end_s]
        line = (f"t {st['position_s']:.3f} / {st['duration_s']:.3f} s | frame {src.position_index + 1} of "
                f"{st['frames']} | {st['speed']:g}×" + (f" | label {', '.join(labels)}" if labels else ""))
        print(line, file=sys.stderr, flush=True)
        if not st["playing"] and not src.follow:
            break


# ----------------------------------------------------------------------------- health


def _text_drift_monitor(session, rig, calibration, vo):
    """The flat-drift monitor of ``health --text``: only with a calibration and the sensor held flat (``--hold flat``)."""
    from acquire.core.drift_live import FlatDriftMonitor, is_flat_label

    if calibration is None or vo is None or not is_flat_label(vo.hold):
        return None
    monitor = FlatDriftMonitor(cursor=session.cursor(), rig=rig, rate_hz=session.rate_hz,
                               adc_bits=session.adc_bits, calibration=calibration)
    monitor.tracker.flat_from(-math.inf)
    return monitor


def _health(args, stop: StopSignals) -> int:
    from acquire.core.health import HealthMonitor, format_health_table
    from acquire.rig import load_rig
    from acquire.session import Session
    from acquire.sources.virtual import virtual_options_from_args

    from acquire.session import load_calibration_for

    rig = load_rig(args.rig)
    calibration = load_calibration_for(args.calibration, rig)
    vo = virtual_options_from_args(args, rig) if args.port is None else None
    have_display, why = display_available()
    windowed = have_display and not args.text
    if not windowed and not args.text:
        _say(f"{why}: printing the health table every second instead (Ctrl-C stops)")
    app = make_app() if windowed else None
    session = Session(port=args.port, rig=rig, virtual_options=vo, view=False)
    session.start()
    try:
        if windowed:
            from .health_view import HealthWindow

            window = HealthWindow(session=session, window_s=args.window, calibration=calibration)
            window.show()
            exec_app(app, stop=stop, duration_s=args.duration)
            window.close()
        else:
            monitor = HealthMonitor(cursor=session.cursor(), rig=rig, adc_bits=session.adc_bits,
                                    rate_hz=session.rate_hz, counters=session.reader.all_counters,
                                    window_s=args.window)
            drift = _text_drift_monitor(session, rig, calibration, vo)
            tty = sys.stdout.isatty()
            started = time.monotonic()
            while _tick(stop, started, args.duration):
                monitor.update()
                table = format_health_table(monitor.report())
                if drift is not None:
                    drift.update()
                    table += "\n" + (drift_part(drift.tracker.readout().as_status()) or "flat drift: measuring")
                if tty:
                    sys.stdout.write("\x1b[H\x1b[J")  # redraw in place
                sys.stdout.write(table + "\n\n")
                sys.stdout.flush()
    finally:
        session.stop()
    return 0


# ----------------------------------------------------------------------------- export


def _export(args, stop: StopSignals) -> int:
    have_display, _ = display_available()
    if not have_display:
        os.environ["QT_QPA_PLATFORM"] = "offscreen"  # render without a screen
    app = make_app()  # held until the image is written: a collected QApplication takes Qt down with it
    from .export import export_recording_shape

    out = export_recording_shape(path=args.file, out=args.out, time_s=args.time, calibration=args.calibration,
                                 force=args.force, markers=getattr(args, "markers", None))
    _say(f"wrote {out}")
    del app
    return 0


_COMMANDS = {"live": _live, "replay": _replay, "health": _health, "export": _export}


def run_command(args) -> int:
    """Run ``args.command`` (one of live, replay, health, export); returns the exit status.

    Raises
    ------
    UserError
        Bad input (reported by the caller as one line, exit 2).
    """
    handler = _COMMANDS.get(args.command)
    if handler is None:
        raise UserError(f"{args.command}: not a display command")
    with StopSignals() as stop:
        return int(handler(args, stop) or 0)
