"""Wiring health: statistics of a window of frames per channel and per segment, with verdicts in words.

What is measured (all vectorised over the frames of the window)
---------------------------------------------------------------
Per channel: mean code, white-noise RMS, mains hum, minimum and maximum,
the fraction of frames at the ends of the ADC's range, and how long the code
has not changed. Per segment (tap k to tap k+1, tap S being ground): how
often the taps are out of order (v_k <= v_{k+1}), the mean drop across it and
its median resistance against ``rig.segment_ohm_range``. For the link: frames
lost and bad packets from the reader's counters.

Noise
    Estimated from second differences, ``sigma = sqrt(mean((x[n+1] - 2 x[n] +
    x[n-1])**2) / 6)``: for white noise of variance sigma^2 the (1, -2, 1)
    combination has variance (1 + 4 + 1) sigma^2, while a signal that moves
    smoothly (the finger bending) contributes almost nothing, so a moving
    finger does not read as a noisy channel.
Hum
    Least-squares fit of sine and cosine at 50 Hz and 60 Hz (with a cubic
    trend) on the device time axis, reported as the RMS of the fitted
    sinusoids. An ADC input whose wire is broken floats and picks up mains
    hum (common practice, no source), which is how an open tap differs from a
    merely noisy channel. Needs a frame rate above 130 Hz.

Thresholds (:class:`HealthThresholds`; defaults for a 10..16-bit
microcontroller ADC read at 100 Hz or more; all are rules of thumb, common
practice, no source):

==========================  ========  ==========================================
noise_warn_lsb / fault      3 / 8     white-noise RMS, LSB
hum_warn_lsb / fault        3 / 10    50+60 Hz RMS, LSB
stuck_s                     1.0       no code change at all this long (while
                                      another channel changes) = stuck
saturation_fault_fraction   0.5       at 0 or full scale in this share of frames
                                      (any at all: warning)
order_fault_fraction        0.02      tap k+1 at or above tap k in this share
short_lsb                   4         mean drop across a segment below this
                                      many LSB = the two taps are shorted
lost_warn_fraction / fault  0 / 0.05  frames lost on the link in the window
==========================  ========  ==========================================

The excitation voltage (for noise in mV) comes from the rig file's
``[readout] excitation_v`` if present (or a ``Rig.excitation_v`` attribute);
otherwise 3.3 V is assumed and the report says so.

Threads: :func:`assess_health` and :func:`format_health_table` are pure and
run on any thread; a :class:`HealthMonitor` belongs to the thread that calls
its methods (the GUI timer or the terminal loop). Returned objects are new.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from acquire.link.frames import FrameBlock, RingCursor
from acquire.core.verdicts import FAULT, OK, RANK, VERDICTS, WARN
from acquire.rig import Rig

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = [
    "OK",
    "WARN",
    "FAULT",
    "VERDICTS",
    "DEFAULT_EXCITATION_V",
    "HealthThresholds",
    "ChannelHealth",
    "SegmentHealth",
    "LinkHealth",
    "HealthReport",
    "assess_health",
    "noise_rms_lsb",
    "hum_rms_lsb",
    "excitation_voltage",
    "format_health_table",
    "HealthMonitor",
]

DEFAULT_EXCITATION_V = 3.3
_HUM_HZ = (50.0, 60.0)


def _worst(verdicts) -> str:
    return max(verdicts, key=RANK.__getitem__, default=OK)


@dataclass(frozen=True)
class HealthThresholds:
    """Limits for the verdicts (see the module docstring; rules of thumb, common practice, no source)."""

    noise_warn_lsb: float = 3.0
    noise_fault_lsb: float = 8.0
    hum_warn_lsb: float = 3.0
    hum_fault_lsb: float = 10.0
    stuck_s: float = 1.0
    saturation_fault_fraction: float = 0.5
    order_fault_fraction: float = 0.02
    short_lsb: float = 4.0
    lost_warn_fraction: float = 0.0
    lost_fault_fraction: float = 0.05
    min_frames: int = 20


class _Judged:
    """A row with a verdict: ``reason`` joins its reasons in words."""

    reasons: list[str]

    @property
    def reason(self) -> str:
        return "; ".join(self.reasons) if self.reasons else "ok"


@dataclass
class ChannelHealth(_Judged):
    """One channel over the window. Codes in LSB, voltages in mV of the excitation."""

    index: int
    name: str
    tap: int | None
    mean_code: float
    noise_lsb: float
    noise_mv: float
    hum_lsb: float
    min_code: int
    max_code: int
    saturated_fraction: float
    constant_s: float
    verdict: str = OK
    reasons: list[str] = field(default_factory=list)


@dataclass
class SegmentHealth(_Judged):
    """Segment k, between tap k and tap k+1 (tap S: the grounded end)."""

    index: int
    resistance_ohm: float
    order_violated_fraction: float
    mean_drop_lsb: float
    verdict: str = OK
    reasons: list[str] = field(default_factory=list)


@dataclass
class LinkHealth(_Judged):
    frames: int
    frames_lost: int
    bad_packets: int
    bad_by_cause: dict
    reconnects: int
    verdict: str = OK
    reasons: list[str] = field(default_factory=list)


@dataclass
class HealthReport:
    """Verdicts of one window.

    Attributes
    ----------
    window_s : float
        Device time spanned by the window, s.
    excitation_v : float
    excitation_assumed : bool
        True when 3.3 V was assumed (not in the rig).
    notes : list of str
        Remarks on the measurement itself (assumed excitation, hum not measured ...).
    """

    frames: int
    window_s: float
    adc_bits: int
    excitation_v: float
    excitation_assumed: bool
    channels: list[ChannelHealth]
    segments: list[SegmentHealth]
    link: LinkHealth | None
    notes: list[str]

    @property
    def verdict(self) -> str:
        rows = [c.verdict for c in self.channels] + [s.verdict for s in self.segments]
        if self.link is not None:
            rows.append(self.link.verdict)
        return _worst(rows)

    @property
    def healthy(self) -> bool:
        return self.verdict == OK

    def findings(self) -> list[tuple[str, str, str]]:
        """(verdict, item, reason) of every row that is not ok, worst first."""
        out = []
        for c in self.channels:
            if c.verdict != OK:
                out.append((c.verdict, f"channel {c.index} ({c.name})", c.reason))
        for s in self.segments:
            if s.verdict != OK:
                out.append((s.verdict, f"segment {s.index}", s.reason))
        if self.link is not None and self.link.verdict != OK:
            out.append((self.link.verdict, "link", self.link.reason))
        out.sort(key=lambda r: -RANK[r[0]])
        return out

    def summary(self) -> str:
        """One line: healthy, or the worst findings."""
        if self.frames == 0:
            return "no frames yet"
        found = self.findings()
        if not found:
            return f"wiring healthy ({self.frames} frames, {self.window_s:.1f} s)"
        worst = [reason for v, item, reason in found if v == found[0][0]]
        return f"{found[0][0].upper()}: " + " | ".join(worst[:3])


# ----------------------------------------------------------------------------- statistics


def noise_rms_lsb(codes: np.ndarray) -> np.ndarray:
    """White-noise RMS of each column from second differences, LSB.

    Parameters
    ----------
    codes : array_like, shape (N, C)

    Returns
    -------
    ndarray of float64, shape (C,)
        NaN for fewer than 3 frames.
    """
    x = np.asarray(codes, dtype=np.float64)
    if x.shape[0] < 3:
        return np.full(x.shape[1], np.nan)
    d2 = x[2:] - 2.0 * x[1:-1] + x[:-2]
    return np.sqrt(np.mean(d2 * d2, axis=0) / 6.0)


def hum_rms_lsb(codes: np.ndarray, t_s: np.ndarray, *, frequencies_hz=_HUM_HZ) -> np.ndarray:
    """RMS of the sinusoids at ``frequencies_hz`` fitted by least squares to each column, LSB.

    A cubic trend is fitted with them so slow motion does not leak in.

    Parameters
    ----------
    codes : array_like, shape (N, C)
    t_s : array_like, shape (N,)
        Sample times, s.

    Returns
    -------
    ndarray of float64, shape (C,)
        NaN if there are too few frames or the sample rate cannot resolve
        the frequencies.
    """
    x = np.asarray(codes, dtype=np.float64)
    t = np.asarray(t_s, dtype=np.float64)
    n, c = x.shape
    if n < 32:
        return np.full(c, np.nan)
    span = t[-1] - t[0]
    rate = (n - 1) / span if span > 0 else 0.0
    if rate <= 2.2 * max(frequencies_hz):
        return np.full(c, np.nan)
    u = (t - t[0]) / span * 2.0 - 1.0
    cols = [np.ones(n), u, u * u, u * u * u]
    for f in frequencies_hz:
        w = 2.0 * math.pi * f * (t - t[0])
        cols += [np.sin(w), np.cos(w)]
    a = np.stack(cols, axis=1)
    coef, *_ = np.linalg.lstsq(a, x - x.mean(axis=0), rcond=None)
    amp2 = (coef[4:] ** 2).sum(axis=0)  # sum of squared sine/cosine amplitudes
    return np.sqrt(amp2 / 2.0)


def excitation_voltage(rig: Rig) -> tuple[float, bool]:
    """(volts, assumed): the rig's excitation voltage, or 3.3 V assumed."""
    v = getattr(rig, "excitation_v", None)
    if v is None:
        try:
            v = tomllib.loads(rig.text).get("readout", {}).get("excitation_v")
        except (tomllib.TOMLDecodeError, AttributeError):
            v = None
    if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and v > 0:
        return float(v), False
    return DEFAULT_EXCITATION_V, True


def _constant_run_s(codes: np.ndarray, t_s: np.ndarray) -> np.ndarray:
    """Per column: device time since the code last changed (whole window if never), s."""
    n = codes.shape[0]
    changed = codes[1:] != codes[:-1]  # (N-1, C)
    any_change = changed.any(axis=0)
    # index of the last change: the first True seen from the end
    last = (n - 2) - np.argmax(changed[::-1], axis=0)
    since = np.where(any_change, t_s[np.minimum(last + 1, n - 1)], t_s[0])
    return t_s[-1] - since


def _fmt_ohm(r: float) -> str:
    if not math.isfinite(r):
        return "n/a"
    if abs(r) >= 1e6:
        return f"{r / 1e6:.2f} MΩ"
    if abs(r) >= 1e3:
        return f"{r / 1e3:.2f} kΩ"
    return f"{r:.0f} Ω"


# ----------------------------------------------------------------------------- verdicts


# long on purpose: one rule per fault, in the order the health table lists them
def assess_health(
    codes: np.ndarray,
    t_device_s: np.ndarray,
    *,
    rig: Rig,
    adc_bits: int,
    counters: dict | None = None,
    thresholds: HealthThresholds | None = None,
    constant_s: np.ndarray | None = None,
) -> HealthReport:
    """Wiring verdicts for a window of frames.

    Parameters
    ----------
    codes : array_like of int, shape (N, C)
        ADC codes of the window.
    t_device_s : array_like, shape (N,)
        Device time of each frame, s.
    rig : Rig
    adc_bits : int
    counters : dict, optional
        Link counters over the window (differences): ``frames``,
        ``frames_lost``, ``reconnects``, ``drop_<cause>``; None: no link row.
    thresholds : HealthThresholds, optional
    constant_s : array_like, shape (C,), optional
        How long each channel has not changed, s, if known beyond the window
        (a :class:`HealthMonitor` tracks it); default: within the window.

    Returns
    -------
    HealthReport
    """
    th = thresholds or HealthThresholds()
    x = np.asarray(codes)
    t = np.asarray(t_device_s, dtype=np.float64)
    n = int(x.shape[0]) if x.ndim == 2 else 0
    c_count = rig.n_channels
    s_count = rig.n_segments
    v_ex, assumed = excitation_voltage(rig)
    notes = []
    if assumed:
        notes.append(f"excitation voltage not in the rig file ([readout] excitation_v): {v_ex:g} V assumed for mV")
    full = (1 << int(adc_bits)) - 1
    lsb_mv = v_ex / (1 << int(adc_bits)) * 1e3
    link = _link_health(counters, th) if counters is not None else None
    if n < th.min_frames:
        notes.append(f"only {n} frames in the window: no verdicts yet")
        chans = [
            ChannelHealth(k, rig.channels[k], None, math.nan, math.nan, math.nan, math.nan, 0, 0, 0.0, 0.0)
            for k in range(c_count)
        ]
        segs = [SegmentHealth(k, math.nan, 0.0, math.nan) for k in range(s_count)]
        return HealthReport(n, 0.0, int(adc_bits), v_ex, assumed, chans, segs, link, notes)

    xf = x.astype(np.float64)
    window_s = float(t[-1] - t[0]) if n > 1 else 0.0
    mean = xf.mean(axis=0)
    noise = noise_rms_lsb(xf)
    hum = hum_rms_lsb(xf, t)
    if np.isnan(hum).all():
        notes.append("hum not measured: the frame rate is too low to resolve 50/60 Hz")
    lo = x.min(axis=0).astype(np.int64)
    hi = x.max(axis=0).astype(np.int64)
    at_zero = (x <= 0).mean(axis=0)
    at_full = (x >= full).mean(axis=0)
    sat = at_zero + at_full
    const = _constant_run_s(x, t) if constant_s is None else np.asarray(constant_s, dtype=np.float64)
    varies = hi > lo

    tap_of = {int(ch): k for k, ch in enumerate(rig.tap_channels.tolist())}
    chans: list[ChannelHealth] = []
    for k in range(c_count):
        chans.append(
            ChannelHealth(
                index=k, name=rig.channels[k], tap=tap_of.get(k),
                mean_code=float(mean[k]), noise_lsb=float(noise[k]), noise_mv=float(noise[k] * lsb_mv),
                hum_lsb=float(hum[k]), min_code=int(lo[k]), max_code=int(hi[k]),
                saturated_fraction=float(sat[k]), constant_s=float(const[k]),
            )
        )

    # -- segments: drops between consecutive taps (tap S = ground, code 0)
    tap_codes = xf[:, rig.tap_channels]
    below = np.concatenate([tap_codes[:, 1:], np.zeros((n, 1))], axis=1)
    drop = tap_codes - below  # (N, S), LSB
    order_bad = (drop <= 0).mean(axis=0)
    mean_drop = drop.mean(axis=0)
    from acquire.core.readout import make_readout

    readout = make_readout(rig, adc_bits=adc_bits)
    r = readout.resistance_ohm(x)
    with np.errstate(all="ignore"):
        valid = np.isfinite(r)
        r_med = np.array([np.median(r[valid[:, k], k]) if valid[:, k].any() else np.nan for k in range(s_count)])
    segs = [
        SegmentHealth(k, float(r_med[k]), float(order_bad[k]), float(mean_drop[k])) for k in range(s_count)
    ]

    # -- channel verdicts
    others_vary = varies.sum() - varies  # how many other channels change
    floating = np.zeros(c_count, dtype=bool)
    suspect = np.zeros(c_count, dtype=bool)  # stuck, floating or noisy: its readings explain nothing
    brief: dict[int, str] = {}  # what is wrong with a channel, for the segments that use it
    for ch in chans:
        k = ch.index
        what = f"channel {k}"
        if ch.tap is not None:
            what = f"channel {k} (tap {ch.tap})"
        constant_long = (not varies[k]) and ch.constant_s >= th.stuck_s
        if constant_long and 0 < lo[k] < full:
            suspect[k] = True
            brief[k] = f"channel {k} is stuck at {lo[k]}"
            if others_vary[k] > 0:
                _add(ch, FAULT, f"{what} stuck at {lo[k]} for {ch.constant_s:.1f} s while other channels change")
            else:
                _add(ch, WARN, f"{what} constant at {lo[k]} for {ch.constant_s:.1f} s, as are all channels: "
                               "a very quiet input, or the device repeats one frame?")
            continue
        if sat[k] > 0:
            where = "0 (bottom of the ADC range)" if at_zero[k] >= at_full[k] else f"full scale ({full})"
            level = FAULT if sat[k] >= th.saturation_fault_fraction else WARN
            hint = ": shorted to ground?" if at_zero[k] >= at_full[k] else ": open input pulled up, or shorted to the excitation?"
            _add(ch, level, f"{what} reads {where} in {sat[k] * 100:.0f} % of frames{hint}")
        h = ch.hum_lsb
        if math.isfinite(h) and h >= th.hum_warn_lsb and (h >= th.hum_fault_lsb or h * h >= 0.5 * ch.noise_lsb ** 2):
            floating[k] = suspect[k] = True
            level = FAULT if h >= th.hum_fault_lsb else WARN
            if ch.tap is not None:
                j = ch.tap
                order = ""
                if j > 0 and order_bad[j - 1] >= th.order_fault_fraction:
                    order = f" and reads above tap {j - 1} in {order_bad[j - 1] * 100:.0f} % of frames"
                elif order_bad[j] >= th.order_fault_fraction and j + 1 < s_count:
                    order = f" and reads below tap {j + 1} in {order_bad[j] * 100:.0f} % of frames"
                _add(ch, level, f"tap {j} picks up mains hum, {h:.0f} LSB RMS at 50/60 Hz "
                                f"(limit {th.hum_fault_lsb:g}){order}: floating input, open tap (broken wire)?")
                brief[k] = f"tap {j} floats (open tap?)"
            else:
                _add(ch, level, f"{what} picks up mains hum, {h:.0f} LSB RMS (limit {th.hum_fault_lsb:g}): "
                                "floating input or unshielded lead?")
        elif ch.noise_lsb >= th.noise_warn_lsb:
            suspect[k] = ch.noise_lsb >= th.noise_fault_lsb
            brief[k] = f"channel {k} is noisy ({ch.noise_lsb:.0f} LSB RMS)"
            level = FAULT if ch.noise_lsb >= th.noise_fault_lsb else WARN
            limit = th.noise_fault_lsb if level == FAULT else th.noise_warn_lsb
            _add(ch, level, f"{what} noise {ch.noise_lsb:.0f} LSB RMS, {ch.noise_mv:.1f} mV (limit {limit:g}): "
                            "loose contact, long unshielded lead or a noisy supply?")

    act = getattr(rig, "actuation", None)
    if act is not None:  # the pressure channel: its own words, value in its unit
        from acquire.core.health_actuation import judge_actuation_channel

        judge_actuation_channel(chans[act.index], actuation=act, at_zero=float(at_zero[act.index]),
                                at_full=float(at_full[act.index]), others_vary=int(others_vary[act.index]),
                                full_code=full, thresholds=th)

    # -- segment verdicts
    short_seg = (np.abs(mean_drop) < th.short_lsb) & np.isfinite(mean_drop)
    # two taps that read alike because one of them is stuck or floating are not a short
    tap_suspect = np.append(suspect[rig.tap_channels], False)  # tap S (ground) is never suspect
    short_seg &= ~(tap_suspect[:-1] | tap_suspect[1:])
    lo_ohm, hi_ohm = rig.segment_ohm_range
    tap_channel = rig.tap_channels
    bad_tap = {ch.tap: ch for ch in chans if ch.tap is not None and ch.verdict == FAULT}
    k = 0
    while k < s_count:
        if short_seg[k]:
            # a run of shorted segments a .. b-1: taps a and b are tied
            a = k
            while k < s_count and short_seg[k]:
                k += 1
            b = k
            if b == s_count:
                text = (f"taps {a}..{b - 1} read 0 V like the grounded end (tap {b}): short to ground "
                        f"between tap {a} and tap {b}?") if b - a > 1 else (
                        f"tap {a} reads 0 V like the grounded end (tap {b}): short between tap {a} and ground?")
            else:
                text = f"taps {a} and {b} read the same voltage: short between tap {a} and tap {b}?"
            for j in range(a, b):
                _add(segs[j], FAULT, f"segment {j} reads {_fmt_ohm(segs[j].resistance_ohm)}: {text}")
            # tap channels at ground level also read 0: that is the short, not a second fault
            if b == s_count:
                for j in range(a, b):
                    ch = chans[int(tap_channel[j])]
                    if ch.verdict != OK and at_zero[ch.index] > 0 and not floating[ch.index]:
                        ch.verdict, ch.reasons = FAULT, [f"tap {j} reads 0 V: part of the short between tap {a} and ground"]
            continue
        seg = segs[k]
        culprits = [j for j in (k, k + 1) if j in bad_tap]
        if culprits:
            j = culprits[0]
            _add(seg, WARN if seg.order_violated_fraction < th.order_fault_fraction else FAULT,
                 f"segment {k} depends on tap {j}: " + brief.get(bad_tap[j].index, bad_tap[j].reasons[0]))
        elif seg.order_violated_fraction >= th.order_fault_fraction:
            if k + 1 < s_count:
                _add(seg, FAULT, f"segment {k}: tap {k + 1} reads above tap {k} in {seg.order_violated_fraction * 100:.0f} % of "
                                 "frames: open tap or swapped wires?")
            else:
                _add(seg, FAULT, f"segment {k}: tap {k} reads at or below ground in {seg.order_violated_fraction * 100:.0f} % of "
                                 "frames: short to ground or a wire swapped with ground?")
        elif seg.order_violated_fraction > 0:
            _add(seg, WARN, f"segment {k}: taps {k} and {k + 1} out of order in {seg.order_violated_fraction * 100:.1f} % of frames")
        if not seg.reasons and math.isfinite(seg.resistance_ohm):
            if seg.resistance_ohm < lo_ohm:
                _add(seg, WARN, f"segment {k} reads {_fmt_ohm(seg.resistance_ohm)}, below the healthy "
                                f"{_fmt_ohm(lo_ohm)}..{_fmt_ohm(hi_ohm)} (rig segment_ohm_range)")
            elif seg.resistance_ohm > hi_ohm:
                _add(seg, WARN, f"segment {k} reads {_fmt_ohm(seg.resistance_ohm)}, above the healthy "
                                f"{_fmt_ohm(lo_ohm)}..{_fmt_ohm(hi_ohm)} (rig segment_ohm_range)")
        elif not math.isfinite(seg.resistance_ohm) and not seg.reasons:
            _add(seg, FAULT, f"segment {k}: no valid reading (tap 0 at full scale: no current; open chain or ground lead off?)")
        k += 1

    return HealthReport(n, window_s, int(adc_bits), v_ex, assumed, chans, segs, link, notes)


def _add(row, verdict: str, reason: str) -> None:
    row.reasons.append(reason)
    row.verdict = _worst([row.verdict, verdict])


def _link_health(counters: dict, th: HealthThresholds) -> LinkHealth:
    frames = int(counters.get("frames", 0))
    lost = int(counters.get("frames_lost", 0))
    bad = {k[5:]: int(v) for k, v in counters.items() if k.startswith("drop_") and v}
    reconnects = int(counters.get("reconnects", 0))
    link = LinkHealth(frames, lost, int(sum(bad.values())), bad, reconnects)
    total = frames + lost
    frac = lost / total if total else 0.0
    if lost > 0 and frac > th.lost_warn_fraction:
        level = FAULT if frac >= th.lost_fault_fraction else WARN
        _add(link, level, f"{lost} frames lost on the link ({frac * 100:.1f} %)")
    if link.bad_packets:
        causes = ", ".join(f"{k} {v}" for k, v in sorted(bad.items()))
        _add(link, WARN, f"{link.bad_packets} bad packets ({causes}): electrical noise on the cable, or a baud mismatch?")
    if reconnects:
        _add(link, WARN, f"{reconnects} reconnects: loose cable or a device reset?")
    return link


# ----------------------------------------------------------------------------- text


def format_health_table(report: HealthReport, *, width: int | None = None) -> str:
    """The report as a plain-text table (for ``tapcurve health --text``)."""
    lines = []
    head = (f"wiring health: {report.frames} frames, {report.window_s:.1f} s, "
            f"{report.adc_bits}-bit ADC, excitation {report.excitation_v:g} V"
            + (" (assumed)" if report.excitation_assumed else ""))
    lines.append(head)
    lines.append(f"{'channel':<16}{'mean':>8}{'noise LSB':>10}{'mV':>7}{'hum':>6}{'min':>6}{'max':>6}{'sat %':>7}  "
                 f"{'verdict':<7} reason")
    for c in report.channels:
        row = (f"{c.index:>2} {c.name:<13}{c.mean_code:>8.1f}{c.noise_lsb:>10.2f}{c.noise_mv:>7.2f}"
               f"{c.hum_lsb:>6.1f}{c.min_code:>6}{c.max_code:>6}{c.saturated_fraction * 100:>7.1f}  "
               f"{c.verdict.upper():<7} {c.reason}")
        lines.append(row[:width] if width else row)
    lines.append(f"{'segment':<16}{'R':>12}{'order bad %':>13}{'drop LSB':>10}  {'verdict':<7} reason")
    for s in report.segments:
        row = (f"{s.index:>2} tap{s.index}-tap{s.index + 1:<7}{_fmt_ohm(s.resistance_ohm):>12}"
               f"{s.order_violated_fraction * 100:>13.1f}{s.mean_drop_lsb:>10.1f}  {s.verdict.upper():<7} {s.reason}")
        lines.append(row[:width] if width else row)
    if report.link is not None:
        ln = report.link
        lines.append(f"link: {ln.frames} frames, {ln.frames_lost} lost, {ln.bad_packets} bad packets, "
                     f"{ln.reconnects} reconnects  {ln.verdict.upper()} {ln.reason}")
    for note in report.notes:
        lines.append(f"note: {note}")
    lines.append(f"overall: {report.summary()}")
    return "\n".join(lines)


# ----------------------------------------------------------------------------- monitor


class HealthMonitor:
    """Keeps the last ``window_s`` of frames from a ring cursor and reports on them.

    Parameters
    ----------
    cursor : RingCursor
        The monitor's own read position (e.g. ``Session.cursor()``).
    rig : Rig
    adc_bits : int
    rate_hz : float
    counters : callable returning dict, optional
        The reader's cumulative counters (``SerialReader.all_counters``).
    window_s : float
    thresholds : HealthThresholds, optional

    Threads: all methods on one thread (they only copy from the ring).
    """

    def __init__(self, *, cursor: RingCursor, rig: Rig, adc_bits: int, rate_hz: float, counters=None,
                 window_s: float = 2.0, thresholds: HealthThresholds | None = None):
        self.cursor = cursor
        self.rig = rig
        self.adc_bits = int(adc_bits)
        self.counters = counters
        self.window_s = float(window_s)
        self.thresholds = thresholds or HealthThresholds()
        self.capacity = max(64, int(math.ceil(window_s * rate_hz)))
        c = rig.n_channels
        self._codes = np.zeros((self.capacity, c), dtype=np.uint16)
        self._t = np.zeros(self.capacity)
        self._n = 0  # frames held (<= capacity), newest last
        self._last_code = None
        self._changed_at = np.zeros(c)  # device time of each channel's last change
        self._t_first = None
        self._counter_history: list[tuple[float, dict]] = []

    def update(self) -> int:
        """Take the frames pending in the cursor; returns how many."""
        block: FrameBlock = self.cursor.read()
        n = len(block)
        if n == 0:
            return 0
        codes, t = block.codes, block.t_device_s
        if self._t_first is None:
            self._t_first = float(t[0])
            self._changed_at[:] = t[0]
            self._last_code = codes[0].copy()
        # when did each channel last change (across blocks)
        prev = np.concatenate([self._last_code[None, :], codes])
        changed = prev[1:] != prev[:-1]
        any_change = changed.any(axis=0)
        last = (n - 1) - np.argmax(changed[::-1], axis=0)
        self._changed_at = np.where(any_change, t[last], self._changed_at)
        self._last_code = codes[-1].copy()
        if n >= self.capacity:
            self._codes[:] = codes[-self.capacity:]
            self._t[:] = t[-self.capacity:]
            self._n = self.capacity
        else:
            keep = min(self._n, self.capacity - n)
            self._codes[:keep] = self._codes[self._n - keep:self._n]
            self._t[:keep] = self._t[self._n - keep:self._n]
            self._codes[keep:keep + n] = codes
            self._t[keep:keep + n] = t
            self._n = keep + n
        if self.counters is not None:
            now = time.monotonic()
            self._counter_history.append((now, dict(self.counters())))
            # keep one sample older than the window for the difference
            while len(self._counter_history) > 2 and self._counter_history[1][0] < now - self.window_s:
                self._counter_history.pop(0)
        return n

    @property
    def frames(self) -> int:
        return self._n

    def report(self) -> HealthReport:
        """Verdicts on the frames held now."""
        n = self._n
        codes, t = self._codes[:n], self._t[:n]
        counters = None
        if self.counters is not None and self._counter_history:
            old = self._counter_history[0][1]
            new = self._counter_history[-1][1]
            counters = {k: new.get(k, 0) - old.get(k, 0) for k in new}
            counters["frames"] = n
        const = None
        if n:
            const = float(t[-1]) - self._changed_at
        return assess_health(codes, t, rig=self.rig, adc_bits=self.adc_bits, counters=counters,
                             thresholds=self.thresholds, constant_s=const)
