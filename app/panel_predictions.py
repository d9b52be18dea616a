"""Generator predictions: a generator's real errors held against the decoder's tolerance (numbers from
core.analyses.predictions; this view only draws them)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import QFileDialog, QGridLayout, QHBoxLayout, QLabel, QPushButton, QWidget

from app.controls import card, caption, figure_box, page_layout
from app.export import add_export_menu
from app.state import Workbench
from app.style import PALETTE, faded, log_ticks, pen, plot_widget
from app.tokentext import TokenText, char_format
from app.workers import LatestTask, Task

FILE_FILTER = "Predictions (*.safetensors);;All files (*)"


def _analyse(task: Task, path: str, codecs: list):
    from core.analyses.predictions import PredictionsError, analyse_predictions, read_predictions

    predictions = read_predictions(path)
    matching = [c for c in codecs if c.sha256 == predictions.codec_sha256]
    if not matching:
        raise PredictionsError(f"{path} was made for the codec with sha256 {predictions.codec_sha256[:12]}…, and no open "
                               "checkpoint has it; open that checkpoint first.")
    return analyse_predictions(matching[0], predictions, progress=task.report, sweep_progress=task.report,
                               should_stop=task.should_stop)


def _fmt(value, digits: str = ".3g", scale: float = 1.0, unit: str = "") -> str:
    return "—" if value is None or not math.isfinite(value) else f"{value * scale:{digits}}{unit}"


def _interval(s: dict, key: str, digits: str = ".3g", scale: float = 1.0) -> str:
    low, high = s.get(f"{key}_low"), s.get(f"{key}_high")
    if low is None or high is None or not (math.isfinite(low) and math.isfinite(high)):
        return ""
    return f"95 %: {low * scale:{digits}} – {high * scale:{digits}}"


class PredictionsPanel(QWidget):
    error = Signal(str)
    finished = Signal(object)

    def __init__(self, workbench: Workbench):
        super().__init__()
        self.setObjectName("page")
        self.workbench = workbench
        self.work = LatestTask(workbench.runner, self)
        self.result = None
        self.pending: str | None = None
        self._build()
        workbench.entry_changed.connect(self._maybe_start)
        workbench.entries_changed.connect(self._maybe_start)

    def _build(self) -> None:
        outer = page_layout(self, 10)
        head, row = card(QHBoxLayout, margins=(14, 8))
        self.file_label = caption("Open a predictions file (File ▸ Open predictions…, or drop it here): the latents a "
                                  "generator predicted for the chunks of a text.")
        self.file_label.setWordWrap(True)
        row.addWidget(self.file_label, 1)
        self.status = caption("", "faint")
        row.addWidget(self.status)
        button = QPushButton("Open predictions…")
        button.clicked.connect(self.choose_file)
        row.addWidget(button)
        outer.addWidget(head)

        figures, row = card(QHBoxLayout, margins=(14, 10))
        self.boxes = {}
        for key, title in (("sigma", "effective σ (data-scale)"), ("accuracy", "decoded accuracy"),
                           ("noise", "random noise of that size"), ("factor", "structured-error factor"),
                           ("energy", "energy score"), ("brier", "Brier estimate")):
            box, value, note = figure_box(title, 22)
            self.boxes[key] = (value, note)
            row.addWidget(box)
        row.addStretch(1)
        outer.addWidget(figures)
        self.verdict = QLabel("")
        self.verdict.setWordWrap(True)
        self.verdict.setObjectName("verdict")
        outer.addWidget(self.verdict)

        grid = QGridLayout()
        grid.setSpacing(10)
        self.curve_plot = plot_widget("Token accuracy under data-scale noise, and the generator", "σ (data-scale)", "token accuracy")
        self.norm_plot = plot_widget("Error length against the nearest-neighbour half-distance", "distance in latent space",
                                     "share")
        grid.addWidget(self.curve_plot, 0, 0)
        grid.addWidget(self.norm_plot, 0, 1)
        grid.setColumnStretch(0, 1)
        grid.setColumnStretch(1, 1)
        outer.addLayout(grid, 3)
        self.text_caption = caption("Text: tokens the generator's decode gets wrong")
        outer.addWidget(self.text_caption)
        self.text = TokenText("the text of the predictions appears here")
        outer.addWidget(self.text, 2)
        for plot, name in ((self.curve_plot, "predictions-accuracy"), (self.norm_plot, "predictions-error-norms")):
            add_export_menu(plot, self.caption, name)

    def caption(self) -> str:
        if self.result is None:
            return ""
        prov = self.result.provenance
        return (f"{prov['codec']['name']} ({prov['codec']['sha256'][:10]}); predictions {Path(prov['predictions']['path']).name} "
                f"({prov['predictions']['sha256'][:10]}); {prov['sweep']['repeats']} repeats, seed {prov['sweep']['seed']}")

    # ---- loading ------------------------------------------------------------------------

    def choose_file(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open predictions", "", FILE_FILTER)
        if path:
            self.open_predictions(path)

    def open_predictions(self, path: str) -> None:
        self.pending = str(path)
        self.file_label.setText(f"{Path(path).name}: waiting for the checkpoints to load…")
        self._maybe_start()

    def _maybe_start(self, *_args) -> None:
        if self.pending is None:
            return
        entries = list(self.workbench.entries.values())
        if any(e.codec is None for e in entries):
            return  # a checkpoint still loading may be the one the predictions were made for
        path, self.pending = self.pending, None
        codecs = [e.codec for e in entries]
        self.file_label.setText(f"{Path(path).name}: decoding the predictions and sweeping the same chunks…")
        self.work.start(Task("the predictions analysis", _analyse, path, codecs),
                        progress=lambda done, total: self.status.setText(f"{100 * done / max(1, total):.0f} %"),
                        finished=self._show, failed=self._failed, cancelled=lambda: self.status.setText("stopped"))

    def is_running(self) -> bool:
        return self.work.running() or self.pending is not None

    def _failed(self, message: str) -> None:
        self.status.setText("")
        self.file_label.setText("The predictions could not be analysed (see the message above).")
        self.error.emit(message)

    # ---- drawing ------------------------------------------------------------------------

    def _show(self, result) -> None:
        from core.analyses.predictions import norm_histograms, wrong_levels

        self.result = result
        self.status.setText("")
        for path, entry in self.workbench.entries.items():  # the side panel shows the codec that decoded them
            if entry.codec is not None and entry.codec.sha256 == result.provenance["codec"]["sha256"]:
                self.workbench.select(path)
                break
        s, prov = result.summary, result.provenance
        note = prov["predictions"]["note"]
        self.file_label.setText(f"{Path(prov['predictions']['path']).name}: {s['chunks']:,} chunks × {s['samples']} samples, "
                                f"{s['tokens']:,} tokens, decoded by {prov['codec']['name']}" + (f" — {note}" if note else ""))
        self._set("sigma", _fmt(s["effective_sigma"]), _interval(s, "effective_sigma"))
        self._set("accuracy", _fmt(s["decoded_accuracy"], ".2f", 100, " %"), _interval(s, "decoded_accuracy", ".2f", 100))
        self._set("noise", _fmt(s["noise_accuracy_at_effective_sigma"], ".2f", 100, " %"),
                  f"σ = 0: {_fmt(s['accuracy_at_zero'], '.2f', 100, ' %')}")
        self._set("factor", _fmt(s["structured_error_factor"], ".3g", 1, "×"), _interval(s, "structured_error_factor"))
        self._set("energy", _fmt(s["energy_score"], ".4g"), _interval(s, "energy_score", ".4g") or "needs S ≥ 2")
        self._set("brier", _fmt(s["brier_estimate"], ".4g"), _interval(s, "brier_estimate", ".4g") or "needs S ≥ 2")
        self.verdict.setText(result.verdict[0].upper() + result.verdict[1:])
        self._draw_curve(result)
        self._draw_norms(result, norm_histograms(result))
        self.text.set_content(result.chunks.text, result.chunks.spans)
        self.text.paint_levels(wrong_levels(result), {
            1: char_format(faded(PALETTE.accent, 45), PALETTE.ink),
            2: char_format(PALETTE.accent_soft, PALETTE.accent_ink, underline=PALETTE.accent),
        })
        self.text_caption.setText("Text: tokens the generator's decode gets wrong in at least half its samples (red), "
                                  "in some (pale)")
        self.finished.emit(result)

    def _set(self, key: str, value: str, note: str) -> None:
        label, note_label = self.boxes[key]
        label.setText(value)
        note_label.setText(note)

    def _draw_curve(self, result) -> None:
        p = PALETTE
        item = self.curve_plot.getPlotItem()
        item.clear()
        s = result.summary
        curves = [c for c in result.sweep.curves if c.sigma > 0]
        x = np.log10([c.sigma for c in curves])
        acc = np.array([c.token_accuracy for c in curves])
        low = np.array([c.accuracy_low for c in curves])
        high = np.array([c.accuracy_high for c in curves])
        band_low, band_high = pg.PlotDataItem(x, low), pg.PlotDataItem(x, high)
        item.addItem(pg.FillBetweenItem(band_low, band_high, brush=faded(p.ink, 30)))
        item.addItem(pg.PlotDataItem(x, acc, pen=pen(p.ink, 1.8), name="random data-scale noise"))
        sigma = s["effective_sigma"]
        if sigma and sigma > 0:
            gx = math.log10(sigma)
            left = gx - math.log10(s["effective_sigma_low"]) if s.get("effective_sigma_low") else 0
            right = math.log10(s["effective_sigma_high"]) - gx if s.get("effective_sigma_high") else 0
            gy = s["decoded_accuracy"]
            item.addItem(pg.ErrorBarItem(x=np.array([gx]), y=np.array([gy]), left=np.array([left]), right=np.array([right]),
                                         top=np.array([s["decoded_accuracy_high"] - gy]),
                                         bottom=np.array([gy - s["decoded_accuracy_low"]]), beam=0.03, pen=pen(p.accent, 1.6)))
            item.addItem(pg.ScatterPlotItem([gx], [gy], size=11, brush=p.accent, pen=pen(p.surface, 1.2)))
            item.addItem(pg.InfiniteLine(pos=gx, angle=90, pen=pen(p.accent, 1, Qt.PenStyle.DotLine)))
            label = pg.TextItem(f"generator: σ {sigma:.3g}, {100 * gy:.1f} %", color=p.accent_ink, anchor=(1.05, 1.2))
            label.setPos(gx, gy)
            item.addItem(label)
            noise = s["noise_accuracy_at_effective_sigma"]
            if noise is not None:
                item.addItem(pg.ScatterPlotItem([gx], [noise], size=8, brush=p.surface, pen=pen(p.ink, 1.6)))
        item.setYRange(0, 1.02)
        log_ticks(item.getAxis("bottom"), float(10 ** x.min()), float(10 ** x.max()))

    def _draw_norms(self, result, hist: dict) -> None:
        p = PALETTE
        item = self.norm_plot.getPlotItem()
        item.clear()
        item.addLegend(offset=(-8, 8))
        edges = hist["edges"]
        item.addItem(pg.PlotDataItem(edges, hist["half_distances"], stepMode="center", fillLevel=0,
                                     brush=faded(p.ink, 40), pen=pen(p.ink_soft, 1.2), name="half-distance to nearest chunk"))
        item.addItem(pg.PlotDataItem(edges, hist["errors"], stepMode="center", fillLevel=0,
                                     brush=faded(p.accent, 70), pen=pen(p.accent, 1.4), name="generator error ‖e‖"))
        norm = result.summary.get("noise_norm_at_tolerance_99")
        if norm is not None and math.isfinite(norm):
            item.addItem(pg.InfiniteLine(pos=norm, angle=90, pen=pen(p.ink, 1.4, Qt.PenStyle.DashLine),
                                         label="noise norm at the 99 % tolerance",
                                         labelOpts={"position": 0.62, "color": p.ink_soft, "rotateAxis": (1, 0)}))
