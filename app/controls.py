"""Small control helpers shared by the compare and training-run panels."""

from __future__ import annotations

from PySide6.QtWidgets import QAbstractSpinBox, QLabel

from app.style import PALETTE


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
