"""Colours, pens and the style sheet of the tapcurve windows (GUI thread only).

A dark, low-glare scheme for lab benches: a deep slate background, the
sensor in warm amber, the finger's body in translucent teal, bend toward +y in
orange and the other way in blue, verdicts in green / amber / red.
"""
from __future__ import annotations

__all__ = [
    "COLOURS",
    "SERIES",
    "VERDICT_COLOURS",
    "STYLE_SHEET",
    "series_colour",
    "configure_pyqtgraph",
]

COLOURS = {
    "background": "#11161d",
    "panel": "#18202a",
    "panel_edge": "#2a3544",
    "grid": "#2a3340",
    "text": "#d9e0ea",
    "muted": "#8a96a8",
    "accent": "#5fb3b3",
    "sensor": "#f2b544",
    "tip": "#f7e2ad",
    "tap": "#f6f7f9",
    "tap_edge": "#11161d",
    "body_fill": (78, 170, 160, 60),
    "body_edge": "#4ea9a0",
    "trail": (255, 122, 92),
    "clamp": "#5b6778",
    "bend_pos": "#ec8a3c",
    "bend_neg": "#4f8fdc",
    "healthy_band": (78, 170, 160, 40),
    "playhead": "#f6f7f9",
    "label_band": (242, 181, 68, 70),
    "record": "#e2504c",
    "caution": "#e6b85c",
    "markers": "#ff4fd8",  # filmed markers over the shape: apart from the amber sensor and the teal body
}

#: one colour per channel / segment, distinct on the dark background
SERIES = (
    "#f2b544",
    "#5fb3e0",
    "#ec6f6f",
    "#7cc576",
    "#c58be8",
    "#4fd1c5",
    "#f08fc0",
    "#b8c45a",
    "#e8955a",
    "#8fa5ff",
)

VERDICT_COLOURS = {
    "ok": ("#1f4d2c", "#bfe8c8"),  # (background, text)
    "warn": ("#5a4512", "#ffe3a0"),
    "fault": ("#5e1f22", "#ffc4c4"),
}


def series_colour(i: int) -> str:
    return SERIES[i % len(SERIES)]


STYLE_SHEET = f"""
QMainWindow, QWidget {{ background: {COLOURS['background']}; color: {COLOURS['text']}; }}
QToolBar {{ background: {COLOURS['panel']}; border-bottom: 1px solid {COLOURS['panel_edge']}; spacing: 6px; padding: 3px; }}
QPushButton, QToolButton {{ background: {COLOURS['panel']}; border: 1px solid {COLOURS['panel_edge']};
    border-radius: 4px; padding: 3px 9px; color: {COLOURS['text']}; }}
QPushButton:hover, QToolButton:hover {{ border-color: {COLOURS['accent']}; }}
QPushButton:checked, QToolButton:checked {{ background: #24384a; border-color: {COLOURS['accent']}; }}
QPushButton:disabled {{ color: {COLOURS['muted']}; }}
QPushButton#record[recording="true"] {{ background: #4a1e1e; border-color: {COLOURS['record']}; }}
QLineEdit, QComboBox, QListWidget, QTableWidget {{ background: #0d1218; border: 1px solid {COLOURS['panel_edge']};
    border-radius: 3px; padding: 2px 4px; color: {COLOURS['text']}; selection-background-color: #2c4a60; }}
QHeaderView::section {{ background: {COLOURS['panel']}; color: {COLOURS['muted']}; border: none;
    border-right: 1px solid {COLOURS['panel_edge']}; padding: 3px; }}
QLabel#status {{ color: {COLOURS['text']}; }}
QLabel#notice {{ color: {COLOURS['caution']}; }}
QLabel#caution {{ color: {COLOURS['caution']}; font-size: 11px; }}
QLabel#drift {{ color: {COLOURS['muted']}; padding: 2px 6px; border-radius: 3px; }}
QLabel#drift[verdict="ok"] {{ background: {VERDICT_COLOURS['ok'][0]}; color: {VERDICT_COLOURS['ok'][1]}; }}
QLabel#drift[verdict="warn"] {{ background: {VERDICT_COLOURS['warn'][0]}; color: {VERDICT_COLOURS['warn'][1]}; }}
QLabel#drift[verdict="fault"] {{ background: {VERDICT_COLOURS['fault'][0]}; color: {VERDICT_COLOURS['fault'][1]}; }}
QPushButton#tare[due="true"] {{ background: {VERDICT_COLOURS['warn'][0]}; border-color: {COLOURS['caution']};
    color: {VERDICT_COLOURS['warn'][1]}; }}
QLabel#panelTitle {{ color: {COLOURS['muted']}; font-weight: bold; }}
QSplitter::handle {{ background: {COLOURS['panel_edge']}; }}
QStatusBar {{ background: {COLOURS['panel']}; border-top: 1px solid {COLOURS['panel_edge']}; }}
"""


def configure_pyqtgraph() -> None:
    """Global pyqtgraph options for our look (call once, GUI thread)."""
    import pyqtgraph as pg

    pg.setConfigOptions(
        background=COLOURS["background"],
        foreground=COLOURS["muted"],
        antialias=False,  # traces: speed; the shape turns it on per item
        useOpenGL=False,
    )
