"""Errors a user can cause. The command line turns them into one line and exit status 2."""
from __future__ import annotations

__all__ = ["UserError"]


class UserError(Exception):
    """A fault in what the user gave (a file, a port, a value).

    The message names the thing at fault and is shown as it is, on one line,
    with no traceback.
    """
