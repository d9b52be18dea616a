"""The workbench's look: one palette, one stylesheet, and the plot styling every panel uses."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt
from PySide6.QtGui import QColor, QFont, QPalette
from PySide6.QtWidgets import QApplication


@dataclass(frozen=True)
class Palette:
    canvas: str = "#f4f3ef"  # window background: warm paper
    surface: str = "#fcfbf8"  # panels and plots
    sunken: str = "#ecebe6"  # fields, table headers
    line: str = "#dcdad3"  # hairlines
    ink: str = "#1d2126"  # primary text and main curves
    ink_soft: str = "#5d626a"  # secondary text
    ink_faint: str = "#9a9ea4"  # tertiary text, grid labels
    accent: str = "#c4462a"  # the one accent: broken tokens, tolerances, the live sigma
    accent_soft: str = "#f6ddd4"  # accent wash behind wrong tokens
    accent_ink: str = "#8f2d17"  # accent text on the wash
    never_broke: str = "#e4e6e2"  # tokens that never broke on the grid


PALETTE = Palette()
# one line style and one symbol per tolerance level, finest level first (core.engine.tolerance's order)
LEVEL_PEN_STYLES = (Qt.PenStyle.SolidLine, Qt.PenStyle.DashLine, Qt.PenStyle.DotLine)
LEVEL_SYMBOLS = ("o", "s", "t")
SANS = ["Inter", "IBM Plex Sans", "Source Sans 3", "Segoe UI", "Helvetica Neue", "DejaVu Sans"]
MONO = ["JetBrains Mono", "IBM Plex Mono", "Cascadia Mono", "Menlo", "Consolas", "DejaVu Sans Mono"]
COLORMAP = "cividis"  # perceptually uniform and readable with colour-vision deficiency


def ui_font(size: float = 9.0, bold: bool = False) -> QFont:
    font = QFont()
    font.setFamilies(SANS)
    font.setPointSizeF(size)
    font.setBold(bold)
    return font


def mono_font(size: float = 9.5) -> QFont:
    font = QFont()
    font.setFamilies(MONO)
    font.setStyleHint(QFont.StyleHint.Monospace)
    font.setPointSizeF(size)
    return font


def stylesheet(p: Palette = PALETTE) -> str:
    return f"""
QWidget {{ color: {p.ink}; }}
QMainWindow, QWidget#page {{ background: {p.canvas}; }}
QWidget#card, QFrame#card {{ background: {p.surface}; border: 1px solid {p.line}; border-radius: 6px; }}
QLabel#title {{ font-size: 10.5pt; font-weight: 600; color: {p.ink}; }}
QLabel#caption {{ color: {p.ink_soft}; font-size: 8.5pt; }}
QLabel#faint {{ color: {p.ink_faint}; font-size: 8.5pt; }}
QLabel#figure {{ font-size: 17pt; font-weight: 600; color: {p.ink}; }}
QLabel#figureAccent {{ font-size: 17pt; font-weight: 600; color: {p.accent}; }}
QLabel#figureWord {{ font-size: 11pt; font-weight: 600; color: {p.ink_soft}; }}
QLabel#section {{ color: {p.ink_soft}; font-size: 8pt; font-weight: 600; letter-spacing: 1px; }}
QToolTip {{ background: {p.surface}; color: {p.ink}; border: 1px solid {p.line}; padding: 6px; }}
QPushButton {{ background: {p.surface}; border: 1px solid {p.line}; border-radius: 4px; padding: 4px 12px; }}
QPushButton:hover {{ border-color: {p.ink_faint}; }}
QPushButton:disabled {{ color: {p.ink_faint}; }}
QPushButton#primary {{ background: {p.ink}; color: {p.surface}; border-color: {p.ink}; font-weight: 600; }}
QPushButton#primary:disabled {{ background: {p.ink_faint}; border-color: {p.ink_faint}; }}
QLineEdit, QComboBox {{
    background: {p.surface}; border: 1px solid {p.line}; border-radius: 4px; padding: 2px 6px; min-height: 20px;
    selection-background-color: {p.ink}; }}
QComboBox::drop-down {{ border: none; width: 16px; }}
QComboBox QAbstractItemView {{ background: {p.surface}; selection-background-color: {p.sunken}; selection-color: {p.ink}; }}
QTabWidget::pane {{ border: none; background: {p.canvas}; }}
QTabBar {{ background: transparent; }}
QTabBar::tab {{ background: transparent; color: {p.ink_soft}; padding: 7px 16px 6px 16px; border: none;
    border-bottom: 2px solid transparent; font-size: 9.5pt; }}
QTabBar::tab:selected {{ color: {p.ink}; border-bottom: 2px solid {p.accent}; font-weight: 600; }}
QTabBar::tab:hover {{ color: {p.ink}; }}
QListWidget {{ background: {p.surface}; border: 1px solid {p.line}; border-radius: 6px; outline: none; }}
QListWidget::item {{ border-bottom: 1px solid {p.sunken}; padding: 0px; }}
QListWidget::item:selected {{ background: {p.sunken}; color: {p.ink}; border-left: 3px solid {p.accent}; }}
QTableWidget, QTableView {{ background: {p.surface}; border: 1px solid {p.line}; border-radius: 6px;
    gridline-color: {p.sunken}; selection-background-color: {p.sunken}; selection-color: {p.ink}; }}
QHeaderView::section {{ background: {p.sunken}; color: {p.ink_soft}; border: none; border-right: 1px solid {p.line};
    padding: 3px 6px; font-size: 8.5pt; font-weight: 600; }}
QTextEdit, QPlainTextEdit, QTextBrowser {{ background: {p.surface}; border: 1px solid {p.line}; border-radius: 6px;
    selection-background-color: {p.ink}; selection-color: {p.surface}; }}
QProgressBar {{ background: {p.sunken}; border: none; border-radius: 3px; height: 6px; text-align: right; color: {p.ink_soft}; }}
QProgressBar::chunk {{ background: {p.ink}; border-radius: 3px; }}
QSplitter::handle {{ background: {p.canvas}; }}
QStatusBar {{ background: {p.canvas}; color: {p.ink_soft}; border-top: 1px solid {p.line}; }}
QMenuBar {{ background: {p.canvas}; border-bottom: 1px solid {p.line}; }}
QMenuBar::item:selected, QMenu::item:selected {{ background: {p.sunken}; color: {p.ink}; }}
QMenu {{ background: {p.surface}; border: 1px solid {p.line}; }}
QFrame#messageBar {{ background: {p.accent_soft}; border: 1px solid {p.accent}; border-radius: 5px; }}
QFrame#messageBar QLabel {{ color: {p.accent_ink}; }}
QFrame#noteBar {{ background: {p.sunken}; border: 1px solid {p.line}; border-radius: 5px; }}
QScrollBar:vertical {{ background: transparent; width: 10px; margin: 2px; }}
QScrollBar::handle:vertical {{ background: {p.line}; border-radius: 3px; min-height: 30px; }}
QScrollBar::handle:vertical:hover {{ background: {p.ink_faint}; }}
QScrollBar::add-line, QScrollBar::sub-line {{ height: 0; width: 0; }}
QScrollBar:horizontal {{ background: transparent; height: 10px; margin: 2px; }}
QScrollBar::handle:horizontal {{ background: {p.line}; border-radius: 3px; min-width: 30px; }}
QCheckBox {{ spacing: 6px; }}
QSlider::groove:horizontal {{ height: 4px; background: {p.line}; border-radius: 2px; }}
QSlider::sub-page:horizontal {{ background: {p.accent}; border-radius: 2px; }}
QSlider::handle:horizontal {{ background: {p.surface}; border: 2px solid {p.accent}; width: 12px; height: 12px;
    margin: -6px 0; border-radius: 8px; }}
"""


def apply_theme(app: QApplication) -> None:
    p = PALETTE
    app.setStyle("Fusion")
    app.setFont(ui_font())
    pal = app.palette()
    for role, colour in (
        (QPalette.ColorRole.Window, p.canvas), (QPalette.ColorRole.Base, p.surface),
        (QPalette.ColorRole.AlternateBase, p.canvas), (QPalette.ColorRole.Text, p.ink),
        (QPalette.ColorRole.WindowText, p.ink), (QPalette.ColorRole.Button, p.surface),
        (QPalette.ColorRole.ButtonText, p.ink), (QPalette.ColorRole.Highlight, p.ink),
        (QPalette.ColorRole.HighlightedText, p.surface), (QPalette.ColorRole.ToolTipBase, p.surface),
        (QPalette.ColorRole.ToolTipText, p.ink), (QPalette.ColorRole.PlaceholderText, p.ink_faint),
    ):
        pal.setColor(role, QColor(colour))
    app.setPalette(pal)
    app.setStyleSheet(stylesheet(p))
    pg.setConfigOptions(antialias=True, background=p.surface, foreground=p.ink_soft)


# ---- plots -------------------------------------------------------------------------------

def pen(colour: str, width: float = 1.6, style: Qt.PenStyle = Qt.PenStyle.SolidLine) -> pg.QtGui.QPen:
    p = pg.mkPen(colour, width=width, style=style)
    p.setCosmetic(True)
    return p


def faded(colour: str, alpha: int) -> QColor:
    c = QColor(colour)
    c.setAlpha(alpha)
    return c


# one colour per compared checkpoint; the first two (blue, amber) stay apart under red-green colour blindness
CODEC_COLOURS = ("#2f6db5", "#c98a12", "#3b8f7c", "#8a5aa8", "#5d626a", "#b5527e")


def codec_colour(index: int) -> str:
    return CODEC_COLOURS[index % len(CODEC_COLOURS)]


def series_colours(n: int) -> list[str]:
    """n distinguishable colours for lines of one family (positions, buckets), from the colour map."""
    cmap = pg.colormap.get(COLORMAP)
    if n <= 1:
        return [PALETTE.ink]
    return [cmap.map(0.05 + 0.8 * i / (n - 1), mode="qcolor").name() for i in range(n)]


def style_plot(plot: pg.PlotItem, title: str = "", x_label: str = "", y_label: str = "") -> pg.PlotItem:
    p = PALETTE
    plot.showGrid(x=True, y=True, alpha=0.12)
    plot.setMenuEnabled(False)
    plot.hideButtons()
    if title:
        plot.setTitle(f"<span style='color:{p.ink}; font-size:9pt; font-weight:600'>{title}</span>", justify="left")
    for name in ("left", "bottom"):
        axis = plot.getAxis(name)
        axis.setPen(pen(p.line, 1))
        axis.setTextPen(pen(p.ink_soft, 1))
        axis.setTickFont(ui_font(8))
        axis.enableAutoSIPrefix(False)  # a "(x0.001)" on the label misleads more than it saves
    if x_label:
        plot.setLabel("bottom", x_label, color=p.ink_soft, **{"font-size": "8pt"})
    if y_label:
        plot.setLabel("left", y_label, color=p.ink_soft, **{"font-size": "8pt"})
    plot.getViewBox().setBorder(None)
    plot.layout.setContentsMargins(4, 4, 8, 4)
    return plot


def plot_widget(title: str = "", x_label: str = "", y_label: str = "") -> pg.PlotWidget:
    widget = pg.PlotWidget(background=PALETTE.surface)
    style_plot(widget.getPlotItem(), title, x_label, y_label)
    widget.setMinimumHeight(150)
    return widget


def legend(plot: pg.PlotItem, offset=(-8, 8)) -> pg.LegendItem:
    item = plot.addLegend(offset=offset, labelTextColor=PALETTE.ink_soft, labelTextSize="8pt",
                          brush=faded(PALETTE.surface, 220), pen=pen(PALETTE.line, 1))
    item.setLabelTextSize("8pt")
    return item


def level_colours(levels: int) -> list[QColor]:
    """Colour of each grid step of critical sigma, from fragile (dark) to robust (light)."""
    cmap = pg.colormap.get(COLORMAP)
    if levels <= 1:
        return [cmap.map(0.0, mode="qcolor")]
    return [cmap.map(i / (levels - 1), mode="qcolor") for i in range(levels)]


def readable_on(colour: QColor) -> str:
    """Ink or paper, whichever reads better on `colour` (relative luminance)."""
    rgb = np.array([colour.redF(), colour.greenF(), colour.blueF()])
    lin = np.where(rgb <= 0.03928, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    lum = float(lin @ np.array([0.2126, 0.7152, 0.0722]))
    return PALETTE.ink if lum > 0.22 else PALETTE.surface


def fmt_sigma(value: float | None) -> str:
    if value is None or not np.isfinite(value):
        return "—"
    return f"{value:.3g}"


def fmt_tick(value: float | None) -> str:
    """A scale tick: two significant digits (whole numbers from 10 up), so neighbouring ticks read alike."""
    if value is None or not np.isfinite(value):
        return "—"
    if abs(value) >= 10:
        return f"{value:.0f}"
    return f"{value:.2g}"


def fmt_percent(value: float, digits: int = 2) -> str:
    if value is None or not np.isfinite(value):
        return "—"
    if value >= 0.9995 and value < 1.0:
        return f"{value * 100:.3f} %"
    return f"{value * 100:.{digits}f} %"


def log_ticks(axis: pg.AxisItem, lo: float, hi: float, steps: tuple[int, ...] = (1, 2, 5)) -> None:
    """Readable ticks for a log axis over [lo, hi]: 1-2-5 labels per decade, the rest unlabelled."""
    if not (lo > 0 and hi > 0 and np.isfinite(lo) and np.isfinite(hi)):
        axis.setTicks(None)
        return
    lo, hi = min(lo, hi), max(lo, hi)
    major, minor = [], []
    for k in range(int(np.floor(np.log10(lo))) - 1, int(np.ceil(np.log10(hi))) + 1):
        for m in range(1, 10):
            v = m * 10.0**k
            if not lo / 1.5 <= v <= hi * 1.5:
                continue
            if m in steps:
                major.append((np.log10(v), f"{v:g}"))
            else:
                minor.append((np.log10(v), ""))
    axis.setTicks([major, minor])


def show_piece(text: str) -> str:
    """A token's text made visible: spaces as ·, line breaks and tabs as escapes."""
    return text.replace("\n", "\\n").replace("\r", "\\r").replace("\t", "\\t").replace(" ", "·")
