"""The one-file checkpoint: safetensors tensors plus string metadata (DESIGN.md).

Loading validates everything in one place and raises `CheckpointError` with one sentence
naming the file and the problem. Nothing is ever unpickled.
"""

from __future__ import annotations

import hashlib
import json
import os
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from safetensors import safe_open
from tokenizers import Tokenizer

from core.codecs.arch import ARCHITECTURES, ChunkMLPConfig
from core.codecs.contract import CodecSource, OpenedCodec
from core.deferred import torch
from core.errors import CheckpointError
from core.outputs.files import staged_file

FORMAT_VERSION = 1
KEY_FORMAT = "chunkscope.format"
KEY_CONFIG = "chunkscope.config"
KEY_TOKENIZER = "chunkscope.tokenizer"
KEY_CARD = "chunkscope.card"
REQUIRED_KEYS = (KEY_FORMAT, KEY_CONFIG, KEY_TOKENIZER)
ALLOWED_DTYPES = ("F32", "F16", "BF16")  # safetensors names of float32, float16, bfloat16
SAVE_DTYPES = ("float32", "float16", "bfloat16")


def file_sha256(path: str | os.PathLike) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


@dataclass
class Codec:
    """The built-in architecture as a `ChunkCodec`: model + tokenizer (+ card).

    `load_codec` opens it into an `OpenedCodec`, which adds the file's path and sha256."""

    model: Any  # core.codecs.model.ChunkMLP (imported with torch, on first load)
    tokenizer: Tokenizer
    card: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.model.eval()

    @property
    def config(self) -> ChunkMLPConfig:
        return self.model.config

    @property
    def chunk_size(self) -> int:
        return self.config.chunk_size

    @property
    def latent_dim(self) -> int:
        return self.config.latent_dim

    @property
    def vocab_size(self) -> int:
        return self.config.vocab_size

    @property
    def pad_id(self) -> int:
        return self.config.pad_id

    @property
    def variational(self) -> bool:
        return self.config.variational

    @property
    def num_parameters(self) -> int:
        return sum(p.numel() for p in self.model.parameters())

    def encode(self, ids: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor | None]:
        return self.model.encode(ids)

    def decode(self, z: torch.Tensor) -> torch.Tensor:
        return self.model.decode(z)

    def describe(self) -> dict[str, Any]:
        c = self.config
        return {
            "architecture": c.arch,
            "embed / width / depth": f"{c.embed_dim} / {c.width} / {c.depth}",
            "parameters": self.num_parameters,
        }


def open_builtin(codec: Codec, path: str | os.PathLike = "", sha256: str = "") -> OpenedCodec:
    return OpenedCodec(codec, CodecSource(path=str(path), sha256=sha256, opened_as="built-in"))


def save_codec(codec: Codec | OpenedCodec, path: str | os.PathLike, dtype: str = "float32") -> str:
    """Write a built-in codec to one safetensors file atomically; returns the file's sha256."""
    if isinstance(codec, OpenedCodec):
        codec = codec.codec
    if dtype not in SAVE_DTYPES:
        raise ValueError(f"dtype must be one of {sorted(SAVE_DTYPES)}, not {dtype!r}")
    path = Path(path)
    from safetensors.torch import save_file

    tensors = {k: v.detach().to(getattr(torch, dtype)).contiguous() for k, v in codec.model.state_dict().items()}
    metadata = {
        KEY_FORMAT: str(FORMAT_VERSION),
        KEY_CONFIG: json.dumps(codec.config.to_dict(), sort_keys=True),
        KEY_TOKENIZER: codec.tokenizer.to_str(),
    }
    if codec.card:
        metadata[KEY_CARD] = json.dumps(codec.card, sort_keys=True)
    with staged_file(path, force=True) as tmp:
        save_file(tensors, str(tmp), metadata=metadata)
    return file_sha256(path)


def _read_header(path: Path) -> dict:
    """Check the safetensors framing by hand so every failure gets a plain sentence."""
    name = path.name
    try:
        size = path.stat().st_size
        with open(path, "rb") as handle:
            head = handle.read(8)
            if len(head) < 8:
                raise CheckpointError(f"{name} is not a safetensors file (it is only {size} byte{'' if size == 1 else 's'} long).")
            (header_len,) = struct.unpack("<Q", head)
            if header_len > 100_000_000:
                raise CheckpointError(f"{name} is not a safetensors file (its first bytes are not a header length).")
            if 8 + header_len > size:
                raise CheckpointError(f"{name} is truncated: its header says {header_len} bytes but the file ends first.")
            raw = handle.read(header_len)
    except OSError as exc:
        raise CheckpointError(f"{name} cannot be read: {exc.strerror or exc}.") from exc
    try:
        header = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        raise CheckpointError(f"{name} is not a safetensors file (its header is not JSON).") from None
    if not isinstance(header, dict):
        kind = "a list" if isinstance(header, list) else "a string" if isinstance(header, str) else "a single value"
        raise CheckpointError(f"{name} is not a safetensors file (its header is JSON, but {kind}, not an object).")
    data_len = size - 8 - header_len
    for key, info in header.items():
        if key == "__metadata__":
            continue
        try:
            start, end = info["data_offsets"]
        except (TypeError, KeyError, ValueError):
            raise CheckpointError(f"{name} is not a safetensors file (tensor {key!r} has no data offsets).") from None
        if end > data_len:
            raise CheckpointError(f"{name} is truncated: tensor {key!r} runs past the end of the file.")
    return header


@dataclass
class CheckpointInfo:
    """What a checkpoint's header says, validated, read without torch or the weights."""

    path: Path
    config: ChunkMLPConfig
    card: dict[str, Any]
    header: dict[str, Any]

    @property
    def metadata(self) -> dict[str, str]:
        return self.header.get("__metadata__") or {}


def read_checkpoint_info(path: str | os.PathLike) -> CheckpointInfo:
    """Read and validate a checkpoint's framing, format, config and card (fast: the header only)."""
    path = Path(path)
    name = path.name
    if not path.is_file():
        raise CheckpointError(f"{path} does not exist or is not a file.")
    header = _read_header(path)
    metadata = header.get("__metadata__") or {}
    for key in REQUIRED_KEYS:
        if key not in metadata:
            raise CheckpointError(f"{name} is not a chunkscope checkpoint: the metadata key {key!r} is missing.")
    try:
        version = int(metadata[KEY_FORMAT])
    except ValueError:
        raise CheckpointError(f"{name} has an unreadable format version {metadata[KEY_FORMAT]!r}.") from None
    if version > FORMAT_VERSION:
        raise CheckpointError(
            f"{name} uses checkpoint format {version}, newer than this tool reads (up to {FORMAT_VERSION}); update chunkscope."
        )
    try:
        raw_config = json.loads(metadata[KEY_CONFIG])
        if not isinstance(raw_config, dict):
            raise ValueError
    except ValueError:
        raise CheckpointError(f"{name} has a {KEY_CONFIG} entry that is not a JSON object.") from None
    arch = raw_config.get("arch")
    if arch not in ARCHITECTURES:
        raise CheckpointError(f"{name} uses an unknown architecture {arch!r} (this tool knows {', '.join(ARCHITECTURES)}).")
    try:
        config = ChunkMLPConfig.from_dict(raw_config)
        for key in ("chunk_size", "vocab_size", "latent_dim", "embed_dim", "width", "depth", "pad_id"):
            value = getattr(config, key)
            if not isinstance(value, int) or isinstance(value, bool) or value < (0 if key in ("pad_id", "depth") else 1):
                raise ValueError(f"{key} = {value!r}")
        if not isinstance(config.variational, bool):
            raise ValueError(f"variational = {config.variational!r}")
        if config.pad_id >= config.vocab_size:
            raise ValueError(f"pad_id {config.pad_id} is outside the vocabulary")
    except KeyError as exc:
        raise CheckpointError(f"{name} has a config without the size(s) {exc.args[0]}.") from None
    except (TypeError, ValueError) as exc:
        raise CheckpointError(f"{name} has an invalid config: {exc}.") from None
    card: dict[str, Any] = {}
    if KEY_CARD in metadata:
        try:
            card = json.loads(metadata[KEY_CARD])
            if not isinstance(card, dict):
                raise ValueError
        except ValueError:
            raise CheckpointError(f"{name} has a {KEY_CARD} entry that is not a JSON object.") from None
    return CheckpointInfo(path=path, config=config, card=card, header=header)


def load_codec(path: str | os.PathLike) -> OpenedCodec:
    """Read and validate one checkpoint file; raise CheckpointError naming any problem."""
    info = read_checkpoint_info(path)
    path, name, config, card, header, metadata = info.path, info.path.name, info.config, info.card, info.header, info.metadata
    arch = config.arch
    try:
        tokenizer = Tokenizer.from_str(metadata[KEY_TOKENIZER])
    except Exception:
        raise CheckpointError(f"{name} has a {KEY_TOKENIZER} entry the tokenizers library cannot read.") from None
    if tokenizer.get_vocab_size() != config.vocab_size:
        raise CheckpointError(
            f"{name} has a tokenizer of {tokenizer.get_vocab_size()} tokens but a model vocabulary of {config.vocab_size}."
        )

    from core.codecs.model import build_model

    model = build_model(config)
    expected = model.state_dict()
    for key, described in header.items():
        if key == "__metadata__":
            continue
        if key not in expected:
            raise CheckpointError(f"{name} holds a tensor {key!r} that the {arch} architecture does not have.")
        if described.get("dtype") not in ALLOWED_DTYPES:
            raise CheckpointError(f"{name} stores tensor {key!r} as {described.get('dtype')}; only float32, float16 and bfloat16 are read.")
    state = {}
    try:
        with safe_open(str(path), framework="pt") as handle:
            stored = set(handle.keys())
            for key, want in expected.items():
                if key not in stored:
                    raise CheckpointError(f"{name} is missing the tensor {key!r}.")
                tensor = handle.get_tensor(key)
                if tuple(tensor.shape) != tuple(want.shape):
                    raise CheckpointError(
                        f"{name} has tensor {key!r} of shape {tuple(tensor.shape)}, but its config needs {tuple(want.shape)}."
                    )
                tensor = tensor.to(torch.float32)
                if not torch.isfinite(tensor).all():
                    raise CheckpointError(f"{name} has non-finite values (NaN or infinity) in tensor {key!r}.")
                state[key] = tensor
    except CheckpointError:
        raise
    except Exception as exc:
        raise CheckpointError(f"{name} could not be read as safetensors: {exc}.") from None
    model.load_state_dict(state)
    return open_builtin(Codec(model=model, tokenizer=tokenizer, card=card), path, file_sha256(path))
