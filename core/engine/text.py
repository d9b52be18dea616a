"""Evaluation text: validated loading, tokenizing, cutting into K-token chunks."""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from core.deferred import torch
from core.errors import TextError
from core.codecs.tokenizer import encode_with_spans

DEMO_TEXT_PATH = Path(__file__).resolve().parents[2] / "sample_models" / "demo_text.txt"


def text_sha256(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def check_text(text: str, source: str = "the text") -> str:
    """The one validator for evaluation text, whatever it came from."""
    if not isinstance(text, str):
        raise TextError(f"{source} is not text.")
    if not text:
        raise TextError(f"{source} is empty.")
    if not text.strip():
        raise TextError(f"{source} holds only whitespace.")
    return text


def load_text(path: str | os.PathLike) -> str:
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise TextError(f"{path.name} does not exist.") from None
    except IsADirectoryError:
        raise TextError(f"{path.name} is a folder, not a text file.") from None
    except OSError as exc:
        raise TextError(f"{path.name} cannot be read: {exc.strerror or exc}.") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise TextError(
            f"{path.name} is not UTF-8 text: the byte 0x{raw[exc.start]:02x} at byte offset {exc.start} cannot be decoded."
        ) from None
    if text.startswith("\ufeff"):
        text = text[1:]
    return check_text(text, path.name)


def demo_text() -> str:
    return load_text(DEMO_TEXT_PATH)


@dataclass
class Chunks:
    """A text cut into K-token chunks. Token t sits in chunk t // K at position t % K."""

    text: str
    text_sha256: str
    token_ids: np.ndarray  # [T] int64
    spans: np.ndarray  # [T, 2] character [start, end)
    chunk_size: int
    pad_id: int

    @property
    def num_tokens(self) -> int:
        return int(len(self.token_ids))

    @property
    def num_chunks(self) -> int:
        return -(-self.num_tokens // self.chunk_size)

    def ids(self, start: int = 0, stop: int | None = None) -> torch.Tensor:
        """LongTensor[n, K] of chunks start..stop, the ragged last one padded."""
        stop = self.num_chunks if stop is None else min(stop, self.num_chunks)
        k = self.chunk_size
        flat = self.token_ids[start * k : stop * k]
        n = stop - start
        out = np.full(n * k, self.pad_id, dtype=np.int64)
        out[: len(flat)] = flat
        return torch.from_numpy(out.reshape(n, k))

    def mask(self, start: int = 0, stop: int | None = None) -> torch.Tensor:
        """BoolTensor[n, K]: True for real tokens, False for padding."""
        stop = self.num_chunks if stop is None else min(stop, self.num_chunks)
        k = self.chunk_size
        real = np.arange(start * k, stop * k) < self.num_tokens
        return torch.from_numpy(real.reshape(stop - start, k))


def chunk_text(text: str, codec, source: str = "the text") -> Chunks:
    """Tokenize a text with the codec's tokenizer and cut it into chunks of K tokens."""
    from core.codecs.contract import byte_lengths_of

    check_text(text, source)
    ids, spans = encode_with_spans(codec.tokenizer, text, byte_lengths_of(codec.tokenizer))
    if len(ids) == 0:
        raise TextError(f"{source} gives no tokens.")
    return Chunks(
        text=text,
        text_sha256=text_sha256(text),
        token_ids=ids,
        spans=spans,
        chunk_size=codec.chunk_size,
        pad_id=codec.pad_id,
    )
