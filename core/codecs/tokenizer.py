"""Tokenizer helpers for every `tokenizers` family: exact character spans, token bytes, display.

Families (DESIGN.md, the codec contract): byte-level BPE, BPE with a metaspace
pre-tokenizer (SentencePiece style, optionally with byte fallback), Unigram, WordPiece,
with or without normalizers, plus added and special tokens.

Spans come from the encoding's offsets, which the `tokenizers` library gives in
characters of the original text (before any normalizer). They are made monotone and
made to tile the text: a gap the tokenizer dropped (whitespace between WordPiece words,
say) belongs to the token after it, text after the last token to the last token, and a
token whose offsets overlap the previous one's (the second half of a character that
byte-level BPE split) gets an empty span at the previous token's end.
"""

from __future__ import annotations

import json
import weakref
from dataclasses import dataclass
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


@dataclass(frozen=True)
class Family:
    """What decides how one tokenizer's pieces read as text."""

    model: str  # "BPE", "Unigram", "WordPiece", "WordLevel"
    byte_level: bool
    metaspace: str  # the metaspace replacement character, or ""
    byte_fallback: bool
    continuation: str  # WordPiece's (or BPE's) continuing-subword prefix, or ""
    specials: frozenset  # ids of special tokens (they stand for no text)


def _walk(node) -> Iterable[dict]:
    """Every component of a normalizer/pre-tokenizer/decoder, Sequences opened."""
    if isinstance(node, dict):
        yield node
        for key in ("pretokenizers", "decoders", "normalizers"):
            for child in node.get(key) or ():
                yield from _walk(child)


_FAMILIES: "weakref.WeakKeyDictionary[Tokenizer, Family]" = weakref.WeakKeyDictionary()


def family_of(tokenizer: Tokenizer) -> Family:
    """The tokenizer's family, read once from its serialized form."""
    try:
        found = _FAMILIES.get(tokenizer)
    except TypeError:
        found = None
    if found is not None:
        return found
    spec = json.loads(tokenizer.to_str())
    model = spec.get("model") or {}
    parts = list(_walk(spec.get("pre_tokenizer"))) + list(_walk(spec.get("decoder")))
    kinds = {p.get("type") for p in parts}
    metaspace = ""
    for p in parts:
        if p.get("type") == "Metaspace":
            metaspace = p.get("replacement", "\u2581")
        elif p.get("type") == "Replace" and (p.get("pattern") or {}).get("String") == "\u2581" and p.get("content") == " ":
            metaspace = "\u2581"
    continuation = ""
    if model.get("type") in ("WordPiece", "BPE"):
        continuation = model.get("continuing_subword_prefix") or ""
    found = Family(
        model=str(model.get("type", "")),
        byte_level="ByteLevel" in kinds,
        metaspace=metaspace,
        byte_fallback=bool(model.get("byte_fallback")),
        continuation=continuation,
        specials=frozenset(int(t["id"]) for t in spec.get("added_tokens") or () if t.get("special")),
    )
    try:
        _FAMILIES[tokenizer] = found
    except TypeError:
        pass
    return found


def _fallback_byte(piece: str) -> int | None:
    if len(piece) == 6 and piece.startswith("<0x") and piece.endswith(">"):
        try:
            return int(piece[3:5], 16)
        except ValueError:
            return None
    return None


def token_text(tokenizer: Tokenizer, token_id: int) -> str:
    """The text one (non-byte) token stands for, as its family writes it inside a text."""
    piece = tokenizer.id_to_token(int(token_id))
    if piece is None:
        return ""
    family = family_of(tokenizer)
    if int(token_id) in family.specials:
        return piece
    if family.metaspace:
        return piece.replace(family.metaspace, " ")
    if family.model == "WordPiece":
        if family.continuation and piece.startswith(family.continuation):
            return piece[len(family.continuation):]
        return " " + piece
    if family.continuation and piece.startswith(family.continuation):
        return piece[len(family.continuation):]
    return piece


def token_bytes(tokenizer: Tokenizer, token_id: int) -> bytes:
    """The bytes one token stands for (padding and mask tokens stand for none)."""
    piece = tokenizer.id_to_token(int(token_id))
    if piece is None or piece in (PAD_TOKEN, MASK_TOKEN):
        return b""
    family = family_of(tokenizer)
    if family.byte_level and int(token_id) not in family.specials:
        table = _byte_decoder()
        try:
            return bytes(table[ch] for ch in piece)
        except KeyError:
            return piece.encode("utf-8")
    if family.byte_fallback:
        byte = _fallback_byte(piece)
        if byte is not None:
            return bytes([byte])
    return token_text(tokenizer, token_id).encode("utf-8")


def token_byte_lengths(tokenizer: Tokenizer) -> np.ndarray:
    return np.array([len(token_bytes(tokenizer, i)) for i in range(tokenizer.get_vocab_size())], dtype=np.int64)


def token_display(tokenizer: Tokenizer, token_id: int) -> str:
    """A readable form of one token: its text (metaspace as a space, WordPiece's ## dropped and
    a word start shown with its space), a special token as written, or the bytes of a partial character."""
    piece = tokenizer.id_to_token(int(token_id))
    if piece is None:
        return ""
    if piece in (PAD_TOKEN, MASK_TOKEN) or int(token_id) in family_of(tokenizer).specials:
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
    """Decode token ids back to text; padding and mask tokens stand for nothing.

    Byte-level tokenizers are decoded byte-exact; every other family by its own decoder."""
    ids = [int(i) for i in ids]
    if family_of(tokenizer).byte_level:
        raw = b"".join(token_bytes(tokenizer, i) for i in ids)
        return raw.decode("utf-8", errors="replace")
    silent = {tokenizer.token_to_id(t) for t in (PAD_TOKEN, MASK_TOKEN, "[PAD]", "[MASK]")} - {None}
    return tokenizer.decode([i for i in ids if i not in silent], skip_special_tokens=False)


def _plain(tokenizer: Tokenizer) -> Tokenizer:
    """The tokenizer without padding or truncation (a user's tokenizer.json may enable them)."""
    if tokenizer.padding is None and tokenizer.truncation is None:
        return tokenizer
    copy = Tokenizer.from_str(tokenizer.to_str())
    copy.no_padding()
    copy.no_truncation()
    return copy


def tiling_spans(offsets: np.ndarray, text_length: int) -> np.ndarray:
    """Monotone [start, end) spans that tile [0, text_length) from a tokenizer's character offsets."""
    offsets = np.asarray(offsets, dtype=np.int64).reshape(-1, 2)
    if len(offsets) == 0:
        return np.zeros((0, 2), dtype=np.int64)
    ends = np.maximum.accumulate(np.clip(offsets[:, 1], 0, text_length))
    ends[-1] = text_length
    starts = np.concatenate([[0], ends[:-1]])
    return np.stack([starts, ends], axis=1)


def encode_with_spans(
    tokenizer: Tokenizer, text: str, byte_lengths: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Token ids of a text and each token's [start, end) character span; spans tile the text.

    `byte_lengths` is accepted for older callers and not needed: spans come from the offsets."""
    encoding = _plain(tokenizer).encode(text, add_special_tokens=False)
    ids = np.asarray(encoding.ids, dtype=np.int64)
    return ids, tiling_spans(np.asarray(encoding.offsets, dtype=np.int64), len(text))


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
