"""The sensor window's flat-drift controls: a "Held flat" button beside Tare and a small readout.

The numbers come from the source's :class:`acquire.core.drift_live.FlatDriftTracker`
(``source.chain.drift``); this module only says when the sensor is known to
be flat and shows the answer. Known flat (never guessed; see
:mod:`acquire.core.drift_live`): the "Held flat" button is down, a label that
states ``flat`` is open, or the virtual finger runs with ``--hold flat``; in
a replay, the recording's ``flat`` labels. GUI thread only.
"""
from __future__ import annotations

import math

from PyQt5 import QtWidgets

from acquire.core.drift_live import DriftReadout, is_flat_label
from acquire.session.status import format_age

__all__ = ["DriftControls", "short_text"]

HELD_FLAT_TIP = ("Press while the sensor is held flat (on a flat jig or the bench): the readout beside it shows how "
                 "far the flat reading has drifted since calibration, and whether a tare is due. Release before "
                 "bending it again. A label ‘flat’ does the same while it is open.")


def short_text(readout: DriftReadout | None, *, live: bool = True) -> tuple[str, str]:
    """(text, verdict) of the small readout; verdict ``ok``, ``warn``, ``fault`` or ``none``."""
    if readout is None or readout.state == "no calibration":
        return "", "none"
    if readout.state == "unknown":
        return ("flat drift: press Held flat" if live else "flat drift: no flat label yet"), "none"
    if readout.state == "measuring":
        return "flat drift: measuring…", "none"
    w = readout.worst()
    if w is None:
        return "flat drift: no valid flat reading", "fault"
    age = "" if readout.flat_now else f" ({format_age(readout.age_s)} ago)"
    if w.suspicious:
        return f"flat {w.drift_pct:+.1f} % in segment {w.segment}: check the strip{age}", "fault"
    due = readout.report.needs_tare
    settling = " settling" if any(s.settling for s in readout.report.segments) else ""
    text = (f"flat drift {w.drift_pct:+.2f} % · {w.curvature_error_per_m:+.2f} 1/m · "
            f"{'TARE DUE' if due else 'ok'}{settling}{age}")
    return text, ("warn" if due else "ok")


def _restyle(widget, name: str, value: str) -> None:
    if widget.property(name) != value:  # re-polishing costs a full restyle: only on change
        widget.setProperty(name, value)
        widget.style().unpolish(widget)
        widget.style().polish(widget)


class DriftControls:
    """Held-flat button, drift readout, and the Tare button's "due" look for one window (GUI thread).

    Parameters
    ----------
    source : Session or ReplaySource
        Its ``chain.drift`` tracker is fed by the source's producer thread.
    live : bool
    tare_button : QPushButton
        Shown as due when a tare is.

    Attributes
    ----------
    readout : DriftReadout or None
        As shown by the last :meth:`refresh`.
    """

    def __init__(self, *, source, live: bool, tare_button):
        self.source = source
        self.live = bool(live)
        self.tare_button = tare_button
        tare_button.setObjectName("tare")
        self.readout = None
        self._reasons: set[str] = set()
        self._labels_key = None
        self.label = QtWidgets.QLabel("")
        self.label.setObjectName("drift")
        self.button = None
        if self.live:
            self.button = QtWidgets.QPushButton("Held flat")
            self.button.setCheckable(True)
            self.button.setObjectName("heldFlat")
            self.button.setToolTip(HELD_FLAT_TIP)
            self.button.toggled.connect(lambda on: self.set_flat("button", on))
            vo = getattr(source, "virtual_options", None)
            if getattr(source, "port", "") is None and is_flat_label(getattr(vo, "hold", None)):
                self.set_flat("hold", True, t_device_s=-math.inf)  # pressed onto a flat jig from the start

    @property
    def tracker(self):
        chain = getattr(self.source, "chain", None)
        return None if chain is None else chain.drift

    # -- what is known flat
    def _newest_s(self) -> float:
        t = self.source.newest_device_time_s() if self.live else math.nan
        return float(t) if t is not None else math.nan

    def set_flat(self, reason: str, on: bool, *, t_device_s: float | None = None) -> None:
        """Declare (or end) one reason the sensor is flat; the tracker sees an interval while any holds."""
        tracker = self.tracker
        before = bool(self._reasons)
        (self._reasons.add if on else self._reasons.discard)(reason)
        after = bool(self._reasons)
        if tracker is None or before == after:
            return
        t = self._newest_s() if t_device_s is None else float(t_device_s)
        if after:
            tracker.flat_from(t if math.isfinite(t) else -math.inf)
        else:
            tracker.flat_until(t)  # not finite: at the newest frame the tracker has seen

    def label_started(self, text: str, t_start_s: float) -> None:
        """A label opened in the window at ``t_start_s`` (device s)."""
        if is_flat_label(text):
            self.set_flat("label", True, t_device_s=t_start_s)

    def label_ended(self, t_end_s: float) -> None:
        """The open label closed at ``t_end_s`` (device s)."""
        self.set_flat("label", False, t_device_s=t_end_s)

    def _sync_labels(self) -> None:
        tracker = self.tracker
        if tracker is None:
            return
        if self.live:  # labels opened elsewhere (live --record F --label flat) or closed by a stop
            flat = is_flat_label(self.source.open_label)
            if flat != ("label" in self._reasons):
                self.set_flat("label", flat)
            return
        labels = [(lab.t_start_s, lab.t_end_s) for lab in self.source.labels if is_flat_label(lab.text)]
        if labels != self._labels_key:
            self._labels_key = labels
            tracker.set_flat_intervals(labels)

    # -- showing it
    def refresh(self) -> DriftReadout | None:
        """Read the tracker and update the readout and the Tare button (from the window's status timer)."""
        tracker = self.tracker
        self._sync_labels()
        self.readout = None if tracker is None else tracker.readout()
        text, verdict = short_text(self.readout, live=self.live)
        if self.label.text() != text:
            self.label.setText(text)
            rep = None if self.readout is None else self.readout.report
            self.label.setToolTip("" if rep is None else rep.text())
        self.label.setVisible(bool(text))
        _restyle(self.label, "verdict", verdict)
        due = verdict == "warn"
        _restyle(self.tare_button, "due", "true" if due else "false")
        want = "Tare (due)" if due else "Tare"
        if self.tare_button.text() != want:
            self.tare_button.setText(want)
        return self.readout

    def status_entry(self) -> dict | None:
        """The ``flat_drift`` entry of the status dict (:func:`acquire.session.status.status_parts`)."""
        return None if self.readout is None else self.readout.as_status()
