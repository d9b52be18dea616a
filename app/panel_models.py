"""Side panel: the opened checkpoints as a list, and the selected one's details and card."""

from __future__ import annotations

import html
import json
from pathlib import Path

from PySide6.QtCore import QSize, Qt, Signal
from PySide6.QtWidgets import (
    QHBoxLayout, QLabel, QListWidget, QListWidgetItem, QPushButton, QTextBrowser, QVBoxLayout, QWidget,
)

from app.state import Entry, Workbench
from app.style import PALETTE


def _entry_summary(entry: Entry) -> tuple[str, str]:
    if entry.codec is None:
        return entry.name, "opening…"
    c = entry.codec.config
    kind = "variational" if c.variational else "plain"
    return entry.name, f"{kind} · K {c.chunk_size} · D {c.latent_dim} · {entry.codec.sha256[:8]}"


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
        self.open_button = QPushButton("Open…")
        self.open_button.setToolTip("Open a checkpoint (.safetensors); you can also drop files on the window")
        self.open_button.clicked.connect(self.open_requested)
        head.addWidget(self.open_button)
        layout.addLayout(head)

        self.list = QListWidget()
        self.list.setObjectName("checkpoints")
        self.list.setMinimumHeight(120)
        self.list.currentItemChanged.connect(self._picked)
        layout.addWidget(self.list, 2)

        label = QLabel("DETAILS")
        label.setObjectName("section")
        layout.addWidget(label)
        self.details = QTextBrowser()
        self.details.setOpenLinks(False)
        self.details.document().setDocumentMargin(10)
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
        p = PALETTE
        if entry is None:
            self.details.setHtml(f"<p style='color:{p.ink_soft}'>No checkpoint is open.</p>")
            return
        if entry.codec is None:
            self.details.setHtml(f"<p style='color:{p.ink_soft}'>Opening {html.escape(Path(entry.path).name)}…</p>")
            return
        codec = entry.codec
        c = codec.config
        rows = [
            ("file", Path(entry.path).name),
            ("architecture", f"{c.arch}, {'variational' if c.variational else 'plain'} autoencoder"),
            ("chunk size K", c.chunk_size),
            ("latent dim D", c.latent_dim),
            ("vocabulary", f"{c.vocab_size:,}"),
            ("embed / width / depth", f"{c.embed_dim} / {c.width} / {c.depth}"),
            ("parameters", f"{codec.num_parameters:,}"),
            ("sha256", codec.sha256[:16] + "…"),
        ]
        if entry.encoded is not None:
            rows.append(("latent RMS", f"{entry.encoded.latent_rms:.4g}"))
        out = [self._table(rows)]
        out.append(f"<p style='margin:10px 0 4px 0; color:{p.ink_soft}; font-size:8pt; font-weight:600'>CARD</p>")
        if codec.card:
            out.append(self._stacked(self._flatten(codec.card)))
        else:
            out.append(f"<p style='color:{p.ink_faint}'>This checkpoint carries no card.</p>")
        self.details.setHtml("".join(out))

    @staticmethod
    def _flatten(card: dict, prefix: str = "") -> list[tuple[str, object]]:
        rows: list[tuple[str, object]] = []
        for key, value in card.items():
            name = f"{prefix}{key}"
            if isinstance(value, dict) and len(rows) < 80:
                rows.extend(ModelsPanel._flatten(value, name + "."))
            elif isinstance(value, float):
                rows.append((name, f"{value:.4g}"))
            elif isinstance(value, list):
                text = json.dumps(value)
                rows.append((name, text if len(text) < 80 else text[:77] + "…"))
            else:
                rows.append((name, value))
        return rows

    @staticmethod
    def _stacked(rows: list[tuple[str, object]]) -> str:
        """Card entries as key over value: card keys are long and values can be too."""
        p = PALETTE
        return "".join(
            f"<p style='margin:0 0 4px 0; font-size:8.5pt'><span style='color:{p.ink_soft}'>{html.escape(str(k))}</span><br>"
            f"<span style='color:{p.ink}'>{html.escape(str(v))}</span></p>"
            for k, v in rows
        )

    @staticmethod
    def _table(rows: list[tuple[str, object]]) -> str:
        p = PALETTE
        cells = "".join(
            f"<tr><td style='color:{p.ink_soft}; padding:1px 10px 1px 0; white-space:nowrap' valign='top'>{html.escape(str(k))}</td>"
            f"<td style='color:{p.ink}'>{html.escape(str(v))}</td></tr>"
            for k, v in rows
        )
        return f"<table cellspacing='0' style='font-size:8.5pt'>{cells}</table>"

    def sizeHint(self) -> QSize:  # noqa: N802 (Qt naming)
        return QSize(300, 600)

