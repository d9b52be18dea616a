"""Atomic writes (core.outputs.files): file modes without touching the umask, outputs that
appear together or not at all, and --force replacing only what the tool wrote."""

import errno
import os
import stat

import pytest

from core.errors import ChunkscopeError
from core.outputs import files
from core.outputs.files import (
    OutputExistsError, OutputRefusedError, OutputWriteError, Outputs, check_target, result_folder, staged_file,
    staged_folder, write_text_atomic,
)


def _mode(path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


@pytest.mark.parametrize("umask", [0o022, 0o027, 0o077])
def test_written_files_get_the_mode_of_a_plain_open_and_the_umask_is_never_touched(tmp_path, monkeypatch, umask):
    old = os.umask(umask)  # the test sets the umask itself, before the guard below
    try:
        plain_file = tmp_path / "plain.txt"
        with open(plain_file, "w") as handle:  # the reference: what a normal open() gives here
            handle.write("x")
        plain_dir = tmp_path / "plain-dir"
        plain_dir.mkdir()

        def no_umask(*args):
            raise AssertionError("os.umask was called: the process umask must not change under worker threads")

        monkeypatch.setattr(os, "umask", no_umask)
        written = write_text_atomic(tmp_path / "a.txt", "hello")
        with staged_folder(tmp_path / "folder") as staging:
            (staging / "inside.txt").write_text("x")
        with Outputs() as outputs:
            outputs.file(tmp_path / "b.txt").write_text("b")
            outputs.folder(tmp_path / "c")
    finally:
        monkeypatch.undo()
        os.umask(old)
    assert _mode(written) == _mode(plain_file) == 0o666 & ~umask
    assert _mode(tmp_path / "b.txt") == _mode(plain_file)
    assert _mode(tmp_path / "folder") == _mode(tmp_path / "c") == _mode(plain_dir) == 0o777 & ~umask
    assert _mode(tmp_path / "folder" / "inside.txt") == _mode(plain_file)


def test_outputs_appear_together_or_not_at_all(tmp_path, monkeypatch):
    marker = result_folder("result.json")
    for name in ("a", "b"):
        (tmp_path / "out" / name).mkdir(parents=True)
        (tmp_path / "out" / name / "result.json").write_text("old " + name)
    real_replace = os.replace

    def failing_second(src, dst):  # the disk fills up as the second new folder is put in place
        staged_b = os.path.basename(src).startswith(".b.") and not os.fspath(src).endswith(".old")
        if staged_b and os.fspath(dst) == str(tmp_path / "out" / "b"):
            raise OSError(errno.ENOSPC, "No space left on device", os.fspath(src))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", failing_second)
    with pytest.raises(OutputWriteError) as info:
        with Outputs(force=True) as outputs:
            for name in ("a", "b"):
                staging = outputs.folder(tmp_path / "out" / name, marker)
                (staging / "result.json").write_text("new " + name)
    monkeypatch.undo()
    message = str(info.value)
    assert "out/b" in message and "no space" in message and ".tmp" not in message and "/." not in message
    # the first folder was put back as it was; nothing staged is left behind
    assert (tmp_path / "out" / "a" / "result.json").read_text() == "old a"
    assert (tmp_path / "out" / "b" / "result.json").read_text() == "old b"
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["a", "b"]


def test_interrupted_outputs_leave_nothing_and_no_new_parent_folders(tmp_path):
    with pytest.raises(KeyboardInterrupt):
        with Outputs() as outputs:
            outputs.folder(tmp_path / "new" / "deeper" / "a")
            outputs.file(tmp_path / "new" / "b.txt").write_text("b")
            raise KeyboardInterrupt
    assert list(tmp_path.iterdir()) == []


def test_force_replaces_only_what_the_tool_wrote(tmp_path):
    marker = result_folder("sweep.json", "arrays.npz")
    ours = tmp_path / "ours"
    ours.mkdir()
    (ours / "sweep.json").write_text("{}")
    (ours / "arrays.npz").write_bytes(b"")
    theirs = tmp_path / "theirs"
    theirs.mkdir()
    (theirs / "thesis.tex").write_text("years of work")
    notes = tmp_path / "notes.txt"
    notes.write_text("mine")
    with pytest.raises(OutputExistsError):  # ours, but no force
        check_target(ours, False, marker, folder=True)
    check_target(ours, True, marker, folder=True)
    check_target(tmp_path / "empty-not-there", True, marker, folder=True)
    for path, folder in ((theirs, True), (notes, True), (theirs, False)):
        with pytest.raises(OutputRefusedError) as info:
            check_target(path, True, marker if folder else None, folder=folder)
        assert str(path) in str(info.value) and "\n" not in str(info.value)
    with pytest.raises(OutputRefusedError, match="is a folder"):
        write_text_atomic(theirs, "x", force=True)
    with pytest.raises(OutputRefusedError, match="did not write"):
        write_text_atomic(notes, "x", force=True, recognise=lambda p: p.suffix == ".html")
    assert (theirs / "thesis.tex").read_text() == "years of work" and notes.read_text() == "mine"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt", "ours", "theirs"]


def test_exists_error_is_both_a_chunkscope_error_and_a_file_exists_error(tmp_path):
    path = tmp_path / "x.txt"
    path.write_text("keep")
    with pytest.raises(FileExistsError) as info:
        write_text_atomic(path, "new")
    assert isinstance(info.value, ChunkscopeError) and path.read_text() == "keep"


def test_a_failed_write_names_the_target_not_the_temporary_file(tmp_path):
    target = tmp_path / "report.html"
    with pytest.raises(OutputWriteError) as info:
        with staged_file(target) as tmp:
            raise OSError(errno.EROFS, "Read-only file system", str(tmp))
    assert str(target) in str(info.value) and "read-only" in str(info.value)
    assert ".tmp" not in str(info.value)
    assert list(tmp_path.iterdir()) == []


def test_check_writable_probes_without_leaving_anything(tmp_path, monkeypatch):
    files.check_writable(tmp_path / "a" / "b" / "out")
    assert list(tmp_path.iterdir()) == []
    real_mkdir = os.mkdir

    def read_only(path, *args, **kwargs):  # simulated: tests run as root, where chmod does not stop writes
        if str(path).startswith(str(tmp_path)):
            raise OSError(errno.EROFS, "Read-only file system", str(path))
        return real_mkdir(path, *args, **kwargs)

    monkeypatch.setattr(os, "mkdir", read_only)
    with pytest.raises(OutputWriteError) as info:
        files.check_writable(tmp_path / "out")
    assert str(tmp_path / "out") in str(info.value) and "read-only file system" in str(info.value)
