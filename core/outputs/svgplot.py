"""Small, dependency-free SVG line charts for reports (core imports no Qt)."""

from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass, field
from html import escape
from typing import Sequence

PALETTE = ("#2f5d8a", "#c2571a", "#3b8a5a", "#8a3b76", "#7d6b1f", "#4a8fa6")
INK = "#22262b"
MUTED = "#6b727b"
GRID = "#e3e6ea"


@dataclass
class Series:
    name: str
    xs: Sequence[float]
    ys: Sequence[float]
    band: tuple[Sequence[float], Sequence[float]] | None = None
    color: str | None = None
    dashed: bool = False
    points: bool = True


@dataclass
class Marker:
    x: float
    label: str
    color: str = MUTED


@dataclass
class Chart:
    title: str
    xlabel: str
    ylabel: str
    series: list[Series]
    logy: bool = False
    markers: list[Marker] = field(default_factory=list)
    hlines: list[tuple[float, str]] = field(default_factory=list)
    caption: str = ""
    ylim: tuple[float, float] | None = None
    width: int = 780
    height: int = 360


def _nice_ticks(lo: float, hi: float, count: int = 6) -> list[float]:
    if not math.isfinite(lo) or not math.isfinite(hi):
        return []
    if hi <= lo:
        hi = lo + 1.0
    raw = (hi - lo) / count
    mag = 10 ** math.floor(math.log10(raw))
    step = min((m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw), default=mag * 10)
    first = math.ceil(lo / step) * step
    ticks, t = [], first
    while t <= hi + step * 1e-9:
        ticks.append(round(t, 12))
        t += step
    return ticks


def _fmt(v: float) -> str:
    if v == 0:
        return "0"
    if abs(v) >= 1e4 or abs(v) < 1e-3:
        return f"{v:.0e}"
    return f"{v:.4g}"


def render(chart: Chart) -> str:
    w, h = chart.width, chart.height
    caption_lines = textwrap.wrap(chart.caption, 120) if chart.caption else []
    legend_width = min(200, max([7 * len(s.name) + 34 for s in chart.series], default=0))
    left, right, top, bottom = 64, 16 + legend_width, 34, 52 + 14 * len(caption_lines)
    pw, ph = w - left - right, h - top - bottom
    xs = [x for s in chart.series for x in s.xs if math.isfinite(x)] + [m.x for m in chart.markers if math.isfinite(m.x)]
    ys = [y for s in chart.series for y in s.ys if math.isfinite(y) and (not chart.logy or y > 0)]
    for s in chart.series:
        if s.band:
            ys += [y for y in list(s.band[0]) + list(s.band[1]) if math.isfinite(y) and (not chart.logy or y > 0)]
    ys += [y for y, _ in chart.hlines if not chart.logy or y > 0]
    x0, x1 = (min(xs), max(xs)) if xs else (0.0, 1.0)
    if x1 <= x0:
        x1 = x0 + 1.0
    if chart.ylim:
        y0, y1 = chart.ylim
    elif chart.logy:
        y0 = 10 ** math.floor(math.log10(min(ys))) if ys else 1e-4
        y1 = 10 ** math.ceil(math.log10(max(ys))) if ys else 1.0
        if y1 <= y0:
            y1 = y0 * 10
    else:
        y0, y1 = (min(ys), max(ys)) if ys else (0.0, 1.0)
        pad = (y1 - y0) * 0.05 or 0.05
        y0, y1 = y0 - pad, y1 + pad

    def fx(x: float) -> float:
        return left + (x - x0) / (x1 - x0) * pw

    def fy(y: float) -> float:
        if chart.logy:
            y = max(y, y0)
            return top + ph - (math.log10(y) - math.log10(y0)) / (math.log10(y1) - math.log10(y0)) * ph
        return top + ph - (y - y0) / (y1 - y0) * ph

    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" '
        f'font-family="DejaVu Sans, Helvetica, Arial, sans-serif" font-size="11" role="img" aria-label="{escape(chart.title)}">',
        f'<rect width="{w}" height="{h}" fill="white"/>',
        f'<text x="{left}" y="20" font-size="13" font-weight="bold" fill="{INK}">{escape(chart.title)}</text>',
    ]
    yticks = [10.0 ** e for e in range(int(round(math.log10(y0))), int(round(math.log10(y1))) + 1)] if chart.logy else _nice_ticks(y0, y1)
    for t in yticks:
        if y0 - 1e-12 <= t <= y1 + 1e-12:
            y = fy(t)
            out.append(f'<line x1="{left}" x2="{left + pw}" y1="{y:.1f}" y2="{y:.1f}" stroke="{GRID}"/>')
            out.append(f'<text x="{left - 6}" y="{y + 4:.1f}" text-anchor="end" fill="{MUTED}">{_fmt(t)}</text>')
    for t in _nice_ticks(x0, x1):
        x = fx(t)
        out.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{top}" y2="{top + ph}" stroke="{GRID}"/>')
        out.append(f'<text x="{x:.1f}" y="{top + ph + 15}" text-anchor="middle" fill="{MUTED}">{_fmt(t)}</text>')
    out.append(f'<rect x="{left}" y="{top}" width="{pw}" height="{ph}" fill="none" stroke="#b9bec5"/>')
    out.append(f'<text x="{left + pw / 2}" y="{top + ph + 34}" text-anchor="middle" fill="{INK}">{escape(chart.xlabel)}</text>')
    out.append(
        f'<text x="16" y="{top + ph / 2}" text-anchor="middle" fill="{INK}" transform="rotate(-90 16 {top + ph / 2})">{escape(chart.ylabel)}</text>'
    )
    out.append(f'<clipPath id="plot-area-{id(chart)}"><rect x="{left}" y="{top}" width="{pw}" height="{ph}"/></clipPath>')
    out.append(f'<g clip-path="url(#plot-area-{id(chart)})">')
    for y, label in chart.hlines:
        if chart.logy and y <= 0:
            continue
        yy = fy(y)
        out.append(f'<line x1="{left}" x2="{left + pw}" y1="{yy:.1f}" y2="{yy:.1f}" stroke="{MUTED}" stroke-dasharray="2 3"/>')
        out.append(f'<text x="{left + pw - 4}" y="{yy - 4:.1f}" text-anchor="end" fill="{MUTED}">{escape(label)}</text>')
    for i, s in enumerate(chart.series):
        color = s.color or PALETTE[i % len(PALETTE)]
        pts = [(x, y) for x, y in zip(s.xs, s.ys) if math.isfinite(x) and math.isfinite(y) and (not chart.logy or y > 0)]
        if s.band:
            lo, hi = s.band
            upper = [(x, v) for x, v in zip(s.xs, hi) if math.isfinite(v)]
            lower = [(x, v) for x, v in zip(s.xs, lo) if math.isfinite(v)]
            poly = " ".join(f"{fx(x):.1f},{fy(v):.1f}" for x, v in upper + lower[::-1])
            if poly:
                out.append(f'<polygon points="{poly}" fill="{color}" fill-opacity="0.16" stroke="none"/>')
        if pts:
            path = " ".join(f"{fx(x):.1f},{fy(y):.1f}" for x, y in pts)
            dash = ' stroke-dasharray="5 3"' if s.dashed else ""
            out.append(f'<polyline points="{path}" fill="none" stroke="{color}" stroke-width="1.8"{dash}/>')
            if s.points:
                out.extend(f'<circle cx="{fx(x):.1f}" cy="{fy(y):.1f}" r="2.2" fill="{color}"/>' for x, y in pts)
    for m in chart.markers:
        if math.isfinite(m.x) and x0 <= m.x <= x1:
            x = fx(m.x)
            out.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{top}" y2="{top + ph}" stroke="{m.color}" stroke-dasharray="4 3"/>')
            out.append(f'<text x="{x + 3:.1f}" y="{top + 12}" fill="{m.color}" font-size="10">{escape(m.label)}</text>')
    out.append("</g>")
    lx, ly = left + pw + 12, top + 12
    for i, s in enumerate(chart.series):
        color = s.color or PALETTE[i % len(PALETTE)]
        y = ly + 16 * i
        out.append(f'<line x1="{lx}" x2="{lx + 16}" y1="{y - 4}" y2="{y - 4}" stroke="{color}" stroke-width="2"/>')
        out.append(f'<text x="{lx + 22}" y="{y}" fill="{INK}">{escape(s.name)}</text>')
    for i, line in enumerate(caption_lines):
        out.append(f'<text x="{left}" y="{h - 8 - 14 * (len(caption_lines) - 1 - i)}" fill="{MUTED}" font-size="10">{escape(line)}</text>')
    out.append("</svg>")
    return "\n".join(out)
