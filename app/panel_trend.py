"""Tolerance through a training run: every checkpoint of a folder swept in a worker, each
point drawn as soon as it is measured; a checkpoint that cannot be read is listed with its
one-sentence problem and the rest are still measured (core.analyses.trend)."""

from __future__ import annotations

from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (
    QAbstractItemView, QFileDialog, QHBoxLayout, QHeaderView, QPushButton, QSplitter, QTableWidget, QTableWidgetItem,
    QWidget,
)

import core
from app.controls import GridControls, caption, card, page_layout, run_controls
from app.export import add_export_menu
from app.style import LEVEL_PEN_STYLES, LEVEL_SYMBOLS, PALETTE, fmt_percent, legend, pen, plot_widget
from app.workers import LatestTask, Runner, Task
from app.adapters import changed_since
from core.errors import ChunkscopeError
from core.engine.noise import sigma_unit
from core.engine.sweep import DEFAULT_NOISE, DEFAULT_REPEATS, DEFAULT_SEED, SweepSettings
from core.engine.text import demo_text
from core.engine.tolerance import (
    ABSOLUTE, BELOW_AT_ZERO, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, UNRESOLVABLE, level_name, tolerance_text,
)
from core.analyses.trend import TrendPoint, checkpoints_in, sort_points, trend
from core.engine.cluster import Where

DEFAULTS = {"start": 0.01, "stop": 2.0, "points": 12, "spacing": "log", "zero": True, "repeats": DEFAULT_REPEATS,
            "noise": DEFAULT_NOISE, "seed": DEFAULT_SEED}
# the tolerance columns and series: accuracy ≥ each level, then loss ≤ each level
KIND_LEVELS = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]
COLUMNS = ("checkpoint", "step", "step from", "accuracy at σ = 0", *[level_name(lv, k) for k, lv in KIND_LEVELS],
           "latent RMS", "KL (nats)", "active dims", "problem")
RUN_FOLDER_NAME = "tolerant-run"  # the shipped training run under the sample models' folder


def default_run_folder() -> str:
    """The shipped sample run's folder, or "" when it is not there."""
    from app.state import samples_folder

    folder = samples_folder() / RUN_FOLDER_NAME
    return str(folder) if folder.is_dir() else ""


class _Cell(QTableWidgetItem):
    """A table cell that sorts by a number (missing values last)."""

    def __init__(self, text: str, value: float | None = None, right: bool = True):
        super().__init__(text)
        self.value = float("inf") if value is None or not np.isfinite(value) else float(value)
        if right:
            self.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)

    def __lt__(self, other: QTableWidgetItem) -> bool:
        if isinstance(other, _Cell) and (self.value != float("inf") or other.value != float("inf")):
            return self.value < other.value
        return self.text() < other.text()


def _trend(task: Task, folder: str, text: str, settings: SweepSettings, source: str, adapter: str = "",
           adapter_sha: str = "", where: Where = Where()) -> list[TrendPoint]:
    if adapter and changed_since(adapter, adapter_sha):
        raise ChunkscopeError(f"The adapter {adapter} changed after you allowed it to run; choose it again to be asked "
                              "about the new file.")
    points = []
    for point in trend(folder, text, settings, text_source=source, should_stop=task.should_stop, progress=task.report,
                       adapter=adapter or None, where=where):
        points.append(point)
        task.partial.emit(point)
    return points


class TrendPanel(QWidget):
    """Follow tolerance through a training run.

    The window feeds the evaluation text with `set_text`; `run_folder(path)` (or the Choose
    folder button) measures every checkpoint in it; `set_points` shows saved points."""

    where_of = Where  # where the sweeps run: app/run_on.py points this at the window's setting

    error = Signal(str)
    point_added = Signal(object)  # a TrendPoint, as soon as it is measured
    finished = Signal(list)  # every TrendPoint of the run
    running_changed = Signal(bool)

    def __init__(self, runner: Runner | None = None, parent: QWidget | None = None):
        super().__init__(parent)
        self.setObjectName("page")
        self.runner = runner or Runner(self)
        self.text = ""
        self.text_source = ""
        self.folder = default_run_folder()
        self._auto_run = bool(self.folder)  # the shipped run is measured the first time the view is shown
        self.adapter = ""  # the adapter that opens the run's checkpoints ("" for built-in and ONNX)
        # asks the user before an adapter's code runs; returns its sha256, or "" (the window sets it)
        self.adapter_allowed: Callable[[str], str] | None = None
        self.points: list[TrendPoint] = []
        self.settings_used: SweepSettings | None = None
        self.runs = LatestTask(self.runner, self)
        self._build()
        self.restore(DEFAULTS)
        if self.folder:
            self.folder_label.setText(f"{self.folder}  ·  the shipped sample run (choose another folder to follow yours)")
            self.folder_label.setToolTip(self.folder)
        self._redraw()

    def showEvent(self, event) -> None:  # noqa: N802 (Qt)
        super().showEvent(event)
        if self._auto_run and not self.points and not self.runs.running():
            self._auto_run = False
            self.run_folder(self.folder)

    # ---- layout --------------------------------------------------------------------------

    def _build(self) -> None:
        outer = page_layout(self, 8)

        controls, cv = card(spacing=6)
        top = QHBoxLayout()
        top.setSpacing(8)
        self.choose_button = QPushButton("Choose folder…")
        self.choose_button.clicked.connect(self.choose_folder)
        top.addWidget(self.choose_button)
        self.folder_label = caption("a folder of .safetensors checkpoints from one training run; the step comes from "
                                     "each card, else from the file name")
        self.folder_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        top.addWidget(self.folder_label, 1)
        cv.addLayout(top)

        self.grid_controls = GridControls(DEFAULTS, zero_tip="accuracy at σ = 0 needs 0 on the grid")
        g = self.grid_controls  # self.points holds the measured checkpoints, so the points box is points_box
        self.start, self.stop, self.points_box, self.spacing, self.zero = g.start, g.stop, g.points, g.spacing, g.zero
        self.repeats, self.noise, self.seed = g.repeats, g.noise, g.seed
        row = g.layout()  # one row; the run controls follow the grid's
        row.addSpacing(10)
        self.run_button, self.cancel_button, self.progress = run_controls(
            "Measure run", lambda: self.run_folder(self.folder, self.adapter) if self.folder else self.choose_folder(),
            self.cancel)
        row.addWidget(self.run_button)
        row.addWidget(self.cancel_button)
        row.addWidget(self.progress, 1)
        cv.addWidget(g)
        outer.addWidget(controls)

        self.status = caption("")
        self.status.setWordWrap(True)
        outer.addWidget(self.status)

        plots = QWidget()
        pl = QHBoxLayout(plots)
        pl.setContentsMargins(0, 0, 0, 0)
        pl.setSpacing(10)
        self.tolerance_plot = plot_widget("Tolerance through training", "training step", "σ")
        self.accuracy_plot = plot_widget("Token accuracy at σ = 0", "training step", "accuracy")
        self.latent_plot = plot_widget("Latent through training", "training step", "value (log scale)")
        self.accuracy_plot.getPlotItem().setXLink(self.tolerance_plot.getPlotItem())
        self.latent_plot.getPlotItem().setXLink(self.tolerance_plot.getPlotItem())
        for plot, name in ((self.tolerance_plot, "trend-tolerance"), (self.accuracy_plot, "trend-accuracy"),
                           (self.latent_plot, "trend-latent")):
            plot.setObjectName("card")
            for axis in ("left", "bottom"):
                plot.getPlotItem().getAxis(axis).enableAutoSIPrefix(False)
            add_export_menu(plot, self.caption, name)
        pl.addWidget(self.tolerance_plot, 3)
        right = QSplitter(Qt.Orientation.Vertical)
        right.setChildrenCollapsible(False)
        right.addWidget(self.accuracy_plot)
        right.addWidget(self.latent_plot)
        pl.addWidget(right, 2)

        self.table = QTableWidget(0, len(COLUMNS))
        # two-line headers keep the six tolerance columns narrow: "accuracy ≥" / "99 %", "loss ≤" / "1 pt"
        self.table.setHorizontalHeaderLabels([c.replace("≥ ", "≥\n").replace("≤ ", "≤\n").replace(" at σ", "\nat σ")
                                              for c in COLUMNS])
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.verticalHeader().setVisible(False)
        self.table.verticalHeader().setDefaultSectionSize(22)
        header = self.table.horizontalHeader()
        header.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        header.setSectionResizeMode(len(COLUMNS) - 1, QHeaderView.ResizeMode.Stretch)
        self.table.setWordWrap(False)
        header.setSortIndicator(1, Qt.SortOrder.AscendingOrder)  # training step order until the user sorts
        self.table.setSortingEnabled(True)

        split = QSplitter(Qt.Orientation.Vertical)
        split.setChildrenCollapsible(False)
        split.addWidget(plots)
        split.addWidget(self.table)
        split.setStretchFactor(0, 3)
        split.setStretchFactor(1, 2)
        split.setSizes([520, 240])
        outer.addWidget(split, 1)

    # ---- settings ------------------------------------------------------------------------

    def settings_dict(self) -> dict:
        return self.grid_controls.settings_dict()

    def restore(self, values: dict) -> None:
        self.grid_controls.restore(values)

    def sweep_settings(self) -> SweepSettings:
        return self.grid_controls.sweep_settings().validated()

    def set_text(self, text: str, text_source: str = "") -> None:
        """The evaluation text every checkpoint is swept on (the demo text until this is called)."""
        self.text, self.text_source = text, text_source

    # ---- running -------------------------------------------------------------------------

    def choose_folder(self) -> None:
        folder = QFileDialog.getExistingDirectory(self, "Choose a folder of training checkpoints", self.folder)
        if folder:
            self.run_folder(folder)

    def is_running(self) -> bool:
        return self.runs.running()

    def run_folder(self, path: str | Path, adapter: str | None = None) -> bool:
        """Measure every checkpoint in `path` (through `adapter` when given, once the user allowed
        its code to run); a running measurement is superseded."""
        folder = str(path)
        adapter = adapter or ""
        try:
            settings = self.sweep_settings()
            checkpoints = checkpoints_in(folder, adapter or None)
        except ChunkscopeError as exc:
            self.error.emit(str(exc))
            return False
        adapter_sha = ""
        if adapter:
            adapter_sha = self.adapter_allowed(adapter) if self.adapter_allowed is not None else ""
            if not adapter_sha:
                return False
        if not self.text:
            try:
                self.text, self.text_source = demo_text(), "demo_text.txt"
            except ChunkscopeError as exc:
                self.error.emit(str(exc))
                return False
        self.folder, self.adapter = folder, adapter
        self.settings_used = settings
        self.points = []
        through = f"  ·  adapter {Path(adapter).name}" if adapter else ""
        self.folder_label.setText(f"{folder}  ·  {len(checkpoints)} checkpoints{through}")
        self.folder_label.setToolTip(folder + (f"\nopened by the adapter {adapter}" if adapter else ""))
        task = Task("the training-run trend", _trend, folder, self.text, settings, self.text_source, adapter,
                    adapter_sha if not adapter_sha.startswith("entry point") else "", self.where_of())
        self.runs.start(task, progress=self._progress, partial=self._point, finished=self._finished,
                        failed=self._failed, cancelled=self._cancelled)
        self._expected = len(checkpoints)
        self.progress.setValue(0)
        self._redraw()
        self.status.setText(f"measuring {len(checkpoints)} checkpoints on {len(settings.sigmas)} σ × {settings.repeats} "
                            f"repeats ({settings.noise} noise)…")
        self._sync_controls()
        self.running_changed.emit(True)
        return True

    def cancel(self) -> None:
        self.runs.cancel()

    def _progress(self, done: int, total: int) -> None:
        self.progress.setMaximum(max(total, 1))
        self.progress.setValue(min(done, max(total, 1)))

    def _point(self, point: TrendPoint) -> None:
        self.points.append(point)
        self._redraw()
        self.status.setText(f"measured {len(self.points)} of {self._expected} checkpoints… latest: {point.name}"
                            + (" (could not be used)" if point.error else ""))
        self.point_added.emit(point)

    def _over(self) -> None:
        self._sync_controls()
        self.running_changed.emit(False)

    def _finished(self, points: list[TrendPoint]) -> None:
        self._over()
        self.points = list(points)
        self.progress.setValue(self.progress.maximum())
        self._redraw()
        self.finished.emit(self.points)

    def _failed(self, message: str) -> None:
        self._over()
        self.progress.setValue(0)
        self._redraw()
        self.error.emit(message)

    def _cancelled(self) -> None:
        self._over()
        self.progress.setValue(0)
        self._redraw()
        self.status.setText(f"cancelled after {len(self.points)} checkpoints; the ones measured are shown.")

    def _sync_controls(self) -> None:
        self.cancel_button.setEnabled(self.runs.running())

    # ---- showing -------------------------------------------------------------------------

    def set_points(self, points: Sequence[TrendPoint], folder: str = "", settings: SweepSettings | None = None,
                   adapter: str = "") -> None:
        """Show saved points (a reopened workspace) without measuring anything."""
        if self.runs.drop():
            self._over()
        self.points = list(points)
        if folder:
            self.folder, self.adapter = folder, adapter  # measuring again asks before the adapter runs
        self.settings_used = settings
        if folder:
            self.folder_label.setText(folder)
        self._redraw()

    def _redraw(self) -> None:
        self._fill_table()
        self._draw_plots()
        points = self.points
        if self.runs.running():
            return
        if not points:
            self.status.setText("Choose a folder of checkpoints from one training run to follow accuracy and tolerance "
                                "against the training step.")
            return
        bad = [p for p in points if p.error]
        stepless = [p for p in points if not p.error and p.step is None]
        s = self.settings_used
        parts = [f"{len(points) - len(bad)} of {len(points)} checkpoints measured"]
        if s is not None:
            parts.append(f"{s.noise} noise · {len(s.sigmas)} σ × {s.repeats} repeats · seed {s.seed}")
        if bad:
            parts.append(f"{len(bad)} could not be used (see the problem column)")
        if stepless:
            parts.append(f"{len(stepless)} without a training step are in the table only")
        every = [t for pt in points for t in pt.tolerances + pt.loss_tolerances]
        if any(t.status == BELOW_AT_ZERO for t in every):
            parts.append("a tolerance that already fails at σ = 0 is not drawn")
        if any(t.status == UNRESOLVABLE for t in every):
            parts.append("“too few tokens”: the text is too short to resolve that level")
        self.status.setText(" · ".join(parts))

    def _fill_table(self) -> None:
        t = self.table
        t.setSortingEnabled(False)
        points = sort_points(list(self.points))
        t.setRowCount(len(points))
        for i, p in enumerate(points):
            tol = [p.tolerance(level, kind) for kind, level in KIND_LEVELS]
            cells = [
                _Cell(p.name, right=False),
                _Cell("—" if p.step is None else f"{p.step:,}", p.step),
                _Cell(p.step_source, right=False),
                _Cell("—" if p.accuracy_at_zero is None else fmt_percent(p.accuracy_at_zero, 3), p.accuracy_at_zero),
                *[_Cell(tolerance_text(x), None if x is None else x.sigma) for x in tol],
                _Cell("—" if p.latent_rms is None else f"{p.latent_rms:.4g}", p.latent_rms),
                _Cell("—" if p.kl is None else f"{p.kl:.4g}", p.kl),
                _Cell("—" if p.active_dims is None else str(p.active_dims), p.active_dims),
                _Cell(p.error or "", right=False),
            ]
            cells[0].setToolTip(p.path)
            if p.error:
                cells[-1].setToolTip(p.error)
                for cell in cells:
                    cell.setBackground(QColor(PALETTE.accent_soft))
                    cell.setForeground(QColor(PALETTE.accent_ink))
            for j, cell in enumerate(cells):
                t.setItem(i, j, cell)
        t.setSortingEnabled(True)

    def _draw_plots(self) -> None:
        p = PALETTE
        tol_item, acc_item = self.tolerance_plot.getPlotItem(), self.accuracy_plot.getPlotItem()
        lat_item = self.latent_plot.getPlotItem()
        for item in (tol_item, acc_item, lat_item):
            item.clear()
            if item.legend is not None:
                item.legend.clear()
        good = [pt for pt in sort_points(list(self.points)) if pt.error is None and pt.step is not None]
        if not good:
            return
        steps = [pt.step for pt in good]
        # a doubling schedule of checkpoints reads on a log step axis; a linear one on a linear axis
        log_x = min(steps) > 0 and max(steps) >= 8 * min(steps)
        for item in (tol_item, acc_item, lat_item):
            item.setLogMode(x=log_x, y=item is lat_item)
            item.setLabel("bottom", "training step (log scale)" if log_x else "training step", color=p.ink_soft,
                          **{"font-size": "8pt"})
            # on a log axis, ticks at the checkpoints' own steps (pyqtgraph's minor log ticks overprint)
            item.getAxis("bottom").setTicks([[(float(np.log10(x)), f"{x:,}") for x in sorted(set(steps))], []]
                                            if log_x else None)
        noise = self.settings_used.noise if self.settings_used is not None else ""
        tol_item.setLabel("left", sigma_unit(noise), color=p.ink_soft, **{"font-size": "8pt"})
        legend(tol_item, offset=(10, 10))
        any_lower_bound = False
        highest = 0.0
        for kind, level in KIND_LEVELS:
            index = (TOLERANCE_LEVELS if kind == ABSOLUTE else LOSS_LEVELS).index(level)
            style, symbol = LEVEL_PEN_STYLES[index], LEVEL_SYMBOLS[index]
            colour = p.accent if kind == ABSOLUTE else p.ink_soft  # accuracy levels in the accent, losses in ink
            rows = [(pt.step, t) for pt in good for t in [pt.tolerance(level, kind)] if t is not None and t.sigma is not None]
            if not rows:
                continue
            x = np.array([r[0] for r in rows], dtype=np.float64)
            y = np.array([r[1].sigma for r in rows], dtype=np.float64)
            above = np.array([r[1].status == "above_grid" for r in rows])
            any_lower_bound |= bool(above.any())
            highest = max(highest, float(y.max()))
            tol_item.addItem(pg.PlotDataItem(x, y, pen=pen(colour, 1.8, style), symbol=symbol, symbolSize=7,
                                             symbolBrush=colour, symbolPen=None, name=f"σ at {level_name(level, kind)}"))
            if above.any():  # a lower bound: the accuracy never dropped on the grid
                tol_item.addItem(pg.PlotDataItem(x[above], y[above], pen=None, symbol=symbol, symbolSize=9,
                                                 symbolBrush=p.surface, symbolPen=pen(colour, 1.5)))
        if any_lower_bound:
            tol_item.legend.addItem(pg.PlotDataItem(pen=None, symbol="o", symbolSize=9, symbolBrush=p.surface,
                                                    symbolPen=pen(p.accent, 1.5)), "never dropped on the grid (lower bound)")
        acc = [(pt.step, pt.accuracy_at_zero) for pt in good if pt.accuracy_at_zero is not None]
        if acc:
            acc_item.addItem(pg.PlotDataItem([a[0] for a in acc], [a[1] for a in acc], pen=pen(p.ink, 2), symbol="o",
                                             symbolSize=7, symbolBrush=p.ink, symbolPen=None))
        legend(lat_item, offset=(10, 10))
        for values, colour, symbol, label in (
                ([pt.latent_rms for pt in good], p.accent, "o", "latent RMS"),
                ([pt.kl for pt in good], p.ink, "s", "KL to N(0, I), nats per chunk"),
                ([None if pt.active_dims is None else float(pt.active_dims) for pt in good], p.ink_soft, "t",
                 "active dims")):
            rows = [(x, v) for x, v in zip(steps, values) if v is not None and v > 0]
            if rows:
                lat_item.addItem(pg.PlotDataItem([r[0] for r in rows], [r[1] for r in rows], pen=pen(colour, 1.6),
                                                 symbol=symbol, symbolSize=6, symbolBrush=colour, symbolPen=None,
                                                 name=label))
        if log_x:
            low, high = np.log10(min(steps)), np.log10(max(steps))
            pad = (high - low) * 0.05
        else:
            low, high = min(steps), max(steps)
            pad = (high - low) * 0.04 if high > low else 1.0
        tol_item.setXRange(low - pad, high + pad, padding=0)  # the other plots follow (x-linked)
        tol_item.setYRange(0, highest * 1.4 if highest > 0 else 1.0, padding=0)  # σ starts at 0; room for the legend
        acc_item.enableAutoRange(y=True)
        shown = [v for pt in good for v in (pt.latent_rms, pt.kl, pt.active_dims) if v is not None and v > 0]
        if shown:  # log axis: room above the highest series for the legend
            lat_item.setYRange(np.log10(min(shown)) - 0.3, np.log10(max(shown)) + 2.3, padding=0)

    # ---- for export and reports ----------------------------------------------------------

    def caption(self) -> str:
        """Provenance of what is shown, for a saved plot."""
        measured = [pt for pt in sort_points(list(self.points)) if pt.error is None]
        if not measured:
            return ""
        names = ", ".join(f"{pt.name} ({pt.sha256[:8]})" for pt in measured[:4])
        if len(measured) > 4:
            names += f", … {measured[-1].name} ({measured[-1].sha256[:8]})"
        folder = Path(self.folder).name if self.folder else "a training run"
        text = f"{len(measured)} checkpoints of {folder}: {names}"
        result = next((pt.result for pt in measured if pt.result is not None), None)
        if result is not None:
            s = result.settings
            text += (f"; text {result.chunks.text_sha256[:10]} ({result.chunks.num_tokens:,} tokens); {s.noise} noise; "
                     f"seed {s.seed}; {s.repeats} repeats")
        elif self.settings_used is not None:
            s = self.settings_used
            text += f"; {s.noise} noise; seed {s.seed}; {s.repeats} repeats"
        return text + f"; chunkscope {core.__version__}"

    def plots(self) -> list[pg.PlotWidget]:
        return [self.tolerance_plot, self.accuracy_plot, self.latent_plot]
