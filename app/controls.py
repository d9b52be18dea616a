"""Small control helpers shared by the panels: the page layout and framed cards, captions,
arrowless spin boxes, the figure boxes of a summary row, and the sigma-grid and noise
settings of the sweep, compare and training-run panels."""

from __future__ import annotations

from typing import Sequence

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QAbstractSpinBox, QBoxLayout, QCheckBox, QComboBox, QDoubleSpinBox, QFrame, QGridLayout, QHBoxLayout, QLabel,
    QLayout, QProgressBar, QPushButton, QSpinBox, QVBoxLayout, QWidget,
)

from app.style import PALETTE
from core.engine.noise import NOISE_MODELS
from core.engine.sweep import SweepSettings
from core.analyses.views import sigma_grid


def page_layout(page: QWidget, spacing: int) -> QVBoxLayout:
    """A view's outer layout, with the page margins every view shares."""
    outer = QVBoxLayout(page)
    outer.setContentsMargins(14, 12, 14, 12)
    outer.setSpacing(spacing)
    return outer


def card(layout: type[QLayout] = QVBoxLayout, margins: tuple[int, int] = (14, 8), spacing: int | None = None):
    """A framed group (the "card" of app.style) and its layout; margins are (side, top and bottom)."""
    frame = QFrame()
    frame.setObjectName("card")
    inner = layout(frame)
    side, vertical = margins
    inner.setContentsMargins(side, vertical, side, vertical)
    if spacing is not None and isinstance(inner, QBoxLayout):
        inner.setSpacing(spacing)
    return frame, inner


def run_controls(text: str, on_run, on_cancel, progress_width: int = 90):
    """The run button, its cancel button and a thin progress bar of a long computation."""
    run_button = QPushButton(text)
    run_button.setObjectName("primary")
    run_button.clicked.connect(on_run)
    cancel_button = QPushButton("Cancel")
    cancel_button.clicked.connect(on_cancel)
    progress = QProgressBar()
    progress.setTextVisible(False)
    progress.setFixedHeight(6)
    progress.setMinimumWidth(progress_width)
    return run_button, cancel_button, progress


def caption(text: str, name: str = "caption") -> QLabel:
    label = QLabel(text)
    label.setObjectName(name)
    return label


def spin_box(box: QAbstractSpinBox, width: int | None = None) -> QAbstractSpinBox:
    """A spin box without arrows. NoButtons under the workbench stylesheet collapses the text
    field to one pixel, so the arrows are made zero-wide instead; the frame is restated here
    because a widget's own style sheet otherwise drops it on first paint."""
    p = PALETTE
    box.setStyleSheet(
        f"QAbstractSpinBox {{ background: {p.surface}; border: 1px solid {p.line}; border-radius: 4px; "
        "padding: 2px 6px; min-height: 20px; }"
        "QAbstractSpinBox::up-button, QAbstractSpinBox::down-button { width: 0px; border: none; }"
    )
    if width is not None:
        box.setMaximumWidth(width)
    return box


def figure_box(title: str, right_margin: int) -> tuple[QWidget, QLabel, QLabel]:
    """A caption over a large figure over a faint note, for a row of summary numbers;
    returns the box, the figure label and the note label."""
    box = QWidget()
    layout = QVBoxLayout(box)
    layout.setContentsMargins(0, 0, right_margin, 0)
    layout.setSpacing(0)
    value = QLabel("—")
    value.setObjectName("figure")
    note = caption("", "faint")
    layout.addWidget(caption(title))
    layout.addWidget(value)
    layout.addWidget(note)
    return box, value, note


class GridControls(QWidget):
    """The sigma grid (start, stop, points, spacing, "and 0") and the noise settings (noise
    model, repeats, seed) of a sweep-like run, with their saved settings.

    `defaults` names the saved keys and their order; the noise choice is saved under
    `noise_key` ("noise" for the sweep and training-run panels, "main_noise" for compare).
    `order` is the order of the noise row ("noise", "repeats", "seed"). With `two_rows` the
    controls sit in a QGridLayout, grid in row 0 and noise in row 1 under "Grid" and "Noise"
    titles, with plain arrowless spin boxes; otherwise in one QHBoxLayout with compact spin
    boxes. The owning panel may add its own buttons to `layout()`."""

    def __init__(self, defaults: dict, *, noise_key: str = "noise", noise_label: str = "noise",
                 noise_choices: Sequence[str] = NOISE_MODELS, noise_tip: str = "", sigma_label: str = "σ from",
                 zero_text: str = "and 0", zero_tip: str = "", order: Sequence[str] = ("repeats", "noise", "seed"),
                 two_rows: bool = False):
        super().__init__()
        self.defaults = dict(defaults)
        self.noise_key = noise_key
        self.start = QDoubleSpinBox()
        self.start.setDecimals(4)
        self.start.setRange(0.0, 1e4)
        self.stop = QDoubleSpinBox()
        self.stop.setDecimals(4)
        self.stop.setRange(0.0, 1e4)
        self.points = QSpinBox()
        self.points.setRange(1, 400)
        self.spacing = QComboBox()
        self.spacing.addItems(["log", "linear"])
        self.zero = QCheckBox(zero_text)
        if zero_tip:
            self.zero.setToolTip(zero_tip)
        self.repeats = QSpinBox()
        self.repeats.setRange(1, 1000)
        self.seed = QSpinBox()
        self.seed.setRange(0, 2**31 - 1)
        self.noise = QComboBox()
        self.noise.addItems(list(noise_choices))
        if noise_tip:
            self.noise.setToolTip(noise_tip)
        boxes = ((self.start, 64), (self.stop, 64), (self.points, 44), (self.repeats, 48), (self.seed, 64))
        for box, width in boxes:
            if two_rows:
                box.setButtonSymbols(QAbstractSpinBox.ButtonSymbols.NoButtons)
            else:
                spin_box(box, width)

        first = ((sigma_label, self.start), ("to", self.stop),
                 ("points", self.points), ("spacing", self.spacing))
        named = {"noise": (noise_label, self.noise), "repeats": ("repeats", self.repeats), "seed": ("seed", self.seed)}
        second = [named[name] for name in order]
        if two_rows:
            grid = QGridLayout(self)
            grid.setContentsMargins(0, 0, 0, 0)
            grid.setHorizontalSpacing(8)
            grid.setVerticalSpacing(6)
            for row, (title, fields) in enumerate((("Grid", first), ("Noise", second))):
                grid.addWidget(caption(title, "title"), row, 0)
                col = 1
                for label, widget in fields:
                    grid.addWidget(caption(label), row, col, Qt.AlignmentFlag.AlignRight)
                    grid.addWidget(widget, row, col + 1)
                    col += 2
                if row == 0:
                    grid.addWidget(self.zero, 0, col)
        else:
            row = QHBoxLayout(self)
            row.setContentsMargins(0, 0, 0, 0)
            row.setSpacing(8)
            for label, widget in first:
                row.addWidget(caption(label))
                row.addWidget(widget)
            row.addWidget(self.zero)
            row.addSpacing(10)
            for label, widget in second:
                row.addWidget(caption(label))
                row.addWidget(widget)

    def settings_dict(self) -> dict:
        current = {"start": self.start.value(), "stop": self.stop.value(), "points": self.points.value(),
                   "spacing": self.spacing.currentText(), "zero": self.zero.isChecked(),
                   "repeats": self.repeats.value(), "seed": self.seed.value(),
                   self.noise_key: self.noise.currentText()}
        return {key: current[key] for key in self.defaults}

    def restore(self, values: dict | None) -> None:
        """Show saved settings; missing keys take the defaults, and unreadable ones reset all."""
        merged = {**self.defaults, **(values or {})}
        setters = {"start": lambda v: self.start.setValue(float(v)), "stop": lambda v: self.stop.setValue(float(v)),
                   "points": lambda v: self.points.setValue(int(v)),
                   "spacing": lambda v: self.spacing.setCurrentText(str(v)),
                   "zero": lambda v: self.zero.setChecked(str(v).lower() in ("true", "1")),
                   "repeats": lambda v: self.repeats.setValue(int(v)), "seed": lambda v: self.seed.setValue(int(v)),
                   self.noise_key: lambda v: self.noise.setCurrentText(str(v))}
        try:
            for key in self.defaults:
                setters[key](merged[key])
        except (TypeError, ValueError, KeyError):
            if values is not self.defaults:
                self.restore(self.defaults)

    def sigmas(self) -> tuple[float, ...]:
        """The sigma grid these settings describe (SettingsError when they describe none)."""
        s = self.settings_dict()
        return sigma_grid(s["start"], s["stop"], s["points"], s["spacing"], s["zero"])

    def sweep_settings(self) -> SweepSettings:
        """These settings as the engine's SweepSettings (SettingsError when the grid is impossible)."""
        s = self.settings_dict()
        return SweepSettings(sigmas=self.sigmas(), repeats=s["repeats"], noise=s[self.noise_key], seed=s["seed"])
