"""Device-to-host clock alignment: offset and drift, estimated as frames arrive.

Host receive time = device time + offset + latency, where latency >= 0 and
varies from read to read. The smallest ``t_host - t_device`` in each batch of
frames sits closest to the true offset (least latency), so the recorder keeps
one such lower-envelope point per flush and fits a straight line through
them: its slope is the device clock's drift against the host's monotonic
clock (parts per million; positive: the host clock runs ahead, i.e. the
device clock is slow), its intercept the offset. With these, device time maps
to host time (and so to other instruments stamped on the host) to within the
link latency.
"""
from __future__ import annotations

import numpy as np

__all__ = ["ClockFit"]


class ClockFit:
    """Running least-squares fit of offset(t_device) = a + b * t_device.

    Not thread-safe; owned by the recorder thread.
    """

    def __init__(self):
        self._n = 0
        self._sx = self._sy = self._sxx = self._sxy = 0.0
        self._x0: float | None = None  # centre for numerical stability

    def add_batch(self, t_device_s: np.ndarray, t_host_s: np.ndarray) -> tuple[float, float] | None:
        """Add one batch; returns its lower-envelope point (t_device_s, offset_s) or None."""
        if t_device_s.shape[0] == 0:
            return None
        off = t_host_s - t_device_s
        k = int(np.argmin(off))
        x, y = float(t_device_s[k]), float(off[k])
        if self._x0 is None:
            self._x0 = x
        dx = x - self._x0
        self._n += 1
        self._sx += dx
        self._sy += y
        self._sxx += dx * dx
        self._sxy += dx * y
        return x, y

    @property
    def n_points(self) -> int:
        return self._n

    def estimate(self) -> tuple[float, float]:
        """(drift_ppm, offset_s at t_device = 0); NaN drift until two points span time."""
        n = self._n
        if n == 0:
            return float("nan"), float("nan")
        den = n * self._sxx - self._sx**2
        if n < 2 or den <= 1e-12:
            return float("nan"), self._sy / n
        b = (n * self._sxy - self._sx * self._sy) / den
        a = (self._sy - b * self._sx) / n - b * (self._x0 or 0.0)
        return b * 1e6, a
