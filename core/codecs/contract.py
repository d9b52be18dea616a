"""The codec contract of DESIGN.md, written down once, and what the tool adds to a codec.

`ChunkCodec` is everything the engine, the analyses and the views may ask of a model.
A codec is *opened* (the built-in checkpoint, a Python adapter, an ONNX folder, or an
object handed over in memory) into an `OpenedCodec`: the codec plus what the tool knows
about where it came from (path, sha256, how it was opened). Every consumer in `core`
takes either and calls `opened(codec)` first, so a bare object that meets the Protocol
works everywhere.
"""

from __future__ import annotations

import weakref
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Mapping, Protocol, runtime_checkable

import numpy as np

from core.deferred import torch
from core.errors import ChunkscopeError

CONTRACT_SIZES = ("chunk_size", "latent_dim", "vocab_size", "pad_id")
OPENED_AS = ("built-in", "adapter", "onnx", "in memory")


@runtime_checkable
class ChunkCodec(Protocol):
    """A chunk autoencoder as the tool sees it (DESIGN.md, "The codec contract").

    Optional members, used when present: `name` (str), `card` (a JSON-able dict),
    `describe()` (a mapping of architecture-specific facts to show, e.g. widths and
    parameter count), `supports_gradients` (bool, default True: `decode` is a torch
    function that gradients flow through).
    """

    chunk_size: int
    latent_dim: int
    vocab_size: int
    pad_id: int
    variational: bool
    tokenizer: Any  # tokenizers.Tokenizer

    def encode(self, ids: "torch.Tensor") -> "tuple[torch.Tensor, torch.Tensor | None]":
        """LongTensor[N, K] -> (mean FloatTensor[N, D], std FloatTensor[N, D] or None)."""

    def decode(self, z: "torch.Tensor") -> "torch.Tensor":
        """FloatTensor[N, D] -> logits FloatTensor[N, K, V]."""


class GradientsUnavailable(ChunkscopeError):
    """An analysis needs gradients through `decode` and the codec cannot give them."""


@dataclass(frozen=True)
class CodecSource:
    """Where an opened codec came from: recorded in every result's provenance."""

    path: str = ""
    sha256: str = ""
    opened_as: str = "in memory"
    adapter: str = ""  # the adapter file (or entry point) whose code built the codec
    adapter_sha256: str = ""

    def to_dict(self) -> dict[str, str]:
        return {k: v for k, v in asdict(self).items() if v or k in ("path", "sha256", "opened_as")}


_BYTE_LENGTHS: "weakref.WeakKeyDictionary[Any, np.ndarray]" = weakref.WeakKeyDictionary()


def byte_lengths_of(tokenizer) -> np.ndarray:
    """Bytes each token stands for (byte-level BPE), made once per tokenizer."""
    from core.codecs.tokenizer import token_byte_lengths

    try:
        table = _BYTE_LENGTHS.get(tokenizer)
    except TypeError:  # not weak-referenceable
        return token_byte_lengths(tokenizer)
    if table is None:
        table = _BYTE_LENGTHS[tokenizer] = token_byte_lengths(tokenizer)
    return table


class OpenedCodec:
    """A codec meeting `ChunkCodec`, with the tool's knowledge of its origin.

    `encode` and `decode` run under inference mode (the sweep and views never need
    gradients); `decode_with_grad` is for analyses that do.
    """

    def __init__(self, codec: ChunkCodec, source: CodecSource | None = None, name: str | None = None):
        if isinstance(codec, OpenedCodec):
            raise TypeError("the codec is already opened")
        self.codec = codec
        self.source = source or CodecSource()
        self.tokenizer = codec.tokenizer
        self.chunk_size = int(codec.chunk_size)
        self.latent_dim = int(codec.latent_dim)
        self.vocab_size = int(codec.vocab_size)
        self.pad_id = int(codec.pad_id)
        self.variational = bool(codec.variational)
        own = getattr(codec, "name", None)
        self.name = name or (own if isinstance(own, str) and own else "") or (Path(self.source.path).stem if self.source.path else "unsaved")
        card = getattr(codec, "card", None)
        self.card: dict[str, Any] = dict(card) if isinstance(card, Mapping) else {}

    @property
    def sha256(self) -> str:
        return self.source.sha256

    @property
    def path(self) -> str:
        return self.source.path

    @property
    def token_byte_lengths(self) -> np.ndarray:
        return byte_lengths_of(self.tokenizer)

    @property
    def supports_gradients(self) -> bool:
        return bool(getattr(self.codec, "supports_gradients", True))

    def encode(self, ids: "torch.Tensor") -> "tuple[torch.Tensor, torch.Tensor | None]":
        with torch.inference_mode():
            mean, std = self.codec.encode(ids)
        return mean.float(), (None if std is None else std.float())

    def decode(self, z: "torch.Tensor") -> "torch.Tensor":
        with torch.inference_mode():
            return self.codec.decode(z)

    def decode_with_grad(self, z: "torch.Tensor") -> "torch.Tensor":
        """Decode with autograd on, for analyses that follow gradients (e.g. worst case)."""
        if not self.supports_gradients:
            raise GradientsUnavailable(f"{self.name} cannot give gradients through its decoder (it is opened as {self.source.opened_as}).")
        with torch.enable_grad():
            return self.codec.decode(z)

    def architecture(self) -> dict[str, Any]:
        """The codec's own description (`describe()`), when it offers one; else nothing."""
        describe = getattr(self.codec, "describe", None)
        if not callable(describe):
            return {}
        facts = describe()
        return dict(facts) if isinstance(facts, Mapping) else {}

    def contract_dict(self) -> dict[str, Any]:
        return {
            "chunk_size": self.chunk_size, "latent_dim": self.latent_dim, "vocab_size": self.vocab_size,
            "pad_id": self.pad_id, "variational": self.variational,
        }

    def describe(self) -> dict[str, Any]:
        """Everything known about the codec, JSON-able: for provenance and `info --json`."""
        return {
            "name": self.name,
            **self.source.to_dict(),
            "config": self.contract_dict() | {"architecture": self.architecture()},
            "card": self.card,
        }

    def __repr__(self) -> str:
        return f"OpenedCodec({self.name!r}, {self.source.opened_as}, K={self.chunk_size}, D={self.latent_dim}, V={self.vocab_size})"


def opened(codec: ChunkCodec | OpenedCodec) -> OpenedCodec:
    """The codec as the tool uses it; a bare contract object is opened "in memory"."""
    if isinstance(codec, OpenedCodec):
        return codec
    return OpenedCodec(codec)
