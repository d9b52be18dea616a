"""The shipped demo generator and its predictions: the training objective against scoringrules, the shipped
file against the tolerant sample it was made for, and the card's held-out energy score measured again."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch

from core.analyses.predictions import check_against, read_predictions
from core.codecs.checkpoint import load_codec
from core.engine.text import demo_text
from core.training.generator import (
    DEFAULT_OUT, DEFAULT_PREDICTIONS, context_index, energy_score_loss, held_out_energy_score, load_generator,
)

SAMPLES = Path(__file__).resolve().parents[1] / "sample_models"


def test_training_objective_is_the_unbiased_energy_score():
    # scoringrules.es_ensemble(..., estimator="fair"): 1/M Σ‖x_i − y‖ − 1/(2M(M−1)) Σ_{i≠j}‖x_i − x_j‖
    import scoringrules

    gen = np.random.default_rng(0)
    x, y = gen.normal(size=(30, 4, 16)), gen.normal(size=(30, 16))
    ours = float(energy_score_loss(torch.from_numpy(x), torch.from_numpy(y)))
    assert ours == pytest.approx(float(np.mean(scoringrules.es_ensemble(y, x, estimator="fair"))), rel=1e-10)


def test_context_index_reads_only_earlier_chunks_of_the_same_file():
    # by hand: files of 3 and 2 chunks, window 2; -1 where the file has no earlier chunk
    np.testing.assert_array_equal(context_index([3, 2], 2), [[-1, -1], [-1, 0], [0, 1], [-1, -1], [-1, 3]])


def test_shipped_predictions_belong_to_the_shipped_tolerant_sample():
    # if tolerant is retrained, this fails: rerun `chunkscope train --generator` (sample_models/README.md)
    codec = load_codec(SAMPLES / "tolerant.safetensors")
    preds = read_predictions(DEFAULT_PREDICTIONS)
    check_against(preds, codec)
    assert preds.samples == 8 and preds.latents.dtype == np.float32
    assert preds.text == demo_text()
    _, card = load_generator(DEFAULT_OUT)
    assert card["codec"]["sha256"] == codec.sha256
    for path in (DEFAULT_OUT, DEFAULT_PREDICTIONS):
        assert path.stat().st_size < 15e6


def test_card_held_out_energy_score_measured_again():
    from core.training.corpus import build_corpus
    from core.training.generator import encode_texts

    torch.set_num_threads(1)
    model, card = load_generator(DEFAULT_OUT)
    measured = card["measured"]["held_out"]
    codec = load_codec(SAMPLES / "tolerant.safetensors")
    means, lengths = encode_texts(codec, build_corpus().held_out)
    index = context_index(lengths, model.window)[: measured["chunks"]]
    again = held_out_energy_score(model, means, index)
    assert again["energy_score"] == pytest.approx(measured["energy_score"], rel=1e-4)
    # and the generator beats random training latents, the context-blind reference in its card
    assert measured["energy_score"] + 4 * measured["standard_error"] < measured["marginal_energy_score"]
