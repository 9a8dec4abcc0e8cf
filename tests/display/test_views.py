"""The redraw governor: the window's adaptive redraw rate, fed synthetic timings (no wall clock)."""
from __future__ import annotations

import pytest

from display.governor import RedrawGovernor, redraw_ladder


def run(gov: RedrawGovernor, *, seconds: float, load_cores: float, late_intervals: float = 0.0,
        t0: float = 0.0, cpu0: float = 0.0) -> tuple[float, float, list[float]]:
    """Feed ticks at the governor's rate (late by ``late_intervals``) with the GUI thread busy
    ``load_cores`` of the wall time; returns the end time, end CPU and the rate after each tick."""
    t, cpu, rates = t0, cpu0, []
    while t < t0 + seconds:
        wall = gov.interval_s * (1.0 + late_intervals)
        t += wall
        cpu += load_cores * wall
        gov.tick(now_s=t, cpu_s=cpu)
        rates.append(gov.rate_hz)
    return t, cpu, rates


def test_ladder():
    assert redraw_ladder(60.0) == (60.0, 30.0, 20.0, 15.0)
    assert redraw_ladder(30.0) == (30.0, 20.0, 15.0)


def test_an_idle_machine_keeps_the_full_rate():
    gov = RedrawGovernor()
    _, _, rates = run(gov, seconds=20, load_cores=0.15)
    assert set(rates) == {60.0} and gov.status() == ""


def test_a_slow_paint_now_and_then_keeps_the_full_rate():
    # 4 ms per redraw (0.24 core at 60 Hz) and, twice a second, one paint of 60 ms (a new axis, a resize):
    # the mean load (0.36 core) stays under the budget and no spike lasts the hold, so the rate stays
    gov = RedrawGovernor()
    t, cpu, rates = 0.0, 0.0, []
    for i in range(60 * 20):
        t += gov.interval_s
        cpu += 0.004 + (0.060 if i % 30 == 0 else 0.0)
        gov.tick(now_s=t, cpu_s=cpu)
        rates.append(gov.rate_hz)
    assert set(rates) == {60.0} and gov.status() == ""


def test_a_costly_redraw_steps_down_until_under_the_budget():
    # 0.6 core at 60 Hz (10 ms per redraw): over the 0.4 budget; at 30 Hz the same redraws cost 0.3 core
    gov = RedrawGovernor()
    per_redraw_s = 0.010
    t, cpu, rates = 0.0, 0.0, []
    for _ in range(2000):
        t += gov.interval_s
        cpu += per_redraw_s
        gov.tick(now_s=t, cpu_s=cpu)
        rates.append(gov.rate_hz)
    assert rates[0] == 60.0 and rates[-1] == 30.0
    assert gov.status() == "redraw 30 Hz: machine busy"
    # no flapping: predicted 0.6 core at 60 Hz is over the budget, so it stays down
    assert rates[len(rates) // 4:].count(60.0) == 0
    assert gov.load_cores == pytest.approx(0.3, rel=0.05)


def test_a_late_timer_steps_down_to_what_the_machine_delivers():
    # the timer fires only every 65 ms (a busy machine), whatever the interval asked, with little CPU
    # at 15 Hz the timer is on time, so only a try shows whether 20 Hz would hold: the tries space out
    gov = RedrawGovernor()
    t, cpu, at_15_s, ups = 0.0, 0.0, 0.0, []
    while t < 120.0:
        wall = max(gov.interval_s, 0.065)
        t += wall
        cpu += 0.001
        low = gov.rate_hz == 15.0
        at_15_s += wall if low else 0.0
        if gov.tick(now_s=t, cpu_s=cpu) and low:
            ups.append(t)
    assert gov.rate_hz in (15.0, 20.0) and "Hz: machine busy" in gov.status()
    assert at_15_s / t > 0.8
    gaps = [b - a for a, b in zip(ups, ups[1:])]
    assert len(ups) >= 3 and all(b > 1.5 * a for a, b in zip(gaps, gaps[1:]))


def test_steps_back_up_only_after_the_hold_and_with_margin():
    gov = RedrawGovernor(hold_up_s=4.0)
    t, cpu, _ = run(gov, seconds=10, load_cores=0.0, late_intervals=1.5)  # busy: late by 1.5 intervals
    assert gov.rate_hz < 60.0
    low = gov.rate_hz
    # the machine is free again: on time, light load; the rate climbs one step per hold, not at once
    t1, cpu, rates = run(gov, seconds=3.5, load_cores=0.05, t0=t, cpu0=cpu)
    assert set(rates) == {low}
    _, _, rates = run(gov, seconds=30, load_cores=0.05, t0=t1, cpu0=cpu)
    assert rates[-1] == 60.0 and gov.status() == ""
    ups = [b for a, b in zip(rates, rates[1:]) if b > a]
    assert ups == sorted(ups) and len(ups) == len(set(ups))  # one step at a time


def test_never_below_the_last_step():
    gov = RedrawGovernor()
    run(gov, seconds=60, load_cores=2.0, late_intervals=3.0)
    assert gov.rate_hz == 15.0


def test_no_step_during_the_warm_up():
    gov = RedrawGovernor(warmup_s=2.0)
    _, _, rates = run(gov, seconds=1.9, load_cores=0.9)
    assert set(rates) == {60.0}
    _, _, rates = run(RedrawGovernor(warmup_s=2.0), seconds=3.0, load_cores=0.9)
    assert rates[-1] < 60.0


def test_peak_envelope_keeps_every_peak_and_gap():
    # closed form: the min / max of each group of buckets is the min / max of its rows
    import numpy as np

    from display.plot_cost import peak_envelope

    rng = np.random.default_rng(3)
    buckets = np.sort(rng.normal(size=(10, 2, 3)), axis=1)  # (min, max) per bucket, 3 columns
    buckets[4, :, 1] = np.nan  # a gap in column 1
    rows = buckets.reshape(20, 3)
    out = peak_envelope(rows, 3)
    assert out.shape == (6, 3)  # 10 // 3 groups; the oldest bucket left out
    groups = buckets[1:].reshape(3, 3, 2, 3)
    assert np.array_equal(out[0::2], np.min(groups, axis=(1, 2)), equal_nan=True)
    assert np.array_equal(out[1::2], np.max(groups, axis=(1, 2)), equal_nan=True)
    assert np.isnan(out[2:4, 1]).all() and np.isfinite(np.delete(out, [2, 3], axis=0)).all()
    t = np.repeat(np.arange(10.0), 2)[:, None]
    assert np.array_equal(peak_envelope(t, 3, time=True)[:, 0], np.repeat([2.0, 5.0, 8.0], 2))
    assert peak_envelope(rows, 1) is rows
