"""Thread and process basics every room may use: the one worker base and the stop signals."""
from acquire.threads.signals import StopSignals
from acquire.threads.worker import Worker

__all__ = ["StopSignals", "Worker"]
