"""One self-contained HTML report: inline SVG plots, tables, tests, fragile tokens, provenance.

No script, no stylesheet link, no image file: it opens in any browser offline.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timezone
from html import escape
from typing import Sequence

import core
from core.analyses.compare import ALPHA, SIGNIFICANT, Comparison
from core.outputs.svgplot import Chart, Marker, Series, render
from core.engine.noise import NOISE_MODELS
from core.engine.sweep import DEFAULT_NOISE, SweepResult
from core.engine.tolerance import (
    ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, level_name, level_percent, resolution_note,
    UNRESOLVABLE, status_notes, tolerance_text,
)
from core.analyses.tokens import fragile_types
from core.analyses.trend import TrendPoint, sort_points

STYLE = """
body{font-family:"DejaVu Sans",Helvetica,Arial,sans-serif;color:#22262b;margin:28px auto;max-width:980px;line-height:1.45;font-size:14px}
h1{font-size:22px;margin-bottom:4px}h2{font-size:17px;border-bottom:1px solid #d5d9de;padding-bottom:3px;margin-top:30px}
table{border-collapse:collapse;margin:8px 0 14px;font-size:12.5px}th,td{border:1px solid #d5d9de;padding:3px 8px;text-align:right}
th{background:#f1f3f5}td.l,th.l{text-align:left}.muted{color:#6b727b}.warn{background:#fff4e0;border-left:4px solid #c2571a;padding:6px 10px}
section{overflow-x:auto}figure{margin:10px 0 18px}figcaption{color:#6b727b;font-size:12px}code{font-size:12px}.sig{font-weight:bold;color:#8a3b76}
"""


@dataclass
class Section:
    anchor: str
    title: str
    html: str
    kind: str  # "plot" or "table" or "text"


def _pct(x: float | None, digits: int = 3) -> str:
    return "—" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{100 * x:.{digits}f} %"


def _tol(t) -> str:
    return escape(tolerance_text(t))


# the report's tolerance columns: accuracy-level tolerances, then loss tolerances
_LEVELS = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]


def _level_heads() -> str:
    return "".join(f"<th>{level_percent(level, kind)}</th>" for kind, level in _LEVELS)


def _level_groups() -> str:
    """The header row above `_level_heads`, naming the two kinds of tolerance."""
    return f"<th colspan={len(TOLERANCE_LEVELS)}>accuracy ≥</th><th colspan={len(LOSS_LEVELS)}>loss from σ = 0 ≤</th>"


def provenance_caption(sweeps: Sequence[SweepResult]) -> str:
    s = sweeps[0]
    names = ", ".join(f"{r.codec_name} ({r.provenance['codec']['sha256'][:10]})" for r in sweeps)
    return (
        f"{names}; text {s.chunks.text_sha256[:10]} ({s.chunks.num_tokens:,} tokens); {s.settings.noise} noise; "
        f"seed {s.settings.seed}; {s.settings.repeats} repeats; chunkscope {core.__version__}"
    )


def accuracy_chart(sweeps: Sequence[SweepResult], title: str = "Token accuracy") -> Chart:
    noise = sweeps[0].settings.noise
    series = [
        Series(r.codec_name, r.sigmas, [c.token_accuracy for c in r.curves], band=([c.accuracy_low for c in r.curves], [c.accuracy_high for c in r.curves]))
        for r in sweeps
    ]
    marked = TOLERANCE_LEVELS[1]
    markers = [Marker(t.sigma, f"{r.codec_name} {level_percent(marked)}") for r in sweeps for t in [r.tolerance(marked)] if t.found]
    return Chart(f"{title} ({noise} noise, Wilson 95 % band)", _sigma_label(noise), "token accuracy", series, markers=markers,
                 hlines=[(level, level_percent(level)) for level in TOLERANCE_LEVELS[1:]], caption=provenance_caption(sweeps))


def error_chart(sweeps: Sequence[SweepResult]) -> Chart:
    noise = sweeps[0].settings.noise
    floor = min(0.5 / max(c.tokens, 1) for r in sweeps for c in r.curves)
    series = [Series(r.codec_name, r.sigmas, [max(1 - c.token_accuracy, floor) for c in r.curves]) for r in sweeps]
    return Chart(f"Token error rate, log scale ({noise} noise)", _sigma_label(noise), "1 − token accuracy", series, logy=True,
                 hlines=[(1 - level, f"{(1 - level) * 100:g} %" + (f" ({level_percent(level)} level)" if i == 0 else ""))
                         for i, level in enumerate(TOLERANCE_LEVELS)], caption=provenance_caption(sweeps) + f"; zero errors drawn at {floor:.1e}")


def chunk_chart(sweeps: Sequence[SweepResult]) -> Chart:
    noise = sweeps[0].settings.noise
    series = [Series(r.codec_name, r.sigmas, [c.chunk_exact_rate for c in r.curves]) for r in sweeps]
    return Chart(f"Chunk exact match ({noise} noise)", _sigma_label(noise), "chunks decoded exactly", series, caption=provenance_caption(sweeps))


def _sigma_label(noise: str) -> str:
    return NOISE_MODELS[noise].axis_label


def _tolerance_table_single(sweeps: Sequence[SweepResult]) -> str:
    rows = ["<table><tr><th class=l rowspan=2>checkpoint</th><th rowspan=2>accuracy at σ=0</th>" + _level_groups()
            + "<th rowspan=2>latent RMS</th><th class=l rowspan=2>noise</th></tr><tr>" + _level_heads() + "</tr>"]
    for r in sweeps:
        acc0 = r.accuracy_at_zero
        tols = "".join(f"<td>{_tol(r.tolerance(level, kind))}</td>" for kind, level in _LEVELS)
        rows.append(f"<tr><td class=l>{escape(r.codec_name)}</td><td>{_pct(acc0)}</td>{tols}<td>{r.latent_rms:.4g}</td><td class=l>{r.settings.noise}</td></tr>")
    rows.append("</table>")
    return "".join(rows) + _tolerance_notes(sweeps)


def _tolerance_notes(sweeps: Sequence[SweepResult]) -> str:
    """What the special tolerance texts mean, and which tolerances the text is too short for."""
    every = [t for r in sweeps for t in r.tolerances + r.loss_tolerances]
    notes = status_notes(every, skip=[UNRESOLVABLE])  # each sweep's resolution note says it
    notes += [f"{r.codec_name}: {note}" for r in sweeps
              for note in [resolution_note(r.chunks.num_tokens, r.tolerances + r.loss_tolerances)] if note]
    return "".join(f"<p class=muted>{escape(n)}</p>" for n in dict.fromkeys(notes))


def _tolerance_table_comparison(comparison: Comparison) -> str:
    head = ("<table><tr><th class=l rowspan=3>checkpoint</th><th rowspan=3>accuracy at σ=0</th><th rowspan=3>latent RMS</th>"
            + "".join(f"<th colspan={len(_LEVELS)}>{NOISE_MODELS[n].unit} ({n})</th>" for n in ("isotropic", "data-scale")) + "</tr>"
            "<tr>" + _level_groups() * 2 + "</tr><tr>" + _level_heads() * 2 + "</tr>")
    rows = [head]
    for t in comparison.tolerances:
        cells = "".join(f"<td>{_tol(x)}</td>" for x in t.absolute + t.absolute_loss + t.data_scale + t.data_scale_loss)
        rows.append(f"<tr><td class=l>{escape(t.name)}</td><td>{_pct(t.accuracy_at_zero)}</td><td>{t.latent_rms:.4g}</td>{cells}</tr>")
    rows.append("</table>")
    warning = f"<p class=warn>{escape(comparison.scale_warning)}</p>" if comparison.scale_warning else ""
    return warning + "".join(rows) + _tolerance_notes(comparison.isotropic + comparison.data_scale)


def _paired_sections(comparison: Comparison) -> list[Section]:
    out = []
    for i, p in enumerate(comparison.paired):
        xs = [r.sigma for r in p.rows]
        diff = [r.difference for r in p.rows]
        sig = [r.difference if r.pvalue < ALPHA else float("nan") for r in p.rows]
        chart = Chart(
            f"Accuracy difference {p.name_b} − {p.name_a} (per {p.unit})", _sigma_label(comparison.main_noise), "difference in accuracy",
            [Series("difference", xs, diff), Series(f"{SIGNIFICANT} (McNemar)", xs, sig, color="#8a3b76", points=True)],
            hlines=[(0.0, "no difference")], caption=provenance_caption(comparison.main_sweeps()),
        )
        out.append(Section(f"diff-{i}", f"Difference curve: {p.name_b} vs {p.name_a}", figure(chart), "plot"))
        rows = [f"<p class=muted>Paired on repeat 0 of each sweep, per {p.unit}. McNemar's test: exact binomial when fewer than 25 discordant pairs, "
                "else chi-square with continuity correction." + (" Characters of one token are not independent, so these p-values are optimistic." if p.unit == "character" else "") + "</p>",
                f"<table><tr><th>σ</th><th>{escape(p.name_a)}</th><th>{escape(p.name_b)}</th><th>difference</th><th>only {escape(p.name_a)} right</th>"
                f"<th>only {escape(p.name_b)} right</th><th>statistic</th><th>p</th><th class=l>test</th></tr>"]
        for r in p.rows:
            cls = " class=sig" if r.pvalue < ALPHA else ""
            rows.append(f"<tr><td>{r.sigma:.4g}</td><td>{_pct(r.accuracy_a)}</td><td>{_pct(r.accuracy_b)}</td><td{cls}>{100 * r.difference:+.3f}</td>"
                        f"<td>{r.a_only}</td><td>{r.b_only}</td><td>{r.statistic:.4g}</td><td{cls}>{r.pvalue:.3g}</td><td class=l>{r.method}</td></tr>")
        rows.append("</table>")
        out.append(Section(f"tests-{i}", f"Paired tests: {p.name_b} vs {p.name_a}", "".join(rows), "table"))
    return out


def _fragile_section(sweeps: Sequence[SweepResult], top: int = 15) -> Section:
    parts = []
    for r in sweeps:
        types = [f for f in fragile_types(r) if f.broken > 0][:top]
        parts.append(f"<h3>{escape(r.codec_name)}</h3>")
        if not types:
            parts.append("<p class=muted>No token broke on this grid.</p>")
            continue
        parts.append("<table><tr><th class=l>token</th><th>count</th><th>broke</th><th>median critical σ</th><th>mean critical σ</th><th class=l>most common wrong decode</th></tr>")
        for f in types:
            med = "never" if math.isinf(f.median_critical_sigma) else f"{f.median_critical_sigma:.4g}"
            parts.append(f"<tr><td class=l><code>{escape(repr(f.text))}</code></td><td>{f.count}</td><td>{f.broken}</td><td>{med}</td>"
                         f"<td>{f.mean_critical_sigma:.4g}</td><td class=l><code>{escape(repr(f.common_wrong_text))}</code> ×{f.common_wrong_count}</td></tr>")
        parts.append("</table>")
    return Section("fragile", "Most fragile tokens", "".join(parts), "table")


def _trend_sections(points: Sequence[TrendPoint], noise: str) -> list[Section]:
    good = [p for p in sort_points(list(points)) if p.error is None and p.step is not None]
    series = []
    for kind, level in _LEVELS:
        measured = [(p.step, t.sigma) for p in good for t in [p.tolerance(level, kind)] if t is not None and t.sigma is not None]
        series.append(Series(f"σ at {level_name(level, kind)}", [m[0] for m in measured], [m[1] for m in measured]))
    chart = Chart(f"Tolerance through training ({noise} noise)", "training step", "σ", series)
    rows = ["<table><tr><th class=l rowspan=2>checkpoint</th><th rowspan=2>step</th><th class=l rowspan=2>step from</th>"
            "<th rowspan=2>accuracy at σ=0</th>" + _level_groups() + "<th class=l rowspan=2>problem</th></tr><tr>" + _level_heads() + "</tr>"]
    for p in sort_points(list(points)):
        tols = "".join(f"<td>{_tol(p.tolerance(level, kind))}</td>" for kind, level in _LEVELS)
        rows.append(f"<tr><td class=l>{escape(p.name)}</td><td>{'' if p.step is None else p.step}</td><td class=l>{p.step_source}</td>"
                    f"<td>{_pct(p.accuracy_at_zero)}</td>{tols}<td class=l>{escape(p.error or '')}</td></tr>")
    rows.append("</table>")
    return [Section("trend-plot", "Tolerance through training", figure(chart), "plot"),
            Section("trend-table", "Training-run table", "".join(rows), "table")]


def _provenance_section(sweeps: Sequence[SweepResult]) -> Section:
    rows = ["<table><tr><th class=l>checkpoint</th><th class=l>sha256</th><th class=l>noise</th><th>repeats</th><th>seed</th><th class=l>grid</th><th class=l>text sha256</th><th>tokens</th><th class=l>made</th></tr>"]
    for r in sweeps:
        p = r.provenance
        grid = ", ".join(f"{s:g}" for s in r.sigmas)
        rows.append(f"<tr><td class=l>{escape(r.codec_name)}</td><td class=l><code>{p['codec']['sha256']}</code></td><td class=l>{r.settings.noise}</td>"
                    f"<td>{r.settings.repeats}</td><td>{r.settings.seed}</td><td class=l>{grid}</td><td class=l><code>{r.chunks.text_sha256[:16]}…</code></td>"
                    f"<td>{r.chunks.num_tokens:,}</td><td class=l>{escape(p.get('created', ''))}, chunkscope {escape(p.get('version', ''))}, torch {escape(p.get('torch', ''))}</td></tr>")
    rows.append("</table>")
    return Section("provenance", "Provenance", "".join(rows), "table")


def figure(chart: Chart) -> str:
    """A chart as inline SVG with its provenance as a wrapping HTML caption."""
    caption, chart.caption = chart.caption, ""
    return f"<figure>{render(chart)}" + (f"<figcaption>{escape(caption)}</figcaption>" if caption else "") + "</figure>"


def build_report(
    sweeps: Sequence[SweepResult] = (),
    comparison: Comparison | None = None,
    trend_points: Sequence[TrendPoint] = (),
    trend_noise: str = DEFAULT_NOISE,
    title: str = "chunkscope report",
) -> str:
    """The report's HTML. Give sweeps of one noise model, or a comparison, and/or training-run points."""
    sections: list[Section] = []
    main = list(comparison.main_sweeps()) if comparison is not None else list(sweeps)
    if comparison is not None:
        sections.append(Section("tolerances", "Tolerances, absolute and data-scale", _tolerance_table_comparison(comparison), "table"))
    elif main:
        sections.append(Section("tolerances", "Tolerances", _tolerance_table_single(main), "table"))
    if main:
        sections.append(Section("accuracy", "Token accuracy against noise", figure(accuracy_chart(main)), "plot"))
        sections.append(Section("error-rate", "Error rate on a log axis", figure(error_chart(main)), "plot"))
        sections.append(Section("chunks", "Chunk exact match", figure(chunk_chart(main)), "plot"))
    if comparison is not None:
        other = comparison.isotropic if comparison.main_noise == "data-scale" else comparison.data_scale
        sections.append(Section("accuracy-other", f"Token accuracy under {other[0].settings.noise} noise", figure(accuracy_chart(other)), "plot"))
        sections.extend(_paired_sections(comparison))
    if main:
        sections.append(_fragile_section(main))
    if trend_points:
        sections.extend(_trend_sections(trend_points, trend_noise))
    prov_sweeps = main + (list(comparison.isotropic if comparison.main_noise == "data-scale" else comparison.data_scale) if comparison else [])
    prov_sweeps += [p.result for p in trend_points if p.result is not None]
    if prov_sweeps:
        sections.append(_provenance_section(prov_sweeps))
    if not sections:
        raise ValueError("a report needs at least one sweep, comparison or training-run point")
    made = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    contents = "".join(f'<li><a href="#{s.anchor}" data-kind="{s.kind}">{escape(s.title)}</a></li>' for s in sections)
    body = "".join(f'<section id="{s.anchor}" data-kind="{s.kind}"><h2>{escape(s.title)}</h2>{s.html}</section>' for s in sections)
    return (
        "<!DOCTYPE html>\n<html lang=en><head><meta charset=utf-8>"
        f"<title>{escape(title)}</title><style>{STYLE}</style></head><body>"
        f"<h1>{escape(title)}</h1><p class=muted>Made {made} by chunkscope {core.__version__}. Self-contained: every plot is inline SVG.</p>"
        f"<nav><ol id=contents>{contents}</ol></nav>{body}</body></html>\n"
    )
