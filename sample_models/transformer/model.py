"""A small transformer chunk autoencoder, written as a user's own model would be.

Encoder: K token embeddings plus learned positions, a few pre-norm attention blocks,
the K outputs joined and projected to a mean and a log-std (variational). Decoder: the
latent expanded to K positions, attention blocks, a projection to the vocabulary.
Plain PyTorch ops only, so torch.onnx.export traces it as it is.
"""

from __future__ import annotations

import math

import torch
from torch import nn


class Block(nn.Module):
    def __init__(self, width: int, heads: int, ff: int):
        super().__init__()
        self.heads = heads
        self.norm1 = nn.LayerNorm(width)
        self.qkv = nn.Linear(width, 3 * width)
        self.proj = nn.Linear(width, width)
        self.norm2 = nn.LayerNorm(width)
        self.mlp = nn.Sequential(nn.Linear(width, ff), nn.GELU(), nn.Linear(ff, width))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        n, k, w = x.shape
        h = self.heads
        q, kk, v = self.qkv(self.norm1(x)).reshape(n, k, 3, h, w // h).permute(2, 0, 3, 1, 4)
        att = torch.softmax(q @ kk.transpose(-1, -2) / math.sqrt(w // h), dim=-1)
        x = x + self.proj((att @ v).transpose(1, 2).reshape(n, k, w))
        return x + self.mlp(self.norm2(x))


class ChunkTransformer(nn.Module):
    def __init__(self, vocab_size: int, chunk_size: int = 4, latent_dim: int = 64, width: int = 96,
                 heads: int = 4, layers: int = 2, ff: int = 192, variational: bool = True):
        super().__init__()
        self.vocab_size, self.chunk_size, self.latent_dim = vocab_size, chunk_size, latent_dim
        self.variational = variational
        self.embed = nn.Embedding(vocab_size, width)
        self.enc_pos = nn.Parameter(torch.randn(chunk_size, width) * 0.02)
        self.enc_blocks = nn.ModuleList(Block(width, heads, ff) for _ in range(layers))
        self.enc_norm = nn.LayerNorm(width)
        self.to_latent = nn.Linear(chunk_size * width, 2 * latent_dim if variational else latent_dim)
        self.from_latent = nn.Linear(latent_dim, chunk_size * width)
        self.dec_pos = nn.Parameter(torch.randn(chunk_size, width) * 0.02)
        self.dec_blocks = nn.ModuleList(Block(width, heads, ff) for _ in range(layers))
        self.dec_norm = nn.LayerNorm(width)
        self.out = nn.Linear(width, vocab_size)

    def encode(self, ids: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor | None]:
        x = self.embed(ids) + self.enc_pos
        for block in self.enc_blocks:
            x = block(x)
        h = self.to_latent(self.enc_norm(x).flatten(1))
        if not self.variational:
            return h, None
        mean, log_std = h.chunk(2, dim=-1)
        return mean, torch.exp(log_std.clamp(-7.0, 2.0))

    def decode(self, z: torch.Tensor) -> torch.Tensor:
        x = self.from_latent(z).reshape(z.shape[0], self.chunk_size, -1) + self.dec_pos
        for block in self.dec_blocks:
            x = block(x)
        return self.out(self.dec_norm(x))


class Encoder(nn.Module):
    """The encoder alone, as the ONNX export wants it: ids -> (mean, std)."""

    def __init__(self, model: ChunkTransformer):
        super().__init__()
        self.model = model

    def forward(self, ids: torch.Tensor):
        return self.model.encode(ids)


class Decoder(nn.Module):
    def __init__(self, model: ChunkTransformer):
        super().__init__()
        self.model = model

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        return self.model.decode(z)
