"""Latent space: per-dimension KL and posterior std, active dimensions, and how far apart
chunks sit compared with the noise the codec was measured to tolerate."""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import QGridLayout, QHBoxLayout, QLabel, QWidget

from app.controls import card, figure_box, page_layout
from app.export import add_export_menu
from app.state import Workbench
from app.style import PALETTE, faded, fmt_sigma, log_ticks, pen, plot_widget
import core
from core.outputs.report import provenance_caption
from core.engine.health import ACTIVE_THRESHOLD, geometry_check
from core.engine.tolerance import TOLERANCE_LEVELS, level_percent

TOLERANCE_LEVEL = TOLERANCE_LEVELS[1]  # the 99 % level: the noise drawn against the nearest-neighbour distances
TOLERANCE_NAME = f"{level_percent(TOLERANCE_LEVEL)} tolerance"


class LatentPanel(QWidget):
    plotted = Signal()

    def __init__(self, workbench: Workbench):
        super().__init__()
        self.setObjectName("page")
        self.workbench = workbench
        self._build()
        workbench.current_changed.connect(self.refresh)
        workbench.entry_changed.connect(self._entry_updated)

    def _build(self) -> None:
        outer = page_layout(self, 10)
        figures, row = card(QHBoxLayout, margins=(14, 10))
        box, self.active_value, self.active_note = figure_box("active dimensions", 24)
        row.addWidget(box)
        box, self.kl_value, self.kl_note = figure_box("KL to N(0, I) per chunk", 24)
        row.addWidget(box)
        box, self.rms_value, self.rms_note = figure_box("latent RMS", 24)
        row.addWidget(box)
        box, self.nn_value, self.nn_note = figure_box("nearest-neighbour half-distance, median", 24)
        row.addWidget(box)
        box, self.noise_value, self.noise_note = figure_box(f"noise norm at the {TOLERANCE_NAME}", 24)
        row.addWidget(box)
        row.addStretch(1)
        outer.addWidget(figures)

        self.verdict = QLabel("")
        self.verdict.setObjectName("caption")
        self.verdict.setWordWrap(True)
        self.verdict.setTextFormat(Qt.TextFormat.RichText)
        outer.addWidget(self.verdict)

        grid = QGridLayout()
        grid.setSpacing(10)
        self.kl_plot = plot_widget("KL to N(0, 1) per latent dimension", "dimension", "nats")
        self.std_plot = plot_widget("Posterior std per latent dimension (mean over chunks)", "dimension", "std")
        self.var_plot = plot_widget("Variance of the posterior mean per dimension (activity)", "dimension", "variance")
        self.nn_plot = plot_widget("Half-distance to the nearest distinct chunk, against the noise", "distance in latent space", "chunks")
        grid.addWidget(self.kl_plot, 0, 0)
        grid.addWidget(self.std_plot, 0, 1)
        grid.addWidget(self.var_plot, 1, 0)
        grid.addWidget(self.nn_plot, 1, 1)
        grid.setColumnStretch(0, 1)
        grid.setColumnStretch(1, 1)
        outer.addLayout(grid, 1)
        self.var_plot.getPlotItem().setLogMode(y=True)
        for plot, name in ((self.kl_plot, "latent-kl"), (self.std_plot, "latent-std"), (self.var_plot, "latent-activity"),
                           (self.nn_plot, "latent-nearest-neighbour")):
            add_export_menu(plot, self.caption, name)
        self.plain_notes = []
        for plot in (self.kl_plot, self.std_plot):
            note = pg.TextItem("", color=PALETTE.ink_soft, anchor=(0.5, 0.5))
            note.setFont(self.font())
            self.plain_notes.append(note)

    def _entry_updated(self, path: str) -> None:
        if path == self.workbench.current:
            self.refresh()

    def refresh(self, *_args) -> None:
        p = PALETTE
        for plot in (self.kl_plot, self.std_plot, self.var_plot, self.nn_plot):
            plot.getPlotItem().clear()
            plot.getPlotItem().enableAutoRange()
            plot.getPlotItem().showAxis("left")
            plot.getPlotItem().showAxis("bottom")
        entry = self.workbench.entry()
        health = entry.health if entry is not None else None
        if entry is None or health is None:
            for value in (self.active_value, self.kl_value, self.rms_value, self.nn_value, self.noise_value):
                value.setText("—")
            self.verdict.setText("measuring the latent space…" if entry is not None else "")
            return
        dims = np.arange(health.latent_dim)
        self.active_value.setText(f"{health.active_dims} of {health.latent_dim}")
        self.active_note.setText(f"variance of the mean over chunks > {ACTIVE_THRESHOLD}")
        self.rms_value.setText(f"{health.latent_rms:.4g}")
        self.rms_note.setText("sets the scale of absolute σ")

        summary = health.summary()
        if health.kl_per_dim is not None:
            kl = health.kl_per_dim
            self.kl_value.setText(f"{summary['kl_total']:.4g} nats")
            self.kl_note.setText(f"mean posterior std {summary['posterior_std_mean']:.3g}")
            self.kl_plot.getPlotItem().addItem(pg.BarGraphItem(x=dims, height=kl, width=0.8, brush=p.ink, pen=None))
            self.std_plot.getPlotItem().addItem(
                pg.BarGraphItem(x=dims, height=health.std_per_dim, width=0.8, brush=p.ink_soft, pen=None))
            self.std_plot.getPlotItem().addItem(pg.InfiniteLine(pos=1.0, angle=0, pen=pen(p.ink_faint, 1, Qt.PenStyle.DashLine),
                                                                label="prior std 1", labelOpts={"position": 0.92, "color": p.ink_soft}))
        else:
            self.kl_value.setText("none")
            self.kl_note.setText(f"{entry.name} is a plain autoencoder")
            for plot, note in zip((self.kl_plot, self.std_plot), self.plain_notes):
                item = plot.getPlotItem()
                note.setText(f"{entry.name} is a plain autoencoder:\nit has no posterior, so no KL and no posterior std.")
                item.addItem(note)
                note.setPos(0.5, 0.5)
                item.setXRange(0, 1)
                item.setYRange(0, 1)
                item.hideAxis("left")
                item.hideAxis("bottom")

        variance = np.maximum(health.mean_variance_per_dim, 1e-12)
        active = health.mean_variance_per_dim > ACTIVE_THRESHOLD
        var_item = self.var_plot.getPlotItem()
        log_ticks(var_item.getAxis("left"), min(float(variance.min()), ACTIVE_THRESHOLD), float(variance.max()))
        var_item.addItem(pg.PlotDataItem(dims[active], variance[active], pen=None, symbol="o", symbolSize=6,
                                         symbolBrush=p.ink, symbolPen=None))
        if (~active).any():
            var_item.addItem(pg.PlotDataItem(dims[~active], variance[~active], pen=None, symbol="o", symbolSize=6,
                                             symbolBrush=p.surface, symbolPen=pen(p.ink_soft, 1)))
        var_item.addItem(pg.InfiniteLine(pos=np.log10(ACTIVE_THRESHOLD), angle=0, pen=pen(p.accent, 1, Qt.PenStyle.DashLine),
                                         label=f"active above {ACTIVE_THRESHOLD}", labelOpts={"position": 0.85, "color": p.accent}))

        half = health.nn_half_distance
        nn = self.nn_plot.getPlotItem()
        if len(half) == 0:
            self.nn_value.setText("—")
            self.verdict.setText("The text has fewer than two distinct chunks, so there is no nearest neighbour to measure.")
            self.plotted.emit()
            return
        self.nn_value.setText(f"{summary['nn_half_distance_median']:.4g}")
        self.nn_note.setText(f"1st percentile {summary['nn_half_distance_p01']:.4g} · {summary['nn_chunks']:,} distinct chunks"
                             + (" (sampled)" if summary["nn_sampled"] else ""))
        hist, edges = np.histogram(half, bins=60)
        nn.addItem(pg.PlotDataItem(edges, hist, stepMode="center", fillLevel=0, brush=faded(p.ink, 60), pen=pen(p.ink, 1.2)))
        sweep = entry.sweep
        tol = sweep.tolerance(TOLERANCE_LEVEL) if sweep is not None else None
        check = geometry_check(health, tol.sigma, sweep.settings.noise, entry.encoded) if (
            tol is not None and tol.sigma is not None and entry.encoded is not None) else None
        if check is not None:
            norm = check.noise_norm
            lower = tol.status == "above_grid"
            self.noise_value.setText(("≥ " if lower else "") + f"{norm:.4g}")
            self.noise_note.setText(f"σ {fmt_sigma(tol.sigma)}, {sweep.settings.noise} noise")
            nn.addItem(pg.InfiniteLine(pos=norm, angle=90, pen=pen(p.accent, 2),
                                       label=f"noise norm at the {TOLERANCE_NAME}", labelOpts={"position": 0.92, "color": p.accent,
                                                                                            "anchors": [(1, 0), (1, 0)]}))
            nn.setXRange(min(float(half.min()), norm) * 0.95, max(float(half.max()), norm) * 1.08)
            if check.limit == "geometry":
                why = ("Most chunks' perturbations reach past the midpoint to their nearest neighbour at that σ, "
                       "so the <b>geometry</b> of the latent space is the limit: the decoder keeps up as long as neighbours stay apart.")
            else:
                why = ("Most chunks keep their perturbation inside their own half-distance at that σ yet tokens still break, "
                       "so the <b>decoder</b> is the limit, not how far apart the chunks sit.")
            self.verdict.setText(
                f"At the {TOLERANCE_NAME} the noise has length {norm:.4g}; {check.closer * 100:.0f} % of distinct chunks have a nearest "
                f"neighbour closer than twice that. {why}"
            )
        else:
            self.noise_value.setText("—")
            self.noise_note.setText("run a sweep to draw it")
            self.verdict.setText(f"Run a sweep to draw the measured {TOLERANCE_NAME} onto the distance histogram and see "
                                 "whether the latent geometry or the decoder is the limit.")
        self.plotted.emit()

    def caption(self) -> str:
        """Provenance of what is shown, for a saved plot."""
        entry = self.workbench.entry()
        if entry is None or entry.codec is None:
            return ""
        if entry.sweep is not None:
            return provenance_caption([entry.sweep])
        text = f"{entry.name} ({entry.codec.sha256[:10]})"
        if entry.chunks is not None:
            text += f"; text {entry.chunks.text_sha256[:10]} ({entry.chunks.num_tokens:,} tokens)"
        return text + f"; chunkscope {core.__version__}"
