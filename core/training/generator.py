"""A small next-vector generator, trained with the energy score, and the demo predictions it writes.

The generator reads the encoder means of the previous WINDOW chunks (zeros before a
file's first chunk), each divided by the codec's data scale r_j, plus fresh noise
u ~ N(0, I), and outputs one latent sample for the next chunk (times r_j). It is an MLP
with residual blocks; nothing in it is specific to the codec except D.

Training target: the codec's encoder mean of each chunk of the training split of the
corpus (`core.training.corpus`), files cut into consecutive K-token chunks. Loss: the
energy score with beta = 1, per context from M samples (the unbiased form):
    ES = 1/M sum_i ||x_i - y|| - 1/(2 M (M - 1)) sum_{i != j} ||x_i - x_j||
in data-scale units. The card records the held-out energy score (S = 8) in latent units.

One command rebuilds the generator and the demo predictions against the current codec:
    PYTHONPATH=. python -m core.training.generator
(or `chunkscope train --generator`). Rerun it whenever the codec is retrained: the
predictions file records the codec's sha256 and is refused by any other codec.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
import torch
from torch import nn

from core.analyses.prediction_file import write_predictions

SAMPLES = Path(__file__).resolve().parents[2] / "sample_models"
DEFAULT_CODEC = SAMPLES / "tolerant.safetensors"
DEFAULT_OUT = SAMPLES / "generator" / "generator.safetensors"
DEFAULT_PREDICTIONS = SAMPLES / "generator" / "demo_predictions.safetensors"
GENERATOR_FORMAT = "chunkscope.generator"
DEMO_SAMPLES = 8
HELD_OUT_CHUNKS = 20_000

Log = Callable[[str], None]


@dataclass(frozen=True)
class GeneratorRecipe:
    window: int = 4
    noise_dim: int = 64
    width: int = 512
    blocks: int = 3
    train_samples: int = 4  # M samples per context in the energy-score loss
    batch_size: int = 512
    steps: int = 1600
    minutes: float = 20.0
    lr: float = 1e-3
    warmup_steps: int = 100
    weight_decay: float = 0.01
    seed: int = 0
    threads: int = 1
    log_every: int = 200



class NextVectorGenerator(nn.Module):
    def __init__(self, latent_dim: int, recipe: GeneratorRecipe):
        super().__init__()
        self.latent_dim, self.window, self.noise_dim = latent_dim, recipe.window, recipe.noise_dim
        self.inp = nn.Linear(recipe.window * latent_dim + recipe.noise_dim, recipe.width)
        self.blocks = nn.ModuleList(
            nn.Sequential(nn.LayerNorm(recipe.width), nn.Linear(recipe.width, recipe.width), nn.SiLU(),
                          nn.Linear(recipe.width, recipe.width))
            for _ in range(recipe.blocks)
        )
        self.out = nn.Sequential(nn.LayerNorm(recipe.width), nn.Linear(recipe.width, latent_dim))
        self.register_buffer("scale", torch.ones(latent_dim))  # r_j of the training latents

    def forward(self, context: torch.Tensor, noise: torch.Tensor) -> torch.Tensor:
        """context [B, W, D] in latent units, noise [B, noise_dim] -> one sample [B, D] in latent units."""
        h = self.inp(torch.cat([(context / self.scale).flatten(1), noise], dim=1))
        for block in self.blocks:
            h = h + block(h)
        return self.out(h) * self.scale

    def sample(self, context: torch.Tensor, samples: int, generator: torch.Generator | None = None) -> torch.Tensor:
        """[B, W, D] -> [B, samples, D]."""
        b = context.shape[0]
        noise = torch.randn(b * samples, self.noise_dim, generator=generator)
        rep = context.repeat_interleave(samples, dim=0)
        return self.forward(rep, noise).view(b, samples, -1)


def energy_score_loss(samples: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """Mean over the batch of the unbiased energy score (beta = 1): samples [B, M, D], target [B, D]."""
    m = samples.shape[1]
    first = (samples - target.unsqueeze(1)).norm(dim=-1).mean(1)
    pair = torch.cdist(samples, samples)  # [B, M, M], zero diagonal
    second = pair.sum((1, 2)) / (2 * m * (m - 1))
    return (first - second).mean()


def context_index(lengths: Sequence[int], window: int) -> np.ndarray:
    """[M, W] rows of previous chunks within each file (oldest first); -1 before a file's first chunk."""
    rows = []
    offset = 0
    for n in lengths:
        i = np.arange(n)[:, None] - np.arange(window, 0, -1)[None, :]
        rows.append(np.where(i >= 0, i + offset, -1))
        offset += n
    return np.concatenate(rows) if rows else np.zeros((0, window), dtype=np.int64)


def gather_context(means: torch.Tensor, index: np.ndarray) -> torch.Tensor:
    """[M, D] means and [B, W] indices (-1: nothing) -> [B, W, D]."""
    padded = torch.cat([means, torch.zeros(1, means.shape[1])])
    idx = torch.from_numpy(np.where(index < 0, len(means), index))
    return padded[idx]


def encode_texts(codec, texts: Sequence[str], log: Log = print) -> tuple[torch.Tensor, list[int]]:
    """Each text tokenized with the codec and cut into consecutive chunks; the encoder means, and chunks per text."""
    from core.engine.noise import encode_chunks
    from core.engine.text import chunk_text

    means, lengths = [], []
    for text in texts:
        if not text.strip():
            continue
        chunks = chunk_text(text, codec)
        means.append(encode_chunks(codec, chunks).mean)
        lengths.append(chunks.num_chunks)
    return torch.cat(means), lengths


def held_out_energy_score(model: NextVectorGenerator, means: torch.Tensor, index: np.ndarray, samples: int = DEMO_SAMPLES,
                          seed: int = 1) -> dict[str, float]:
    """Mean energy score (latent units, unbiased, beta = 1) of `samples` samples per chunk, with its standard error."""
    gen = torch.Generator().manual_seed(seed)
    scores = []
    with torch.no_grad():
        for start in range(0, len(index), 2048):
            rows = index[start:start + 2048]
            x = model.sample(gather_context(means, rows), samples, gen)
            y = means[start:start + len(rows)]
            m = samples
            first = (x - y.unsqueeze(1)).norm(dim=-1).mean(1)
            second = torch.cdist(x, x).sum((1, 2)) / (2 * m * (m - 1))
            scores.append(first - second)
    s = torch.cat(scores).double()
    return {"energy_score": float(s.mean()), "standard_error": float(s.std() / math.sqrt(len(s))), "chunks": len(s),
            "samples": samples}


def marginal_energy_score(means: torch.Tensor, train_means: torch.Tensor, samples: int = DEMO_SAMPLES, seed: int = 2) -> float:
    """Reference: the energy score of `samples` random training latents per chunk (a generator that ignores context)."""
    gen = torch.Generator().manual_seed(seed)
    pick = torch.randint(0, len(train_means), (len(means), samples), generator=gen)
    x = train_means[pick]
    first = (x - means.unsqueeze(1)).norm(dim=-1).mean(1)
    second = torch.cdist(x, x).sum((1, 2)) / (2 * samples * (samples - 1))
    return float((first - second).mean())


def _lr_at(step: int, recipe: GeneratorRecipe) -> float:
    from core.training.train import warmup_cosine_lr

    return warmup_cosine_lr(step, recipe.lr, recipe.warmup_steps, recipe.steps, floor=0.02)


def save_generator(model: NextVectorGenerator, recipe: GeneratorRecipe, card: dict, path: Path) -> None:
    from safetensors.torch import save_file

    from core.outputs.files import staged_file

    tensors = {k: v.detach().float().contiguous() for k, v in model.state_dict().items()}
    metadata = {GENERATOR_FORMAT: json.dumps({"version": 1, "latent_dim": model.latent_dim, "recipe": asdict(recipe)}),
                "chunkscope.card": json.dumps(card, sort_keys=True)}
    with staged_file(path, force=True) as tmp:
        save_file(tensors, str(tmp), metadata=metadata)


def load_generator(path) -> tuple[NextVectorGenerator, dict]:
    from safetensors import safe_open
    from safetensors.torch import load_file

    with safe_open(str(path), framework="pt") as handle:
        meta = handle.metadata()
    head = json.loads(meta[GENERATOR_FORMAT])
    model = NextVectorGenerator(head["latent_dim"], GeneratorRecipe(**head["recipe"]))
    model.load_state_dict(load_file(str(path)))
    model.eval()
    return model, json.loads(meta.get("chunkscope.card", "{}"))


def demo_predictions(model: NextVectorGenerator, codec, out: Path, samples: int = DEMO_SAMPLES, seed: int = 0,
                     text: str | None = None, note: str = "") -> Path:
    """The generator's predictions for every chunk of a text (the demo text by default), teacher-forced on the
    true previous chunks' means, written as a predictions file."""
    from core.engine.noise import encode_chunks
    from core.engine.text import chunk_text, demo_text

    text = demo_text() if text is None else text
    chunks = chunk_text(text, codec)
    means = encode_chunks(codec, chunks).mean
    index = context_index([chunks.num_chunks], model.window)
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        latents = torch.cat([model.sample(gather_context(means, index[a:a + 1024]), samples, gen)
                             for a in range(0, len(index), 1024)])
    write_predictions(out, latents.numpy(), chunks.ids().numpy(), codec.sha256, note or "chunkscope demo generator", text=text)
    return out


def train_generator(codec_path=DEFAULT_CODEC, out=DEFAULT_OUT, predictions=DEFAULT_PREDICTIONS,
                    recipe: GeneratorRecipe = GeneratorRecipe(), log: Log = print) -> dict[str, Any]:
    """Train the generator on the codec's latents of the training corpus, measure it, save it, write the demo predictions."""
    from core.codecs.open import open_checkpoint
    from core.training.corpus import build_corpus
    from core.training.train import library_versions

    torch.set_num_threads(recipe.threads)
    torch.manual_seed(recipe.seed)
    codec = open_checkpoint(codec_path)
    corpus = build_corpus()
    started = time.perf_counter()
    train_means, train_lengths = encode_texts(codec, corpus.train)
    held_means, held_lengths = encode_texts(codec, corpus.held_out)
    train_index = context_index(train_lengths, recipe.window)
    held_index = context_index(held_lengths, recipe.window)[:HELD_OUT_CHUNKS]
    held_means_eval = held_means  # contexts index into the whole held-out array
    log(f"[generator] encoded {len(train_means):,} training and {len(held_means):,} held-out chunks "
        f"in {time.perf_counter() - started:.0f} s")
    model = NextVectorGenerator(codec.latent_dim, recipe)
    model.scale.copy_(train_means.square().mean(0).sqrt().clamp_min(1e-6))
    optimizer = torch.optim.AdamW(model.parameters(), lr=recipe.lr, weight_decay=recipe.weight_decay)
    gen = torch.Generator().manual_seed(recipe.seed)
    scale = model.scale
    started = time.perf_counter()
    step, stopped_by, running = 0, "steps", 0.0
    while step < recipe.steps:
        if time.perf_counter() - started > recipe.minutes * 60:
            stopped_by = "time budget"
            break
        for group in optimizer.param_groups:
            group["lr"] = _lr_at(step, recipe)
        rows = torch.randint(0, len(train_means), (recipe.batch_size,), generator=gen)
        ctx = gather_context(train_means, train_index[rows.numpy()])
        target = train_means[rows]
        x = model.sample(ctx, recipe.train_samples, gen)
        loss = energy_score_loss(x / scale, target / scale)
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        optimizer.step()
        step += 1
        running += float(loss.detach())
        if step % recipe.log_every == 0:
            log(f"[generator] step {step:5d}  energy score (data-scale units) {running / recipe.log_every:.4f}  "
                f"{time.perf_counter() - started:5.0f} s")
            running = 0.0
    wall = time.perf_counter() - started
    model.eval()
    measured = held_out_energy_score(model, held_means_eval, held_index)
    measured["marginal_energy_score"] = marginal_energy_score(held_means_eval[:len(held_index)], train_means)
    measured["rule"] = (f"the first {len(held_index)} chunks of the held-out split (files cut into consecutive chunks), "
                        f"{measured['samples']} samples each, teacher-forced on the true previous means; latent units")
    log(f"[generator] held-out energy score {measured['energy_score']:.4f} ± {measured['standard_error']:.4f} "
        f"(random training latents: {measured['marginal_energy_score']:.4f})")
    card = {
        "name": "generator",
        "what": f"next-vector generator: the previous {recipe.window} chunks' encoder means + noise -> one latent sample",
        "objective": "energy score, beta = 1, unbiased with all sample pairs, in data-scale units",
        "recipe": asdict(recipe),
        "codec": {"path": Path(codec_path).name, "sha256": codec.sha256},
        "corpus": corpus.info.to_dict(),
        "training_chunks": len(train_means),
        "steps_done": step,
        "stopped_by": stopped_by,
        "train_wall_seconds": round(wall, 1),
        "parameters": sum(p.numel() for p in model.parameters()),
        "versions": library_versions(),
        "measured": {"held_out": measured},
    }
    Path(out).parent.mkdir(parents=True, exist_ok=True)
    save_generator(model, recipe, card, Path(out))
    log(f"[generator] saved {out} ({Path(out).stat().st_size / 1e6:.2f} MB) after {step} steps, {wall:.0f} s")
    if predictions:
        demo_predictions(model, codec, Path(predictions), note=f"chunkscope demo generator ({Path(out).name}), "
                         f"{DEMO_SAMPLES} samples per chunk, teacher-forced on the demo text")
        log(f"[generator] wrote {predictions} ({Path(predictions).stat().st_size / 1e6:.2f} MB)")
    return card


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m core.training.generator",
                                     description="Train the demo next-vector generator and write its demo predictions.")
    add_arguments(parser)
    return run_from_args(parser.parse_args(argv))


def add_arguments(parser: argparse.ArgumentParser, prefix: str = "") -> None:
    parser.add_argument(f"--{prefix}codec", default=str(DEFAULT_CODEC), help="the codec whose latents it learns (default: the tolerant sample)")
    parser.add_argument(f"--{prefix}out", default=str(DEFAULT_OUT), help="the generator checkpoint to write")
    parser.add_argument(f"--{prefix}predictions", default=str(DEFAULT_PREDICTIONS), help="the demo predictions file to write")
    parser.add_argument(f"--{prefix}minutes", type=float, default=GeneratorRecipe.minutes, help="training time budget")
    parser.add_argument(f"--{prefix}steps", type=int, default=GeneratorRecipe.steps, help="training steps")
    parser.add_argument("--predict-only", action="store_true", help="only rewrite the demo predictions from the existing generator")


def run_from_args(args: argparse.Namespace, prefix: str = "") -> int:
    get = lambda name: getattr(args, prefix + name)  # noqa: E731
    if getattr(args, "predict_only", False):
        from core.codecs.open import open_checkpoint

        torch.set_num_threads(1)
        model, card = load_generator(get("out"))
        codec = open_checkpoint(get("codec"))
        if card.get("codec", {}).get("sha256") != codec.sha256:
            print("the generator was trained on another codec; retrain it (drop --predict-only).", file=sys.stderr)
            return 2
        demo_predictions(model, codec, Path(get("predictions")))
        return 0
    recipe = GeneratorRecipe(minutes=get("minutes"), steps=get("steps"))
    train_generator(get("codec"), get("out"), get("predictions"), recipe)
    return 0


if __name__ == "__main__":
    sys.exit(main())
