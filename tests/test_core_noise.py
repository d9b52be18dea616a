"""The table of noise models: every dispatch goes through it, with one sentence for an unknown name."""

import math

import pytest
import torch

from core.engine.health import expected_noise_norm
from core.engine.noise import NOISE_MODELS, Encoded, check_noise, noise_model, noise_scale, sigma_unit
from core.engine.sweep import SweepSettings
from core.errors import SettingsError

ENCODED = Encoded(mean=torch.tensor([[3.0, 4.0], [0.0, 0.0]]), std=torch.tensor([[1.0, 2.0], [3.0, 4.0]]))


def test_every_dispatch_refuses_an_unknown_noise_model_with_the_same_sentence(lookup_codec):
    sentence = "the noise model must be one of isotropic, posterior, data-scale, not 'pink'."
    calls = [
        lambda: noise_model("pink"),
        lambda: SweepSettings(noise="pink").validated(),
        lambda: check_noise("pink", lookup_codec),
        lambda: noise_scale("pink", ENCODED, 0, 2),
        lambda: expected_noise_norm(1.0, "pink", ENCODED),
    ]
    for call in calls:
        with pytest.raises(SettingsError) as info:
            call()
        assert str(info.value) == sentence


def test_posterior_noise_is_refused_for_a_plain_codec(lookup_codec):
    assert NOISE_MODELS["posterior"].needs_variational and not NOISE_MODELS["data-scale"].needs_variational
    with pytest.raises(SettingsError, match="posterior noise needs a variational codec, and lookup is a plain autoencoder"):
        check_noise("posterior", lookup_codec)


def test_units_come_from_the_table():
    assert [sigma_unit(name) for name in ("isotropic", "posterior", "data-scale")] == ["absolute σ", "posterior σ", "relative σ"]
    assert sigma_unit("") == "σ"


def test_expected_noise_norm_worked_by_hand():
    # worked by hand, σ = 2, D = 2: isotropic 2 · √2; data-scale r = (√4.5, √8), so 2 · √12.5;
    # posterior: the rows' Σ std² are 5 and 25, their mean 15, so 2 · √15
    assert expected_noise_norm(2.0, "isotropic", ENCODED) == pytest.approx(2 * math.sqrt(2))
    assert expected_noise_norm(2.0, "data-scale", ENCODED) == pytest.approx(2 * math.sqrt(12.5))
    assert expected_noise_norm(2.0, "posterior", ENCODED) == pytest.approx(2 * math.sqrt(15))
