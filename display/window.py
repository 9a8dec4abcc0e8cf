"""The sensor window: live from a :class:`acquire.session.Session` or replayed from a
:class:`acquire.sources.replay.ReplaySource`.

A ``QTimer`` redraw (60 Hz by default) takes the source's newest
:class:`~acquire.sources.feed.ViewSnapshot` and calls ``setData``; the window never
waits on a source, a port or a file. Everything here runs on the GUI thread.
"""
from __future__ import annotations

import datetime as _dt
import math
import time
from collections import deque
from pathlib import Path

import numpy as np
from PyQt5 import QtCore, QtGui, QtWidgets

from acquire.errors import UserError
from acquire.session.status import status_parts
from acquire.core.reconstruct import body_outline

from .drift_readout import DriftControls
from .theme import COLOURS, STYLE_SHEET
from .governor import RedrawGovernor, redraw_ladder
from .views import SegmentBars, ShapeView, Timeline, TraceView, force_arrow_scale_m_per_n

__all__ = ["SensorWindow", "SAFETY_TEXT", "ABOUT_TEXT", "SPEEDS"]

SAFETY_TEXT = (
    "Caution: pressurised actuators can burst and mains-powered rigs can shock. Follow your lab's rules "
    "and work with qualified people. tapcurve only measures; it does not protect anyone."
)
ABOUT_TEXT = (
    "<b>tapcurve</b> — live view of a tapped resistive bend sensor.<br><br>"
    "The curve is drawn to scale from the segments' calibrated curvature; the shaded band is the finger's "
    "body from the rig file; the dashed line is the unsensed fingertip; the dots behind the tip fade "
    "over the last 1.5 s.<br><br>"
    f"<span style='color:{COLOURS['caution']}'>{SAFETY_TEXT}</span>"
)
#: replay speeds offered, x real time
SPEEDS = (0.1, 0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0)


def _set_text(widget, text: str) -> None:
    # an unchanged text still costs a relayout when set
    if widget.text() != text:
        widget.setText(text)


class SensorWindow(QtWidgets.QMainWindow):
    """Shape, segment bars, rolling traces, status and controls for one source.

    Parameters
    ----------
    source : LiveSession or ReplaySource
        Started (and, for a replay, ready).
    redraw_hz : float
        Redraw timer rate (shape, bars) when the machine keeps up.
    traces_hz : float
        Highest redraw rate of the rolling traces.
    adaptive : bool
        Lower the redraw rate (to 30, 20, 15 Hz) while the GUI thread is loaded
        or its timer late, and raise it again when it is not (see
        :class:`display.views.RedrawGovernor`); the status line says so.
        Acquisition and recording run on their own threads and never slow down.
    markers : acquire.commands.calibrate_motion.MarkerOverlay, optional
        Filmed markers drawn over the shape at each frame's device time
        (:class:`display.markers_overlay.MarkersOverlay`).

    Attributes
    ----------
    current : ViewSnapshot or None
        The frame drawn last.
    drawn : deque of (seq, t_device_s, t_host_s, t_drawn_s)
        Frames drawn, newest last (tests and benchmarks).
    draw_latency_s : deque of float
        Host arrival of a frame to the end of the paint that showed it, s (live only).
    governor : RedrawGovernor
        Picks the redraw rate; ``governor.rate_hz`` is the rate in force.

    Signals
    -------
    closed
        Emitted once when the window closes.
    """

    closed = QtCore.pyqtSignal()

    def __init__(self, *, source, redraw_hz: float = 60.0, traces_hz: float = 30.0, adaptive: bool = True,
                 markers=None, parent=None):
        super().__init__(parent=parent)
        self.source = source
        self.markers = markers
        self.live = bool(source.is_live)
        self.rig = source.rig
        self.current = None
        self.drawn: deque = deque(maxlen=20000)
        self.draw_latency_s: deque = deque(maxlen=2000)
        self.paused = False
        self._version = -1
        self._cal = object()  # forces the first configuration
        self._await_paint = None
        self._notice_until = 0.0
        self._closed_once = False
        # the traces move by a bucket or two per redraw: drawing them at half the rate halves their cost
        self._trace_interval_s = 1.0 / max(traces_hz, 1e-3) - 0.002
        self._trace_pending = None
        self._trace_t = 0.0
        self.governor = RedrawGovernor(rates_hz=redraw_ladder(redraw_hz))
        self.adaptive = bool(adaptive)
        self._shown_state = None  # (record, label) controls as last shown: restyled only on change
        self.setStyleSheet(STYLE_SHEET)
        name = self.rig.name or Path(self.rig.source).name
        what = "live" if self.live else f"replay — {Path(str(source.path)).name}"
        self.setWindowTitle(f"tapcurve · {what} · {name}")
        self.resize(1366, 768)

        self._build_views()
        self._build_toolbar()
        if not self.live:
            self._build_replay_bar()
        self._build_bottom()
        self._layout()
        self._configure_calibration()

        self.timer = QtCore.QTimer(self)
        self.timer.setTimerType(QtCore.Qt.PreciseTimer)
        self.timer.timeout.connect(self.redraw)
        self.timer.start(self._interval_ms())
        self.status_timer = QtCore.QTimer(self)
        self.status_timer.timeout.connect(self.update_status)
        self.status_timer.start(250)
        self.shape.viewport().installEventFilter(self)
        self.update_status()

    # -- construction ---------------------------------------------------------------------------
    def _build_views(self) -> None:
        src = self.source
        self.shape = ShapeView(rig=self.rig, reconstructor=src.reconstructor)
        self.markers_overlay = None
        if self.markers is not None:
            from .markers_overlay import MarkersOverlay

            self.markers_overlay = MarkersOverlay(self.shape, markers=self.markers)
        self.bars = SegmentBars(n_segments=self.rig.n_segments)
        self.bars.setMaximumWidth(240)
        self.bars.setMinimumWidth(150)
        self.traces = TraceView(
            channel_names=self.rig.channels, n_segments=self.rig.n_segments,
            window_s=src.feed.window_s, adc_bits=src.adc_bits,
        )

    def _button(self, text: str, slot, *, tip: str = "", checkable: bool = False, name: str | None = None):
        b = QtWidgets.QPushButton(text)
        b.setCheckable(checkable)
        if tip:
            b.setToolTip(tip)
        if name:
            b.setObjectName(name)
        b.clicked.connect(slot)
        return b

    def _build_toolbar(self) -> None:
        bar = QtWidgets.QToolBar("controls")
        bar.setMovable(False)
        bar.setFloatable(False)
        self.addToolBar(QtCore.Qt.TopToolBarArea, bar)
        self.toolbar = bar
        if self.live:
            self.record_button = self._button("● Record…", self._record_clicked, name="record",
                                              tip="start or stop recording to an HDF5 file")
            bar.addWidget(self.record_button)
            bar.addSeparator()
            self.label_edit = QtWidgets.QLineEdit()
            self.label_edit.setPlaceholderText("label, e.g. flat or radius=25mm")
            self.label_edit.setFixedWidth(190)
            self.label_edit.returnPressed.connect(self.toggle_label)
            bar.addWidget(self.label_edit)
            self.label_button = self._button("Start label [F2]", self.toggle_label,
                                             tip="mark a labelled interval in the recording (F2)")
            bar.addWidget(self.label_button)
            QtWidgets.QShortcut(QtGui.QKeySequence("F2"), self, activated=self.toggle_label)
            bar.addSeparator()
        self.tare_button = self._button("Tare", self.tare, tip="re-zero the calibration: hold the sensor flat first")
        bar.addWidget(self.tare_button)
        self.drift_controls = DriftControls(source=self.source, live=self.live, tare_button=self.tare_button)
        if self.drift_controls.button is not None:
            bar.addWidget(self.drift_controls.button)
        self.cal_button = self._button("Calibration…", self._calibration_clicked, tip="load a calibration file")
        bar.addWidget(self.cal_button)
        bar.addSeparator()
        self.pause_button = self._button("Pause view", self._pause_toggled, checkable=True,
                                         tip="freeze the drawing; acquisition and recording go on")
        bar.addWidget(self.pause_button)
        bar.addWidget(QtWidgets.QLabel(" traces "))
        self.trace_mode = QtWidgets.QComboBox()
        self.trace_mode.setToolTip("what the upper traces show")
        self.trace_mode.addItems(["ADC codes", "segment Ω"])
        self.trace_mode.currentIndexChanged.connect(
            lambda i: self.traces.set_mode("codes" if i == 0 else "resistance"))
        bar.addWidget(self.trace_mode)
        bar.addSeparator()
        export = QtWidgets.QToolButton()
        export.setText("Export")
        export.setPopupMode(QtWidgets.QToolButton.InstantPopup)
        menu = QtWidgets.QMenu(export)
        menu.addAction("Window snapshot as PNG…", lambda: self._export_dialog("window", "png"))
        menu.addAction("Window snapshot as SVG…", lambda: self._export_dialog("window", "svg"))
        menu.addAction("Shape plot as PNG…", lambda: self._export_dialog("shape", "png"))
        menu.addAction("Shape plot as SVG…", lambda: self._export_dialog("shape", "svg"))
        export.setMenu(menu)
        bar.addWidget(export)
        about = self._button("About", self.show_about)
        bar.addWidget(about)

    def _build_replay_bar(self) -> None:
        src = self.source
        self.timeline = Timeline()
        self.timeline.seek_requested.connect(self.seek)
        self.play_button = self._button("▶ Play", self.toggle_play, tip="play / pause (Space)")
        self.play_button.setFixedWidth(90)
        self.back_button = self._button("◀ frame", lambda: self.step(-1), tip="one frame back (Left)")
        self.fwd_button = self._button("frame ▶", lambda: self.step(1), tip="one frame on (Right)")
        self.speed_box = QtWidgets.QComboBox()
        for s in SPEEDS:
            self.speed_box.addItem(f"{s:g}×", s)
        self.speed_box.setCurrentIndex(SPEEDS.index(1.0))
        self.speed_box.currentIndexChanged.connect(lambda i: self.set_speed(SPEEDS[i]))
        self.time_label = QtWidgets.QLabel("")
        self.time_label.setObjectName("status")
        self.label_list = QtWidgets.QListWidget()
        self.label_list.setMaximumHeight(84)
        self.label_list.itemActivated.connect(self._label_chosen)
        self.label_list.itemClicked.connect(self._label_chosen)
        QtWidgets.QShortcut(QtGui.QKeySequence("Space"), self, activated=self.toggle_play)
        QtWidgets.QShortcut(QtGui.QKeySequence("Left"), self, activated=lambda: self.step(-1))
        QtWidgets.QShortcut(QtGui.QKeySequence("Right"), self, activated=lambda: self.step(1))
        self._labels_key = None
        self.timeline.set_extent(0.0, max(src.t_last_s - src.t_first_s, 1e-3))

    def _build_bottom(self) -> None:
        self.status_label = QtWidgets.QLabel("")
        self.status_label.setObjectName("status")
        self.notice_label = QtWidgets.QLabel("")
        self.notice_label.setObjectName("notice")
        self.notice_label.setAlignment(QtCore.Qt.AlignRight | QtCore.Qt.AlignVCenter)
        # long texts must not widen the window past a laptop screen: they are cut instead
        for label in (self.status_label, self.notice_label):
            label.setSizePolicy(QtWidgets.QSizePolicy.Ignored, QtWidgets.QSizePolicy.Preferred)
            label.setMinimumWidth(50)
        self.caution_label = QtWidgets.QLabel(SAFETY_TEXT)
        self.caution_label.setObjectName("caution")
        self.caution_label.setWordWrap(True)

    def _titled(self, title: str, widget) -> QtWidgets.QWidget:
        box = QtWidgets.QWidget()
        v = QtWidgets.QVBoxLayout(box)
        v.setContentsMargins(4, 2, 4, 2)
        v.setSpacing(1)
        label = QtWidgets.QLabel(title)
        label.setObjectName("panelTitle")
        v.addWidget(label)
        v.addWidget(widget, 1)
        return box

    def _layout(self) -> None:
        central = QtWidgets.QWidget()
        outer = QtWidgets.QVBoxLayout(central)
        outer.setContentsMargins(4, 2, 4, 2)
        outer.setSpacing(3)
        split = QtWidgets.QSplitter(QtCore.Qt.Horizontal)
        left = QtWidgets.QWidget()
        h = QtWidgets.QHBoxLayout(left)
        h.setContentsMargins(0, 0, 0, 0)
        h.setSpacing(2)
        h.addWidget(self._titled("Shape (to scale, base at the origin)", self.shape), 5)
        self.bars_title = QtWidgets.QLabel("")
        h.addWidget(self._titled("Per segment", self.bars), 2)
        split.addWidget(left)
        right = QtWidgets.QWidget()
        rv = QtWidgets.QVBoxLayout(right)
        rv.setContentsMargins(0, 0, 0, 0)
        rv.addWidget(self._titled("Rolling traces", self.traces), 1)
        if not self.live:
            box = self._titled("Labelled intervals (click to jump)", self.label_list)
            box.setMaximumHeight(110)
            rv.addWidget(box, 0)
        split.addWidget(right)
        split.setStretchFactor(0, 6)
        split.setStretchFactor(1, 5)
        split.setSizes([720, 620])
        outer.addWidget(split, 1)
        if not self.live:
            outer.addWidget(self.timeline)
            row = QtWidgets.QHBoxLayout()
            for w in (self.play_button, self.back_button, self.fwd_button, QtWidgets.QLabel("speed"),
                      self.speed_box):
                row.addWidget(w)
            row.addSpacing(12)
            row.addWidget(self.time_label, 1)
            outer.addLayout(row)
        status_row = QtWidgets.QHBoxLayout()
        status_row.addWidget(self.status_label, 3)
        status_row.addWidget(self.notice_label, 2)
        status_row.addWidget(self.drift_controls.label, 0)
        self.notice_label.setVisible(False)
        outer.addLayout(status_row)
        outer.addWidget(self.caution_label)
        self.setCentralWidget(central)

    # -- calibration state -------------------------------------------------------------------------------
    def _configure_calibration(self) -> None:
        cal = self.source.calibration
        if cal is self._cal:
            return
        self._cal = cal
        if cal is not None:
            self.bars.set_curvature_mode(float(np.min(cal.curvature_min_per_m)), float(np.max(cal.curvature_max_per_m)))
            self.traces.set_calibrated(True)
            self.shape.set_message("")
        else:
            lo, hi = self.rig.segment_ohm_range
            self.bars.set_resistance_mode(lo, hi)
            self.traces.set_calibrated(False)
            self.shape.show_shape(None)
            self.shape.set_message(
                "No calibration loaded: the shape cannot be drawn.\n"
                "The bars show each segment's resistance (shaded: the healthy range of the rig file), the traces "
                "the channels' ADC codes or segment resistances. Load a calibration with “Calibration…”.")
        self.tare_button.setEnabled(cal is not None)
        model = None if cal is None else cal.force_model
        reach = self.rig.sensor_length_m + self.rig.tip_length_m
        self.force_scale_m_per_n = None if model is None else force_arrow_scale_m_per_n(model, reach_m=reach)
        act = self.rig.actuation
        self.traces.set_extras(force=model is not None, actuation_unit=None if act is None else act.unit)

    # -- drawing ----------------------------------------------------------------------------------------------
    def _interval_ms(self) -> int:
        return max(1, int(round(1000.0 / self.governor.rate_hz)))

    def _govern(self) -> None:
        # GUI-thread CPU and timer ticks decide the rate
        if self.adaptive and self.governor.tick(now_s=time.monotonic(), cpu_s=time.thread_time()):
            self.apply_rate()

    def apply_rate(self) -> None:
        """Run the redraw timer at the governor's rate and say so in the status line at once."""
        self.timer.setInterval(self._interval_ms())
        self.update_status()

    def redraw(self) -> None:
        """Take the newest state and draw what changed (GUI thread, from the redraw timer)."""
        self._govern()
        self._configure_calibration()
        if self.paused:
            return
        snap = self.source.feed.snapshot(since_version=self._version)
        if snap is not None:
            self._version = snap.version
            self.draw_snapshot(snap)
        self._draw_traces()

    def _draw_traces(self, *, force: bool = False) -> None:
        # at most traces_hz; the newest snapshot's traces are drawn at the latest one interval later
        if self._trace_pending is None:
            return
        now = time.monotonic()
        if force or now - self._trace_t >= self._trace_interval_s:
            self.traces.show_traces(self._trace_pending)
            self._trace_pending = None
            self._trace_t = now

    def draw_snapshot(self, snap) -> None:
        calibrated = snap.curvature_per_m is not None
        if calibrated and snap.xy_m is not None and np.isfinite(snap.xy_m).all():
            outline = None
            if self.rig.thickness_above_m > 0 or self.rig.thickness_below_m > 0:
                outline = body_outline(snap.xy_m[None], thickness_above_m=self.rig.thickness_above_m,
                                       thickness_below_m=self.rig.thickness_below_m)[0]
            self.shape.show_shape(snap.xy_m, trail_xy_m=snap.trail_xy_m, outline_xy_m=outline)
            self.shape.set_message("" if snap.chain_ok else "a wiring check failed on this frame: see health")
        elif calibrated:
            self.shape.show_shape(None)
            self.shape.set_message("reading unusable (a wiring check failed): no shape for this frame")
        tip = None if snap.xy_m is None else snap.xy_m[self.shape.end_index]  # force acts at the sensor's far end
        self.shape.show_force(tip, snap.force_n, scale_m_per_n=self.force_scale_m_per_n)
        if self.markers_overlay is not None:
            self.markers_overlay.update(snap.t_device_s)
        if calibrated and self.bars.mode == "curvature":
            self.bars.set_values(snap.curvature_per_m)
        elif not calibrated and self.bars.mode == "resistance":
            self.bars.set_values(snap.filtered_ohm)
        self._trace_pending = snap
        self.current = snap
        now = time.monotonic()
        self.drawn.append((snap.seq, snap.t_device_s, snap.t_host_s, now))
        if self.live:
            self._await_paint = snap.t_host_s
            # one pixel asks for the paint event the latency is read from; a whole-view update would
            # repaint the axes and grid every redraw
            self.shape.viewport().update(0, 0, 1, 1)

    def eventFilter(self, obj, event):  # noqa: N802 (Qt name)
        if event.type() == QtCore.QEvent.Paint and self._await_paint is not None:
            t_host = self._await_paint
            self._await_paint = None
            # the paint is queued after this filter returns; the difference is far below a redraw period
            QtCore.QTimer.singleShot(0, lambda t=t_host: self.draw_latency_s.append(time.monotonic() - t))
        return False

    # -- status ---------------------------------------------------------------------------------------------------
    def notice(self, text: str, *, seconds: float = 8.0) -> None:
        """Show a message beside the status line for a while (errors, confirmations)."""
        self.notice_label.setText(text)
        self.notice_label.setVisible(bool(text))
        self._notice_until = time.monotonic() + seconds

    def display_latency_s(self) -> float:
        lat = list(self.draw_latency_s)[-120:]
        return float(np.median(lat)) if lat else math.nan

    def status_text(self) -> str:
        """The one status line (:mod:`acquire.session.status`), with the window's own state added."""
        st = self.source.status()
        if not self.live:
            st = dict(st, position_index=self.source.position_index)
        st = dict(st, flat_drift=self.drift_controls.status_entry())
        parts = status_parts(st, latency_s=self.display_latency_s() if self.live else None)
        if self.governor.status():
            parts.append(self.governor.status())
        if self.paused:
            parts.append("VIEW PAUSED")
        return "  ·  ".join(parts)

    def update_status(self) -> None:
        """Refresh the status line and controls; widgets are touched only where their text changed."""
        self.drift_controls.refresh()
        _set_text(self.status_label, self.status_text())
        if self._notice_until and time.monotonic() > self._notice_until:
            self.notice_label.setText("")
            self.notice_label.setVisible(False)
            self._notice_until = 0.0
        if self.live:
            rec = bool(self.source.recording)
            state = (rec, bool(self.source.open_label))
            if state != self._shown_state:  # re-polishing a style sheet costs a full restyle
                self._shown_state = state
                self.record_button.setText("■ Stop recording" if rec else "● Record…")
                self.record_button.setProperty("recording", "true" if rec else "false")
                self.record_button.style().unpolish(self.record_button)
                self.record_button.style().polish(self.record_button)
                self.label_button.setEnabled(rec)
                self.label_button.setText("End label [F2]" if state[1] else "Start label [F2]")
        else:
            src = self.source
            self.timeline.set_extent(0.0, max(src.t_last_s - src.t_first_s, 1e-3))
            # the frame on screen, not the source's position: the replay thread moves its position after it
            # hands frames to the view, so the two differ for a moment after a seek
            shown = src.position_s if self.current is None else self.current.t_device_s
            self.timeline.set_head(shown - src.t_first_s)
            labels = src.labels
            key = tuple((lab.text, lab.t_start_s, lab.t_end_s) for lab in labels)
            if key != self._labels_key:
                self._labels_key = key
                shifted = [type(lab)(lab.text, lab.t_start_s - src.t_first_s, lab.t_end_s - src.t_first_s)
                           for lab in labels]
                self.timeline.set_labels(shifted)
                self.label_list.clear()
                for lab in labels:
                    item = QtWidgets.QListWidgetItem(
                        f"{lab.text}    {lab.t_start_s - src.t_first_s:.2f} – {lab.t_end_s - src.t_first_s:.2f} s")
                    item.setData(QtCore.Qt.UserRole, lab.t_start_s)
                    self.label_list.addItem(item)
            _set_text(self.play_button, "❚❚ Pause" if src.playing else "▶ Play")
            _set_text(self.time_label, f"{shown - src.t_first_s:.3f} s")

    # -- live controls ----------------------------------------------------------------------------------------
    def _record_clicked(self) -> None:
        if self.source.recording:
            self.stop_recording()
            return
        default = f"tapcurve-{_dt.datetime.now().strftime('%Y%m%d-%H%M%S')}.h5"
        path, _ = QtWidgets.QFileDialog.getSaveFileName(self, "Record to a new file", default,
                                                        "HDF5 recordings (*.h5 *.hdf5)")
        if path:
            self.start_recording(path)

    def start_recording(self, path) -> bool:
        try:
            p = self.source.start_recording(path)
        except UserError as exc:
            self.notice(str(exc))
            return False
        self.notice(f"recording to {p}")
        self.update_status()
        return True

    def stop_recording(self) -> None:
        summary = self.source.stop_recording()
        if summary:
            text = f"saved {summary['path']}: {summary['frames']} frames"
            if summary["error"]:
                text = summary["error"]
            self.notice(text)
        self.update_status()

    def toggle_label(self) -> None:
        """Start a labelled interval with the text in the label box, or end the open one."""
        if not self.live:
            return
        try:
            if self.source.open_label:
                text, t0, t1 = self.source.end_label()
                self.drift_controls.label_ended(t1)
                self.notice(f"label ‘{text}’: {t0:.3f} – {t1:.3f} s")
            else:
                t0 = self.source.begin_label(self.label_edit.text())
                self.drift_controls.label_started(self.label_edit.text(), t0)
                self.notice(f"label ‘{self.label_edit.text().strip()}’ from {t0:.3f} s")
        except UserError as exc:
            self.notice(str(exc))
        self.update_status()

    # -- shared controls -------------------------------------------------------------------------------------
    def tare(self) -> None:
        try:
            self.source.tare()
        except UserError as exc:
            self.notice(str(exc))
            return
        text = "tared: the present shape is now flat"
        if self.live and self.source.recording:
            text += " (noted in the recording; its /derived keeps the calibration it started with)"
        self.notice(text)

    def _calibration_clicked(self) -> None:
        path, _ = QtWidgets.QFileDialog.getOpenFileName(self, "Load a calibration", "", "Calibration (*.json)")
        if path:
            self.load_calibration(path)

    def load_calibration(self, path) -> bool:
        try:
            notes = self.source.load_calibration(path)
        except UserError as exc:
            self.notice(str(exc))
            return False
        text = f"calibration {Path(path).name} loaded" + (f" ({'; '.join(notes)})" if notes else "")
        if self.live and self.source.recording:
            text += "; the recording keeps the calibration it started with"
        self.notice(text)
        self._configure_calibration()
        return True

    def _pause_toggled(self) -> None:
        self.paused = self.pause_button.isChecked()
        self.pause_button.setText("Resume view" if self.paused else "Pause view")
        self.update_status()

    def show_about(self) -> None:
        box = QtWidgets.QMessageBox(self)
        box.setWindowTitle("About tapcurve")
        box.setTextFormat(QtCore.Qt.RichText)
        box.setText(ABOUT_TEXT)
        box.setStandardButtons(QtWidgets.QMessageBox.Close)
        box.setModal(False)
        box.show()
        self._about = box

    # -- replay controls -------------------------------------------------------------------------------------
    def toggle_play(self) -> None:
        if self.live:
            return
        if self.source.playing:
            self.source.pause()
        else:
            self.source.play()

    def set_speed(self, speed: float) -> None:
        self.source.set_speed(speed)
        if hasattr(self, "speed_box"):
            i = min(range(len(SPEEDS)), key=lambda j: abs(SPEEDS[j] - speed))
            if self.speed_box.currentIndex() != i:
                self.speed_box.blockSignals(True)
                self.speed_box.setCurrentIndex(i)
                self.speed_box.blockSignals(False)

    def seek(self, t_from_start_s: float) -> None:
        """Show the frame at ``t_from_start_s`` after the recording's first frame."""
        if not self.live:
            self.source.seek(self.source.t_first_s + float(t_from_start_s))

    def step(self, n: int) -> None:
        if not self.live:
            self.source.step(int(n))

    def _label_chosen(self, item) -> None:
        t = item.data(QtCore.Qt.UserRole)
        self.source.pause()
        self.source.seek(float(t))

    # -- export --------------------------------------------------------------------------------------------------
    def _export_dialog(self, what: str, kind: str) -> None:
        stamp = _dt.datetime.now().strftime("%Y%m%d-%H%M%S")
        default = f"tapcurve-{what}-{stamp}.{kind}"
        path, _ = QtWidgets.QFileDialog.getSaveFileName(self, f"Export {what}", default, f"{kind.upper()} (*.{kind})")
        if path:
            try:
                if what == "window":
                    self.export_window(path)
                else:
                    self.export_shape(path)
            except UserError as exc:
                self.notice(str(exc))
                return
            self.notice(f"exported {path}")

    def export_window(self, path) -> Path:
        """Snapshot of the whole window to .png or .svg."""
        from .export import save_widget

        return save_widget(self, path)

    def export_shape(self, path) -> Path:
        """The shape of the frame drawn now, as a figure of its own, to .png or .svg."""
        from .export import ShapeFigure, save_widget

        if self.current is None or self.current.xy_m is None:
            raise UserError("no shape to export: a calibration is needed and a frame must be drawn")
        where = self.source.source_name if self.live else Path(str(self.source.path)).name
        if self.live:
            when = f"device time {self.current.t_device_s:.3f} s"
        else:
            when = f"t = {self.current.t_device_s - self.source.t_first_s:.3f} s"
        fig = ShapeFigure(rig=self.rig, reconstructor=self.source.reconstructor, calibration=self.source.calibration,
                          markers=self.markers)
        fig.draw(self.current, title=f"{where} — {when}")
        try:
            return save_widget(fig, path)
        finally:
            fig.deleteLater()

    # -- closing ------------------------------------------------------------------------------------------------
    def closeEvent(self, event):  # noqa: N802 (Qt name)
        self.timer.stop()
        self.status_timer.stop()
        if not self._closed_once:
            self._closed_once = True
            self.closed.emit()
        super().closeEvent(event)
