"""The one worker base and the stop signals (acquire/threads/): the rules their docstrings state.

No outside reference applies: these are the project's own thread rules (DEVELOPERS.md), checked
as stated. Signals are real (os.kill of this process), waited on with the one helper.
"""
from __future__ import annotations

import os
import signal
import threading

import pytest

from acquire.threads import StopSignals, Worker


class _Loop(Worker):
    def __init__(self, *, raise_after: int | None = None, ignore_stop: bool = False):
        super().__init__(name="test loop")
        self.turns = 0
        self.raise_after = raise_after
        self.ignore_stop = ignore_stop
        self.release = threading.Event()

    def run(self) -> None:
        while not self.stopping or self.ignore_stop:
            self.turns += 1
            if self.raise_after is not None and self.turns >= self.raise_after:
                raise ValueError("bad frame")
            if self.ignore_stop and self.release.wait(0.01):
                return
            self._stop.wait(0.005)


def test_runs_until_stopped(wait_until):
    w = _Loop()
    w.start_thread()
    wait_until(lambda: w.turns > 3, timeout_s=10, what="the worker to run")
    assert w.running and not w.stopping
    assert w.stop_thread(timeout_s=10)
    assert not w.running and w.error is None
    with pytest.raises(RuntimeError, match="started twice"):
        w.start_thread()


def test_a_failure_is_captured_in_one_line_never_silent(wait_until):
    w = _Loop(raise_after=2)
    w.start_thread()
    wait_until(lambda: not w.running, timeout_s=10, what="the worker to fail")
    assert w.error == "test loop failed: ValueError: bad frame"
    w.fail("a later failure")  # the first one is kept
    assert w.error == "test loop failed: ValueError: bad frame"


def test_a_thread_that_does_not_stop_is_reported_not_waited_for():
    w = _Loop(ignore_stop=True)
    w.start_thread()
    assert not w.stop_thread(timeout_s=0.05)
    assert w.error == "test loop: did not stop within 0.05 s"
    w.release.set()


@pytest.mark.parametrize("name", ["SIGINT", "SIGTERM", "SIGHUP"])
def test_stop_signals_set_the_event_and_restore_the_handlers(name, wait_until):
    sig = getattr(signal, name)
    before = signal.getsignal(sig)
    hooked = []
    with StopSignals() as stop:
        stop.add_hook(lambda: hooked.append(True))
        os.kill(os.getpid(), sig)
        wait_until(stop.event.is_set, timeout_s=10, what=f"{name} to arrive")
        assert stop.signal_name == name and hooked == [True]
    assert signal.getsignal(sig) is before
