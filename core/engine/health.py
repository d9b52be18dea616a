"""Latent health, with no noise: KL per dimension, active dimensions, posterior std,
and each chunk's half-distance to its nearest distinct neighbour."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from core.deferred import torch
from core.engine.noise import ENCODE_BATCH, Encoded, LatentScale, noise_scale
from core.engine.text import Chunks

ACTIVE_THRESHOLD = 0.01  # variance of the mean over chunks; common practice (importance-weighted AE literature)


@dataclass
class LatentHealth:
    latent_dim: int
    num_chunks: int
    latent_rms: float
    rms_per_dim: np.ndarray  # [D]
    mean_variance_per_dim: np.ndarray  # [D] variance of the posterior mean over chunks
    active_dims: int
    kl_per_dim: np.ndarray | None  # [D] mean KL(q(z_j|x) || N(0,1)) over chunks; variational only
    std_per_dim: np.ndarray | None  # [D] mean posterior std over chunks; variational only
    nn_half_distance: np.ndarray  # [M] per distinct chunk (M <= max_chunks)
    nn_sampled: bool

    def summary(self) -> dict:
        d = {
            "latent_dim": self.latent_dim,
            "chunks": self.num_chunks,
            "latent_rms": self.latent_rms,
            "active_dims": self.active_dims,
            "active_threshold": ACTIVE_THRESHOLD,
            "nn_half_distance_median": float(np.median(self.nn_half_distance)) if len(self.nn_half_distance) else None,
            "nn_half_distance_p01": float(np.quantile(self.nn_half_distance, 0.01)) if len(self.nn_half_distance) else None,
            "nn_chunks": int(len(self.nn_half_distance)),
            "nn_sampled": self.nn_sampled,
        }
        if self.kl_per_dim is not None:
            d["kl_total"] = float(self.kl_per_dim.sum())
            d["posterior_std_mean"] = float(self.std_per_dim.mean())
        return d


def kl_to_standard_normal(mean: torch.Tensor, std: torch.Tensor) -> torch.Tensor:
    """KL(N(mean, std²) || N(0, 1)) elementwise."""
    return 0.5 * (mean.square() + std.square() - 1.0) - std.log()


def nearest_distinct_half_distance(means: torch.Tensor, block: int = 2048, should_stop=None) -> torch.Tensor:
    """Half the distance from each row to its nearest other row (rows stand for distinct chunks)."""
    from core.errors import SweepCancelled

    n = means.shape[0]
    out = torch.empty(n)
    for start in range(0, n, block):
        if should_stop is not None and should_stop():
            raise SweepCancelled()
        d = torch.cdist(means[start : start + block].double(), means.double())
        rows = torch.arange(d.shape[0])
        d[rows, rows + start] = float("inf")
        out[start : start + block] = d.min(1).values.float() / 2
    return out


def distinct_chunk_starts(chunks: Chunks) -> np.ndarray:
    """Sorted index of the first occurrence of every distinct chunk (padded ids included)."""
    ids = chunks.ids().numpy()
    n, k = ids.shape
    bits = max(1, int(ids.max(initial=0)).bit_length())
    if n and k * bits <= 63:  # each row packs into one int64 key: far less memory than unique rows
        keys = np.zeros(n, dtype=np.int64)
        for j in range(k):
            keys |= ids[:, j] << (bits * j)
        del ids
        _, first = np.unique(keys, return_index=True)
    else:
        _, first = np.unique(ids, axis=0, return_index=True)
    return np.sort(first)


class _Moments:
    """Per-dimension count, mean and sum of squared deviations, merged block by block (Chan et al. 1979)."""

    def __init__(self, dim: int):
        self.n, self.mean, self.m2 = 0, np.zeros(dim), np.zeros(dim)

    def add(self, block: torch.Tensor) -> None:
        x = block.double().numpy()
        nb = x.shape[0]
        if nb == 0:
            return
        mb = x.mean(0)
        m2b = np.square(x - mb).sum(0)
        total = self.n + nb
        delta = mb - self.mean
        self.mean = self.mean + delta * (nb / total)
        self.m2 = self.m2 + m2b + np.square(delta) * (self.n * nb / total)
        self.n = total

    def variance(self) -> np.ndarray:
        return self.m2 / self.n if self.n > 1 else np.zeros_like(self.m2)


def latent_health(
    codec, chunks: Chunks, encoded: Encoded | None = None, max_chunks: int = 20_000, seed: int = 0, should_stop=None
) -> LatentHealth:
    """Latent health of a text. Without `encoded`, the text is encoded block by block and no latent is
    kept but those of the (at most `max_chunks`) distinct chunks the nearest-neighbour distances need."""
    from core.codecs.contract import opened
    from core.errors import SweepCancelled

    codec = opened(codec)
    # distinct chunks only: identical token chunks have identical means
    first = distinct_chunk_starts(chunks)
    sampled = len(first) > max_chunks
    if sampled:
        first = np.sort(np.random.default_rng(seed).choice(first, size=max_chunks, replace=False))
    n, dim = chunks.num_chunks, codec.latent_dim
    moments, sumsq = _Moments(dim), np.zeros(dim)
    kl_sum = std_sum = None
    # filled in place: small tensors kept per block would pin each block's freed memory (heap fragmentation)
    means = torch.empty(len(first), dim)
    for start in range(0, n, ENCODE_BATCH):
        stop = min(start + ENCODE_BATCH, n)
        if encoded is not None:
            mean = encoded.mean[start:stop]
            std = None if encoded.std is None else encoded.std[start:stop]
        else:
            if should_stop is not None and should_stop():
                raise SweepCancelled()
            mean, std = codec.encode(chunks.ids(start, stop))
            mean, std = mean.float(), None if std is None else std.float()
        moments.add(mean)
        sumsq += mean.double().square().sum(0).numpy()
        if std is not None:
            kl = kl_to_standard_normal(mean, std).double().sum(0).numpy()
            st = std.double().sum(0).numpy()
            kl_sum, std_sum = (kl, st) if kl_sum is None else (kl_sum + kl, std_sum + st)
        lo, hi = np.searchsorted(first, [start, stop])
        if hi > lo:
            means[lo:hi] = mean[torch.from_numpy(first[lo:hi] - start)]
    scale = LatentScale(sumsq, n)
    variance = moments.variance().astype(np.float32)
    # [256, 20k] float64 blocks: cdist makes a few of them at once (about 110 MB, not 350 MB at 1024)
    half = nearest_distinct_half_distance(means, block=256, should_stop=should_stop) if len(means) > 1 else torch.zeros(0)
    half = half[torch.isfinite(half)]
    return LatentHealth(
        latent_dim=codec.latent_dim,
        num_chunks=n,
        latent_rms=scale.latent_rms,
        rms_per_dim=(encoded.rms_per_dim if encoded is not None else scale.rms_per_dim).numpy(),
        mean_variance_per_dim=variance,
        active_dims=int((variance > ACTIVE_THRESHOLD).sum()),
        kl_per_dim=None if kl_sum is None else (kl_sum / n).astype(np.float32),
        std_per_dim=None if std_sum is None else (std_sum / n).astype(np.float32),
        nn_half_distance=half.numpy(),
        nn_sampled=sampled,
    )


def expected_noise_norm(sigma: float, noise: str, encoded: Encoded) -> float:
    """Root-mean-square length of the perturbation sigma · scale ⊙ ε, comparable with the
    nearest-neighbour half-distance: a chunk whose perturbation is shorter than its
    half-distance is still nearest to its own mean."""
    scale = noise_scale(noise, encoded, 0, encoded.num_chunks)  # [1 or N, D]
    return float(sigma) * float(scale.square().sum(1).mean().sqrt())


@dataclass
class GeometryCheck:
    """The noise at a tolerance held against the nearest-neighbour half-distances."""

    noise_norm: float  # expected_noise_norm at that sigma
    closer: float  # fraction of distinct chunks whose half-distance is below the noise norm
    limit: str  # "geometry" when most chunks' perturbations reach past the midpoint, else "decoder"


def geometry_check(health: LatentHealth, sigma: float, noise: str, encoded: Encoded) -> GeometryCheck | None:
    """Is the latent geometry or the decoder the limit at this sigma? None without two distinct chunks."""
    half = health.nn_half_distance
    if len(half) == 0:
        return None
    norm = expected_noise_norm(sigma, noise, encoded)
    closer = float((half < norm).mean())
    return GeometryCheck(norm, closer, "geometry" if closer > 0.5 else "decoder")
