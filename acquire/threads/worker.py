"""One base for every background thread: start, stop with a timeout, failures captured.

Every thread of tapcurve (serial reader, recorder, shape stream, the session's
processing, the replay worker) is a :class:`Worker`. The rules it keeps:

- :meth:`Worker.start_thread` starts the thread once; the thread runs
  :meth:`Worker.run` until it returns or :attr:`Worker.stopping` is set.
- An exception escaping ``run`` never dies silently: its one-line text lands
  in :attr:`Worker.error`, which the session shows in the status line and
  turns into exit status 1. A worker may also set a failure itself with
  :meth:`Worker.fail` (the first failure wins).
- :meth:`Worker.stop_thread` asks the thread to stop and waits at most
  ``timeout_s``; a thread that does not stop in time is reported as a failure,
  never waited on for ever (the threads are daemons, so the process can exit).

Thread rules: ``start_thread`` and ``stop_thread`` from the owning thread
(usually the main thread); :attr:`error`, :attr:`running` and
:attr:`stopping` from any thread.
"""
from __future__ import annotations

import threading

__all__ = ["Worker"]


class Worker:
    """Base class of a background thread with a captured failure.

    Parameters
    ----------
    name : str
        Thread name, also the first words of a failure text.
    """

    def __init__(self, *, name: str):
        self.name = name
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._error_lock = threading.Lock()
        self.error: str | None = None

    # -- any thread --------------------------------------------------------------------
    @property
    def running(self) -> bool:
        """True while the thread runs."""
        t = self._thread
        return t is not None and t.is_alive()

    @property
    def stopping(self) -> bool:
        """True once a stop was asked for."""
        return self._stop.is_set()

    def fail(self, text: str) -> None:
        """Record a failure (one line); the first one is kept."""
        with self._error_lock:
            if self.error is None:
                self.error = text

    # -- owning thread ------------------------------------------------------------------
    def start_thread(self) -> None:
        """Start the thread running :meth:`run` (once)."""
        if self._thread is not None:
            raise RuntimeError(f"{self.name}: started twice")
        self._thread = threading.Thread(target=self._main, name=self.name, daemon=True)
        self._thread.start()

    def stop_thread(self, *, timeout_s: float = 5.0) -> bool:
        """Ask the thread to stop and wait up to ``timeout_s`` s; False (and a failure) if it did not."""
        self._stop.set()
        self.on_stop_requested()
        t = self._thread
        if t is None or t is threading.current_thread():
            return True
        t.join(timeout=timeout_s)
        if t.is_alive():
            self.fail(f"{self.name}: did not stop within {timeout_s:g} s")
            return False
        return True

    # -- for subclasses -------------------------------------------------------------------
    def run(self) -> None:  # pragma: no cover - abstract
        """The thread's work; return when :attr:`stopping` is set."""
        raise NotImplementedError

    def on_stop_requested(self) -> None:
        """Called on the owning thread right after a stop is asked for (wake the thread up)."""

    def _main(self) -> None:
        try:
            self.run()
        except BaseException as exc:  # noqa: BLE001 - captured, shown, never silent
            self.fail(f"{self.name} failed: {type(exc).__name__}: {exc}")
