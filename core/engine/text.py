"""Evaluation text: validated loading, tokenizing, cutting into K-token chunks."""

from __future__ import annotations

import hashlib
import os
import re
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



def padded_ids(flat: np.ndarray, n: int, k: int, pad_id: int) -> torch.Tensor:
    """LongTensor[n, K] of n chunks' token ids `flat` (the ragged last chunk's tail filled with pad_id)."""
    out = np.full(n * k, pad_id, dtype=np.int64)
    out[: len(flat)] = flat
    return torch.from_numpy(out.reshape(n, k))


def real_mask(start: int, stop: int, k: int, num_tokens: int) -> torch.Tensor:
    """BoolTensor[stop - start, K] of chunks start..stop of a text of num_tokens: True for real tokens."""
    return torch.from_numpy((np.arange(start * k, stop * k) < num_tokens).reshape(stop - start, k))

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
        return padded_ids(self.token_ids[start * k : stop * k], stop - start, k, self.pad_id)

    def mask(self, start: int = 0, stop: int | None = None) -> torch.Tensor:
        """BoolTensor[n, K]: True for real tokens, False for padding."""
        stop = self.num_chunks if stop is None else min(stop, self.num_chunks)
        return real_mask(start, stop, self.chunk_size, self.num_tokens)


PIECE_CHARS = 32_000  # a long text is tokenized about this many characters at a time: faster than whole,
# and the tokenizer holds the GIL per call, so a worker thread tokenizing never stalls the GUI for long (~50 ms)
_SAFE_CUT = re.compile(r"(?<=\S)\n(?=\S)")


def _splits_at_lone_newlines(tokenizer) -> bool:
    """Whether the tokenizer's pieces never cross a newline between two non-space characters.

    True for a byte-level BPE with the ByteLevel pre-tokenizer's own split regex and no normalizer (this project's
    tokenizers): there a lone "\n" is its own pre-token whether or not the text ends after it,
    so the text tokenizes piece by piece exactly as it does whole."""
    try:
        from tokenizers import Tokenizer, pre_tokenizers

        return (isinstance(tokenizer, Tokenizer) and tokenizer.normalizer is None
                and isinstance(tokenizer.pre_tokenizer, pre_tokenizers.ByteLevel) and bool(tokenizer.pre_tokenizer.use_regex))
    except Exception:  # an unusual tokenizer: tokenize it whole
        return False


def _pieces(text: str, size: int) -> list[int]:
    """Character offsets where a long text is cut for tokenizing: just after a lone newline near every `size` characters."""
    cuts, at = [0], size
    while at < len(text):
        found = _SAFE_CUT.search(text, at)
        if found is None:
            break
        cuts.append(found.end())
        at = found.end() + size
    return cuts + [len(text)]


def tokenize_with_spans(tokenizer, text: str, byte_lengths=None, piece_chars: int = PIECE_CHARS) -> tuple[np.ndarray, np.ndarray]:
    """Token ids and character spans of a text; a long text goes through the tokenizer piece by piece
    (when that gives exactly the whole text's tokens), which bounds the tokenizer's own memory."""
    if len(text) <= piece_chars or not _splits_at_lone_newlines(tokenizer):
        return encode_with_spans(tokenizer, text, byte_lengths)
    cuts = _pieces(text, piece_chars)
    ids, spans = [], []
    for a, b in zip(cuts, cuts[1:]):
        piece_ids, piece_spans = encode_with_spans(tokenizer, text[a:b], byte_lengths)
        ids.append(piece_ids)
        spans.append(piece_spans + a)
    return np.concatenate(ids), np.concatenate(spans)


def chunk_text(text: str, codec, source: str = "the text") -> Chunks:
    """Tokenize a text with the codec's tokenizer and cut it into chunks of K tokens."""
    from core.codecs.contract import byte_lengths_of

    check_text(text, source)
    ids, spans = tokenize_with_spans(codec.tokenizer, text, byte_lengths_of(codec.tokenizer))
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
