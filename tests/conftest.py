"""Shared test fixtures: the one wait helper, paths to the outside test vectors, offscreen Qt."""
from __future__ import annotations

import json
import os
import time
from pathlib import Path
from typing import Callable

import pytest

# CI has no display; Qt widgets render offscreen (set before any Qt import)
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

REPO = Path(__file__).resolve().parents[1]
SHARED = REPO.parent / "shared"


def _wait_until(cond: Callable[[], object], *, timeout_s: float, what: str, poll_s: float = 0.01):
    """Poll ``cond()`` until it is true; return its value. AssertionError naming ``what`` after ``timeout_s``.

    The condition is checked once more after the deadline has passed, so a
    slow machine that wakes late still sees a result that did arrive. Timeouts
    are limits for a hung part, not speed requirements: make them generous.
    """
    deadline = time.monotonic() + timeout_s
    while True:
        value = cond()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s:g} s waiting for {what}")
        time.sleep(poll_s)


@pytest.fixture(scope="session")
def wait_until():
    """The one wait helper: ``wait_until(cond, *, timeout_s, what, poll_s=0.01)``.

    A fixture (not an import) because pytest runs with ``--import-mode=importlib``,
    where test modules cannot import ``conftest``. Session-scoped, so module- and
    session-scoped fixtures can use it too. For Qt tests that need the event loop
    to run while waiting, use pytest-qt's ``qtbot.waitUntil`` instead.
    """
    return _wait_until


@pytest.fixture(scope="session")
def packet_vectors() -> dict:
    """Packets made outside this project (../shared/vectors/packets.json)."""
    path = SHARED / "vectors" / "packets.json"
    if not path.is_file():
        pytest.skip(f"{path} not present (a user's clone has no ../shared): external vectors skipped")
    return json.loads(path.read_text())
