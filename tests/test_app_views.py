"""core.analyses.views: what the workbench shows beyond core's results, checked against core itself."""

import numpy as np
import pytest
import torch

from core.codecs.checkpoint import Codec
from core.errors import SettingsError
from core.engine.noise import encode_chunks
from core.analyses.live import perturb_once
from core.codecs.model import ChunkMLPConfig, build_model
from core.engine.text import chunk_text, demo_text
from core.codecs.tokenizer import train_byte_bpe
from core.codecs.tokenizer import token_display
from core.analyses.views import (
    critical_sigma_levels, decoded_layout, merge_windows, perturb_window, remaining_ranges, sigma_grid, token_at,
)


@pytest.fixture(scope="module")
def setup():
    torch.manual_seed(0)
    text = demo_text()[:6000]
    tokenizer = train_byte_bpe([text], 300)
    config = ChunkMLPConfig(chunk_size=4, vocab_size=tokenizer.get_vocab_size(), latent_dim=8, embed_dim=16, width=32, depth=1)
    codec = Codec(model=build_model(config), tokenizer=tokenizer)
    chunks = chunk_text(text, codec)
    return codec, chunks, encode_chunks(codec, chunks)


@pytest.mark.parametrize("start, stop", [(300, 310), (250, 530), (0, 256), (17, 18)])
def test_windows_merge_into_the_engines_whole_text_perturbation(setup, start, stop):
    """The reference is core.analyses.live.perturb_once over the whole text with the same noise; the
    on-screen window may start and end anywhere, also across noise blocks of 256 chunks."""
    codec, chunks, encoded = setup
    n = encoded.num_chunks
    assert n > 530, "the text must span more than two noise blocks for this check"
    windows = [perturb_window(codec, chunks, encoded, 0.8, "data-scale", 3, 1, start, stop)]
    for a, b in remaining_ranges(n, start, stop):
        windows.append(perturb_window(codec, chunks, encoded, 0.8, "data-scale", 3, 1, a, b))
    merged = merge_windows(chunks, windows)
    reference = perturb_once(codec, chunks, encoded, 0.8, "data-scale", seed=3, draw=1)
    np.testing.assert_array_equal(merged.predicted, reference.predicted)
    np.testing.assert_array_equal(merged.top_ids, reference.top_ids)
    np.testing.assert_allclose(merged.top_probs, reference.top_probs, atol=1e-5)
    assert merged.token_accuracy == pytest.approx(reference.token_accuracy)
    assert merged.chunk_exact_rate == pytest.approx(reference.chunk_exact_rate)


def test_the_quick_window_decodes_like_the_full_one(setup):
    # top_k=0 is the argmax-only pass the live view shows first; it must agree with the full pass
    codec, chunks, encoded = setup
    quick = perturb_window(codec, chunks, encoded, 0.6, "isotropic", 1, 0, 40, 300, top_k=0)
    full = perturb_window(codec, chunks, encoded, 0.6, "isotropic", 1, 0, 40, 300, top_k=5)
    assert quick.top_ids.shape == (quick.token_stop - quick.token_start, 0)
    np.testing.assert_array_equal(quick.predicted, full.predicted)
    np.testing.assert_array_equal(quick.correct, full.correct)
    assert quick.exact_chunks == full.exact_chunks
    assert not quick.correct.all(), "sigma 0.6 should break some tokens of an untrained model"


def test_a_stopped_window_returns_nothing(setup):
    codec, chunks, encoded = setup
    assert perturb_window(codec, chunks, encoded, 0.5, "isotropic", 0, 0, 0, 256, should_stop=lambda: True) is None


def test_decoded_layout_keeps_right_tokens_and_shows_wrong_ones(setup):
    codec, chunks, _ = setup
    predicted = chunks.token_ids.copy()
    correct = np.ones(len(predicted), dtype=bool)
    layout = decoded_layout(codec, chunks, predicted, correct)
    assert layout.text == chunks.text
    other = int((predicted[5] + 7) % codec.vocab_size) or 2
    predicted[5], correct[5] = other, False
    layout = decoded_layout(codec, chunks, predicted, correct)
    a, b = layout.spans[5]
    assert layout.text[a:b] == token_display(codec.tokenizer, other) and b > a  # the wrong token, shown
    assert token_at(layout.spans, int(a)) == 5
    assert layout.text.startswith(chunks.text[: chunks.spans[5, 0]])
    assert layout.text[b:] == chunks.text[chunks.spans[6, 0]:]  # the right tokens after it keep their characters


def test_decoded_layout_matches_its_definition_token_by_token(setup):
    # the definition: right tokens keep their characters, wrong ones show the decoded token
    codec, chunks, _ = setup
    rng = np.random.default_rng(4)
    predicted = chunks.token_ids.copy()
    correct = rng.random(len(predicted)) > 0.3
    correct[:3] = False  # wrong tokens at the very start and end too
    correct[-2:] = False
    predicted[~correct] = rng.integers(2, codec.vocab_size, int((~correct).sum()))
    correct = predicted == chunks.token_ids
    for token_start, n in ((0, len(predicted)), (101, 333)):
        p, c = predicted[token_start : token_start + n], correct[token_start : token_start + n]
        pieces = [
            chunks.text[chunks.spans[token_start + j, 0] : chunks.spans[token_start + j, 1]] if c[j]
            else token_display(codec.tokenizer, int(p[j]))
            for j in range(n)
        ]
        layout = decoded_layout(codec, chunks, p, c, token_start=token_start)
        assert layout.text == "".join(pieces)
        assert [layout.text[a:b] for a, b in layout.spans.tolist()] == pieces


def test_sigma_grid_and_levels():
    grid = sigma_grid(0.01, 1.0, 3, "log", include_zero=True)
    assert grid == (0.0, 0.01, 0.1, 1.0)
    assert sigma_grid(0, 1, 3, "linear", include_zero=False) == (0.0, 0.5, 1.0)
    with pytest.raises(SettingsError):
        sigma_grid(0.0, 1.0, 5, "log")
    levels = critical_sigma_levels(np.array([np.nan, 0.0, 0.1, 1.0]), grid)
    assert levels.tolist() == [-1, 0, 2, 3]
