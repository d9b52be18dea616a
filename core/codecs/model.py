"""The reference chunk autoencoder, "chunk-mlp": small, fast on a CPU, ours.

Encoder: token embedding + position embedding for each of the K slots, flattened, a
linear map to the trunk width, pre-norm residual MLP blocks, then a mean head (and a
log-std head when variational). Decoder: latent -> trunk width, residual blocks, one
projection to K slot vectors, and logits through the (tied) token embedding.

Training-only regularisers (latent dropout, input-token masking, the posterior sample)
live in `core.training.train`; this module is the deterministic function the tool inspects.
"""

from __future__ import annotations

import torch
from torch import nn

from core.codecs.arch import ARCHITECTURES, ChunkMLPConfig


class ResidualBlock(nn.Module):
    def __init__(self, width: int):
        super().__init__()
        self.norm = nn.LayerNorm(width)
        self.linear = nn.Linear(width, width)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x + self.linear(nn.functional.gelu(self.norm(x)))


class ChunkMLP(nn.Module):
    def __init__(self, config: ChunkMLPConfig):
        super().__init__()
        c = config
        self.config = c
        self.token_embedding = nn.Embedding(c.vocab_size, c.embed_dim)
        self.enc_position = nn.Parameter(torch.zeros(c.chunk_size, c.embed_dim))
        self.enc_in = nn.Linear(c.chunk_size * c.embed_dim, c.width)
        self.enc_blocks = nn.ModuleList(ResidualBlock(c.width) for _ in range(c.depth))
        self.enc_norm = nn.LayerNorm(c.width)
        self.mean_head = nn.Linear(c.width, c.latent_dim)
        self.logstd_head = nn.Linear(c.width, c.latent_dim) if c.variational else None
        self.dec_in = nn.Linear(c.latent_dim, c.width)
        self.dec_blocks = nn.ModuleList(ResidualBlock(c.width) for _ in range(c.depth))
        self.dec_norm = nn.LayerNorm(c.width)
        self.dec_out = nn.Linear(c.width, c.chunk_size * c.embed_dim)
        self.slot_norm = nn.LayerNorm(c.embed_dim)
        self.output_bias = nn.Parameter(torch.zeros(c.vocab_size))
        nn.init.normal_(self.token_embedding.weight, std=0.5)
        nn.init.normal_(self.enc_position, std=0.1)

    def embed(self, ids: torch.Tensor) -> torch.Tensor:
        return self.token_embedding(ids) + self.enc_position

    def encode_embedded(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor | None]:
        h = self.enc_in(x.flatten(1))
        for block in self.enc_blocks:
            h = block(h)
        h = self.enc_norm(h)
        mean = self.mean_head(h)
        if self.logstd_head is None:
            return mean, None
        return mean, self.logstd_head(h).clamp(-12.0, 4.0).exp()

    def encode(self, ids: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor | None]:
        return self.encode_embedded(self.embed(ids))

    def decode(self, z: torch.Tensor) -> torch.Tensor:
        h = self.dec_in(z)
        for block in self.dec_blocks:
            h = block(h)
        h = self.dec_out(self.dec_norm(h))
        slots = self.slot_norm(h.view(z.shape[0], self.config.chunk_size, self.config.embed_dim))
        return nn.functional.linear(slots, self.token_embedding.weight, self.output_bias)


def build_model(config: ChunkMLPConfig) -> ChunkMLP:
    if config.arch not in ARCHITECTURES:
        raise ValueError(f"unknown architecture {config.arch!r}")
    return ChunkMLP(config)
