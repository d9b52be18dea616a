"""The workbench's file errors, its trend-file reader and its one-slot task helper (offscreen).

Every error a user can cause is one sentence naming the user's own path: never errno text,
never the staged temp file the system names (issue 11, item 8)."""

import errno
import json
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import pytest

from conftest import FIXTURE_TEXT, LookupCodec
from core.analyses.trend import TrendPoint, read_trend, write_trend
from core.engine.tolerance import LOSS, Tolerance
from core.errors import ChunkscopeError

WAIT = 60_000


def _looks_like_one_sentence(message: str, path) -> None:
    assert str(path) in message
    assert "Errno" not in message and ".tmp" not in message and "\n" not in message
    assert message.endswith(".")


# ---- one sentence for a system error ---------------------------------------------------

@pytest.mark.parametrize("code, words", [
    (errno.EROFS, "read-only"), (errno.ENOTDIR, "not a folder"), (errno.EACCES, "permission"), (errno.ENOSPC, "full"),
    (errno.EIO, "input/output error"),
])
def test_error_text_names_the_users_path_not_the_temp_file(code, words):
    from app.messages import error_text

    raw = OSError(code, os.strerror(code), "/ro/.r.html.zmeh3avs.tmp")
    message = error_text(raw, "/ro/r.html", "saved")
    _looks_like_one_sentence(message, "/ro/r.html")
    assert words in message.lower()
    # a sentence of core's, or an OSError raised with one, is shown as it is
    assert error_text(ChunkscopeError("r.html is fine."), "/x", "saved") == "r.html is fine."
    assert error_text(FileExistsError("/ro/r.html already exists."), "/x", "saved") == "/ro/r.html already exists."


def test_save_report_turns_a_raw_os_error_into_a_sentence(window, tmp_path, monkeypatch):
    import app.report_actions as actions

    def read_only(path, content, force=False):
        raise OSError(errno.EROFS, "Read-only file system", str(tmp_path / ".r.html.zmeh3avs.tmp"))

    monkeypatch.setattr(actions, "write_text_atomic", read_only)
    monkeypatch.setattr(window, "report_inputs", lambda: {"sweeps": [], "comparison": _comparison(), "trend_points": []})
    target = tmp_path / "r.html"
    assert window.save_report(target) is None
    message = window.message.text()
    assert message == f"{target} could not be saved: the file system is read-only."


def test_save_report_into_a_read_only_place_is_one_sentence(window, tmp_path, monkeypatch):
    monkeypatch.setattr(window, "report_inputs", lambda: {"sweeps": [], "comparison": _comparison(), "trend_points": []})
    inside_a_file = tmp_path / "notes.txt"
    inside_a_file.write_text("keep")
    for target in (inside_a_file / "r.html", "/sys/r.html"):
        assert window.save_report(target) is None
        _looks_like_one_sentence(window.message.text(), os.path.dirname(target))
    assert inside_a_file.read_text() == "keep"


def test_open_sweep_folder_errors_are_one_sentence(window, tmp_path, monkeypatch):
    a_file = tmp_path / "sweep.txt"
    a_file.write_text("not a folder")
    assert window.open_sweep_folder(a_file) == []
    _looks_like_one_sentence(window.message.text(), a_file)

    folder = tmp_path / "runs"
    folder.mkdir()

    def refused(self):
        raise PermissionError(errno.EACCES, "Permission denied", str(self))

    monkeypatch.setattr(type(folder), "iterdir", refused)
    assert window.open_sweep_folder(folder) == []  # before: the PermissionError escaped the slot
    assert window.message.text() == f"{folder} could not be opened: permission is denied."


def _comparison():
    from core.analyses.compare import compare_codecs
    from core.codecs.tokenizer import train_byte_bpe

    tokenizer = train_byte_bpe([FIXTURE_TEXT], 320)
    a, b = LookupCodec(tokenizer), LookupCodec(tokenizer, sharpness=6.0, seed=4)
    a.name, b.name = "sharp", "soft"
    b.sha256 = "1" * 64
    return compare_codecs([a, b], FIXTURE_TEXT, sigmas=(0.0, 0.5), repeats=1)


# ---- trend.json read back ----------------------------------------------------------------

def test_read_trend_round_trips_what_write_trend_wrote(tmp_path):
    points = [
        TrendPoint("/r/a.safetensors", "run 3, seed \"1\"", 200, "card", sha256="ab" * 32, accuracy_at_zero=0.99,
                   tolerances=[Tolerance(0.999, None, "below_at_zero"), Tolerance(0.99, 0.25, "ok"),
                               Tolerance(0.9, 2.0, "above_grid")], latent_rms=1.5,
                   loss_tolerances=[Tolerance(0.01, 0.1, "ok", LOSS)]),
        TrendPoint("/r/b.safetensors", "b", None, "none", error="b.safetensors is truncated."),
    ]
    write_trend(tmp_path, points)
    again = read_trend(tmp_path)
    assert [p.to_dict() for p in again] == [p.to_dict() for p in points]
    assert read_trend(tmp_path / "trend.json")[0].tolerance(0.99) == Tolerance(0.99, 0.25, "ok")
    assert read_trend(tmp_path / "trend.json")[0].tolerance(0.01, LOSS) == Tolerance(0.01, 0.1, "ok", LOSS)


def test_read_trend_still_reads_an_older_file_keyed_by_level(tmp_path):
    (tmp_path / "trend.json").write_text('[{"name": "a", "tolerances": {"0.99": {"sigma": 0.25, "status": "ok"}}}]',
                                         encoding="utf-8")
    assert read_trend(tmp_path)[0].tolerances == [Tolerance(0.99, 0.25, "ok")]


@pytest.mark.parametrize("content, words", [
    ("{not json", "not valid JSON"),
    ('{"name": "a"}', "an object, not a list"),
    ("[5]", "a number where"),
    ('[{"name": "a", "step": "ten"}]', '"step"'),
    ('[{"name": "a", "step": 1, "tolerances": {"high": {}}}]', "not a number"),
    ('[{"name": "a", "step": 1, "tolerances": {"0.9": {"sigma": "x"}}}]', "not a sigma and a status"),
    ('[{"name": "a", "tolerances": [{"level": 0.9, "sigma": "x", "status": "ok"}]}]', "not a sigma and a status"),
    ('[{"name": "a", "loss_tolerances": 3}]', "not a list"),
    ('[{"step": 1}]', '"name"'),
    ('[{"name": "a", "colour": 1}]', "'colour'"),
])
def test_a_damaged_trend_json_is_one_sentence_naming_it(tmp_path, content, words):
    path = tmp_path / "trend.json"
    path.write_text(content, encoding="utf-8")
    with pytest.raises(ChunkscopeError) as caught:
        read_trend(path)
    _looks_like_one_sentence(str(caught.value), path)
    assert words in str(caught.value)


def test_a_missing_trend_json_names_its_path(tmp_path):
    with pytest.raises(ChunkscopeError, match=f"^{tmp_path / 'trend.json'} does not exist.$"):
        read_trend(tmp_path)
    json_list = tmp_path / "x.json"
    json_list.write_bytes(b"\xff\xfe[")
    with pytest.raises(ChunkscopeError, match="not UTF-8"):
        read_trend(json_list)


# ---- the latest task wins -----------------------------------------------------------------

def test_only_the_latest_task_reaches_the_handlers(qtbot):
    import threading

    from app.workers import LatestTask, Runner, Task

    runner = Runner()
    slot = LatestTask(runner)
    release = threading.Event()

    def slow(task, value):
        release.wait(10)
        task.partial.emit(value)
        return value

    seen = []
    first = slot.start(Task("first", slow, 1), partial=lambda v: seen.append(("partial", v)),
                       finished=lambda v: seen.append(("finished", v)))
    second = slot.start(Task("second", slow, 2), partial=lambda v: seen.append(("partial", v)),
                        finished=lambda v: (seen.append(("finished", v)), seen.append(("running", slot.running()))))
    assert first.should_stop() and not second.should_stop()  # starting the second asked the first to stop
    release.set()
    qtbot.waitUntil(lambda: first.done.is_set() and second.done.is_set(), timeout=WAIT)
    qtbot.waitUntil(lambda: ("finished", 2) in seen, timeout=WAIT)
    qtbot.wait(50)
    assert seen == [("partial", 2), ("finished", 2), ("running", False)]

    cancelled = []
    release.clear()
    third = slot.start(Task("third", slow, 3), finished=cancelled.append, cancelled=lambda: cancelled.append("cancelled"))
    slot.cancel()
    release.set()
    qtbot.waitUntil(lambda: cancelled == ["cancelled"], timeout=WAIT)
    assert third.should_stop() and not slot.running()

    release.clear()
    slot.start(Task("fourth", slow, 4), finished=cancelled.append, cancelled=lambda: cancelled.append("dropped?"))
    assert slot.drop() and not slot.running() and not slot.drop()
    release.set()
    qtbot.wait(200)
    assert cancelled == ["cancelled"]  # a dropped task's signals reach no handler
    runner.shutdown()
