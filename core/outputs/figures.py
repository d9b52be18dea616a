"""Report figures: a few plain matplotlib plots, inline SVG for the HTML report, PDF for papers.

How an analysis adds its part to the report::

    from core.outputs.figures import Line, Guide, NamedFigure, ReportSection, histogram, line_plot, scatter

    fig = histogram("Worst-case σ per chunk", "σ", {"plain": sigmas_a, "tolerant": sigmas_b})
    section = ReportSection(
        anchor="worst-case", title="Worst-case perturbations",
        html="<p>What the reader should know first.</p>",           # HTML before the figures
        figures=[NamedFigure("worst-case-sigma", fig, caption=provenance_caption(sweeps))],
        html_after="<table>...</table>",                            # HTML after them
    )
    html = build_report(sweeps=..., extra_sections=[section])     # core.outputs.report

Each section is rendered in order: its title, `html`, every figure (inline SVG with its
caption below), then `html_after`. `chunkscope report --figures DIR` also writes every figure
as DIR/<name>.pdf, so a figure's `name` must be unique in the report and stable from run to
run (lower-case letters, digits and hyphens: "sweep-accuracy-data-scale").

Rules the functions keep, so a new plot gets them for free:
- `matplotlib.figure.Figure` only, never pyplot: no display, no global figure list, and the
  figures may be built in a worker thread (rendering holds one lock, as rcParams are global).
- Text is drawn as paths (`svg.fonttype = "path"`, DejaVu Sans, shipped with matplotlib), so
  the SVG looks the same on a machine without that font; the PDF embeds it.
- `svg_markup` gives every id of one figure the figure's own prefix, so several figures inline
  in one HTML page never share an id (clip paths, glyphs, markers), and drops the XML prolog,
  the DOCTYPE and the metadata block (no outside link at all).
- Axes of fractions (accuracy, match rates) are drawn 0 to 1; a flat series gets a small
  span around its value rather than a span of rounding noise; margins keep end points off
  the frame; labels of reference lines sit in the legend or beside the frame, never on top
  of each other inside it.
"""

from __future__ import annotations

import io
import math
import re
import textwrap
import threading
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator, Mapping, Sequence

PALETTE = ("#2f5d8a", "#c2571a", "#3b8a5a", "#8a3b76", "#7d6b1f", "#4a8fa6")
INK = "#22262b"
MUTED = "#6b727b"
GRID = "#e3e6ea"
FRAME = "#b9bec5"

WIDTH = 9.0  # inches: 864 px at 96 dpi, inside the report's 980 px column with its margins
HEIGHT = 3.8

NAME_PATTERN = re.compile(r"^[a-z0-9]+(?:-[a-z0-9]+)*$")

_STYLE = {
    "font.family": "DejaVu Sans",
    "font.size": 9,
    "axes.titlesize": 10.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.labelsize": 9.5,
    "axes.edgecolor": FRAME,
    "axes.labelcolor": INK,
    "axes.grid": True,
    "grid.color": GRID,
    "grid.linewidth": 0.8,
    "axes.axisbelow": True,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "xtick.labelsize": 8.5,
    "ytick.labelsize": 8.5,
    "legend.fontsize": 8.5,
    "legend.frameon": False,
    "axes.xmargin": 0.03,
    "axes.ymargin": 0.05,
    "svg.fonttype": "path",
    "svg.hashsalt": "chunkscope",  # the same figure gives the same SVG, run after run
    "pdf.fonttype": 42,  # TrueType embedded: text stays text in the PDF
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
}
_LOCK = threading.RLock()


@contextmanager
def _style() -> Iterator[None]:
    import matplotlib

    with _LOCK, matplotlib.rc_context(_STYLE):
        yield


def _new_axes(title: str, xlabel: str, ylabel: str, logx: bool, logy: bool, width: float, height: float):
    """A figure of one titled, labelled axes (call inside `_style()`)."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    ax = fig.add_subplot()
    ax.set_title(title)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if logx:
        ax.set_xscale("log")
    if logy:
        ax.set_yscale("log")
    return fig, ax


@dataclass
class Line:
    """One series of a line plot; `band` is (low, high) drawn as a shaded area."""

    name: str
    xs: Sequence[float]
    ys: Sequence[float]
    band: tuple[Sequence[float], Sequence[float]] | None = None
    color: str | None = None
    dashed: bool = False
    points: bool = True
    line: bool = True  # False: points only (e.g. the significant ones of a curve)


@dataclass
class Guide:
    """A labelled reference line: horizontal in `hlines`, vertical in `vlines`."""

    value: float
    label: str
    color: str = MUTED


@dataclass
class NamedFigure:
    """A figure of the report: `name` is its stable file stem, `caption` its provenance."""

    name: str
    figure: object  # matplotlib.figure.Figure
    caption: str = ""

    def __post_init__(self) -> None:
        if not NAME_PATTERN.match(self.name):
            raise ValueError(f"figure name {self.name!r} must be lower-case letters, digits and single hyphens")


@dataclass
class ReportSection:
    """One section of the report: `html`, then the figures in order, then `html_after`."""

    anchor: str
    title: str
    html: str = ""
    figures: list[NamedFigure] = field(default_factory=list)
    html_after: str = ""
    kind: str = ""  # "plot", "table" or "text"; empty: "plot" when it has figures, else "table"

    @property
    def section_kind(self) -> str:
        return self.kind or ("plot" if self.figures else "table")


def _finite(values) -> list[float]:
    return [float(v) for v in values if v is not None and math.isfinite(float(v))]


def _limits(values: Sequence[float], log: bool, fraction: bool, min_span: float | None) -> tuple[float, float] | None:
    """Axis limits: fractions 0..1; a flat series gets `min_span` around it; else None (autoscale)."""
    if fraction:
        return (-0.03, 1.03)
    vals = [v for v in values if not log or v > 0]
    if not vals:
        return None
    lo, hi = min(vals), max(vals)
    if log:
        if hi / lo < 10:  # less than a decade: a decade around the values, so ticks exist
            mid = math.sqrt(lo * hi)
            return (mid / math.sqrt(10), mid * math.sqrt(10))
        return None
    flat = hi - lo <= 1e-12 * max(1.0, abs(lo))
    span = min_span if min_span is not None else (abs(lo) * 0.2 or 1.0) if flat else 0.0
    if hi - lo < span:
        mid = (lo + hi) / 2
        return (mid - span / 2, mid + span / 2)
    return None


def _guide_label_positions(values: Sequence[float], lo: float, hi: float, log: bool, min_gap: float = 0.06) -> list[float]:
    """Axes-fraction positions for labels of horizontal lines, pushed apart to `min_gap`."""
    def frac(v: float) -> float:
        if log:
            return (math.log10(v) - math.log10(lo)) / (math.log10(hi) - math.log10(lo))
        return (v - lo) / (hi - lo)

    order = sorted(range(len(values)), key=lambda i: frac(values[i]))
    out = [0.0] * len(values)
    last = -1.0
    for i in order:
        pos = max(frac(values[i]), last + min_gap)
        out[i] = pos
        last = pos
    return out


def _number(v: float, percent: bool) -> str:
    text = f"{100 * v:.3g} %" if percent else f"{v:.3g}"
    return text.replace("-", "−")


def _plain_ticks(ax, axis: str, percent: bool = False) -> None:
    """Tick labels as plain numbers ("0.1", "2", "10 %"), never "10^-1" mixed with "2×10^-3";
    on a log axis spanning less than about a decade the 2 and 5 minor ticks are labelled too."""
    import math as _m

    from matplotlib.ticker import FuncFormatter

    target = getattr(ax, f"{axis}axis")
    target.set_major_formatter(FuncFormatter(lambda v, _pos: _number(v, percent)))
    if target.get_scale() != "log":
        return

    def minor(v, _pos):
        lo, hi = sorted(target.get_view_interval())
        if lo <= 0 or _m.log10(hi / lo) > 1.6:
            return ""
        mantissa = round(v / 10 ** _m.floor(_m.log10(v) + 1e-9), 6)
        return _number(v, percent) if mantissa in (2.0, 5.0) else ""

    target.set_minor_formatter(FuncFormatter(minor))


def _legend(fig, ax) -> None:
    """The legend outside the frame: right of everything the axes draw (guide labels included),
    or below the plot in columns when its entries are many or long (the plot keeps its width)."""
    handles, labels = ax.get_legend_handles_labels()
    if not handles:
        return
    if len(labels) > 4 or max(len(label) for label in labels) > 30:
        from matplotlib.transforms import ScaledTranslation

        below = ax.transAxes + ScaledTranslation(0, -0.5, fig.dpi_scale_trans)  # under the tick labels and x label
        ax.legend(handles, labels, loc="upper center", bbox_to_anchor=(0.5, 0.0), bbox_transform=below,
                  ncols=min(3, len(labels)))
    else:
        fig.legend(handles, labels, loc="outside right upper")


def line_plot(
    title: str,
    xlabel: str,
    ylabel: str,
    lines: Sequence[Line],
    *,
    logx: bool = False,
    logy: bool = False,
    hlines: Sequence[Guide] = (),
    vlines: Sequence[Guide] = (),
    fraction_y: bool = False,
    percent_y: bool = False,
    min_span: float | None = None,
    width: float = WIDTH,
    height: float = HEIGHT,
):
    """Lines with optional Wilson-style bands, points, and reference lines.

    `fraction_y`: the y values are fractions, drawn 0..1 (as percent with `percent_y`).
    `min_span`: the y axis spans at least this much; a flat series without it gets 20 % of its value
    (or 1 around zero), never a span of rounding noise.
    Vertical guides go in the legend with their label; horizontal ones are labelled
    beside the right edge of the frame, pushed apart so no two labels overlap."""
    with _style():
        fig, ax = _new_axes(title, xlabel, ylabel, logx, logy, width, height)
        ys_all: list[float] = []
        for i, s in enumerate(lines):
            color = s.color or PALETTE[i % len(PALETTE)]
            pts = [(float(x), float(y)) for x, y in zip(s.xs, s.ys)
                   if x is not None and y is not None and math.isfinite(x) and math.isfinite(y) and (not logy or y > 0)]
            if s.band is not None:
                lo, hi = s.band
                ax.fill_between([float(x) for x in s.xs], [float(v) for v in lo], [float(v) for v in hi],
                                color=color, alpha=0.16, linewidth=0)
                ys_all += _finite(lo) + _finite(hi)
            ys_all += [y for _, y in pts]
            if not pts:
                ax.plot([], [], color=color, label=f"{s.name} (none measured)")
                continue
            xs, ys = zip(*pts)
            ax.plot(xs, ys, color=color, linewidth=1.7 if s.line else 0, linestyle="--" if s.dashed else "-",
                    marker="o" if s.points else None, markersize=3.2 if s.line else 5, label=s.name, zorder=3)
        for i, g in enumerate(vlines):
            if math.isfinite(g.value):
                ax.axvline(g.value, color=g.color, linestyle=(0, (4, 3)), linewidth=1.0, label=g.label, zorder=2)
        limits = _limits(ys_all + [g.value for g in hlines], logy, fraction_y, min_span)
        if limits is not None:
            ax.set_ylim(*limits)
        elif hlines and ys_all:  # the reference lines are part of the picture: keep them in view
            shown_x = ax.get_xlim()[0]
            ax.update_datalim([(shown_x, g.value) for g in hlines if not logy or g.value > 0], updatex=False)
            ax.autoscale_view(scalex=False)
        if percent_y or logy:
            _plain_ticks(ax, "y", percent_y)
        if logx:
            _plain_ticks(ax, "x")
        lo, hi = ax.get_ylim()
        shown = [g for g in hlines if lo <= g.value <= hi and (not logy or g.value > 0)]
        for g in shown:
            ax.axhline(g.value, color=g.color, linestyle=(0, (2, 3)), linewidth=0.9, zorder=1)
        for g, pos in zip(shown, _guide_label_positions([g.value for g in shown], lo, hi, logy)):
            ax.annotate(g.label, xy=(1.0, pos), xycoords="axes fraction", xytext=(4, 0), textcoords="offset points",
                        va="center", ha="left", color=g.color, fontsize=8, annotation_clip=False)
        _legend(fig, ax)
        return fig


def histogram(
    title: str,
    xlabel: str,
    groups: Mapping[str, Sequence[float]],
    *,
    bins: int | Sequence[float] = 30,
    ylabel: str = "count",
    logx: bool = False,
    density: bool = False,
    vlines: Sequence[Guide] = (),
    width: float = WIDTH,
    height: float = HEIGHT,
):
    """Overlaid step histograms of several groups on shared bins (log-spaced with `logx`).

    Values that are not finite (a chunk that never broke: inf) are counted in the legend."""
    import numpy as np

    with _style():
        fig, ax = _new_axes(title, xlabel, "density" if density else ylabel, logx, False, width, height)
        finite = {name: np.asarray(_finite(v)) for name, v in groups.items()}
        every = np.concatenate([v for v in finite.values()] or [np.zeros(0)])
        if logx:
            every = every[every > 0]
        edges = bins
        if isinstance(bins, int) and every.size:
            lo, hi = float(every.min()), float(every.max())
            if hi <= lo:
                lo, hi = (lo / 2, lo * 2) if logx else (lo - 0.5, hi + 0.5)
            edges = np.geomspace(lo, hi, bins + 1) if logx else np.linspace(lo, hi, bins + 1)
        for i, (name, values) in enumerate(finite.items()):
            color = PALETTE[i % len(PALETTE)]
            values = values[values > 0] if logx else values
            left_out = len(groups[name]) - len(values)
            label = f"{name} (n = {len(values):,}" + (f"; {left_out:,} not drawn)" if left_out else ")")
            if values.size:
                ax.hist(values, bins=edges, histtype="stepfilled", alpha=0.18, color=color, density=density)
                ax.hist(values, bins=edges, histtype="step", linewidth=1.5, color=color, density=density, label=label)
            else:
                ax.plot([], [], color=color, label=label)
        for g in vlines:
            if math.isfinite(g.value):
                ax.axvline(g.value, color=g.color, linestyle=(0, (4, 3)), linewidth=1.0, label=g.label)
        ax.set_ylim(bottom=0)
        if logx:
            _plain_ticks(ax, "x")
        _legend(fig, ax)
        return fig


def scatter(
    title: str,
    xlabel: str,
    ylabel: str,
    groups: Mapping[str, tuple[Sequence[float], Sequence[float]]],
    *,
    diagonal: bool = True,
    logx: bool = False,
    logy: bool = False,
    width: float = WIDTH,
    height: float = HEIGHT,
):
    """Points of several groups; `diagonal` draws y = x across the shared range (predicted vs measured)."""
    with _style():
        fig, ax = _new_axes(title, xlabel, ylabel, logx, logy, width, height)
        every: list[float] = []
        for i, (name, (xs, ys)) in enumerate(groups.items()):
            pts = [(float(x), float(y)) for x, y in zip(xs, ys) if math.isfinite(x) and math.isfinite(y)
                   and (not logx or x > 0) and (not logy or y > 0)]
            color = PALETTE[i % len(PALETTE)]
            if pts:
                px, py = zip(*pts)
                ax.scatter(px, py, s=12, color=color, alpha=0.7, linewidths=0, label=f"{name} (n = {len(pts):,})", zorder=3)
                every += list(px) + list(py)
            else:
                ax.scatter([], [], color=color, label=f"{name} (none measured)")
        if diagonal and every:
            lo, hi = min(every), max(every)
            if hi <= lo:
                lo, hi = (lo / 2, lo * 2) if (logx or logy) else (lo - 0.5, hi + 0.5)
            ax.plot([lo, hi], [lo, hi], color=MUTED, linestyle=(0, (4, 3)), linewidth=1.0, label="y = x", zorder=2)
            if logx == logy:  # one range on both axes: the diagonal is the diagonal
                pad = (hi / lo) ** 0.04 if logx else (hi - lo) * 0.04
                shown = (lo / pad, hi * pad) if logx else (lo - pad, hi + pad)
                ax.set_xlim(*shown)
                ax.set_ylim(*shown)
        for axis, log in (("x", logx), ("y", logy)):
            if log:
                _plain_ticks(ax, axis)
        _legend(fig, ax)
        return fig


# ---- output ------------------------------------------------------------------------------

_ID = re.compile(r'\sid="([^"]*)"')
_REF = re.compile(r'(url\(#|href="#)([^)"]+)')


def svg_markup(fig, prefix: str, label: str = "") -> str:
    """The figure as an `<svg>` element for inline HTML, every id prefixed with `prefix`.

    Ids nothing refers to are dropped; `url(#..)` and `href="#.."` follow their id. The
    element scales down with the page (`width` 100 %, at most its natural size)."""
    buffer = io.StringIO()
    with _style():
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    svg = buffer.getvalue()
    svg = svg[svg.index("<svg"):]
    svg = re.sub(r"<metadata>.*?</metadata>\s*", "", svg, flags=re.S)
    svg = re.sub(r"<!--.*?-->\s*", "", svg, flags=re.S)
    referenced = {m.group(2) for m in _REF.finditer(svg)}
    svg = _ID.sub(lambda m: f' id="{prefix}-{m.group(1)}"' if m.group(1) in referenced else "", svg)
    svg = _REF.sub(lambda m: f"{m.group(1)}{prefix}-{m.group(2)}", svg)
    svg = svg.replace("*{stroke-linejoin", f"#{prefix} *{{stroke-linejoin", 1)  # the page's own elements keep their style
    size = re.match(r'<svg[^>]*?width="([\d.]+)pt" height="([\d.]+)pt"', svg)
    aria = f' role="img" aria-label="{_attr(label)}"' if label else ' role="img"'
    head = f'<svg id="{prefix}"{aria}'
    if size:
        w_px = float(size.group(1)) * 96 / 72
        svg = svg.replace(f'width="{size.group(1)}pt" height="{size.group(2)}pt"',
                          f'width="100%" style="max-width:{w_px:.0f}px;height:auto"', 1)
    return head + svg[len("<svg"):].rstrip() + "\n"


def _attr(text: str) -> str:
    from html import escape

    return escape(text, quote=True)


def save_figure(fig, path: str | Path, caption: str = "", dpi: int = 150) -> Path:
    """Write the figure to `path` in the format its suffix names (pdf, png, svg), with the
    caption (its provenance) as small text below the plot. Writes in place: callers that
    must not overwrite stage the path first (core.outputs.files)."""
    path = Path(path)
    fmt = path.suffix.lstrip(".").lower()
    if fmt not in ("pdf", "png", "svg"):
        raise ValueError(f"{path}: a figure is saved as .pdf, .png or .svg")
    with _style():
        note = None
        if caption:  # the figure's bottom label: the layout puts it below everything, legend included
            wrapped = "\n".join(textwrap.wrap(caption, int(fig.get_figwidth() * 15)))
            note = fig.supxlabel(wrapped, x=0.01, ha="left", fontsize=7, color=MUTED, linespacing=1.3)
            note.set_visible(True)
            note.set_in_layout(True)
        metadata = {"CreationDate": None} if fmt == "pdf" else {"Date": None} if fmt == "svg" else {}
        try:
            with open(path, "wb") as handle:
                fig.savefig(handle, format=fmt, dpi=dpi, bbox_inches="tight", pad_inches=0.08, metadata=metadata)
        finally:
            if note is not None:  # the inline SVG shows the caption as HTML instead
                note.set_visible(False)
                note.set_in_layout(False)
    return path
