"""Encoding a text once, and drawing the noise that perturbs its latents.

ε ~ N(0, I) is drawn per (chunk, repeat) from a generator seeded by (seed, repeat,
block of NOISE_BLOCK chunks), so the same chunk gets the same ε at every sigma, in the
sweep and in the live view, whatever batch size is used (common random numbers).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from core.codecs.contract import opened
from core.deferred import torch
from core.errors import SettingsError, SweepCancelled

NOISE_MODELS = ("isotropic", "posterior", "data-scale")
NOISE_BLOCK = 256

Progress = Callable[[int, int], None]
ShouldStop = Callable[[], bool]


@dataclass
class Encoded:
    """The posterior of every chunk of a text: mean [N, D] and, for variational codecs, std [N, D]."""

    mean: torch.Tensor
    std: torch.Tensor | None

    @property
    def num_chunks(self) -> int:
        return int(self.mean.shape[0])

    @property
    def rms_per_dim(self) -> torch.Tensor:
        """r_j = RMS of mean_j over the chunks: the data-scale of DESIGN.md."""
        return self.mean.square().mean(0).sqrt()

    @property
    def latent_rms(self) -> float:
        return float(self.mean.square().mean().sqrt())


def encode_chunks(
    codec, chunks, batch: int = 4096, progress: Progress | None = None, should_stop: ShouldStop | None = None
) -> Encoded:
    codec = opened(codec)
    n = chunks.num_chunks
    means, stds = [], []
    for start in range(0, n, batch):
        if should_stop is not None and should_stop():
            raise SweepCancelled()
        mean, std = codec.encode(chunks.ids(start, start + batch))
        means.append(mean.float())
        if std is not None:
            stds.append(std.float())
        if progress is not None:
            progress(min(start + batch, n), n)
    return Encoded(torch.cat(means), torch.cat(stds) if stds else None)


def check_noise(noise: str, codec) -> None:
    if noise not in NOISE_MODELS:
        raise SettingsError(f"the noise model must be one of {', '.join(NOISE_MODELS)}, not {noise!r}.")
    if noise == "posterior" and not codec.variational:
        raise SettingsError(f"posterior noise needs a variational codec, and {opened(codec).name} is a plain autoencoder.")


def noise_scale(noise: str, encoded: Encoded, start: int, stop: int) -> torch.Tensor:
    """The per-dimension factor that multiplies sigma · ε for chunks start..stop."""
    if noise == "isotropic":
        return torch.ones(1, encoded.mean.shape[1])
    if noise == "posterior":
        if encoded.std is None:
            raise SettingsError("posterior noise needs a variational codec, which returns a posterior std.")
        return encoded.std[start:stop]
    if noise == "data-scale":
        return encoded.rms_per_dim.unsqueeze(0)
    raise SettingsError(f"the noise model must be one of {', '.join(NOISE_MODELS)}, not {noise!r}.")


def _block_seed(seed: int, repeat: int, block: int) -> int:
    return int(np.random.SeedSequence([int(seed), int(repeat), int(block)]).generate_state(1, np.uint64)[0])


def draw_eps(seed: int, repeat: int, start: int, stop: int, dim: int) -> torch.Tensor:
    """ε for chunks start..stop in repeat `repeat`; any range gives the same rows as the whole."""
    first = start - start % NOISE_BLOCK
    parts = []
    for block_start in range(first, stop, NOISE_BLOCK):
        generator = torch.Generator().manual_seed(_block_seed(seed, repeat, block_start // NOISE_BLOCK))
        parts.append(torch.randn(NOISE_BLOCK, dim, generator=generator))
    if not parts:
        return torch.zeros(0, dim)
    return torch.cat(parts)[start - first : stop - first]
