"""The shipped sample models: they load, match their cards, and keep the claims the cards make."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

import pytest

from core.codecs.checkpoint import Codec, load_codec
from core.engine.sweep import SweepSettings, run_sweep
from core.engine.text import chunk_text, demo_text
from core.training.train import RECIPES, Recipe, prefix_chunks

SAMPLE_DIR = Path(__file__).resolve().parent.parent / "sample_models"
NAMES = sorted(RECIPES)
# a small data-scale grid on the first 4000 demo tokens, so the comparison takes seconds
QUICK_GRID = (0.0, 0.05, 0.1, 0.2, 0.3, 0.45, 0.7)
QUICK_TOKENS = 4000


@lru_cache(maxsize=None)
def codec(name: str) -> Codec:
    return load_codec(SAMPLE_DIR / f"{name}.safetensors")


@lru_cache(maxsize=None)
def demo_sweep(name: str, sigmas: tuple[float, ...], max_tokens: int | None = None):
    c = codec(name)
    chunks = chunk_text(demo_text(), c) if max_tokens is None else prefix_chunks(c, demo_text(), max_tokens)
    return run_sweep(c, chunks, SweepSettings(sigmas=sigmas, repeats=1, noise="data-scale", seed=0))


@pytest.mark.parametrize("name", NAMES)
def test_checkpoint_loads_and_config_matches_card(name):
    path = SAMPLE_DIR / f"{name}.safetensors"
    assert path.stat().st_size < 10_000_000
    c = codec(name)
    recipe = Recipe(**c.card["recipe"])
    assert c.codec.config == recipe.model_config(pad_id=c.pad_id)
    assert c.chunk_size == 4
    assert c.card["why"] and c.card["measured"]


def test_all_sample_models_share_one_tokenizer():
    first = codec(NAMES[0]).tokenizer.to_str()
    assert all(codec(name).tokenizer.to_str() == first for name in NAMES[1:])
    assert len({codec(name).card["tokenizer"]["sha256"] for name in NAMES}) == 1


@pytest.mark.parametrize("name", NAMES)
def test_demo_accuracy_at_sigma_zero_matches_card(name):
    measured = demo_sweep(name, (0.0,)).curves[0].token_accuracy
    assert measured >= codec(name).card["measured"]["demo"]["token_accuracy_sigma0"] - 0.001


def test_plain_reconstructs_held_out_text():
    # common practice for chunk autoencoders with K = 4: > 99.9 % token accuracy at sigma 0
    assert codec("plain").card["measured"]["held_out"]["token_accuracy_sigma0"] > 0.999


def test_tolerant_reconstructs_almost_as_well_as_plain():
    plain = codec("plain").card["measured"]["held_out"]["token_accuracy_sigma0"]
    assert codec("tolerant").card["measured"]["held_out"]["token_accuracy_sigma0"] >= plain - 0.005


def test_tolerant_takes_more_data_scale_noise_than_plain():
    plain = demo_sweep("plain", QUICK_GRID, QUICK_TOKENS).tolerance(0.99)
    tolerant = demo_sweep("tolerant", QUICK_GRID, QUICK_TOKENS).tolerance(0.99)
    assert plain.status == "ok" and tolerant.sigma is not None
    assert tolerant.sigma > plain.sigma


def test_card_claims_tolerant_at_least_three_times_plain():
    """The card's held-out sweep: 99 % data-scale tolerance of tolerant >= 3x plain's."""
    plain = codec("plain").card["measured"]["tolerance"]["data-scale"]["0.99"]
    tolerant = codec("tolerant").card["measured"]["tolerance"]["data-scale"]["0.99"]
    assert plain["status"] == "ok" and tolerant["sigma"] is not None
    assert tolerant["sigma"] >= 3 * plain["sigma"]
