"""The built-in virtual finger: a simulated sensor board on a pseudo-terminal.

Demo scenario, made up for the demo: one finger of a greenhouse tomato-picking
gripper. :class:`FingerModel` is the physics (elastica, time courses, divider
electrics, ADC), pure and deterministic; :class:`StripSettings` makes the
strip real (creep, hysteresis, drift); :class:`VirtualFinger` puts it on a
real pty speaking wire protocol v1 and can film itself (:mod:`.camera`); the
command line part serves ``tapcurve virtual-device``;
:func:`builtin_calibration` is the calibration it comes with.
"""
from acquire.virtual.builtin import builtin_calibration
from acquire.virtual.camera import Camera, CameraSettings, write_marker_csv
from acquire.virtual.cli import add_virtual_device_arguments, run_virtual_device
from acquire.virtual.device import VirtualFinger
from acquire.virtual.model import Faults, FingerModel
from acquire.virtual.strip import RealStrip, StripSettings

__all__ = [
    "VirtualFinger", "FingerModel", "Faults", "add_virtual_device_arguments", "run_virtual_device",
    "builtin_calibration", "StripSettings", "RealStrip", "CameraSettings", "Camera", "write_marker_csv",
]
