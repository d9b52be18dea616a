"""The compare view's table: each checkpoint's sha256, latent RMS, accuracy at σ = 0 and its
tolerances under absolute and relative (data-scale) noise, side by side."""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtGui import QColor
from PySide6.QtWidgets import QAbstractItemView, QHeaderView, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget

from app.controls import caption
from app.style import PALETTE, fmt_percent
from core.analyses.compare import Comparison
from core.engine.sweep import tolerance_text

LEVELS = (0.999, 0.99, 0.9)
LEVEL_NAMES = {0.999: "99.9 %", 0.99: "99 %", 0.9: "90 %"}


def tolerance_label(t: dict) -> str:
    """How a tolerance stored as a dict ({"sigma", "status"}) reads in a table cell."""
    return tolerance_text(t["sigma"], t["status"])


class ToleranceTable(QWidget):
    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        box = QVBoxLayout()
        box.setSpacing(4)
        box.addWidget(caption("Tolerances side by side", "title"))
        self.table = t = QTableWidget()
        t.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        t.setSelectionMode(QAbstractItemView.SelectionMode.NoSelection)
        t.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        t.verticalHeader().setDefaultSectionSize(22)
        t.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        t.horizontalHeader().setTextElideMode(Qt.TextElideMode.ElideMiddle)
        t.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAsNeeded)
        t.setToolTip("tolerance: the largest σ before token accuracy first drops below the level, interpolated on "
                     "the grid; absolute σ depends on the latent's scale, relative (data-scale) σ does not")
        box.addWidget(t)
        self.note = caption("")
        self.note.setWordWrap(True)
        box.addWidget(self.note)
        box.addStretch(1)
        self.setLayout(box)
        self.setMinimumWidth(330)

    def fill(self, comparison: Comparison | None) -> None:
        t = self.table
        t.clear()
        c = comparison
        if c is None:
            t.setRowCount(0)
            t.setColumnCount(0)
            t.setFixedHeight(60)
            self.note.setText("")
            return
        rows = (["sha256", "latent RMS", "accuracy, σ = 0"]
                + [f"absolute {LEVEL_NAMES[l]}" for l in LEVELS]
                + [f"relative {LEVEL_NAMES[l]}" for l in LEVELS])
        t.setRowCount(len(rows))
        t.setColumnCount(len(c.tolerances))
        t.setVerticalHeaderLabels(rows)
        for j, row in enumerate(c.tolerances):
            role = "A" if j == 0 else ("B" if len(c.tolerances) == 2 else f"B{j}")
            header = QTableWidgetItem(f"{role}\n{row.name}")
            header.setToolTip(f"{row.name}\nsha256 {row.sha256}")
            t.setHorizontalHeaderItem(j, header)
            values = [row.sha256[:10], f"{row.latent_rms:.4g}", fmt_percent(row.accuracy_at_zero, 3)]
            values += [tolerance_label(x) for x in row.absolute] + [tolerance_label(x) for x in row.data_scale]
            for i, value in enumerate(values):
                item = QTableWidgetItem(value)
                item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                if i >= 6:
                    font = item.font()
                    font.setBold(True)
                    item.setFont(font)
                if 3 <= i < 6 and c.scale_warning:
                    item.setForeground(QColor(PALETTE.ink_faint))
                    item.setToolTip("absolute σ: not comparable across these checkpoints, their latent scales differ")
                t.setItem(i, j, item)
        height = t.horizontalHeader().sizeHint().height() + sum(t.rowHeight(i) for i in range(t.rowCount())) + 2 * t.frameWidth()
        t.setFixedHeight(height + 2)
        self.note.setText(
            "relative σ is scale-free and compares fairly; absolute σ grows with the latent's RMS. "
            "“> x”: never dropped on the grid." + (" Absolute columns greyed: the scales differ." if c.scale_warning else "")
        )
