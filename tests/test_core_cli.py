"""The command line: info, sweep, help on every subcommand, refusing to overwrite."""

import json
import subprocess
import sys

import pytest

from core.cli import build_parser, main


def test_every_subcommand_has_help(capsys):
    parser = build_parser()
    names = [a for a in parser._subparsers._group_actions[0].choices]
    assert {"info", "sweep"} <= set(names)
    for name in names:
        with pytest.raises(SystemExit) as info:
            main([name, "--help"])
        assert info.value.code == 0
        assert "usage: chunkscope " + name in capsys.readouterr().out


def test_info_prints_sizes_hash_card_and_health(small_checkpoint, tmp_path, capsys):
    text = tmp_path / "t.txt"
    text.write_text("The 06:45 left Ober-Ränk on time; the café was shut.\n" * 20, encoding="utf-8")
    assert main(["info", str(small_checkpoint), "--text", str(text)]) == 0
    out = capsys.readouterr().out
    for word in ("chunk-mlp", "K=4", "latent D=16", "sha256", "active dims", "KL to N(0,I)", "half-distance", "test fixture"):
        assert word in out, word
    assert main(["info", str(small_checkpoint), "--text", str(text), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    # the reference: core's own latent health of the same checkpoint on the same text
    from core.codecs.checkpoint import load_codec
    from core.engine.health import latent_health
    from core.engine.text import chunk_text, load_text

    codec = load_codec(small_checkpoint)
    health = latent_health(codec, chunk_text(load_text(text), codec))
    assert data["codec"]["config"]["latent_dim"] == 16
    assert data["health"]["active_dims"] == health.active_dims
    assert data["health"]["latent_rms"] == pytest.approx(health.latent_rms)


def test_sweep_writes_files_and_refuses_to_overwrite(small_checkpoint, tmp_path, capsys):
    text = tmp_path / "t.txt"
    text.write_text("Sleepers checked: 41 of 44. Fishplates: fine.\n" * 10, encoding="utf-8")
    out = tmp_path / "results"
    args = ["sweep", str(small_checkpoint), "--text", str(text), "--sigmas", "0:0.4:0.2", "--repeats", "2", "--out", str(out), "--quiet"]
    assert main(args) == 0
    printed = capsys.readouterr().out
    assert "small" in printed and "99.9 %" in printed
    folder = out / "small"
    assert sorted(p.name for p in folder.iterdir()) == ["arrays.npz", "curves.csv", "sweep.json", "text.txt", "tokens.csv", "vocab.json"]
    data = json.loads((folder / "sweep.json").read_text())
    assert data["settings"]["sigmas"] == [0.0, 0.2, 0.4] and data["elapsed_s"] > 0 and data["decoded_chunks"] > 0
    before = (folder / "sweep.json").read_bytes()
    assert main(args) == 2
    assert "already exist" in capsys.readouterr().err
    assert (folder / "sweep.json").read_bytes() == before
    assert main(args + ["--force"]) == 0


@pytest.mark.parametrize(
    "extra,words",
    [(["--noise", "posterior"], None), (["--sigmas", "1:0:0.1"], "start <= stop"), (["--repeats", "0"], "repeats")],
)
def test_sweep_bad_settings_give_one_line(small_checkpoint, tmp_path, capsys, extra, words):
    text = tmp_path / "t.txt"
    text.write_text("A short line of text for the sweep.", encoding="utf-8")
    code = main(["sweep", str(small_checkpoint), "--text", str(text), "--out", str(tmp_path / "o"), "--quiet", "--sigmas", "0,0.1"] + extra)
    err = capsys.readouterr().err
    if words is None:  # posterior noise on a variational codec is fine
        assert code == 0
    else:
        assert code == 2 and words in err and err.count("\n") == 1


def test_bad_checkpoint_and_bad_text_give_one_line(small_checkpoint, tmp_path, capsys):
    junk = tmp_path / "junk.safetensors"
    junk.write_bytes(b"\x00" * 3)
    assert main(["info", str(junk)]) == 2
    err = capsys.readouterr().err
    assert "junk.safetensors" in err and err.count("\n") == 1
    empty = tmp_path / "empty.txt"
    empty.write_text("   \n", encoding="utf-8")
    assert main(["sweep", str(small_checkpoint), "--text", str(empty), "--out", str(tmp_path / "o")]) == 2
    assert "only whitespace" in capsys.readouterr().err


def test_console_script_entry_point_runs():
    out = subprocess.run([sys.executable, "-m", "core.cli", "--version"], capture_output=True, text=True)
    assert out.returncode == 0 and out.stdout.startswith("chunkscope ")
