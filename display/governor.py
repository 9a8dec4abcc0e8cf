"""The redraw rate a window can afford: pure bookkeeping, no Qt (any thread, one owner).

The sensor window feeds it the monotonic time and its GUI thread's CPU time at
every redraw tick, and runs its timer at :attr:`RedrawGovernor.rate_hz`.
"""
from __future__ import annotations

__all__ = ["RedrawGovernor", "redraw_ladder"]


class RedrawGovernor:
    """The redraw rate the window can afford: steps down when the GUI thread is loaded or late, back up when idle.

    Pure bookkeeping, fed timings by the window (and by tests, synthetic
    ones): at every redraw tick, the monotonic time and the GUI thread's CPU
    time. Two signals, smoothed over about ``smooth_s`` of wall time (not a
    count of ticks: a single slow paint, an axis redrawn for new ticks, must
    not read as a busy machine):

    - *load*: GUI-thread CPU per wall second (cores). Above ``budget_cores``
      the window would take more than its share: on a two-core laptop at
      1 kHz, the reader, processing and recorder threads and the OS need the
      rest (a 40 % budget; common practice, no source);
    - *lateness*: how much later than its interval the timer fired, in
      intervals. A timer that fires a quarter of an interval late, on
      average, means the machine does not give the GUI thread the CPU when
      asked (busy with others), so drawing more often only queues work.

    Either over its limit without a break for ``hold_down_s`` steps the rate down the ladder
    (60 -> 30 -> 20 -> 15 Hz). Stepping up needs the load *predicted* at the
    higher rate under ``up_share`` of the budget and the lateness under half
    its limit, without a break for ``hold_up_s``: the gap between the
    thresholds is the hysteresis that keeps the rate from flapping. A late
    timer cannot be predicted, only tried: when a rate just stepped up to does
    not hold (it steps down again within two holds), the wait before the next
    try doubles, up to a minute.

    Parameters
    ----------
    rates_hz : sequence of float
        The ladder, highest first.
    budget_cores : float
        GUI-thread load allowed, cores.
    late_limit : float
        Smoothed lateness, in intervals, that counts as busy.
    up_share : float
        Share of the budget the predicted load must stay under to step up.
    smooth_s : float
        Time constant of both signals' smoothing, wall s.
    hold_down_s, hold_up_s : float
        Time a signal must stay over (under) its limit, and since the last
        change, before stepping down (up), s.
    warmup_s : float
        No step in the first seconds: the first paints fill caches and cost
        more than the ones that follow.

    Attributes
    ----------
    load_cores, lateness : float
        The smoothed signals.
    """

    def __init__(self, *, rates_hz=(60.0, 30.0, 20.0, 15.0), budget_cores: float = 0.4,
                 late_limit: float = 0.25, up_share: float = 0.6, smooth_s: float = 1.0,
                 hold_down_s: float = 1.0, hold_up_s: float = 4.0, warmup_s: float = 2.0):
        self.rates_hz = tuple(float(r) for r in rates_hz)
        self.budget_cores = float(budget_cores)
        self.late_limit = float(late_limit)
        self.up_share = float(up_share)
        self.smooth_s = float(smooth_s)
        self.hold_down_s = float(hold_down_s)
        self.hold_up_s = float(hold_up_s)
        self.warmup_s = float(warmup_s)
        self.level = 0
        self.load_cores = 0.0
        self.lateness = 0.0
        self._last = None
        self._changed_s = None
        self._calm_s = None  # since when stepping up would be allowed
        self._up_wait_s = self.hold_up_s  # grows while tries of a higher rate fail
        self._raised_s = None  # when the rate last stepped up
        self._busy_s = None  # since when a signal is over its limit

    @property
    def rate_hz(self) -> float:
        return self.rates_hz[self.level]

    @property
    def interval_s(self) -> float:
        return 1.0 / self.rate_hz

    def status(self) -> str:
        """Empty at the full rate, else e.g. ``redraw 30 Hz: machine busy``."""
        return "" if self.level == 0 else f"redraw {self.rate_hz:g} Hz: machine busy"

    def tick(self, *, now_s: float, cpu_s: float) -> bool:
        """Account one redraw tick; True when the rate changed (read :attr:`rate_hz`)."""
        if self._last is None:
            self._last = (now_s, cpu_s)
            self._changed_s = now_s + self.warmup_s - self.hold_down_s  # the first step-down after the warm-up
            return False
        wall = now_s - self._last[0]
        busy = cpu_s - self._last[1]
        self._last = (now_s, cpu_s)
        if wall <= 0:
            return False
        alpha = min(1.0, wall / self.smooth_s)
        self.load_cores += alpha * (busy / wall - self.load_cores)
        late = max(0.0, wall - self.interval_s) / self.interval_s
        self.lateness += alpha * (late - self.lateness)
        if self._busy(now_s) and self.level + 1 < len(self.rates_hz) and now_s - self._changed_s >= self.hold_down_s:
            return self._step(+1, now_s)
        if self.level > 0 and self._calm(now_s) and now_s - self._calm_s >= self._up_wait_s:
            return self._step(-1, now_s)
        return False

    def _busy(self, now_s: float) -> bool:
        # over a limit now and for hold_down_s without a break
        if not (self.load_cores > self.budget_cores or self.lateness > self.late_limit):
            self._busy_s = None
            return False
        if self._busy_s is None:
            self._busy_s = now_s
        return now_s - self._busy_s >= self.hold_down_s

    def _calm(self, now_s: float) -> bool:
        predicted = self.load_cores * self.rates_hz[self.level - 1] / self.rate_hz
        calm = predicted < self.up_share * self.budget_cores and self.lateness < 0.5 * self.late_limit
        if not calm:
            self._calm_s = None
        elif self._calm_s is None:
            self._calm_s = now_s
        return calm

    def _step(self, direction: int, now_s: float) -> bool:
        old = self.rate_hz
        if direction > 0 and self._raised_s is not None and now_s - self._raised_s < 2.0 * self.hold_up_s:
            self._up_wait_s = min(60.0, 2.0 * self._up_wait_s)  # the rate tried did not hold: wait longer
        self._raised_s = now_s if direction < 0 else None
        self.level += direction
        # the load scales with the rate; the lateness is measured afresh at the new interval
        self.load_cores *= self.rate_hz / old
        self.lateness = 0.0
        self._changed_s = now_s
        self._calm_s = self._busy_s = None
        return True


def redraw_ladder(redraw_hz: float) -> tuple[float, ...]:
    """The rates a window asked to redraw at ``redraw_hz`` may step down to: itself, then 30, 20, 15 Hz below it."""
    return (float(redraw_hz),) + tuple(r for r in (30.0, 20.0, 15.0) if r < redraw_hz)
