"""Encoding a text once, and drawing the noise that perturbs its latents.

ε ~ N(0, I) is drawn per (chunk, repeat) from a generator seeded by (seed, repeat,
block of NOISE_BLOCK chunks), so the same chunk gets the same ε at every sigma, in the
sweep and in the live view, whatever batch size is used (common random numbers).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property
from typing import Callable, Mapping

import numpy as np

from core.codecs.contract import opened
from core.deferred import torch
from core.errors import SettingsError, SweepCancelled

NOISE_BLOCK = 256

Progress = Callable[[int, int], None]
ShouldStop = Callable[[], bool]


ENCODE_BATCH = 4096  # chunks per encode call when a whole text is encoded


@dataclass(frozen=True)
class LatentScale:
    """Σ mean² per latent dimension (float64) over `chunks` chunks: all a sweep needs of the whole
    text's latents. Sums over consecutive ENCODE_BATCH blocks, added in order, so a text encoded
    block by block and the same text held whole give the same numbers."""

    sumsq: np.ndarray  # [D] float64
    chunks: int

    @property
    def rms_per_dim(self) -> torch.Tensor:
        """r_j = RMS of mean_j over the chunks: the data-scale of DESIGN.md (float32 [D])."""
        return torch.from_numpy(np.sqrt(self.sumsq / max(self.chunks, 1))).float()

    @property
    def latent_rms(self) -> float:
        return float(math.sqrt(self.sumsq.sum() / max(self.chunks * len(self.sumsq), 1)))

    @staticmethod
    def of_parts(parts: "list[np.ndarray]", chunks: int) -> "LatentScale":
        """The scale of consecutive blocks' Σ mean² (scale_parts), added in order as measure_scale adds them."""
        sumsq = None
        for part in parts:
            sumsq = part if sumsq is None else sumsq + part
        return LatentScale(sumsq, chunks)

    def merge(self, other: "LatentScale") -> "LatentScale":
        return LatentScale(self.sumsq + other.sumsq, self.chunks + other.chunks)

    @staticmethod
    def of(mean: torch.Tensor) -> "LatentScale":
        sumsq = np.zeros(mean.shape[1], dtype=np.float64)
        for start in range(0, mean.shape[0], ENCODE_BATCH):
            sumsq += mean[start : start + ENCODE_BATCH].double().square().sum(0).numpy()
        return LatentScale(sumsq, int(mean.shape[0]))


@dataclass
class Encoded:
    """The posterior of chunks of a text: mean [N, D] and, for variational codecs, std [N, D].

    `data_scale` is the text's r when these are only some of its chunks (a sweep's batch);
    by default r is measured over the chunks held here."""

    mean: torch.Tensor
    std: torch.Tensor | None
    data_scale: torch.Tensor | None = None

    @property
    def num_chunks(self) -> int:
        return int(self.mean.shape[0])

    @cached_property
    def scale(self) -> LatentScale:
        return LatentScale.of(self.mean)

    @property
    def rms_per_dim(self) -> torch.Tensor:
        """r_j = RMS of mean_j over the text's chunks: the data-scale of DESIGN.md."""
        return self.data_scale if self.data_scale is not None else self.scale.rms_per_dim

    @property
    def latent_rms(self) -> float:
        return self.scale.latent_rms


def encode_chunks(
    codec, chunks, batch: int = ENCODE_BATCH, progress: Progress | None = None, should_stop: ShouldStop | None = None
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


def measure_scale(codec, chunks, progress: Progress | None = None, should_stop: ShouldStop | None = None) -> LatentScale:
    """The text's LatentScale, encoding it block by block and keeping no latent."""
    n = chunks.num_chunks
    parts = scale_parts(codec, chunks.token_ids, chunks.pad_id, 0, n, progress=progress, should_stop=should_stop)
    return LatentScale.of_parts(parts, n)


def scale_parts(
    codec, ids: np.ndarray, pad_id: int, start: int, stop: int, progress: Progress | None = None,
    should_stop: ShouldStop | None = None,
) -> list[np.ndarray]:
    """Σ mean² [D] float64 of each ENCODE_BATCH block of chunks start..stop, encoding block by block.

    `start` is a multiple of ENCODE_BATCH and `ids` the range's own token ids
    (token_ids[start*K : stop*K], the text's last chunk ragged), so each block is encoded exactly as
    measure_scale encodes it: the parts of consecutive ranges, summed in order by LatentScale.of_parts,
    are measure_scale's numbers bit for bit. This is how a cluster's workers share the planning pass."""
    if start % ENCODE_BATCH or stop < start:
        raise SettingsError(f"a planning range must start at a multiple of {ENCODE_BATCH} chunks, not {start}..{stop}.")
    parts = []
    for _, b, mean in encoded_blocks(codec, ids, pad_id, start, stop, should_stop):
        parts.append(mean.double().square().sum(0).numpy())
        if progress is not None:
            progress(b - start, stop - start)
    return parts


def encoded_blocks(codec, ids: np.ndarray, pad_id: int, start: int, stop: int, should_stop: ShouldStop | None = None):
    """(a, b, mean float32 [b - a, D]) of each ENCODE_BATCH block a..b of chunks start..stop, `ids` being the
    range's own token ids from chunk `start` (a multiple of ENCODE_BATCH): each block is encoded exactly as an
    encoding pass over the whole text encodes it."""
    from core.engine.text import padded_ids

    codec = opened(codec)
    k = codec.chunk_size
    ids = np.asarray(ids)
    for a in range(start, stop, ENCODE_BATCH):
        if should_stop is not None and should_stop():
            raise SweepCancelled()
        b = min(a + ENCODE_BATCH, stop)
        yield a, b, codec.encode(padded_ids(ids[(a - start) * k : (b - start) * k], b - a, k, pad_id))[0].float()


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
