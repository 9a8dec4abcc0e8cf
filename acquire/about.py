"""The one definition of the software version and of timestamps written into files.

Pure; any thread.
"""
from __future__ import annotations

import datetime as _dt

__all__ = ["software_version", "utc_now_iso"]


def software_version() -> str:
    """The installed tapcurve version, or ``0+unknown`` when run from a source tree that is not installed."""
    try:
        from importlib.metadata import version

        return version("tapcurve")
    except Exception:  # noqa: BLE001 - any metadata failure means "not installed"
        return "0+unknown"


def utc_now_iso() -> str:
    """Now, in UTC, as ISO 8601 with milliseconds and an explicit offset (``2026-12-02T11:40:00.123+00:00``)."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="milliseconds")
