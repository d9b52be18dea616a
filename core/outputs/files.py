"""Atomic writes: stage next to the target, then rename, so a crash mid-save leaves any old
file intact. Nothing is overwritten unless the caller says so."""

from __future__ import annotations

import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def refuse_existing(path: Path, force: bool) -> None:
    if path.exists() and not force:
        raise FileExistsError(f"{path} already exists; choose another name or replace it on purpose.")


@contextmanager
def staged_file(path: str | os.PathLike, force: bool = False) -> Iterator[Path]:
    """Yield a temporary path beside `path`; on success it replaces `path` atomically."""
    path = Path(path)
    refuse_existing(path, force)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        yield Path(tmp)
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


@contextmanager
def staged_folder(path: str | os.PathLike, force: bool = False) -> Iterator[Path]:
    """Yield a temporary folder beside `path`; on success it takes the place of `path`."""
    path = Path(path)
    refuse_existing(path, force)
    path.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{path.name}.", dir=path.parent))
    try:
        yield staging
        os.chmod(staging, 0o777 & ~_umask())
        if path.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{path.name}.old.", dir=path.parent))
            os.replace(path, old / "previous")
            os.replace(staging, path)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(staging, path)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise


def write_text_atomic(path: str | os.PathLike, content: str, force: bool = False) -> Path:
    with staged_file(path, force) as tmp:
        tmp.write_text(content, encoding="utf-8")
    return Path(path)
