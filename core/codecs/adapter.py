"""Open a checkpoint through a user's Python adapter (DESIGN.md, "Three ways to open a codec").

An adapter is a `.py` file defining `load(path: str)` (or `FILE.py:FUNC`), or an installed
entry point in the group `chunkscope.adapters`. It runs the user's code, so it is only
ever run when the user names it; never because it lies next to a checkpoint.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import importlib.util
import itertools
import os
import sys
import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from core.codecs.checkpoint import file_sha256
from core.codecs.conformance import check_codec
from core.codecs.contract import CodecSource, OpenedCodec
from core.errors import ChunkscopeError

ENTRY_POINT_GROUP = "chunkscope.adapters"
_counter = itertools.count()


class AdapterError(ChunkscopeError):
    """An adapter cannot be used, or it failed on a checkpoint; the message names both."""


def path_sha256(path: str | os.PathLike) -> str:
    """sha256 of a file, or of a folder: each file's relative path and content, in sorted order."""
    path = Path(path)
    if path.is_file():
        return file_sha256(path)
    digest = hashlib.sha256()
    files = sorted((p for p in path.rglob("*") if p.is_file()), key=lambda p: p.relative_to(path).as_posix())
    for file in files:
        rel = file.relative_to(path).as_posix().encode("utf-8")
        digest.update(len(rel).to_bytes(8, "little") + rel)
        digest.update(bytes.fromhex(file_sha256(file)))
    return digest.hexdigest()


@dataclass(frozen=True)
class AdapterSpec:
    """What `--adapter` named: a file (and function), or an entry point."""

    text: str
    file: Path | None = None
    function: str = "load"
    entry_point: str = ""

    @property
    def label(self) -> str:
        return f"entry point {self.entry_point}" if self.entry_point else str(self.file)


def parse_spec(spec: str) -> AdapterSpec:
    """`FILE.py`, `FILE.py:FUNC`, or an entry point NAME (anything without `.py` or a path separator)."""
    spec = str(spec)
    file, sep, func = spec.rpartition(":")
    if sep and file.endswith(".py") and func.isidentifier():
        return AdapterSpec(spec, Path(file).absolute(), func)
    if spec.endswith(".py") or os.sep in spec or "/" in spec or Path(spec).exists():
        return AdapterSpec(spec, Path(spec).absolute())
    return AdapterSpec(spec, entry_point=spec)


def adapter_identity(spec: str | AdapterSpec) -> tuple[str, str]:
    """(what runs, its sha256): the line the command line prints before running the adapter."""
    spec = parse_spec(spec) if isinstance(spec, str) else spec
    if spec.entry_point:
        return spec.label, ""
    _check_file(spec)
    return str(spec.file), file_sha256(spec.file)


def _check_file(spec: AdapterSpec) -> None:
    file = spec.file
    if not file.exists():
        raise AdapterError(f"The adapter {spec.text} does not exist.")
    if not file.is_file():
        raise AdapterError(f"The adapter {spec.text} is a folder, not a Python file.")
    if file.suffix != ".py":
        raise AdapterError(f"The adapter {spec.text} is not a Python file (an adapter is a .py file defining load(path)).")


def _own_frame(exc: BaseException, file: Path | None) -> str:
    """`file:line` of the deepest frame in the adapter's own file (else the deepest frame)."""
    frames = traceback.extract_tb(exc.__traceback__)
    if not frames:
        return ""
    own = [f for f in frames if file is not None and Path(f.filename) == file]
    frame = (own or frames)[-1]
    return f"{frame.filename}:{frame.lineno}"


def _error_line(exc: BaseException) -> str:
    lines = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {lines[-1].strip()}" if lines else type(exc).__name__


def _resolve(spec: AdapterSpec) -> tuple[Callable, str, str]:
    """The adapter's load function, what it is called in messages, and its sha256."""
    if spec.entry_point:
        matches = list(importlib.metadata.entry_points(group=ENTRY_POINT_GROUP, name=spec.entry_point))
        if not matches:
            raise AdapterError(
                f"No adapter named {spec.entry_point} is installed (no file of that name, and no entry point in {ENTRY_POINT_GROUP})."
            )
        try:
            func = matches[0].load()
        except Exception as exc:
            raise AdapterError(f"The adapter entry point {spec.entry_point} could not be imported: {_error_line(exc)}.") from None
        if not callable(func):
            raise AdapterError(f"The adapter entry point {spec.entry_point} is not a function.")
        module_file = getattr(sys.modules.get(getattr(func, "__module__", ""), None), "__file__", None)
        sha = file_sha256(module_file) if module_file and Path(module_file).is_file() else ""
        return func, spec.label, sha
    _check_file(spec)
    file = spec.file
    sha = file_sha256(file)
    try:
        source = file.read_bytes()
        compile(source, str(file), "exec")
    except SyntaxError as exc:
        raise AdapterError(f"The adapter {spec.text} is not valid Python: {exc.msg} at line {exc.lineno}.") from None
    except (ValueError, OSError) as exc:
        raise AdapterError(f"The adapter {spec.text} is not a readable Python file ({exc}).") from None
    name = f"chunkscope_adapter_{next(_counter)}_{file.stem.replace('-', '_')}"
    module_spec = importlib.util.spec_from_file_location(name, file)
    module = importlib.util.module_from_spec(module_spec)
    sys.modules[name] = module  # dataclasses and pickling look the module up here
    try:
        module_spec.loader.exec_module(module)
    except Exception as exc:
        sys.modules.pop(name, None)
        where = _own_frame(exc, file)
        raise AdapterError(
            f"The adapter {spec.text} failed while being imported with {_error_line(exc)}" + (f" (at {where})." if where else ".")
        ) from None
    func = getattr(module, spec.function, None)
    if not callable(func):
        raise AdapterError(f"The adapter {spec.text} defines no function {spec.function}(path).")
    return func, spec.text, sha


def load_with_adapter(checkpoint_path: str | os.PathLike, adapter_spec: str | AdapterSpec) -> OpenedCodec:
    """Run the adapter's `load(path)` on a checkpoint, check the result, open it."""
    spec = parse_spec(adapter_spec) if isinstance(adapter_spec, str) else adapter_spec
    path = Path(checkpoint_path)
    if not path.exists():
        raise AdapterError(f"{checkpoint_path} does not exist.")
    func, label, adapter_sha = _resolve(spec)
    try:
        codec = func(str(path))
    except Exception as exc:
        where = _own_frame(exc, spec.file)
        raise AdapterError(
            f"The adapter {label} could not open {checkpoint_path}: {_error_line(exc)}" + (f" (at {where})." if where else ".")
        ) from None
    if codec is None:
        raise AdapterError(f"The adapter {label} returned nothing for {checkpoint_path} (its load should return a codec).")
    check_codec(codec, f"What the adapter {label} returned for {checkpoint_path}")
    source = CodecSource(
        path=str(path), sha256=path_sha256(path), opened_as="adapter",
        adapter=str(spec.file) if spec.file else spec.label, adapter_sha256=adapter_sha,
    )
    return OpenedCodec(codec, source)
