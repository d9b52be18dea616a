"""Atomic writes: stage next to the target, then rename, so a crash mid-save leaves any old
file intact. Nothing is overwritten unless the caller says so, and even then only what the
tool itself would write (a result folder it recognises by its marker files, or a file of
the kind it writes); anything else in the way is refused.

Several outputs of one command are one transaction (`Outputs`): each is staged beside its
target and `commit` puts them all in place, or none of them. Staged files and folders are
created with the default mode of a plain `open()` / `mkdir()` (the umask, and a folder's
default ACL, apply as usual), so the process umask is never read or changed.
"""

from __future__ import annotations

import errno
import os
import secrets
import shutil
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator

from core.errors import ChunkscopeError

Recognise = Callable[[Path], bool]


class OutputExistsError(ChunkscopeError, FileExistsError):
    """The output is already there and is the tool's own: the caller may replace it with force."""

    def __init__(self, path: Path):
        super().__init__(f"{path} already exists; choose another name or replace it on purpose.")
        self.path = path


class OutputRefusedError(ChunkscopeError):
    """Something the tool did not write is where the output would go: never replaced."""


class OutputWriteError(ChunkscopeError, OSError):
    """The output could not be written (read-only folder, disk full, ...); nothing was left behind."""


@dataclass(frozen=True)
class ResultFolder:
    """Recognises a folder the tool wrote by its marker files (an empty folder holds nothing to lose)."""

    markers: tuple[str, ...]

    def __call__(self, path: Path) -> bool:
        if not path.is_dir():
            return False
        return not any(path.iterdir()) or all((path / m).is_file() for m in self.markers)


def result_folder(*markers: str) -> ResultFolder:
    return ResultFolder(tuple(markers))


def _empty_folder(path: Path) -> bool:
    return path.is_dir() and not any(path.iterdir())


def check_target(path: str | os.PathLike, force: bool, recognise: Recognise | None = None, folder: bool = False) -> None:
    """Raise unless `path` is free, or is the tool's own kind of output and `force` is set.

    For a file target `recognise=None` accepts any regular file; for a folder it accepts only
    an empty folder."""
    path = Path(path)
    if not path.exists() and not path.is_symlink():
        return
    if folder and not path.is_dir():
        raise OutputRefusedError(f"{path} is a file, and the output is a folder; the file is left alone, so choose another name.")
    if not folder and path.is_dir():
        raise OutputRefusedError(f"{path} is a folder, and the output is one file; name a file to write instead.")
    if not folder and not path.is_file():
        raise OutputRefusedError(f"{path} is not a regular file, so it is left alone; choose another name.")
    known = (recognise or (_empty_folder if folder else Path.is_file))(path)
    if not known:
        what = "a folder" if folder else "a file"
        markers = getattr(recognise, "markers", ())
        why = f" (it does not hold {' and '.join(markers)})" if folder and markers else ""
        raise OutputRefusedError(
            f"{path} is {what} chunkscope did not write{why}, so it is never replaced; choose another name."
        )
    if not force:
        raise OutputExistsError(path)


def _existing_ancestor(path: Path) -> Path:
    probe = path.absolute()
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    return probe


def check_writable(path: str | os.PathLike) -> None:
    """Raise OutputWriteError now, before any work, if `path` could not be created or replaced."""
    path = Path(path)
    where = _existing_ancestor(path.parent)
    if not where.is_dir():
        raise OutputRefusedError(f"{where} is a file, so {path} cannot be written inside it; choose another place.")
    try:
        probe = _fresh_dir(where, "chunkscope-probe")
        os.rmdir(probe)
    except OSError as exc:
        raise OutputWriteError(f"{path} cannot be written: {_reason(exc, where)}.") from None


def _reason(exc: OSError, where: Path) -> str:
    if exc.errno == errno.EROFS:
        return f"{where} is on a read-only file system"
    if exc.errno in (errno.EACCES, errno.EPERM):
        return f"there is no permission to write in {where}"
    if exc.errno == errno.ENOSPC:
        return f"there is no space left on the disk holding {where}"
    return (exc.strerror or str(exc)).rstrip(".")


def _fresh_name(parent: Path, name: str, suffix: str = "") -> Path:
    return parent / f".{name}.{secrets.token_hex(4)}{suffix}"


def _fresh_dir(parent: Path, name: str) -> Path:
    for _ in range(100):
        candidate = _fresh_name(parent, name)
        try:
            os.mkdir(candidate)  # default mode 0o777 minus the umask, as any mkdir
            return candidate
        except FileExistsError:
            continue
    raise FileExistsError(errno.EEXIST, "no free temporary name", str(parent))


def _fresh_file(parent: Path, name: str) -> Path:
    for _ in range(100):
        candidate = _fresh_name(parent, name, ".tmp")
        try:
            os.close(os.open(candidate, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))  # as open(..., "w") would
            return candidate
        except FileExistsError:
            continue
    raise FileExistsError(errno.EEXIST, "no free temporary name", str(parent))


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        try:
            path.unlink()
        except OSError:
            pass


@dataclass
class _Staged:
    target: Path
    staging: Path
    folder: bool
    recognise: Recognise | None


class Outputs:
    """Several outputs written as one: `folder()`/`file()` give a staging path beside each
    target; `commit()` moves all of them into place, or none (rolling back on failure).
    As a context manager it commits on success and discards everything on any exception,
    Ctrl-C included; an OSError becomes an OutputWriteError naming the user's path."""

    def __init__(self, force: bool = False):
        self.force = force
        self.items: list[_Staged] = []
        self.created: list[Path] = []  # parent folders made for the outputs, removed again on discard

    def _make_parents(self, parent: Path) -> None:
        missing = []
        probe = parent
        while not probe.exists():
            missing.append(probe)
            probe = probe.parent
        if not probe.is_dir():
            raise OutputRefusedError(f"{probe} is a file, so nothing can be written inside it; choose another place.")
        for folder in reversed(missing):
            os.mkdir(folder)
            self.created.append(folder)

    def _stage(self, path: str | os.PathLike, recognise: Recognise | None, folder: bool) -> Path:
        target = Path(path)
        check_target(target, self.force, recognise, folder)
        try:
            self._make_parents(target.parent)
            staging = _fresh_dir(target.parent, target.name) if folder else _fresh_file(target.parent, target.name)
        except OSError as exc:
            if isinstance(exc, ChunkscopeError):
                raise
            raise OutputWriteError(f"{target} could not be written: {_reason(exc, _existing_ancestor(target.parent))}.") from None
        self.items.append(_Staged(target, staging, folder, recognise))
        return staging

    def folder(self, path: str | os.PathLike, recognise: Recognise | None = None) -> Path:
        """An empty staging folder that will become `path`."""
        return self._stage(path, recognise, folder=True)

    def file(self, path: str | os.PathLike, recognise: Recognise | None = None) -> Path:
        """An empty staging file that will become `path`."""
        return self._stage(path, recognise, folder=False)

    @property
    def targets(self) -> list[Path]:
        return [item.target for item in self.items]

    def commit(self) -> None:
        single_file = len(self.items) == 1 and not self.items[0].folder
        moved_aside: list[tuple[Path, Path]] = []  # (target, where its old content went)
        placed: list[Path] = []
        try:
            for item in self.items:  # anything that appeared meanwhile is checked again
                check_target(item.target, self.force, item.recognise, item.folder)
            for item in self.items:
                if not single_file and (item.target.exists() or item.target.is_symlink()):
                    aside = _fresh_name(item.target.parent, item.target.name, ".old")
                    os.replace(item.target, aside)
                    moved_aside.append((item.target, aside))
                os.replace(item.staging, item.target)  # one file alone: replaced atomically
                placed.append(item.target)
        except BaseException as exc:
            for target in placed:
                _remove(target)
            for target, aside in moved_aside:
                try:
                    os.replace(aside, target)
                except OSError:
                    pass
            error = self._write_error(exc) if isinstance(exc, OSError) and not isinstance(exc, ChunkscopeError) else None
            self.discard()
            if error is not None:
                raise error from None
            raise
        for _, aside in moved_aside:
            _remove(aside)
        self.items = []
        self.created = []

    def discard(self) -> None:
        for item in self.items:
            _remove(item.staging)
        for folder in reversed(self.created):
            try:
                os.rmdir(folder)
            except OSError:
                pass
        self.items = []
        self.created = []

    def _write_error(self, exc: OSError) -> OutputWriteError:
        named = [str(f) for f in (exc.filename, exc.filename2) if f]
        target = None
        for item in self.items:
            if any(f.startswith(str(item.staging)) or f == str(item.target) for f in named):
                target = item.target
        if target is None:  # never a staging name: the user's last output is named instead
            target = self.items[-1].target if self.items else Path(".")
        return OutputWriteError(f"{target} could not be written: {_reason(exc, target.parent)}.")

    def __enter__(self) -> "Outputs":
        return self

    def __exit__(self, kind, exc, tb) -> bool:
        if kind is None:
            self.commit()
            return False
        if isinstance(exc, OSError) and not isinstance(exc, ChunkscopeError):
            error = self._write_error(exc)
            self.discard()
            raise error from None
        self.discard()
        return False


def refuse_existing(path: Path, force: bool, recognise: Recognise | None = None) -> None:
    check_target(path, force, recognise, folder=False)


@contextmanager
def staged_file(path: str | os.PathLike, force: bool = False, recognise: Recognise | None = None) -> Iterator[Path]:
    """Yield a temporary path beside `path`; on success it replaces `path` atomically."""
    with Outputs(force) as outputs:
        yield outputs.file(path, recognise)


@contextmanager
def staged_folder(path: str | os.PathLike, force: bool = False, recognise: Recognise | None = None) -> Iterator[Path]:
    """Yield a temporary folder beside `path`; on success it takes the place of `path`."""
    with Outputs(force) as outputs:
        yield outputs.folder(path, recognise)


def write_text_atomic(path: str | os.PathLike, content: str, force: bool = False, recognise: Recognise | None = None) -> Path:
    with staged_file(path, force, recognise) as tmp:
        tmp.write_text(content, encoding="utf-8")
    return Path(path)
