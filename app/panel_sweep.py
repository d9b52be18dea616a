"""Sweep view: accuracy against noise over a sigma grid, with its uncertainty and tolerances."""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QCheckBox, QFrame, QGridLayout, QHBoxLayout, QLabel, QVBoxLayout, QWidget,
)

from app.controls import GridControls, caption, card, page_layout, run_controls
from app.export import add_export_menu
from app.state import Workbench
from app.style import (
    LEVEL_PEN_STYLES, PALETTE, faded, fmt_percent, legend, log_ticks, pen, plot_widget, series_colours,
)
from core.engine.timeleft import TimeLeft, time_left_text
from core.errors import SettingsError
from core.engine.noise import NOISE_MODELS, sigma_unit
from core.outputs.report import provenance_caption
from core.engine.sweep import DEFAULT_NOISE, DEFAULT_REPEATS, DEFAULT_SEED, SweepResult, SweepSettings
from core.engine.tolerance import (
    ABSOLUTE, LOSS, LOSS_LEVELS, NO_ZERO, TOLERANCE_LEVELS, UNRESOLVABLE, Tolerance, level_name, level_percent, resolution_note, tolerance_text,
)
from core.analyses.views import error_rate_floor

DEFAULTS = {"start": 0.01, "stop": 2.0, "points": 24, "spacing": "log", "zero": True, "repeats": DEFAULT_REPEATS,
            "noise": DEFAULT_NOISE, "seed": DEFAULT_SEED}


def headline_text(tol: Tolerance) -> str:
    """A tolerance in the sweep's headline: "σ 0.204", "σ > 2", "fails at 0", "too few tokens"."""
    return tolerance_text(tol, digits=3, prefix="σ ")


def tolerance_tip(tol: Tolerance, accuracy_at_zero: float) -> str:
    if tol.kind == LOSS:
        return (f"the largest σ before token accuracy first falls more than {level_percent(tol.level, LOSS).replace('pt', 'points')} "
                f"below its σ = 0 value ({fmt_percent(accuracy_at_zero, 3)}), interpolated on the grid")
    return f"the largest σ before token accuracy first drops below {level_percent(tol.level)}, interpolated on the grid"


class SweepPanel(QWidget):
    sigma_picked = Signal(float, str, int)  # sigma, noise, seed: show it in the live view
    plotted = Signal()

    def __init__(self, workbench: Workbench):
        super().__init__()
        self.setObjectName("page")
        self.workbench = workbench
        self.result: SweepResult | None = None
        self.log_x = True
        self._x: np.ndarray = np.zeros(0)
        self._build()
        workbench.current_changed.connect(self._entry_switched)
        workbench.entry_changed.connect(self._entry_updated)
        workbench.sweep_progress.connect(self._progress)
        workbench.sweep_ended.connect(self._ended)

    # ---- layout --------------------------------------------------------------------------

    def _build(self) -> None:
        outer = page_layout(self, 10)

        controls, card_layout = card()
        self.grid_controls = GridControls(DEFAULTS, noise_label="model", order=("noise", "repeats", "seed"),
                                          zero_text="and σ = 0", two_rows=True)
        card_layout.addWidget(self.grid_controls)
        g = self.grid_controls
        self.start, self.stop, self.points, self.spacing, self.zero = g.start, g.stop, g.points, g.spacing, g.zero
        self.repeats, self.noise, self.seed = g.repeats, g.noise, g.seed
        grid = g.layout()  # the grid fills columns 0-9 of two rows; the view's own controls go beside them
        self.log_box = QCheckBox("log σ axis")
        self.log_box.setChecked(True)
        self.log_box.toggled.connect(self._log_toggled)
        grid.addWidget(self.log_box, 1, 8)
        grid.setColumnStretch(10, 1)
        self.run_button, self.cancel_button, self.progress = run_controls(
            "Run sweep", self.run, lambda: self.workbench.cancel_sweep(), progress_width=180)
        self.cancel_button.setEnabled(False)
        buttons = QHBoxLayout()
        buttons.addWidget(self.run_button)
        buttons.addWidget(self.cancel_button)
        grid.addLayout(buttons, 0, 11)
        grid.addWidget(self.progress, 1, 11)
        outer.addWidget(controls)
        self.restore(DEFAULTS)

        summary = QHBoxLayout()
        summary.setSpacing(14)
        self.status = QLabel("Run a sweep to see how accuracy falls with noise.")
        self.status.setObjectName("caption")
        # the headline: accuracy at σ = 0, then the σ up to which accuracy stays ≥ each level, then the σ up to
        # which it stays within each loss of its σ = 0 value
        self.zero_caption, self.zero_value = self._figure(summary, "accuracy at σ = 0")
        self.tolerance_labels: dict[float, tuple[QLabel, QLabel]] = {}  # accuracy ≥ level
        self.loss_labels: dict[float, tuple[QLabel, QLabel]] = {}  # loss ≤ level
        for kind, levels, labels in ((ABSOLUTE, TOLERANCE_LEVELS, self.tolerance_labels), (LOSS, LOSS_LEVELS, self.loss_labels)):
            rule = QFrame()
            rule.setFrameShape(QFrame.Shape.VLine)
            rule.setObjectName("rule")
            summary.addWidget(rule)
            for level in levels:
                labels[level] = self._figure(summary, f"σ at {level_name(level, kind)}")
        # what was swept, beside the headline (wrapped, so the headline keeps its room); the hover readout
        # gets a row of its own below
        self.status.setWordWrap(True)
        self.status.setMinimumWidth(260)
        self.status.setAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignTop)
        summary.addWidget(self.status, 1)
        outer.addLayout(summary)
        self.readout = QLabel("")
        self.readout.setObjectName("caption")
        self.readout.setTextFormat(Qt.TextFormat.RichText)
        self.readout.setAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        self.readout.setMinimumWidth(1)  # a long readout is cut at the right, never widens the window
        outer.addWidget(self.readout)

        grid = QGridLayout()
        grid.setSpacing(10)
        self.accuracy_plot = plot_widget("Token accuracy and chunk exact match", "σ", "rate")
        self.error_plot = plot_widget("Error rate 1 − accuracy (log)", "σ", "error rate")
        self.position_plot = plot_widget("Accuracy by position in the chunk", "σ", "accuracy")
        self.nll_plot = plot_widget("Negative log-likelihood of the true token", "σ", "nats")
        self.calibration_plot = plot_widget("Brier score and calibration error (ECE)", "σ", "")
        self.plots = [self.accuracy_plot, self.error_plot, self.position_plot, self.nll_plot, self.calibration_plot]
        for plot, name in zip(self.plots, ("sweep-accuracy", "sweep-error-rate", "sweep-position", "sweep-nll",
                                           "sweep-calibration")):
            plot.setObjectName("card")
            add_export_menu(plot, self.caption, name)
        grid.addWidget(self.accuracy_plot, 0, 0, 1, 2)
        grid.addWidget(self.error_plot, 0, 2)
        grid.addWidget(self.position_plot, 1, 0)
        grid.addWidget(self.nll_plot, 1, 1)
        grid.addWidget(self.calibration_plot, 1, 2)
        for i in range(3):
            grid.setColumnStretch(i, 1)
        grid.setRowStretch(0, 3)
        grid.setRowStretch(1, 2)
        outer.addLayout(grid, 1)

        self.error_plot.getPlotItem().setLogMode(y=True)
        self.crosshairs = []
        for plot in self.plots:
            item = plot.getPlotItem()
            line = pg.InfiniteLine(angle=90, movable=False, pen=pen(PALETTE.ink_faint, 1, Qt.PenStyle.DotLine))
            line.setVisible(False)
            item.addItem(line, ignoreBounds=True)
            self.crosshairs.append(line)
            plot.scene().sigMouseMoved.connect(lambda pos, p=plot: self._mouse_moved(p, pos))
            plot.scene().sigMouseClicked.connect(lambda ev, p=plot: self._clicked(p, ev))
        self.live_lines = []
        for plot in self.plots:
            line = pg.InfiniteLine(angle=90, movable=False, pen=pen(PALETTE.accent, 1, Qt.PenStyle.DashLine))
            line.setVisible(False)
            plot.getPlotItem().addItem(line, ignoreBounds=True)
            self.live_lines.append(line)
        self._clear_plots()

    @staticmethod
    def _figure(row: QHBoxLayout, title: str) -> tuple[QLabel, QLabel]:
        box = QVBoxLayout()
        box.setSpacing(0)
        cap = caption(title)
        value = QLabel("—")
        value.setObjectName("figure")
        box.addWidget(cap)
        box.addWidget(value)
        row.addLayout(box)
        return cap, value

    @staticmethod
    def _show_figure(value: QLabel, text: str, word: bool = False) -> None:
        name = "figureWord" if word else "figure"
        if value.objectName() != name:
            value.setObjectName(name)
            value.style().unpolish(value)
            value.style().polish(value)
        value.setText(text)

    # ---- settings ------------------------------------------------------------------------

    def settings_dict(self) -> dict:
        return self.grid_controls.settings_dict()

    def restore(self, values: dict) -> None:
        self.grid_controls.restore(values)

    def sweep_settings(self) -> SweepSettings:
        return self.grid_controls.sweep_settings()

    # ---- running -------------------------------------------------------------------------

    def run(self) -> bool:
        try:
            settings = self.sweep_settings()
        except SettingsError as exc:
            self.workbench.error.emit(str(exc))
            return False
        started = self.workbench.start_sweep(settings)
        if started:
            self.progress.setValue(0)
            self._sweeping = f"sweeping {len(settings.sigmas)} σ × {settings.repeats} repeats…"
            self._time_left = TimeLeft()
            self.status.setText(self._sweeping)
        self._sync_buttons()
        return started

    def _progress(self, path: str, done: int, total: int) -> None:
        if path == self.workbench.current:
            self.progress.setMaximum(max(total, 1))
            self.progress.setValue(done)
            timer = getattr(self, "_time_left", None)
            if timer is not None and done < total:
                left = time_left_text(timer.update(done, total))
                self.status.setText(self._sweeping + (f" {left}" if left else ""))

    def _ended(self, path: str, how: str) -> None:
        if path != self.workbench.current:
            return
        self._sync_buttons()
        if how == "cancelled":
            self.progress.setValue(0)
            self.status.setText("sweep cancelled; nothing was kept." + ("" if self.result is None else " Showing the previous sweep."))
        elif how == "done":
            self.progress.setValue(self.progress.maximum())
        else:
            self.progress.setValue(0)
            self.status.setText("the sweep stopped with an error.")

    def _sync_buttons(self) -> None:
        entry = self.workbench.entry()
        running = self.workbench.sweeping()
        self.run_button.setEnabled(entry is not None and entry.ready and not running)
        self.cancel_button.setEnabled(running)

    def _entry_switched(self, *_args) -> None:
        entry = self.workbench.entry()
        self.show_result(entry.sweep if entry is not None else None)
        self._sync_buttons()
        model = self.noise.model()
        variational = entry is not None and entry.codec is not None and entry.codec.variational
        for i, name in enumerate(NOISE_MODELS):
            item = model.item(i) if hasattr(model, "item") else None
            if item is not None and NOISE_MODELS[name].needs_variational:
                item.setEnabled(variational)
        if not variational and NOISE_MODELS[self.noise.currentText()].needs_variational:
            self.noise.setCurrentText(DEFAULT_NOISE)

    def _entry_updated(self, path: str) -> None:
        if path != self.workbench.current:
            return
        entry = self.workbench.entry()
        if entry is not None and entry.sweep is not self.result:
            self.show_result(entry.sweep)
        self._sync_buttons()

    # ---- plotting ------------------------------------------------------------------------

    def _clear_plots(self) -> None:
        for plot, cross, live in zip(self.plots, self.crosshairs, self.live_lines):
            item = plot.getPlotItem()
            for child in list(item.items):
                if child is not cross and child is not live:
                    item.removeItem(child)
            if item.legend is not None:
                item.legend.clear()
        for _, value in [(self.zero_caption, self.zero_value), *self.tolerance_labels.values(), *self.loss_labels.values()]:
            self._show_figure(value, "—")
            value.setToolTip("")

    def _log_toggled(self, on: bool) -> None:
        self.log_x = on
        self.show_result(self.result)

    def show_result(self, result: SweepResult | None) -> None:
        self.result = result
        self._clear_plots()
        if result is None:
            self.status.setText("Run a sweep to see how accuracy falls with noise." if self.workbench.entry() else "")
            self.readout.setText("")
            return
        p = PALETTE
        sigmas = np.asarray(result.sigmas, dtype=np.float64)
        keep = sigmas > 0 if self.log_x else np.ones(len(sigmas), dtype=bool)
        if not keep.any():
            keep = np.ones(len(sigmas), dtype=bool)
            self.log_x = False
        for plot in self.plots:
            plot.getPlotItem().setLogMode(x=self.log_x, y=plot is self.error_plot)
        x = sigmas[keep]
        self._x = x
        curves = [c for c, k in zip(result.curves, keep) if k]
        acc = np.array([c.token_accuracy for c in curves])
        low = np.array([c.accuracy_low for c in curves])
        high = np.array([c.accuracy_high for c in curves])
        exact = np.array([c.chunk_exact_rate for c in curves])

        a = self.accuracy_plot.getPlotItem()
        legend(a, offset=(10, -10))
        band_low = pg.PlotDataItem(x, low, pen=pen(faded(p.ink, 0), 0))
        band_high = pg.PlotDataItem(x, high, pen=pen(faded(p.ink, 0), 0))
        a.addItem(band_low)
        a.addItem(band_high)
        a.addItem(pg.FillBetweenItem(band_low, band_high, brush=faded(p.ink, 45)))
        a.addItem(pg.PlotDataItem(x, acc, pen=pen(p.ink, 2), symbol="o", symbolSize=4, symbolBrush=p.ink,
                                  symbolPen=None, name="token accuracy (Wilson 95 % band)"))
        a.addItem(pg.PlotDataItem(x, exact, pen=pen(p.ink_soft, 1.4, Qt.PenStyle.DashLine), name="chunk exact match"))
        a.setYRange(0, 1.02, padding=0)

        e = self.error_plot.getPlotItem()
        floor = error_rate_floor(result)
        error = np.maximum(1.0 - acc, floor)
        e_low = np.maximum(1.0 - high, floor)
        e_high = np.maximum(1.0 - low, floor)
        shade = pg.LinearRegionItem(values=(np.log10(floor * 0.5), -3.0), orientation="horizontal", movable=False,
                                    brush=faded(p.accent, 28), pen=pen(faded(p.accent, 0), 0))
        e.addItem(shade, ignoreBounds=True)
        lo_item = pg.PlotDataItem(x, e_low, pen=pen(faded(p.ink, 0), 0))
        hi_item = pg.PlotDataItem(x, e_high, pen=pen(faded(p.ink, 0), 0))
        e.addItem(lo_item)
        e.addItem(hi_item)
        e.addItem(pg.FillBetweenItem(lo_item, hi_item, brush=faded(p.ink, 45)))
        zero = (1.0 - acc) <= 0
        e.addItem(pg.PlotDataItem(x, error, pen=pen(p.ink, 2)))
        e.addItem(pg.PlotDataItem(x[~zero], error[~zero], pen=None, symbol="o", symbolSize=4, symbolBrush=p.ink, symbolPen=None))
        if zero.any():
            e.addItem(pg.PlotDataItem(x[zero], error[zero], pen=None, symbol="o", symbolSize=6, symbolBrush=p.surface,
                                      symbolPen=pen(p.ink, 1.2), name="no errors (drawn at ½ error)"))
        for style, accuracy_level in zip(LEVEL_PEN_STYLES, TOLERANCE_LEVELS):
            level = 1.0 - accuracy_level
            line = pg.InfiniteLine(pos=np.log10(level), angle=0, movable=False, pen=pen(p.ink_faint, 1, style),
                                   label=level_percent(accuracy_level), labelOpts={"position": 0.04, "color": p.ink_soft,
                                                                               "anchors": [(0, 1), (0, 1)]})
            e.addItem(line, ignoreBounds=True)
        e.setYRange(np.log10(floor * 0.5), 0.05, padding=0)
        log_ticks(e.getAxis("left"), floor * 0.5, 1.0, steps=(1,))
        for plot in self.plots:
            axis = plot.getPlotItem().getAxis("bottom")
            if self.log_x:
                log_ticks(axis, float(x.min()), float(x.max()))
            else:
                axis.setTicks(None)

        pos = self.position_plot.getPlotItem()
        legend(pos, offset=(10, -10))
        k = len(curves[0].position_accuracy) if curves else 0
        for i, colour in enumerate(series_colours(k)):
            pos.addItem(pg.PlotDataItem(x, [c.position_accuracy[i] for c in curves], pen=pen(colour, 1.6), name=f"position {i}"))

        nll = self.nll_plot.getPlotItem()
        nll.addItem(pg.PlotDataItem(x, [c.nll for c in curves], pen=pen(p.ink, 1.8)))

        cal = self.calibration_plot.getPlotItem()
        legend(cal, offset=(10, 10))
        cal.addItem(pg.PlotDataItem(x, [c.brier for c in curves], pen=pen(p.ink, 1.8), name="Brier"))
        cal.addItem(pg.PlotDataItem(x, [c.ece for c in curves], pen=pen(p.ink_soft, 1.6, Qt.PenStyle.DashLine), name="ECE"))

        self._mark_tolerances(result)
        for plot in self.plots:  # not x-linked: pyqtgraph aligns linked views by screen position
            plot.getPlotItem().enableAutoRange(x=True)
        s = result.settings
        self.status.setText(
            f"{result.codec_name} · {s.noise} noise ({sigma_unit(s.noise)}) · {len(s.sigmas)} σ × {s.repeats} repeats · seed {s.seed}\n"
            f"latent RMS {result.latent_rms:.4g} · {result.decoded_chunks:,} chunks decoded in {result.elapsed_s:.1f} s"
        )
        self.readout.setText("hover a plot to read values · click to open that σ in the live view")
        self.plotted.emit()

    def _mark_tolerances(self, result: SweepResult) -> None:
        p = PALETTE
        acc0 = result.accuracy_at_zero
        self.zero_value.setText(fmt_percent(acc0, 3))
        self.zero_caption.setToolTip("token accuracy with no noise: the loss tolerances are measured from it")
        note = resolution_note(result.chunks.num_tokens, result.tolerances + result.loss_tolerances)
        for kind, labels, tolerances in ((ABSOLUTE, self.tolerance_labels, result.tolerances),
                                         (LOSS, self.loss_labels, result.loss_tolerances)):
            for tol in tolerances:
                cap, value = labels.get(tol.level, (None, None))
                if value is None:
                    continue
                # a status that is words, not a figure, is set smaller, so six of them fit
                self._show_figure(value, headline_text(tol), word=tol.status in (UNRESOLVABLE, NO_ZERO))
                cap.setToolTip(tolerance_tip(tol, acc0))
                value.setToolTip(note or "")
        for style, level in zip(LEVEL_PEN_STYLES, TOLERANCE_LEVELS):
            tol = result.tolerance(level)
            if not tol.found or (self.log_x and tol.sigma <= 0):
                continue
            xpos = np.log10(tol.sigma) if self.log_x else tol.sigma
            for plot in (self.accuracy_plot, self.error_plot):
                line = pg.InfiniteLine(pos=xpos, angle=90, movable=False, pen=pen(p.accent, 1.2, style),
                                       label=level_percent(level) if plot is self.accuracy_plot else None,
                                       labelOpts={"position": 0.1, "color": p.accent, "rotateAxis": (1, 0),
                                                  "anchors": [(0, 0), (0, 0)]})
                plot.getPlotItem().addItem(line, ignoreBounds=True)

    # ---- crosshair and clicks ------------------------------------------------------------

    def _nearest(self, plot: pg.PlotWidget, scene_pos) -> int | None:
        if self.result is None or len(self._x) == 0:
            return None
        vb = plot.getPlotItem().getViewBox()
        if not vb.sceneBoundingRect().contains(scene_pos):
            return None
        xv = vb.mapSceneToView(scene_pos).x()
        xs = np.log10(self._x) if self.log_x else self._x
        return int(np.argmin(np.abs(xs - xv)))

    def _mouse_moved(self, plot: pg.PlotWidget, scene_pos) -> None:
        i = self._nearest(plot, scene_pos)
        for line in self.crosshairs:
            line.setVisible(i is not None)
        if i is None:
            return
        sigma = float(self._x[i])
        xpos = np.log10(sigma) if self.log_x else sigma
        for line in self.crosshairs:
            line.setPos(xpos)
        c = next(c for c in self.result.curves if c.sigma == sigma)
        self.readout.setText(
            f"<b>σ {sigma:.4g}</b> &nbsp; accuracy {fmt_percent(c.token_accuracy, 3)} "
            f"[{fmt_percent(c.accuracy_low, 3)}, {fmt_percent(c.accuracy_high, 3)}] &nbsp; exact {fmt_percent(c.chunk_exact_rate, 2)}"
            f" &nbsp; NLL {c.nll:.4g} &nbsp; Brier {c.brier:.4g} &nbsp; ECE {c.ece:.4g} &nbsp; "
            f"{c.tokens - c.correct:,} wrong of {c.tokens:,}"
        )

    def _clicked(self, plot: pg.PlotWidget, event) -> None:
        if event.button() != Qt.MouseButton.LeftButton:
            return
        i = self._nearest(plot, event.scenePos())
        if i is not None:
            s = self.result.settings
            self.sigma_picked.emit(float(self._x[i]), s.noise, s.seed)

    # ---- saved results, export ---------------------------------------------------------

    def set_saved_result(self, result: SweepResult | None) -> None:
        """Show a saved sweep (a reopened workspace or a `chunkscope sweep` folder) without
        running anything; switching checkpoints shows theirs again."""
        self.show_result(result)
        if result is not None:
            self.status.setText("saved: " + self.status.text())

    def caption(self) -> str:
        """Provenance of what is shown, for a saved plot."""
        return provenance_caption([self.result]) if self.result is not None else ""

    def show_live_sigma(self, sigma: float, noise: str) -> None:
        visible = self.result is not None and noise == self.result.settings.noise and (sigma > 0 or not self.log_x)
        for line in self.live_lines:
            line.setVisible(visible)
            if visible:
                line.setPos(np.log10(sigma) if self.log_x else sigma)
