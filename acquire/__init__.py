"""The host side of tapcurve without a screen.

Rig files, the serial reader, the frame ring, the HDF5 recorder, the numeric
core (readout, filters, calibration, reconstruction), wiring health, the
shape stream server, the virtual finger and the command line. Import the
submodules directly (``from acquire.link.reader import SerialReader``); this
package keeps only the few names most scripts need.
"""
from acquire.errors import UserError
from acquire.link.frames import FrameBlock, FrameRing
from acquire.store.recording import open_recording
from acquire.rig import Rig, load_rig

__all__ = ["UserError", "FrameBlock", "FrameRing", "open_recording", "Rig", "load_rig"]
