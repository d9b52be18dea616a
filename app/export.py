"""Save a plot for a lab meeting: PNG at a chosen width and DPI, or SVG, each with a caption
line saying what was measured (checkpoints, text, noise, seed, repeats) drawn into it.

Writes are staged beside the target and renamed (core.outputs.files); nothing is replaced unless
the caller passes force=True, which the dialog does only after asking.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import pyqtgraph as pg
from pyqtgraph.exporters import ImageExporter
from PySide6.QtCore import QBuffer, QIODevice, QPointF, QRect, QRectF, QSize, Qt
from PySide6.QtGui import QAction, QColor, QFont, QFontMetricsF, QGuiApplication, QImage, QPainter
from PySide6.QtSvg import QSvgGenerator
from PySide6.QtWidgets import (
    QComboBox, QGraphicsItem, QDialog, QDialogButtonBox, QFileDialog, QFormLayout, QLabel, QMenu, QMessageBox, QSpinBox, QWidget,
)

from app.messages import error_text
from app.style import PALETTE, SANS
from core.outputs.files import staged_file

FORMATS = ("png", "svg")
DEFAULT_WIDTH = 1600
DEFAULT_DPI = 200
CAPTION_PT = 8.0  # caption size on screen; scaled with the export width
INCHES_PER_METRE = 39.37007874

Plottable = pg.PlotWidget | pg.PlotItem | pg.GraphicsLayoutWidget | pg.GraphicsLayout


def export_item(target: Plottable):
    """The graphics item an exporter renders: the plot item or the whole layout."""
    if isinstance(target, pg.PlotWidget):
        return target.getPlotItem()
    if isinstance(target, pg.GraphicsLayoutWidget):
        return target.ci
    if isinstance(target, (pg.PlotItem, pg.GraphicsLayout)):
        return target
    raise TypeError(f"cannot export a {type(target).__name__}; give a PlotWidget, PlotItem or GraphicsLayoutWidget")


def _caption_font(pixel_size: float) -> QFont:
    font = QFont()
    font.setFamilies(SANS)
    font.setPixelSize(max(6, round(pixel_size)))
    return font


def _wrap(caption: str, font: QFont, width: float) -> list[str]:
    """Greedy word wrap of the caption to `width` pixels in `font`."""
    metrics = QFontMetricsF(font)
    lines: list[str] = []
    for paragraph in caption.splitlines() or [""]:
        line = ""
        for word in paragraph.split(" "):
            trial = f"{line} {word}" if line else word
            if line and metrics.horizontalAdvance(trial) > width:
                lines.append(line)
                line = word
            else:
                line = trial
        lines.append(line)
    return [l for l in lines if l.strip()] or []


@dataclass
class _Layout:
    exporter: ImageExporter
    source: QRectF
    scale: float
    plot_height: int
    margin: float
    font: QFont
    lines: list[str]
    line_height: float
    strip: int

    @property
    def height(self) -> int:
        return self.plot_height + self.strip


def _layout(target: Plottable, width: int, caption: str) -> _Layout:
    """Where the plot and the caption go in an image `width` pixels wide."""
    item = export_item(target)
    exporter = ImageExporter(item)  # for its source rectangle and pyqtgraph's export mode
    source = exporter.getSourceRect()
    scale = width / max(1.0, source.width())
    plot_height = max(1, int(round(source.height() * scale)))
    margin = 10 * scale
    font = _caption_font(CAPTION_PT * 96 / 72 * scale)
    lines = _wrap(caption, font, width - 2 * margin) if caption else []
    line_height = QFontMetricsF(font).lineSpacing()
    strip = int(round(len(lines) * line_height + 1.6 * margin)) if lines else 0
    return _Layout(exporter, source, scale, plot_height, margin, font, lines, line_height, strip)


def _descendants(item: QGraphicsItem) -> list[QGraphicsItem]:
    found, stack = [], [item]
    while stack:
        node = stack.pop()
        found.append(node)
        stack.extend(node.childItems())
    return found


def _draw(painter: QPainter, layout: _Layout, width: int) -> None:
    exporter, source, scale, plot_height = layout.exporter, layout.source, layout.scale, layout.plot_height
    margin, font, lines, line_height, strip = layout.margin, layout.font, layout.lines, layout.line_height, layout.strip
    painter.setRenderHint(QPainter.RenderHint.Antialiasing)
    painter.setRenderHint(QPainter.RenderHint.TextAntialiasing)
    background = QColor(PALETTE.surface)
    painter.fillRect(QRectF(0, 0, width, plot_height + strip), background)
    # legends ignore transformations (they keep their size when zooming), so a scaled
    # export would draw them at screen size; let them scale with the rest while rendering
    legends = [i for i in _descendants(exporter.item) if isinstance(i, pg.LegendItem)
               and i.flags() & QGraphicsItem.GraphicsItemFlag.ItemIgnoresTransformations]
    try:
        for item in legends:
            item.setFlag(QGraphicsItem.GraphicsItemFlag.ItemIgnoresTransformations, False)
        exporter.setExportMode(True, {"antialias": True, "background": background, "painter": painter,
                                      "resolutionScale": scale})
        exporter.getScene().render(painter, QRectF(0, 0, width, plot_height), QRectF(source))
    finally:
        exporter.setExportMode(False)
        for item in legends:
            item.setFlag(QGraphicsItem.GraphicsItemFlag.ItemIgnoresTransformations, True)
    if lines:
        painter.setPen(QColor(PALETTE.line))
        painter.drawLine(QPointF(margin, plot_height), QPointF(width - margin, plot_height))
        painter.setPen(QColor(PALETTE.ink_soft))
        painter.setFont(font)
        for i, line in enumerate(lines):
            rect = QRectF(margin, plot_height + 0.8 * margin + i * line_height, width - 2 * margin, line_height)
            painter.drawText(rect, Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter, line)


def render_png(target: Plottable, width: int = DEFAULT_WIDTH, dpi: int = DEFAULT_DPI, caption: str = "") -> QImage:
    """The plot rendered `width` pixels wide (fonts and lines scale with it), the caption in a
    strip below it, and the DPI written into the image."""
    layout = _layout(target, int(width), caption)
    image = QImage(int(width), layout.height, QImage.Format.Format_ARGB32)
    painter = QPainter(image)
    try:
        _draw(painter, layout, int(width))
    finally:
        painter.end()
    dots_per_metre = int(round(dpi * INCHES_PER_METRE))
    image.setDotsPerMeterX(dots_per_metre)
    image.setDotsPerMeterY(dots_per_metre)
    return image


def render_svg(target: Plottable, caption: str = "") -> str:
    """The plot as SVG text at its on-screen size, with the caption as text below it.

    Drawn with Qt's SVG generator: pyqtgraph 0.14's SVGExporter cannot parse the paths that
    Qt 6.12 writes, so it fails on every plot."""
    item = export_item(target)
    width = int(round(ImageExporter(item).getSourceRect().width()))
    layout = _layout(target, width, caption)
    height = layout.height
    buffer = QBuffer()
    buffer.open(QIODevice.OpenModeFlag.WriteOnly)
    generator = QSvgGenerator()
    generator.setOutputDevice(buffer)
    generator.setSize(QSize(width, height))
    generator.setViewBox(QRect(0, 0, width, height))
    screen = QGuiApplication.primaryScreen()
    generator.setResolution(int(round(screen.logicalDotsPerInch())) if screen is not None else 96)  # fonts as on screen
    generator.setTitle("chunkscope plot")
    generator.setDescription(caption)
    painter = QPainter(generator)
    try:
        _draw(painter, layout, width)
    finally:
        painter.end()
    return bytes(buffer.data()).decode("utf-8")


def export_plot(
    target: Plottable,
    path: str | Path,
    width: int = DEFAULT_WIDTH,
    dpi: int = DEFAULT_DPI,
    caption: str = "",
    force: bool = False,
    fmt: str | None = None,
) -> Path:
    """Save the plot as PNG or SVG (from `fmt`, else the file's suffix). Raises FileExistsError
    if the file exists and force is False; the old file is untouched on any failure."""
    path = Path(path)
    fmt = (fmt or path.suffix.lstrip(".")).lower()
    if fmt not in FORMATS:
        raise ValueError(f"plots are saved as PNG or SVG, not {fmt or 'a file without a suffix'!r}.")
    if fmt == "png" and not 16 <= int(width) <= 20_000:
        raise ValueError(f"the width must be from 16 to 20000 pixels, not {width}.")
    with staged_file(path, force) as tmp:
        if fmt == "png":
            image = render_png(target, int(width), int(dpi), caption)
            if not image.save(str(tmp), "PNG"):
                raise OSError(f"{path} could not be written.")
        else:
            tmp.write_text(render_svg(target, caption), encoding="utf-8")
    return path


# ---- dialogs -----------------------------------------------------------------------------

def confirm_overwrite(parent: QWidget | None, path: Path) -> bool:
    answer = QMessageBox.question(
        parent, "Replace file?", f"{path.name} already exists in {path.parent}.\nReplace it?",
        QMessageBox.StandardButton.Yes | QMessageBox.StandardButton.No, QMessageBox.StandardButton.No,
    )
    return answer == QMessageBox.StandardButton.Yes


class ExportOptions(QDialog):
    """Width and DPI of a PNG export."""

    def __init__(self, parent: QWidget | None = None, width: int = DEFAULT_WIDTH, dpi: int = DEFAULT_DPI):
        super().__init__(parent)
        self.setWindowTitle("PNG size")
        form = QFormLayout(self)
        self.width_box = QSpinBox()
        self.width_box.setRange(200, 20_000)
        self.width_box.setSingleStep(100)
        self.width_box.setSuffix(" px")
        self.width_box.setValue(width)
        self.dpi_box = QComboBox()
        self.dpi_box.setEditable(True)
        self.dpi_box.addItems(["96", "150", "200", "300", "600"])
        self.dpi_box.setCurrentText(str(dpi))
        form.addRow("width", self.width_box)
        form.addRow("resolution (DPI)", self.dpi_box)
        note = QLabel("The height follows the plot's shape; a caption line with the provenance is added below.")
        note.setObjectName("caption")
        note.setWordWrap(True)
        form.addRow(note)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        form.addRow(buttons)

    def values(self) -> tuple[int, int]:
        try:
            dpi = int(float(self.dpi_box.currentText()))
        except ValueError:
            dpi = DEFAULT_DPI
        return self.width_box.value(), max(1, min(dpi, 4800))


def save_plot_dialog(target: Plottable, caption_fn: Callable[[], str] | None = None, parent: QWidget | None = None,
                     suggested_name: str = "plot") -> Path | None:
    """Ask where and how to save the plot, ask before replacing a file, save. None if abandoned."""
    path_text, chosen = QFileDialog.getSaveFileName(
        parent, "Save plot", f"{suggested_name}.png", "PNG image (*.png);;SVG drawing (*.svg)",
        options=QFileDialog.Option.DontConfirmOverwrite,
    )
    if not path_text:
        return None
    path = Path(path_text)
    if path.suffix.lower() not in (".png", ".svg"):
        path = path.with_suffix(".svg" if "svg" in chosen.lower() else ".png")
    width, dpi = DEFAULT_WIDTH, DEFAULT_DPI
    if path.suffix.lower() == ".png":
        options = ExportOptions(parent)
        if options.exec() != QDialog.DialogCode.Accepted:
            return None
        width, dpi = options.values()
    force = False
    if path.exists():
        if not confirm_overwrite(parent, path):
            return None
        force = True
    caption = caption_fn() if caption_fn is not None else ""
    try:
        return export_plot(target, path, width=width, dpi=dpi, caption=caption or "", force=force)
    except (OSError, ValueError) as exc:
        QMessageBox.warning(parent, "Plot not saved", error_text(exc, path, "saved"))
        return None


def add_export_menu(plot_widget: pg.PlotWidget | pg.GraphicsLayoutWidget, caption_fn: Callable[[], str] | None = None,
                    name: str = "plot") -> QAction:
    """Give a plot a right-click menu with "Save plot…" (a click, so right-drag zoom still works).

    Returns the action, so a window can also put it in a toolbar or menu."""
    action = QAction("Save plot…", plot_widget)
    action.triggered.connect(lambda: save_plot_dialog(plot_widget, caption_fn, plot_widget.window(), name))

    def clicked(event) -> None:
        if event.button() != Qt.MouseButton.RightButton or event.isAccepted():
            return
        menu = QMenu(plot_widget)
        menu.addAction(action)
        event.accept()
        menu.popup(event.screenPos().toPoint())

    plot_widget.scene().sigMouseClicked.connect(clicked)
    plot_widget.setToolTip(plot_widget.toolTip() or "right-click to save this plot as PNG or SVG")
    plot_widget._save_plot_action = action  # keep it alive with the widget
    return action
