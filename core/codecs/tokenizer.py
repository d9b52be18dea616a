"""Byte-level BPE helpers: training, exact character spans, token bytes.

Byte-level tokens can split a multi-byte character; spans are computed from byte
offsets and mapped to characters so the spans of a text's tokens always tile it
(a token holding only part of a character gets the character if it ends it, else an
empty span).
"""

from __future__ import annotations

import weakref
from functools import lru_cache
from typing import Iterable

import numpy as np
from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

PAD_TOKEN = "<pad>"
MASK_TOKEN = "<mask>"


@lru_cache(maxsize=1)
def _byte_decoder() -> dict[str, int]:
    """The inverse of the byte-to-printable-character table byte-level BPE uses."""
    bs = list(range(ord("!"), ord("~") + 1)) + list(range(ord("¡"), ord("¬") + 1)) + list(range(ord("®"), ord("ÿ") + 1))
    cs = bs[:]
    n = 0
    for b in range(256):
        if b not in bs:
            bs.append(b)
            cs.append(256 + n)
            n += 1
    return {chr(c): b for b, c in zip(bs, cs)}


def token_bytes(tokenizer: Tokenizer, token_id: int) -> bytes:
    """The bytes one token stands for (special tokens stand for none)."""
    piece = tokenizer.id_to_token(int(token_id))
    if piece is None or piece in (PAD_TOKEN, MASK_TOKEN):
        return b""
    table = _byte_decoder()
    try:
        return bytes(table[ch] for ch in piece)
    except KeyError:
        return piece.encode("utf-8")


def token_byte_lengths(tokenizer: Tokenizer) -> np.ndarray:
    return np.array([len(token_bytes(tokenizer, i)) for i in range(tokenizer.get_vocab_size())], dtype=np.int64)


def token_display(tokenizer: Tokenizer, token_id: int) -> str:
    """A readable form of one token: its text, or <pad>, or the bytes of a partial character."""
    piece = tokenizer.id_to_token(int(token_id))
    if piece in (PAD_TOKEN, MASK_TOKEN):
        return piece
    raw = token_bytes(tokenizer, token_id)
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError:
        return raw.decode("utf-8", errors="backslashreplace")


_DISPLAY_TABLES: "weakref.WeakKeyDictionary[Tokenizer, list[str]]" = weakref.WeakKeyDictionary()


def display_table(tokenizer: Tokenizer) -> list[str]:
    """token_display of every id, made once per tokenizer (views look up thousands per update)."""
    table = _DISPLAY_TABLES.get(tokenizer)
    if table is None:
        table = _DISPLAY_TABLES[tokenizer] = [token_display(tokenizer, i) for i in range(tokenizer.get_vocab_size())]
    return table


def decode_ids(tokenizer: Tokenizer, ids: Iterable[int]) -> str:
    """Decode token ids back to text, byte-exact; padding and mask tokens stand for nothing."""
    raw = b"".join(token_bytes(tokenizer, i) for i in ids)
    return raw.decode("utf-8", errors="replace")


def encode_with_spans(
    tokenizer: Tokenizer, text: str, byte_lengths: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Token ids of a text and each token's [start, end) character span; spans tile the text."""
    if byte_lengths is None:
        byte_lengths = token_byte_lengths(tokenizer)
    encoding = tokenizer.encode(text, add_special_tokens=False)
    ids = np.asarray(encoding.ids, dtype=np.int64)
    lengths = byte_lengths[ids] if len(ids) else np.zeros(0, dtype=np.int64)
    byte_ends = np.cumsum(lengths)
    byte_starts = byte_ends - lengths
    char_lengths = np.frombuffer(text.encode("utf-32-le"), dtype=np.uint32)
    char_byte_len = np.where(char_lengths < 0x80, 1, np.where(char_lengths < 0x800, 2, np.where(char_lengths < 0x10000, 3, 4)))
    char_byte_end = np.cumsum(char_byte_len)
    total = int(char_byte_end[-1]) if len(char_byte_end) else 0
    if len(ids) and int(byte_ends[-1]) != total:
        raise ValueError("the tokenizer does not reproduce the text's bytes (is it byte-level?)")
    # a byte offset maps to the number of characters that end at or before it
    starts = np.searchsorted(char_byte_end, byte_starts, side="right")
    ends = np.searchsorted(char_byte_end, byte_ends, side="right")
    spans = np.stack([starts, ends], axis=1).astype(np.int64) if len(ids) else np.zeros((0, 2), dtype=np.int64)
    return ids, spans


def train_byte_bpe(texts: Iterable[str], vocab_size: int) -> Tokenizer:
    """A byte-level BPE with <pad> = 0 and <mask> = 1; any UTF-8 text round-trips."""
    tokenizer = Tokenizer(models.BPE())
    tokenizer.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False, use_regex=True)
    tokenizer.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=vocab_size,
        special_tokens=[PAD_TOKEN, MASK_TOKEN],
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    tokenizer.train_from_iterator(texts, trainer=trainer)
    return tokenizer
