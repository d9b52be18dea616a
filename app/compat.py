"""Work around a reference-count bug of PySide6 6.12 on Python 3.11.

PySide6 6.12's bindings return None (from every method without a result) and True/False
(from Signal.emit) without taking a reference, as if these objects were immortal, which
they are only from Python 3.12 on. On 3.11 each call takes one reference away, and after
enough calls the interpreter aborts ("deallocating None"). These three objects are static
and never freed, so giving them a very large reference count once makes them effectively
immortal, which is what Python 3.12 does for them.
"""

from __future__ import annotations

import ctypes
import sys

HEADROOM = 1 << 40  # more calls than any session can make


def _pyside_version() -> tuple[int, ...]:
    try:
        from importlib.metadata import version

        for name in ("PySide6-Essentials", "PySide6"):
            try:
                return tuple(int(p) for p in version(name).split(".")[:2])
            except Exception:
                continue
    except Exception:
        pass
    return ()


def make_singletons_immortal() -> bool:
    """Raise the reference counts of None, True and False when the bug can bite; True if done."""
    if sys.version_info >= (3, 12) or sys.implementation.name != "cpython" or _pyside_version() < (6, 12):
        return False
    for obj in (None, True, False):
        count = ctypes.c_ssize_t.from_address(id(obj))  # ob_refcnt, the first field of every object
        if count.value < HEADROOM:
            count.value += HEADROOM
    return True
