"""The sample models' recipes and the `train` command's arguments, kept apart from the
training loop so that building the command line imports no torch."""

from __future__ import annotations

import argparse
from dataclasses import asdict, dataclass

from core.codecs.arch import ChunkMLPConfig


@dataclass(frozen=True)
class Recipe:
    name: str = "custom"
    chunk_size: int = 4
    vocab_size: int = 2048
    latent_dim: int = 32
    embed_dim: int = 128
    width: int = 512
    depth: int = 2
    variational: bool = False
    kl_weight: float = 0.0
    free_bits: float = 0.0
    latent_dropout: float = 0.0
    token_mask_prob: float = 0.0
    pad_tail_prob: float = 0.02
    # each token of a training chunk is replaced by a uniformly drawn vocabulary token (never <pad> or
    # <mask>) with this probability, input and target alike: every token of the vocabulary is then
    # reconstructed hundreds of times in training, not only the ones the corpus uses often
    random_token_prob: float = 0.0
    steps: int = 3_200
    batch_size: int = 256
    lr: float = 5e-3
    min_lr_ratio: float = 0.02
    warmup_steps: int = 100
    weight_decay: float = 0.01
    grad_clip: float = 1.0
    seed: int = 0
    minutes: float = 15.0
    threads: int = 1
    log_every: int = 200
    save_dtype: str = "float16"
    # keep checkpoints at this step and its doublings up to `steps` in a run folder (0: none)
    first_checkpoint: int = 0
    why: str = ""

    def model_config(self, pad_id: int = 0) -> ChunkMLPConfig:
        return ChunkMLPConfig(
            chunk_size=self.chunk_size,
            vocab_size=self.vocab_size,
            latent_dim=self.latent_dim,
            embed_dim=self.embed_dim,
            width=self.width,
            depth=self.depth,
            variational=self.variational,
            pad_id=pad_id,
        )

    def to_dict(self) -> dict:
        return asdict(self)


RECIPES: dict[str, Recipe] = {
    "plain": Recipe(
        name="plain",
        random_token_prob=0.1,
        latent_dim=32,
        steps=8_000,
        minutes=44.0,
        why="The baseline: a deterministic autoencoder with a tight 32-dim latent, trained on reconstruction "
        "alone; it decodes almost perfectly at sigma 0 and breaks early under noise.",
    ),
    "tolerant": Recipe(
        name="tolerant",
        random_token_prob=0.1,
        latent_dim=128,
        variational=True,
        kl_weight=0.1,
        free_bits=0.15,
        latent_dropout=0.2,
        token_mask_prob=0.05,
        steps=12_800,
        minutes=40.0,
        first_checkpoint=100,
        why="Variational with a small KL weight, a per-dimension KL floor, latent dropout and input-token "
        "masking in a 128-dim latent: it reconstructs about as well as plain and takes several times more "
        "data-scale noise.",
    ),
    "plain-wide": Recipe(
        name="plain-wide",
        random_token_prob=0.1,
        latent_dim=128,
        steps=3_200,
        minutes=15.0,
        why="Plain reconstruction with the tolerant model's 128-dim latent: set beside plain it shows what a "
        "bigger latent alone buys in noise tolerance, and beside tolerant what the regularisers add on top.",
    ),
}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    group = parser.add_mutually_exclusive_group(required=True)
    group.add_argument("--recipe", choices=sorted(RECIPES), help="train one named recipe")
    group.add_argument("--all", action="store_true", help="rebuild every sample model")
    group.add_argument("--generator", action="store_true", help="train the demo next-vector generator on the tolerant sample's "
                       "latents and rewrite sample_models/generator/demo_predictions.safetensors (rerun after retraining tolerant)")
    group.add_argument("--table", metavar="FOLDER", help="print the Markdown table of the checkpoints' cards in FOLDER")
    parser.add_argument("--readme", action="store_true", help="with --table: write the table into FOLDER/README.md "
                        "between its table markers instead of printing it")
    parser.add_argument("--out", help="checkpoint path for --recipe (default: sample_models/NAME.safetensors)")
    parser.add_argument("--out-dir", default="sample_models", help="folder for --all")
    parser.add_argument("--steps", type=int, help="override the recipe's number of steps")
    parser.add_argument("--minutes", type=float, help="override the recipe's time budget")
    parser.add_argument("--seed", type=int, help="override the recipe's seed")
    parser.add_argument("--no-measure", action="store_true", help="skip the card's sweeps (faster)")
