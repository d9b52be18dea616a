"""The compare and training-run panels, plot export and the report/workspace actions (offscreen)."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import xml.etree.ElementTree as ET

import numpy as np
import pyqtgraph as pg
import pytest
import torch
from PySide6.QtGui import QColor, QImage, QTextCursor

from conftest import FIXTURE_TEXT, LookupCodec
from core.codecs.contract import CodecSource, OpenedCodec
from core.codecs.checkpoint import Codec, save_codec
from core.analyses.compare import compare_codecs
from core.errors import ChunkscopeError
from core.codecs.model import ChunkMLPConfig, build_model
from core.engine.sweep import SweepSettings, run_sweep
from core.engine.text import chunk_text
from core.codecs.tokenizer import train_byte_bpe

GRID = (0.0, 0.3, 0.6, 1.0, 1.6)


def _lookup(tokenizer, name, **kwargs):
    codec = LookupCodec(tokenizer, **kwargs)
    return OpenedCodec(codec, CodecSource(sha256=(name.encode().hex() + "0" * 64)[:64]), name=name)


@pytest.fixture()
def compare_panel(qtbot):
    from app.panel_compare import ComparePanel

    panel = ComparePanel()
    qtbot.addWidget(panel)
    panel.resize(1400, 900)
    yield panel
    panel.runner.shutdown()


@pytest.fixture()
def two_codecs(tokenizer):
    return _lookup(tokenizer, "sharp", sharpness=20.0), _lookup(tokenizer, "soft", sharpness=6.0, seed=4)


def test_reference_is_the_first_opened_until_the_user_picks_one(compare_panel, two_codecs):
    # checkpoints finish loading in any order; A follows the opening order unless the user chose A
    panel = compare_panel
    sharp, soft = two_codecs
    panel.set_inputs([soft], FIXTURE_TEXT, "fixture")  # "soft" finished loading first
    panel.set_inputs([sharp, soft], FIXTURE_TEXT, "fixture")
    assert panel.reference.currentText() == "sharp"
    panel.reference.setCurrentIndex(1)
    panel.reference.activated.emit(1)  # what a user's choice in the box sends
    panel.set_inputs([sharp, soft], FIXTURE_TEXT + "more", "fixture")
    assert panel.reference.currentText() == "soft"


def test_compare_panel_runs_and_its_table_holds_the_comparisons_numbers(compare_panel, two_codecs, qtbot):
    from app.panel_compare_table import tolerance_label

    panel = compare_panel
    panel.set_inputs(list(two_codecs), FIXTURE_TEXT, "fixture")
    panel.restore({"start": 0.2, "stop": 1.6, "points": 4, "spacing": "log", "zero": True, "repeats": 1, "seed": 1})
    with qtbot.waitSignal(panel.comparison_ready, timeout=30_000) as ready:
        assert panel.run()
    comparison = ready.args[0]
    assert panel.comparison is comparison and comparison.names == ["sharp", "soft"]
    assert not panel.is_running() and not panel.cancel_button.isEnabled()
    table = panel.table
    assert table.columnCount() == 2
    for j, row in enumerate(comparison.tolerances):
        assert row.name in table.horizontalHeaderItem(j).text()
        assert table.item(0, j).text() == row.sha256[:8]  # the 8-digit short form the checkpoint list shows
        assert row.sha256 in table.item(0, j).toolTip()  # the full hash one hover away
        assert table.item(1, j).text() == f"{row.latent_rms:.4g}"
        assert table.item(2, j).text().startswith(f"{row.accuracy_at_zero * 100:.3f}")
        groups = {("isotropic", "absolute"): row.absolute, ("isotropic", "loss"): row.absolute_loss,
                  ("data-scale", "absolute"): row.data_scale, ("data-scale", "loss"): row.data_scale_loss}
        for noise_kind, tolerances in groups.items():
            at = [i for i, key in enumerate(panel.table_rows) if key is not None and key[:2] == noise_kind]
            assert [panel.table_rows[i][2] for i in at] == [t.level for t in tolerances]
            assert [table.item(i, j).text() for i in at] == [tolerance_label(t) for t in tolerances]
    labels = [table.verticalHeaderItem(i).text() for i in range(table.rowCount())]
    tolerance_rows = ["accuracy ≥ 99.9 %", "accuracy ≥ 99 %", "accuracy ≥ 90 %", "loss ≤ 0.1 pt", "loss ≤ 1 pt", "loss ≤ 10 pt"]
    # the two kinds carry different words, so they cannot be confused; each noise has its heading row
    assert labels[3:] == ["absolute σ (isotropic)", *tolerance_rows, "relative σ (data-scale)", *tolerance_rows]
    assert panel.warning.isHidden()  # same latent scale: no warning
    # one band, one curve per checkpoint on the accuracy plot; the difference curve on the other
    curves = [i for i in panel.accuracy_plot.getPlotItem().items if isinstance(i, pg.PlotDataItem) and i.name()]
    assert len(curves) == 2
    assert panel.caption().startswith("sharp (")


def test_a_superseded_run_is_dropped(compare_panel, two_codecs, qtbot):
    panel = compare_panel
    panel.set_inputs(list(two_codecs), FIXTURE_TEXT, "fixture")
    panel.restore({"start": 0.2, "stop": 1.6, "points": 3, "repeats": 1, "seed": 0})
    results = []
    panel.comparison_ready.connect(results.append)
    assert panel.run()
    panel.restore({"seed": 7})
    with qtbot.waitSignal(panel.comparison_ready, timeout=30_000):
        assert panel.run()
    qtbot.wait(200)
    assert len(results) == 1 and results[0].settings["seed"] == 7


def test_cancel_keeps_nothing(compare_panel, two_codecs, qtbot):
    panel = compare_panel
    panel.set_inputs(list(two_codecs), FIXTURE_TEXT * 20, "fixture")
    panel.restore({"start": 0.01, "stop": 2.0, "points": 60, "repeats": 8})
    results = []
    panel.comparison_ready.connect(results.append)
    with qtbot.waitSignal(panel.running_changed, timeout=30_000, check_params_cb=lambda running: not running):
        assert panel.run()
        panel.cancel()
    assert results == [] and panel.comparison is None and "cancelled" in panel.status.text()
    assert panel.run_button.isEnabled() and not panel.cancel_button.isEnabled()


def test_warning_banner_when_latent_scales_differ(compare_panel, tokenizer):
    # DESIGN.md "Scale matters": warn when two codecs' latent RMS differ by more than 1.5x
    a, wide = _lookup(tokenizer, "narrow"), _lookup(tokenizer, "wide", scale=2.0)
    comparison = compare_codecs([a, wide], FIXTURE_TEXT, sigmas=GRID, repeats=1)
    compare_panel.set_comparison(comparison)
    assert not compare_panel.warning.isHidden()
    assert "2.00x" in compare_panel.warning_label.text()
    same = compare_codecs([a, _lookup(tokenizer, "alike", scale=1.4)], FIXTURE_TEXT, sigmas=GRID, repeats=1)
    compare_panel.set_comparison(same)
    assert compare_panel.warning.isHidden()


def _wait_view(panel, qtbot, index):
    with qtbot.waitSignal(panel.text_view_ready, timeout=10_000):
        if panel.sigma_box.currentIndex() == index:
            panel.text_view.request()
        else:
            panel.set_sigma_index(index)


def test_side_by_side_marks_where_the_models_differ(compare_panel, two_codecs, qtbot):
    from app.panel_compare_text import WASH
    from core.analyses.compare_view import ONLY_A, ONLY_B

    comparison = compare_codecs(list(two_codecs), FIXTURE_TEXT, sigmas=GRID, repeats=1)
    rows = comparison.paired[0].rows
    assert comparison.paired[0].unit == "token"
    index = int(np.argmax([r.a_only + r.b_only for r in rows]))
    assert rows[index].a_only > 0 and rows[index].b_only > 0
    compare_panel.set_comparison(comparison)
    _wait_view(compare_panel, qtbot, index)
    assert compare_panel.marked_counts() == (rows[index].a_only, rows[index].b_only)
    # the marks are in the text itself, in two different washes
    view = compare_panel.view
    for mark in (ONLY_A, ONLY_B):
        token = int(np.flatnonzero(view.a.levels == mark)[0])
        pane = compare_panel.texts[0]
        pane.scroll_to_token(token)
        cursor = QTextCursor(pane.document())
        cursor.setPosition(pane.token_document_range(token)[0] + 1)  # format of the char before
        assert cursor.charFormat().background().color() == QColor(WASH[mark])
    assert "only A right" in compare_panel.legend_a.text() and "only B right" in compare_panel.legend_b.text()


def test_a_checkpoint_compared_with_itself_marks_nothing(compare_panel, two_codecs, qtbot):
    codec = two_codecs[1]
    comparison = compare_codecs([codec, codec], FIXTURE_TEXT, sigmas=GRID, repeats=1)
    compare_panel.set_comparison(comparison)
    for index in range(len(GRID)):
        _wait_view(compare_panel, qtbot, index)
        assert compare_panel.marked_counts() == (0, 0)


def test_different_tokenizers_are_marked_on_characters(compare_panel, tokenizer, qtbot):
    other = _lookup(train_byte_bpe(["entirely different words about boilers, bells and bridges " * 5], 280), "other", seed=5)
    comparison = compare_codecs([_lookup(tokenizer, "mine"), other], FIXTURE_TEXT, sigmas=GRID, repeats=1)
    assert comparison.paired[0].unit == "character"
    compare_panel.set_comparison(comparison)
    rows = comparison.paired[0].rows
    index = int(np.argmax([r.a_only + r.b_only for r in rows]))
    _wait_view(compare_panel, qtbot, index)
    assert sum(compare_panel.marked_counts()) > 0
    assert "characters" in compare_panel.legend_a.text()


# ---- training-run trend ----------------------------------------------------------------

def _save_small(tokenizer, path, step):
    torch.manual_seed(step)
    config = ChunkMLPConfig(chunk_size=4, vocab_size=tokenizer.get_vocab_size(), latent_dim=8, embed_dim=8, width=16, depth=1)
    save_codec(Codec(build_model(config), tokenizer, card={"train": {"steps_done": step}}), path)


def test_trend_panel_lists_the_corrupt_checkpoint_and_measures_the_good_ones(qtbot, tokenizer, tmp_path):
    from app.panel_trend import COLUMNS, TrendPanel

    _save_small(tokenizer, tmp_path / "run-a.safetensors", 100)
    _save_small(tokenizer, tmp_path / "run-b.safetensors", 200)
    (tmp_path / "run-broken.safetensors").write_bytes(b"half a checkpoint")
    panel = TrendPanel()
    qtbot.addWidget(panel)
    panel.resize(1400, 900)
    panel.set_text(FIXTURE_TEXT[:400], "fixture")
    panel.restore({"start": 0.2, "stop": 1.0, "points": 2, "repeats": 1})
    arrived = []
    panel.point_added.connect(arrived.append)
    with qtbot.waitSignal(panel.finished, timeout=30_000):
        assert panel.run_folder(tmp_path)
    panel.runner.shutdown()
    assert len(arrived) == 3  # each point was shown as it finished
    table = panel.table
    rows = {table.item(i, 0).text(): [table.item(i, j).text() for j in range(len(COLUMNS))] for i in range(table.rowCount())}
    assert set(rows) == {"run-a", "run-b", "run-broken"}
    problem = rows["run-broken"][COLUMNS.index("problem")]
    assert "run-broken.safetensors" in problem and problem.endswith(".")
    for name, step in (("run-a", "100"), ("run-b", "200")):
        assert rows[name][COLUMNS.index("step")] == step
        assert rows[name][COLUMNS.index("step from")] == "card"
        assert rows[name][COLUMNS.index("accuracy at σ = 0")].endswith("%")
        assert rows[name][COLUMNS.index("problem")] == ""
    assert "run-a" in panel.caption() and "run-broken" not in panel.caption()
    again = TrendPanel()
    qtbot.addWidget(again)
    again.set_points(panel.points, str(tmp_path))
    assert again.table.rowCount() == 3


def test_trend_panel_reports_a_folder_without_checkpoints(qtbot, tmp_path):
    from app.panel_trend import TrendPanel

    panel = TrendPanel()
    qtbot.addWidget(panel)
    with qtbot.waitSignal(panel.error, timeout=2_000) as message:
        assert not panel.run_folder(tmp_path)
    assert "holds no .safetensors checkpoints" in message.args[0]


# ---- plot export -----------------------------------------------------------------------

@pytest.fixture()
def plot(qtbot):
    from app.style import legend, plot_widget

    widget = plot_widget("Token accuracy", "σ", "token accuracy")
    qtbot.addWidget(widget)
    widget.resize(640, 400)
    widget.show()
    item = widget.getPlotItem()
    legend(item)
    item.addItem(pg.PlotDataItem([0, 0.5, 1, 2], [1, 0.95, 0.6, 0.1], pen=pg.mkPen("#2f6db5", width=2), name="sharp"))
    return widget


CAPTION = "sharp (0123456789), soft (abcdef0123); text 5a15ff51d0 (812 tokens); data-scale noise; seed 0; 2 repeats"


def _ink_rows(image: QImage, top: int, bottom: int) -> int:
    """Rows in [top, bottom) holding dark pixels (text)."""
    rows = 0
    for y in range(top, bottom):
        if any(QColor(image.pixel(x, y)).lightness() < 150 for x in range(0, image.width(), 2)):
            rows += 1
    return rows


def test_png_export_has_the_width_dpi_and_caption(plot, tmp_path):
    from app.export import export_plot, render_png

    path = export_plot(plot, tmp_path / "accuracy.png", width=900, dpi=300, caption=CAPTION)
    image = QImage(str(path))
    assert not image.isNull() and image.width() == 900
    assert image.dotsPerMeterX() == pytest.approx(300 / 0.0254, abs=2)
    bare = render_png(plot, width=900, dpi=300)
    assert image.height() > bare.height()  # the caption strip
    assert _ink_rows(image, bare.height() + 2, image.height()) >= 5  # text drawn in it
    colours = {image.pixel(x, y) for x in range(0, 900, 7) for y in range(0, bare.height(), 7)}
    assert len(colours) > 10  # not blank: axes, labels, curve, legend


def test_svg_export_parses_and_holds_the_caption(plot, tmp_path):
    from app.export import export_plot

    path = export_plot(plot, tmp_path / "accuracy.svg", caption=CAPTION)
    root = ET.parse(path).getroot()
    texts = " ".join("".join(t.itertext()) for t in root.iter("{http://www.w3.org/2000/svg}text"))
    assert "data-scale noise" in texts and "sharp (0123456789)" in texts
    assert "Token accuracy" in path.read_text(encoding="utf-8")


def test_export_refuses_to_overwrite_without_force(plot, tmp_path):
    from app.export import export_plot

    target = tmp_path / "plot.png"
    target.write_bytes(b"keep me")
    with pytest.raises(FileExistsError):
        export_plot(plot, target, width=400)
    assert target.read_bytes() == b"keep me"
    assert [p.name for p in tmp_path.iterdir()] == ["plot.png"]  # nothing staged was left behind
    export_plot(plot, target, width=400, force=True)
    assert QImage(str(target)).width() == 400


# ---- report and workspace actions --------------------------------------------------------

def test_report_and_workspace_actions(two_codecs, tmp_path, small_checkpoint):
    from app.report_actions import (
        make_workspace, open_sweep_folder, open_workspace_file, save_report, save_workspace_file,
    )

    comparison = compare_codecs(list(two_codecs), FIXTURE_TEXT, sigmas=GRID, repeats=1)
    with pytest.raises(ChunkscopeError, match="nothing to report"):
        save_report(tmp_path / "empty.html")
    report = save_report(tmp_path / "meeting.html", comparison=comparison, title="Lab meeting")
    assert "Lab meeting" in report.read_text(encoding="utf-8")
    with pytest.raises(FileExistsError):
        save_report(report, comparison=comparison)

    class Loaded:  # what the window knows of an opened checkpoint
        path, sha256, name = str(small_checkpoint), "0" * 64, "small"

    ws = make_workspace([Loaded()], FIXTURE_TEXT, "fixture", comparison=comparison)
    saved = save_workspace_file(ws, tmp_path / "meeting")
    assert saved.name == "meeting.chunkscope"
    again, problems = open_workspace_file(saved)
    assert again.comparison.tolerances == comparison.tolerances
    assert problems == ["small.safetensors has changed since the workspace was saved (its sha256 differs)."]

    codec = two_codecs[0]
    sweep = run_sweep(codec, chunk_text(FIXTURE_TEXT, codec), SweepSettings(sigmas=GRID, repeats=1))
    folder = sweep.write(tmp_path / "sweep")
    assert open_sweep_folder(folder).tolerances == sweep.tolerances
    with pytest.raises(ChunkscopeError, match="not a sweep folder"):
        open_sweep_folder(tmp_path)
