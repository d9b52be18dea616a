"""Adapter for the transformer sample (DESIGN.md, "Three ways to open a codec", 2).

`chunkscope sweep sample_models/transformer/transformer.pt --adapter sample_models/transformer/adapter.py`
runs this file's code: it builds the model of model.py from config.json, loads the
state dict, and reads tokenizer.json, all from the checkpoint's folder.
"""

import importlib.util
import json
from pathlib import Path

import torch
from tokenizers import Tokenizer


def _model_module():
    spec = importlib.util.spec_from_file_location("chunkscope_sample_transformer", Path(__file__).with_name("model.py"))
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


class TransformerCodec:
    def __init__(self, model, tokenizer, config, card):
        self.model = model.eval()
        self.tokenizer = tokenizer
        self.chunk_size = model.chunk_size
        self.latent_dim = model.latent_dim
        self.vocab_size = model.vocab_size
        self.pad_id = config["pad_id"]
        self.variational = model.variational
        self.name = "transformer"
        self.card = card

    def encode(self, ids):
        return self.model.encode(ids)

    def decode(self, z):
        return self.model.decode(z)


def load(path):
    path = Path(path)
    folder = path if path.is_dir() else path.parent
    weights = folder / "transformer.pt" if path.is_dir() else path
    config = json.loads((folder / "config.json").read_text(encoding="utf-8"))
    card_path = folder / "card.json"
    card = json.loads(card_path.read_text(encoding="utf-8")) if card_path.exists() else {}
    model = _model_module().ChunkTransformer(**config["model"])
    model.load_state_dict(torch.load(weights, map_location="cpu", weights_only=True))
    return TransformerCodec(model, Tokenizer.from_file(str(folder / "tokenizer.json")), config, card)
