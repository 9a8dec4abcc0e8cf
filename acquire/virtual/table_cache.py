"""The virtual finger's solved mechanics, kept on disk between processes.

Solving the elastica grid (:func:`acquire.virtual.elastica.elastica_tables`)
takes one to a few seconds; every process that starts a virtual finger
(``live``, ``virtual-device``, the tests' command lines) would pay it again.
The tables are stored as ``.npz`` (numpy's own format, no pickling) in the user's
cache folder: ``$TAPCURVE_CACHE_DIR`` if set (empty: no disk cache), else
``$XDG_CACHE_HOME/tapcurve`` or ``~/.cache/tapcurve``. A file's name is a hash of
the parameters and of the solver's source file, so a changed solver or
parameter set never reads an old table. A file that cannot be read is solved
again and replaced; a folder that cannot be written is no error (the tables
are then solved in every process). Files are written under a temporary name
and renamed, so two processes starting together never read half a file.
Deleting the folder at any time is safe (a few MB).

Threads: any thread; the functions keep no state.
"""
from __future__ import annotations

import hashlib
import os
import tempfile
from pathlib import Path

import numpy as np

__all__ = ["cache_dir", "load_tables", "store_tables"]


def cache_dir() -> Path | None:
    """The folder for cached tables, or None when the disk cache is switched off (``TAPCURVE_CACHE_DIR=``)."""
    env = os.environ.get("TAPCURVE_CACHE_DIR")
    if env is not None:
        return Path(env) if env.strip() else None
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "tapcurve"


def _path(params: tuple, code_file: str) -> Path | None:
    folder = cache_dir()
    if folder is None:
        return None
    h = hashlib.sha256(repr(params).encode())
    h.update(Path(code_file).read_bytes())
    return folder / f"elastica-{h.hexdigest()[:24]}.npz"


def load_tables(params: tuple, code_file: str) -> dict | None:
    """The arrays stored for ``params`` (new arrays), or None when there are none or they cannot be read."""
    try:
        path = _path(params, code_file)
        if path is None or not path.is_file():
            return None
        with np.load(path, allow_pickle=False) as f:
            return {k: f[k] for k in f.files}
    except (OSError, ValueError, KeyError, EOFError):  # unreadable or half-foreign: solve again
        return None


def store_tables(params: tuple, code_file: str, arrays: dict) -> None:
    """Keep ``arrays`` for ``params``; any failure to write is silent (the cache is an optimisation)."""
    try:
        path = _path(params, code_file)
        if path is None:
            return
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".elastica-", suffix=".npz.tmp")
        try:
            with os.fdopen(fd, "wb") as f:
                np.savez(f, **arrays)
            os.replace(tmp, path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
    except OSError:
        pass
