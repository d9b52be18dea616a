"""The workbench, driven the way a user drives it (pytest-qt, offscreen).

One window is opened for the module (loading the samples takes a few seconds); the
tests run in file order and the last one closes it mid-sweep.
"""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import numpy as np
import pytest
from PySide6.QtCore import QPointF, Qt

pytest.importorskip("pytestqt")

from app.main import make_settings, run_workbench  # noqa: E402
from app.state import sample_paths  # noqa: E402
from app.window import MainWindow  # noqa: E402
from core.codecs.checkpoint import load_codec  # noqa: E402
from core.errors import CheckpointError  # noqa: E402
from core.analyses.live import perturb_once  # noqa: E402

WAIT = 60_000  # ms; generous for a loaded CI machine, a healthy run takes a fraction


@pytest.fixture(scope="module")
def settings_path(tmp_path_factory):
    # also the default settings file, for the screenshot run_workbench makes in this module
    path = tmp_path_factory.mktemp("settings") / "chunkscope.ini"
    old = os.environ.get("CHUNKSCOPE_SETTINGS")
    os.environ["CHUNKSCOPE_SETTINGS"] = str(path)
    yield path
    if old is None:
        os.environ.pop("CHUNKSCOPE_SETTINGS", None)
    else:
        os.environ["CHUNKSCOPE_SETTINGS"] = old


def wait_ready(qtbot, window):
    qtbot.waitUntil(lambda: window.workbench.entries and all(e.ready for e in window.workbench.entries.values()), timeout=WAIT)
    qtbot.waitUntil(lambda: window.live.result is not None and window.live.task is None, timeout=WAIT)


def small_sweep(window, **extra):
    values = {"start": 0.05, "stop": 1.0, "points": 3, "spacing": "log", "zero": True, "repeats": 1,
              "noise": "data-scale", "seed": 0}
    values.update(extra)
    window.sweep.restore(values)


def test_opens_with_the_samples_and_the_demo_text(qtbot, window):
    wait_ready(qtbot, window)
    names = sorted(e.name for e in window.workbench.entries.values())
    assert names == sorted(p.stem for p in sample_paths())
    entry = window.workbench.entry()
    assert window.live.original.shown_text() == entry.chunks.text
    assert window.workbench.text_source == "demo_text.txt"
    details = window.models.details.toPlainText()
    assert entry.codec.sha256[:16] in details and str(entry.codec.latent_dim) in details


def test_the_samples_are_listed_before_any_weights_load(qtbot, tmp_path):
    # the window lists each sample from its header alone; the queued loading starts after the
    # first paint, or (a window never shown) at the first turn of the event loop
    if not sample_paths():
        pytest.skip("the sample checkpoints are not there")
    win = MainWindow(make_settings(tmp_path / "s.ini"))
    try:
        entries = list(win.workbench.entries.values())
        assert sorted(e.name for e in entries) == sorted(p.stem for p in sample_paths())
        assert all(e.codec is None and e.info is not None for e in entries)
        rows = [win.models.list.itemWidget(win.models.list.item(i)) for i in range(win.models.list.count())]
        metas = {row.name.text(): row.meta.text() for row in rows}
        for entry in entries:
            c = entry.info.config
            assert f"K {c.chunk_size} · D {c.latent_dim}" in metas[entry.name]
            assert "loading weights" in metas[entry.name]
        assert str(entries[0].info.config.latent_dim) in win.models.details.toPlainText()
        qtbot.waitUntil(lambda: all(e.ready for e in win.workbench.entries.values()), timeout=WAIT)
        assert "loading weights" not in win.models.details.toPlainText()
    finally:
        win.runner.shutdown()
        win.deleteLater()


def test_held_work_starts_on_release(qtbot):
    from app.workers import Runner, Task

    runner = Runner()
    runner.hold()
    task = runner.start(Task("held", lambda _task: 42))
    qtbot.wait(100)
    assert not task.done.is_set()
    with qtbot.waitSignal(task.finished, timeout=WAIT) as blocker:
        runner.release()
    assert blocker.args == [42]
    assert runner.shutdown()


def test_slider_move_updates_the_decoded_view(qtbot, window):
    wait_ready(qtbot, window)
    window.show_view("live")
    entry = window.workbench.entry()
    before = window.live.decoded.shown_text()
    with qtbot.waitSignal(window.live.result_ready, timeout=WAIT, check_params_cb=lambda r: abs(r.sigma - 1.5) < 1e-9) as blocker:
        window.live.slider.setValue(1.5)
    result = blocker.args[0]
    # the reference: the engine's own whole-text perturbation with the same noise
    reference = perturb_once(entry.codec, entry.chunks, entry.encoded, 1.5, "data-scale", seed=window.live.seed.value(), draw=0)
    np.testing.assert_array_equal(result.predicted, reference.predicted)
    assert result.chunk_exact_rate == pytest.approx(reference.chunk_exact_rate)
    assert result.token_accuracy < 1.0, "σ 1.5 of the data scale should break some tokens"
    assert window.live.decoded.shown_text() != before
    assert window.live.decoded.marked_count == window.live.original.marked_count == min(int((~result.correct).sum()), 4000)
    assert window.live.accuracy_value.text().startswith(f"{result.token_accuracy * 100:.2f}")
    tip = window.live._tooltip(int(result.wrong_indices()[0]))
    assert "decoded as" in tip and "%" in tip


def test_rapid_slider_moves_show_the_last_position(qtbot, window):
    wait_ready(qtbot, window)
    for value in np.linspace(0.1, 0.9, 15):
        window.live.slider.setValue(float(value))
    qtbot.waitUntil(lambda: window.live.result is not None and abs(window.live.result.sigma - 0.9) < 1e-9
                    and window.live.task is None, timeout=WAIT)
    assert window.live.wrong_note.text().startswith("data-scale noise")


def test_sweep_curves_hold_the_sweeps_numbers(qtbot, window):
    wait_ready(qtbot, window)
    window.show_view("sweep")
    small_sweep(window)
    with qtbot.waitSignal(window.workbench.sweep_ended, timeout=WAIT, check_params_cb=lambda p, how: how == "done"):
        assert window.sweep.run()
    result = window.workbench.entry().sweep
    assert result is not None and result.sigmas == (0.0, 0.05, 0.223607, 1.0)
    items = {i.name(): i for i in window.sweep.accuracy_plot.getPlotItem().listDataItems() if i.name()}
    x, y = items["token accuracy (Wilson 95 % band)"].getData()
    positive = [c for c in result.curves if c.sigma > 0]  # the log σ axis leaves σ = 0 out
    np.testing.assert_allclose(10 ** np.asarray(x) if window.sweep.log_x else x, [c.sigma for c in positive], rtol=1e-6)
    np.testing.assert_allclose(y, [c.token_accuracy for c in positive])
    _, exact = items["chunk exact match"].getData()
    np.testing.assert_allclose(exact, [c.chunk_exact_rate for c in positive])
    checked = 0
    for tol in result.tolerances:
        shown = window.sweep.tolerance_labels[tol.level][1].text()
        if tol.status == "ok":
            assert shown == f"σ {tol.sigma:.3g}"
            checked += 1
    assert checked > 0, "the grid should bring at least one tolerance inside it"


def test_clicking_a_sigma_on_a_plot_moves_the_live_view(qtbot, window):
    result = window.workbench.entry().sweep
    assert result is not None
    plot = window.sweep.accuracy_plot
    vb = plot.getPlotItem().getViewBox()
    target = result.sigmas[2]
    scene = vb.mapViewToScene(QPointF(np.log10(target), 0.5))
    point = plot.mapFromScene(scene)
    with qtbot.waitSignal(window.sweep.sigma_picked, timeout=5000):
        qtbot.mouseClick(plot.viewport(), Qt.MouseButton.LeftButton, pos=point)
    assert window.current_view() == "live"
    assert window.live.sigma() == pytest.approx(target, abs=1e-4)


def test_clicking_a_token_shows_its_curve(qtbot, window):
    result = window.workbench.entry().sweep
    window.show_view("tokens")
    qtbot.waitUntil(lambda: window.tokens.result is result, timeout=WAIT)
    text = window.tokens.text
    index = 40
    middle = text.point_of_token(index)
    with qtbot.waitSignal(window.tokens.token_shown, timeout=5000, check_params_cb=lambda i: i == index):
        qtbot.mouseClick(text.viewport(), Qt.MouseButton.LeftButton, pos=middle)
    curves = [i for i in window.tokens.token_plot.getPlotItem().listDataItems()]
    _, y = curves[-1].getData()
    keep = np.asarray(result.sigmas) > 0
    np.testing.assert_allclose(y, result.token_accuracy_curve(index)[keep])
    qtbot.waitUntil(lambda: window.tokens.table.rowCount() > 0 or not np.isfinite(result.critical_sigma).any(), timeout=WAIT)


def test_a_corrupt_file_shows_the_engines_message_and_the_app_keeps_working(qtbot, window, tmp_path):
    bad = tmp_path / "broken.safetensors"
    bad.write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{not json at all}")
    wait_ready(qtbot, window)
    with pytest.raises(CheckpointError) as expected:
        load_codec(bad)
    count = len(window.workbench.entries)
    window.open_checkpoint(str(bad))
    qtbot.waitUntil(lambda: window.message.isVisible(), timeout=WAIT)
    assert window.message.text() == str(expected.value)
    assert "broken.safetensors" in window.message.text()
    qtbot.waitUntil(lambda: len(window.workbench.entries) == count, timeout=WAIT)
    window.show_view("live")
    with qtbot.waitSignal(window.live.result_ready, timeout=WAIT):
        window.live.slider.setValue(0.3)


def _drop(window, path):
    from PySide6.QtCore import QMimeData, QUrl
    from PySide6.QtGui import QDropEvent

    mime = QMimeData()
    mime.setUrls([QUrl.fromLocalFile(str(path))])
    window.dropEvent(QDropEvent(QPointF(10, 10), Qt.DropAction.CopyAction, mime, Qt.MouseButton.NoButton,
                                Qt.KeyboardModifier.NoModifier))


def test_only_checkpoints_that_open_enter_recent_files(qtbot, window, tmp_path):
    # issue 11: 13 failed opens made 13 Recent entries; a failed open must leave Recent as it was
    before = window.recent_files()
    for i in range(3):
        broken = tmp_path / f"broken-{i}.safetensors"
        broken.write_bytes(b"xx")
        _drop(window, broken)
        qtbot.waitUntil(lambda: window.message.text().startswith(broken.name), timeout=WAIT)
    window.open_checkpoint(str(tmp_path / "missing.safetensors"))
    qtbot.waitUntil(lambda: window.message.text().startswith(str(tmp_path / "missing.safetensors")), timeout=WAIT)
    qtbot.wait(100)
    assert window.recent_files() == before

    good = tmp_path / "dropped.safetensors"
    good.write_bytes(sample_paths()[0].read_bytes())
    _drop(window, good)
    qtbot.waitUntil(lambda: window.recent_files()[:1] == [str(good.resolve())], timeout=WAIT)
    assert window.recent_menu.actions()[0].text() == str(good.resolve())
    window.workbench.close_checkpoint(str(good.resolve()))


def test_empty_text_is_refused_with_a_message(qtbot, window):
    source = window.workbench.text_source
    assert not window.workbench.set_text("  \n ", "pasted text")
    assert window.message.text() == "pasted text holds only whitespace."
    assert window.workbench.text_source == source


def test_cancelling_a_sweep_keeps_the_previous_one(qtbot, window):
    wait_ready(qtbot, window)
    entry = window.workbench.entry()
    previous = entry.sweep
    small_sweep(window, points=40, repeats=4)
    with qtbot.waitSignal(window.workbench.sweep_progress, timeout=WAIT):
        assert window.sweep.run()
    assert window.sweep.cancel_button.isEnabled()
    with qtbot.waitSignal(window.workbench.sweep_ended, timeout=WAIT) as ended:
        window.sweep.cancel_button.click()
    assert ended.args[1] == "cancelled"
    assert entry.sweep is previous
    assert window.sweep.run_button.isEnabled() and not window.sweep.cancel_button.isEnabled()
    assert "cancelled" in window.sweep.status.text()


def test_window_is_not_blank(qtbot, window):
    image = window.grab().toImage()
    ptr = image.constBits()
    pixels = np.frombuffer(ptr, dtype=np.uint8, count=image.sizeInBytes()).astype(np.float64)
    assert pixels.var() > 100


def test_settings_persist(qtbot, window, settings_path):
    window.sweep.restore({"points": 7, "repeats": 3})
    window.save_state()
    again = make_settings(settings_path)
    assert '"points": 7' in str(again.value("sweep"))
    assert again.value("geometry") is not None


def test_screenshot_from_the_command_line(qtbot, tmp_path, window):
    from PySide6.QtGui import QImage

    path = tmp_path / "shot.png"
    assert run_workbench(screenshot=str(path), view="live") == 0
    image = QImage(str(path))
    assert image.width() >= 1200 and image.height() >= 800
    ptr = image.constBits()
    pixels = np.frombuffer(ptr, dtype=np.uint8, count=image.sizeInBytes()).astype(np.float64)
    assert pixels.var() > 100


def test_closing_during_a_sweep_stops_cleanly(qtbot, window):
    wait_ready(qtbot, window)
    small_sweep(window, points=40, repeats=4)
    with qtbot.waitSignal(window.workbench.sweep_progress, timeout=WAIT):
        assert window.sweep.run()
    window.close()
    assert not window.isVisible()
    assert not window.runner.running()
