"""torch, imported on first use instead of when `core` is imported.

Importing torch takes about 2.5 s here. Deferring it lets the workbench show its window
and list the checkpoints first; the import then happens in the first background task
that decodes, and every other thread that reaches torch meanwhile waits on the import
system's lock for that module, so no one sees a half-imported torch.
"""

from __future__ import annotations

import functools
import importlib
import sys
from typing import Any, Callable, TypeVar

F = TypeVar("F", bound=Callable[..., Any])


class DeferredModule:
    """Stands for a module; the first attribute read imports it, later reads are plain lookups."""

    def __init__(self, name: str):
        object.__setattr__(self, "_name", name)

    def __getattr__(self, attr: str) -> Any:
        value = getattr(importlib.import_module(self._name), attr)
        object.__setattr__(self, attr, value)  # cached on the proxy: the next read skips __getattr__
        return value

    def __repr__(self) -> str:
        return f"<deferred module {self._name!r} ({'imported' if self._name in sys.modules else 'not imported yet'})>"


torch = DeferredModule("torch")


def inference_mode(fn: F) -> F:
    """`@torch.inference_mode()` without importing torch when the function is defined."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        with torch.inference_mode():
            return fn(*args, **kwargs)

    return wrapper  # type: ignore[return-value]
