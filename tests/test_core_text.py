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


def test_a_long_text_tokenized_piece_by_piece_gives_the_whole_texts_tokens(tokenizer):
    """Reference: the tokenizer library's own encoding of the whole text. Cuts fall only after a
    newline between two non-space characters; the text also holds the cases where a cut would
    change the pieces (spaces before a newline, blank lines, a newline before a space)."""
    import numpy as np

    from core.engine.text import _pieces, tokenize_with_spans

    lines = ["Signal box 7: 06:45 held at Ober-Ränk.", "  indented line", "trailing spaces   ", "", "€14.20/t — coal",
             "x", " leading space", "it's the 3rd time\t", "Δ = +3 %"]
    text = "\n".join(lines[i % len(lines)] + str(i % 7) * (i % 3) for i in range(400))
    whole_ids, whole_spans = encode_with_spans(tokenizer, text)
    ids, spans = tokenize_with_spans(tokenizer, text, piece_chars=97)
    assert len(_pieces(text, 97)) > 20  # it was really cut
    assert np.array_equal(ids, whole_ids) and np.array_equal(spans, whole_spans)


def test_distinct_chunks_and_streamed_latent_health_match_numpy_and_torch(small_codec):
    """latent_health without latents (encoded block by block) equals the same health from the whole
    encoding, and its numbers match references: np.unique(axis=0) for the distinct chunks, np.var
    (population variance) for the mean's variance, torch.distributions' KL(N(m, s²) || N(0, 1))."""
    import numpy as np
    import torch

    from core.engine.health import distinct_chunk_starts, latent_health
    from core.engine.noise import ENCODE_BATCH, encode_chunks

    text = "".join(f"Sleeper {i % 97} checked at km {i % 13}.{i % 7}; fishplate {i % 5} fine.\n" for i in range(2000))
    chunks = chunk_text(text, small_codec)
    assert chunks.num_chunks > ENCODE_BATCH  # more than one encoding block
    _, first = np.unique(chunks.ids().numpy(), axis=0, return_index=True)
    assert np.array_equal(distinct_chunk_starts(chunks), np.sort(first))
    encoded = encode_chunks(small_codec, chunks)
    sample = len(first) // 2  # the nearest-neighbour part samples distinct chunks
    streamed = latent_health(small_codec, chunks, max_chunks=sample)
    held = latent_health(small_codec, chunks, encoded=encoded, max_chunks=sample)
    assert np.array_equal(streamed.nn_half_distance, held.nn_half_distance) and streamed.nn_sampled
    mean, std = encoded.mean.double(), encoded.std.double()
    assert streamed.mean_variance_per_dim == pytest.approx(np.var(mean.numpy(), axis=0), rel=1e-5, abs=1e-9)
    normal = torch.distributions.Normal
    kl = torch.distributions.kl_divergence(normal(mean, std), normal(torch.zeros_like(mean), torch.ones_like(std))).mean(0)
    assert streamed.kl_per_dim == pytest.approx(kl.numpy(), rel=1e-5, abs=1e-7)
    assert streamed.latent_rms == pytest.approx(float(mean.square().mean().sqrt()), rel=1e-6)
    assert streamed.active_dims == held.active_dims
