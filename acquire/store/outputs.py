"""One check for every file a command is about to write: recordings are never overwritten.

Every command that writes a file (a recording, a calibration, an image, a
ground-truth or marker file) calls :func:`check_output` before it opens
anything, so the rules are the same everywhere:

- the folder must exist and be writable, and the name must fit the file
  system (255 bytes a name, 4096 bytes a path on Linux);
- the output must not be one of the command's inputs (whatever the flags);
- an existing file is refused, unless the command allows ``--force`` for its
  kind of output (a calibration, an image); an existing *recording* (an HDF5
  file) is refused even then.

Pure checks on the file system; any thread.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Iterable

from acquire.errors import UserError

__all__ = ["check_output", "check_folder", "is_hdf5_file", "check_path_name"]

#: the first 8 bytes of every HDF5 file (HDF5 File Format Specification, "Format Signature")
HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"

#: longest file name (one path component) on ext4, XFS, btrfs and tmpfs, bytes
NAME_MAX_BYTES = 255
#: longest path the Linux kernel accepts in one call, bytes, its terminating NUL included (PATH_MAX)
PATH_MAX_BYTES = 4096


def is_hdf5_file(path: str | os.PathLike) -> bool:
    """True when ``path`` is a file that starts with the HDF5 signature (a recording or another HDF5 file)."""
    try:
        with open(path, "rb") as f:
            return f.read(8) == HDF5_SIGNATURE
    except OSError:
        return False


def check_path_name(path: str | os.PathLike, *, option: str = "") -> Path:
    """Refuse a path whose file name is longer than the file system allows (one line, names the option)."""
    p = Path(path)
    where = f"{option} " if option else ""
    for part in p.parts:
        if len(os.fsencode(part)) > NAME_MAX_BYTES:
            raise UserError(f"{where}{str(p)[:60]}...: a name in this path is longer than {NAME_MAX_BYTES} bytes")
    if len(os.fsencode(os.path.abspath(p))) >= PATH_MAX_BYTES:
        raise UserError(f"{where}{str(p)[:60]}...: the path is longer than {PATH_MAX_BYTES - 1} bytes")
    return p


def check_folder(path: str | os.PathLike, *, option: str = "--out") -> Path:
    """Check that the folder a new file ``path`` goes into exists and may be written; returns ``path``.

    Raises
    ------
    UserError
        The name is too long, the folder is missing, is a file, or cannot be
        written (permissions, a read-only file system); one line naming it.
    """
    out = check_path_name(path, option=option)
    folder = out.parent
    try:
        if not folder.is_dir():
            if folder.exists():
                raise UserError(f"{option} {out}: {folder} is a file, not a folder")
            raise UserError(f"{option} {out}: folder {folder} does not exist")
    except OSError as exc:  # a folder on the way that may not be searched
        raise UserError(f"{option} {out}: folder {folder} cannot be reached ({exc.strerror or exc})") from None
    # access() also reports a read-only file system, where even root cannot write
    if not os.access(folder, os.W_OK | os.X_OK):
        raise UserError(f"{option} {out}: folder {folder} is not writable")
    return out


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def check_output(
    path: str | os.PathLike,
    *,
    option: str = "--out",
    what: str = "output",
    inputs: Iterable[str | os.PathLike] = (),
    force: bool = False,
    can_force: bool = False,
) -> Path:
    """Check that ``path`` may be written; returns it as a Path.

    Parameters
    ----------
    option : str
        The option that named the file, for the message (``--out``, ``--record``).
    what : str
        What will be written, for the message (``recording``, ``calibration``).
    inputs : iterable of paths
        The command's inputs: never written over.
    force : bool
        The user asked to replace an existing file (only where ``can_force``).
    can_force : bool
        This kind of output may be replaced with ``--force`` (never a recording).

    Raises
    ------
    UserError
        One line naming the file and the reason.
    """
    out = check_folder(path, option=option)
    for p in inputs:
        p = Path(p)
        if _same_file(out, p) or Path(os.path.abspath(out)) == Path(os.path.abspath(p)):
            raise UserError(f"{option} {out}: is also an input; write the {what} to another file")
    if out.is_dir():
        raise UserError(f"{option} {out}: is a folder")
    if out.exists() or out.is_symlink():
        if is_hdf5_file(out):
            raise UserError(f"{option} {out}: exists and is a recording; tapcurve never overwrites a recording")
        if not (force and can_force):
            hint = " (or add --force to replace it)" if can_force else "; tapcurve never overwrites it"
            raise UserError(f"{option} {out}: exists; choose another name{hint}")
    return out
