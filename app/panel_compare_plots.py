"""The compare view's two plots: token accuracy with its Wilson band per checkpoint, and the
paired difference B − A with McNemar's test marked per sigma. A dashed line marks the sigma
the text view shows; a click on either plot picks the nearest grid sigma."""

from __future__ import annotations

from typing import Callable

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt

from app.export import add_export_menu
from app.plotaxes import use_sigma_axis
from app.style import PALETTE, codec_colour, faded, legend, pen, plot_widget
from core.analyses.compare import ALPHA, SIGNIFICANT, Comparison
from core.engine.noise import sigma_unit
from core.engine.sweep import DEFAULT_NOISE
from core.engine.tolerance import TOLERANCE_LEVELS


def comparison_sigma_unit(comparison: Comparison | None) -> str:
    return sigma_unit(comparison.main_noise if comparison is not None else DEFAULT_NOISE)


class ComparePlots:
    """The accuracy and difference plot widgets (placed by the panel) and what they draw."""

    def __init__(self, caption_fn: Callable[[], str], on_sigma_clicked: Callable[[int], None]):
        self.comparison: Comparison | None = None
        self.log_x = True
        self.sigma_index = -1
        self._on_sigma_clicked = on_sigma_clicked
        self.accuracy = plot_widget("Token accuracy (Wilson 95 % band)", "σ", "token accuracy")
        self.difference = plot_widget("Paired difference B − A", "σ", "B − A, percentage points")
        for plot in (self.accuracy, self.difference):
            use_sigma_axis(plot)
        self.difference.getPlotItem().setXLink(self.accuracy.getPlotItem())
        for plot, name in ((self.accuracy, "compare-accuracy"), (self.difference, "compare-difference")):
            plot.setObjectName("card")
            add_export_menu(plot, caption_fn, name)
            plot.scene().sigMouseClicked.connect(lambda ev, p=plot: self._clicked(p, ev))

    def add_selected_lines(self) -> None:
        """The dashed line at the text view's sigma, one per plot (added once the panel is laid out)."""
        self.selected_lines = []
        for plot in (self.accuracy, self.difference):
            line = pg.InfiniteLine(angle=90, movable=False, pen=pen(PALETTE.ink_soft, 1, Qt.PenStyle.DashLine))
            line.setVisible(False)
            plot.getPlotItem().addItem(line, ignoreBounds=True)
            self.selected_lines.append(line)

    def widgets(self) -> list[pg.PlotWidget]:
        return [self.accuracy, self.difference]

    def set_log_x(self, on: bool) -> None:
        self.log_x = on
        self.draw(self.comparison)

    def draw(self, comparison: Comparison | None) -> None:
        self.comparison = c = comparison
        p = PALETTE
        acc_item, diff_item = self.accuracy.getPlotItem(), self.difference.getPlotItem()
        for item, keep_line in ((acc_item, self.selected_lines[0]), (diff_item, self.selected_lines[1])):
            for child in list(item.items):
                if child is not keep_line:
                    item.removeItem(child)
            if item.legend is not None:
                item.legend.clear()
        if c is None:
            for item in (acc_item, diff_item):
                item.setLogMode(x=False)
            return
        main = c.main_sweeps()
        log = self.log_x and any(s > 0 for s in main[0].sigmas)
        for item in (acc_item, diff_item):
            item.setLogMode(x=log)
            item.setLabel("bottom", f"{comparison_sigma_unit(c)} ({c.main_noise} noise)", color=p.ink_soft, **{"font-size": "8pt"})
        legend(acc_item, offset=(10, -10))
        for level in TOLERANCE_LEVELS:
            acc_item.addItem(pg.InfiniteLine(pos=level, angle=0, movable=False, pen=pen(p.ink_faint, 1, Qt.PenStyle.DotLine)),
                             ignoreBounds=True)
        for i, r in enumerate(main):
            sigmas = np.asarray(r.sigmas, dtype=np.float64)
            keep = sigmas > 0 if log else np.ones(len(sigmas), dtype=bool)
            x = sigmas[keep]
            acc = np.array([cv.token_accuracy for cv in r.curves])[keep]
            low = np.array([cv.accuracy_low for cv in r.curves])[keep]
            high = np.array([cv.accuracy_high for cv in r.curves])[keep]
            colour = codec_colour(i)
            lo_item = pg.PlotDataItem(x, low, pen=pen(faded(colour, 0), 0))
            hi_item = pg.PlotDataItem(x, high, pen=pen(faded(colour, 0), 0))
            acc_item.addItem(lo_item)
            acc_item.addItem(hi_item)
            acc_item.addItem(pg.FillBetweenItem(lo_item, hi_item, brush=faded(colour, 55)))
            role = "A" if i == 0 else ("B" if len(main) == 2 else f"B{i}")
            acc_item.addItem(pg.PlotDataItem(x, acc, pen=pen(colour, 2), symbol="o", symbolSize=4, symbolBrush=colour,
                                             symbolPen=None, name=f"{role}: {r.codec_name}"))
        acc_item.setYRange(0, 1.02, padding=0)

        if len(c.paired) > 1:
            legend(diff_item, offset=(-10, 10))
        diff_item.addItem(pg.InfiniteLine(pos=0, angle=0, movable=False, pen=pen(p.ink_faint, 1)), ignoreBounds=True)
        for j, pair in enumerate(c.paired):
            colour = codec_colour(j + 1)
            sigmas = np.array([row.sigma for row in pair.rows])
            keep = sigmas > 0 if log else np.ones(len(sigmas), dtype=bool)
            x = sigmas[keep]
            diff = np.array([row.difference * 100 for row in pair.rows])[keep]
            significant = np.array(pair.significant(ALPHA))[keep]
            diff_item.addItem(pg.PlotDataItem(x, diff, pen=pen(colour, 2), name=f"{pair.name_b} − {pair.name_a}"))
            if (~significant).any():
                diff_item.addItem(pg.PlotDataItem(x[~significant], diff[~significant], pen=None, symbol="o", symbolSize=6,
                                                  symbolBrush=p.surface, symbolPen=pen(colour, 1.2)))
            if significant.any():
                diff_item.addItem(pg.PlotDataItem(x[significant], diff[significant], pen=None, symbol="d", symbolSize=11,
                                                  symbolBrush=p.ink, symbolPen=pen(p.surface, 1)))
        unit = c.paired[0].unit if c.paired else "token"
        diff_item.setLabel("left", f"B − A, percentage points (per {unit})", color=p.ink_soft, **{"font-size": "8pt"})
        any_significant = any(any(pair.significant(ALPHA)) for pair in c.paired)
        diff_item.setTitle(
            f"<span style='color:{p.ink}; font-size:9pt; font-weight:600'>Paired difference B − A</span>"
            f"<span style='color:{p.ink_soft}; font-size:8pt'>&nbsp;&nbsp;&nbsp;◆ McNemar {SIGNIFICANT.replace('<', '&lt;')}"
            f"{'' if any_significant else ' (none on this grid)'}&nbsp;&nbsp;○ not significant</span>", justify="left")
        acc_item.enableAutoRange(x=True)
        diff_item.enableAutoRange(y=True)
        self.move_selected(self.sigma_index)

    def move_selected(self, sigma_index: int) -> None:
        """Put the dashed lines at grid sigma `sigma_index` (hidden for -1, or for 0 on a log axis)."""
        self.sigma_index = sigma_index
        c = self.comparison
        sigmas = c.main_sweeps()[0].sigmas if c is not None else ()
        visible = 0 <= sigma_index < len(sigmas)
        if visible:
            sigma = sigmas[sigma_index]
            log = self.log_x and any(s > 0 for s in sigmas)
            visible = sigma > 0 or not log
            if visible:
                for line in self.selected_lines:
                    line.setPos(np.log10(sigma) if log else sigma)
        for line in self.selected_lines:
            line.setVisible(visible)

    def _clicked(self, plot: pg.PlotWidget, event) -> None:
        if event.button() != Qt.MouseButton.LeftButton or self.comparison is None:
            return
        vb = plot.getPlotItem().getViewBox()
        if not vb.sceneBoundingRect().contains(event.scenePos()):
            return
        sigmas = np.asarray(self.comparison.main_sweeps()[0].sigmas, dtype=np.float64)
        log = self.log_x and (sigmas > 0).any()
        xv = vb.mapSceneToView(event.scenePos()).x()
        xs = np.where(sigmas > 0, np.log10(np.maximum(sigmas, 1e-300)), -np.inf) if log else sigmas
        self._on_sigma_clicked(int(np.argmin(np.abs(xs - xv))))
