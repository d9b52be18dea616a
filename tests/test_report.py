"""The HTML report and its figures: unique ids, resolved references, no outside links,
readable plots (no text on top of other text), honest axes, and the PDFs of --figures."""

from __future__ import annotations

import itertools
import json
import re
from collections import Counter
from html.parser import HTMLParser

import numpy as np
import pytest

from conftest import LookupCodec
from core.analyses.compare import compare_codecs
from core.cli import main
from core.codecs.contract import CodecSource, OpenedCodec
from core.engine.sweep import SweepSettings, run_sweep
from core.engine.text import chunk_text
from core.outputs.figures import Guide, Line, NamedFigure, ReportSection, histogram, line_plot, scatter, svg_markup
from core.outputs.report import build_report, render_report, report_sections

GRID = (0.0, 0.2, 0.4, 0.8, 1.2)
TEXT = ("Sleepers checked: 41 of 44. Fishplates: fine. The inspector walked the down line at dawn, "
        "noting each loose chair and every drain that held water after the night's rain.\n") * 3


@pytest.fixture(scope="module")
def comparison(tokenizer):
    a = OpenedCodec(LookupCodec(tokenizer, sharpness=20.0), CodecSource(sha256="ab" * 32))
    b = LookupCodec(tokenizer, sharpness=5.0)
    b.name = "soft"
    return compare_codecs([a, b], TEXT, sigmas=GRID, repeats=1)


class _Ids(HTMLParser):
    """Every id, every internal reference (href="#..", xlink:href="#..", url(#..)) and every outside one."""

    def __init__(self):
        super().__init__()
        self.ids: list[str] = []
        self.refs: list[str] = []
        self.outside: list[tuple[str, str, str]] = []

    def handle_starttag(self, tag, attrs):
        for key, value in attrs:
            value = value or ""
            if key == "id":
                self.ids.append(value)
            if key in ("href", "xlink:href", "src"):
                (self.refs.append(value[1:]) if value.startswith("#") else self.outside.append((tag, key, value)))
            self.refs += re.findall(r"url\(#([^)]+)\)", value)
        if tag in ("script", "link", "iframe", "img", "object", "embed"):
            self.outside.append((tag, "", ""))

    def handle_data(self, data):
        self.refs += re.findall(r"url\(#([^)]+)\)", data)  # inside <style>


def _parse(html: str) -> _Ids:
    parser = _Ids()
    parser.feed(html)
    parser.close()
    return parser


def test_compare_report_has_unique_ids_that_every_reference_finds(comparison):
    # HTML Living Standard, "the id attribute": unique in the element's tree; a duplicate makes
    # url(#id) resolve to whichever comes first (the collision of the old hand-made clip paths)
    html = build_report(comparison=comparison, title="Lab meeting")
    parsed = _parse(html)
    duplicated = [i for i, n in Counter(parsed.ids).items() if n > 1]
    assert duplicated == []
    assert parsed.refs and set(parsed.refs) <= set(parsed.ids)
    clip_refs = [r for r in parsed.refs if html.count(f'clip-path="url(#{r})"')]
    assert len(clip_refs) >= 5  # five plots clip their lines: each to its own path
    assert parsed.outside == []
    assert "http://" not in html.replace('xmlns="http://www.w3.org/2000/svg"', "").replace(
        'xmlns:xlink="http://www.w3.org/1999/xlink"', "")  # namespaces name, they do not link
    assert "<!DOCTYPE svg" not in html and "<?xml" not in html  # one document, one doctype


def test_figures_draw_text_as_paths_and_the_same_figure_gives_the_same_svg(comparison):
    sections = report_sections(comparison=comparison)
    figures = [f for s in sections for f in s.figures]
    assert len(figures) == 5
    names = [f.name for f in figures]
    assert len(set(names)) == len(names)
    assert "compare-accuracy-data-scale" in names and "compare-accuracy-isotropic" in names
    svg = svg_markup(figures[0].figure, "x")
    assert "<text" not in svg and "<use" in svg  # svg.fonttype "path": glyphs defined once, used per character
    assert svg == svg_markup(figures[0].figure, "x")  # svg.hashsalt fixed: reproducible output
    assert set(re.findall(r' id="([^"]+)"', svg)) == {"x"} | {i for i in re.findall(r' id="([^"]+)"', svg) if i.startswith("x-")}


def _texts(fig):
    """Window extents of every text a drawn figure shows: title, axis labels, the tick labels of
    ticks in view, legend entries and notes beside the frame."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig).draw()
    renderer = fig.canvas.get_renderer()
    texts = list(fig.texts) + [t for legend in fig.legends for t in legend.get_texts()]
    for ax in fig.axes:
        texts += [ax.title, ax._left_title, ax._right_title, ax.xaxis.label, ax.yaxis.label] + ax.texts
        for axis in (ax.xaxis, ax.yaxis):
            lo, hi = sorted(axis.get_view_interval())
            texts += [t.label1 for t in axis.get_major_ticks() if lo - 1e-12 <= t.get_loc() <= hi + 1e-12]
    return [(t.get_text(), t.get_window_extent(renderer)) for t in texts if t.get_visible() and t.get_text().strip()]


def _overlaps(items):
    return [(a, b) for (a, ba), (b, bb) in itertools.combinations(items, 2) if ba.overlaps(bb)]


def test_no_text_of_any_report_figure_lies_on_another(comparison):
    # common practice (and the issue's own finding): two "99 %" labels printed on each other
    # are unreadable; each label's box must be clear of every other label's box
    for section in report_sections(comparison=comparison):
        for fig in section.figures:
            assert _overlaps(_texts(fig.figure)) == [], fig.name


def test_close_reference_lines_keep_their_labels_apart():
    fig = line_plot("levels", "σ", "accuracy", [Line("a", [0, 1], [1.0, 0.0])],
                    hlines=[Guide(0.999, "99.9 %"), Guide(0.99, "99 %"), Guide(0.9, "90 %")], fraction_y=True)
    labels = [(t, b) for t, b in _texts(fig) if t.endswith("%") and t[0] == "9"]
    assert len(labels) == 3
    assert _overlaps(labels) == []


def test_a_flat_zero_series_gets_a_readable_span_and_fractions_run_0_to_1():
    # a difference of exactly zero everywhere: at least the asked span, centred on 0
    fig = line_plot("diff", "σ", "points", [Line("d", [0, 0.5, 1], [0.0, 0.0, 0.0])], min_span=2.0)
    lo, hi = fig.axes[0].get_ylim()
    assert lo <= -1.0 and hi >= 1.0 and abs(lo + hi) < 1e-9
    fig = line_plot("flat", "σ", "points", [Line("d", [0, 1], [0.0, 0.0])])
    lo, hi = fig.axes[0].get_ylim()
    assert lo <= -0.5 and hi >= 0.5  # no min_span: 1 around zero, not matplotlib's ±0.055
    fig = line_plot("chunks", "σ", "rate", [Line("c", [0, 1], [0.0, 0.0])], fraction_y=True)
    lo, hi = fig.axes[0].get_ylim()
    assert lo < 0 < 1 < hi and hi - lo < 1.1  # the whole 0..1 range, little margin


def test_end_points_stay_off_the_frame():
    steps, sigmas = [100, 400, 1600, 6400], [0.0, 0.1, 0.3, 0.5]  # a "fails at 0" is drawn at σ = 0
    fig = line_plot("trend", "step", "σ", [Line("t", steps, sigmas)], logx=True)
    ax = fig.axes[0]
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    assert x0 < min(steps) and x1 > max(steps) and y0 < min(sigmas) and y1 > max(sigmas)


def test_histogram_counts_are_numpys():
    values = np.random.default_rng(3).lognormal(size=500)
    fig = histogram("h", "σ", {"a": list(values) + [float("inf")]}, bins=12, logx=True)
    ax = fig.axes[0]
    edges = np.geomspace(values.min(), values.max(), 13)
    expected, _ = np.histogram(values, edges)  # numpy.histogram: the reference count per bin
    step = [p for p in ax.patches if p.get_fill() is False][0]
    heights = step.get_path().vertices[:, 1]
    assert sorted(set(np.round(heights[heights > 0]).astype(int))) == sorted(set(expected[expected > 0]))
    assert any("1 not drawn" in t.get_text() for t in fig.legends[0].get_texts())  # the inf is counted, not hidden


def test_scatter_diagonal_spans_the_points():
    fig = scatter("s", "measured", "predicted", {"a": ([0.1, 0.4, 0.9], [0.2, 0.3, 1.1])})
    diagonal = [line for line in fig.axes[0].lines if line.get_label() == "y = x"][0]
    assert list(diagonal.get_xdata()) == list(diagonal.get_ydata()) == [0.1, 1.1]
    assert fig.axes[0].get_xlim() == fig.axes[0].get_ylim()  # one scale on both axes: y = x at 45 degrees


def test_an_extra_section_is_rendered_in_order_before_the_provenance(lookup_codec):
    result = run_sweep(lookup_codec, chunk_text(TEXT, lookup_codec), SweepSettings(sigmas=GRID, repeats=1, noise="isotropic"))
    extra = ReportSection("worst", "Worst-case", html="<p id=before>first</p>", html_after="<p id=after>last</p>",
                          figures=[NamedFigure("worst-sigma", histogram("w", "σ", {"a": [0.1, 0.2, 0.2, 0.5]}))])
    html = build_report(sweeps=[result], extra_sections=[extra])
    order = [html.index(k) for k in ('id="fragile"', 'id="worst"', "id=before", 'data-name="worst-sigma"', "id=after", 'id="provenance"')]
    assert order == sorted(order)
    with pytest.raises(ValueError, match="anchor"):
        build_report(sweeps=[result], extra_sections=[ReportSection("fragile", "again")])
    with pytest.raises(ValueError, match="lower-case"):
        NamedFigure("Worst Sigma", None)


def test_provenance_table_is_fixed_width_and_hashes_wrap(comparison):
    html = build_report(comparison=comparison)
    table = html[html.index('id="provenance"'):]
    assert "<table class=prov>" in table and "table.prov{table-layout:fixed;width:100%}" in html
    assert "code.hash{word-break:break-all" in html and table.count("<code class=hash>") == 2 * 4
    assert "5 values" not in table and "0, 0.2, 0.4, 0.8, 1.2" in table  # a short grid in full
    assert "white-space:nowrap" in html and "<td class=t>fails at 0</td>" not in table


# ---- chunkscope report --figures ---------------------------------------------------------

ARGS = ["--sigmas", "0,0.2,0.5,1", "--repeats", "1", "--quiet"]


@pytest.fixture()
def checkpoints(small_codec, tmp_path):
    from core.codecs.checkpoint import save_codec

    paths = [tmp_path / "a.safetensors", tmp_path / "b.safetensors"]
    for p in paths:
        save_codec(small_codec, p)
    text = tmp_path / "t.txt"
    text.write_text(TEXT, encoding="utf-8")
    return paths, text


def test_report_figures_are_one_pdf_each_and_never_overwritten_without_force(checkpoints, tmp_path, capsys):
    (a, b), text = checkpoints
    out, figures = tmp_path / "r.html", tmp_path / "figs"
    assert main(["report", str(a), str(b), "--text", str(text), "--out", str(out), "--figures", str(figures)] + ARGS) == 0
    html = out.read_text(encoding="utf-8")
    names = re.findall(r'<figure data-name="([^"]+)"', html)
    pdfs = sorted(p.name for p in figures.glob("*.pdf"))
    assert len(names) == 5 and pdfs == sorted(f"{n}.pdf" for n in names)
    for pdf in figures.glob("*.pdf"):
        assert pdf.read_bytes()[:5] == b"%PDF-"  # ISO 32000-1, 7.5.2: a PDF file begins with its header %PDF-n.m
    index = json.loads((figures / "figures.json").read_text(encoding="utf-8"))
    assert sorted(f["file"] for f in index["figures"]) == pdfs and all(f["caption"] for f in index["figures"])
    before = {p.name: p.read_bytes() for p in figures.iterdir()}
    out.write_text("<!DOCTYPE html><p>old</p>", encoding="utf-8")
    capsys.readouterr()
    assert main(["report", str(a), "--text", str(text), "--out", str(tmp_path / "new.html"), "--figures", str(figures)] + ARGS) == 2
    err = capsys.readouterr().err
    assert f"{figures} already exists" in err and "choose another --figures" in err
    assert {p.name: p.read_bytes() for p in figures.iterdir()} == before
    assert not (tmp_path / "new.html").exists()  # refused before any work: neither output written
    assert main(["report", str(a), "--text", str(text), "--out", str(out), "--figures", str(figures), "--force"] + ARGS) == 0
    names = re.findall(r'<figure data-name="([^"]+)"', out.read_text(encoding="utf-8"))
    assert len(names) == 3 and all(n.startswith("sweep-") and n.endswith("-data-scale") for n in names)
    assert sorted(p.name for p in figures.glob("*.pdf")) == sorted(f"{n}.pdf" for n in names)  # the old set is gone


def test_report_figures_refuse_a_folder_the_tool_did_not_write(checkpoints, tmp_path, capsys):
    (a, _), text = checkpoints
    figures = tmp_path / "mine"
    figures.mkdir()
    (figures / "notes.txt").write_text("keep me", encoding="utf-8")
    assert main(["report", str(a), "--text", str(text), "--out", str(tmp_path / "r.html"), "--figures", str(figures), "--force"] + ARGS) == 2
    assert "did not write" in capsys.readouterr().err
    assert (figures / "notes.txt").read_text(encoding="utf-8") == "keep me" and not (tmp_path / "r.html").exists()


def test_training_run_figure_reads_cleanly_and_its_table_keeps_statuses_on_one_line():
    from core.analyses.trend import TrendPoint
    from core.engine.tolerance import tolerances_of

    sigmas = [0.0, 0.1, 0.2, 0.4, 0.8]
    points = []
    for step, acc in [(100, [0.98, 0.97, 0.9, 0.5, 0.1]), (800, [0.995, 0.99, 0.97, 0.8, 0.3]), (6400, [0.998, 0.997, 0.99, 0.9, 0.5])]:
        absolute, loss = tolerances_of(sigmas, acc, tokens=10_000)
        points.append(TrendPoint(f"run/s{step}.safetensors", f"s{step}", step, "card", accuracy_at_zero=acc[0],
                                 tolerances=absolute, loss_tolerances=loss, latent_rms=1.0))
    sections = report_sections(trend_points=points)
    (fig,) = [f for s in sections for f in s.figures]
    assert fig.name == "trend-tolerance-data-scale"
    assert _overlaps(_texts(fig.figure)) == []
    ax = fig.figure.axes[0]
    assert ax.get_xscale() == "log"  # steps over more than a decade (a doubling schedule)
    x0, x1 = ax.get_xlim()
    ys = [y for line in ax.lines for y in line.get_ydata()]
    assert x0 < 100 and x1 > 6400 and ax.get_ylim()[0] < min(ys)  # no point on the frame
    html = render_report(sections)
    assert "<td class=t>fails at 0</td>" in html and "td.t,td.n{white-space:nowrap}" in html


def test_log_axes_label_ticks_as_plain_numbers():
    # common practice: one number style per axis; matplotlib's default log labels are
    # mathtext powers ("$\mathdefault{10^{-1}}$") beside "2×10^-3" minor labels
    fig = histogram("h", "σ", {"a": list(np.random.default_rng(1).lognormal(-1, 0.6, 300))}, logx=True)
    texts = [t for t, _ in _texts(fig)]
    assert not any("$" in t or "×" in t for t in texts)
    assert "0.1" in texts and "1" in texts
    fig = line_plot("e", "σ", "error", [Line("x", [0, 1], [0.002, 0.004])], logy=True, percent_y=True)
    ticks = [t.get_text() for t in fig.axes[0].get_yticklabels(which="both") if t.get_text()]
    assert ticks and all(t.endswith(" %") for t in ticks)
