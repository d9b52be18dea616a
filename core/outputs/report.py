"""One self-contained HTML report: inline SVG plots, tables, tests, fragile tokens, provenance.

No script, no stylesheet link, no image file: it opens in any browser offline. The plots
are matplotlib figures (core.outputs.figures), inline as SVG with ids unique in the page;
`save_report_figures` also writes each one as a PDF under its stable name.

The report is a list of `ReportSection`s rendered in order (`report_sections` builds the
standard ones, `render_report` writes the page); an analysis adds its own section with
`build_report(..., extra_sections=[...])`, placed before the provenance.
"""

from __future__ import annotations

import json
import math
import re
from datetime import datetime, timezone
from html import escape
from pathlib import Path
from typing import Sequence

import core
from core.analyses.compare import ALPHA, SIGNIFICANT, Comparison
from core.analyses.tokens import fragile_types
from core.analyses.trend import TrendPoint, sort_points
from core.engine.noise import NOISE_MODELS
from core.engine.sweep import DEFAULT_NOISE, SweepResult
from core.engine.tolerance import (
    ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, level_name, level_percent, resolution_note,
    UNRESOLVABLE, status_notes, tolerance_text,
)
from core.outputs.files import result_folder
from core.outputs.figures import HEIGHT, PALETTE, Guide, Line, NamedFigure, ReportSection, line_plot, save_figure, svg_markup

__all__ = ["ReportSection", "NamedFigure", "build_report", "report_sections", "render_report", "save_report_figures",
           "provenance_caption", "FIGURES_MARKER", "FIGURES_FOLDER"]

STYLE = """
body{font-family:"DejaVu Sans",Helvetica,Arial,sans-serif;color:#22262b;margin:28px auto;max-width:980px;padding:0 14px;line-height:1.45;font-size:14px}
h1{font-size:22px;margin-bottom:4px}h2{font-size:17px;border-bottom:1px solid #d5d9de;padding-bottom:3px;margin-top:30px}h3{font-size:14.5px;margin:14px 0 4px}
table{border-collapse:collapse;margin:8px 0 14px;font-size:12.5px}th,td{border:1px solid #d5d9de;padding:3px 7px;text-align:right;vertical-align:top}
th{background:#f1f3f5;font-weight:600}td.l,th.l{text-align:left}td.t,td.n{white-space:nowrap}
.muted{color:#6b727b}.warn{background:#fff4e0;border-left:4px solid #c2571a;padding:6px 10px}
section{overflow-x:auto}figure{margin:10px 0 18px}figure svg{display:block}figcaption{color:#6b727b;font-size:12px;overflow-wrap:anywhere}
code{font-size:12px}.sig{font-weight:bold;color:#8a3b76}
table.prov{table-layout:fixed;width:100%}table.prov td{text-align:left;overflow-wrap:anywhere}
code.hash{word-break:break-all;font-size:11.5px}
"""

FIGURES_MARKER = "figures.json"  # what `save_report_figures` writes beside the PDFs: a folder holding it is ours
FIGURES_FOLDER = result_folder(FIGURES_MARKER)


def _pct(x: float | None, digits: int = 3) -> str:
    return "—" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{100 * x:.{digits}f} %"


def _tol(t) -> str:
    return escape(tolerance_text(t))


def _tol_cells(tolerances) -> str:
    return "".join(f"<td class=t>{_tol(t)}</td>" for t in tolerances)


def _slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-") or "model"


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


def _sigma_label(noise: str) -> str:
    return NOISE_MODELS[noise].axis_label


# ---- figures -----------------------------------------------------------------------------

def accuracy_figure(sweeps: Sequence[SweepResult], title: str = "Token accuracy"):
    """Accuracy against σ with Wilson 95 % bands; the 99 % tolerance of each model as a
    dashed vertical line in its colour, named in the legend (never as text on the plot)."""
    noise = sweeps[0].settings.noise
    marked = TOLERANCE_LEVELS[1]
    lines, guides = [], []
    for i, r in enumerate(sweeps):
        color = PALETTE[i % len(PALETTE)]
        lines.append(Line(r.codec_name, r.sigmas, [c.token_accuracy for c in r.curves], color=color,
                          band=([c.accuracy_low for c in r.curves], [c.accuracy_high for c in r.curves])))
        t = r.tolerance(marked)
        if t.found:
            guides.append(Guide(t.sigma, f"{r.codec_name}: {level_percent(marked)} at σ = {t.sigma:.3g}", color))
    return line_plot(f"{title} ({noise} noise, Wilson 95 % band)", _sigma_label(noise), "token accuracy", lines,
                     vlines=guides, hlines=[Guide(level, level_percent(level)) for level in TOLERANCE_LEVELS[1:]],
                     fraction_y=True, percent_y=True)


def zero_error_floor(sweeps: Sequence[SweepResult]) -> float:
    """Where a zero error rate is drawn on the log axis: half an error in the largest count."""
    return min(0.5 / max(c.tokens, 1) for r in sweeps for c in r.curves)


def error_figure(sweeps: Sequence[SweepResult], floor: float):
    noise = sweeps[0].settings.noise
    lines = [Line(r.codec_name, r.sigmas, [max(1 - c.token_accuracy, floor) for c in r.curves]) for r in sweeps]
    guides = [Guide(1 - level, f"{level_percent(level)} level") for level in TOLERANCE_LEVELS]
    return line_plot(f"Token error rate, log scale ({noise} noise)", _sigma_label(noise), "1 − token accuracy", lines,
                     logy=True, hlines=guides, percent_y=True)


def chunk_figure(sweeps: Sequence[SweepResult]):
    noise = sweeps[0].settings.noise
    lines = [Line(r.codec_name, r.sigmas, [c.chunk_exact_rate for c in r.curves]) for r in sweeps]
    return line_plot(f"Chunk exact match ({noise} noise)", _sigma_label(noise), "chunks decoded exactly", lines,
                     fraction_y=True, percent_y=True)


def difference_figure(p, noise: str):
    """B − A in accuracy points per σ; the significant σ as points. A flat zero curve gets ±1 point."""
    xs = [r.sigma for r in p.rows]
    diff = [100 * r.difference for r in p.rows]
    sig = [100 * r.difference if r.pvalue < ALPHA else float("nan") for r in p.rows]
    return line_plot(f"Accuracy difference {p.name_b} − {p.name_a} (per {p.unit})", _sigma_label(noise),
                     "difference (points)", [Line("difference", xs, diff, color=PALETTE[0]),
                                             Line(f"{SIGNIFICANT} (McNemar)", xs, sig, color=PALETTE[3], line=False)],
                     hlines=[Guide(0.0, "no difference")], min_span=2.0)


def trend_figure(points: Sequence[TrendPoint], noise: str):
    """Each tolerance against training step; log steps when they span more than a decade."""
    good = [p for p in sort_points(list(points)) if p.error is None and p.step is not None]
    lines = []
    for kind, level in _LEVELS:
        measured = [(p.step, t.sigma) for p in good for t in [p.tolerance(level, kind)] if t is not None and t.sigma is not None]
        index = (TOLERANCE_LEVELS if kind == ABSOLUTE else LOSS_LEVELS).index(level)
        lines.append(Line(level_name(level, kind), [m[0] for m in measured], [m[1] for m in measured],
                          color=PALETTE[index], dashed=kind == LOSS))
    steps = [p.step for p in good]
    logx = bool(steps) and min(steps) > 0 and max(steps) / min(steps) >= 10
    return line_plot(f"Tolerance through training ({noise} noise)", "training step" + (" (log scale)" if logx else ""),
                     f"σ at the tolerance ({NOISE_MODELS[noise].unit})", lines, logx=logx, height=HEIGHT + 0.7)  # room for the legend below


# ---- tables ------------------------------------------------------------------------------

def _tolerance_table_single(sweeps: Sequence[SweepResult]) -> str:
    rows = ["<table><tr><th class=l rowspan=2>checkpoint</th><th rowspan=2>accuracy at σ=0</th>" + _level_groups()
            + "<th rowspan=2>latent RMS</th><th class=l rowspan=2>noise</th></tr><tr>" + _level_heads() + "</tr>"]
    for r in sweeps:
        tols = _tol_cells(r.tolerance(level, kind) for kind, level in _LEVELS)
        rows.append(f"<tr><td class=l>{escape(r.codec_name)}</td><td class=n>{_pct(r.accuracy_at_zero)}</td>{tols}"
                    f"<td>{r.latent_rms:.4g}</td><td class=l>{r.settings.noise}</td></tr>")
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
    """One table per noise model (twelve tolerance columns side by side do not fit a page)."""
    parts = [f"<p class=warn>{escape(comparison.scale_warning)}</p>" if comparison.scale_warning else ""]
    for noise in ("data-scale", "isotropic"):
        unit = NOISE_MODELS[noise].unit
        parts.append(f"<h3>{escape(unit)} ({noise} noise)</h3>"
                     "<table><tr><th class=l rowspan=2>checkpoint</th><th rowspan=2>accuracy at σ=0</th><th rowspan=2>latent RMS</th>"
                     + _level_groups() + "</tr><tr>" + _level_heads() + "</tr>")
        for t in comparison.tolerances:
            cells = _tol_cells(t.data_scale + t.data_scale_loss if noise == "data-scale" else t.absolute + t.absolute_loss)
            parts.append(f"<tr><td class=l>{escape(t.name)}</td><td class=n>{_pct(t.accuracy_at_zero)}</td>"
                         f"<td>{t.latent_rms:.4g}</td>{cells}</tr>")
        parts.append("</table>")
    return "".join(parts) + _tolerance_notes(comparison.isotropic + comparison.data_scale)


def _paired_sections(comparison: Comparison, kind: str) -> list[ReportSection]:
    out = []
    caption = provenance_caption(comparison.main_sweeps())
    for i, p in enumerate(comparison.paired):
        out.append(ReportSection(f"diff-{i}", f"Difference curve: {p.name_b} vs {p.name_a}", figures=[NamedFigure(
            f"{kind}-difference-{_slug(p.name_b)}-vs-{_slug(p.name_a)}", difference_figure(p, comparison.main_noise),
            caption + f"; paired on repeat 0 per {p.unit}")]))
        rows = [f"<p class=muted>Paired on repeat 0 of each sweep, per {p.unit}. McNemar's test: exact binomial when fewer than 25 discordant pairs, "
                "else chi-square with continuity correction." + (" Characters of one token are not independent, so these p-values are optimistic." if p.unit == "character" else "") + "</p>",
                f"<table><tr><th>σ</th><th>{escape(p.name_a)}</th><th>{escape(p.name_b)}</th><th>difference (points)</th><th>only {escape(p.name_a)} right</th>"
                f"<th>only {escape(p.name_b)} right</th><th>statistic</th><th>p</th><th class=l>test</th></tr>"]
        for r in p.rows:
            cls = " class=sig" if r.pvalue < ALPHA else ""
            rows.append(f"<tr><td>{r.sigma:.4g}</td><td class=n>{_pct(r.accuracy_a)}</td><td class=n>{_pct(r.accuracy_b)}</td><td{cls}>{100 * r.difference:+.3f}</td>"
                        f"<td>{r.a_only}</td><td>{r.b_only}</td><td>{r.statistic:.4g}</td><td{cls}>{r.pvalue:.3g}</td><td class=l>{r.method}</td></tr>")
        rows.append("</table>")
        out.append(ReportSection(f"tests-{i}", f"Paired tests: {p.name_b} vs {p.name_a}", "".join(rows)))
    return out


def _fragile_section(sweeps: Sequence[SweepResult], top: int = 15) -> ReportSection:
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
    return ReportSection("fragile", "Most fragile tokens", "".join(parts))


def _trend_sections(points: Sequence[TrendPoint], noise: str) -> list[ReportSection]:
    rows = ["<table><tr><th class=l rowspan=2>checkpoint</th><th rowspan=2>step</th><th class=l rowspan=2>step from</th>"
            "<th rowspan=2>accuracy at σ=0</th>" + _level_groups() + "<th class=l rowspan=2>problem</th></tr><tr>" + _level_heads() + "</tr>"]
    for p in sort_points(list(points)):
        tols = _tol_cells(p.tolerance(level, kind) for kind, level in _LEVELS)
        rows.append(f"<tr><td class=l>{escape(p.name)}</td><td>{'' if p.step is None else p.step}</td><td class=l>{p.step_source}</td>"
                    f"<td class=n>{_pct(p.accuracy_at_zero)}</td>{tols}<td class=l>{escape(p.error or '')}</td></tr>")
    rows.append("</table>")
    results = [p.result for p in points if p.result is not None]
    caption = provenance_caption(results) if results else ""
    return [ReportSection("trend-plot", "Tolerance through training",
                          figures=[NamedFigure(f"trend-tolerance-{noise}", trend_figure(points, noise), caption)]),
            ReportSection("trend-table", "Training-run table", "".join(rows))]


def _grid_text(sigmas: Sequence[float]) -> str:
    """A σ grid in one short line: its size and ends (the full list is one hover away)."""
    if len(sigmas) <= 6:
        return ", ".join(f"{s:g}" for s in sigmas)
    positive = [s for s in sigmas if s > 0]
    zero = "0, then " if len(positive) < len(sigmas) else ""
    return f"{len(sigmas)} values: {zero}{positive[0]:.4g} … {positive[-1]:.4g}"


def _made_text(p: dict) -> str:
    created = str(p.get("created", ""))
    try:
        created = datetime.fromisoformat(created).astimezone(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    except ValueError:
        pass
    versions = " · ".join(f"{name} {escape(str(p[key]))}" for name, key in (("chunkscope", "version"), ("torch", "torch")) if p.get(key))
    return f"{escape(created)}<br><span class=muted>{versions}</span>"


def _provenance_section(sweeps: Sequence[SweepResult]) -> ReportSection:
    """One row per sweep; a fixed layout, so long hashes wrap inside their cells, never off the page."""
    cols = (("checkpoint", 13), ("sha256", 22), ("noise, repeats, seed", 15), ("σ grid", 15), ("text", 19), ("made", 16))
    rows = ["<table class=prov><colgroup>" + "".join(f'<col style="width:{w}%">' for _, w in cols) + "</colgroup><tr>"
            + "".join(f"<th class=l>{escape(c)}</th>" for c, _ in cols) + "</tr>"]
    for r in sweeps:
        p = r.provenance
        full_grid = ", ".join(f"{s:g}" for s in r.sigmas)
        rows.append(f"<tr><td>{escape(r.codec_name)}</td><td><code class=hash>{p['codec']['sha256']}</code></td>"
                    f"<td>{r.settings.noise}<br>{r.settings.repeats} repeats, seed {r.settings.seed}</td>"
                    f'<td title="{escape(full_grid)}">{escape(_grid_text(r.sigmas))}</td>'
                    f"<td>{r.chunks.num_tokens:,} tokens<br><code class=hash>{r.chunks.text_sha256}</code></td>"
                    f"<td>{_made_text(p)}</td></tr>")
    rows.append("</table>")
    return ReportSection("provenance", "Provenance", "".join(rows))


# ---- the report --------------------------------------------------------------------------

def _sweep_figures(sweeps: Sequence[SweepResult], kind: str, title: str = "Token accuracy") -> list[NamedFigure]:
    noise = sweeps[0].settings.noise
    subject = f"{_slug(sweeps[0].codec_name)}-" if kind == "sweep" and len(sweeps) == 1 else ""
    caption = provenance_caption(sweeps)
    return [NamedFigure(f"{kind}-accuracy-{subject}{noise}", accuracy_figure(sweeps, title), caption)]


def report_sections(
    sweeps: Sequence[SweepResult] = (),
    comparison: Comparison | None = None,
    trend_points: Sequence[TrendPoint] = (),
    trend_noise: str = DEFAULT_NOISE,
    extra_sections: Sequence[ReportSection] = (),
) -> list[ReportSection]:
    """The report's sections in order: tolerances, plots, tests, fragile tokens, training run,
    `extra_sections`, provenance. Give sweeps of one noise model, or a comparison, and/or points."""
    sections: list[ReportSection] = []
    main = list(comparison.main_sweeps()) if comparison is not None else list(sweeps)
    kind = "compare" if comparison is not None else "sweep"
    if comparison is not None:
        sections.append(ReportSection("tolerances", "Tolerances, absolute and data-scale", _tolerance_table_comparison(comparison)))
    elif main:
        sections.append(ReportSection("tolerances", "Tolerances", _tolerance_table_single(main)))
    if main:
        noise = main[0].settings.noise
        subject = f"{_slug(main[0].codec_name)}-" if kind == "sweep" and len(main) == 1 else ""
        caption = provenance_caption(main)
        floor = zero_error_floor(main)
        sections.append(ReportSection("accuracy", "Token accuracy against noise", figures=_sweep_figures(main, kind)))
        sections.append(ReportSection("error-rate", "Error rate on a log axis", figures=[NamedFigure(
            f"{kind}-error-rate-{subject}{noise}", error_figure(main, floor),
            caption + (f"; zero errors drawn at {floor:.1e}" if any(c.token_accuracy >= 1 for r in main for c in r.curves) else ""))]))
        sections.append(ReportSection("chunks", "Chunk exact match", figures=[NamedFigure(
            f"{kind}-chunk-match-{subject}{noise}", chunk_figure(main), caption)]))
    if comparison is not None:
        other = comparison.isotropic if comparison.main_noise == "data-scale" else comparison.data_scale
        sections.append(ReportSection("accuracy-other", f"Token accuracy under {other[0].settings.noise} noise",
                                      figures=_sweep_figures(other, kind)))
        sections.extend(_paired_sections(comparison, kind))
    if main:
        sections.append(_fragile_section(main))
    if trend_points:
        sections.extend(_trend_sections(trend_points, trend_noise))
    sections.extend(extra_sections)
    prov_sweeps = main + (list(comparison.isotropic if comparison.main_noise == "data-scale" else comparison.data_scale) if comparison else [])
    prov_sweeps += [p.result for p in trend_points if p.result is not None]
    if prov_sweeps:
        sections.append(_provenance_section(prov_sweeps))
    if not sections:
        raise ValueError("a report needs at least one sweep, comparison or training-run point")
    return sections


def _unique_figure_names(sections: Sequence[ReportSection]) -> None:
    """Two figures of one report never share a name (two models with one name: -2, -3 ...)."""
    seen: set[str] = set()
    for section in sections:
        for fig in section.figures:
            name, n = fig.name, 1
            while name in seen:
                n += 1
                name = f"{fig.name}-{n}"
            fig.name = name
            seen.add(name)


def _figure_html(fig: NamedFigure, title: str) -> str:
    caption = f"<figcaption>{escape(fig.caption)}</figcaption>" if fig.caption else ""
    return f'<figure data-name="{escape(fig.name)}">{svg_markup(fig.figure, "fig-" + fig.name, title)}{caption}</figure>'


def render_report(sections: Sequence[ReportSection], title: str = "chunkscope report") -> str:
    """The sections as one HTML page. Anchors must be unique; figure names are made unique."""
    anchors = [s.anchor for s in sections]
    if len(set(anchors)) != len(anchors):
        raise ValueError(f"two report sections share an anchor: {sorted(a for a in anchors if anchors.count(a) > 1)[0]}")
    _unique_figure_names(sections)
    made = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    contents = "".join(f'<li><a href="#{escape(s.anchor)}" data-kind="{s.section_kind}">{escape(s.title)}</a></li>' for s in sections)
    body = "".join(
        f'<section id="{escape(s.anchor)}" data-kind="{s.section_kind}"><h2>{escape(s.title)}</h2>{s.html}'
        + "".join(_figure_html(f, s.title) for f in s.figures) + f"{s.html_after}</section>"
        for s in sections
    )
    return (
        "<!DOCTYPE html>\n<html lang=en><head><meta charset=utf-8><meta name=viewport content=\"width=device-width\">"
        f"<title>{escape(title)}</title><style>{STYLE}</style></head><body>"
        f"<h1>{escape(title)}</h1><p class=muted>Made {made} by chunkscope {core.__version__}. Self-contained: every plot is inline SVG.</p>"
        f"<nav><ol id=contents>{contents}</ol></nav>{body}</body></html>\n"
    )


def build_report(
    sweeps: Sequence[SweepResult] = (),
    comparison: Comparison | None = None,
    trend_points: Sequence[TrendPoint] = (),
    trend_noise: str = DEFAULT_NOISE,
    title: str = "chunkscope report",
    extra_sections: Sequence[ReportSection] = (),
) -> str:
    """The report's HTML. Give sweeps of one noise model, or a comparison, and/or training-run points."""
    return render_report(report_sections(sweeps, comparison, trend_points, trend_noise, extra_sections), title)


def save_report_figures(sections: Sequence[ReportSection], folder: Path, title: str = "") -> list[Path]:
    """Every figure of the sections as folder/<name>.pdf, and figures.json naming each with its
    caption. `folder` is written as is: callers stage it (core.outputs.files.Outputs)."""
    _unique_figure_names(sections)
    folder = Path(folder)
    written, index = [], []
    for section in sections:
        for fig in section.figures:
            path = folder / f"{fig.name}.pdf"
            save_figure(fig.figure, path, fig.caption)
            written.append(path)
            index.append({"file": path.name, "section": section.title, "caption": fig.caption})
    (folder / FIGURES_MARKER).write_text(json.dumps({"report": title, "chunkscope": core.__version__, "figures": index},
                                                    indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    return written
