"""tapcurve's windows (Qt, pyqtgraph): live and replay view, wiring health, image export.

Nothing in this package reads a port or an HDF5 file: the sources in
:mod:`acquire.session` and :mod:`acquire.sources` do, on their own threads, and publish state that the
windows' timers pull. Import :mod:`display.app` for the command line entry.
"""

__all__ = ["app", "window", "views", "health_view", "export", "theme"]
