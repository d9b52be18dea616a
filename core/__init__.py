"""chunkscope engine: load chunk autoencoders, perturb their latents, score every token.

Imports no Qt; everything the workbench shows is computed here.
"""

__version__ = "0.1.0"

from core.errors import ChunkscopeError, CheckpointError, TextError, SettingsError, SweepCancelled
from core.checkpoint import Codec, load_codec, save_codec
from core.text import Chunks, chunk_text, load_text
from core.sweep import SweepSettings, SweepResult, run_sweep
from core.health import LatentHealth, latent_health

__all__ = [
    "__version__",
    "ChunkscopeError", "CheckpointError", "TextError", "SettingsError", "SweepCancelled",
    "Codec", "load_codec", "save_codec",
    "Chunks", "chunk_text", "load_text",
    "SweepSettings", "SweepResult", "run_sweep",
    "LatentHealth", "latent_health",
]
