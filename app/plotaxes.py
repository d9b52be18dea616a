"""A σ axis whose log-scale labels never crowd: decades, then 2 and 5 between them.

pyqtgraph's own log axis labels every 2…9 multiple when a range spans no whole number
of decades in its linear ticks, so labels like 0.04 0.05 0.06 overlap."""

from __future__ import annotations

import math

import pyqtgraph as pg

from app.style import PALETTE, pen, ui_font


class SigmaAxis(pg.AxisItem):
    def logTickValues(self, minVal, maxVal, size, stdTicks):  # noqa: N802 (pyqtgraph naming)
        lo, hi = math.floor(minVal), math.ceil(maxVal)
        decades = [float(v) for v in range(lo, hi + 1) if minVal <= v <= maxVal]
        multiples = (2, 5) if maxVal - minVal > 1.2 else (2, 3, 4, 5, 6, 7, 8, 9)
        minor = [v + math.log10(m) for v in range(lo, hi) for m in multiples if minVal <= v + math.log10(m) <= maxVal]
        return [(1.0, decades), (None, minor)]


def use_sigma_axis(plot: pg.PlotWidget | pg.PlotItem) -> SigmaAxis:
    """Give a plot a SigmaAxis at the bottom, styled like app.style.style_plot's axes."""
    item = plot.getPlotItem() if isinstance(plot, pg.PlotWidget) else plot
    old = item.getAxis("bottom")
    label = old.labelText
    axis = SigmaAxis("bottom")
    item.setAxisItems({"bottom": axis})
    axis.setPen(pen(PALETTE.line, 1))
    axis.setTextPen(pen(PALETTE.ink_soft, 1))
    axis.setTickFont(ui_font(8))
    if label:
        item.setLabel("bottom", label, color=PALETTE.ink_soft, **{"font-size": "8pt"})
    return axis
