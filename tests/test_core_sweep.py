"""The sweep: perfection at sigma 0, reproducibility, common random numbers, cancellation,
scale invariance of data-scale tolerance, and the files it writes."""

import csv
import json
import subprocess
import sys

import numpy as np
import pytest
import torch

from conftest import LookupCodec
from core.errors import SettingsError, SweepCancelled
from core.engine.sweep import SweepSettings, critical_sigmas, parse_sigmas, read_sweep, run_sweep, tolerance_at
from core.engine.text import chunk_text

GRID = (0.0, 0.05, 0.1, 0.15, 0.2, 0.3, 0.4, 0.6, 0.8, 1.0, 1.5, 2.0)


def test_sigma_zero_of_a_perfect_codec_scores_one(lookup_codec, fixture_text):
    chunks = chunk_text(fixture_text, lookup_codec)
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=(0.0,), repeats=2, noise="isotropic"))
    m = result.curves[0]
    assert m.token_accuracy == 1.0 and m.chunk_exact_rate == 1.0 and m.tokens == 2 * chunks.num_tokens
    assert m.confusions == [] and all(p == 1.0 for p in m.position_accuracy)


def test_accuracy_falls_with_noise(lookup_codec, fixture_text):
    chunks = chunk_text(fixture_text, lookup_codec)
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=GRID, repeats=3, noise="isotropic"))
    acc = [c.token_accuracy for c in result.curves]
    assert acc[0] == 1.0 and acc[-1] < 0.5
    assert all(c.accuracy_low <= c.token_accuracy <= c.accuracy_high for c in result.curves)


def test_same_seed_is_bit_identical_and_other_seed_is_not(lookup_codec, fixture_text):
    chunks = chunk_text(fixture_text, lookup_codec)
    s = SweepSettings(sigmas=GRID, repeats=2, noise="isotropic", seed=11)
    a, b = run_sweep(lookup_codec, chunks, s), run_sweep(lookup_codec, chunks, s)
    assert json.dumps([x.to_dict() for x in a.curves]) == json.dumps([x.to_dict() for x in b.curves])
    assert np.array_equal(a.wrong_counts, b.wrong_counts) and np.array_equal(a.decoded, b.decoded)
    c = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=GRID, repeats=2, noise="isotropic", seed=12))
    assert not np.array_equal(a.wrong_counts, c.wrong_counts)


def test_result_does_not_depend_on_batch_size(lookup_codec):
    text = "All aboard for the 06:45 to Ober-Ränk; mind the gap. " * 60
    chunks = chunk_text(text, lookup_codec)
    assert chunks.num_chunks > 512
    small = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=GRID, repeats=2, noise="isotropic", batch_chunks=256))
    large = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=GRID, repeats=2, noise="isotropic", batch_chunks=1024))
    assert np.array_equal(small.wrong_counts, large.wrong_counts)


def test_the_same_epsilon_is_reused_across_sigmas(tokenizer, fixture_text):
    codec = LookupCodec(tokenizer)
    codec.decoded_latents = []
    chunks = chunk_text(fixture_text, codec)
    sigmas = (0.0, 0.1, 0.3)
    run_sweep(codec, chunks, SweepSettings(sigmas=sigmas, repeats=2, noise="isotropic"))
    mean, _ = codec.encode(chunks.ids())
    z = codec.decoded_latents  # order: repeat 0 (σ0, σ1, σ2), repeat 1 (σ0, σ1, σ2)
    assert len(z) == 6
    eps_r0 = [(z[i] - mean) / s for i, s in ((1, 0.1), (2, 0.3))]
    eps_r1 = [(z[3 + i] - mean) / s for i, s in ((1, 0.1), (2, 0.3))]
    assert torch.allclose(eps_r0[0], eps_r0[1], atol=1e-4)
    assert torch.allclose(eps_r1[0], eps_r1[1], atol=1e-4)
    assert not torch.allclose(eps_r0[0], eps_r1[0], atol=1e-2)
    assert torch.equal(z[0], mean)


def test_cancelled_sweep_raises_and_leaves_nothing(lookup_codec, fixture_text, tmp_path):
    chunks = chunk_text(fixture_text, lookup_codec)
    calls = []

    def stop():
        calls.append(1)
        return len(calls) > 3

    with pytest.raises(SweepCancelled):
        run_sweep(lookup_codec, chunks, SweepSettings(sigmas=GRID, repeats=2), should_stop=stop)
    assert list(tmp_path.iterdir()) == []


def test_failed_write_leaves_no_half_made_folder(lookup_codec, fixture_text, tmp_path, monkeypatch):
    chunks = chunk_text(fixture_text, lookup_codec)
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=(0.0, 0.5), repeats=1))

    def broken(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(np, "savez_compressed", broken)
    with pytest.raises(OSError):
        result.write(tmp_path / "out")
    assert list(tmp_path.iterdir()) == []


def test_written_sweep_reads_back_the_same(lookup_codec, fixture_text, tmp_path):
    chunks = chunk_text(fixture_text, lookup_codec)
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=GRID, repeats=2, noise="isotropic"))
    out = result.write(tmp_path / "lookup")
    with pytest.raises(FileExistsError):
        result.write(tmp_path / "lookup")
    again = read_sweep(out)
    assert [c.token_accuracy for c in again.curves] == [c.token_accuracy for c in result.curves]
    assert np.array_equal(again.critical_sigma, result.critical_sigma, equal_nan=True)
    data = json.loads((out / "sweep.json").read_text())
    for key in ("sha256", "tokens"):
        assert key in data["provenance"]["text"]
    assert data["provenance"]["settings"]["seed"] == 0 and data["decoded_chunks"] == chunks.num_chunks * 2 * len(GRID)
    with open(out / "tokens.csv", encoding="utf-8", newline="") as handle:
        rows = list(csv.reader(handle))
    assert len(rows) == chunks.num_tokens + 1
    assert "".join(row[2] for row in rows[1:]) == fixture_text


class Scaled:
    """The same codec with its latent multiplied by c (and divided back before decoding)."""

    def __init__(self, inner, c):
        self.inner, self.c = inner, c

    def __getattr__(self, name):
        return getattr(self.inner, name)

    def encode(self, ids):
        mean, std = self.inner.encode(ids)
        return mean * self.c, None if std is None else std * self.c

    def decode(self, z):
        return self.inner.decode(z / self.c)


@pytest.mark.parametrize("c", [2.0, 3.0])
def test_scale_multiplies_isotropic_tolerance_and_leaves_data_scale_alone(tokenizer, c):
    # DESIGN.md "Scale matters": absolute tolerance scales with c, data-scale tolerance does not
    base = LookupCodec(tokenizer, sharpness=5.0)
    scaled = Scaled(base, c)
    text = "Gradient 1:28, boiler at 11 bar, 17 wagons, café at the top. " * 20
    chunks = chunk_text(text, base)
    grid = tuple(np.round(np.linspace(0, 1.2, 25), 6))
    iso = run_sweep(base, chunks, SweepSettings(sigmas=grid, repeats=3, noise="isotropic"))
    iso_c = run_sweep(scaled, chunks, SweepSettings(sigmas=tuple(g * c for g in grid), repeats=3, noise="isotropic"))
    for level in (0.99, 0.9):
        a, b = iso.tolerance(level), iso_c.tolerance(level)
        assert a.status == b.status == "ok"
        assert b.sigma == pytest.approx(c * a.sigma, rel=1e-3)
    ds = run_sweep(base, chunks, SweepSettings(sigmas=grid, repeats=3, noise="data-scale"))
    ds_c = run_sweep(scaled, chunks, SweepSettings(sigmas=grid, repeats=3, noise="data-scale"))
    for level in (0.99, 0.9):
        assert ds_c.tolerance(level).sigma == pytest.approx(ds.tolerance(level).sigma, rel=1e-3)
    assert ds_c.latent_rms == pytest.approx(c * ds.latent_rms, rel=1e-5)


def test_tolerance_interpolates_between_grid_points():
    t = tolerance_at([0.0, 1.0, 2.0], [1.0, 0.995, 0.985], 0.99)
    assert t.status == "ok" and t.sigma == pytest.approx(1.5)
    assert tolerance_at([0.0, 1.0], [0.98, 0.9], 0.99).status == "below_at_zero"
    above = tolerance_at([0.0, 1.0], [1.0, 0.999], 0.99)
    assert above.status == "above_grid" and above.sigma == 1.0


def test_tolerance_is_where_accuracy_first_drops():
    t = tolerance_at([0, 1, 2, 3], [1.0, 0.98, 0.995, 0.9], 0.99)
    assert t.sigma == pytest.approx(0.5)


def test_critical_sigma_is_first_grid_point_wrong_in_half_the_repeats():
    wrong = np.array([[0, 1, 2, 4], [0, 0, 0, 1], [2, 2, 2, 2]], dtype=np.uint8)
    crit = critical_sigmas([0.0, 0.1, 0.2, 0.3], wrong, repeats=4)
    assert crit[0] == 0.2 and np.isnan(crit[1]) and crit[2] == 0.0


def test_posterior_noise_on_a_plain_codec_is_refused(lookup_codec, fixture_text):
    chunks = chunk_text(fixture_text, lookup_codec)
    with pytest.raises(SettingsError, match="variational"):
        run_sweep(lookup_codec, chunks, SweepSettings(noise="posterior"))


def test_posterior_noise_uses_the_posterior_std(small_codec, fixture_text):
    chunks = chunk_text(fixture_text, small_codec)
    result = run_sweep(small_codec, chunks, SweepSettings(sigmas=(0.0, 1.0), repeats=1, noise="posterior"))
    assert result.curves[0].tokens == chunks.num_tokens


@pytest.mark.parametrize(
    "bad", [SweepSettings(sigmas=()), SweepSettings(sigmas=(-1.0,)), SweepSettings(sigmas=(float("nan"),)), SweepSettings(repeats=0), SweepSettings(noise="pink"), SweepSettings(seed=-3)]
)
def test_bad_settings_are_refused(bad, lookup_codec):
    with pytest.raises(SettingsError):
        bad.validated(lookup_codec)


def test_parse_sigmas():
    assert parse_sigmas("0:0.2:0.05") == (0.0, 0.05, 0.1, 0.15, 0.2)
    assert parse_sigmas("0, 0.1,0.4") == (0.0, 0.1, 0.4)
    for bad in ("0:1", "a,b", "1:0:0.1", "0:1:0"):
        with pytest.raises(SettingsError):
            parse_sigmas(bad)


def test_core_imports_no_qt():
    code = "import sys, core, core.engine.sweep, core.engine.health, core.analyses.live, core.analyses.tokens, core.cli; print([m for m in sys.modules if m.split('.')[0] in ('PySide6', 'pyqtgraph', 'superqt', 'shiboken6')])"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_live_paths_agree_with_the_sweep(lookup_codec, fixture_text):
    # the live view at a grid sigma shows the sweep's repeat 0, token for token
    from core.engine.noise import encode_chunks
    from core.analyses.live import perturb_once

    chunks = chunk_text(fixture_text, lookup_codec)
    encoded = encode_chunks(lookup_codec, chunks)
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=GRID, repeats=1, noise="isotropic", seed=4))
    si = GRID.index(0.6)
    full = perturb_once(lookup_codec, chunks, encoded, 0.6, "isotropic", seed=4)
    assert np.array_equal(full.predicted, result.decoded[:, si])
    assert np.array_equal(full.correct, full.predicted == chunks.token_ids)
    assert full.top_ids[:, 0].tolist() == full.predicted.tolist() and bool((np.diff(full.top_probs, axis=1) <= 0).all())
