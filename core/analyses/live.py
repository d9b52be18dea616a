"""One perturbation at one sigma, for the live view: what each token decoded to and the
decoder's top alternatives. Uses the sweep's ε (repeat `draw`), so the live view at a
grid sigma shows exactly the sweep's repeat."""

from __future__ import annotations

from core.analyses.views import LivePerturbation, merge_windows, perturb_window
from core.engine.noise import Encoded
from core.engine.sweep import DEFAULT_NOISE, DEFAULT_SEED
from core.engine.text import Chunks


def perturb_once(
    codec,
    chunks: Chunks,
    encoded: Encoded,
    sigma: float,
    noise: str = DEFAULT_NOISE,
    seed: int = DEFAULT_SEED,
    draw: int = 0,
    top_k: int = 5,
    should_stop=None,
) -> LivePerturbation | None:
    window = perturb_window(codec, chunks, encoded, sigma, noise, seed, draw, 0, encoded.num_chunks, top_k, should_stop)
    return None if window is None else merge_windows(chunks, [window])
