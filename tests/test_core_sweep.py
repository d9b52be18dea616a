"""The sweep: perfection at sigma 0, reproducibility, common random numbers, cancellation,
scale invariance of data-scale tolerance, and the files it writes."""

import csv
import json
import subprocess
import sys
from pathlib import Path

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


def test_a_cancelled_sweep_raises_and_stops_decoding(tokenizer, fixture_text):
    codec = LookupCodec(tokenizer)
    codec.decoded_latents = []
    chunks = chunk_text(fixture_text, codec)
    calls = []

    def stop():
        calls.append(1)
        return len(calls) > 3

    with pytest.raises(SweepCancelled):
        run_sweep(codec, chunks, SweepSettings(sigmas=GRID, repeats=2), should_stop=stop)
    # a whole sweep decodes every chunk batch once per (repeat, sigma): 2 x 12 here; the cancelled one stopped at the 4th question
    assert 0 < len(codec.decoded_latents) <= 3 < 2 * len(GRID)


def _interrupt_decoding_after(monkeypatch, calls: int, only: str | None = None):
    """Ctrl-C (KeyboardInterrupt) in the middle of the sweep: raised from the decode every opened codec goes through."""
    from core.codecs.contract import OpenedCodec as Codec

    real = Codec.decode
    seen = []

    def decode(self, z):
        if only is None or self.name == only:
            seen.append(1)
            if len(seen) > calls:
                raise KeyboardInterrupt
        return real(self, z)

    monkeypatch.setattr(Codec, "decode", decode)
    return seen


def _leftovers(folder):
    """Files and folders the atomic writes stage beside their target (core.outputs.files: '.NAME.*')."""
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def test_an_interrupted_command_line_sweep_writes_nothing(small_checkpoint, tmp_path, monkeypatch, capsys):
    from core.cli import main

    text = tmp_path / "t.txt"
    text.write_text("Sleepers checked: 41 of 44. Fishplates: fine.\n" * 10, encoding="utf-8")
    out = tmp_path / "results"
    seen = _interrupt_decoding_after(monkeypatch, 3)
    code = main(["sweep", str(small_checkpoint), "--text", str(text), "--sigmas", "0:0.4:0.1", "--repeats", "2",
                 "--out", str(out), "--quiet"])
    assert len(seen) == 4  # interrupted mid-sweep, not before it started
    assert code == 130 and "nothing was written" in capsys.readouterr().err
    assert not (out / small_checkpoint.stem).exists()
    assert not out.exists() or list(out.iterdir()) == []
    assert _leftovers(tmp_path) == []


def test_an_interrupted_sweep_of_two_checkpoints_tells_the_truth_about_what_it_wrote(tmp_path, monkeypatch, capsys, small_codec):
    from core.cli import main
    from core.codecs.checkpoint import save_codec

    for name in ("a", "b"):
        save_codec(small_codec, tmp_path / f"{name}.safetensors")
    text = tmp_path / "t.txt"
    text.write_text("Sleepers checked: 41 of 44. Fishplates: fine.\n" * 10, encoding="utf-8")
    out = tmp_path / "results"
    _interrupt_decoding_after(monkeypatch, 3, only="b")  # a is swept (and written), b is interrupted
    code = main(["sweep", str(tmp_path / "a.safetensors"), str(tmp_path / "b.safetensors"), "--text", str(text),
                 "--sigmas", "0,0.2", "--repeats", "2", "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 130 and not (out / "b").exists() and _leftovers(tmp_path) == []
    assert not out.exists() or _leftovers(out) == []
    # either nothing is written, or the message does not say so and names what was
    assert not (out / "a").exists() or ("nothing was written" not in err and str(out / "a") in err)


def test_an_interrupted_write_leaves_no_staged_folder(small_checkpoint, tmp_path, monkeypatch, capsys):
    from core.cli import main

    text = tmp_path / "t.txt"
    text.write_text("Sleepers checked: 41 of 44. Fishplates: fine.\n" * 10, encoding="utf-8")
    out = tmp_path / "results"

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(np, "savez_compressed", interrupted)  # Ctrl-C while the arrays are written
    code = main(["sweep", str(small_checkpoint), "--text", str(text), "--sigmas", "0,0.2", "--repeats", "1",
                 "--out", str(out), "--quiet"])
    assert code == 130 and "nothing was written" in capsys.readouterr().err
    assert not (out / small_checkpoint.stem).exists()
    assert not out.exists() and _leftovers(tmp_path) == []  # the staged folders beside the target are gone


def test_an_interrupted_command_line_compare_writes_nothing(tokenizer, tmp_path, monkeypatch, capsys):
    from core.cli import main
    from core.codecs.checkpoint import Codec, save_codec
    from core.codecs.model import ChunkMLPConfig, build_model

    paths = []
    for name in ("a", "b"):
        torch.manual_seed(len(paths))
        config = ChunkMLPConfig(chunk_size=4, vocab_size=tokenizer.get_vocab_size(), latent_dim=8, embed_dim=8, width=16, depth=1)
        paths.append(tmp_path / f"{name}.safetensors")
        save_codec(Codec(build_model(config), tokenizer), paths[-1])
    text = tmp_path / "t.txt"
    text.write_text("The 06:45 left Ober-Ränk on time; the café was shut.\n" * 10, encoding="utf-8")
    out = tmp_path / "cmp"
    seen = _interrupt_decoding_after(monkeypatch, 5, only="b")  # a is swept, b is interrupted
    code = main(["compare", *map(str, paths), "--text", str(text), "--sigmas", "0,0.2,0.4", "--repeats", "1",
                 "--out", str(out), "--quiet"])
    assert len(seen) == 6
    assert code == 130 and "nothing was written" in capsys.readouterr().err
    assert not out.exists() and _leftovers(tmp_path) == []


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


class PosteriorLookup(LookupCodec):
    """LookupCodec made variational: its posterior std is fixed per latent dimension, one value per
    chunk position (slot j of the latent holds token j). The values are powers of two or zero, so
    sigma · std ⊙ ε is exact in float32 whatever order the engine multiplies in."""

    SLOT_STD = (0.0, 0.5, 1.0, 2.0)

    def __init__(self, tokenizer, **kwargs):
        super().__init__(tokenizer, **kwargs)
        self.variational = True
        self.std = torch.tensor(self.SLOT_STD).repeat_interleave(self.per_token_dim)

    def encode(self, ids):
        mean, _ = super().encode(ids)
        return mean, self.std.expand_as(mean).clone()


def test_posterior_noise_is_sigma_times_the_posterior_std_times_epsilon(tokenizer, fixture_text):
    from core.engine.noise import draw_eps

    codec = PosteriorLookup(tokenizer)
    codec.decoded_latents = []
    chunks = chunk_text(fixture_text, codec)
    assert chunks.num_chunks <= 512  # one batch: the decoded latents are whole-text [N, D]
    sigmas = (0.0, 0.25, 1.0)
    run_sweep(codec, chunks, SweepSettings(sigmas=sigmas, repeats=2, noise="posterior", seed=5))
    mean, std = codec.encode(chunks.ids())
    z = codec.decoded_latents  # order: repeat 0 (σ0, σ1, σ2), repeat 1 (σ0, σ1, σ2)
    assert len(z) == 2 * len(sigmas)
    for r in range(2):
        eps = draw_eps(5, r, 0, chunks.num_chunks, codec.latent_dim)  # DESIGN.md: ε per (seed, repeat, chunk)
        for i, sigma in enumerate(sigmas):
            # DESIGN.md "Noise models", posterior: z = mean + sigma · std ⊙ ε (exact: sigma and std are powers of two)
            assert torch.equal(z[3 * r + i], mean + sigma * std * eps), (r, sigma)
    assert torch.equal(z[1][:, : codec.per_token_dim], mean[:, : codec.per_token_dim])  # std 0: never moved


def test_posterior_noise_follows_the_posterior_std_of_each_dimension(tokenizer, fixture_text):
    # With std s_j in the slot of chunk position j, posterior noise at sigma moves that slot exactly as
    # isotropic noise at sigma · s_j does (same seed, same ε); the lookup decoder reads each slot alone.
    codec = PosteriorLookup(tokenizer)
    chunks = chunk_text(fixture_text, codec)
    sigmas = (0.0, 0.25, 0.5, 1.0)
    iso_sigmas = (0.0, 0.125, 0.25, 0.5, 1.0, 2.0)
    post = run_sweep(codec, chunks, SweepSettings(sigmas=sigmas, repeats=1, noise="posterior", seed=2))
    iso = run_sweep(codec, chunks, SweepSettings(sigmas=iso_sigmas, repeats=1, noise="isotropic", seed=2))
    position = np.arange(chunks.num_tokens) % codec.chunk_size
    for j, s in enumerate(PosteriorLookup.SLOT_STD):
        here = position == j
        for i, sigma in enumerate(sigmas):
            if s == 0:
                assert np.array_equal(post.decoded[here, i], chunks.token_ids[here])  # std 0: never wrong
            else:
                assert np.array_equal(post.decoded[here, i], iso.decoded[here, iso_sigmas.index(sigma * s)]), (j, sigma)
    # so the check can fail: isotropic noise does break position 0, and the curves differ
    assert not np.array_equal(iso.decoded[position == 0, -1], chunks.token_ids[position == 0])
    assert post.curves[-1].position_accuracy[0] == 1.0 > iso.curves[iso_sigmas.index(1.0)].position_accuracy[0]
    assert post.curves[-1].position_accuracy[3] < iso.curves[iso_sigmas.index(1.0)].position_accuracy[3]


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


CORE = Path(__file__).resolve().parent.parent / "core"
QT_PACKAGES = ("PySide6", "shiboken6", "pyqtgraph", "superqt")
# DEVELOPERS.md "Start-up": core modules defer torch; only the model itself and the training recipe import it
TORCH_AT_IMPORT = {"core.codecs.model", "core.training.train", "core.training.generator"}


def core_modules() -> list[str]:
    import pkgutil

    import core

    return sorted(m.name for m in pkgutil.walk_packages(core.__path__, "core."))


def _modules_loaded_by(modules: list[str], packages: tuple[str, ...]) -> dict[str, list[str]]:
    """Import `modules` in a fresh interpreter; per package in `packages`, the modules of it that got loaded."""
    code = ("import importlib, json, sys\n"
            f"for name in {modules!r}: importlib.import_module(name)\n"
            f"print(json.dumps({{p: sorted(m for m in sys.modules if m.split('.')[0] == p) for p in {packages!r}}}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_the_walk_finds_every_module_of_core():
    from_files = {".".join(("core",) + p.relative_to(CORE).with_suffix("").parts).removesuffix(".__init__")
                  for p in CORE.rglob("*.py")}
    found = core_modules()
    assert set(found) == from_files - {"core"}
    assert len(found) + 1 >= len(list(CORE.rglob("*.py")))  # core itself is the root of the walk
    assert {"core.codecs", "core.engine", "core.analyses", "core.outputs", "core.training"} <= set(found)


def test_no_module_of_core_imports_qt():
    # STYLE.md / DEVELOPERS.md: core never imports Qt; every module found by walking the package, in a fresh interpreter
    loaded = _modules_loaded_by(["core"] + core_modules(), QT_PACKAGES)
    assert loaded == {p: [] for p in QT_PACKAGES}


def test_core_imports_without_torch_except_the_model_and_the_training_recipe():
    # DEVELOPERS.md "Start-up": nothing on the way to the first paint imports torch (about 2.5 s)
    promised = ["core"] + [m for m in core_modules() if m not in TORCH_AT_IMPORT]
    assert _modules_loaded_by(promised, ("torch",)) == {"torch": []}
    # and the check can fail: the model module does import it
    assert _modules_loaded_by(["core.codecs.model"], ("torch",))["torch"]


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
