"""One perturbation at one sigma, for the live view: what each token decoded to and the
decoder's top alternatives. Uses the sweep's ε (repeat `draw`), so the live view at a
grid sigma shows exactly the sweep's repeat."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from core.latent import Encoded, check_noise, draw_eps, noise_scale
from core.metrics import log_partition
from core.text import Chunks


@dataclass
class LivePerturbation:
    sigma: float
    noise: str
    seed: int
    draw: int
    predicted: np.ndarray  # [T] decoded token ids
    correct: np.ndarray  # [T] bool
    top_ids: np.ndarray  # [T, top_k]
    top_probs: np.ndarray  # [T, top_k]
    token_accuracy: float
    chunk_exact_rate: float
    tokens: int
    chunks: int

    def wrong_indices(self) -> np.ndarray:
        return np.flatnonzero(~self.correct)


def perturb_once(
    codec,
    chunks: Chunks,
    encoded: Encoded,
    sigma: float,
    noise: str = "data-scale",
    seed: int = 0,
    draw: int = 0,
    top_k: int = 5,
    batch: int = 4096,
    should_stop=None,
) -> LivePerturbation:
    check_noise(noise, codec)
    n, k, dim = encoded.num_chunks, codec.chunk_size, codec.latent_dim
    t_total = chunks.num_tokens
    predicted = np.empty(t_total, dtype=np.int64)
    top_ids = np.empty((t_total, top_k), dtype=np.int64)
    top_probs = np.empty((t_total, top_k), dtype=np.float32)
    exact = 0
    batch = max(256, batch // 256 * 256)
    for start in range(0, n, batch):
        if should_stop is not None and should_stop():
            return None
        stop = min(start + batch, n)
        mean = encoded.mean[start:stop]
        if sigma > 0:
            eps = draw_eps(seed, draw, start, stop, dim)
            z = mean + float(sigma) * eps * noise_scale(noise, encoded, start, stop)
        else:
            z = mean
        logits = codec.decode(z)
        values, i = logits.topk(top_k, dim=-1)
        p = torch.exp(values - log_partition(logits, values[..., 0]).unsqueeze(-1))
        pred = i[..., 0]
        t0, t1 = start * k, min(stop * k, t_total)
        m = t1 - t0
        predicted[t0:t1] = pred.reshape(-1)[:m].numpy()
        top_ids[t0:t1] = i.reshape(-1, top_k)[:m].numpy()
        top_probs[t0:t1] = p.reshape(-1, top_k)[:m].numpy()
        ids, mask = chunks.ids(start, stop), chunks.mask(start, stop)
        exact += int(((pred == ids) | ~mask).all(1).sum())
    correct = predicted == chunks.token_ids
    return LivePerturbation(
        sigma=float(sigma), noise=noise, seed=seed, draw=draw, predicted=predicted, correct=correct,
        top_ids=top_ids, top_probs=top_probs, token_accuracy=float(correct.mean()),
        chunk_exact_rate=exact / n, tokens=t_total, chunks=n,
    )
