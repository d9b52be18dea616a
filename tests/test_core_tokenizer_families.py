"""Every `tokenizers` family (DESIGN.md, the codec contract): spans tile the text, decode
matches the library's own decoder, and each token reads as its family writes it.

Each tokenizer is trained here, on a small text, with the `tokenizers` library's own
trainers; the references are that library's encode (offsets, in characters of the
original text), its normalizers and its decoders."""

from __future__ import annotations

import unicodedata

import numpy as np
import pytest
from tokenizers import Tokenizer, decoders, models, normalizers, pre_tokenizers, trainers

from core.codecs.tokenizer import (
    decode_ids, display_table, encode_with_spans, family_of, tiling_spans, token_display, train_byte_bpe,
)

TRAIN = [
    "The chunk autoencoder compresses four tokens into one vector and decodes it back.",
    "naïve café — €3,40 · Δt = 5 s · Zürich · 😀 end, and ﬁne print: ½ cup.",
    "Noise on the latent breaks the decoded text; where does it break first?",
    "  leading spaces\n\n\ttabs and\r\nwindows newlines  ",
    "İstanbul ΣΟΦΊΑ straße — ＦＵＬＬＷＩＤＴＨ letters, and 日本語のテキスト.",
] * 20

TEXTS = [
    "The chunk autoencoder decodes it back.",
    "naïve café — €3,40 · Zürich · 😀 end",
    "  leading spaces\n\n\ttabs and\r\nwindows newlines  ",
    "İstanbul straße ＦＵＬＬＷＩＤＴＨ ﬁne 日本語",
    "x",
]
SPECIALS = ["<pad>", "<mask>", "<unk>", "<sep>"]


def metaspace_bpe() -> Tokenizer:
    """SentencePiece-style BPE: metaspace pre-tokenizer and decoder, no normalizer."""
    tok = Tokenizer(models.BPE(unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.Metaspace(replacement="▁", prepend_scheme="always")
    tok.decoder = decoders.Metaspace(replacement="▁", prepend_scheme="always")
    tok.train_from_iterator(TRAIN, trainers.BpeTrainer(vocab_size=400, special_tokens=SPECIALS, show_progress=False))
    return tok


def unigram() -> Tokenizer:
    tok = Tokenizer(models.Unigram())
    tok.normalizer = normalizers.NFKC()
    tok.pre_tokenizer = pre_tokenizers.Metaspace(replacement="▁", prepend_scheme="always")
    tok.decoder = decoders.Metaspace(replacement="▁", prepend_scheme="always")
    tok.train_from_iterator(TRAIN, trainers.UnigramTrainer(vocab_size=300, special_tokens=SPECIALS, unk_token="<unk>",
                                                           show_progress=False))
    return tok


def wordpiece() -> Tokenizer:
    """BERT-style: NFKC + lower-casing normalizer, whitespace/punctuation pre-tokenizer, ## continuation."""
    tok = Tokenizer(models.WordPiece(unk_token="<unk>"))
    tok.normalizer = normalizers.Sequence([normalizers.NFKC(), normalizers.Lowercase()])
    tok.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    tok.decoder = decoders.WordPiece(prefix="##")
    tok.train_from_iterator(TRAIN, trainers.WordPieceTrainer(vocab_size=300, special_tokens=SPECIALS,
                                                             show_progress=False))
    return tok


def byte_bpe() -> Tokenizer:
    tok = train_byte_bpe(TRAIN, 400)
    tok.add_special_tokens(["<sep>"])
    return tok


FAMILIES = {"byte-level BPE": byte_bpe, "metaspace BPE": metaspace_bpe, "Unigram": unigram, "WordPiece": wordpiece}


@pytest.fixture(scope="module", params=sorted(FAMILIES))
def family(request):
    return request.param, FAMILIES[request.param]()


@pytest.mark.parametrize("text", TEXTS + ["one <sep> two"])
def test_spans_tile_the_original_text_in_order(family, text):
    name, tok = family
    ids, spans = encode_with_spans(tok, text)
    assert len(ids) == len(tok.encode(text, add_special_tokens=False).ids)
    assert spans[0, 0] == 0 and spans[-1, 1] == len(text)
    assert (spans[1:, 0] == spans[:-1, 1]).all() and (spans[:, 1] >= spans[:, 0]).all()
    assert "".join(text[a:b] for a, b in spans) == text


@pytest.mark.parametrize("text", TEXTS)
def test_each_span_holds_the_library_offsets_of_its_token(family, text):
    # reference: the tokenizers library's offsets (characters of the original text);
    # a span may also hold the gap before its token, never less than the token's own characters
    name, tok = family
    encoding = tok.encode(text, add_special_tokens=False)
    _, spans = encode_with_spans(tok, text)
    previous_end = 0
    for (a, b), (s, e) in zip(encoding.offsets, spans):
        if a >= previous_end:  # not the overlapping half of a split character
            assert s <= a and b <= e
        previous_end = max(previous_end, b)


@pytest.mark.parametrize("text", TEXTS)
def test_decode_matches_the_library_decoder(family, text):
    name, tok = family
    ids, _ = encode_with_spans(tok, text)
    # reference: the tokenizers library's own decode
    assert decode_ids(tok, ids) == tok.decode(ids.tolist(), skip_special_tokens=False)
    lossless = name == "byte-level BPE" or (name == "metaspace BPE" and not text[0].isspace())
    if lossless and "<unk>" not in tok.encode(text).tokens:
        # without a normalizer these give the text back (the metaspace decoder drops one leading space)
        assert decode_ids(tok, ids) == text


def test_wordpiece_offsets_point_into_the_text_before_normalising():
    tok = wordpiece()
    text = "İstanbul ＦＵＬＬＷＩＤＴＨ ﬁne Zürich"
    _, spans = encode_with_spans(tok, text)
    assert "".join(text[a:b] for a, b in spans) == text  # the original characters, not the lower-cased ones
    # reference: the library's normaliser; each token's own characters normalise to its piece
    enc = tok.encode(text, add_special_tokens=False)
    for (a, b), piece in zip(enc.offsets, enc.tokens):
        if piece != "<unk>":
            normal = tok.normalizer.normalize_str(text[a:b])
            assert normal == piece.removeprefix("##")


@pytest.mark.parametrize("text", TEXTS)
def test_displays_read_as_the_family_writes_the_text(family, text):
    name, tok = family
    ids, _ = encode_with_spans(tok, text)
    shown = "".join(token_display(tok, int(i)) for i in ids)
    if name == "byte-level BPE":
        return  # a split character shows as bytes; the byte-exact decode is checked above
    decoded = tok.decode(ids.tolist(), skip_special_tokens=False)
    if name == "WordPiece":
        # reference: the WordPiece decoder joins words with spaces and drops "##"; compare without spaces
        assert shown.replace(" ", "") == decoded.replace(" ", "")
        assert not any(token_display(tok, int(i)).startswith("##") for i in ids)
    else:
        # reference: the metaspace decoder turns "▁" into a space and drops the first one
        assert shown.removeprefix(" ") == decoded
        assert "▁" not in shown


def test_families_are_recognised():
    assert family_of(byte_bpe()).byte_level
    assert family_of(metaspace_bpe()).metaspace == "▁" and not family_of(metaspace_bpe()).byte_level
    assert family_of(unigram()).model == "Unigram"
    wp = family_of(wordpiece())
    assert wp.model == "WordPiece" and wp.continuation == "##"


def test_special_tokens_display_as_written_and_pad_decodes_to_nothing():
    for make in FAMILIES.values():
        tok = make()
        sep, pad = tok.token_to_id("<sep>"), tok.token_to_id("<pad>")
        assert token_display(tok, sep) == "<sep>" and display_table(tok)[pad] == "<pad>"
        word = tok.encode("back", add_special_tokens=False).ids
        assert decode_ids(tok, [pad] + word + [pad]) == decode_ids(tok, word)


def test_byte_level_split_character_gets_one_span_and_an_empty_one():
    # a made-up overlap as byte-level BPE gives it for the two halves of one emoji
    spans = tiling_spans(np.array([[0, 1], [1, 2], [1, 2], [2, 3]]), 3)
    assert spans.tolist() == [[0, 1], [1, 2], [2, 2], [2, 3]]


def test_padding_and_truncation_in_a_users_tokenizer_are_ignored():
    tok = wordpiece()
    tok.enable_padding(pad_id=0, pad_token="<pad>", length=64)
    tok.enable_truncation(3)
    text = TEXTS[0]
    ids, spans = encode_with_spans(tok, text)
    assert len(ids) > 3 and 0 not in ids.tolist() and spans[-1, 1] == len(text)
    assert tok.padding is not None  # the user's tokenizer is left as it was
