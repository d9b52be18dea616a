"""Bring your own model in the workbench (DESIGN.md, "Three ways to open a codec"): a user's
PyTorch codec opened through its adapter (asked before its code first runs, the answer kept
for that file's sha256) and its ONNX export (no question), driven through sweep, compare,
report and workspace; a training run opened with one adapter. Dialogs are monkeypatched.
"""

from __future__ import annotations

import json
import os
import shutil
import zipfile

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import pytest

pytest.importorskip("pytestqt")
pytest.importorskip("onnxruntime")
pytest.importorskip("onnx")

import torch  # noqa: E402
from PySide6.QtCore import QMimeData, QUrl  # noqa: E402

import app.adapters  # noqa: E402
from app.main import make_settings  # noqa: E402
from app.window import MainWindow  # noqa: E402
from core.codecs.adapter import load_with_adapter, path_sha256  # noqa: E402
from core.codecs.checkpoint import file_sha256  # noqa: E402
from tests.test_core_adapter import TEXT, one_sentence, write_user_model  # noqa: E402
from tests.test_core_onnx import write_onnx_folder  # noqa: E402

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")  # the TorchScript ONNX exporter warns it is legacy

WAIT = 60_000
TINY = {"start": 0.1, "stop": 1.0, "points": 2, "spacing": "log", "zero": True, "repeats": 1, "noise": "data-scale",
        "seed": 0}


class Asked:
    """Stands in for the question: records (path, sha256) and answers `answer`."""

    def __init__(self, answer: bool = True):
        self.answer, self.calls = answer, []

    def __call__(self, parent, path, sha256):
        self.calls.append((path, sha256))
        return self.answer


@pytest.fixture(scope="module")
def user_files(tmp_path_factory, tokenizer):
    """The user's run folder (adapter, tokenizer.json, two state dicts) and its ONNX export."""
    root = tmp_path_factory.mktemp("byom")
    adapter, checkpoint = write_user_model(root / "run", tokenizer)
    second = checkpoint.with_name("step_200.pt")
    _, other = write_user_model(root / "other", tokenizer, seed=1)
    shutil.copy(other, second)
    onnx = write_onnx_folder(root / "tiny-onnx", load_with_adapter(checkpoint, str(adapter)).codec)
    text = root / "notes.txt"
    text.write_text(TEXT, encoding="utf-8")
    return {"adapter": adapter, "checkpoint": checkpoint, "second": second, "onnx": onnx, "text": text, "root": root}


def new_window(qtbot, settings_path, text):
    win = MainWindow(make_settings(settings_path), load_defaults=False)
    win.show()
    assert win.workbench.open_text_file(str(text))
    return win


def close(win):
    win.close()
    win.runner.shutdown()


def wait_ready(qtbot, win, count):
    qtbot.waitUntil(lambda: len(win.workbench.entries) == count and all(
        e.ready and e.health is not None for e in win.workbench.entries.values()), timeout=WAIT)


def test_the_question_comes_once_per_adapter_hash_and_is_remembered(qtbot, user_files, tmp_path, monkeypatch):
    adapter = tmp_path / "my_codec.py"
    shutil.copy(user_files["adapter"], adapter)
    asked = Asked()
    monkeypatch.setattr(app.adapters, "ask_to_run", asked)
    win = new_window(qtbot, tmp_path / "s.ini", user_files["text"])
    try:
        assert win.open_with_adapter(str(user_files["checkpoint"]), str(adapter))
        assert asked.calls == [(str(adapter), file_sha256(adapter))]  # the full path and the file's sha256
        assert win.open_with_adapter(str(user_files["second"]), str(adapter))
        assert len(asked.calls) == 1  # same file, same hash: not asked again
        wait_ready(qtbot, win, 2)
        source = win.workbench.entry(str(user_files["checkpoint"])).codec.source
        assert source.opened_as == "adapter" and source.adapter_sha256 == file_sha256(adapter)
        # a changed file has a new hash: asked again
        adapter.write_text(adapter.read_text(encoding="utf-8") + "\n# edited\n", encoding="utf-8")
        win.workbench.close_checkpoint(str(user_files["second"]))
        assert win.open_with_adapter(str(user_files["second"]), str(adapter))
        assert asked.calls[-1] == (str(adapter), file_sha256(adapter)) and len(asked.calls) == 2
    finally:
        close(win)
    # the answers live in the settings: a new window with them does not ask for either hash
    again = new_window(qtbot, tmp_path / "s.ini", user_files["text"])
    try:
        assert again.open_with_adapter(str(user_files["checkpoint"]), str(adapter))
        assert len(asked.calls) == 2
    finally:
        close(again)


def test_refusing_runs_no_code(qtbot, user_files, tmp_path, monkeypatch):
    marker = tmp_path / "ran"
    adapter = tmp_path / "noisy.py"
    adapter.write_text(f"open({str(marker)!r}, 'w').write('x')\n" + user_files["adapter"].read_text(encoding="utf-8"),
                       encoding="utf-8")
    asked = Asked(answer=False)
    monkeypatch.setattr(app.adapters, "ask_to_run", asked)
    win = new_window(qtbot, tmp_path / "s.ini", user_files["text"])
    try:
        assert not win.open_with_adapter(str(user_files["checkpoint"]), str(adapter))
        qtbot.wait(300)
        assert len(asked.calls) == 1 and not win.workbench.entries and not marker.exists()
        # a file changed after it was allowed is refused by the worker, before it runs
        asked.answer = True
        monkeypatch.setattr(app.adapters, "allowed", lambda *a: "0" * 64)
        win.open_with_adapter(str(user_files["checkpoint"]), str(adapter))
        qtbot.waitUntil(lambda: bool(win.message.text()), timeout=WAIT)
        one_sentence(win.message.text(), str(adapter), "changed after you allowed it")
        assert not marker.exists()
    finally:
        close(win)


def test_an_adapter_failure_is_cores_sentence(qtbot, user_files, tmp_path, monkeypatch):
    adapter = tmp_path / "broken.py"
    adapter.write_text("def load(path):\n    raise ValueError('no weights called enc.0 in this file')\n", encoding="utf-8")
    monkeypatch.setattr(app.adapters, "ask_to_run", Asked())
    win = new_window(qtbot, tmp_path / "s.ini", user_files["text"])
    try:
        assert win.open_with_adapter(str(user_files["checkpoint"]), str(adapter))
        qtbot.waitUntil(lambda: bool(win.message.text()), timeout=WAIT)
        one_sentence(win.message.text(), str(adapter), str(user_files["checkpoint"]), "no weights called enc.0")
        assert not win.workbench.entries
        # a missing adapter file: one sentence, and nothing asked
        asked = Asked()
        monkeypatch.setattr(app.adapters, "ask_to_run", asked)
        win.message.hide()
        assert not win.open_with_adapter(str(user_files["checkpoint"]), str(tmp_path / "gone.py"))
        one_sentence(win.message.text(), "gone.py")
        assert asked.calls == []
    finally:
        close(win)


def test_the_menu_and_the_models_panel_open_with_an_adapter_and_onnx_drops_open(qtbot, user_files, tmp_path, monkeypatch):
    monkeypatch.setattr(app.adapters, "ask_to_run", Asked())
    picked = (str(user_files["checkpoint"]), str(user_files["adapter"]))
    monkeypatch.setattr(app.adapters, "choose_with_adapter", lambda *a, **k: picked)
    win = new_window(qtbot, tmp_path / "s.ini", user_files["text"])
    try:
        win.models.adapter_button.click()
        titles = [a.text() for a in win.menuBar().actions()[0].menu().actions()]
        assert "Open checkpoint with adapter…" in titles and "Open ONNX codec folder…" in titles
        assert "Open training run with adapter…" in titles

        class Drop:
            def __init__(self, path):
                self.data = QMimeData()
                self.data.setUrls([QUrl.fromLocalFile(str(path))])

            def mimeData(self):  # noqa: N802
                return self.data

            def acceptProposedAction(self):  # noqa: N802
                pass

        win.dropEvent(Drop(user_files["onnx"] / "codec.json"))  # a .json is a text otherwise; codec.json is a codec
        wait_ready(qtbot, win, 2)
        kinds = sorted(e.codec.source.opened_as for e in win.workbench.entries.values())
        assert kinds == ["adapter", "onnx"]
        win.workbench.close_checkpoint(str(user_files["onnx"].resolve()))
        win.dropEvent(Drop(user_files["onnx"]))  # the folder itself
        wait_ready(qtbot, win, 2)
        assert win.message.text() == ""
        assert str(user_files["onnx"].resolve()) in win.recent_files()  # ONNX runs no code: a recent file
        assert str(user_files["checkpoint"].resolve()) not in win.recent_files()  # an adapter's needs the question
    finally:
        close(win)


def test_sweep_compare_report_and_workspace_with_an_adapter_and_an_onnx_codec(qtbot, user_files, tmp_path, monkeypatch):
    asked = Asked()
    monkeypatch.setattr(app.adapters, "ask_to_run", asked)
    win = new_window(qtbot, tmp_path / "s.ini", user_files["text"])
    try:
        assert win.open_with_adapter(str(user_files["checkpoint"]), str(user_files["adapter"]))
        win.open_checkpoint(str(user_files["onnx"]))
        wait_ready(qtbot, win, 2)
        adapter_path, onnx_path = str(user_files["checkpoint"].resolve()), str(user_files["onnx"].resolve())
        # the sweep view, then token failures and latent space follow the adapter-opened model
        win.workbench.select(adapter_path)
        win.show_view("sweep")
        win.sweep.restore(TINY)
        for path in (adapter_path, onnx_path):
            win.workbench.select(path)
            with qtbot.waitSignal(win.workbench.sweep_ended, timeout=WAIT, check_params_cb=lambda p, how: how == "done"):
                assert win.sweep.run()
        win.workbench.select(adapter_path)
        entry = win.workbench.entry()
        win.show_view("tokens")
        qtbot.waitUntil(lambda: win.tokens.result is entry.sweep, timeout=WAIT)
        win.show_view("latent")
        win.show_view("live")
        qtbot.wait(200)
        assert win.message.text() == ""
        provenance = entry.sweep.provenance["codec"]
        assert provenance["adapter_sha256"] == file_sha256(user_files["adapter"]) and provenance["opened_as"] == "adapter"
        # the same model two ways: sweeps agree (issue 10: accuracies within 1e-3)
        onnx_sweep = win.workbench.entry(onnx_path).sweep
        for a, b in zip(entry.sweep.curves, onnx_sweep.curves):
            assert abs(a.token_accuracy - b.token_accuracy) <= 1e-3

        win.show_view("compare")
        win.compare.restore({"start": 0.1, "stop": 1.0, "points": 2, "spacing": "log", "zero": True, "repeats": 1})
        with qtbot.waitSignal(win.compare.comparison_ready, timeout=WAIT):
            assert win.compare.run()
        assert sorted(win.compare.comparison.names) == sorted(["step_100", "tiny-onnx"])

        html = win.save_report(tmp_path / "byom.html").read_text(encoding="utf-8")
        assert "<svg" in html and "step_100" in html and "tiny-onnx" in html and "McNemar" in html
        saved = win.save_workspace(tmp_path / "byom.chunkscope")
        assert saved is not None and win.message.text() == ""
    finally:
        close(win)

    with zipfile.ZipFile(saved) as zf:
        manifest = json.loads(next(zf.read(n) for n in zf.namelist() if n.endswith(".json") and "checkpoints" in
                                   json.loads(zf.read(n))))
    records = {c["name"]: c for c in manifest["checkpoints"]}
    assert records["step_100"]["adapter"] == str(user_files["adapter"].absolute())
    assert records["step_100"]["adapter_sha256"] == file_sha256(user_files["adapter"])
    assert records["tiny-onnx"]["opened_as"] == "onnx" and records["tiny-onnx"]["sha256"] == path_sha256(user_files["onnx"])
    assert "adapter" not in records["tiny-onnx"]

    # reopened with settings that never allowed this adapter: asked again; refused, its code does not run
    refuse = Asked(answer=False)
    monkeypatch.setattr(app.adapters, "ask_to_run", refuse)
    other = new_window(qtbot, tmp_path / "fresh.ini", user_files["text"])
    try:
        assert other.open_workspace(saved)
        assert refuse.calls == [(str(user_files["adapter"].absolute()), file_sha256(user_files["adapter"]))]
        wait_ready(qtbot, other, 1)
        assert [e.codec.source.opened_as for e in other.workbench.entries.values()] == ["onnx"]
        assert other.workbench.entry(onnx_path).sweep is not None  # the saved sweep, not recomputed
    finally:
        close(other)
    # allowed: the adapter-opened checkpoint comes back with its saved sweep
    allow = Asked()
    monkeypatch.setattr(app.adapters, "ask_to_run", allow)
    third = new_window(qtbot, tmp_path / "fresh.ini", user_files["text"])
    try:
        assert third.open_workspace(saved)
        assert len(allow.calls) == 1
        wait_ready(qtbot, third, 2)
        qtbot.waitUntil(lambda: not third._pending_sweeps, timeout=WAIT)
        assert third.workbench.entry(adapter_path).sweep is not None
        assert third.message.text() == ""
    finally:
        close(third)


def test_a_training_run_of_the_users_checkpoints_through_one_adapter(qtbot, user_files, tmp_path, monkeypatch):
    asked = Asked()
    monkeypatch.setattr(app.adapters, "ask_to_run", asked)
    run = user_files["checkpoint"].parent
    monkeypatch.setattr(app.adapters, "choose_with_adapter", lambda *a, **k: (str(run), str(user_files["adapter"])))
    win = new_window(qtbot, tmp_path / "s.ini", user_files["text"])
    try:
        win.trend.restore(TINY)
        with qtbot.waitSignal(win.trend.finished, timeout=WAIT) as blocker:
            win.open_run_with_adapter_dialog()
        points = blocker.args[0]
        assert sorted(p.name for p in points) == ["step_100", "step_200"] and not any(p.error for p in points)
        assert [p.step for p in sorted(points, key=lambda p: p.step)] == [100, 200]  # the step from the file name
        assert len(asked.calls) == 1 and win.current_view() == "trend" and win.message.text() == ""
        assert "adapter my_codec.py" in win.trend.folder_label.text()
    finally:
        close(win)


def test_what_the_window_opens_with_names_the_file_or_the_entry_point(tmp_path):
    adapter = tmp_path / "mine.py"
    adapter.write_text("def open_mine(path):\n    return None\n", encoding="utf-8")
    assert app.adapters.adapter_file(str(adapter)) == str(adapter)
    assert app.adapters.adapter_file(f"{adapter}:open_mine") == f"{adapter}:open_mine"
    # an installed adapter, as typed and as a workspace records it (core's CodecSource label)
    assert app.adapters.adapter_file("lab-codecs") == "lab-codecs"
    assert app.adapters.adapter_file("entry point lab-codecs") == "lab-codecs"
    sha = file_sha256(adapter)
    assert not app.adapters.changed_since(f"{adapter}:open_mine", sha)
    adapter.write_text("def open_mine(path):\n    return 1\n", encoding="utf-8")
    assert app.adapters.changed_since(f"{adapter}:open_mine", sha)  # FILE.py:FUNC is checked too
