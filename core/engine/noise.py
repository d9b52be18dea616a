"""Encoding a text once, and drawing the noise that perturbs its latents.

ε ~ N(0, I) is drawn per (chunk, repeat) from a generator seeded by (seed, repeat,
block of NOISE_BLOCK chunks), so the same chunk gets the same ε at every sigma, in the
sweep and in the live view, whatever batch size is used (common random numbers).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Mapping

import numpy as np

from core.codecs.contract import opened
from core.deferred import torch
from core.errors import SettingsError, SweepCancelled

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


@dataclass(frozen=True)
class NoiseModel:
    """One noise model of DESIGN.md: how sigma reads, and the per-dimension factor that multiplies sigma · ε."""

    name: str
    unit: str  # short, beside a number: "relative σ"
    axis_label: str  # longer, under a plot's axis
    description: str  # the perturbed latent
    needs_variational: bool
    in_latent_units: bool  # σ is in the latent's own units, so it grows with the latent's scale
    scale: Callable[["Encoded", int, int], "torch.Tensor"]


def _ones(encoded: Encoded, start: int, stop: int) -> torch.Tensor:
    return torch.ones(1, encoded.mean.shape[1])


def _posterior_std(encoded: Encoded, start: int, stop: int) -> torch.Tensor:
    if encoded.std is None:
        raise SettingsError("posterior noise needs a variational codec, which returns a posterior std.")
    return encoded.std[start:stop]


def _rms(encoded: Encoded, start: int, stop: int) -> torch.Tensor:
    return encoded.rms_per_dim.unsqueeze(0)


NOISE_MODELS: Mapping[str, NoiseModel] = {
    m.name: m
    for m in (
        NoiseModel("isotropic", "absolute σ", "σ (absolute)", "z = mean + σ · ε", False, True, _ones),
        NoiseModel("posterior", "posterior σ", "σ in units of the posterior std", "z = mean + σ · std ⊙ ε", True, False,
                   _posterior_std),
        NoiseModel("data-scale", "relative σ", "σ relative to each latent dimension's RMS", "z = mean + σ · r ⊙ ε, "
                   "r = each dimension's RMS over the text", False, False, _rms),
    )
}


def noise_model(name: str) -> NoiseModel:
    """The noise model called `name`, or the one sentence that says which exist."""
    try:
        return NOISE_MODELS[name]
    except (KeyError, TypeError):
        raise SettingsError(f"the noise model must be one of {', '.join(NOISE_MODELS)}, not {name!r}.") from None


def sigma_unit(name: str) -> str:
    """"relative σ", "absolute σ" or "posterior σ"; plain "σ" for a name that is not a noise model."""
    model = NOISE_MODELS.get(name)
    return model.unit if model is not None else "σ"


def check_noise(noise: str, codec) -> None:
    if noise_model(noise).needs_variational and not codec.variational:
        raise SettingsError(f"{noise} noise needs a variational codec, and {opened(codec).name} is a plain autoencoder.")


def noise_scale(noise: str, encoded: Encoded, start: int, stop: int) -> torch.Tensor:
    """The per-dimension factor that multiplies sigma · ε for chunks start..stop."""
    return noise_model(noise).scale(encoded, start, stop)


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
