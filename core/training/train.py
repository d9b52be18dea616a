"""The training recipe for chunk-mlp codecs, and the recipes of the shipped sample models.

Data: the standard library's docstrings and comments (`core.training.corpus`), tokenized with one
byte-level BPE trained once on the training split, so every sample model shares the
same tokenizer. Training chunks are K-token windows at random offsets of the training
token stream (a few get a padded tail, as the last chunk of any text does).

Losses, per chunk and divided by K: cross-entropy of the K tokens; for a variational
codec also kl_weight * sum_j max(KL_j, free_bits), with KL_j the batch-mean KL of latent
dimension j to N(0, 1) ("free bits": a dimension is not pushed below the floor). The
latent fed to the decoder in training is z = mean + std * eps (variational), then latent
dropout; the encoder's input tokens are replaced by <mask> with probability
token_mask_prob. All three exist only in training.

Same recipe + same seed + same thread count gives bit-identical weights.
"""

from __future__ import annotations

import argparse
import copy
import hashlib
import math
import platform
import sys
import time
from dataclasses import replace
from functools import lru_cache
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
import torch
from torch import nn

from core.codecs.checkpoint import Codec, save_codec
from core.errors import SettingsError
from core.training.corpus import CHARACTER_TABLE_REPEATS, Corpus, build_corpus, character_table
from core.codecs.model import ChunkMLP, build_model
from core.engine.text import Chunks, chunk_text, demo_text, text_sha256
from core.codecs.tokenizer import MASK_TOKEN, PAD_TOKEN, train_byte_bpe
from core.training.recipes import RECIPES, Recipe, add_arguments  # noqa: F401 (add_arguments: this module's own command line)

Log = Callable[[str], None]

MASK_ID = 1
FIRST_ORDINARY_ID = 2  # <pad> is 0 and <mask> is 1 in the samples' tokenizer (train_byte_bpe)
HELD_OUT_TOKENS = 50_000
SWEEP_TOKENS = 10_000
SWEEP_REPEATS = 2
SWEEP_SEED = 0
# data-scale (relative) sigmas: 0, then 22 steps growing by a factor ~1.39 from 0.003 to 3
DATA_SCALE_SIGMAS = (0.0,) + tuple(round(0.003 * (1000 ** (i / 21)), 6) for i in range(22))
# isotropic (absolute) sigmas: 0, then 22 steps growing by a factor ~1.55 from 0.001 to 10
ISOTROPIC_SIGMAS = (0.0,) + tuple(round(0.001 * (10_000 ** (i / 21)), 6) for i in range(22))


# the tokenizer sees the character table this many times in all (the training split holds it
# CHARACTER_TABLE_REPEATS times): enough for a byte-level BPE to learn each two- and three-byte
# character as one token, while the codec's training stream keeps the table a small share
TOKENIZER_TABLE_REPEATS = 340
# English prose the project never trains on, measured in each card when the machine has it:
# Debian's licence texts, and the licence of the Python that runs the recipe
OUTSIDE_TEXTS = (
    ("GPL-3", "/usr/share/common-licenses/GPL-3"),
    ("Apache-2.0", "/usr/share/common-licenses/Apache-2.0"),
    ("Python LICENSE.txt", "{stdlib}/LICENSE.txt"),
)


@lru_cache(maxsize=2)
def shared_data(vocab_size: int = 2048) -> tuple[Corpus, Any]:
    """The corpus and the tokenizer trained on its training split, built once per process."""
    corpus = build_corpus()
    extra = [character_table()] * max(0, TOKENIZER_TABLE_REPEATS - CHARACTER_TABLE_REPEATS)
    tokenizer = train_byte_bpe(corpus.train + extra, vocab_size)
    return corpus, tokenizer


def outside_texts(stdlib_path: str) -> list[tuple[str, str, str]]:
    """(label, path, text) of each OUTSIDE_TEXTS file this machine has and can read as UTF-8."""
    found = []
    for label, pattern in OUTSIDE_TEXTS:
        path = pattern.format(stdlib=stdlib_path)
        try:
            text = Path(path).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError):
            continue
        if text.strip():
            found.append((label, path, text))
    return found


def tokenizer_sha256(tokenizer) -> str:
    return hashlib.sha256(tokenizer.to_str().encode("utf-8")).hexdigest()


def token_stream(tokenizer, texts: Sequence[str]) -> np.ndarray:
    """All texts tokenized and concatenated, in order, as int64."""
    encodings = tokenizer.encode_batch(list(texts), add_special_tokens=False)
    parts = [np.asarray(e.ids, dtype=np.int64) for e in encodings]
    return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)


def prefix_chunks(codec: Codec, text: str, max_tokens: int) -> Chunks:
    """The first `max_tokens` tokens of a text as chunks, the text cut where the last one ends."""
    chunks = chunk_text(text, codec)
    if chunks.num_tokens <= max_tokens:
        return chunks
    end = int(chunks.spans[max_tokens - 1, 1])
    cut = text[:end]
    return Chunks(
        text=cut,
        text_sha256=text_sha256(cut),
        token_ids=chunks.token_ids[:max_tokens].copy(),
        spans=chunks.spans[:max_tokens].copy(),
        chunk_size=chunks.chunk_size,
        pad_id=chunks.pad_id,
    )


def _sample_batch(stream: torch.Tensor, recipe: Recipe, generator: torch.Generator, pad_id: int) -> torch.Tensor:
    k = recipe.chunk_size
    starts = torch.randint(0, len(stream) - k, (recipe.batch_size,), generator=generator)
    ids = stream[starts.unsqueeze(1) + torch.arange(k)]
    if recipe.pad_tail_prob > 0:
        tail = torch.rand(recipe.batch_size, generator=generator) < recipe.pad_tail_prob
        keep = torch.randint(1, k, (recipe.batch_size,), generator=generator)
        padded = tail.unsqueeze(1) & (torch.arange(k).unsqueeze(0) >= keep.unsqueeze(1))
        ids = ids.masked_fill(padded, pad_id)
    if recipe.random_token_prob > 0:
        swap = (torch.rand(ids.shape, generator=generator) < recipe.random_token_prob) & (ids != pad_id)
        drawn = torch.randint(FIRST_ORDINARY_ID, recipe.vocab_size, ids.shape, generator=generator)
        ids = torch.where(swap, drawn, ids)
    return ids


def warmup_cosine_lr(step: int, lr: float, warmup_steps: int, steps: int, floor: float) -> float:
    """Linear warm-up, then cosine decay to `floor` × lr at the last step: the schedule of every recipe here."""
    if step < warmup_steps:
        return lr * (step + 1) / warmup_steps
    progress = (step - warmup_steps) / max(1, steps - warmup_steps)
    return lr * (floor + (1 - floor) * 0.5 * (1 + math.cos(math.pi * min(1.0, progress))))


def _lr_at(step: int, recipe: Recipe) -> float:
    return warmup_cosine_lr(step, recipe.lr, recipe.warmup_steps, recipe.steps, recipe.min_lr_ratio)


def training_loss(
    model: ChunkMLP, ids: torch.Tensor, recipe: Recipe, generator: torch.Generator
) -> tuple[torch.Tensor, dict[str, float]]:
    """The training objective on one batch; regularisers are drawn from `generator`."""
    k = recipe.chunk_size
    inputs = ids
    if recipe.token_mask_prob > 0:
        masked = torch.rand(ids.shape, generator=generator) < recipe.token_mask_prob
        inputs = ids.masked_fill(masked, MASK_ID)
    mean, std = model.encode(inputs)
    z = mean
    stats: dict[str, float] = {}
    kl_term = torch.zeros(())
    if std is not None:
        z = mean + std * torch.randn(mean.shape, generator=generator)
        kl = 0.5 * (mean.square() + std.square() - 1.0) - std.log()
        kl_per_dim = kl.mean(0)
        kl_term = recipe.kl_weight * kl_per_dim.clamp(min=recipe.free_bits).sum()
        stats["kl"] = float(kl_per_dim.detach().sum())
        stats["std"] = float(std.detach().mean())
    if recipe.latent_dropout > 0:
        keep = torch.rand(z.shape, generator=generator) >= recipe.latent_dropout
        z = z * keep / (1.0 - recipe.latent_dropout)
    logits = model.decode(z)
    ce = nn.functional.cross_entropy(logits.reshape(-1, logits.shape[-1]), ids.reshape(-1))
    loss = ce + kl_term / k
    stats["loss"] = float(loss.detach())
    stats["ce"] = float(ce.detach())
    stats["acc"] = float((logits.argmax(-1) == ids).float().mean())
    return loss, stats


@torch.inference_mode()
def chunk_accuracy(model: ChunkMLP, ids: torch.Tensor, mask: torch.Tensor, batch: int = 2048) -> float:
    """Token accuracy of a plain decode of the posterior mean, over real tokens."""
    was_training = model.training
    model.eval()
    correct = total = 0
    for start in range(0, len(ids), batch):
        x, m = ids[start : start + batch], mask[start : start + batch]
        predicted = model.decode(model.encode(x)[0]).argmax(-1)
        correct += int(((predicted == x) & m).sum())
        total += int(m.sum())
    model.train(was_training)
    return correct / max(1, total)


def library_versions() -> dict[str, str]:
    import tokenizers

    import core

    return {
        "python": platform.python_version(),
        "torch": torch.__version__,
        "tokenizers": tokenizers.__version__,
        "numpy": np.__version__,
        "chunkscope": core.__version__,
    }


def _tolerances_dict(result) -> dict[str, dict]:
    from core.engine.tolerance import level_key

    return {level_key(t.level): {"sigma": t.sigma, "status": t.status} for t in result.tolerances}


def measure(codec: Codec, held_out_text: str, log: Log = print, sweep_tokens: int = SWEEP_TOKENS,
            repeats: int = SWEEP_REPEATS, held_out_tokens: int = HELD_OUT_TOKENS,
            outside: Sequence[tuple[str, str, str]] = ()) -> dict[str, Any]:
    """The card's measured numbers: sigma-0 accuracy on held-out, demo and outside texts, tolerances, latent RMS."""
    from core.engine.sweep import SweepSettings, run_sweep

    measured: dict[str, Any] = {}
    held = prefix_chunks(codec, held_out_text, held_out_tokens)
    zero = run_sweep(codec, held, SweepSettings(sigmas=(0.0,), repeats=1, noise="isotropic", seed=SWEEP_SEED))
    measured["held_out"] = {
        "tokens": held.num_tokens,
        "text_sha256": held.text_sha256,
        "rule": f"the first {held_out_tokens} tokens of the held-out split",
        "token_accuracy_sigma0": zero.curves[0].token_accuracy,
    }
    demo = chunk_text(demo_text(), codec)
    zero_demo = run_sweep(codec, demo, SweepSettings(sigmas=(0.0,), repeats=1, noise="isotropic", seed=SWEEP_SEED))
    measured["demo"] = {
        "tokens": demo.num_tokens,
        "text_sha256": demo.text_sha256,
        "token_accuracy_sigma0": zero_demo.curves[0].token_accuracy,
    }
    log(f"  sigma 0: held-out {100 * measured['held_out']['token_accuracy_sigma0']:.3f} %, "
        f"demo {100 * measured['demo']['token_accuracy_sigma0']:.3f} %")
    sweep_chunks = prefix_chunks(codec, held_out_text, sweep_tokens)
    tolerances: dict[str, Any] = {}
    for noise, grid in (("isotropic", ISOTROPIC_SIGMAS), ("data-scale", DATA_SCALE_SIGMAS)):
        settings = SweepSettings(sigmas=grid, repeats=repeats, noise=noise, seed=SWEEP_SEED)
        result = run_sweep(codec, sweep_chunks, settings)
        tolerances[noise] = _tolerances_dict(result)
        measured["latent_rms"] = float(result.latent_rms)
        log(f"  {noise}: " + ", ".join(f"{lvl}: {t['sigma']} ({t['status']})" for lvl, t in tolerances[noise].items()))
    measured["tolerance"] = tolerances
    measured["sweep"] = {
        "text": f"the first {sweep_tokens} tokens of the held-out split",
        "text_sha256": sweep_chunks.text_sha256,
        "repeats": repeats,
        "seed": SWEEP_SEED,
        "sigmas": {"isotropic": list(ISOTROPIC_SIGMAS), "data-scale": list(DATA_SCALE_SIGMAS)},
    }
    outside_measured = []
    for label, path, text in outside:
        chunks = chunk_text(text, codec)
        result = run_sweep(codec, chunks, SweepSettings(sigmas=DATA_SCALE_SIGMAS, repeats=repeats, noise="data-scale",
                                                        seed=SWEEP_SEED))
        outside_measured.append({
            "label": label,
            "path": path,
            "text_sha256": chunks.text_sha256,
            "tokens": chunks.num_tokens,
            "token_accuracy_sigma0": result.curves[0].token_accuracy,
            "tolerance_data_scale": _tolerances_dict(result),
        })
        log(f"  outside {label}: sigma 0 {100 * result.curves[0].token_accuracy:.3f} % of {chunks.num_tokens} tokens, "
            "data-scale " + ", ".join(f"{lvl}: {t['sigma']}" for lvl, t in outside_measured[-1]["tolerance_data_scale"].items()))
    measured["outside"] = {
        "rule": "English prose the corpus does not hold, each file measured whole when this machine has it; "
                f"data-scale grid, {repeats} repeats, seed {SWEEP_SEED}",
        "texts": outside_measured,
    }
    if codec.variational:
        ids = sweep_chunks.ids()
        with torch.inference_mode():
            _, std = codec.model.encode(ids)
        measured["posterior_std_mean"] = float(std.mean())
    return measured


def train(
    recipe: Recipe,
    out_path: str | Path,
    log: Log = print,
    corpus: Corpus | None = None,
    tokenizer=None,
    measure_card: bool = True,
) -> Codec:
    """Train one codec by `recipe`, measure it and save it with its card to `out_path`.

    Ctrl-C stops training early: the last finite weights are measured and saved anyway.
    """
    if corpus is None or tokenizer is None:
        corpus, tokenizer = shared_data(recipe.vocab_size)
    if tokenizer.get_vocab_size() != recipe.vocab_size:
        raise ValueError(f"the tokenizer has {tokenizer.get_vocab_size()} tokens but the recipe asks for {recipe.vocab_size}")
    pad_id = tokenizer.token_to_id(PAD_TOKEN)
    if tokenizer.token_to_id(MASK_TOKEN) != MASK_ID:
        raise ValueError("the tokenizer's <mask> token is not id 1")
    torch.set_num_threads(recipe.threads)
    # a well-trained plain codec's softmax holds many probabilities below float32's normal range; on a
    # CPU, arithmetic on such subnormal numbers is several times slower (measured 3x per step here)
    torch.set_flush_denormal(True)
    torch.manual_seed(recipe.seed)
    generator = torch.Generator().manual_seed(recipe.seed)
    stream = torch.from_numpy(token_stream(tokenizer, corpus.train))
    held_stream = token_stream(tokenizer, corpus.held_out)[:HELD_OUT_TOKENS]
    usable = len(held_stream) // recipe.chunk_size * recipe.chunk_size
    held_ids = torch.from_numpy(held_stream[:usable].reshape(-1, recipe.chunk_size))
    held_ids = held_ids[:2000]
    held_mask = torch.ones_like(held_ids, dtype=torch.bool)
    model = build_model(recipe.model_config(pad_id))
    model.train()
    decay = [p for n, p in model.named_parameters() if p.ndim >= 2 and "position" not in n]
    no_decay = [p for n, p in model.named_parameters() if not (p.ndim >= 2 and "position" not in n)]
    optimizer = torch.optim.AdamW(
        [{"params": decay, "weight_decay": recipe.weight_decay}, {"params": no_decay, "weight_decay": 0.0}],
        lr=recipe.lr,
        betas=(0.9, 0.98),
    )
    log(f"[{recipe.name}] {sum(p.numel() for p in model.parameters()):,} parameters, "
        f"{len(stream):,} training tokens, {recipe.steps} steps of {recipe.batch_size} chunks")
    started = time.perf_counter()
    good_state = copy.deepcopy(model.state_dict())
    step = 0
    stopped_by = "steps"
    running: dict[str, float] = {}
    since_checkpoint: list[float] = []
    keep_steps = checkpoint_steps(recipe)
    run_dir = run_folder(recipe, out_path)
    try:
        while step < recipe.steps:
            if time.perf_counter() - started > recipe.minutes * 60:
                stopped_by = "time budget"
                break
            for group in optimizer.param_groups:
                group["lr"] = _lr_at(step, recipe)
            ids = _sample_batch(stream, recipe, generator, pad_id)
            loss, stats = training_loss(model, ids, recipe, generator)
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            if recipe.grad_clip > 0:
                nn.utils.clip_grad_norm_(model.parameters(), recipe.grad_clip)
            optimizer.step()
            step += 1
            for key, value in stats.items():
                running[key] = running.get(key, 0.0) + value
            since_checkpoint.append(stats["loss"])
            if step in keep_steps and math.isfinite(since_checkpoint[-1]):
                _save_run_checkpoint(model, tokenizer, recipe, corpus, run_dir, step, since_checkpoint,
                                     time.perf_counter() - started, log)
                since_checkpoint = []
            if step % recipe.log_every == 0 or step == recipe.steps:
                n = recipe.log_every if step % recipe.log_every == 0 else step % recipe.log_every
                avg = {key: value / n for key, value in running.items()}
                running = {}
                if not all(math.isfinite(v) for v in avg.values()):
                    log(f"[{recipe.name}] step {step}: non-finite loss; stopping with the last good weights")
                    model.load_state_dict(good_state)
                    stopped_by = "non-finite loss"
                    break
                good_state = copy.deepcopy(model.state_dict())
                held_acc = chunk_accuracy(model, held_ids, held_mask)
                extra = "".join(f" {key} {avg[key]:.3f}" for key in ("kl", "std") if key in avg)
                log(f"[{recipe.name}] step {step:6d}  loss {avg['ce']:.4f}  train acc {100 * avg['acc']:.2f} %  "
                    f"held-out acc {100 * held_acc:.3f} %{extra}  lr {_lr_at(step - 1, recipe):.2e}  "
                    f"{time.perf_counter() - started:6.0f} s")
    except KeyboardInterrupt:
        stopped_by = "interrupted"
        if not all(torch.isfinite(v).all() for v in model.state_dict().values()):
            model.load_state_dict(good_state)
        log(f"[{recipe.name}] interrupted at step {step}; saving the last good weights")
    wall = time.perf_counter() - started
    model.eval()
    with torch.no_grad():
        # measure exactly the weights that will be stored
        dtype = getattr(torch, recipe.save_dtype)
        for tensor in model.state_dict().values():
            tensor.copy_(tensor.to(dtype).to(tensor.dtype))
    codec = Codec(model=model, tokenizer=tokenizer)
    card: dict[str, Any] = {
        "name": recipe.name,
        "why": recipe.why,
        "recipe": recipe.to_dict(),
        "corpus": corpus.info.to_dict(),
        "tokenizer": {
            "kind": "byte-level BPE trained on the training split",
            "vocab_size": tokenizer.get_vocab_size(),
            "sha256": tokenizer_sha256(tokenizer),
        },
        "versions": library_versions(),
        "train_wall_seconds": round(wall, 1),
        "steps_done": step,
        "stopped_by": stopped_by,
        "threads": torch.get_num_threads(),
    }
    if measure_card:
        started_measure = time.perf_counter()
        try:
            card["measured"] = measure(codec, corpus.held_out_text, log,
                                       outside=outside_texts(corpus.info.stdlib_path))
        except KeyboardInterrupt:
            log(f"[{recipe.name}] measuring interrupted; the card has no measured numbers")
        card["measure_wall_seconds"] = round(time.perf_counter() - started_measure, 1)
    codec.card = card
    save_codec(codec, out_path, dtype=recipe.save_dtype)
    log(f"[{recipe.name}] saved {out_path} ({Path(out_path).stat().st_size / 1e6:.2f} MB) after {step} steps, {wall:.0f} s")
    return codec


def checkpoint_steps(recipe: Recipe) -> list[int]:
    """The steps a run keeps: first_checkpoint and its doublings below `steps`, then `steps` itself."""
    if recipe.first_checkpoint <= 0:
        return []
    steps, step = [], recipe.first_checkpoint
    while step < recipe.steps:
        steps.append(step)
        step *= 2
    return steps + [recipe.steps]


def run_folder(recipe: Recipe, out_path: str | Path) -> Path:
    return Path(out_path).parent / f"{recipe.name}-run"


def _save_run_checkpoint(model, tokenizer, recipe: Recipe, corpus: Corpus, run_dir: Path, step: int,
                         losses: list[float], wall: float, log: Log) -> None:
    """A copy of the weights at `step`, stored as the recipe's dtype, with its step and training loss."""
    snapshot = copy.deepcopy(model).eval()
    codec = Codec(model=snapshot, tokenizer=tokenizer)
    codec.card = {
        "name": f"{recipe.name} step {step}",
        "why": f"checkpoint of the {recipe.name} recipe at step {step} of {recipe.steps}",
        "run": recipe.name,
        "step": step,
        "training_loss": float(np.mean(losses)),
        "training_loss_rule": "mean training objective (cross-entropy + KL term / K) over the steps since the previous kept checkpoint",
        "recipe": recipe.to_dict(),
        "corpus": corpus.info.to_dict(),
        "tokenizer": {"kind": "byte-level BPE trained on the training split", "vocab_size": tokenizer.get_vocab_size(),
                      "sha256": tokenizer_sha256(tokenizer)},
        "versions": library_versions(),
        "train_wall_seconds": round(wall, 1),
        "steps_done": step,
    }
    run_dir.mkdir(parents=True, exist_ok=True)
    path = run_dir / f"step_{step:05d}.safetensors"
    save_codec(codec, path, dtype=recipe.save_dtype)
    log(f"[{recipe.name}] kept {path} (training loss {codec.card['training_loss']:.4f})")


def _override(recipe: Recipe, args: argparse.Namespace) -> Recipe:
    changes = {key: getattr(args, key) for key in ("steps", "minutes", "seed") if getattr(args, key, None) is not None}
    return replace(recipe, **changes)


def card_table(folder: str | Path) -> str:
    """A Markdown table of what each checkpoint's card says it is and measured."""
    from core.codecs.checkpoint import load_codec

    from core.engine.tolerance import TOLERANCE_LEVELS, level_key, level_percent, tolerance_text

    def tol(t: dict) -> str:
        return tolerance_text(t, digits=3)

    levels = " / ".join(level_percent(level).replace(" %", "") for level in TOLERANCE_LEVELS) + " %"
    keys = [level_key(level) for level in TOLERANCE_LEVELS]

    paths = sorted(Path(folder).glob("*.safetensors"))
    if not Path(folder).is_dir():
        raise SettingsError(f"{folder} is not a folder.")
    if not paths:
        raise SettingsError(f"{folder} holds no .safetensors checkpoints to tabulate.")
    rows = [
        "| model | training | latent / width / depth / embed | steps × batch | acc. σ=0 held-out | acc. σ=0 demo "
        f"| tolerance isotropic {levels} | tolerance data-scale {levels} | latent RMS | train time | file |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    outside: list[str] = []
    for path in paths:
        c = load_codec(path)
        if not isinstance(c.card.get("recipe"), dict) or not isinstance(c.card.get("measured"), dict):
            raise SettingsError(f"{path}'s card has no recipe or no measured numbers (not a sample recipe's "
                                "checkpoint, or trained with --no-measure).")
        r, m = c.card["recipe"], c.card["measured"]
        if r["variational"]:
            how = (f"VAE, KL weight {r['kl_weight']:g}, free bits {r['free_bits']:g} nats/dim, latent dropout "
                   f"{r['latent_dropout']:g}, input masking {r['token_mask_prob']:g}")
        else:
            how = "reconstruction only"
        if r.get("random_token_prob"):
            how += f"; uniform token replacement {r['random_token_prob']:g}"
        iso = " / ".join(tol(m["tolerance"]["isotropic"][k]) for k in keys)
        ds = " / ".join(tol(m["tolerance"]["data-scale"][k]) for k in keys)
        rows.append(
            f"| `{path.stem}` | {how} | {r['latent_dim']} / {r['width']} / {r['depth']} / {r['embed_dim']} "
            f"| {c.card['steps_done']} × {r['batch_size']} | {100 * m['held_out']['token_accuracy_sigma0']:.3f} % "
            f"| {100 * m['demo']['token_accuracy_sigma0']:.2f} % | {iso} | {ds} | {m['latent_rms']:.3g} "
            f"| {c.card['train_wall_seconds'] / 60:.1f} min | {path.stat().st_size / 1e6:.1f} MB |"
        )
        for text in m.get("outside", {}).get("texts", []):
            outside.append(
                f"| `{path.stem}` | {text['label']} | {text['tokens']:,} | {100 * text['token_accuracy_sigma0']:.3f} % "
                f"| {' / '.join(tol(text['tolerance_data_scale'][k]) for k in keys)} |"
            )
    if outside:
        rows += [
            "",
            f"| model | outside text | tokens | acc. σ=0 | tolerance data-scale {levels} |",
            "| --- | --- | --- | --- | --- |",
        ] + outside
    return "\n".join(rows)


TABLE_BEGIN = "<!-- the table below is written by: python -m core.training.train --table sample_models --readme -->"
TABLE_END = "<!-- end of the written table -->"


def write_table_into_readme(folder: str | Path) -> Path:
    """Replace the block between TABLE_BEGIN and TABLE_END in FOLDER/README.md with card_table(FOLDER)."""
    readme = Path(folder) / "README.md"
    try:
        text = readme.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"{readme} cannot be read as UTF-8 text to write the table into ({exc.__class__.__name__}).") from None
    start, end = text.find(TABLE_BEGIN), text.find(TABLE_END)
    if start < 0 or end < start:
        raise SettingsError(f"{readme} has no table markers: add the line {TABLE_BEGIN} and, below it, {TABLE_END}.")
    table = card_table(folder)  # built before the file is touched, so a failure leaves it as it was
    head = text[: start + len(TABLE_BEGIN)]
    readme.write_text(head + "\n\n" + table + "\n\n" + text[end:], encoding="utf-8")
    return readme


def run_from_args(args: argparse.Namespace) -> int:
    if getattr(args, "table", None):
        if getattr(args, "readme", False):
            print(f"wrote the table into {write_table_into_readme(args.table)}")
        else:
            print(card_table(args.table))
        return 0
    if getattr(args, "generator", False):
        from core.training.generator import DEFAULT_OUT, GeneratorRecipe, train_generator

        recipe = GeneratorRecipe(**{key: getattr(args, key) for key in ("steps", "minutes", "seed") if getattr(args, key, None) is not None})
        train_generator(out=args.out or DEFAULT_OUT, recipe=recipe)
        return 0
    names = sorted(RECIPES) if args.all else [args.recipe]
    corpus, tokenizer = shared_data(RECIPES[names[0]].vocab_size)
    for name in names:
        recipe = _override(RECIPES[name], args)
        out = Path(args.out_dir) / f"{name}.safetensors" if args.all or not args.out else Path(args.out)
        train(recipe, out, corpus=corpus, tokenizer=tokenizer, measure_card=not args.no_measure)
    readme = Path(args.out_dir) / "README.md"
    if args.all and not args.no_measure and readme.is_file() and TABLE_BEGIN in readme.read_text(encoding="utf-8"):
        print(f"wrote the table into {write_table_into_readme(args.out_dir)}")
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m core.training.train", description="Train chunk-mlp codecs.")
    add_arguments(parser)
    return run_from_args(parser.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
