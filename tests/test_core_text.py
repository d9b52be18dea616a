"""Text loading, tokenizing and chunking."""

import pytest

from core.errors import TextError
from core.engine.text import chunk_text, load_text
from core.codecs.tokenizer import decode_ids, encode_with_spans

SAMPLES = [
    "Plain ASCII, with numbers 12.5 and 1:28.",
    "naïve café — €3,40 · Δt = 5 s · Zürich · 😀 end",
    "  leading spaces\n\n\ttabs and\r\nwindows newlines  ",
    "x",
]


@pytest.mark.parametrize("text", SAMPLES)
def test_tokenize_detokenize_round_trip(tokenizer, text):
    ids, _ = encode_with_spans(tokenizer, text)
    assert decode_ids(tokenizer, ids) == text
    assert tokenizer.decode(ids.tolist()) == text  # reference: the tokenizers library's own decoder


@pytest.mark.parametrize("text", SAMPLES)
def test_spans_tile_the_text(tokenizer, text):
    _, spans = encode_with_spans(tokenizer, text)
    assert spans[0, 0] == 0 and spans[-1, 1] == len(text)
    assert (spans[1:, 0] == spans[:-1, 1]).all()
    assert (spans[:, 1] >= spans[:, 0]).all()
    assert "".join(text[a:b] for a, b in spans) == text


def test_chunks_pad_the_last_chunk_and_mask_it(small_codec):
    chunks = chunk_text("one two three four five six seven", small_codec)
    ids, mask = chunks.ids(), chunks.mask()
    assert ids.shape == (chunks.num_chunks, 4)
    assert int(mask.sum()) == chunks.num_tokens
    pad_slots = ids[~mask]
    assert (pad_slots == small_codec.pad_id).all()
    assert ids[mask].tolist() == chunks.token_ids.tolist()


def test_empty_text_is_refused(small_codec):
    with pytest.raises(TextError, match="empty"):
        chunk_text("", small_codec)


def test_whitespace_text_is_refused(small_codec):
    with pytest.raises(TextError, match="only whitespace"):
        chunk_text(" \n\t  \n", small_codec)


def test_empty_file_is_refused(tmp_path):
    path = tmp_path / "empty.txt"
    path.write_bytes(b"")
    with pytest.raises(TextError, match="empty.txt is empty"):
        load_text(path)


def test_non_utf8_file_names_the_byte_offset(tmp_path):
    path = tmp_path / "latin1.txt"
    path.write_bytes("caf".encode() + "é au lait".encode("latin-1"))
    with pytest.raises(TextError) as info:
        load_text(path)
    assert "latin1.txt" in str(info.value) and "UTF-8" in str(info.value) and "byte offset 3" in str(info.value)


def test_missing_text_file(tmp_path):
    with pytest.raises(TextError, match="does not exist"):
        load_text(tmp_path / "gone.txt")


def test_byte_order_mark_is_dropped(tmp_path):
    path = tmp_path / "bom.txt"
    path.write_bytes("\ufeffhello".encode("utf-8"))
    assert load_text(path) == "hello"
