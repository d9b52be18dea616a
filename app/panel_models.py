"""Side panel: the opened checkpoints as a list, and the selected one's details and card."""

from __future__ import annotations

import html
from pathlib import Path

from PySide6.QtCore import QSize, Qt, Signal
from PySide6.QtWidgets import (
    QFrame, QGridLayout, QHBoxLayout, QLabel, QListWidget, QListWidgetItem, QPushButton, QScrollArea, QSizePolicy,
    QVBoxLayout, QWidget,
)

from app.state import Entry, Workbench
from core.codecs.summary import card_rows, codec_rows, header_rows, short_summary
from app.style import PALETTE


def _entry_summary(entry: Entry) -> tuple[str, str]:
    if entry.codec is None and entry.info is None:
        return entry.name, "opening…"
    return entry.name, short_summary(entry.codec, entry.info)


class ElidedLabel(QLabel):
    """One line that keeps its full text and shows as much as fits, eliding in the middle
    (a hash keeps its start and end); the full text is in the tooltip when cut."""

    def __init__(self, text: str = "", mode: Qt.TextElideMode = Qt.TextElideMode.ElideMiddle):
        super().__init__()
        self._full = ""
        self._mode = mode
        self.setTextFormat(Qt.TextFormat.PlainText)
        self.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Fixed)
        self.set_full_text(text)

    def set_full_text(self, text: str) -> None:
        self._full = str(text)
        self._elide()

    def full_text(self) -> str:
        return self._full

    def sizeHint(self) -> QSize:  # noqa: N802
        return QSize(self.fontMetrics().horizontalAdvance(self._full) + 4, super().sizeHint().height())

    def minimumSizeHint(self) -> QSize:  # noqa: N802
        return QSize(24, super().minimumSizeHint().height())

    def resizeEvent(self, event) -> None:  # noqa: N802
        super().resizeEvent(event)
        self._elide()

    def _elide(self) -> None:
        width = max(self.contentsRect().width(), 24)
        shown = self.fontMetrics().elidedText(self._full, self._mode, width)
        if shown != self.text():
            self.setText(shown)
        self.setToolTip(self._full if shown != self._full or len(self._full) > 24 else "")


class DetailsView(QScrollArea):
    """The selected checkpoint's details and card as a two-column key / value list:
    short values on one line (long hashes elided in the middle, full value in the tooltip),
    prose wrapped; nested card fields arrive flattened with dotted keys."""

    KEY_WIDTH = 112

    def __init__(self):
        super().__init__()
        self.setObjectName("details")
        self.setWidgetResizable(True)
        self.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.setFrameShape(QFrame.Shape.NoFrame)
        self.setStyleSheet(f"QScrollArea#details {{ background: {PALETTE.surface}; border: 1px solid {PALETTE.line}; "
                           "border-radius: 6px; }")
        self._rows: list[tuple[str, str]] = []
        self._shown: str | None = None  # what is on screen, to skip rebuilding the same details
        self._shape: tuple = ()  # sections' titles, keys and kinds of value: same shape, update in place
        self._labels: list[QLabel] = []
        self._values: dict[str, QLabel] = {}
        self._show(QWidget())

    def _show(self, inner: QWidget) -> None:
        inner.setObjectName("detailsInner")
        inner.setStyleSheet(f"QWidget#detailsInner {{ background: {PALETTE.surface}; }}")
        old = self.takeWidget()
        if old is not None:
            old.deleteLater()
        self.setWidget(inner)

    def set_message(self, text: str) -> None:
        if self._shown == text:
            return
        self._shown, self._shape = text, ()
        self._rows, self._values, self._labels = [("", text)], {}, []
        inner = QWidget()
        layout = QVBoxLayout(inner)
        layout.setContentsMargins(10, 10, 10, 10)
        label = QLabel(text)
        label.setObjectName("caption")
        label.setWordWrap(True)
        layout.addWidget(label)
        layout.addStretch(1)
        self._show(inner)

    def set_sections(self, sections: list[tuple[str, list[tuple[str, object]], str, bool]]) -> None:
        """(title, rows, note when rows is empty, stacked) per section; the first title may be
        empty. Stacked rows put the key above its value (card keys are long dotted names).
        The same sections again change nothing (opening several files asks several times),
        and the same rows with new values update the labels in place (a rebuild of a long
        card takes a noticeable fraction of a second)."""
        key = repr(sections)
        if self._shown == key:
            return
        self._shown = key
        shape = tuple((title, tuple((str(k), self._is_prose(str(v))) for k, v in rows), note, stacked)
                      for title, rows, note, stacked in sections)
        if shape == self._shape:
            self._rows = [(str(k), str(v)) for _, rows, _, _ in sections for k, v in rows]
            for label, (_, value) in zip(self._labels, self._rows):
                if isinstance(label, ElidedLabel):
                    label.set_full_text(value)
                else:
                    label.setText(value)
            return
        self._shape = shape
        self._rows, self._values, self._labels = [], {}, []
        inner = QWidget()
        layout = QVBoxLayout(inner)
        layout.setContentsMargins(10, 8, 10, 10)
        layout.setSpacing(4)
        for title, rows, note, stacked in sections:
            if title:
                head = QLabel(title)
                head.setObjectName("section")
                head.setContentsMargins(0, 8, 0, 0)
                layout.addWidget(head)
            if not rows:
                label = QLabel(note)
                label.setObjectName("faint")
                label.setWordWrap(True)
                layout.addWidget(label)
                continue
            grid = QGridLayout()
            grid.setHorizontalSpacing(10)
            grid.setVerticalSpacing(3)
            grid.setColumnStretch(1, 1)
            for i, (key, value) in enumerate(rows):
                key, value = str(key), str(value)
                self._rows.append((key, value))
                key_label = ElidedLabel(key)
                key_label.setObjectName("caption")
                key_label.setSizePolicy(QSizePolicy.Policy.Preferred, QSizePolicy.Policy.Fixed)
                key_label.setMaximumWidth(self.KEY_WIDTH)
                if self._is_prose(value):  # prose: wrap at spaces
                    value_label = QLabel(value)
                    value_label.setTextFormat(Qt.TextFormat.PlainText)
                    value_label.setWordWrap(True)
                    value_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
                    value_label.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
                else:  # hashes, numbers, paths: one line, elided in the middle
                    value_label = ElidedLabel(value)
                value_label.setObjectName("detailValue")
                if stacked:
                    key_label.setMaximumWidth(16_777_215)
                    key_label.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Fixed)
                    value_label.setContentsMargins(10, 0, 0, 3)
                    grid.addWidget(key_label, 2 * i, 0, 1, 2)
                    grid.addWidget(value_label, 2 * i + 1, 0, 1, 2)
                else:
                    grid.addWidget(key_label, i, 0, Qt.AlignmentFlag.AlignTop)
                    grid.addWidget(value_label, i, 1, Qt.AlignmentFlag.AlignTop)
                self._values.setdefault(key, value_label)
                self._labels.append(value_label)
            layout.addLayout(grid)
        layout.addStretch(1)
        self._show(inner)

    @staticmethod
    def _is_prose(value: str) -> bool:
        return " " in value.strip() and len(value) > 16

    def value_label(self, key: str) -> QLabel | None:
        return self._values.get(key)

    def toPlainText(self) -> str:  # noqa: N802 (the QTextBrowser name it replaced)
        return "\n".join(f"{k}: {v}" if k else v for k, v in self._rows)


class EntryRow(QWidget):
    def __init__(self, entry: Entry):
        super().__init__()
        layout = QVBoxLayout(self)
        layout.setContentsMargins(10, 7, 8, 7)
        layout.setSpacing(1)
        self.name = QLabel()
        self.name.setObjectName("title")
        self.meta = QLabel()
        self.meta.setObjectName("caption")
        layout.addWidget(self.name)
        layout.addWidget(self.meta)
        self.update_from(entry)

    def update_from(self, entry: Entry) -> None:
        name, meta = _entry_summary(entry)
        self.name.setText(name)
        busy = entry.busy - {"load"}
        self.meta.setText(meta + ("  ·  working…" if busy and entry.codec is not None else ""))


class ModelsPanel(QWidget):
    open_requested = Signal()
    open_adapter_requested = Signal()  # open a checkpoint through the user's Python adapter

    def __init__(self, workbench: Workbench):
        super().__init__()
        self.workbench = workbench
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.setSpacing(6)
        head = QHBoxLayout()
        label = QLabel("CHECKPOINTS")
        label.setObjectName("section")
        head.addWidget(label)
        head.addStretch(1)
        layout.addLayout(head)
        buttons = QHBoxLayout()  # a row of their own: the side panel is narrow
        buttons.setSpacing(6)
        self.open_button = QPushButton("Open…")
        self.open_button.setToolTip("Open a checkpoint (.safetensors) or an ONNX codec's codec.json; you can also drop "
                                    "files and ONNX codec folders on the window")
        self.open_button.clicked.connect(self.open_requested)
        buttons.addWidget(self.open_button, 1)
        self.adapter_button = QPushButton("Open with adapter…")
        self.adapter_button.setToolTip("Open your own model's checkpoint (a file or a folder) through a Python adapter "
                                       "file; this runs the code in that file, and you are asked before it first runs")
        self.adapter_button.clicked.connect(self.open_adapter_requested)
        buttons.addWidget(self.adapter_button, 1)
        layout.addLayout(buttons)

        self.list = QListWidget()
        self.list.setObjectName("checkpoints")
        self.list.setMinimumHeight(120)
        self.list.currentItemChanged.connect(self._picked)
        layout.addWidget(self.list, 2)

        label = QLabel("DETAILS")
        label.setObjectName("section")
        layout.addWidget(label)
        self.details = DetailsView()
        layout.addWidget(self.details, 5)

        label = QLabel("TEXT")
        label.setObjectName("section")
        layout.addWidget(label)
        self.text_info = QLabel()
        self.text_info.setObjectName("caption")
        self.text_info.setWordWrap(True)
        layout.addWidget(self.text_info)

        workbench.entries_changed.connect(self.rebuild)
        workbench.entry_changed.connect(self._entry_changed)
        workbench.current_changed.connect(self._current_changed)
        workbench.text_changed.connect(self._text_changed)
        self.rebuild()

    def rebuild(self) -> None:
        self.list.blockSignals(True)
        self.list.clear()
        for path, entry in self.workbench.entries.items():
            item = QListWidgetItem()
            item.setData(Qt.ItemDataRole.UserRole, path)
            row = EntryRow(entry)
            item.setSizeHint(QSize(100, row.sizeHint().height()))
            self.list.addItem(item)
            self.list.setItemWidget(item, row)
            if path == self.workbench.current:
                self.list.setCurrentItem(item)
        self.list.blockSignals(False)
        self._show_details()

    def _row(self, path: str) -> tuple[QListWidgetItem | None, EntryRow | None]:
        for i in range(self.list.count()):
            item = self.list.item(i)
            if item.data(Qt.ItemDataRole.UserRole) == path:
                return item, self.list.itemWidget(item)
        return None, None

    def _entry_changed(self, path: str) -> None:
        item, row = self._row(path)
        entry = self.workbench.entries.get(path)
        if row is not None and entry is not None:
            row.update_from(entry)
        if path == self.workbench.current:
            self._show_details()
            self._text_changed()

    def _current_changed(self, path: str) -> None:
        item, _ = self._row(path)
        if item is not None and self.list.currentItem() is not item:
            self.list.blockSignals(True)
            self.list.setCurrentItem(item)
            self.list.blockSignals(False)
        self._show_details()
        self._text_changed()

    def _picked(self, item: QListWidgetItem | None, _previous=None) -> None:
        if item is not None:
            self.workbench.select(item.data(Qt.ItemDataRole.UserRole))

    def _text_changed(self) -> None:
        wb = self.workbench
        entry = wb.entry()
        line = f"{html.escape(wb.text_source or 'none')} · {len(wb.text):,} characters"
        if entry is not None and entry.chunks is not None:
            line += f" · {entry.chunks.num_tokens:,} tokens in {entry.chunks.num_chunks:,} chunks"
        self.text_info.setText(line)

    def _show_details(self) -> None:
        entry = self.workbench.entry()
        if entry is None:
            self.details.set_message("No checkpoint is open.")
            return
        if entry.codec is None and entry.info is None:
            self.details.set_message(f"Opening {Path(entry.path).name}…")
            return
        codec = entry.codec
        card = codec.card if codec is not None else entry.info.card
        rows = codec_rows(codec) if codec is not None else header_rows(entry.info)
        rows.append(("latent RMS", f"{entry.encoded.latent_rms:.4g}" if entry.encoded is not None else "encoding…"))
        self.details.set_sections([("", rows, "", False), ("CARD", card_rows(card) if card else [], "This checkpoint carries no card.", True)])

    def sizeHint(self) -> QSize:  # noqa: N802 (Qt naming)
        return QSize(300, 600)

