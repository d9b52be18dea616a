"""Messages for a user: every error shown is one sentence naming the user's own path."""

from __future__ import annotations

import errno
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from core.errors import ChunkscopeError

_REASONS = {
    errno.EROFS: "the file system is read-only",
    errno.EACCES: "permission is denied",
    errno.EPERM: "permission is denied",
    errno.ENOTDIR: "a part of the path is a file, not a folder",
    errno.ENOENT: "it or its folder does not exist",
    errno.EISDIR: "it is a folder",
    errno.ENOSPC: "the disk is full",
    errno.EDQUOT: "the disk quota is used up",
    errno.ENAMETOOLONG: "the name is too long",
    errno.EEXIST: "something is already there",
}


def error_text(exc: Exception, path: str | Path, doing: str) -> str:
    """One sentence for a user: a ChunkscopeError's own words, else what went wrong with `path`
    (the user's path, never a staged temp file the system named)."""
    if isinstance(exc, ChunkscopeError) or not isinstance(exc, OSError) or exc.errno is None:
        return str(exc)  # core's sentence, or an OSError raised with a sentence of ours
    reason = _REASONS.get(exc.errno) or (exc.strerror or "the system refused").rstrip(".").lower()
    return f"{path} could not be {doing}: {reason}."


@contextmanager
def user_path(path: str | Path, doing: str) -> Iterator[None]:
    """Turn an OSError raised inside into a ChunkscopeError naming `path`."""
    try:
        yield
    except ChunkscopeError:
        raise
    except OSError as exc:
        raise ChunkscopeError(error_text(exc, path, doing)) from None
