"""One way to stop a command cleanly: SIGINT (Ctrl-C), SIGTERM and SIGHUP.

A hang-up (an SSH session dropping) is treated like SIGTERM: the command
finishes its recording, closes the file with its labels ended and exits, as
for Ctrl-C. Used by every command that runs until stopped (``record``,
``live``, ``replay``, ``health``, ``virtual-device``).

Thread rules: install (``with StopSignals() as stop``) on the main thread,
which is where Python runs signal handlers; :attr:`StopSignals.event` may be
waited on from any thread; hooks run on the main thread.
"""
from __future__ import annotations

import signal
import threading
from typing import Callable

__all__ = ["StopSignals", "STOP_SIGNALS"]

#: the signals that stop a command cleanly (SIGHUP where the platform has it)
STOP_SIGNALS = tuple(getattr(signal, n) for n in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, n))


class StopSignals:
    """While installed, the stop signals set :attr:`event` and call the hooks instead of ending the process."""

    def __init__(self):
        self.event = threading.Event()
        self.signal_name: str | None = None
        self._hooks: list[Callable[[], None]] = []
        self._old: dict = {}

    def add_hook(self, hook: Callable[[], None]) -> None:
        """Call ``hook()`` (main thread) when a stop signal arrives, e.g. to quit a Qt event loop."""
        self._hooks.append(hook)

    def remove_hook(self, hook: Callable[[], None]) -> None:
        if hook in self._hooks:
            self._hooks.remove(hook)

    def _on_signal(self, signum, frame) -> None:
        self.signal_name = signal.Signals(signum).name
        self.event.set()
        for hook in list(self._hooks):
            hook()

    def __enter__(self) -> "StopSignals":
        for sig in STOP_SIGNALS:
            self._old[sig] = signal.signal(sig, self._on_signal)
        return self

    def __exit__(self, *exc) -> None:
        for sig, old in self._old.items():
            signal.signal(sig, old)
        self._old.clear()
