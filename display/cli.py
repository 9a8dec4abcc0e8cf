"""The ``tapcurve`` console command: the command line of :mod:`acquire.commands.cli`, with the windows.

``acquire`` never imports Qt; this entry point hands it the commands that
may open a window (``live``, ``replay``, ``health``, ``export``), which are
imported only when one of them runs, so ``tapcurve --help``, ``record``,
``inspect`` or ``process`` never load Qt.
"""
from __future__ import annotations

import sys

__all__ = ["main"]


def _window_commands(args) -> int:
    from display.app import run_command

    return run_command(args)


def main(argv: list[str] | None = None) -> int:
    """Run ``tapcurve`` with ``argv`` (default: the process's arguments); returns the exit status."""
    from acquire.commands.cli import main as run

    return run(argv, window_commands=_window_commands)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
