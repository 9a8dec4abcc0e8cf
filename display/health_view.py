"""The wiring health window: one row per channel, per segment and for the link, coloured by verdict.

With a calibration, each segment row also says how far its flat reading has
drifted since calibration, measured while the sensor is known to be flat
("Held flat" pressed, or the virtual finger's ``--hold flat``), and warns
when a tare is due (:func:`acquire.core.drift_live.drift_verdicts`: the
threshold is argued in :mod:`acquire.core.drift`).

GUI thread only; the :class:`acquire.core.health.HealthMonitor` and the
:class:`acquire.core.drift_live.FlatDriftMonitor` it owns copy frames from the
session's ring (memory only) on the window's timers.
"""
from __future__ import annotations

import math
from pathlib import Path

from PyQt5 import QtCore, QtGui, QtWidgets

from acquire.core.drift_live import FlatDriftMonitor, drift_verdicts, is_flat_label
from acquire.core.health import VERDICTS, HealthMonitor, HealthThresholds
from acquire.errors import UserError

from .theme import COLOURS, STYLE_SHEET, VERDICT_COLOURS
from .window import SAFETY_TEXT

__all__ = ["HealthWindow", "COLUMNS"]

COLUMNS = ("item", "mean code", "noise LSB", "mV", "hum LSB", "min", "max", "at 0/FS %", "order %",
           "R", "flat drift %", "verdict", "reason")
_TIPS = {
    "noise LSB": "white-noise RMS from second differences, ADC steps",
    "mV": "the same noise in millivolts of the excitation",
    "hum LSB": "RMS of the 50 and 60 Hz components",
    "at 0/FS %": "frames at code 0 or at full scale",
    "order %": "frames where tap k+1 reads at or above tap k",
    "R": "median segment resistance",
    "flat drift %": "flat resistance against the calibration's, % of r0, while the sensor is held flat",
}


def _worst(*verdicts: str) -> str:
    return max(verdicts, key=VERDICTS.index)


def _num(v, fmt) -> str:
    return "–" if v is None or (isinstance(v, float) and not math.isfinite(v)) else format(v, fmt)


class HealthWindow(QtWidgets.QMainWindow):
    """Per-channel and per-segment wiring verdicts of a live session, refreshed every second.

    Parameters
    ----------
    session : LiveSession
        Started.
    window_s : float
        Frames judged at each refresh, s.
    refresh_s : float
    thresholds : HealthThresholds, optional
    calibration : Calibration, optional
        Judges the flat drift (default: the session's; for the built-in
        virtual finger its built-in calibration). Without one the drift column stays empty.

    Attributes
    ----------
    report : HealthReport or None
        The report shown now.
    drift : DriftReadout or None
        The flat drift shown now (None without a calibration).
    table : QTableWidget
    """

    closed = QtCore.pyqtSignal()

    def __init__(self, *, session, window_s: float = 2.0, refresh_s: float = 1.0,
                 thresholds: HealthThresholds | None = None, calibration=None, parent=None):
        super().__init__(parent=parent)
        self.session = session
        self.rig = session.rig
        self.monitor = HealthMonitor(
            cursor=session.cursor(), rig=session.rig, adc_bits=session.adc_bits, rate_hz=session.rate_hz,
            counters=session.reader.all_counters, window_s=window_s, thresholds=thresholds,
        )
        self.report = None
        self.calibration = None
        self.drift = None
        self.drift_monitor = None
        self.reports = 0
        self._closed_once = False
        self.setStyleSheet(STYLE_SHEET)
        self.setWindowTitle(f"tapcurve · wiring health · {session.source_name}")
        self.resize(1366, 768)
        central = QtWidgets.QWidget()
        v = QtWidgets.QVBoxLayout(central)
        v.setContentsMargins(8, 6, 8, 6)
        head = QtWidgets.QLabel(
            f"Wiring health of {session.source_name} — rig “{self.rig.name or self.rig.source}”, "
            f"{self.rig.n_channels} channels, {self.rig.n_segments} segments, judged on the last {window_s:g} s"
        )
        head.setObjectName("panelTitle")
        v.addWidget(head)
        self.summary = QtWidgets.QLabel("waiting for frames…")
        self.summary.setWordWrap(True)
        self.summary.setStyleSheet("padding: 6px; border-radius: 4px; font-size: 13px;")
        v.addWidget(self.summary)
        v.addLayout(self._drift_row())
        rows = self.rig.n_channels + self.rig.n_segments + 1
        self.table = QtWidgets.QTableWidget(rows, len(COLUMNS))
        self.table.setHorizontalHeaderLabels(COLUMNS)
        for i, name in enumerate(COLUMNS):
            if name in _TIPS:
                self.table.horizontalHeaderItem(i).setToolTip(_TIPS[name])
        self.table.verticalHeader().setVisible(False)
        self.table.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.table.setSelectionMode(QtWidgets.QAbstractItemView.NoSelection)
        self.table.setWordWrap(True)
        hh = self.table.horizontalHeader()
        for i in range(len(COLUMNS) - 1):
            hh.setSectionResizeMode(i, QtWidgets.QHeaderView.ResizeToContents)
        hh.setSectionResizeMode(len(COLUMNS) - 1, QtWidgets.QHeaderView.Stretch)
        self.table.verticalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeToContents)
        v.addWidget(self.table, 1)
        self.notes = QtWidgets.QLabel("")
        self.notes.setStyleSheet(f"color: {COLOURS['muted']};")
        self.notes.setWordWrap(True)
        v.addWidget(self.notes)
        caution = QtWidgets.QLabel(SAFETY_TEXT)
        caution.setObjectName("caution")
        caution.setWordWrap(True)
        v.addWidget(caution)
        self.setCentralWidget(central)
        for r in range(rows):
            for c in range(len(COLUMNS)):
                self.table.setItem(r, c, QtWidgets.QTableWidgetItem(""))

        self.pull_timer = QtCore.QTimer(self)  # keeps the monitor's cursor close behind the ring
        self.pull_timer.timeout.connect(self._pull)
        self.pull_timer.start(200)
        self.timer = QtCore.QTimer(self)
        self.timer.timeout.connect(self.refresh)
        self.timer.start(int(refresh_s * 1000))
        vo = getattr(session, "virtual_options", None)
        self._hold_flat = session.port is None and is_flat_label(getattr(vo, "hold", None))  # on a flat jig
        if self._hold_flat:
            self.held_flat.setChecked(True)
        self.set_calibration(calibration if calibration is not None else _default_calibration(session))

    # -- flat drift ---------------------------------------------------------------------------
    def _drift_row(self) -> QtWidgets.QHBoxLayout:
        row = QtWidgets.QHBoxLayout()
        self.held_flat = QtWidgets.QPushButton("Held flat")
        self.held_flat.setCheckable(True)
        self.held_flat.setToolTip("press while the sensor is held flat: each segment's flat drift since calibration "
                                  "is shown and a segment over the tare threshold is warned about")
        self.held_flat.toggled.connect(self._held_flat_toggled)
        self.cal_button = QtWidgets.QPushButton("Calibration…")
        self.cal_button.setToolTip("load the calibration the flat drift is judged against")
        self.cal_button.clicked.connect(self._calibration_clicked)
        self.drift_label = QtWidgets.QLabel("")
        self.drift_label.setStyleSheet(f"color: {COLOURS['muted']};")
        self.drift_label.setWordWrap(True)
        row.addWidget(self.held_flat)
        row.addWidget(self.cal_button)
        row.addWidget(self.drift_label, 1)
        return row

    def set_calibration(self, calibration) -> None:
        """Judge the flat drift against ``calibration`` (None: no drift judged)."""
        self.calibration = calibration
        self.drift = None
        if self.drift_monitor is not None:  # the flat frames kept are judged against the new one
            self.drift_monitor.tracker.set_calibration(calibration)
        elif calibration is not None:
            s = self.session
            self.drift_monitor = FlatDriftMonitor(cursor=s.cursor(), rig=self.rig, rate_hz=s.rate_hz,
                                                  adc_bits=s.adc_bits, calibration=calibration)
            if self.held_flat.isChecked():
                self.drift_monitor.tracker.flat_from()
        self.held_flat.setEnabled(calibration is not None and not self._hold_flat)
        self._show_drift_note()

    def load_calibration(self, path) -> bool:
        """Load a calibration file for the drift; a bad file is shown, not raised."""
        from acquire.session import load_calibration_for

        try:
            self.set_calibration(load_calibration_for(path, self.rig))
        except UserError as exc:
            self.drift_label.setText(str(exc))
            return False
        return True

    def _calibration_clicked(self) -> None:
        path, _ = QtWidgets.QFileDialog.getOpenFileName(self, "Load a calibration", "", "Calibration (*.json)")
        if path:
            self.load_calibration(path)

    def _held_flat_toggled(self, on: bool) -> None:
        if self.drift_monitor is not None:
            tracker, t = self.drift_monitor.tracker, self.session.newest_device_time_s()
            if on:
                tracker.flat_from(t)
            else:
                tracker.flat_until(t)
        self._show_drift_note()

    def _pull(self) -> None:
        self.monitor.update()
        if self.drift_monitor is not None:
            self.drift_monitor.update()

    def _show_drift_note(self) -> None:
        cal = self.calibration
        if cal is None:
            text = "flat drift: no calibration loaded (load one to judge the drift of the flat reading)"
        else:
            d = self.drift
            name = Path(str(cal.source)).name
            if d is None or d.state in ("unknown", "no calibration"):
                text = f"flat drift against {name}: press “Held flat” while the sensor is held flat"
            elif d.state == "measuring":
                text = f"flat drift against {name}: measuring (keep the sensor flat)"
            else:
                age = "while held flat" if d.flat_now else f"{d.age_s:.0f} s ago"
                text = f"flat drift against {name}, measured {age}; tare threshold: {d.report.basis}"
        if self.drift_label.text() != text:
            self.drift_label.setText(text)

    def refresh(self) -> None:
        """Judge the frames held now and fill the table (GUI thread, once a second)."""
        self._pull()
        rep = self.monitor.report()
        self.drift = None if self.drift_monitor is None else self.drift_monitor.tracker.readout()
        report = None if self.drift is None else self.drift.report
        drift_rows = drift_verdicts(report, n_segments=self.rig.n_segments)
        self.report = rep
        self.reports += 1
        r = 0
        for ch in rep.channels:
            self._row(r, f"channel {ch.index} · {ch.name}", [
                _num(ch.mean_code, ".1f"), _num(ch.noise_lsb, ".2f"), _num(ch.noise_mv, ".2f"),
                _num(ch.hum_lsb, ".1f"), str(ch.min_code), str(ch.max_code),
                _num(ch.saturated_fraction * 100, ".1f"), "", "", "",
            ], ch.verdict, ch.reason)
            r += 1
        worst_drift = "ok"
        for seg in rep.segments:
            d_verdict, d_reason = drift_rows[seg.index]
            pct = "" if report is None else _num(report.segments[seg.index].drift_pct, "+.2f")
            verdict = _worst(seg.verdict, d_verdict)
            reason = seg.reason if not d_reason else (d_reason if seg.reason == "ok" else f"{seg.reason}; {d_reason}")
            worst_drift = _worst(worst_drift, d_verdict)
            self._row(r, f"segment {seg.index} · tap {seg.index}–{seg.index + 1}", [
                "", "", "", "", "", "", "", _num(seg.order_violated_fraction * 100, ".1f"),
                _fmt_ohm(seg.resistance_ohm), pct,
            ], verdict, reason)
            r += 1
        ln = rep.link
        if ln is not None:
            self._row(r, "link", [""] * (len(COLUMNS) - 3), ln.verdict,
                      f"{ln.frames} frames, {ln.frames_lost} lost, {ln.bad_packets} bad packets, "
                      f"{ln.reconnects} reconnects" + ("" if ln.verdict == "ok" else f" — {ln.reason}"))
        overall = _worst(rep.verdict, worst_drift)
        bg, fg = VERDICT_COLOURS[overall]
        summary = rep.summary()
        if worst_drift != "ok" and rep.frames:
            summary = (f"{overall.upper()}: {report.verdict}" if rep.verdict == "ok"
                       else f"{summary} | {report.verdict}")
        self.summary.setText(summary)
        self._show_drift_note()
        self.summary.setStyleSheet(f"padding: 6px; border-radius: 4px; font-size: 13px; background: {bg}; color: {fg};")
        self.notes.setText("  ·  ".join(rep.notes + ["thresholds are rules of thumb (see acquire/health.py)"]))

    def _row(self, r: int, item: str, values: list[str], verdict: str, reason: str) -> None:
        bg, fg = VERDICT_COLOURS[verdict]
        cells = [item] + values + [verdict.upper(), reason]
        for c, text in enumerate(cells):
            it = self.table.item(r, c)
            it.setText(text)
            if c >= len(cells) - 2:
                it.setBackground(QtGui.QColor(bg))
                it.setForeground(QtGui.QColor(fg))
            if 0 < c < len(cells) - 2:
                it.setTextAlignment(QtCore.Qt.AlignRight | QtCore.Qt.AlignVCenter)

    def row_texts(self) -> list[tuple[str, str, str]]:
        """(item, verdict, reason) of every row as shown (tests)."""
        out = []
        n = len(COLUMNS)
        for r in range(self.table.rowCount()):
            out.append((self.table.item(r, 0).text(), self.table.item(r, n - 2).text(), self.table.item(r, n - 1).text()))
        return out

    def closeEvent(self, event):  # noqa: N802 (Qt name)
        self.timer.stop()
        self.pull_timer.stop()
        if not self._closed_once:
            self._closed_once = True
            self.closed.emit()
        super().closeEvent(event)


def _default_calibration(session):
    """The session's calibration, or the built-in virtual finger's (None for a device without one)."""
    if session.calibration is not None:
        return session.calibration
    vo = getattr(session, "virtual_options", None)
    if session.port is not None or vo is None:
        return None
    from acquire.virtual.builtin import BUILTIN_SEED, builtin_calibration

    return builtin_calibration(session.rig) if vo.seed == BUILTIN_SEED else None


def _fmt_ohm(r: float) -> str:
    if not math.isfinite(r):
        return "–"
    if abs(r) >= 1e3:
        return f"{r / 1e3:.2f} kΩ"
    return f"{r:.0f} Ω"
