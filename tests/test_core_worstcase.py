"""Worst-case perturbations (DESIGN.md, "Worst case"): the search against the closed form of
a linear decoder, verified flips at the boundary, the worst case below the random radius on
a shipped sample, the random radius against the sweep's own noise, refusals in one sentence."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np
import pytest
import torch

from core.analyses.worstcase import CSV_COLUMNS, WorstCaseSettings, worst_case
from core.codecs.contract import GradientsUnavailable
from core.engine.noise import Encoded, draw_eps, encode_chunks
from core.engine.sweep import SweepSettings, run_sweep
from core.engine.text import Chunks, chunk_text, demo_text
from core.errors import ChunkscopeError, SettingsError, SweepCancelled
from tests.conftest import make_lookup
from tests.test_core_adapter import one_sentence

SAMPLES = Path(__file__).resolve().parents[1] / "sample_models"
DEMO_SLICE = slice(2000, 5000)  # a fixed slice of the demo text: about 250 chunks


class LinearDecoder:
    """logits[n, p, :] = W[p] z + b[p]: a decoder linear in z at every position (contract only)."""

    def __init__(self, tokenizer, chunk_size=4, vocab=64, dim=16, seed=0):
        g = torch.Generator().manual_seed(seed)
        self.W = torch.randn(chunk_size, vocab, dim, generator=g)
        self.b = torch.randn(chunk_size, vocab, generator=g)
        self.chunk_size, self.vocab_size, self.latent_dim = chunk_size, vocab, dim
        self.pad_id, self.variational, self.tokenizer, self.name = 0, False, tokenizer, "linear"

    def encode(self, ids):
        raise NotImplementedError("the tests hand over the means")

    def decode(self, z):
        return torch.einsum("kvd,nd->nkv", self.W, z) + self.b


def linear_setup(tokenizer, n=200, vocab=64, tokens=None, seed=0):
    codec = LinearDecoder(tokenizer, vocab=vocab, seed=seed)
    tokens = n * codec.chunk_size if tokens is None else tokens
    n = -(-tokens // codec.chunk_size)
    mean = 2 * torch.randn(n, codec.latent_dim, generator=torch.Generator().manual_seed(seed + 1))
    chunks = Chunks(text="x" * tokens, text_sha256="0" * 64, token_ids=np.ones(tokens, dtype=np.int64),
                    spans=np.stack([np.arange(tokens), np.arange(tokens) + 1], 1), chunk_size=codec.chunk_size, pad_id=0)
    return codec, chunks, Encoded(mean, None)


def closed_form(codec: LinearDecoder, mean: torch.Tensor, mask: torch.Tensor) -> np.ndarray:
    """Moosavi-Dezfooli et al. 2016 (DeepFool), the multiclass linear case (from memory): the smallest L2
    perturbation that changes argmax_k (w_k z + b_k) is min over k != l of (f_l - f_k) / ||w_l - w_k||; per chunk
    the minimum is also over its real positions. Written out here by brute force over every (position, rival)."""
    f = codec.decode(mean).double()
    label = f.argmax(-1)
    best = np.full(len(mean), np.inf)
    rows = torch.arange(len(mean))
    for p in range(codec.chunk_size):
        f_l = f[rows, p, label[:, p]]
        w_l = codec.W[p][label[:, p]].double()
        for k in range(codec.vocab_size):
            dist = (f_l - f[:, p, k]) / (w_l - codec.W[p, k].double()).norm(dim=1)
            dist[(label[:, p] == k) | ~mask[:, p]] = np.inf
            best = np.minimum(best, dist.numpy())
    return best


def decodes_differ(codec, mean, delta, mask) -> np.ndarray:
    ref = codec.decode(mean).argmax(-1)
    return ((codec.decode(mean + delta).argmax(-1) != ref) & mask).any(1).numpy()


def test_linear_decoder_matches_the_closed_form(tokenizer):
    codec, chunks, encoded = linear_setup(tokenizer, tokens=799)  # a ragged last chunk: its padding never counts
    result = worst_case(codec, chunks, encoded=encoded)
    want = closed_form(codec, encoded.mean, chunks.mask())
    assert result.failed == 0
    assert np.all(np.abs(result.radius / want - 1) < 0.01), np.max(np.abs(result.radius / want - 1))
    assert np.all(result.radius >= want * (1 - 1e-4))  # nothing breaks the chunk closer than the minimum
    assert (result.position[-1] < 799 % 4) and np.all(result.from_id != result.to_id)


def test_every_rival_linearised_is_exact_in_the_linear_case(tokenizer):
    """With every (position, rival) pair a candidate, the first step is the paper's exact answer (same reference)."""
    codec, chunks, encoded = linear_setup(tokenizer, vocab=6, n=150, seed=3)
    result = worst_case(codec, chunks, WorstCaseSettings(candidates=4 * 5), encoded=encoded)
    want = closed_form(codec, encoded.mean, chunks.mask())
    assert np.all(np.abs(result.radius / want - 1) < 0.01)
    assert result.summary()["backward_calls_per_chunk"] == 20  # one step reached the boundary: one set of gradients


def test_reported_perturbations_flip_and_a_little_less_does_not(tokenizer):
    """Common practice for minimal-perturbation attacks: the perturbation is verified, and the boundary is tight."""
    codec, chunks, encoded = linear_setup(tokenizer, tokens=402)
    result = worst_case(codec, chunks, encoded=encoded)
    delta, mask = torch.from_numpy(result.perturbation), chunks.mask()
    assert decodes_differ(codec, encoded.mean, delta, mask).all()
    assert not decodes_differ(codec, encoded.mean, 0.98 * delta, mask).any()
    radius = np.linalg.norm(result.perturbation.astype(np.float64), axis=1)
    assert np.allclose(radius, result.radius)


@pytest.fixture(scope="module")
def tolerant_slice():
    from core.codecs.open import open_checkpoint

    path = SAMPLES / "tolerant.safetensors"
    if not path.exists():
        pytest.skip("the sample checkpoints are not there")
    codec = open_checkpoint(path)
    chunks = chunk_text(demo_text()[DEMO_SLICE], codec, "demo slice")
    encoded = encode_chunks(codec, chunks)
    return codec, chunks, encoded, worst_case(codec, chunks, encoded=encoded)


def test_on_the_sample_the_worst_case_is_below_the_random_radius(tolerant_slice):
    """The minimum over all directions cannot exceed the distance along one random direction (the noise norm at
    which the chunk broke bounds the boundary along that ray), so a search reporting more is failing."""
    codec, chunks, encoded, result = tolerant_slice
    below, compared = result.below_random()
    broke = int((~np.isnan(result.random_radius)).sum())
    print(f"worst < random for {below} of {compared} chunks ({below / compared:.1%}); {broke} broke on the grid; "
          f"{result.failed} failed")
    assert compared >= 0.9 * result.num_chunks and broke >= compared
    assert below >= 0.95 * compared
    assert result.failed <= 0.01 * result.num_chunks
    assert np.all(result.radius[result.verified] > 0)


def test_on_the_sample_perturbations_flip_at_the_boundary(tolerant_slice):
    codec, chunks, encoded, result = tolerant_slice
    ok = result.verified
    delta, mask, mean = torch.from_numpy(result.perturbation[ok]), chunks.mask()[ok], encoded.mean[ok]
    assert decodes_differ(codec, mean, delta, mask).all()
    assert decodes_differ(codec, mean, 0.98 * delta, mask).mean() <= 0.01  # a curved decoder may cross back
    ref = codec.decode(mean).argmax(-1)
    flipped = codec.decode(mean + delta).argmax(-1)
    rows = np.arange(int(ok.sum()))
    pos = result.position[ok]
    assert np.array_equal(ref[rows, pos].numpy(), result.from_id[ok])
    assert np.array_equal(flipped[rows, pos].numpy(), result.to_id[ok])
    relative = (delta / encoded.rms_per_dim).norm(dim=1).numpy()
    assert np.allclose(relative, result.relative_radius[ok], rtol=1e-5)


def test_random_radius_is_where_the_sweeps_own_noise_first_breaks_the_chunk(tokenizer):
    """Same seed, same ε as run_sweep (common random numbers): the sweep's first σ with a wrong token in the chunk."""
    codec = make_lookup(tokenizer)  # reconstructs perfectly, so the mean's decode is the text
    chunks = chunk_text("Sleepers, fishplates and the old water tower were checked twice at dawn. " * 5, codec)
    sigmas = tuple(np.round(np.linspace(0, 1.5, 31), 4))
    sweep = run_sweep(codec, chunks, SweepSettings(sigmas=sigmas, repeats=1, noise="data-scale", seed=7))
    result = worst_case(codec, chunks, WorstCaseSettings(seed=7, sigmas=sigmas, repeats=1))
    k, n = chunks.chunk_size, chunks.num_chunks
    wrong = np.zeros((n * k, len(sigmas)), dtype=bool)
    wrong[: chunks.num_tokens] = sweep.wrong_counts > 0
    broken = wrong.reshape(n, k, -1).any(1)
    first = np.where(broken.any(1), np.asarray(sigmas)[broken.argmax(1)], np.nan)
    assert np.array_equal(np.isnan(first), np.isnan(result.random_sigma))
    assert np.allclose(first[~np.isnan(first)], result.random_sigma[~np.isnan(first)])
    encoded = encode_chunks(codec, chunks)
    eps = draw_eps(7, 0, 0, n, codec.latent_dim)
    want = first * (eps * encoded.rms_per_dim).norm(dim=1).numpy()
    assert np.allclose(want, result.random_radius, rtol=1e-5, equal_nan=True)
    assert np.allclose(first * eps.norm(dim=1).numpy(), result.random_relative_radius, rtol=1e-5, equal_nan=True)
    both = result.verified & ~np.isnan(result.random_radius)
    assert both.sum() >= n // 2 and np.all(result.radius[both] <= result.random_radius[both])


def test_same_seed_same_result(tokenizer):
    codec = make_lookup(tokenizer)
    chunks = chunk_text("The valley line climbs 412 metres in 9.5 km. " * 4, codec)
    a, b = (worst_case(codec, chunks, WorstCaseSettings(seed=3)) for _ in range(2))
    c = worst_case(codec, chunks, WorstCaseSettings(seed=4))
    for key in ("radius", "random_radius", "position", "to_id"):
        assert np.array_equal(getattr(a, key), getattr(b, key), equal_nan=True)
    assert np.array_equal(a.radius, c.radius, equal_nan=True)  # the search itself draws nothing
    assert not np.array_equal(a.random_radius, c.random_radius, equal_nan=True)


def test_progress_and_cancel(tokenizer):
    codec, chunks, encoded = linear_setup(tokenizer, n=100)
    seen = []
    worst_case(codec, chunks, WorstCaseSettings(batch_chunks=40), progress=lambda d, t: seen.append((d, t)), encoded=encoded)
    assert seen == [(40, 100), (80, 100), (100, 100)]
    calls = []
    with pytest.raises(SweepCancelled):
        worst_case(codec, chunks, encoded=encoded, should_stop=lambda: calls.append(1) or len(calls) > 3)


def test_a_codec_without_gradients_is_refused_in_one_sentence(tokenizer):
    codec = make_lookup(tokenizer)
    codec.supports_gradients = False
    chunks = chunk_text("The valley line climbs. " * 3, codec)
    with pytest.raises(GradientsUnavailable) as caught:
        worst_case(codec, chunks)
    one_sentence(str(caught.value), "lookup", "gradients")


@pytest.mark.filterwarnings("ignore::DeprecationWarning")  # the TorchScript exporter warns it is legacy
def test_an_onnx_codec_is_refused_in_one_sentence(tmp_path, tokenizer):
    pytest.importorskip("onnxruntime")
    pytest.importorskip("onnx")
    from core.codecs.adapter import load_with_adapter
    from core.codecs.onnx import load_onnx_codec
    from tests.test_core_adapter import write_user_model
    from tests.test_core_onnx import write_onnx_folder

    adapter, checkpoint = write_user_model(tmp_path / "run", tokenizer)
    torch_codec = load_with_adapter(checkpoint, str(adapter))
    folder = write_onnx_folder(tmp_path / "tiny-onnx", torch_codec.codec)
    codec = load_onnx_codec(folder)
    chunks = chunk_text("The valley line climbs. " * 3, codec)
    with pytest.raises(GradientsUnavailable) as caught:
        worst_case(codec, chunks)
    one_sentence(str(caught.value), "tiny-onnx", "onnx")
    result = worst_case(torch_codec, chunks)  # the same model through its Python adapter: gradients flow
    assert result.verified.all() and result.provenance["codec"]["opened_as"] == "adapter"


@pytest.mark.parametrize("changes, words", [
    ({"seed": -1}, "seed"), ({"candidates": 0}, "candidate"), ({"overshoot": 0.0}, "overshoot"),
    ({"tolerance": 0.5}, "tolerance"), ({"sigmas": (0.0,)}, "sigma"), ({"sigmas": (0.1, float("nan"))}, "sigma"),
    ({"repeats": 0}, "repeats"), ({"iterations": 1.5}, "iterations"),
])
def test_bad_settings_are_one_sentence(tokenizer, changes, words):
    codec = make_lookup(tokenizer)
    chunks = chunk_text("The valley line climbs. " * 3, codec)
    with pytest.raises(SettingsError) as caught:
        worst_case(codec, chunks, WorstCaseSettings(**changes))
    one_sentence(str(caught.value), words)


def test_chunks_of_another_size_are_refused(tokenizer):
    codec = make_lookup(tokenizer)
    chunks = chunk_text("The valley line climbs. " * 3, make_lookup(tokenizer, chunk_size=3))
    with pytest.raises(ChunkscopeError) as caught:
        worst_case(codec, chunks)
    one_sentence(str(caught.value), "3", "4")


def test_written_files(tokenizer, tmp_path):
    codec = make_lookup(tokenizer)
    chunks = chunk_text("The valley line climbs 412 metres in 9.5 km. " * 4, codec)
    result = worst_case(codec, chunks)
    out = result.write(tmp_path / "wc")
    rows = list(csv.DictReader(io.StringIO((out / "worst_case.csv").read_text(encoding="utf-8"))))
    assert tuple(rows[0]) == CSV_COLUMNS and len(rows) == chunks.num_chunks
    assert np.allclose([float(r["radius"]) for r in rows], result.radius, rtol=1e-5, equal_nan=True)
    data = json.loads((out / "worst_case.json").read_text(encoding="utf-8"))
    assert data["summary"]["chunks"] == chunks.num_chunks and data["provenance"]["text"]["sha256"] == chunks.text_sha256
    assert data["provenance"]["settings"]["seed"] == 0
    with pytest.raises(FileExistsError):
        result.write(out)
    result.write(out, force=True)


def test_the_worstcase_command_end_to_end(tmp_path, capsys):
    from core.cli import main

    checkpoint = SAMPLES / "tolerant.safetensors"
    if not checkpoint.exists():
        pytest.skip("the sample checkpoints are not there")
    text = tmp_path / "notes.txt"
    text.write_text(demo_text()[2000:2600], encoding="utf-8")
    out = tmp_path / "wc"
    args = ["worstcase", str(checkpoint), "--text", str(text), "--out", str(out), "--seed", "2", "--quiet"]
    assert main(args) == 0
    printed = capsys.readouterr().out
    rows = list(csv.DictReader(io.StringIO((out / "worst_case.csv").read_text(encoding="utf-8"))))
    data = json.loads((out / "worst_case.json").read_text(encoding="utf-8"))
    assert {"chunk", "radius", "relative_radius", "random_radius", "position", "from_token", "to_token"} <= set(rows[0])
    assert data["summary"]["chunks"] == len(rows) and data["provenance"]["settings"]["seed"] == 2
    assert data["provenance"]["codec"]["sha256"] and data["provenance"]["text"]["source"] == str(text)
    assert f"{data['summary']['verified']} of {len(rows)} chunks verified" in printed
    radius = np.array([float(r["radius"]) for r in rows])
    assert np.all(radius > 0) and np.all(radius <= np.array([float(r["random_radius"]) for r in rows]))

    assert main(args) == 2  # nothing replaced without --force
    one_sentence(capsys.readouterr().err.strip().removeprefix("chunkscope: "), str(out), "--force")
    assert main(args + ["--force"]) == 0
    capsys.readouterr()

    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "thesis.tex").write_text("mine", encoding="utf-8")
    assert main(args[:4] + ["--out", str(tmp_path / "mine"), "--force", "--quiet"]) == 2
    one_sentence(capsys.readouterr().err.strip().removeprefix("chunkscope: "), "mine", "never replaced")
    assert (tmp_path / "mine" / "thesis.tex").read_text(encoding="utf-8") == "mine"

    assert main(["worstcase", str(checkpoint), "--text", str(tmp_path / "missing.txt"), "--out", str(tmp_path / "x")]) == 2
    one_sentence(capsys.readouterr().err.strip().removeprefix("chunkscope: "), "missing.txt")
    assert not (tmp_path / "x").exists()


def test_view_numbers(tokenizer):
    from core.analyses.worstcase import fragile_chunks, radius_histogram, radius_levels

    codec, chunks, encoded = linear_setup(tokenizer, tokens=399)
    result = worst_case(codec, chunks, WorstCaseSettings(sigmas=(0.5, 1.0, 2.0)), encoded=encoded)
    edges, worst, random = radius_histogram(result, relative=True, bins=12)
    assert worst.sum() == result.verified.sum() and random.sum() == np.isfinite(result.random_relative_radius).sum()
    assert np.all(np.diff(np.log(edges)) > 0) and np.allclose(np.diff(np.log(edges)), np.log(edges[1] / edges[0]))
    levels, level_edges = radius_levels(result, levels=5)
    assert len(levels) == chunks.num_tokens and levels.min() == 0 and levels.max() == 4
    smallest = int(np.nanargmin(result.radius))
    assert np.all(levels[smallest * 4 : smallest * 4 + 4] == 0)
    per_chunk = levels[::4]
    assert np.all(np.abs(np.bincount(per_chunk, minlength=5) - len(per_chunk) / 5) <= 1)  # equal shares (quantiles)
    rows = fragile_chunks(result, 7)
    assert [r.chunk for r in rows] == list(np.argsort(result.radius)[:7]) and rows[0].radius == np.nanmin(result.radius)


def test_report_gets_a_worst_case_section(tmp_path, capsys):
    """Through the report's section API: the section comes before the provenance, with both figures and the
    fragile chunks, and the summary's numbers are core's."""
    from core.cli import main

    checkpoint = SAMPLES / "tolerant.safetensors"
    if not checkpoint.exists():
        pytest.skip("the sample checkpoints are not there")
    text = tmp_path / "notes.txt"
    text.write_text(demo_text()[2000:2500], encoding="utf-8")
    out = tmp_path / "r.html"
    assert main(["report", str(checkpoint), "--text", str(text), "--out", str(out), "--worst-case", "--quiet",
                 "--sigmas", "0,0.5,1,2", "--repeats", "1", "--seed", "5", "--figures", str(tmp_path / "figs")]) == 0
    html = out.read_text(encoding="utf-8")
    assert "data-scale noise, seed 5, 1 repeats" in html  # the random radius uses the report's own --seed and --repeats
    order = [html.index(k) for k in ('id="worst-case-tolerant"', 'data-name="worst-case-tolerant-radii"',
                                     'data-name="worst-case-tolerant-scatter"', "Most fragile chunks", 'id="provenance"')]
    assert order == sorted(order)
    assert (tmp_path / "figs" / "worst-case-tolerant-scatter.pdf").is_file()
    capsys.readouterr()
    assert main(["report", str(tmp_path / "figs"), "--out", str(tmp_path / "x.html"), "--worst-case"]) == 2
    one_sentence(capsys.readouterr().err.strip().removeprefix("chunkscope: "), "--worst-case", "checkpoint")


def test_a_decoder_that_ignores_z_fails_every_chunk_without_raising(tokenizer):
    """Fact of the trade (from memory): logits constant in z have zero gradient and no decision boundary, so
    no perturbation changes the decode; every chunk is reported failed (NaN radius), and the summary says so."""
    codec, chunks, encoded = linear_setup(tokenizer, n=40)
    codec.W = torch.zeros_like(codec.W)
    result = worst_case(codec, chunks, encoded=encoded)
    assert result.failed == result.num_chunks == 40 and np.isnan(result.radius).all()
    s = result.summary()
    assert s["verified"] == 0 and s["radius_median"] is None and s["radius_min"] is None
    rows = list(csv.DictReader(io.StringIO(result.csv_text())))
    assert len(rows) == 40 and all(r["verified"] == "0" and r["from_token"] == "" for r in rows)
