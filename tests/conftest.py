"""Shared fixtures: a tokenizer trained on a few paragraphs, a small untrained chunk-mlp
checkpoint, a contract-only codec that reconstructs perfectly at sigma = 0, and one main
window on the shipped samples per GUI test module."""

from __future__ import annotations

import hashlib
import os
import sysconfig
from functools import lru_cache
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import numpy as np
import pytest
import torch

from core.codecs.checkpoint import Codec, save_codec

torch.set_num_threads(1)  # the tensors here are small; one thread avoids thread-pool contention on shared machines
from core.codecs.model import ChunkMLPConfig, build_model
from core.codecs.tokenizer import train_byte_bpe

FIXTURE_TEXT = (
    "The valley line climbs 412 metres in 9.5 km; on the steepest stretch the gradient is 1:28.\n"
    "Volunteers logged 06:45 departures, a café stop at Ober-Ränk, and €1,240.50 of coal (Δ = +3 %).\n"
    "Sleepers, fishplates, and the old water tower were checked twice — once at dawn, once at dusk.\n"
) * 4


@pytest.fixture(scope="session")
def tokenizer():
    return train_byte_bpe([FIXTURE_TEXT], 320)


@pytest.fixture(scope="session")
def small_codec(tokenizer):
    torch.manual_seed(0)
    config = ChunkMLPConfig(chunk_size=4, vocab_size=tokenizer.get_vocab_size(), latent_dim=16, embed_dim=16, width=32, depth=1, variational=True)
    return Codec(build_model(config), tokenizer, card={"note": "test fixture"})


@pytest.fixture()
def small_checkpoint(small_codec, tmp_path):
    path = tmp_path / "small.safetensors"
    save_codec(small_codec, path)
    return path


class LookupCodec:
    """A codec that meets the contract (core.codecs.contract.ChunkCodec) and nothing more, without learning: each token has a fixed random
    vector, a chunk's latent is the concatenation, and decoding scores every token by
    negative squared distance. It reconstructs perfectly at sigma = 0 and breaks under noise."""

    def __init__(self, tokenizer, chunk_size: int = 4, per_token_dim: int = 3, sharpness: float = 20.0, seed: int = 0, scale: float = 1.0):
        self.tokenizer = tokenizer
        self.chunk_size = chunk_size
        self.vocab_size = tokenizer.get_vocab_size()
        self.pad_id = 0
        self.variational = False
        self.latent_dim = chunk_size * per_token_dim
        self.per_token_dim = per_token_dim
        self.sharpness = sharpness
        self.scale = scale
        self.table = torch.randn(self.vocab_size, per_token_dim, generator=torch.Generator().manual_seed(seed))
        self.name = "lookup"
        self.decoded_latents: list[torch.Tensor] | None = None

    def encode(self, ids):
        return self.table[ids].reshape(ids.shape[0], -1) * self.scale, None

    def decode(self, z):
        if self.decoded_latents is not None:
            self.decoded_latents.append(z.clone())
        slots = (z / self.scale).reshape(z.shape[0], self.chunk_size, self.per_token_dim)
        squared = slots.square().sum(-1, keepdim=True) - 2 * slots @ self.table.T + self.table.square().sum(-1)
        return -self.sharpness * squared


def documented_held_out(relative_path: str) -> bool:
    """core/training/corpus.py's docstring, followed by hand (not by calling is_held_out): a file is held
    out when int(sha256(relative posix path), 16) % 10 == 0; the digest's bytes read big-endian are that integer."""
    return int.from_bytes(hashlib.sha256(relative_path.encode("utf-8")).digest(), "big") % 10 == 0


@lru_cache(maxsize=1)
def stdlib_corpus_files() -> tuple[Path, tuple[Path, ...]]:
    """This Python's standard library folder and the files the corpus reads from it (walked once per session)."""
    from core.training.corpus import stdlib_files

    root = Path(sysconfig.get_paths()["stdlib"])
    return root, tuple(stdlib_files(root))


@pytest.fixture()
def lookup_codec(tokenizer):
    return LookupCodec(tokenizer)


def make_lookup(tokenizer, **kwargs) -> LookupCodec:
    return LookupCodec(tokenizer, **kwargs)


@pytest.fixture(scope="session")
def fixture_text():
    return FIXTURE_TEXT


def rng(seed: int = 0) -> np.random.Generator:
    return np.random.default_rng(seed)


@pytest.fixture(scope="module")
def settings_path(tmp_path_factory):
    """Where the module's window keeps its settings (a module may override this fixture)."""
    return tmp_path_factory.mktemp("settings") / "chunkscope.ini"


@pytest.fixture(scope="module")
def window(qapp, settings_path):
    """The main window on the shipped samples and the demo text, shown, one per module."""
    from app.main import make_settings
    from app.state import sample_paths
    from app.window import MainWindow

    if not sample_paths():
        pytest.skip("the sample checkpoints are not there")
    win = MainWindow(make_settings(settings_path))
    win.show()
    yield win
    if win.isVisible():
        win.close()
    win.runner.shutdown()
