"""The reference architecture's configuration: what a checkpoint's config JSON holds.

Kept apart from `core.codecs.model` so reading a checkpoint's header needs no torch.
"""

from __future__ import annotations

from dataclasses import MISSING, asdict, dataclass, fields

ARCHITECTURES = ("chunk-mlp",)


@dataclass(frozen=True)
class ChunkMLPConfig:
    chunk_size: int
    vocab_size: int
    latent_dim: int
    embed_dim: int = 128
    width: int = 512
    depth: int = 2
    variational: bool = False
    pad_id: int = 0
    arch: str = "chunk-mlp"

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> "ChunkMLPConfig":
        known = {f.name for f in fields(cls)}
        missing = [f.name for f in fields(cls) if f.name not in data and f.default is MISSING]
        if missing:
            raise KeyError(", ".join(missing))
        return cls(**{k: v for k, v in data.items() if k in known})
