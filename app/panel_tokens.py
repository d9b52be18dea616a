"""Token failures: where a sweep breaks the text first, token by token and type by type."""

from __future__ import annotations

import html

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QRectF, QSize, Qt, Signal
from PySide6.QtGui import QColor, QPainter
from PySide6.QtWidgets import (
    QAbstractItemView, QHBoxLayout, QHeaderView, QLabel, QSplitter, QTableWidget, QTableWidgetItem, QVBoxLayout,
    QWidget,
)

from app.controls import card, page_layout
from app.export import add_export_menu
from app.state import Workbench
from app.style import (
    PALETTE, fmt_sigma, fmt_tick, legend, level_colours, log_ticks, pen, plot_widget, readable_on, series_colours, show_piece, ui_font,
)
from app.tokentext import TokenText, char_format
from app.workers import Task
from core.outputs.report import provenance_caption
from core.engine.sweep import SweepResult
from core.analyses.tokens import broken_count, fragile_types, most_fragile_occurrence
from core.analyses.views import bucket_accuracy_table, critical_sigma_levels, token_story


def _fragile(task: Task, result: SweepResult, tokenizer):
    return fragile_types(result, tokenizer)


class NumberItem(QTableWidgetItem):
    """A table cell that sorts by its number (NaN last)."""

    def __init__(self, value: float, text: str):
        super().__init__(text)
        self.value = float("inf") if value is None or not np.isfinite(value) else float(value)
        self.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)

    def __lt__(self, other: QTableWidgetItem) -> bool:
        return self.value < getattr(other, "value", float("inf"))


class ColourScale(QWidget):
    """The critical-sigma colour bar: one swatch per grid sigma, and the never-broke mark."""

    def __init__(self):
        super().__init__()
        self.sigmas: list[float] = []
        self.setMinimumHeight(38)

    def set_sigmas(self, sigmas) -> None:
        self.sigmas = list(sigmas)
        self.update()

    def sizeHint(self) -> QSize:  # noqa: N802
        return QSize(400, 38)

    def paintEvent(self, _event) -> None:  # noqa: N802
        p = PALETTE
        painter = QPainter(self)
        painter.setRenderHint(QPainter.RenderHint.Antialiasing)
        painter.setFont(ui_font(7.5))
        w, h = self.width(), self.height()
        if not self.sigmas:
            painter.setPen(QColor(p.ink_faint))
            painter.drawText(QRectF(0, 0, w, h), Qt.AlignmentFlag.AlignVCenter, "no sweep yet")
            return
        never_w = 92
        bar_w = max(60, w - never_w - 170)
        left = 150
        painter.setPen(QColor(p.ink_soft))
        painter.drawText(QRectF(0, 0, left - 8, 16), Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter,
                         "critical σ: breaks at")
        colours = level_colours(len(self.sigmas))
        step = bar_w / len(colours)
        for i, colour in enumerate(colours):
            painter.fillRect(QRectF(left + i * step, 2, step + 0.5, 12), colour)
        ticks = sorted({0, len(colours) - 1, *range(0, len(colours), max(1, len(colours) // 6))})
        painter.setPen(QColor(p.ink_soft))
        for i in ticks:
            x = left + (i + 0.5) * step
            painter.drawLine(int(x), 15, int(x), 18)
            painter.drawText(QRectF(x - 30, 19, 60, 14), Qt.AlignmentFlag.AlignHCenter, fmt_tick(self.sigmas[i]))
        x0 = left + bar_w + 16
        painter.fillRect(QRectF(x0, 2, 22, 12), QColor(p.never_broke))
        painter.setPen(QColor(p.line))
        painter.drawRect(QRectF(x0, 2, 22, 12))
        painter.setPen(QColor(p.ink_soft))
        painter.drawText(QRectF(x0 + 28, 0, 120, 16), Qt.AlignmentFlag.AlignVCenter, "never broke")
        painter.drawText(QRectF(left, 19, 200, 14), Qt.AlignmentFlag.AlignLeft, "")
        painter.end()


class TokensPanel(QWidget):
    token_shown = Signal(int)
    table_ready = Signal()

    def __init__(self, workbench: Workbench):
        super().__init__()
        self.setObjectName("page")
        self.workbench = workbench
        self.result: SweepResult | None = None
        self.levels: np.ndarray | None = None
        self.selected: int | None = None
        self._task: Task | None = None
        self._build()
        workbench.current_changed.connect(self._refresh)
        workbench.entry_changed.connect(self._entry_updated)

    def _build(self) -> None:
        outer = page_layout(self, 8)
        head = QHBoxLayout()
        title = QLabel("Text coloured by each token's critical σ")
        title.setObjectName("title")
        head.addWidget(title)
        head.addStretch(1)
        self.summary = QLabel("")
        self.summary.setObjectName("caption")
        head.addWidget(self.summary)
        outer.addLayout(head)

        split = QSplitter(Qt.Orientation.Horizontal)
        split.setChildrenCollapsible(False)
        left = QWidget()
        lv = QVBoxLayout(left)
        lv.setContentsMargins(0, 0, 0, 0)
        lv.setSpacing(6)
        self.text = TokenText("Run a sweep in the Sweep view; its per-token results appear here.")
        self.text.token_clicked.connect(self.show_token)
        self.text.tooltip_for = self._tooltip
        self.scale = ColourScale()
        lv.addWidget(self.scale)
        lv.addWidget(self.text, 1)
        hint = QLabel("Click a token for its own accuracy curve. The critical σ is the smallest grid σ at which a token "
                      "is wrong in at least half the repeats.")
        hint.setObjectName("faint")
        hint.setWordWrap(True)
        lv.addWidget(hint)
        split.addWidget(left)

        right = QWidget()
        rv = QVBoxLayout(right)
        rv.setContentsMargins(0, 0, 0, 0)
        rv.setSpacing(8)
        token_card, cv = card(margins=(10, 8), spacing=2)
        self.token_title = QLabel("No token selected")
        self.token_title.setObjectName("title")
        self.token_title.setTextFormat(Qt.TextFormat.RichText)
        self.token_detail = QLabel("")
        self.token_detail.setObjectName("caption")
        self.token_detail.setWordWrap(True)
        self.token_detail.setTextFormat(Qt.TextFormat.RichText)
        cv.addWidget(self.token_title)
        cv.addWidget(self.token_detail)
        self.token_plot = plot_widget("", "σ", "accuracy of this token")
        self.token_plot.setMinimumHeight(120)
        self.token_plot.setStyleSheet("border: none")
        cv.addWidget(self.token_plot, 1)
        token_card.setMaximumHeight(330)
        rv.addWidget(token_card, 0)

        label = QLabel("MOST FRAGILE TOKEN TYPES")
        label.setObjectName("section")
        rv.addWidget(label)
        self.table = QTableWidget(0, 6)
        self.table.setHorizontalHeaderLabels(["token", "count", "broke", "median σ", "mean σ", "most common\nwrong decode"])
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSortingEnabled(True)
        self.table.setShowGrid(False)
        self.table.setAlternatingRowColors(False)
        self.table.verticalHeader().setDefaultSectionSize(22)
        header = self.table.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.Interactive)
        header.setStretchLastSection(True)
        header.setTextElideMode(Qt.TextElideMode.ElideNone)  # Qt measures a two-line header as one line when eliding
        header.setToolTip("median σ counts tokens that never broke as infinite; mean σ averages those that broke")
        self.table.itemSelectionChanged.connect(self._row_picked)
        self.table.setMinimumHeight(200)
        rv.addWidget(self.table, 1)

        self.bucket_plot = plot_widget("Accuracy by how often the token type occurs in the text (× seen, tokens)", "σ", "accuracy")
        self.bucket_plot.setFixedHeight(210)
        rv.addWidget(self.bucket_plot, 0)
        split.addWidget(right)
        add_export_menu(self.token_plot, self.caption, "token-accuracy")
        add_export_menu(self.bucket_plot, self.caption, "accuracy-by-frequency")
        split.setStretchFactor(0, 3)
        split.setStretchFactor(1, 2)
        split.setSizes([640, 560])
        outer.addWidget(split, 1)

    # ---- data ----------------------------------------------------------------------------

    def _entry_updated(self, path: str) -> None:
        if path == self.workbench.current:
            entry = self.workbench.entry()
            if entry is None or entry.sweep is not self.result:
                self._refresh()

    def _refresh(self, *_args) -> None:
        entry = self.workbench.entry()
        result = entry.sweep if entry is not None else None
        if result is self.result and result is not None:
            return
        self.result = result
        self.selected = None
        self.table.setRowCount(0)
        self.bucket_plot.getPlotItem().clear()
        self.token_plot.getPlotItem().clear()
        self.token_title.setText("No token selected")
        self.token_detail.setText("")
        if result is None:
            self.levels = None
            self.text.set_content("", np.zeros((0, 2), dtype=np.int64))
            self.scale.set_sigmas([])
            self.summary.setText("")
            return
        chunks = result.chunks
        self.levels = critical_sigma_levels(result.critical_sigma, result.sigmas)
        self.text.set_content(chunks.text, chunks.spans)
        colours = level_colours(len(result.sigmas))
        formats = {i: char_format(c, readable_on(c)) for i, c in enumerate(colours)}
        formats[-1] = char_format(PALETTE.never_broke, PALETTE.ink_soft)
        self.text.paint_levels(self.levels, formats)
        self.scale.set_sigmas(result.sigmas)
        broke = broken_count(result)
        self.summary.setText(
            f"{result.codec_name} · {result.settings.noise} noise · {broke:,} of {chunks.num_tokens:,} tokens broke on the grid "
            f"(up to σ {fmt_sigma(result.sigmas[-1])})"
        )
        self._plot_buckets(result)
        if self._task is not None:
            self._task.cancel()
        task = Task("ranking fragile token types", _fragile, result, entry.codec.tokenizer)
        task.finished.connect(lambda types, r=result: self._fill_table(r, types))
        task.failed.connect(self.workbench.error)
        self._task = task
        self.workbench.runner.start(task)
        first = most_fragile_occurrence(result)
        if first is not None:
            self.show_token(first)

    def _plot_buckets(self, result: SweepResult) -> None:
        plot = self.bucket_plot.getPlotItem()
        plot.clear()
        key = legend(plot, offset=(10, -10))
        key.setColumnCount(2)
        labels, counts, acc = bucket_accuracy_table(result)
        sigmas = np.asarray(result.sigmas)
        keep = sigmas > 0
        plot.setLogMode(x=bool(keep.any()))
        if keep.any():
            log_ticks(plot.getAxis("bottom"), float(sigmas[keep].min()), float(sigmas[keep].max()))
        for label, count, row, colour in zip(labels, counts, acc, series_colours(len(labels))):
            if count == 0:
                continue
            plot.addItem(pg.PlotDataItem(sigmas[keep], row[keep], pen=pen(colour, 1.6),
                                         name=f"{label}× ({count:,})"))

    def _fill_table(self, result: SweepResult, types) -> None:
        if result is not self.result:
            return
        self.table.setSortingEnabled(False)
        shown = [t for t in types if t.broken > 0][:300]
        self.table.setRowCount(len(shown))
        for row, t in enumerate(shown):
            token = QTableWidgetItem(show_piece(t.text))
            token.setFont(self.text.font())
            token.setData(Qt.ItemDataRole.UserRole, t.token_id)
            wrong = f"{show_piece(t.common_wrong_text)}  ({t.common_wrong_count}×)" if t.common_wrong_id is not None else "—"
            cells = [
                token,
                NumberItem(t.count, f"{t.count:,}"),
                NumberItem(t.broken, f"{t.broken:,}"),
                NumberItem(t.median_critical_sigma, fmt_sigma(t.median_critical_sigma) if np.isfinite(t.median_critical_sigma) else "never"),
                NumberItem(t.mean_critical_sigma, fmt_sigma(t.mean_critical_sigma)),
                QTableWidgetItem(wrong),
            ]
            cells[5].setFont(self.text.font())
            for col, cell in enumerate(cells):
                self.table.setItem(row, col, cell)
        self.table.setSortingEnabled(True)
        self.table.sortItems(3, Qt.SortOrder.AscendingOrder)
        self.table.resizeColumnsToContents()
        self.table_ready.emit()

    # ---- a token -------------------------------------------------------------------------

    def show_token(self, index: int) -> None:
        entry = self.workbench.entry()
        result = self.result
        if result is None or entry is None or entry.codec is None or not 0 <= index < result.chunks.num_tokens:
            return
        self.selected = index
        story = token_story(result, entry.codec.tokenizer, index)
        p = PALETTE
        k = result.chunks.chunk_size
        crit = "never broke on the grid" if np.isnan(story.critical_sigma) else f"critical σ {fmt_sigma(story.critical_sigma)}"
        self.token_title.setText(
            f"<span style='font-family:monospace'>{html.escape(show_piece(story.text))}</span>"
            f" <span style='color:{p.ink_soft}; font-weight:400'>· token {index:,} · chunk {index // k:,}, "
            f"position {index % k} · {crit}</span>"
        )
        if story.decoded_as:
            parts = [f"<b style='color:{p.accent_ink}; font-family:monospace'>{html.escape(show_piece(text))}</b> "
                     f"from σ {fmt_sigma(first)} ({n} of {len(result.sigmas)} σ)" for first, text, n in story.decoded_as[:6]]
            self.token_detail.setText("repeat 0 decoded it as " + " · ".join(parts))
        else:
            self.token_detail.setText("repeat 0 decoded it right at every σ of the grid")
        plot = self.token_plot.getPlotItem()
        plot.clear()
        sigmas = np.asarray(result.sigmas)
        keep = sigmas > 0
        plot.setLogMode(x=bool(keep.any()))
        if keep.any():
            log_ticks(plot.getAxis("bottom"), float(sigmas[keep].min()), float(sigmas[keep].max()))
        overall = np.array([c.token_accuracy for c in result.curves])
        plot.addItem(pg.PlotDataItem(sigmas[keep], overall[keep], pen=pen(p.ink_faint, 1.2, Qt.PenStyle.DashLine)))
        plot.addItem(pg.PlotDataItem(sigmas[keep], story.accuracy[keep], pen=pen(p.accent, 2), symbol="o", symbolSize=5,
                                     symbolBrush=p.accent, symbolPen=None))
        if not np.isnan(story.critical_sigma) and story.critical_sigma > 0:
            plot.addItem(pg.InfiniteLine(pos=np.log10(story.critical_sigma), angle=90, pen=pen(p.accent, 1, Qt.PenStyle.DotLine)))
        plot.setYRange(-0.02, 1.02, padding=0)
        plot.setTitle(f"<span style='color:{p.ink_soft}; font-size:8pt'>this token (accent) against the whole text (dashed), "
                      f"over {result.settings.repeats} repeats</span>", justify="left")
        self.token_shown.emit(index)

    def _row_picked(self) -> None:
        rows = self.table.selectionModel().selectedRows()
        if not rows or self.result is None:
            return
        tid = self.table.item(rows[0].row(), 0).data(Qt.ItemDataRole.UserRole)
        index = most_fragile_occurrence(self.result, tid)
        if index is None:
            return
        self.text.scroll_to_token(index, top=False)
        self.show_token(index)

    def _tooltip(self, token: int) -> str:
        if self.result is None or token >= self.result.chunks.num_tokens:
            return ""
        crit = self.result.critical_sigma[token]
        a, b = self.result.chunks.spans[token]
        piece = html.escape(show_piece(self.result.chunks.text[a:b]))
        return (f"<b style='font-family:monospace'>{piece}</b><br>"
                + ("never broke on the grid" if np.isnan(crit) else f"critical σ {fmt_sigma(float(crit))}")
                + "<br><span style='color:#777'>click for its accuracy curve</span>")

    def caption(self) -> str:
        """Provenance of what is shown, for a saved plot."""
        if self.result is None:
            return ""
        text = provenance_caption([self.result])
        if self.selected is not None:
            text += f"; token {self.selected}"
        return text
