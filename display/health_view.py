"""The wiring health window: one row per channel, per segment and for the link, coloured by verdict.

GUI thread only; the :class:`acquire.core.health.HealthMonitor` it owns copies
frames from the session's ring (memory only) on the window's timers.
"""
from __future__ import annotations

import math

from PyQt5 import QtCore, QtGui, QtWidgets

from acquire.core.health import HealthMonitor, HealthThresholds

from .theme import COLOURS, STYLE_SHEET, VERDICT_COLOURS
from .window import SAFETY_TEXT

__all__ = ["HealthWindow", "COLUMNS"]

COLUMNS = ("item", "mean code", "noise LSB", "mV", "hum LSB", "min", "max", "at 0/FS %", "order %",
           "R", "verdict", "reason")
_TIPS = {
    "noise LSB": "white-noise RMS from second differences, ADC steps",
    "mV": "the same noise in millivolts of the excitation",
    "hum LSB": "RMS of the 50 and 60 Hz components",
    "at 0/FS %": "frames at code 0 or at full scale",
    "order %": "frames where tap k+1 reads at or above tap k",
    "R": "median segment resistance",
}


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

    Attributes
    ----------
    report : HealthReport or None
        The report shown now.
    table : QTableWidget
    """

    closed = QtCore.pyqtSignal()

    def __init__(self, *, session, window_s: float = 2.0, refresh_s: float = 1.0,
                 thresholds: HealthThresholds | None = None, parent=None):
        super().__init__(parent=parent)
        self.session = session
        self.rig = session.rig
        self.monitor = HealthMonitor(
            cursor=session.cursor(), rig=session.rig, adc_bits=session.adc_bits, rate_hz=session.rate_hz,
            counters=session.reader.all_counters, window_s=window_s, thresholds=thresholds,
        )
        self.report = None
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
        self.pull_timer.timeout.connect(self.monitor.update)
        self.pull_timer.start(200)
        self.timer = QtCore.QTimer(self)
        self.timer.timeout.connect(self.refresh)
        self.timer.start(int(refresh_s * 1000))

    def refresh(self) -> None:
        """Judge the frames held now and fill the table (GUI thread, once a second)."""
        self.monitor.update()
        rep = self.monitor.report()
        self.report = rep
        self.reports += 1
        r = 0
        for ch in rep.channels:
            self._row(r, f"channel {ch.index} · {ch.name}", [
                _num(ch.mean_code, ".1f"), _num(ch.noise_lsb, ".2f"), _num(ch.noise_mv, ".2f"),
                _num(ch.hum_lsb, ".1f"), str(ch.min_code), str(ch.max_code),
                _num(ch.saturated_fraction * 100, ".1f"), "", "",
            ], ch.verdict, ch.reason)
            r += 1
        for seg in rep.segments:
            self._row(r, f"segment {seg.index} · tap {seg.index}–{seg.index + 1}", [
                "", "", "", "", "", "", "", _num(seg.order_violated_fraction * 100, ".1f"),
                _fmt_ohm(seg.resistance_ohm),
            ], seg.verdict, seg.reason)
            r += 1
        ln = rep.link
        if ln is not None:
            self._row(r, "link", [""] * (len(COLUMNS) - 3), ln.verdict,
                      f"{ln.frames} frames, {ln.frames_lost} lost, {ln.bad_packets} bad packets, "
                      f"{ln.reconnects} reconnects" + ("" if ln.verdict == "ok" else f" — {ln.reason}"))
        bg, fg = VERDICT_COLOURS[rep.verdict]
        self.summary.setText(rep.summary())
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


def _fmt_ohm(r: float) -> str:
    if not math.isfinite(r):
        return "–"
    if abs(r) >= 1e3:
        return f"{r / 1e3:.2f} kΩ"
    return f"{r:.0f} Ω"
