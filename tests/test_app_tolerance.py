"""The tolerance vocabulary on screen: the sweep headline, the compare table and the
training-run table show accuracy at σ = 0, the accuracy-level and the loss tolerances
through core's one renderer, and "too few tokens" on a one-token text; the panels' default
repeats are core's."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import numpy as np
import pytest

pytest.importorskip("pytestqt")

from conftest import FIXTURE_TEXT, LookupCodec  # noqa: E402
from core.analyses.compare import compare_codecs  # noqa: E402
from core.analyses.trend import TrendPoint  # noqa: E402
from core.engine.sweep import DEFAULT_REPEATS, SweepSettings, run_sweep  # noqa: E402
from core.engine.text import chunk_text  # noqa: E402
from core.engine.tolerance import LOSS_LEVELS, tolerance_text  # noqa: E402

GRID = SweepSettings(sigmas=(0.0, 0.1, 0.2, 0.4, 0.8, 1.6), repeats=2, noise="isotropic")


def imperfect_codec(tokenizer) -> tuple[LookupCodec, str]:
    """A lookup codec that decodes one token type (4 in every 668 tokens) as another, even at σ = 0."""
    codec = LookupCodec(tokenizer)
    text = FIXTURE_TEXT * 5
    ids = chunk_text(text, codec).token_ids
    values, counts = np.unique(ids, return_counts=True)
    confused = int(values[np.argmin(counts)])
    codec.table[confused] = codec.table[confused - 1]
    return codec, text


@pytest.fixture()
def sweep_panel(qtbot):
    from app.panel_sweep import SweepPanel
    from app.state import Workbench
    from app.workers import Runner

    runner = Runner()
    panel = SweepPanel(Workbench(runner))
    qtbot.addWidget(panel)
    panel.resize(1400, 900)
    yield panel
    runner.shutdown()


def test_the_panels_default_repeats_are_cores(qtbot, sweep_panel):
    from app.panel_compare import ComparePanel
    from app.panel_trend import TrendPanel
    from core.cli import build_parser

    assert SweepSettings().repeats == DEFAULT_REPEATS
    assert sweep_panel.sweep_settings().repeats == DEFAULT_REPEATS  # was 2 in the workbench, 4 in core and the CLI
    compare, trend = ComparePanel(), TrendPanel()
    for panel in (compare, trend):
        qtbot.addWidget(panel)
    assert compare.settings_dict()["repeats"] == DEFAULT_REPEATS
    assert trend.sweep_settings().repeats == DEFAULT_REPEATS
    assert build_parser().parse_args(["sweep", "x.safetensors"]).repeats == DEFAULT_REPEATS
    compare.runner.shutdown()
    trend.runner.shutdown()


def test_a_headline_that_fails_at_0_gives_the_accuracy_at_0_and_the_loss_tolerance(tokenizer, sweep_panel):
    codec, text = imperfect_codec(tokenizer)
    result = run_sweep(codec, chunk_text(text, codec), GRID)
    acc0 = result.accuracy_at_zero
    assert 0.99 < acc0 < 0.999
    sweep_panel.show_result(result)
    assert sweep_panel.zero_value.text() == f"{acc0 * 100:.3f} %"
    assert sweep_panel.tolerance_labels[0.999][1].text() == "fails at 0"
    for level in LOSS_LEVELS:
        t = result.tolerance(level, "loss")
        assert t.status in ("ok", "above_grid")  # measured from its own σ = 0 value: finite
        assert sweep_panel.loss_labels[level][1].text() == tolerance_text(t, digits=3, prefix="σ ")
    captions = [cap.text() for cap, _ in list(sweep_panel.tolerance_labels.values()) + list(sweep_panel.loss_labels.values())]
    assert captions == ["σ at accuracy ≥ 99.9 %", "σ at accuracy ≥ 99 %", "σ at accuracy ≥ 90 %",
                        "σ at loss ≤ 0.1 pt", "σ at loss ≤ 1 pt", "σ at loss ≤ 10 pt"]


def test_a_one_token_text_shows_too_few_tokens_in_the_headline(lookup_codec, sweep_panel):
    result = run_sweep(lookup_codec, chunk_text("The", lookup_codec), GRID)
    sweep_panel.show_result(result)
    values = [v for _, v in list(sweep_panel.tolerance_labels.values()) + list(sweep_panel.loss_labels.values())]
    assert [v.text() for v in values] == ["too few tokens"] * 6
    assert "no tolerance is resolvable on 1 token" in values[0].toolTip()


def test_the_compare_table_marks_a_one_token_text(qtbot, tokenizer):
    from app.panel_compare import ComparePanel

    a, b = LookupCodec(tokenizer), LookupCodec(tokenizer, sharpness=6.0, seed=4)
    a.name, b.name = "a", "b"
    panel = ComparePanel()
    qtbot.addWidget(panel)
    panel.set_comparison(compare_codecs([a, b], "The", sigmas=GRID.sigmas, repeats=1))
    cells = [panel.table.item(i, j).text() for i, key in enumerate(panel.table_rows) if key is not None for j in range(2)]
    assert cells == ["too few tokens"] * 24
    assert "too short to resolve" in panel.table_note.text()
    panel.runner.shutdown()


def test_the_training_run_table_shows_both_kinds(qtbot, tokenizer):
    from app.panel_trend import COLUMNS, TrendPanel

    codec, text = imperfect_codec(tokenizer)
    result = run_sweep(codec, chunk_text(text, codec), GRID)
    point = TrendPoint("run/step-100.safetensors", "step-100", 100, "file name", sha256="0" * 64,
                       accuracy_at_zero=result.accuracy_at_zero, tolerances=result.tolerances,
                       loss_tolerances=result.loss_tolerances, latent_rms=result.latent_rms, result=result)
    panel = TrendPanel()
    qtbot.addWidget(panel)
    panel.set_points([point], settings=GRID)
    first = COLUMNS.index("accuracy ≥ 99.9 %")
    assert COLUMNS[first:first + 6] == ("accuracy ≥ 99.9 %", "accuracy ≥ 99 %", "accuracy ≥ 90 %",
                                         "loss ≤ 0.1 pt", "loss ≤ 1 pt", "loss ≤ 10 pt")
    shown = [panel.table.item(0, first + i).text() for i in range(6)]
    assert shown == [t.label() for t in result.tolerances + result.loss_tolerances]
    assert shown[0] == "fails at 0" and shown[3] != "fails at 0"
    names = [item.name() for item in panel.tolerance_plot.getPlotItem().listDataItems() if item.name()]
    assert "σ at loss ≤ 1 pt" in names and "σ at accuracy ≥ 99 %" in names
    panel.runner.shutdown()
