"""The compare and training-run views, workspaces, saved sweep folders, reports and the
checkpoint details, driven through the main window (pytest-qt, offscreen).

One window is opened for the module (the `window` fixture of conftest.py); grids are tiny and one repeat.
"""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import pytest

pytest.importorskip("pytestqt")

import app.state  # noqa: E402
from app.main import make_settings  # noqa: E402
from app.state import sample_paths  # noqa: E402
from app.window import VIEWS, MainWindow  # noqa: E402
from core.codecs.checkpoint import load_codec  # noqa: E402
from core.engine.sweep import SweepSettings, run_sweep  # noqa: E402
from core.engine.text import chunk_text  # noqa: E402

WAIT = 60_000
TINY = {"start": 0.05, "stop": 1.0, "points": 3, "spacing": "log", "zero": True, "repeats": 1, "noise": "data-scale",
        "seed": 0}


def wait_ready(qtbot, win):
    qtbot.waitUntil(lambda: win.workbench.entries and all(e.ready and e.health is not None
                                                          for e in win.workbench.entries.values()), timeout=WAIT)


def tolerance_texts(win) -> dict:
    return {level: value.text() for level, (_cap, value) in win.sweep.tolerance_labels.items()}


@pytest.fixture(scope="module")
def cli_sweep_dir(window, tmp_path_factory):
    """What `chunkscope sweep --out DIR` writes for the plain sample, on the window's text."""
    path = next(p for p in sample_paths() if p.stem == "plain")
    codec = load_codec(path)
    chunks = chunk_text(window.workbench.text, codec, window.workbench.text_source)
    result = run_sweep(codec, chunks, SweepSettings(sigmas=(0.0, 0.1, 1.0), repeats=1), text_source="demo_text.txt")
    out = tmp_path_factory.mktemp("cli-sweep")
    result.write(out / codec.name)
    return out, result


def test_window_has_the_compare_and_training_run_views(qtbot, window):
    wait_ready(qtbot, window)
    assert "compare" in VIEWS and "trend" in VIEWS
    titles = [window.tabs.tabText(i) for i in range(window.tabs.count())]
    assert "Compare" in titles and "Training run" in titles
    window.show_view("compare")
    assert window.current_view() == "compare"
    window.show_view("trend")
    assert window.current_view() == "trend"
    # fed with what is loaded: every opened checkpoint, ticked, and the text
    assert sorted(c.name for c in window.compare.codecs) == sorted(p.stem for p in sample_paths())
    assert len(window.compare.selected_codecs()) == len(sample_paths())
    assert window.compare.text == window.workbench.text
    assert window.trend.text == window.workbench.text
    # errors of the compare view reach the message bar verbatim
    window.compare.error.emit("a comparison problem.")
    assert window.message.text() == "a comparison problem."
    window.message.hide()


def test_details_show_the_sha256_as_one_readable_line(qtbot, window):
    wait_ready(qtbot, window)
    window.resize(1500, 950)
    entry = window.workbench.entry()
    sha = entry.codec.sha256
    label = window.models.details.value_label("sha256")
    assert label is not None
    qtbot.waitUntil(lambda: label.isVisible() and label.width() > 60, timeout=WAIT)
    shown = label.text()
    assert label.full_text() == sha and label.toolTip() == sha
    assert "\n" not in shown and len(shown) >= 12
    assert shown == sha or (shown[:4] == sha[:4] and shown[-4:] == sha[-4:] and "…" in shown)
    line = label.fontMetrics().height()
    assert label.height() < 2 * line  # one line, not a column of characters
    # nested card entries (the samples' cards nest the recipe) are flattened with dotted keys
    assert isinstance(entry.codec.card["recipe"], dict)
    assert any("." in key for key, _ in window.models.details._rows)


def test_a_saved_workspace_reopens_with_the_same_tolerances_without_rerunning(qtbot, window, tmp_path, monkeypatch):
    wait_ready(qtbot, window)
    window.show_view("sweep")
    window.sweep.restore(TINY)
    with qtbot.waitSignal(window.workbench.sweep_ended, timeout=WAIT, check_params_cb=lambda p, how: how == "done"):
        assert window.sweep.run()
    before = tolerance_texts(window)
    assert all(text != "—" for text in before.values())
    saved = window.save_workspace(tmp_path / "meeting.chunkscope")
    assert saved is not None and saved.is_file()
    assert window.save_workspace(tmp_path / "meeting.chunkscope") is None  # nothing overwritten unasked
    assert window.message.text()
    window.message.hide()

    swept = []
    monkeypatch.setattr(app.state, "run_sweep", lambda *a, **k: swept.append(a) or pytest.fail("a sweep ran"))
    other = MainWindow(make_settings(tmp_path / "other.ini"), load_defaults=False)
    try:
        other.show()
        assert other.open_workspace(saved)
        # shown at once from the saved result, then given to the checkpoint once it is open again
        assert tolerance_texts(other) == before
        qtbot.waitUntil(lambda: other.workbench.entries and all(e.ready for e in other.workbench.entries.values())
                        and not other._pending_sweeps, timeout=WAIT)
        qtbot.wait(50)
        assert tolerance_texts(other) == before
        assert other.workbench.entry().sweep is not None
        assert other.workbench.text == window.workbench.text
        assert sorted(e.name for e in other.workbench.entries.values()) == sorted(p.stem for p in sample_paths())
        assert swept == [] and not other.workbench._sweep_tasks
        assert other.message.text() == ""  # every checkpoint is still there, unchanged
    finally:
        other.close()
        other.runner.shutdown()


def test_opening_a_cli_sweep_folder_shows_its_numbers(qtbot, window, cli_sweep_dir):
    wait_ready(qtbot, window)
    out, result = cli_sweep_dir
    opened = window.open_sweep_folder(out)
    assert len(opened) == 1
    shown = window.sweep.result
    assert shown is not None and shown.codec_name == "plain"
    assert [t.sigma for t in shown.tolerances] == [t.sigma for t in result.tolerances]
    assert [c.token_accuracy for c in shown.curves] == pytest.approx([c.token_accuracy for c in result.curves])
    assert window.current_view() == "sweep"
    # the plain sample is open on the same text, so the tokens view follows it
    assert window.workbench.entry().name == "plain"
    qtbot.waitUntil(lambda: window.tokens.result is window.workbench.entry().sweep, timeout=WAIT)
    assert window.sweep.caption().startswith("plain (")
    # a folder that is not a sweep is refused with core's sentence
    assert window.open_sweep_folder(out.parent / "does-not-exist") == []
    assert window.message.text()
    window.message.hide()


def test_a_report_saved_from_the_window_holds_svg(qtbot, window, tmp_path, cli_sweep_dir):
    wait_ready(qtbot, window)
    if not window.shown_sweeps():
        window.open_sweep_folder(cli_sweep_dir[0])
    written = window.save_report(tmp_path / "report.html")
    assert written is not None
    html = written.read_text(encoding="utf-8")
    assert "<svg" in html and "plain" in html


def test_compare_runs_from_the_window_and_goes_into_the_report(qtbot, window, tmp_path):
    wait_ready(qtbot, window)
    window.show_view("compare")
    window.compare.restore({"start": 0.1, "stop": 1.0, "points": 2, "spacing": "log", "zero": True, "repeats": 1})
    with qtbot.waitSignal(window.compare.comparison_ready, timeout=WAIT):
        assert window.compare.run()
    assert window.compare.comparison is not None
    html = window.save_report(tmp_path / "cmp.html").read_text(encoding="utf-8")
    assert "<svg" in html and "McNemar" in html
    names = window.compare.comparison.names
    assert all(name in html for name in names)
