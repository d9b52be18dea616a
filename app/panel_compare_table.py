"""The compare view's table: each checkpoint's sha256, latent RMS, accuracy at σ = 0 and its
tolerances (accuracy levels and loss levels) under absolute and relative (data-scale) noise,
side by side."""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtGui import QColor
from PySide6.QtWidgets import QAbstractItemView, QHeaderView, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget

from app.controls import caption
from app.style import PALETTE, fmt_percent
from core.analyses.compare import COMPARISON_NOISES, Comparison
from core.engine.noise import sigma_unit
from core.engine.tolerance import ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, level_name, status_notes, tolerance_text


def tolerance_label(t) -> str:
    """How a tolerance (a Tolerance or its JSON form) reads in a table cell."""
    return tolerance_text(t)


class ToleranceTable(QWidget):
    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self.rows: list[tuple[str, str, float] | None] = []  # (noise, kind, level) per table row
        box = QVBoxLayout()
        box.setSpacing(4)
        box.addWidget(caption("Tolerances side by side", "title"))
        self.table = t = QTableWidget()
        t.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        t.setSelectionMode(QAbstractItemView.SelectionMode.NoSelection)
        t.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        t.verticalHeader().setDefaultSectionSize(18)
        # the columns share the width; a header is the role over the whole name (two lines), never elided
        t.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        t.horizontalHeader().setTextElideMode(Qt.TextElideMode.ElideNone)
        t.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAsNeeded)
        t.setToolTip("σ at accuracy ≥ a level: the largest σ before token accuracy first drops below it; σ at "
                     "loss ≤ a level: the largest σ before it falls that many points below its σ = 0 value. Both "
                     "interpolated on the grid; absolute σ depends on the latent's scale, relative (data-scale) σ "
                     "does not")
        box.addWidget(t)
        self.note = caption("")
        self.note.setWordWrap(True)
        box.addWidget(self.note)
        box.addStretch(1)
        self.setLayout(box)
        self.setMinimumWidth(430)

    def fill(self, comparison: Comparison | None) -> None:
        t = self.table
        t.clear()
        c = comparison
        self.rows = []
        if c is None:
            t.setRowCount(0)
            t.setColumnCount(0)
            t.setFixedHeight(60)
            self.note.setText("")
            return
        # rows: the facts, then per noise a heading row and its accuracy-level and loss tolerances
        kinds = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]
        labels = ["sha256", "latent RMS", "accuracy, σ = 0"]
        self.rows = [None, None, None]  # (noise, kind, level) of each tolerance row, None for the others
        for noise in COMPARISON_NOISES[::-1]:  # absolute σ first, the fair relative σ last and bold
            labels.append(f"{sigma_unit(noise)} ({noise})")
            self.rows.append(None)
            for kind, level in kinds:
                labels.append(level_name(level, kind))
                self.rows.append((noise, kind, level))
        t.setRowCount(len(labels))
        t.setColumnCount(len(c.tolerances))
        t.setVerticalHeaderLabels(labels)
        for i, key in enumerate(self.rows):
            if i >= 3 and key is None:  # a heading row: the noise, its σ unit, over a band of the header colour
                if len(c.tolerances) > 1:
                    t.setSpan(i, 0, 1, len(c.tolerances))
                band = QTableWidgetItem("")
                band.setBackground(QColor(PALETTE.sunken))
                t.setItem(i, 0, band)
        for j, row in enumerate(c.tolerances):
            role = "A" if j == 0 else ("B" if len(c.tolerances) == 2 else f"B{j}")
            header = QTableWidgetItem(f"{role}\n{row.name}")
            header.setToolTip(f"{row.name}\nsha256 {row.sha256}")
            t.setHorizontalHeaderItem(j, header)
            lists = {("isotropic", ABSOLUTE): row.absolute, ("isotropic", LOSS): row.absolute_loss,
                     ("data-scale", ABSOLUTE): row.data_scale, ("data-scale", LOSS): row.data_scale_loss}
            for i, key in enumerate(self.rows):
                if key is None:
                    if i >= 3:
                        continue
                    value = [row.sha256[:8], f"{row.latent_rms:.4g}", fmt_percent(row.accuracy_at_zero, 3)][i]
                else:
                    noise, kind, level = key
                    value = tolerance_label(next((x for x in lists[(noise, kind)] if abs(x.level - level) < 1e-12), None))
                item = QTableWidgetItem(value)
                if i == 0 and key is None:
                    item.setToolTip(f"sha256 {row.sha256}")
                item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                if key is not None and key[0] == "data-scale":
                    font = item.font()
                    font.setBold(True)
                    item.setFont(font)
                if key is not None and key[0] == "isotropic" and c.scale_warning:
                    item.setForeground(QColor(PALETTE.ink_faint))
                    item.setToolTip("absolute σ: not comparable across these checkpoints, their latent scales differ")
                t.setItem(i, j, item)
        height = t.horizontalHeader().sizeHint().height() + sum(t.rowHeight(i) for i in range(t.rowCount())) + 2 * t.frameWidth()
        t.setFixedHeight(height + 2)
        notes = status_notes([x for row in c.tolerances for x in row.absolute + row.absolute_loss + row.data_scale
                              + row.data_scale_loss])
        self.note.setText(
            "Relative σ compares fairly; absolute σ grows with the latent's RMS (hover the table for the definitions)."
            + "".join(f" {n}." for n in notes) + (" Absolute rows greyed: the scales differ." if c.scale_warning else "")
        )
