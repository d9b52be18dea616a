"""One way in for every command: a checkpoint path (and an optional adapter) to an OpenedCodec.

With an adapter, the adapter opens the path (its code runs because the user named it).
Without one: an ONNX codec folder (or its codec.json) opens with onnxruntime, anything
else as the built-in safetensors checkpoint. Code is never run because it lies next to a
checkpoint.
"""

from __future__ import annotations

import os
from pathlib import Path

from core.codecs.contract import OpenedCodec


def is_builtin_checkpoint(path: str | os.PathLike) -> bool:
    """A file with chunkscope's safetensors metadata (read from the header only, no torch)."""
    from core.codecs.checkpoint import read_checkpoint_info
    from core.errors import ChunkscopeError

    path = Path(path)
    if not path.is_file():
        return False
    try:
        read_checkpoint_info(path)
    except ChunkscopeError:
        return False
    return True


def uses_adapter(path: str | os.PathLike) -> bool:
    """Whether `--adapter` applies to this path: every checkpoint not recognised as built-in or ONNX."""
    from core.codecs.onnx import is_onnx_codec

    return not (is_onnx_codec(path) or is_builtin_checkpoint(path))


def open_codec(path: str | os.PathLike, adapter: str | None = None) -> OpenedCodec:
    """Open one checkpoint: through `adapter` when given, else as ONNX or built-in."""
    if adapter:
        from core.codecs.adapter import load_with_adapter

        return load_with_adapter(path, adapter)
    from core.codecs.onnx import is_onnx_codec, load_onnx_codec

    if is_onnx_codec(path):
        return load_onnx_codec(path)
    from core.codecs.checkpoint import load_codec

    return load_codec(path)


def open_checkpoint(path: str | os.PathLike, adapter: str | None = None) -> OpenedCodec:
    """The commands' rule: `adapter` opens every checkpoint not recognised as built-in or ONNX."""
    return open_codec(path, adapter if adapter and uses_adapter(path) else None)


NOT_CHECKPOINTS = (".py", ".txt", ".md", ".log", ".json", ".csv", ".yaml", ".yml", ".html")


def checkpoints_in_folder(folder: Path, adapter: str | None = None) -> list[Path]:
    """A training run's checkpoints: built-in files and ONNX folders; with an adapter, every entry
    that is not hidden and not plainly something else (text, logs, code, configs)."""
    from core.codecs.onnx import is_onnx_codec

    entries = sorted(p for p in folder.iterdir() if not p.name.startswith("."))
    if adapter:
        return [p for p in entries if p.is_dir() or p.suffix.lower() not in NOT_CHECKPOINTS]
    return [p for p in entries if (p.is_file() and p.suffix == ".safetensors") or (p.is_dir() and is_onnx_codec(p))]
