"""The report picture of a calibration: an SVG written beside the calibration file (CAL.json -> CAL.svg).

Per segment: reference curvature against relative resistance change
``x = R / r0 - 1``, hold points (blue squares) and motion points (orange
circles: camera frames binned by resistance) told apart by shape and colour,
the fitted law (black line), and below it the residual (point - law) of each
point. Per filmed motion session: the alignment, i.e. the recording's
curvature (its filtered resistance through the fitted law, blue line) and the
marker curvature (orange dots) of the segment that moved most, both on the
device clock after the offset and rate found.

Plain SVG text (no plotting library: acquire never imports Qt, and the text
is small and diffable). Pure; any thread.
"""
from __future__ import annotations

import math
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np

__all__ = ["figure_path", "report_svg", "HOLD_COLOUR", "MOTION_COLOUR"]

HOLD_COLOUR = "#1f5fbf"
MOTION_COLOUR = "#e07b00"
_CELL_W, _CELL_H, _RES_H, _COLS = 380, 250, 90, 3
_SESSION_H = 230
_MAX_DOTS = 3000  # motion dots per alignment panel (decimated beyond)


def figure_path(out) -> Path:
    """Where the picture of calibration ``out`` goes: the same name with ``.svg``."""
    return Path(out).with_suffix(".svg")


def _nice_ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo]
    raw = (hi - lo) / n
    mag = 10 ** math.floor(math.log10(raw))
    step = min((m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw), default=10 * mag)
    first = math.ceil(lo / step) * step
    return [round(first + i * step, 12) for i in range(int((hi - first) / step + 1e-9) + 1)]


def _limits(values, pad: float = 0.05) -> tuple[float, float]:
    v = np.concatenate([np.ravel(np.asarray(a, float)) for a in values]) if values else np.zeros(0)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return -1.0, 1.0
    lo, hi = float(v.min()), float(v.max())
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    return lo - pad * span, hi + pad * span


class _Panel:
    """A rectangle of the picture with data limits; maps data to pixels and draws into a list of strings."""

    def __init__(self, out: list, x0, y0, w, h, xlim, ylim):
        self.out, self.x0, self.y0, self.w, self.h, self.xlim, self.ylim = out, x0, y0, w, h, xlim, ylim

    def px(self, x):
        return self.x0 + (np.asarray(x, float) - self.xlim[0]) / (self.xlim[1] - self.xlim[0]) * self.w

    def py(self, y):
        return self.y0 + self.h - (np.asarray(y, float) - self.ylim[0]) / (self.ylim[1] - self.ylim[0]) * self.h

    def frame(self, *, xlabel: str = "", ylabel: str = "", title: str = "", xticks=True) -> None:
        o = self.out
        o.append(f'<rect x="{self.x0:.1f}" y="{self.y0:.1f}" width="{self.w}" height="{self.h}" '
                 f'fill="white" stroke="#888"/>')
        for t in _nice_ticks(*self.xlim):
            x = float(self.px(t))
            o.append(f'<line x1="{x:.1f}" y1="{self.y0}" x2="{x:.1f}" y2="{self.y0 + self.h}" stroke="#eee"/>')
            if xticks:
                o.append(f'<text x="{x:.1f}" y="{self.y0 + self.h + 12}" font-size="9" text-anchor="middle">{t:g}</text>')
        for t in _nice_ticks(*self.ylim, n=4):
            y = float(self.py(t))
            o.append(f'<line x1="{self.x0}" y1="{y:.1f}" x2="{self.x0 + self.w}" y2="{y:.1f}" stroke="#eee"/>')
            o.append(f'<text x="{self.x0 - 3}" y="{y + 3:.1f}" font-size="9" text-anchor="end">{t:g}</text>')
        if self.ylim[0] < 0 < self.ylim[1]:
            y = float(self.py(0.0))
            o.append(f'<line x1="{self.x0}" y1="{y:.1f}" x2="{self.x0 + self.w}" y2="{y:.1f}" stroke="#bbb"/>')
        if title:
            o.append(f'<text x="{self.x0 + 4}" y="{self.y0 - 4}" font-size="11" font-weight="bold">{escape(title)}</text>')
        if xlabel:
            o.append(f'<text x="{self.x0 + self.w / 2:.1f}" y="{self.y0 + self.h + 24}" font-size="10" '
                     f'text-anchor="middle">{escape(xlabel)}</text>')
        if ylabel:
            cx, cy = self.x0 - 30, self.y0 + self.h / 2
            o.append(f'<text x="{cx}" y="{cy:.1f}" font-size="10" text-anchor="middle" '
                     f'transform="rotate(-90 {cx} {cy:.1f})">{escape(ylabel)}</text>')

    def line(self, x, y, *, colour: str, cls: str, width: float = 1.5) -> None:
        x, y = np.asarray(x, float), np.asarray(y, float)
        ok = np.isfinite(x) & np.isfinite(y)
        pts = " ".join(f"{a:.1f},{b:.1f}" for a, b in zip(self.px(x[ok]), self.py(np.clip(y[ok], *self._yclip()))))
        self.out.append(f'<polyline class="{cls}" points="{pts}" fill="none" stroke="{colour}" stroke-width="{width}"/>')

    def _yclip(self):
        pad = 0.02 * (self.ylim[1] - self.ylim[0])
        return self.ylim[0] - pad, self.ylim[1] + pad

    def points(self, x, y, *, kind: str, cls: str, segment: int | None = None) -> None:
        """Hold squares or motion circles in a group of class ``cls``."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        ok = np.isfinite(x) & np.isfinite(y)
        seg = f' data-segment="{segment}"' if segment is not None else ""
        self.out.append(f'<g class="{cls}"{seg}>')
        for a, b in zip(self.px(x[ok]), self.py(np.clip(y[ok], *self._yclip()))):
            self.out.append(_marker(kind, a, b))
        self.out.append("</g>")


def _marker(kind: str, x: float, y: float) -> str:
    if kind == "hold":
        return (f'<rect x="{x - 3.5:.1f}" y="{y - 3.5:.1f}" width="7" height="7" fill="{HOLD_COLOUR}" '
                f'stroke="black" stroke-width="0.6"/>')
    if kind == "motion":
        return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="2.6" fill="{MOTION_COLOUR}" fill-opacity="0.8"/>'
    return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="1.2" fill="{MOTION_COLOUR}"/>'


def _law(cal, segment: int, x) -> np.ndarray:
    x = np.asarray(x, float)
    r = np.full((x.size, cal.n_segments), np.nan)
    r[:, segment] = cal.r0_ohm[segment] * (1.0 + x)
    return cal.curvature_per_m(r)[:, segment]


def _segment_data(run, k: int) -> dict:
    """Hold and motion points (x, curvature) of segment k."""
    cal = run.calibration
    hx, hk = [], []
    for h in getattr(run, "holds", []) or []:
        ref = np.broadcast_to(np.asarray(h.reference_per_m, float), (cal.n_segments,))
        col = np.asarray(h.resistance_ohm, float)[:, k]
        if np.isfinite(ref[k]) and np.isfinite(col).any():
            hx.append(float(np.nanmean(col)) / cal.r0_ohm[k] - 1.0)
            hk.append(float(ref[k]))
    sessions = getattr(run, "sessions", []) or []
    mx = np.concatenate([s.points.x[k] for s in sessions]) if sessions else np.zeros(0)
    mk = np.concatenate([s.points.reference_per_m[k] for s in sessions]) if sessions else np.zeros(0)
    return {"hx": np.array(hx), "hk": np.array(hk), "mx": mx, "mk": mk}


def _segment_cell(out: list, run, k: int, x0: float, y0: float) -> None:
    cal, d = run.calibration, _segment_data(run, k)
    xs = [d["hx"], d["mx"], [cal.x_min[k], cal.x_max[k]]]
    xlim = _limits(xs)
    grid = np.linspace(*xlim, 200)
    fit = _law(cal, k, grid)
    top = _Panel(out, x0, y0, _CELL_W - 70, _CELL_H - _RES_H - 50, xlim, _limits([d["hk"], d["mk"], fit]))
    rep = next((s for s in (run.report.segments if run.report else []) if s.segment == k), None)
    title = f"segment {k}" + (f": rms {rep.rms_residual_per_m:.2f} 1/m" if rep else "")
    top.frame(ylabel="curvature, 1/m", title=title, xticks=False)
    top.line(grid, fit, colour="black", cls="fit")
    top.points(d["mx"], d["mk"], kind="motion", cls="motion-points", segment=k)
    top.points(d["hx"], d["hk"], kind="hold", cls="hold-points", segment=k)
    res_h = np.asarray(d["hk"]) - _law(cal, k, d["hx"]) if d["hx"].size else np.zeros(0)
    res_m = d["mk"] - _law(cal, k, d["mx"]) if d["mx"].size else np.zeros(0)
    lim = max(1.0, float(np.nanmax(np.abs(np.concatenate([res_h, res_m, [0.0]])))) * 1.1)
    bottom = _Panel(out, x0, y0 + top.h + 8, top.w, _RES_H, xlim, (-lim, lim))
    bottom.frame(xlabel="relative resistance change x = R/r0 - 1", ylabel="residual")
    bottom.points(d["mx"], res_m, kind="motion", cls="motion-residual", segment=k)
    bottom.points(d["hx"], res_h, kind="hold", cls="hold-residual", segment=k)


def _session_panel(out: list, run, session, x0: float, y0: float, width: float) -> None:
    cal, a = run.calibration, session.alignment
    kappa = session.curvature_per_m
    spread = [np.nanpercentile(c, 95) - np.nanpercentile(c, 5) if np.isfinite(c).sum() > 2 else -1
              for c in kappa.T]
    k = int(np.argmax(spread))
    rec_k = cal.curvature_per_m(session.trace_ohm)[:, k]
    cam_t, cam_k = session.t_device_s, kappa[:, k]
    ok = np.isfinite(cam_k)
    step = max(1, int(ok.sum()) // _MAX_DOTS)
    xlim = _limits([session.trace_t_s], pad=0.01)
    p = _Panel(out, x0, y0, width, _SESSION_H - 60, xlim, _limits([rec_k, cam_k[ok]]))
    title = (f"alignment: {Path(session.recording).name} + {Path(session.markers).name}, segment {k}: "
             f"offset {a.offset_s:+.4f} s, rate {a.rate_ppm:+.1f} ppm, sharpness {a.sharpness:.1f}, "
             f"{session.frames_used} of {session.frames} frames used, markers {session.marker_residual_mm:.3f} mm")
    out.append(f'<g class="alignment" data-recording={quoteattr(str(session.recording))}>')
    p.frame(xlabel="device time, s", ylabel="curvature, 1/m", title=title)
    p.points(cam_t[ok][::step], cam_k[ok][::step], kind="dot", cls="markers")
    p.line(session.trace_t_s, rec_k, colour=HOLD_COLOUR, cls="recording", width=1.2)
    out.append("</g>")


def _legend(out: list, x: float, y: float) -> None:
    out.append('<g class="legend">')
    out.append(_marker("hold", x, y) + f'<text x="{x + 8}" y="{y + 4}" font-size="11">hold (labelled jig)</text>')
    out.append(_marker("motion", x + 150, y)
               + f'<text x="{x + 158}" y="{y + 4}" font-size="11">motion (camera frames binned by resistance)</text>')
    out.append(f'<line x1="{x + 440}" y1="{y}" x2="{x + 465}" y2="{y}" stroke="black" stroke-width="1.5"/>'
               f'<text x="{x + 470}" y="{y + 4}" font-size="11">fitted law</text>')
    out.append(f'<line x1="{x + 550}" y1="{y}" x2="{x + 575}" y2="{y}" stroke="{HOLD_COLOUR}"/>'
               f'<text x="{x + 580}" y="{y + 4}" font-size="11">recording through the law</text>')
    out.append(_marker("dot", x + 750, y) + f'<text x="{x + 758}" y="{y + 4}" font-size="11">markers</text>')
    out.append("</g>")


def report_svg(run) -> str:
    """The report picture of a calibration run as SVG text.

    Parameters
    ----------
    run : CalibrationRun
        ``calibration`` and ``report``; ``holds`` (hold points) and
        ``sessions`` (motion sessions) where present.

    Returns
    -------
    str
        A complete SVG document (UTF-8 text).
    """
    cal = run.calibration
    n = cal.n_segments
    rows = math.ceil(n / _COLS)
    sessions = getattr(run, "sessions", []) or []
    width = _COLS * _CELL_W + 20
    height = 60 + rows * _CELL_H + len(sessions) * _SESSION_H + 10
    out = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
           f'viewBox="0 0 {width} {height}" font-family="sans-serif">',
           f'<rect width="{width}" height="{height}" fill="white"/>',
           f'<text x="10" y="20" font-size="14" font-weight="bold">calibration report: '
           f'{escape(str(cal.rig.get("name", "")))}, {n} segments, {escape(cal.created_utc)}</text>']
    _legend(out, 16, 40)
    for k in range(n):
        _segment_cell(out, run, k, 60 + (k % _COLS) * _CELL_W, 70 + (k // _COLS) * _CELL_H)
    for i, s in enumerate(sessions):
        _session_panel(out, run, s, 60, 70 + rows * _CELL_H + i * _SESSION_H + 10, width - 90)
    out.append("</svg>")
    return "\n".join(out) + "\n"
