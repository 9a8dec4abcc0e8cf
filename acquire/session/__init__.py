"""The wiring of an acquiring command: one session object, one worker base, signals, status line."""
from acquire.session.session import Session, load_calibration_for
from acquire.threads.worker import Worker

__all__ = ["Session", "Worker", "load_calibration_for"]
