"""Images of the windows and of the shape at any time of a recording (PNG, SVG).

GUI thread only. :func:`export_recording_shape` serves ``tapcurve export``; it
works headless with Qt's ``offscreen`` platform (the caller sets it up).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from PyQt5 import QtCore, QtGui, QtSvg, QtWidgets

from acquire.errors import UserError
from acquire.core.reconstruct import body_outline

from .theme import COLOURS, STYLE_SHEET
from .views import SegmentBars, ShapeView, force_arrow_scale_m_per_n, force_arrow_xy

__all__ = ["save_widget", "ShapeFigure", "export_recording_shape", "IMAGE_SUFFIXES"]

IMAGE_SUFFIXES = (".png", ".svg")


def _check_out(path) -> Path:
    from acquire.store.outputs import check_path_name, is_hdf5_file

    p = check_path_name(path)
    if p.suffix.lower() not in IMAGE_SUFFIXES:
        raise UserError(f"{p}: the image must end in .png or .svg")
    if not p.parent.is_dir():
        raise UserError(f"{p}: folder {p.parent} does not exist")
    if is_hdf5_file(p):
        raise UserError(f"{p}: exists and is a recording; tapcurve never overwrites a recording")
    return p


def _ensure_laid_out(widget: QtWidgets.QWidget) -> None:
    # a widget never shown has no layout yet: show it off screen once
    if not widget.isVisible():
        widget.setAttribute(QtCore.Qt.WA_DontShowOnScreen, True)
        widget.show()
    QtWidgets.QApplication.processEvents()


def save_widget(widget: QtWidgets.QWidget, path) -> Path:
    """Render ``widget`` to ``path``: raster for .png, vector for .svg.

    Raises
    ------
    UserError
        Another suffix, a missing folder, or the file cannot be written.
    """
    p = _check_out(path)
    _ensure_laid_out(widget)
    if p.suffix.lower() == ".png":
        if not widget.grab().save(str(p), "PNG"):
            raise UserError(f"{p}: cannot write the image")
        return p
    gen = QtSvg.QSvgGenerator()
    gen.setFileName(str(p))
    size = widget.size()
    gen.setSize(size)
    gen.setViewBox(QtCore.QRect(0, 0, size.width(), size.height()))
    gen.setTitle("tapcurve")
    gen.setDescription(widget.windowTitle() or "tapcurve figure")
    painter = QtGui.QPainter()
    if not painter.begin(gen):
        raise UserError(f"{p}: cannot write the image")
    try:
        widget.render(painter)
    finally:
        painter.end()
    if not p.is_file():
        raise UserError(f"{p}: cannot write the image")
    return p


class ShapeFigure(QtWidgets.QWidget):
    """A figure of one frame: the shape to scale beside the per-segment curvature, with a caption."""

    def __init__(self, *, rig, reconstructor, calibration, width_px: int = 1000, height_px: int = 720,
                 markers=None, parent=None):
        super().__init__(parent=parent)
        self.rig = rig
        self.calibration = calibration
        self.setStyleSheet(STYLE_SHEET)
        self.setWindowTitle("tapcurve shape")
        self.resize(width_px, height_px)
        v = QtWidgets.QVBoxLayout(self)
        v.setContentsMargins(8, 6, 8, 6)
        self.title = QtWidgets.QLabel("")
        self.title.setObjectName("panelTitle")
        v.addWidget(self.title)
        h = QtWidgets.QHBoxLayout()
        self.shape = ShapeView(rig=rig, reconstructor=reconstructor)
        self.bars = SegmentBars(n_segments=rig.n_segments)
        self.bars.setMaximumWidth(280)
        if calibration is not None:
            self.bars.set_curvature_mode(float(np.min(calibration.curvature_min_per_m)),
                                         float(np.max(calibration.curvature_max_per_m)))
        self.markers_overlay = None
        if markers is not None:  # an acquire.commands.calibrate_motion.MarkerOverlay
            from .markers_overlay import MarkersOverlay

            self.markers_overlay = MarkersOverlay(self.shape, markers=markers)
        h.addWidget(self.shape, 3)
        h.addWidget(self.bars, 1)
        v.addLayout(h, 1)
        self.caption = QtWidgets.QLabel("")
        self.caption.setStyleSheet(f"color: {COLOURS['muted']}; font-size: 11px;")
        self.caption.setWordWrap(True)
        v.addWidget(self.caption)

    def draw(self, snap, *, title: str) -> None:
        self.title.setText(title)
        outline = None
        if self.rig.thickness_above_m > 0 or self.rig.thickness_below_m > 0:
            outline = body_outline(snap.xy_m[None], thickness_above_m=self.rig.thickness_above_m,
                                   thickness_below_m=self.rig.thickness_below_m)[0]
        self.shape.show_shape(snap.xy_m, trail_xy_m=snap.trail_xy_m, outline_xy_m=outline)
        parts = [snap.xy_m, np.zeros((1, 2))] + ([outline] if outline is not None else [])
        force_text = self._draw_force(snap, parts) + self._draw_markers(snap, parts)
        self.shape.fit_to(np.concatenate(parts))
        self.bars.set_values(snap.curvature_per_m)
        k = ", ".join(f"{v:.1f}" for v in snap.curvature_per_m)
        tip = snap.xy_m[-1]
        self.caption.setText(
            f"segment curvature [1/m], base first: {k}.  Tip at x = {tip[0] * 1e3:.1f} mm, "
            f"y = {tip[1] * 1e3:.1f} mm.  Frame seq {snap.seq}.  Body outline from the rig file "
            f"({self.rig.thickness_above_m * 1e3:g} mm above, {self.rig.thickness_below_m * 1e3:g} mm below); "
            "dashed: unsensed fingertip; dots: tip over the last 1.5 s." + force_text
        )

    def _draw_markers(self, snap, parts: list) -> str:
        """The filmed markers nearest the frame's time (they join ``parts`` for the zoom); caption text."""
        if self.markers_overlay is None:
            return ""
        xy = self.markers_overlay.update(snap.t_device_s)
        if xy is None:
            return "  No camera frame within one camera interval of this frame: no filmed markers drawn."
        parts.append(xy)
        dt_ms = (self.markers_overlay.shown_t_device_s - snap.t_device_s) * 1e3
        return f"  Circles: the filmed markers, camera frame {dt_ms:+.1f} ms from this frame."

    def _draw_force(self, snap, parts: list) -> str:
        """The force arrow at the sensor's far end (its points join ``parts`` for the zoom); caption text."""
        model = None if self.calibration is None else self.calibration.force_model
        force = getattr(snap, "force_n", None)
        if model is None or force is None or not np.isfinite(force).all():
            self.shape.show_force(None, None, scale_m_per_n=None)
            return ""
        scale = force_arrow_scale_m_per_n(model, reach_m=self.rig.sensor_length_m + self.rig.tip_length_m)
        tip = snap.xy_m[self.shape.end_index]
        self.shape.show_force(tip, force, scale_m_per_n=scale)
        parts.append(force_arrow_xy(tip, force, scale_m_per_n=scale))
        return (f"  Arrow: estimated force at the sensor's end, {float(np.hypot(*force)):.3g} N "
                f"(x {force[0]:+.3g} N, y {force[1]:+.3g} N), {scale * 1e3:g} mm per N.")


def export_recording_shape(*, path, out, time_s: float | None = None, calibration=None, force: bool = False,
                           markers=None) -> Path:
    """Write the shape at device time ``time_s`` of a recording to ``out`` (.png or .svg).

    Parameters
    ----------
    path : path
        The recording.
    out : path
        The image (suffix picks the format).
    time_s : float or None
        Device time, s (``/raw/t_device_s``); None: the last frame.
    calibration : path or None
        Overrides the recording's own calibration.
    markers : path, MarkerOverlay or None
        A marker CSV filmed during the recording (aligned and moved into the
        base frame by :func:`acquire.commands.calibrate_motion.marker_overlay`),
        or its result: the filmed markers are drawn over the shape.

    Raises
    ------
    UserError
        Not a recording, no calibration at all, the time outside the recording, an unwritable image,
        or an unusable marker file (before anything is written).
    """
    from acquire.sources.replay import ReplaySource

    from acquire.store.outputs import check_output

    inputs = [path] + [f for f in (calibration, markers) if isinstance(f, (str, Path))]
    out_p = _check_out(check_output(out, option="--out", what="image", inputs=inputs, force=force, can_force=True))
    if isinstance(markers, (str, Path)):
        from acquire.commands.calibrate_motion import marker_overlay

        markers = marker_overlay(path, markers)
    src = ReplaySource(path=path, calibration=calibration, window_s=2.0).start()
    try:
        src.wait_ready()
        if src.calibration is None:
            raise UserError(f"{path}: has no calibration_json; give --calibration to draw a shape")
        if src.n_frames == 0:
            raise UserError(f"{path}: holds no frames")
        t0, t1 = src.t_first_s, src.t_last_s
        t = t1 if time_s is None else float(time_s)
        if not math.isfinite(t) or t < t0 - 1e-9 or t > t1 + 1e-9:
            raise UserError(f"--time {time_s:g}: the recording spans {t0:.3f} .. {t1:.3f} s")
        src.seek(t)
        if not src.wait_idle(30.0):
            raise UserError(f"{path}: reading the frames took too long")
        snap = src.feed.snapshot()
        if snap is None or snap.xy_m is None or not np.isfinite(snap.xy_m).all():
            raise UserError(f"{path}: the frame at {t:.3f} s has no valid shape (a wiring check failed)")
        fig = ShapeFigure(rig=src.rig, reconstructor=src.reconstructor, calibration=src.calibration,
                          markers=markers)
        fig.draw(snap, title=f"{Path(path).name} — t = {snap.t_device_s:.3f} s (frame seq {snap.seq})")
        try:
            return save_widget(fig, out_p)
        finally:
            fig.deleteLater()
    finally:
        src.stop()
