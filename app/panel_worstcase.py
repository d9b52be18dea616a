"""Worst case: per chunk the smallest perturbation found that changes it, beside the random-noise
radius at which it breaks; the text coloured by that radius; the most fragile chunks and what
they flip to. Every number comes from core.analyses.worstcase, computed in a background task."""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QAbstractItemView, QComboBox, QGridLayout, QHBoxLayout, QHeaderView, QLabel, QSplitter,
    QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget,
)

from app.controls import card, page_layout, run_controls
from app.export import add_export_menu
from app.state import Workbench
from app.style import PALETTE, faded, legend, level_colours, pen, plot_widget, readable_on, show_piece
from app.tokentext import TokenText, char_format
from app.workers import LatestTask, Task
from core.analyses.worstcase import (
    WorstCaseResult, WorstCaseSettings, fragile_chunks, radii, radius_histogram, radius_levels, worst_case,
)

LEVELS = 10
FRAGILE_ROWS = 60


def _worst_case(task: Task, codec, chunks, encoded, source: str) -> WorstCaseResult:
    return worst_case(codec, chunks, WorstCaseSettings(), progress=task.report, should_stop=task.should_stop,
                      encoded=encoded, text_source=source)


class _Number(QTableWidgetItem):
    def __init__(self, value: float, digits: int = 4):
        super().__init__("—" if not np.isfinite(value) else f"{value:.{digits}g}")
        self.value = float(value) if np.isfinite(value) else float("inf")
        self.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)

    def __lt__(self, other) -> bool:
        return self.value < getattr(other, "value", float("inf"))


class WorstCasePanel(QWidget):
    shown = Signal()  # a result was drawn

    def __init__(self, workbench: Workbench):
        super().__init__()
        self.setObjectName("page")
        self.workbench = workbench
        self.slot = LatestTask(workbench.runner, self)
        self.results: dict[tuple[str, str], WorstCaseResult] = {}
        self.result: WorstCaseResult | None = None
        self.relative = True
        self.generator_source = lambda: None  # the window hands over its finished predictions analysis, if any
        self._build()
        workbench.current_changed.connect(self.refresh)
        workbench.entry_changed.connect(lambda path: self.refresh() if path == workbench.current else None)
        workbench.text_changed.connect(self._text_changed)

    # ---- layout --------------------------------------------------------------------------

    def _build(self) -> None:
        outer = page_layout(self, 8)
        head = QHBoxLayout()
        title = QLabel("How far is the nearest failure?")
        title.setObjectName("title")
        head.addWidget(title)
        head.addSpacing(12)
        units = QLabel("units")
        units.setObjectName("caption")
        head.addWidget(units)
        self.units = QComboBox()
        self.units.addItems(["relative (‖δ / r‖, data-scale)", "absolute (‖δ‖, latent units)"])
        self.units.currentIndexChanged.connect(self._units_picked)
        head.addWidget(self.units)
        head.addStretch(1)
        self.summary = QLabel("")
        self.summary.setObjectName("caption")
        head.addWidget(self.summary)
        self.run_button, self.cancel_button, self.progress = run_controls("Find worst cases", self.run, self.cancel)
        self.cancel_button.setEnabled(False)
        head.addWidget(self.progress)
        head.addWidget(self.run_button)
        head.addWidget(self.cancel_button)
        outer.addLayout(head)

        self.note_text = ("The search follows gradients through the decoder; the random radius is the noise norm at which "
                           "a data-scale sweep with the same seed first breaks the chunk.")
        self.note = QLabel(self.note_text)
        self.note.setObjectName("faint")
        self.note.setWordWrap(True)
        outer.addWidget(self.note)

        plots = QGridLayout()
        plots.setSpacing(10)
        self.hist = plot_widget("Radius of the nearest failure, per chunk", "radius", "chunks")
        self.scatter = plot_widget("Per chunk: worst case against random noise", "random radius", "worst-case radius")
        self.hist.getPlotItem().setLogMode(x=True)  # data go in as they are; the plot takes the logarithm
        self.scatter.getPlotItem().setLogMode(x=True, y=True)
        self.hist_legend = legend(self.hist.getPlotItem(), offset=(60, 8))  # top left: the bars sit right of centre
        add_export_menu(self.hist, self.caption, "worst-case-histogram")
        add_export_menu(self.scatter, self.caption, "worst-case-scatter")
        plots.addWidget(self.hist, 0, 0)
        plots.addWidget(self.scatter, 0, 1)
        plots.setColumnStretch(0, 1)
        plots.setColumnStretch(1, 1)
        holder = QWidget()
        holder.setLayout(plots)
        holder.setMinimumHeight(260)

        bottom = QSplitter(Qt.Orientation.Horizontal)
        bottom.setChildrenCollapsible(False)
        left = QWidget()
        lv = QVBoxLayout(left)
        lv.setContentsMargins(0, 0, 0, 0)
        lv.setSpacing(4)
        self.scale = QLabel("")
        self.scale.setObjectName("caption")
        self.scale.setTextFormat(Qt.TextFormat.RichText)
        lv.addWidget(self.scale)
        self.text = TokenText("Press “Find worst cases”: the text is then coloured by each chunk's worst-case radius.")
        self.text.tooltip_for = self._tooltip
        lv.addWidget(self.text, 1)
        bottom.addWidget(left)

        right, rv = card(margins=(10, 8), spacing=4)
        label = QLabel("MOST FRAGILE CHUNKS")
        label.setObjectName("section")
        rv.addWidget(label)
        self.table = QTableWidget(0, 5)
        self.table.setHorizontalHeaderLabels(["chunk", "text", "radius", "random", "flips"])
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setShowGrid(False)
        self.table.setSortingEnabled(True)
        self.table.verticalHeader().setDefaultSectionSize(22)
        header = self.table.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        header.setSectionResizeMode(4, QHeaderView.ResizeMode.Stretch)
        header.setStretchLastSection(False)
        self.table.itemSelectionChanged.connect(self._row_picked)
        rv.addWidget(self.table, 1)
        bottom.addWidget(right)
        bottom.setStretchFactor(0, 3)
        bottom.setStretchFactor(1, 2)
        bottom.setSizes([640, 520])

        split = QSplitter(Qt.Orientation.Vertical)
        split.setChildrenCollapsible(False)
        split.addWidget(holder)
        split.addWidget(bottom)
        split.setSizes([330, 420])
        outer.addWidget(split, 1)

    # ---- running -------------------------------------------------------------------------

    def _key(self) -> tuple[str, str] | None:
        entry = self.workbench.entry()
        return None if entry is None else (entry.path, self.workbench.text_sha)

    def run(self) -> bool:
        entry = self.workbench.entry()
        if entry is None or not entry.ready:
            self.workbench.error.emit("the checkpoint is still loading; find its worst cases when it is ready.")
            return False
        if not entry.codec.supports_gradients:
            self.workbench.error.emit(f"the worst-case search follows gradients through the decoder, and {entry.name} "
                                      f"(opened as {entry.codec.source.opened_as}) cannot give them.")
            return False
        key = self._key()
        task = Task(f"the worst-case search on {entry.name}", _worst_case, entry.codec, entry.chunks, entry.encoded,
                    self.workbench.text_source)
        self.progress.setValue(0)
        self.run_button.setEnabled(False)
        self.cancel_button.setEnabled(True)
        self.slot.start(task, progress=self._progress, finished=lambda r, k=key: self._finished(k, r),
                        failed=self._failed, cancelled=self._ended)
        return True

    def cancel(self) -> None:
        self.slot.cancel()

    def busy(self) -> bool:
        return self.slot.busy()

    def _progress(self, done: int, total: int) -> None:
        self.progress.setMaximum(max(total, 1))
        self.progress.setValue(done)

    def _ended(self) -> None:
        self.run_button.setEnabled(True)
        self.cancel_button.setEnabled(False)

    def _failed(self, message: str) -> None:
        self._ended()
        self.workbench.error.emit(message)

    def _finished(self, key, result: WorstCaseResult) -> None:
        self._ended()
        self.results[key] = result
        self.refresh()

    def _text_changed(self) -> None:
        self.slot.drop()
        self._ended()
        self.refresh()

    def _units_picked(self, index: int) -> None:
        self.relative = index == 0
        self.result = None  # redraw in the other unit
        self.refresh()

    # ---- drawing -------------------------------------------------------------------------

    def caption(self) -> str:
        r = self.result
        if r is None:
            return ""
        codec, text = r.provenance["codec"], r.provenance["text"]
        return (f"{codec['name']} ({codec.get('sha256', '')[:10]}); text {text['sha256'][:10]} ({text['tokens']:,} tokens); "
                f"worst case, seed {r.settings.seed}, {r.settings.repeats} repeats; chunkscope {r.provenance['version']}")

    def refresh(self, *_args) -> None:
        key = self._key()
        result = self.results.get(key) if key is not None else None
        if result is self.result and result is not None:
            return
        if self.slot.running() and key is not None:
            pass  # the running task's result lands under its own key; another entry shows its own
        self.result = result
        for plot in (self.hist, self.scatter):
            plot.getPlotItem().clear()
        self.hist_legend.clear()
        self.table.setRowCount(0)
        if result is None:
            self.text.set_content("", np.zeros((0, 2), dtype=np.int64))
            self.scale.setText("")
            entry = self.workbench.entry()
            self.summary.setText("" if entry is None else f"{entry.name}: not searched yet")
            return
        self._draw(result)
        self.shown.emit()

    def predictions_changed(self, *_args) -> None:
        self.result = None  # redraw with (or without) the generator's share line
        self.refresh()

    def _generator_line(self, result: WorstCaseResult) -> str:
        """The share of chunks whose worst-case radius is below the generator's error norm (numbers from core)."""
        from core.analyses.worstcase import against_predictions_result
        from core.errors import ChunkscopeError

        analysis = self.generator_source()
        if analysis is None or analysis.provenance["codec"]["sha256"] != result.provenance["codec"].get("sha256"):
            return ""
        try:
            return " " + against_predictions_result(result, analysis).line()
        except ChunkscopeError:
            return " The loaded generator predictions are for another text, so they are not held against these radii."

    def _unit(self) -> str:
        return "relative (‖δ / r‖)" if self.relative else "absolute (‖δ‖)"

    def _draw(self, result: WorstCaseResult) -> None:
        p = PALETTE
        s = result.summary()
        rate = "—" if s["below_random_rate"] is None else f"{100 * s['below_random_rate']:.1f} %"
        median = s["relative_radius_median" if self.relative else "radius_median"]
        self.summary.setText(
            f"{result.provenance['codec']['name']} · {s['verified']:,} of {s['chunks']:,} chunks verified"
            + (f" ({s['failed']:,} failed)" if s["failed"] else "")
            + f" · median worst case {'—' if median is None else format(median, '.3g')} · below random for {rate}"
        )
        self.note.setText(self.note_text + self._generator_line(result))
        edges, worst, random = radius_histogram(result, self.relative, bins=40)
        hist = self.hist.getPlotItem()
        hist.setLabel("bottom", f"radius, {self._unit()}")
        hist.addItem(pg.PlotDataItem(edges, random, stepMode="center", fillLevel=0, brush=faded(p.ink_soft, 50),
                                     pen=pen(p.ink_soft, 1.2), name="random noise (first break on the grid)"))
        hist.addItem(pg.PlotDataItem(edges, worst, stepMode="center", fillLevel=0, brush=faded(p.accent, 70),
                                     pen=pen(p.accent, 1.4), name="worst case (verified)"))
        hist.setYRange(0, max(int(worst.max(initial=0)), int(random.max(initial=0)), 1) * 1.3, padding=0)

        w, r = radii(result, self.relative)
        both = np.isfinite(w) & np.isfinite(r) & (w > 0) & (r > 0)
        sc = self.scatter.getPlotItem()
        sc.setLabel("bottom", f"random radius, {self._unit()}")
        sc.setLabel("left", "worst-case radius, same units")
        if both.any():
            lo = float(min(w[both].min(), r[both].min())) / 1.3
            hi = float(max(w[both].max(), r[both].max())) * 1.3
            sc.addItem(pg.PlotDataItem([lo, hi], [lo, hi], pen=pen(p.ink_soft, 1, Qt.PenStyle.DashLine)))
            label = pg.TextItem("worst case = random", color=p.ink_soft, anchor=(1, 1))
            label.setPos(np.log10(hi) - 0.02, np.log10(hi) - 0.02)
            sc.addItem(label)
            sc.addItem(pg.PlotDataItem(r[both], w[both], pen=None, symbol="o", symbolSize=4, symbolPen=None,
                                       symbolBrush=faded(p.accent, 110)))
            sc.setXRange(np.log10(lo), np.log10(hi), padding=0)
            sc.setYRange(np.log10(lo), np.log10(hi), padding=0)

        chunks = result.chunks
        levels, level_edges = radius_levels(result, LEVELS, self.relative)
        colours = level_colours(LEVELS)
        formats = {i: char_format(c, readable_on(c)) for i, c in enumerate(colours)}
        formats[-1] = char_format(p.never_broke, p.ink_soft)
        self.text.set_content(chunks.text, chunks.spans)
        self.text.paint_levels(levels, formats)
        swatches = " ".join(f"<span style='background:{c.name()};color:{readable_on(c)}'>&nbsp;{level_edges[i]:.2g}&nbsp;</span>"
                            for i, c in enumerate(colours))
        self.scale.setText(f"chunks coloured by worst-case radius, {self._unit()}, in tenths of the chunks, from: {swatches}"
                           + (f" <span style='background:{p.never_broke}'>&nbsp;search failed&nbsp;</span>" if result.failed else ""))

        rows = fragile_chunks(result, FRAGILE_ROWS)
        self.table.setSortingEnabled(False)
        self.table.setRowCount(len(rows))
        for i, row in enumerate(rows):
            radius = row.relative_radius if self.relative else row.radius
            random = result.random_relative_radius[row.chunk] if self.relative else row.random_radius
            self.table.setItem(i, 0, _Number(row.chunk, 6))
            self.table.setItem(i, 1, QTableWidgetItem(show_piece(row.text)))
            self.table.setItem(i, 2, _Number(radius, 3))
            self.table.setItem(i, 3, _Number(random, 3))
            flip = QTableWidgetItem(f"{show_piece(row.from_text)} → {show_piece(row.to_text)}  (position {row.position})")
            self.table.setItem(i, 4, flip)
        self.table.setSortingEnabled(True)
        self.table.sortItems(2, Qt.SortOrder.AscendingOrder)

    def _tooltip(self, token: int) -> str:
        r = self.result
        if r is None:
            return ""
        chunk = token // r.chunks.chunk_size
        if not r.verified[chunk]:
            return f"chunk {chunk}: the search found no verified breaking perturbation"
        w, rnd = radii(r, self.relative)
        return (f"chunk {chunk}: worst-case radius {w[chunk]:.3g}, random {rnd[chunk]:.3g} ({self._unit()}); "
                f"position {r.position[chunk]} flips {show_piece(r.display(r.from_id[chunk]))} → "
                f"{show_piece(r.display(r.to_id[chunk]))}")

    def _row_picked(self) -> None:
        items = self.table.selectedItems()
        if not items or self.result is None:
            return
        chunk = int(self.table.item(items[0].row(), 0).value)
        self.text.scroll_to_token(chunk * self.result.chunks.chunk_size)
