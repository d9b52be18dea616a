"""The worst case against a generator's errors (issue 13, "Views"): per chunk the error norm
‖predicted − encoder mean‖ and the share of verified chunks whose worst-case radius is below it."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint

from core.analyses.prediction_file import PredictionsError, read_predictions, write_predictions
from core.analyses.worstcase import against_generator, against_predictions_result, worst_case
from tests.test_core_adapter import one_sentence
from tests.test_core_worstcase import closed_form, linear_setup


def _predictions(tmp_path, mean, norms_per_sample, seed=0, sha="", ids=None):
    """mean + a random direction scaled to the given norm per chunk and sample: the error norms are known."""
    n, dim = mean.shape
    rng = np.random.default_rng(seed)
    direction = rng.standard_normal((n, norms_per_sample.shape[1], dim))
    direction /= np.linalg.norm(direction, axis=2, keepdims=True)
    latents = mean[:, None, :] + norms_per_sample[:, :, None] * direction
    path = tmp_path / "pred.safetensors"
    write_predictions(path, latents, np.ones((n, 4), dtype=np.int64) if ids is None else ids, sha, "test")
    return read_predictions(path)


@pytest.mark.parametrize("samples", [1, 3])
def test_share_is_the_hand_count(tokenizer, tmp_path, samples):
    codec, chunks, encoded = linear_setup(tokenizer, n=120, seed=2)
    result = worst_case(codec, chunks, encoded=encoded)
    mean = encoded.mean.numpy().astype(np.float64)
    # the closed form of the linear case (DeepFool, Moosavi-Dezfooli et al. 2016; see test_core_worstcase)
    radius = closed_form(codec, encoded.mean, chunks.mask())
    factor = np.where(np.arange(len(radius)) % 3 == 0, 2.0, 0.5)  # far from equality: the search is within 1 %
    norm = factor * radius
    per_sample = np.stack([norm * 0.1, norm, norm * 10], 1)[:, :samples] if samples == 3 else norm[:, None]
    preds = _predictions(tmp_path, mean.astype(np.float32), per_sample)
    got = against_generator(result, preds, mean)
    want = int((factor > 1).sum())  # by hand: radius < error norm exactly where the norm is twice the radius
    assert result.failed == 0 and got.below == want and got.verified == len(radius)
    # the median over samples is the middle one; the file stores float32 latents of size ~2 (rounding ~1e-6)
    np.testing.assert_allclose(got.error_norm, norm, rtol=1e-4, atol=1e-6)
    # Wilson score interval against statsmodels
    lo, hi = proportion_confint(want, len(radius), alpha=0.05, method="wilson")
    np.testing.assert_allclose(got.interval, (lo, hi), rtol=1e-3)
    assert got.summary()["generator_below_rate"] == pytest.approx(want / len(radius))


def test_other_codec_or_other_chunks_are_one_sentence(tokenizer, tmp_path):
    codec, chunks, encoded = linear_setup(tokenizer, n=30)
    result = worst_case(codec, chunks, encoded=encoded)
    mean = encoded.mean.numpy()
    result.provenance["codec"]["sha256"] = "a" * 64
    preds = _predictions(tmp_path, mean, np.ones((30, 1)), sha="b" * 64)
    with pytest.raises(PredictionsError) as err:
        against_generator(result, preds, mean)
    one_sentence(str(err.value))
    assert "sha256" in str(err.value)
    ids = np.ones((30, 4), dtype=np.int64)
    ids[5, 2] = 7
    preds = _predictions(tmp_path, mean, np.ones((30, 1)), sha="a" * 64, ids=ids)
    with pytest.raises(PredictionsError) as err:
        against_generator(result, preds, mean)
    one_sentence(str(err.value))
    assert "token ids" in str(err.value)


def test_the_worstcase_command_with_predictions(tmp_path, capsys):
    import csv
    import io
    import json

    from core.cli import main
    from core.cli import open_checkpoints
    from core.engine.noise import encode_chunks
    from core.engine.text import chunk_text, demo_text
    from tests.test_core_worstcase import SAMPLES

    checkpoint = SAMPLES / "tolerant.safetensors"
    if not checkpoint.exists():
        pytest.skip("the sample checkpoints are not there")
    text = tmp_path / "notes.txt"
    text.write_text(demo_text()[2000:2400], encoding="utf-8")
    (codec,) = open_checkpoints([str(checkpoint)])
    chunks = chunk_text(text.read_text(encoding="utf-8"), codec, str(text))
    mean = encode_chunks(codec, chunks).mean.numpy()
    n, k = mean.shape[0], codec.chunk_size
    ids = np.full(n * k, codec.pad_id, dtype=np.int64)
    ids[: chunks.num_tokens] = chunks.token_ids
    norms = np.linspace(0.01, 3.0, n)[:, None]  # a spread of known error norms, one sample per chunk
    _predictions(tmp_path, mean, norms, sha=codec.sha256, ids=ids.reshape(n, k))
    out = tmp_path / "wc"
    assert main(["worstcase", str(checkpoint), "--text", str(text), "--out", str(out), "--quiet",
                 "--predictions", str(tmp_path / "pred.safetensors")]) == 0
    printed = capsys.readouterr().out
    rows = list(csv.DictReader(io.StringIO((out / "worst_case.csv").read_text(encoding="utf-8"))))
    s = json.loads((out / "worst_case.json").read_text(encoding="utf-8"))["summary"]
    error = np.array([float(r["generator_error_norm"]) for r in rows])
    np.testing.assert_allclose(error, norms[:, 0], rtol=1e-3, atol=1e-5)  # float32 latents
    radius = np.array([float(r["radius"]) for r in rows])
    ok = ~np.isnan(radius)
    want = int((radius[ok] < error[ok]).sum())  # by hand from the CSV's own columns
    assert s["generator_below"] == want and s["generator_compared"] == int(ok.sum())
    lo, hi = proportion_confint(want, int(ok.sum()), alpha=0.05, method="wilson")  # statsmodels
    np.testing.assert_allclose(s["generator_below_interval"], (lo, hi), rtol=1e-3)
    assert f"for {want:,} of {int(ok.sum()):,} verified chunks" in printed


def test_a_finished_predictions_analysis_gives_the_same_share(tokenizer, tmp_path):
    """The workbench's path (error norms of a predictions analysis) equals the file path on the same chunks."""
    from types import SimpleNamespace

    codec, chunks, encoded = linear_setup(tokenizer, n=60, seed=4)
    result = worst_case(codec, chunks, encoded=encoded)
    mean = encoded.mean.numpy()
    radius = closed_form(codec, encoded.mean, chunks.mask())
    norms = np.stack([radius * 0.5, radius * 2, radius * 3], 1)  # median 2 × radius: every chunk below
    preds = _predictions(tmp_path, mean, norms)
    direct = against_generator(result, preds, mean.astype(np.float64))
    analysis = SimpleNamespace(provenance={"codec": {"sha256": ""}, "predictions": {"path": preds.path}}, chunks=chunks,
                               error_norm=np.linalg.norm(preds.latents - mean[:, None, :], axis=2))
    via = against_predictions_result(result, analysis)
    assert via.below == direct.below == 60 and via.interval == direct.interval
