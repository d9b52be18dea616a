"""Generator predictions (DESIGN.md "Generator predictions" and "Generator errors"): the scores against outside
references, the effective sigma and structured-error factor on predictions of known make, and each bad file."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import torch

from core.analyses.predictions import (
    PredictionsError, analyse_predictions, brier_estimate, energy_score, read_predictions, write_predictions,
)
from core.codecs.checkpoint import load_codec
from core.engine.noise import encode_chunks
from core.engine.text import chunk_text, demo_text

SAMPLES = Path(__file__).resolve().parents[1] / "sample_models"


@pytest.fixture(scope="module")
def tolerant():
    torch.set_num_threads(1)
    return load_codec(SAMPLES / "tolerant.safetensors")


@pytest.fixture(scope="module")
def short(tolerant):
    text = demo_text()[:6000]
    chunks = chunk_text(text, tolerant)
    return text, chunks, encode_chunks(tolerant, chunks).mean


def test_energy_score_matches_scoringrules_fair_ensemble_estimator():
    # scoringrules.es_ensemble(obs, fct, estimator="fair"): the unbiased ensemble energy score with all pairs,
    # 1/M Σ‖x_i − y‖ − 1/(2M(M−1)) Σ_{i≠j}‖x_i − x_j‖ (Gneiting & Raftery 2007, the beta = 1 case)
    import scoringrules

    gen = np.random.default_rng(3)
    for samples, dim in ((2, 1), (5, 7), (8, 128)):
        obs = gen.normal(size=(40, dim))
        fct = gen.normal(size=(40, samples, dim)) * gen.uniform(0.5, 2, size=(40, 1, 1)) + 0.3
        ours = energy_score(fct, obs)
        ref = scoringrules.es_ensemble(obs, fct, estimator="fair")
        np.testing.assert_allclose(ours, ref, rtol=1e-10, atol=1e-12)
        # and it is not the biased estimator (1/(2M²)), which scoringrules calls "nrg"
        assert not np.allclose(ours, scoringrules.es_ensemble(obs, fct, estimator="nrg"))


def test_brier_estimate_is_unbiased_for_a_known_categorical():
    # the multiclass Brier score of a distribution p at outcome y is Σ_v p_v² − 2 p_y + 1 (Brier 1950);
    # the two-sample estimate's mean over many draws must match it within 4 standard errors
    p = np.array([0.45, 0.25, 0.15, 0.1, 0.05])
    for y in (0, 3):
        draws = np.random.default_rng(11 + y).choice(len(p), p=p, size=(200_000, 2))
        values = brier_estimate(draws, np.full(len(draws), y))
        exact = (p ** 2).sum() - 2 * p[y] + 1
        assert abs(values.mean() - exact) < 4 * values.std(ddof=1) / np.sqrt(len(values))
    # more samples per outcome (all pairs) are unbiased too
    draws = np.random.default_rng(5).choice(len(p), p=p, size=(50_000, 6))
    values = brier_estimate(draws, np.zeros(len(draws), dtype=int))
    exact = (p ** 2).sum() - 2 * p[0] + 1
    assert abs(values.mean() - exact) < 4 * values.std(ddof=1) / np.sqrt(len(values))


def test_brier_estimate_at_two_samples_worked_by_hand():
    # worked by hand from 1[x1 = x2] − 1[x1 = y] − 1[x2 = y] + 1, y = a:
    # (a, a) -> 1 − 1 − 1 + 1 = 0; (a, b) -> 0 − 1 − 0 + 1 = 0; (b, b) -> 1 − 0 − 0 + 1 = 2; (b, c) -> 0 + 1 = 1
    a, b, c = 0, 1, 2
    pairs = np.array([[a, a], [a, b], [b, a], [b, b], [b, c], [c, c]])
    np.testing.assert_array_equal(brier_estimate(pairs, np.full(6, a)), [0, 0, 0, 2, 1, 2])
    # over p = (0.5, 0.3, 0.2) the expectation is 2·0.3² + 2·0.2² + 1·(2·0.3·0.2) = 0.38 = Σp² − 2p_a + 1
    p = np.array([0.5, 0.3, 0.2])
    grid = np.array([[i, j] for i in range(3) for j in range(3)])
    weights = np.array([p[i] * p[j] for i, j in grid])
    assert (weights * brier_estimate(grid, np.zeros(9, dtype=int))).sum() == pytest.approx(0.38)
    assert (p ** 2).sum() - 2 * p[0] + 1 == pytest.approx(0.38)


def _write(path, tolerant, chunks, latents, text=None):
    write_predictions(path, latents, chunks.ids().numpy(), tolerant.sha256, "test", text=text)
    return read_predictions(path)


def test_data_scale_noise_of_known_sigma_gives_that_sigma_and_a_factor_of_one(tolerant, short, tmp_path):
    # predictions = encoder mean + σ r ⊙ ε with ε ~ N(0, I) are exactly the data-scale noise model of DESIGN.md:
    # their effective sigma is σ (law of large numbers), and they hurt as much as the sweep's own noise
    text, chunks, mean = short
    sigma, samples = 0.9, 8
    r = mean.square().mean(0).sqrt()
    eps = torch.randn(len(mean), samples, mean.shape[1], generator=torch.Generator().manual_seed(123))
    latents = (mean.unsqueeze(1) + sigma * r * eps).numpy()
    result = analyse_predictions(tolerant, _write(tmp_path / "p.safetensors", tolerant, chunks, latents, text), repeats=4)
    s = result.summary
    assert s["effective_sigma"] == pytest.approx(sigma, rel=0.02)
    assert s["decoded_accuracy"] < 0.995  # the noise does break tokens, so the factor measures something
    assert s["structured_error_factor_low"] <= 1 <= s["structured_error_factor_high"]
    assert s["samples"] == samples and s["chunks"] == chunks.num_chunks
    assert s["decoded_accuracy_low"] <= s["decoded_accuracy"] <= s["decoded_accuracy_high"]


def test_predictions_pushed_toward_the_nearest_neighbour_hurt_far_more_than_noise(tolerant, short, tmp_path):
    # an error pointing at a plausible neighbour, past the midpoint, decodes as that neighbour; random noise of
    # the same length rarely does (a fact of nearest-neighbour geometry in high dimension)
    from core.analyses.predictions import nearest_distinct_neighbours

    text, chunks, mean = short
    nearest, _ = nearest_distinct_neighbours(mean, chunks.ids().numpy())
    pushed = mean + 0.7 * (mean[torch.from_numpy(nearest)] - mean)
    latents = pushed.unsqueeze(1).numpy()
    result = analyse_predictions(tolerant, _write(tmp_path / "p.safetensors", tolerant, chunks, latents), repeats=2)
    s = result.summary
    assert s["structured_error_factor_low"] > 3
    assert s["cosine_to_neighbour_mean"] > 0.99
    assert s["energy_score"] is None and s["brier_estimate"] is None  # S = 1


def _raw(path, tensors, metadata):
    from safetensors.numpy import save_file

    save_file(tensors, str(path), metadata=metadata)
    return path


def _meta(sha):
    return {"chunkscope.predictions": json.dumps({"version": 1, "codec_sha256": sha, "note": ""})}


def test_each_bad_predictions_file_is_one_sentence_naming_it(tolerant, short, tmp_path):
    text, chunks, mean = short
    ids = chunks.ids().numpy()
    good = mean.unsqueeze(1).numpy().astype(np.float32)
    sha = tolerant.sha256
    cases = {
        "sha256": (dict(latents=good, token_ids=ids), _meta("0" * 64), "regenerate the predictions"),
        "n": (dict(latents=good[:-1], token_ids=ids), _meta(sha), "N = "),
        "k": (dict(latents=good, token_ids=ids[:, :3].copy()), _meta(sha), "K = 3"),
        "d": (dict(latents=good[:, :, :100].copy(), token_ids=ids), _meta(sha), "D = 100"),
        "s0": (dict(latents=np.zeros((len(ids), 0, 128), np.float32), token_ids=ids), _meta(sha), "S = 0"),
        "nan": (dict(latents=np.where(np.arange(128) == 5, np.nan, good).astype(np.float32), token_ids=ids), _meta(sha), "non-finite"),
        "vocab": (dict(latents=good, token_ids=np.where(ids == ids[0, 0], 5000, ids)), _meta(sha), "outside"),
        "no latents": (dict(token_ids=ids), _meta(sha), "no tensor 'latents'"),
        "no ids": (dict(latents=good), _meta(sha), "no tensor 'token_ids'"),
        "no metadata": (dict(latents=good, token_ids=ids), {"other": "x"}, "chunkscope.predictions"),
    }
    for name, (tensors, metadata, words) in cases.items():
        path = _raw(tmp_path / f"{name.replace(' ', '_')}.safetensors", tensors, metadata)
        with pytest.raises(PredictionsError) as info:
            analyse_predictions(tolerant, read_predictions(path))
        message = str(info.value)
        assert str(path) in message and words in message, (name, message)
        assert message.count(". ") == 0 and message.endswith("."), (name, message)
    # a text whose chunks are not N
    path = tmp_path / "text.safetensors"
    write_predictions(path, good[:-1], ids[:-1], sha, "", text=text)
    with pytest.raises(PredictionsError, match="N = "):
        analyse_predictions(tolerant, read_predictions(path))


REQUIRED_KEYS = ("effective_sigma", "decoded_accuracy", "decoded_accuracy_low", "decoded_accuracy_high",
                 "noise_accuracy_at_effective_sigma", "structured_error_factor", "structured_error_factor_low",
                 "structured_error_factor_high", "energy_score", "brier_estimate", "samples", "chunks", "provenance")


def test_command_writes_the_documented_keys_and_csvs_and_refuses_to_overwrite(tolerant, short, tmp_path, capsys):
    import csv

    from core.cli import main

    text, chunks, mean = short
    eps = torch.randn(len(mean), 3, mean.shape[1], generator=torch.Generator().manual_seed(7))
    latents = (mean.unsqueeze(1) + 0.6 * mean.square().mean(0).sqrt() * eps).numpy()
    preds = tmp_path / "preds.safetensors"
    write_predictions(preds, latents, chunks.ids().numpy(), tolerant.sha256, "cli test", text=text)
    out = tmp_path / "gen"
    args = ["predictions", str(SAMPLES / "tolerant.safetensors"), str(preds), "--out", str(out), "--quiet", "--repeats", "2"]
    assert main(args) == 0
    printed = capsys.readouterr().out
    assert "the generator's errors are the size of data-scale σ" in printed
    data = json.loads((out / "predictions.json").read_text(encoding="utf-8"))
    for key in REQUIRED_KEYS:
        assert key in data, key
    assert data["samples"] == 3 and data["chunks"] == chunks.num_chunks
    assert data["provenance"]["predictions"]["codec_sha256"] == tolerant.sha256 == data["provenance"]["codec"]["sha256"]
    # by hand from the file: sqrt of the mean of ((predicted − mean) / r)² over chunks, samples and dimensions
    r = mean.square().mean(0).sqrt().double().numpy()
    by_hand = np.sqrt((((latents - mean.numpy()[:, None]) / r) ** 2).mean())
    assert data["effective_sigma"] == pytest.approx(by_hand, rel=1e-6)
    with open(out / "positions.csv", newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    assert [int(r["position"]) for r in rows] == list(range(tolerant.chunk_size))
    assert main(args) == 2
    assert "already exists" in capsys.readouterr().err
    assert main(args + ["--force"]) == 0


def test_report_gets_a_generator_errors_section_with_its_figures(tolerant, short, tmp_path):
    from core.cli import main

    text, chunks, mean = short
    eps = torch.randn(len(mean), 2, mean.shape[1], generator=torch.Generator().manual_seed(9))
    latents = (mean.unsqueeze(1) + 0.7 * mean.square().mean(0).sqrt() * eps).numpy()
    preds = tmp_path / "preds.safetensors"
    write_predictions(preds, latents, chunks.ids().numpy(), tolerant.sha256, "report test", text=text)
    (tmp_path / "text.txt").write_text(text, encoding="utf-8")
    out = tmp_path / "r.html"
    assert main(["report", str(SAMPLES / "tolerant.safetensors"), "--text", str(tmp_path / "text.txt"), "--sigmas", "0,0.5,1",
                 "--repeats", "1", "--quiet", "--predictions", str(preds), "--out", str(out)]) == 0
    html = out.read_text(encoding="utf-8")
    assert "Generator errors" in html and "the generator&#x27;s errors are the size of data-scale σ" in html.lower()
    assert html.count("<svg") >= 2
