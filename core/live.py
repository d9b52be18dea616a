"""One perturbation at one sigma, for the live view: what each token decoded to and the
decoder's top alternatives. Uses the sweep's ε (repeat `draw`), so the live view at a
grid sigma shows exactly the sweep's repeat."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from core.latent import Encoded
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
    should_stop=None,
) -> LivePerturbation | None:
    from core.views import merge_windows, perturb_window  # views builds on this module's result type

    window = perturb_window(codec, chunks, encoded, sigma, noise, seed, draw, 0, encoded.num_chunks, top_k, should_stop)
    return None if window is None else merge_windows(chunks, [window])
