"""The host side of tapcurve without a screen (rooms: link, store, core, session, serve, sources, commands, virtual).

Import the submodules directly (``from acquire.link.reader import SerialReader``);
this package keeps only the few names most scripts need, loaded on first use
so that ``tapcurve --help`` does not pay for numpy and h5py.
"""
from acquire.errors import UserError

__all__ = ["UserError", "FrameBlock", "FrameRing", "open_recording", "Rig", "load_rig"]

_LAZY = {
    "FrameBlock": "acquire.link.frames",
    "FrameRing": "acquire.link.frames",
    "open_recording": "acquire.store.recording",
    "Rig": "acquire.rig",
    "load_rig": "acquire.rig",
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'acquire' has no attribute {name!r}")
