"""Recipe of the transformer sample: trains it on CPU and writes everything beside this file.

    nice -n 15 python sample_models/transformer/train.py [--steps N] [--out FOLDER]

Writes (into --out, default this folder): tokenizer.json (WordPiece, lower-casing NFKC
normaliser, trained on the corpus' training split), config.json, transformer.pt (the
state dict), card.json (how it was trained and what was measured) and onnx/ (the ONNX
codec folder: codec.json, encoder.onnx, decoder.onnx, tokenizer.json). Seeded: the same
Python standard library and library versions give the same files.
"""

from __future__ import annotations

import argparse
import copy
import json
import math
import sys
import time
from dataclasses import replace
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))  # the project root, for core

import torch  # noqa: E402
from tokenizers import Tokenizer, decoders, models, normalizers, pre_tokenizers, trainers  # noqa: E402
from torch import nn  # noqa: E402

from core.training.corpus import build_corpus  # noqa: E402
from core.training.recipes import RECIPES  # noqa: E402
from core.training.train import (  # noqa: E402
    HELD_OUT_TOKENS, MASK_ID, _lr_at, _sample_batch, library_versions, measure, token_stream,
    tokenizer_sha256, training_loss,
)

SPECIALS = ["[PAD]", "[MASK]", "[UNK]"]  # ids 0, 1, 2: the project's loss masks with id 1
MODEL = {"chunk_size": 4, "latent_dim": 64, "width": 96, "heads": 4, "layers": 2, "ff": 192, "variational": True}
VOCAB_SIZE = 2048
STEPS = 7_000


def train_wordpiece(texts, vocab_size: int) -> Tokenizer:
    tokenizer = Tokenizer(models.WordPiece(unk_token="[UNK]", max_input_chars_per_word=100))
    tokenizer.normalizer = normalizers.Sequence([normalizers.NFKC(), normalizers.Lowercase()])
    tokenizer.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    tokenizer.decoder = decoders.WordPiece(prefix="##")
    trainer = trainers.WordPieceTrainer(vocab_size=vocab_size, special_tokens=SPECIALS, show_progress=False)
    tokenizer.train_from_iterator(texts, trainer=trainer)
    return tokenizer


def export_onnx(codec, folder: Path, card: dict) -> None:
    from model import Decoder, Encoder

    folder.mkdir(parents=True, exist_ok=True)
    model = codec.model
    ids = torch.zeros(2, model.chunk_size, dtype=torch.long)
    z = torch.zeros(2, model.latent_dim)
    torch.onnx.export(Encoder(model), (ids,), str(folder / "encoder.onnx"), input_names=["ids"],
                      output_names=["mean", "std"], dynamic_axes={"ids": {0: "n"}, "mean": {0: "n"}, "std": {0: "n"}},
                      dynamo=False)
    torch.onnx.export(Decoder(model), (z,), str(folder / "decoder.onnx"), input_names=["z"], output_names=["logits"],
                      dynamic_axes={"z": {0: "n"}, "logits": {0: "n"}}, dynamo=False)
    codec.tokenizer.save(str(folder / "tokenizer.json"))
    manifest = {"format": "chunkscope-onnx", "version": 1, "chunk_size": model.chunk_size, "latent_dim": model.latent_dim,
                "vocab_size": model.vocab_size, "pad_id": codec.pad_id, "variational": model.variational,
                "card": dict(card, name="transformer-onnx")}
    (folder / "codec.json").write_text(json.dumps(manifest, indent=1) + "\n", encoding="utf-8")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=STEPS)
    parser.add_argument("--out", default=str(HERE))
    parser.add_argument("--no-measure", action="store_true")
    parser.add_argument("--measure-only", type=float, metavar="TRAIN_SECONDS",
                        help="keep the saved weights; only measure, write the card (with this training time) and export")
    args = parser.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    sys.path.insert(0, str(HERE))
    from model import ChunkTransformer

    recipe = replace(RECIPES["tolerant"], name="transformer", chunk_size=MODEL["chunk_size"], vocab_size=VOCAB_SIZE,
                     latent_dim=MODEL["latent_dim"], steps=args.steps, lr=3e-3, warmup_steps=200, minutes=30.0,
                     why="A user's own architecture (a small transformer, plain PyTorch) with a WordPiece tokenizer, "
                     "trained with the tolerant recipe's regularisers; opened through its adapter or its ONNX export.")
    torch.set_num_threads(1)
    torch.manual_seed(recipe.seed)
    generator = torch.Generator().manual_seed(recipe.seed)
    corpus = build_corpus()
    tokenizer = train_wordpiece(corpus.train, VOCAB_SIZE)
    assert tokenizer.token_to_id("[MASK]") == MASK_ID and tokenizer.token_to_id("[PAD]") == 0
    tokenizer.save(str(out / "tokenizer.json"))
    config = {"architecture": "user transformer (sample_models/transformer/model.py)", "pad_id": 0,
              "model": dict(MODEL, vocab_size=VOCAB_SIZE)}
    (out / "config.json").write_text(json.dumps(config, indent=1) + "\n", encoding="utf-8")

    if args.measure_only is not None:
        return finish(out, corpus, tokenizer, config, recipe, args.measure_only, recipe.steps, args.no_measure)
    stream = torch.from_numpy(token_stream(tokenizer, corpus.train))
    held = torch.from_numpy(token_stream(tokenizer, corpus.held_out)[: 8000]).reshape(-1, recipe.chunk_size)
    model = ChunkTransformer(**config["model"])
    decay = [p for p in model.parameters() if p.ndim >= 2]
    no_decay = [p for p in model.parameters() if p.ndim < 2]
    optimizer = torch.optim.AdamW([{"params": decay, "weight_decay": recipe.weight_decay},
                                   {"params": no_decay, "weight_decay": 0.0}], lr=recipe.lr, betas=(0.9, 0.98))
    print(f"[transformer] {sum(p.numel() for p in model.parameters()):,} parameters, {len(stream):,} training tokens, "
          f"{recipe.steps} steps of {recipe.batch_size} chunks", flush=True)
    started = time.perf_counter()
    running: dict[str, float] = {}
    good = copy.deepcopy(model.state_dict())
    step = 0
    model.train()
    while step < recipe.steps:
        for group in optimizer.param_groups:
            group["lr"] = _lr_at(step, recipe)
        ids = _sample_batch(stream, recipe, generator, 0)
        loss, stats = training_loss(model, ids, recipe, generator)
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        nn.utils.clip_grad_norm_(model.parameters(), recipe.grad_clip)
        optimizer.step()
        step += 1
        for key, value in stats.items():
            running[key] = running.get(key, 0.0) + value
        if step % recipe.log_every == 0 or step == recipe.steps:
            n = recipe.log_every if step % recipe.log_every == 0 else step % recipe.log_every
            avg = {key: value / n for key, value in running.items()}
            running = {}
            if not all(math.isfinite(v) for v in avg.values()):
                model.load_state_dict(good)
                print(f"[transformer] step {step}: non-finite loss; stopping with the last good weights")
                break
            good = copy.deepcopy(model.state_dict())
            model.eval()
            with torch.inference_mode():
                acc = float((model.decode(model.encode(held)[0]).argmax(-1) == held).float().mean())
            model.train()
            print(f"[transformer] step {step:6d}  ce {avg['ce']:.4f}  train acc {100 * avg['acc']:.2f} %  "
                  f"held-out acc {100 * acc:.2f} %  kl {avg.get('kl', 0):.1f}  {time.perf_counter() - started:5.0f} s",
                  flush=True)
    wall = time.perf_counter() - started
    model.eval()
    torch.save(model.state_dict(), out / "transformer.pt")
    return finish(out, corpus, tokenizer, config, recipe, wall, step, args.no_measure)


def finish(out: Path, corpus, tokenizer, config: dict, recipe, wall: float, step: int, no_measure: bool) -> int:
    """Measure the saved weights through the adapter, write the card and the ONNX folder."""
    import adapter

    codec = adapter.load(str(out / "transformer.pt"))
    card = {
        "name": "transformer",
        "why": recipe.why,
        "recipe": recipe.to_dict(),
        "model": config["model"],
        "corpus": corpus.info.to_dict(),
        "tokenizer": {"kind": "WordPiece (NFKC + lower-case) trained on the training split",
                      "vocab_size": tokenizer.get_vocab_size(), "sha256": tokenizer_sha256(tokenizer)},
        "versions": library_versions(),
        "train_wall_seconds": round(wall, 1),
        "steps_done": step,
        "threads": torch.get_num_threads(),
    }
    if not no_measure:
        t = time.perf_counter()
        card["measured"] = measure(codec, corpus.held_out_text, lambda s: print(s, flush=True))
        card["measure_wall_seconds"] = round(time.perf_counter() - t, 1)
    (out / "card.json").write_text(json.dumps(card, indent=1) + "\n", encoding="utf-8")
    export_onnx(codec, out / "onnx", card)
    print(f"[transformer] wrote {out} after {step} steps, {wall:.0f} s", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
