"""The plots of the sensor window: shape, per-segment bars, rolling traces, replay timeline.

Every class here lives on the GUI thread and draws arrays it is handed (from
an :class:`acquire.sources.feed.ViewSnapshot`); none reads a port or a file.
Lengths arrive in metres; pyqtgraph's SI prefixes label the axes in mm.
"""
from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PyQt5 import QtCore, QtGui, QtWidgets

from .curves import LightCurve, TapMarks
from .plot_cost import cache_axes, opaque_view, peak_envelope
from .theme import COLOURS, series_colour

__all__ = ["ShapeView", "SegmentBars", "TraceView", "Timeline", "force_arrow_scale_m_per_n", "force_arrow_xy"]


def _pen(colour, width=1.0, style=QtCore.Qt.SolidLine):
    pen = pg.mkPen(colour, width=width)
    pen.setStyle(style)
    pen.setCosmetic(True)
    return pen


def force_arrow_scale_m_per_n(model, *, reach_m: float) -> float:
    """Arrow length per newton for a force model: a 1-2-5 step near half the finger's reach per typical force.

    The typical force bends the finger by about a radian: ``mean(EI) / L**2`` (small-deflection
    cantilever, tip load P gives a tip angle P L**2 / (2 EI)), N. Fixed per calibration, so arrow
    lengths compare between frames.
    """
    length = float(np.sum(model.segment_lengths_m))
    typical_n = float(np.mean(model.ei_n_m2)) / length**2
    raw = 0.5 * reach_m / max(typical_n, 1e-9)
    step = 10.0 ** math.floor(math.log10(raw))
    return next(m * step for m in (5.0, 2.0, 1.0) if m * step <= raw)


def force_arrow_xy(tip_xy_m, force_n, *, scale_m_per_n: float, head_fraction: float = 0.25) -> np.ndarray:
    """Segment end points (6, 2) of an arrow from ``tip_xy_m`` along ``force_n`` (shaft, two head strokes), m."""
    tip = np.asarray(tip_xy_m, dtype=np.float64)
    vec = np.asarray(force_n, dtype=np.float64) * scale_m_per_n
    end = tip + vec
    length = float(np.hypot(*vec))
    if not length > 0:
        return np.repeat(tip[None, :], 6, axis=0)
    u = vec / length
    head = head_fraction * length
    back = -u * head
    side = np.array([-u[1], u[0]]) * 0.5 * head
    return np.array([tip, end, end, end + back + side, end, end + back - side])


class ShapeView(pg.PlotWidget):
    """The sensor's curve to scale with equal axes, its body, taps, tip extension and tip trail.

    Parameters
    ----------
    rig : acquire.rig.Rig
        Body thicknesses and lengths.
    reconstructor : acquire.core.reconstruct.Reconstructor
        For the tap indices of the shape points.

    Attributes
    ----------
    sensor_curve, tip_curve : LightCurve
        The sensor from tap 0 to its far end, and the unsensed tip beyond (light curve
        items: pyqtgraph's curve items' bookkeeping per ``setData`` costs more than the curve).
    """

    def __init__(self, *, rig, reconstructor, parent=None):
        super().__init__(parent=parent)
        self.rig = rig
        self.tap_index = np.asarray(reconstructor.tap_index)
        self.end_index = int(self.tap_index[-1])
        self.has_tip = reconstructor.s_m.shape[0] > self.end_index + 1
        self._thick_above = float(rig.thickness_above_m)
        self._thick_below = float(rig.thickness_below_m)
        plot = self.getPlotItem()
        plot.setAspectLocked(True, ratio=1.0)
        plot.showGrid(x=True, y=True, alpha=0.18)
        plot.setLabel("bottom", "x", units="m")
        plot.setLabel("left", "y", units="m")
        plot.setMenuEnabled(False)
        plot.hideButtons()
        cache_axes(plot)
        self.setBackground(COLOURS["background"])
        opaque_view(self)

        # static: the clamp at the base, a faint straight reference
        reach = rig.sensor_length_m + rig.tip_length_m
        t_above, t_below = self._thick_above, self._thick_below
        clamp_w = max(0.004, 0.08 * reach)
        clamp = QtWidgets.QGraphicsRectItem(-clamp_w, -(t_below + 0.002), clamp_w, t_above + t_below + 0.004)
        clamp.setPen(_pen(COLOURS["clamp"], 1))
        fill = QtGui.QColor(COLOURS["clamp"])
        fill.setAlpha(150)
        clamp.setBrush(QtGui.QBrush(fill))
        plot.addItem(clamp)
        ref = pg.PlotDataItem([0.0, reach], [0.0, 0.0], pen=_pen(COLOURS["grid"], 1, QtCore.Qt.DotLine))
        plot.addItem(ref)

        # bounds from the outline itself: a plain path item with a cosmetic pen counts the pen's width in
        # metres, so every frame repainted the whole view
        self.body_item = LightCurve(pen=_pen(COLOURS["body_edge"], 1.2),
                                    brush=QtGui.QBrush(QtGui.QColor(*COLOURS["body_fill"])))
        plot.addItem(self.body_item)
        # the tip's recent path: three fixed layers, older ones fainter (one pen each: a per-point brush
        # list made the trail the costliest item of a redraw)
        r, g, bl = COLOURS["trail"]
        self.trail_layers = [LightCurve(pen=_pen((r, g, bl, a), 2), antialias=True) for a in (45, 110, 220)]
        for item in self.trail_layers:
            plot.addItem(item)
        self.tip_curve = LightCurve(pen=_pen(COLOURS["tip"], 2, QtCore.Qt.DashLine), antialias=True)
        plot.addItem(self.tip_curve)
        self.sensor_curve = LightCurve(pen=_pen(COLOURS["sensor"], 3), antialias=True)
        plot.addItem(self.sensor_curve)
        self.taps = TapMarks(labels=range(len(self.tap_index)), pen=_pen(COLOURS["tap_edge"], 1),
                             brush=pg.mkBrush(COLOURS["tap"]), text_colour=COLOURS["muted"])
        plot.addItem(self.taps)
        self.force_arrow = LightCurve(pen=_pen(COLOURS["caution"], 2.5), connect="pairs", antialias=True)
        plot.addItem(self.force_arrow)
        # the arrow's scale and value, stated in the view (a label over it, like the message)
        self.force_label = QtWidgets.QLabel("", self)
        self.force_label.setStyleSheet(f"color: {COLOURS['caution']}; background: rgba(17, 22, 29, 200); "
                                       "padding: 3px; font-size: 11px;")
        self.force_label.setVisible(False)
        self.force_scale_m_per_n = None
        self._arrow_shown = False
        self.message = ""
        # a label over the view, not in it: it stays put when the user pans or zooms
        self.message_label = QtWidgets.QLabel("", self)
        self.message_label.setWordWrap(True)
        self.message_label.setStyleSheet(
            f"color: {COLOURS['caution']}; background: rgba(17, 22, 29, 215); border: 1px solid "
            f"{COLOURS['panel_edge']}; border-radius: 4px; padding: 6px; font-size: 12px;")
        self.message_label.setVisible(False)
        self._set_range(reach, max(t_above, t_below))

    def _set_range(self, reach: float, thick: float) -> None:
        # a fixed frame that holds the finger however it bends (rolled up, or bent back)
        self.getPlotItem().setRange(
            xRange=(-0.3 * reach - thick, reach + thick),
            yRange=(-0.7 * reach - thick, 0.75 * reach + thick),
            padding=0.02,
        )
        self.getPlotItem().disableAutoRange()

    def fit_to(self, points_m: np.ndarray, *, margin: float = 0.12) -> None:
        """Zoom to points (K, 2) m with a margin, equal axes kept (figures of one frame)."""
        p = points_m[np.isfinite(points_m).all(axis=1)]
        if p.shape[0] == 0:
            return
        lo, hi = p.min(axis=0), p.max(axis=0)
        pad = margin * float(max(hi - lo))
        self.getPlotItem().setRange(xRange=(lo[0] - pad, hi[0] + pad), yRange=(lo[1] - pad, hi[1] + pad), padding=0)

    def set_message(self, text: str) -> None:
        """A note over the plot (no calibration, reading unusable ...); empty hides it."""
        if text == self.message:
            return
        self.message = text
        self.message_label.setText(text)
        self.message_label.setVisible(bool(text))
        self._place_message()

    def _place_message(self) -> None:
        w = max(120, self.width() - 110)
        self.message_label.setFixedWidth(w)
        self.message_label.adjustSize()
        self.message_label.move(70, 12)

    def resizeEvent(self, event):  # noqa: N802 (Qt name)
        super().resizeEvent(event)
        if hasattr(self, "message_label"):
            self._place_message()
        if hasattr(self, "force_label"):
            self._place_force_label()

    def _place_force_label(self) -> None:
        self.force_label.adjustSize()
        self.force_label.move(70, max(0, self.height() - self.force_label.height() - 40))

    def show_force(self, tip_xy_m, force_n, *, scale_m_per_n: float | None) -> None:
        """Draw the force as an arrow at the tip, ``scale_m_per_n`` long per newton; None hides it."""
        if force_n is None or scale_m_per_n is None or tip_xy_m is None:
            if self._arrow_shown:  # an empty setData still costs bounds and a repaint
                self.force_arrow.setData([], [])
                self._arrow_shown = False
            self.force_label.setVisible(False)
            return
        mag = float(np.hypot(*force_n))
        text = (f"force {mag:.3g} N (x {force_n[0]:+.3g}, y {force_n[1]:+.3g})" if math.isfinite(mag)
                else "force: no estimate") + f" · arrow: {scale_m_per_n * 1e3:g} mm per N"
        if math.isfinite(mag) and np.isfinite(tip_xy_m).all():
            pts = force_arrow_xy(tip_xy_m, force_n, scale_m_per_n=scale_m_per_n)
            self.force_arrow.setData(pts[:, 0], pts[:, 1])
            self._arrow_shown = True
        else:
            self.force_arrow.setData([], [])
            self._arrow_shown = False
        if text != self.force_label.text():
            self.force_label.setText(text)
            self._place_force_label()
        self.force_label.setVisible(True)

    def show_shape(self, xy_m: np.ndarray | None, *, trail_xy_m: np.ndarray | None = None,
                   outline_xy_m: np.ndarray | None = None) -> None:
        """Draw one frame's shape (P, 2) m, or clear it with None."""
        if xy_m is None or not np.isfinite(xy_m).all():
            self.sensor_curve.setData([], [])
            self.tip_curve.setData([], [])
            self.taps.setData([], [])
            self.body_item.setData([], [])
            self._show_trail(None)
            return
        e = self.end_index
        self.sensor_curve.setData(xy_m[: e + 1, 0], xy_m[: e + 1, 1])
        if self.has_tip:
            self.tip_curve.setData(xy_m[e:, 0], xy_m[e:, 1])
        taps = xy_m[self.tap_index]
        self.taps.setData(taps[:, 0], taps[:, 1])
        if outline_xy_m is not None and np.isfinite(outline_xy_m).all():
            self.body_item.setData(outline_xy_m[:, 0], outline_xy_m[:, 1])
        else:
            self.body_item.setData([], [])
        self._show_trail(trail_xy_m)

    def _show_trail(self, trail_xy_m) -> None:
        """The trail (K, 2) m, oldest first, in three consecutive parts sharing their end points."""
        t = np.zeros((0, 2)) if trail_xy_m is None else trail_xy_m[np.isfinite(trail_xy_m).all(axis=1)]
        n = len(t)
        edges = [0, n // 3, (2 * n) // 3, n]
        for item, a, b in zip(self.trail_layers, edges[:-1], edges[1:]):
            part = t[a:min(n, b + 1)]
            item.setData(part[:, 0], part[:, 1])


class SegmentBars(pg.PlotWidget):
    """One horizontal bar per segment: curvature (1/m) or, without calibration, resistance (ohm)."""

    def __init__(self, *, n_segments: int, parent=None):
        super().__init__(parent=parent)
        self.n = int(n_segments)
        plot = self.getPlotItem()
        plot.setMenuEnabled(False)
        plot.hideButtons()
        plot.setMouseEnabled(x=False, y=False)
        plot.showGrid(x=True, y=False, alpha=0.18)
        ticks = [(k, f"seg {k}") for k in range(self.n)]
        plot.getAxis("left").setTicks([ticks])
        plot.setYRange(-0.6, self.n - 0.4, padding=0)
        cache_axes(plot)
        self.setBackground(COLOURS["background"])
        opaque_view(self)
        self.bars = pg.BarGraphItem(x0=np.zeros(self.n), y=np.arange(self.n), height=0.62,
                                    width=np.zeros(self.n), brush=COLOURS["bend_pos"], pen=None)
        plot.addItem(self.bars)
        self.zero = pg.InfiniteLine(pos=0.0, angle=90, pen=_pen(COLOURS["muted"], 1))
        plot.addItem(self.zero)
        self.band = pg.LinearRegionItem(values=(0, 1), orientation="vertical", movable=False,
                                        brush=pg.mkBrush(*COLOURS["healthy_band"]), pen=pg.mkPen(None))
        self.band.setZValue(-10)
        plot.addItem(self.band)
        self._pos_brush = pg.mkBrush(COLOURS["bend_pos"])
        self._neg_brush = pg.mkBrush(COLOURS["bend_neg"])
        self._res_brushes = [pg.mkBrush(series_colour(k)) for k in range(self.n)]
        self.mode = None
        self._drawn_mode = None
        self.values = np.zeros(self.n)

    def set_curvature_mode(self, lo_per_m: float, hi_per_m: float) -> None:
        lo, hi = min(lo_per_m, 0.0), max(hi_per_m, 0.0)
        span = max(hi - lo, 1.0)
        self.getPlotItem().setXRange(lo - 0.08 * span, hi + 0.08 * span, padding=0)
        self.getPlotItem().setLabel("bottom", "curvature", units="1/m")
        self.band.setVisible(False)
        self.zero.setVisible(True)
        self.mode = "curvature"

    def set_resistance_mode(self, lo_ohm: float, hi_ohm: float) -> None:
        self.getPlotItem().setXRange(0.0, hi_ohm * 1.15, padding=0)
        self.getPlotItem().setLabel("bottom", "resistance", units="Ω")
        self.band.setRegion((lo_ohm, hi_ohm))
        self.band.setVisible(True)
        self.zero.setVisible(False)
        self.mode = "resistance"

    def set_values(self, values: np.ndarray) -> None:
        v = np.nan_to_num(np.asarray(values, dtype=np.float64), nan=0.0)
        if self._drawn_mode == self.mode and np.array_equal(v, self.values):
            return  # nothing changed: no new picture
        self._drawn_mode = self.mode
        self.values = v
        if self.mode == "curvature":
            brushes = [self._pos_brush if x >= 0 else self._neg_brush for x in v]
        else:
            brushes = self._res_brushes
        self.bars.setOpts(width=v, brushes=brushes)


def _curve(plot, colour, name: str | None, *, width: float = 1.0) -> LightCurve:
    """A trace curve on ``plot`` (NaN breaks the line), in its legend when it has one (GUI thread)."""
    curve = LightCurve(pen=_pen(colour, width), name=name, connect="finite")
    plot.addItem(curve)
    return curve


def _title(plot, text: str) -> None:
    """The quantity and unit of a trace as a small title over it: short rows have no room for a vertical label.

    The left axis then shows plain numbers in that unit (no SI prefix of its own, which only an axis label shows).
    """
    plot.setTitle(text, size="8pt", color=COLOURS["muted"], justify="left")
    plot.layout.setRowFixedHeight(0, 15)  # pyqtgraph reserves 30 px: half a short row
    plot.titleLabel.setMaximumHeight(15)
    plot.getAxis("left").enableAutoSIPrefix(False)


class TraceView(pg.GraphicsLayoutWidget):
    """Rolling traces: channels (ADC codes or segment resistance) above, segment curvature below.

    The x axis is device time relative to the newest frame (s, 0 at the right).
    """

    def __init__(self, *, channel_names, n_segments: int, window_s: float, adc_bits: int, parent=None):
        super().__init__(parent=parent)
        self.setBackground(COLOURS["background"])
        opaque_view(self)
        self.channel_names = list(channel_names)
        self.n_seg = int(n_segments)
        self.window_s = float(window_s)
        self.full_scale = float((1 << int(adc_bits)) - 1)
        self.top = self.addPlot(row=0, col=0)
        self.bottom = self.addPlot(row=1, col=0)
        for p in (self.top, self.bottom):
            p.setMenuEnabled(False)
            p.hideButtons()
            p.showGrid(x=True, y=True, alpha=0.15)
            p.setXRange(-self.window_s, 0.0, padding=0.01)
            p.setMouseEnabled(x=False, y=True)
            p.setClipToView(False)
            p.getAxis("left").setWidth(72)  # both plots' time axes line up
            cache_axes(p)
        self.bottom.setXLink(self.top)
        self.bottom.setLabel("bottom", "time before the newest frame", units="s")
        _title(self.bottom, "curvature (1/m)")
        self.top_legend = self.top.addLegend(offset=(4, 2), labelTextColor=COLOURS["muted"], colCount=8,
                                             labelTextSize="7pt")
        self.bottom_legend = self.bottom.addLegend(offset=(4, 2), labelTextColor=COLOURS["muted"], colCount=8,
                                                   labelTextSize="7pt")
        # light curve items (display/curves.py): pyqtgraph's own redo their bounds at every repaint
        self.code_curves = [_curve(self.top, series_colour(k), f"{k}:{name}")
                            for k, name in enumerate(self.channel_names)]
        self.res_curves = [_curve(self.top, series_colour(k), f"seg {k}") for k in range(self.n_seg)]
        self.curv_curves = [_curve(self.bottom, series_colour(k), f"seg {k}") for k in range(self.n_seg)]
        self.no_cal_text = pg.TextItem("no calibration: curvature unavailable", color=COLOURS["caution"],
                                       anchor=(0.5, 0.5))
        self.bottom.addItem(self.no_cal_text, ignoreBounds=True)
        self.no_cal_text.setPos(-self.window_s / 2, 0.0)
        self.mode = None
        self.set_mode("codes")
        self.set_calibrated(False)
        # force and actuation rows under the curvature: in the layout only when the source has them
        self.force_plot, self.force_curve = self._extra_row("force |F|", "N", COLOURS["caution"])
        self.act_plot, self.act_curve = self._extra_row("actuation", None, COLOURS["accent"])
        self.extras = (False, None)

    def _extra_row(self, label: str, units, colour):
        plot = pg.PlotItem()
        plot.setMenuEnabled(False)
        plot.hideButtons()
        plot.showGrid(x=True, y=True, alpha=0.15)
        plot.setMouseEnabled(x=False, y=True)
        plot.getAxis("left").setWidth(72)
        _title(plot, label if units is None else f"{label} ({units})")
        plot.setXLink(self.top)
        plot.setMaximumHeight(110)
        cache_axes(plot)
        return plot, _curve(plot, colour, None, width=1.2)

    def set_extras(self, *, force: bool, actuation_unit: str | None) -> None:
        """Show the force row (|F|, N) and the actuation row (in ``actuation_unit``; None: no row)."""
        if (force, actuation_unit) == self.extras:
            return
        self.extras = (force, actuation_unit)
        for plot in (self.force_plot, self.act_plot):
            if plot.scene() is not None:
                self.ci.removeItem(plot)
        row = 2
        if force:
            self.addItem(self.force_plot, row=row, col=0)
            row += 1
        if actuation_unit is not None:
            _title(self.act_plot, f"actuation ({actuation_unit})" if actuation_unit else "actuation")
            self.addItem(self.act_plot, row=row, col=0)

    def set_mode(self, mode: str) -> None:
        """``codes`` (ADC codes of every channel) or ``resistance`` (segment resistance)."""
        if mode == self.mode:
            return
        self.mode = mode
        codes = mode == "codes"
        for c in self.code_curves:
            c.setVisible(codes)
        for c in self.res_curves:
            c.setVisible(not codes)
        # legend entries follow the visible set
        self.top_legend.clear()
        for c in self.code_curves if codes else self.res_curves:
            self.top_legend.addItem(c, c.name())
        if codes:
            _title(self.top, "ADC code")
            self.top.enableAutoRange(y=False)
            self.top.setYRange(0, self.full_scale, padding=0.02)
        else:
            _title(self.top, "segment resistance (Ω)")
            self.top.enableAutoRange(y=True)

    def set_calibrated(self, calibrated: bool) -> None:
        for c in self.curv_curves:
            c.setVisible(calibrated)
        self.no_cal_text.setVisible(not calibrated)
        self.bottom.enableAutoRange(y=calibrated)
        if not calibrated:
            self.bottom.setYRange(-1, 1, padding=0)
            self.bottom_legend.setVisible(False)
        else:
            self.bottom_legend.setVisible(True)
        self.calibrated = calibrated

    def buckets_per_point(self, n_buckets: int) -> int:
        """Feed buckets merged into one drawn min/max pair: about one pair per pixel column of the plots."""
        width_px = max(1.0, float(self.top.getViewBox().width()))
        return max(1, int(math.ceil(n_buckets / width_px)))

    def show_traces(self, snap) -> None:
        """Draw a snapshot's traces, merged to about one min/max pair per pixel column (GUI thread)."""
        if snap.trace_t_s.shape[0] == 0:
            return
        g = self.buckets_per_point(snap.trace_t_s.shape[0] // 2)
        x = peak_envelope(snap.trace_t_s[:, None], g, time=True)[:, 0] - snap.t_device_s
        if self.mode == "codes":
            y = peak_envelope(snap.trace_codes, g)
            for k, c in enumerate(self.code_curves):
                c.setData(x, y[:, k], connect="all")
        else:
            y = peak_envelope(snap.trace_resistance_ohm, g)
            for k, c in enumerate(self.res_curves):
                c.setData(x, y[:, k])
        if self.calibrated and snap.trace_curvature_per_m is not None:
            y = peak_envelope(snap.trace_curvature_per_m, g)
            for k, c in enumerate(self.curv_curves):
                c.setData(x, y[:, k])
        for shown, values, curve in ((self.extras[0], getattr(snap, "trace_force_n", None), self.force_curve),
                                     (self.extras[1] is not None, getattr(snap, "trace_actuation", None),
                                      self.act_curve)):
            if shown and values is not None:
                curve.setData(x, peak_envelope(values[:, None], g)[:, 0])


class Timeline(pg.PlotWidget):
    """The recording's time axis: labelled intervals, the play head (drag or click to seek).

    Signals
    -------
    seek_requested(float)
        Device time the user picked, s.
    """

    seek_requested = QtCore.pyqtSignal(float)

    def __init__(self, parent=None):
        super().__init__(parent=parent)
        self.setBackground(COLOURS["panel"])
        plot = self.getPlotItem()
        plot.setMenuEnabled(False)
        plot.hideButtons()
        plot.hideAxis("left")
        plot.setMouseEnabled(x=False, y=False)
        plot.setLabel("bottom", "recording time", units="s")
        plot.setYRange(0, 1, padding=0)
        self.setFixedHeight(74)
        self.head = pg.InfiniteLine(pos=0.0, angle=90, movable=True, pen=_pen(COLOURS["playhead"], 2),
                                    hoverPen=_pen(COLOURS["accent"], 3))
        plot.addItem(self.head)
        self.head.sigDragged.connect(self._dragged)
        self.scene().sigMouseClicked.connect(self._clicked)
        self._regions: list = []
        self._label_key = None
        self._extent = (0.0, 1.0)
        self.dragging = False
        self.head.sigPositionChangeFinished.connect(self._drag_done)

    def set_extent(self, t0_s: float, t1_s: float) -> None:
        if (t0_s, t1_s) != self._extent:
            self._extent = (t0_s, t1_s)
            self.getPlotItem().setXRange(t0_s, max(t1_s, t0_s + 1e-3), padding=0.01)
            self.head.setBounds((t0_s, t1_s))

    def set_labels(self, labels) -> None:
        key = tuple((lab.text, lab.t_start_s, lab.t_end_s) for lab in labels)
        if key == self._label_key:
            return
        self._label_key = key
        plot = self.getPlotItem()
        for item in self._regions:
            plot.removeItem(item)
        self._regions = []
        for i, lab in enumerate(labels):
            t1 = lab.t_end_s if math.isfinite(lab.t_end_s) else self._extent[1]
            region = pg.LinearRegionItem(values=(lab.t_start_s, t1), movable=False,
                                         brush=pg.mkBrush(*COLOURS["label_band"]), pen=_pen(COLOURS["sensor"], 1))
            region.setZValue(-5)
            text = pg.TextItem(lab.text, color=COLOURS["text"], anchor=(0, 0))
            text.setFont(QtGui.QFont("Sans", 7))
            text.setPos(lab.t_start_s, 0.95 - 0.3 * (i % 3))
            plot.addItem(region)
            plot.addItem(text)
            self._regions += [region, text]

    def set_head(self, t_s: float) -> None:
        if not self.dragging:
            self.head.blockSignals(True)
            self.head.setValue(t_s)
            self.head.blockSignals(False)

    def _dragged(self, line) -> None:
        self.dragging = True
        self.seek_requested.emit(float(line.value()))

    def _drag_done(self, line) -> None:
        self.dragging = False
        self.seek_requested.emit(float(line.value()))

    def _clicked(self, event) -> None:
        vb = self.getPlotItem().getViewBox()
        if not vb.sceneBoundingRect().contains(event.scenePos()):
            return
        t = vb.mapSceneToView(event.scenePos()).x()
        t0, t1 = self._extent
        self.seek_requested.emit(float(min(max(t, t0), t1)))
