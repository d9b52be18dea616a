"""The command line: info, sweep, help on every subcommand, refusing to overwrite."""

import errno
import json
import os
import select
import shutil
import struct
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace

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
    for word in ("chunk-mlp", "chunk K 4", "latent D 16", "sha256", "active dims", "KL to N(0,I)", "half-distance", "test fixture"):
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


# ---- start-up: no torch and no Qt until a command needs them -----------------------------

@pytest.mark.parametrize("argv", [["--help"], ["--version"], ["sweep", "--help"], ["train", "--help"]])
def test_installed_script_starts_without_torch_or_qt(argv):
    script = Path(sys.executable).parent / "chunkscope"
    if not script.exists():
        pytest.skip("the chunkscope console script is not installed in this environment")
    repo = Path(__file__).resolve().parents[1]
    env = {**os.environ, "PYTHONPROFILEIMPORTTIME": "1", "PYTHONPATH": str(repo)}  # this tree's code, not another checkout's
    out = subprocess.run([str(script), *argv], capture_output=True, text=True, env=env, timeout=120)
    assert out.returncode == 0, out.stderr[-2000:]
    imported = {line.rsplit("|", 1)[-1].strip() for line in out.stderr.splitlines() if line.startswith("import time:")}
    assert "core.cli" in imported  # the profile did record the imports
    top = {name.split(".")[0] for name in imported}
    assert "torch" not in top and "PySide6" not in top and "matplotlib" not in top


# ---- the progress bar ------------------------------------------------------------------------

def test_progress_bar_is_tqdm_on_stderr_and_shows_time_left_only_after_five_percent(capsys):
    from tqdm import tqdm

    from core.cli import TerminalProgress

    progress = TerminalProgress("sweep", mininterval=0)
    seen = []
    for done in range(1, 101):
        progress(done, 100)
        seen.append((done, capsys.readouterr()))
    assert isinstance(progress.bar, tqdm)
    assert all(out.out == "" for _, out in seen)  # stdout stays for the results
    assert all("left" not in out.err for done, out in seen if done < 5)
    assert any("left" in out.err for done, out in seen if done == 5)
    assert "100.0%" in seen[-1][1].err


@pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs a pseudo-terminal")
def test_progress_bar_shows_on_a_terminal_that_reports_no_size():
    from core.cli import TerminalProgress

    master, slave = os.openpty()  # a fresh pty reports 0 x 0, as some CI runners' and containers' terminals do
    try:
        with open(slave, "w", closefd=False) as stream:
            assert stream.isatty()
            progress = TerminalProgress("sizeless", stream=stream, mininterval=0)
            for done in range(1, 21):
                progress(done, 20)
        chunks = []  # a pty hands its output over in pieces: read until nothing more arrives
        while select.select([master], [], [], 0.5)[0]:
            piece = os.read(master, 65536)
            if not piece:
                break
            chunks.append(piece)
        written = b"".join(chunks).decode("utf-8", "replace")
    finally:
        os.close(master)
        os.close(slave)
    assert "sizeless" in written and "100.0%" in written and "left" in written


# ---- helpers for the commands below ----------------------------------------------------------

ARGS = ["--sigmas", "0,0.5", "--repeats", "1", "--quiet"]


@pytest.fixture()
def text_file(tmp_path):
    path = tmp_path / "t.txt"
    path.write_text("Sleepers checked: 41 of 44. Fishplates: fine.\n" * 4, encoding="utf-8")
    return path


@pytest.fixture()
def run_folder(small_codec, tmp_path):
    """Two checkpoints, a and b, in one folder (a training run)."""
    from core.codecs.checkpoint import save_codec

    folder = tmp_path / "run"
    folder.mkdir()
    for name in ("a", "b"):
        save_codec(small_codec, folder / f"{name}.safetensors")
    return folder


def _command(name, run_folder, text_file, out):
    a, b = str(run_folder / "a.safetensors"), str(run_folder / "b.safetensors")
    lines = {
        "sweep": ["sweep", a, b],
        "compare": ["compare", a, b, "--abs-sigmas", "0,0.5"],
        "trend": ["trend", str(run_folder)],
        "report": ["report", a],
    }
    return lines[name] + ["--text", str(text_file), "--out", str(out)] + ARGS


def _one_line(err: str) -> str:
    """The one error sentence (after any "swept ..." progress lines)."""
    lines = err.splitlines()
    assert "Traceback" not in err and lines and lines[-1].startswith("chunkscope: "), err
    assert sum("chunkscope:" in line for line in lines) == 1 and all(line.startswith("swept ") for line in lines[:-1]), err
    last = lines[-1]
    assert "[Errno" not in last and ".tmp" not in last and "/." not in last, err  # no raw errno, no hidden temp file
    return last


# ---- Ctrl-C: a multi-checkpoint command is one transaction -----------------------------------

@pytest.mark.parametrize("stop_in", ["a", "b"])
def test_interrupted_sweep_writes_nothing_and_says_so(run_folder, text_file, tmp_path, capsys, monkeypatch, stop_in):
    from core.codecs.contract import OpenedCodec as Codec

    decode = Codec.decode

    def interrupted(self, z):
        if self.name == stop_in:
            raise KeyboardInterrupt
        return decode(self, z)

    monkeypatch.setattr(Codec, "decode", interrupted)
    out = tmp_path / "s3"
    assert main(_command("sweep", run_folder, text_file, out)) == 130
    err = capsys.readouterr().err
    assert "nothing was written" in err and "wrote" not in err
    assert not out.exists()  # not s3/a, and not an empty s3/ either


def test_interrupted_forced_sweep_keeps_the_old_results(run_folder, text_file, tmp_path, capsys, monkeypatch):
    from core.codecs.contract import OpenedCodec as Codec

    out = tmp_path / "s3"
    assert main(_command("sweep", run_folder, text_file, out)) == 0
    before = {n: (out / n / "sweep.json").read_bytes() for n in ("a", "b")}
    decode = Codec.decode
    monkeypatch.setattr(Codec, "decode", lambda self, z: (_ for _ in ()).throw(KeyboardInterrupt) if self.name == "b" else decode(self, z))
    assert main(_command("sweep", run_folder, text_file, out) + ["--force"]) == 130
    assert {n: (out / n / "sweep.json").read_bytes() for n in ("a", "b")} == before
    assert sorted(p.name for p in out.iterdir()) == ["a", "b"]


# ---- --force replaces only what the tool wrote -----------------------------------------------

@pytest.mark.parametrize("command", ["sweep", "compare", "trend"])
def test_an_existing_file_in_the_way_of_a_result_folder_is_refused(run_folder, text_file, tmp_path, capsys, command):
    notes = tmp_path / "notes.txt"
    notes.write_text("my notes", encoding="utf-8")
    assert main(_command(command, run_folder, text_file, notes) + ["--force"]) == 2
    err = _one_line(capsys.readouterr().err)
    assert str(notes) in err and "is a file" in err
    assert notes.read_text(encoding="utf-8") == "my notes"


def test_force_does_not_replace_a_folder_the_tool_did_not_write(run_folder, text_file, tmp_path, capsys):
    out = tmp_path / "results"
    (out / "a").mkdir(parents=True)
    (out / "a" / "thesis.tex").write_text("years of work")
    assert main(_command("sweep", run_folder, text_file, out) + ["--force"]) == 2
    err = _one_line(capsys.readouterr().err)
    assert str(out / "a") in err and "did not write" in err
    assert (out / "a" / "thesis.tex").read_text() == "years of work" and sorted(p.name for p in out.iterdir()) == ["a"]


def test_trend_force_does_not_replace_a_csv_it_did_not_write(run_folder, text_file, tmp_path, capsys):
    out = tmp_path / "trend"
    out.mkdir()
    (out / "trend.csv").write_text("date,weight\n2024-01-01,71\n")
    assert main(_command("trend", run_folder, text_file, out) + ["--force"]) == 2
    assert "did not write" in _one_line(capsys.readouterr().err)
    assert (out / "trend.csv").read_text().startswith("date,weight")
    assert main(_command("trend", run_folder, text_file, tmp_path / "t2")) == 0
    assert main(_command("trend", run_folder, text_file, tmp_path / "t2")) == 2
    assert "already exists" in capsys.readouterr().err
    assert main(_command("trend", run_folder, text_file, tmp_path / "t2") + ["--force"]) == 0  # its own files: replaced


def test_report_force_replaces_an_html_file_but_not_other_files_or_a_folder(run_folder, text_file, tmp_path, capsys):
    notes = tmp_path / "notes.txt"
    notes.write_text("my notes")
    folder = tmp_path / "folder"
    folder.mkdir()
    (folder / "keep.txt").write_text("keep")
    for out, words in ((notes, "did not write"), (folder, "is a folder")):
        assert main(_command("report", run_folder, text_file, out) + ["--force"]) == 2
        err = _one_line(capsys.readouterr().err)
        assert str(out) in err and words in err
    assert notes.read_text() == "my notes" and (folder / "keep.txt").read_text() == "keep"
    old = tmp_path / "old.html"
    old.write_text("<!DOCTYPE html>\n<html><body>last week</body></html>")
    assert main(_command("report", run_folder, text_file, old) + ["--force"]) == 0
    assert "last week" not in old.read_text()


# ---- a folder that cannot be written -------------------------------------------------------

@pytest.fixture()
def read_only(tmp_path, monkeypatch):
    """Make tmp_path/ro behave as a read-only file system once `state["on"]` is set.

    Simulated at the os calls the writers go through, because the tests run as root here,
    where chmod does not stop writes (test_real_read_only_folder below does it for real when
    not root)."""
    ro = tmp_path / "ro"
    ro.mkdir()
    state = {"on": True, "root": str(ro)}
    real = {name: getattr(os, name) for name in ("mkdir", "open", "replace", "rename")}

    def guarded(name):
        def call(path, *args, **kwargs):
            paths = [path] + [a for a in args[:1] if name in ("replace", "rename")]
            if state["on"] and any(os.fspath(p).startswith(state["root"]) for p in paths if isinstance(p, (str, os.PathLike))):
                raise OSError(errno.EROFS, "Read-only file system", os.fspath(path))
            return real[name](path, *args, **kwargs)
        return call

    for name in real:
        monkeypatch.setattr(os, name, guarded(name))
    state["dir"] = ro
    return state


@pytest.mark.parametrize("command,target", [("sweep", "results"), ("compare", "cmp"), ("trend", "trend"), ("report", "r.html")])
def test_read_only_output_is_refused_before_the_work(run_folder, text_file, capsys, monkeypatch, read_only, command, target):
    from core.codecs.contract import OpenedCodec as Codec

    def no_work(self, ids):
        raise AssertionError("the work started before the output was checked")

    monkeypatch.setattr(Codec, "encode", no_work)
    out = read_only["dir"] / target
    assert main(_command(command, run_folder, text_file, out)) == 2
    err = _one_line(capsys.readouterr().err)
    assert str(read_only["dir"]) in err and "read-only" in err


@pytest.mark.parametrize("command,target", [("sweep", "results"), ("compare", "cmp"), ("trend", "trend"), ("report", "r.html")])
def test_output_failing_at_the_end_gives_one_sentence_and_leaves_nothing(run_folder, text_file, capsys, monkeypatch, read_only, command, target):
    from core.codecs.contract import OpenedCodec as Codec

    read_only["on"] = False
    decode = Codec.decode

    def goes_read_only(self, z):  # the folder turns read-only once the work has started
        read_only["on"] = True
        return decode(self, z)

    monkeypatch.setattr(Codec, "decode", goes_read_only)
    out = read_only["dir"] / target
    assert main(_command(command, run_folder, text_file, out)) == 2
    err = _one_line(capsys.readouterr().err)
    assert str(out) in err and "read-only" in err
    read_only["on"] = False
    assert list(read_only["dir"].iterdir()) == []


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0, reason="as root, chmod does not stop writes")
def test_real_read_only_folder(run_folder, text_file, tmp_path, capsys):
    ro = tmp_path / "locked"
    ro.mkdir()
    ro.chmod(0o555)
    try:
        assert main(_command("sweep", run_folder, text_file, ro / "results")) == 2
        assert "no permission" in _one_line(capsys.readouterr().err)
    finally:
        ro.chmod(0o755)


# ---- wording and small refusals ----------------------------------------------------------------

@pytest.mark.parametrize("batch", ["0", "-5"])
def test_a_batch_below_one_is_refused(small_checkpoint, text_file, tmp_path, capsys, batch):
    code = main(["sweep", str(small_checkpoint), "--text", str(text_file), "--out", str(tmp_path / "o"), "--batch", batch] + ARGS)
    assert code == 2
    assert "batch" in _one_line(capsys.readouterr().err)
    assert not (tmp_path / "o").exists()


def test_trend_on_a_missing_folder_says_so_before_any_table(tmp_path, capsys):
    assert main(["trend", str(tmp_path / "nonexistent")] + ARGS) == 2
    out = capsys.readouterr()
    assert out.out == ""  # no table header first
    assert str(tmp_path / "nonexistent") in _one_line(out.err) and "does not exist" in out.err


def test_existing_outputs_are_named_with_the_right_number(run_folder, text_file, tmp_path, capsys):
    out = tmp_path / "results"
    assert main(_command("sweep", run_folder, text_file, out)) == 0
    capsys.readouterr()
    assert main(_command("sweep", run_folder, text_file, out)) == 2
    err = _one_line(capsys.readouterr().err)
    assert f"{out / 'a'} and {out / 'b'} already exist; pass --force to replace them" in err
    shutil.rmtree(out / "b")
    assert main(_command("sweep", run_folder, text_file, out)) == 2
    err = _one_line(capsys.readouterr().err)
    assert f"{out / 'a'} already exists; pass --force to replace it" in err and "exist(s)" not in err


def test_checkpoint_header_wording(tmp_path, capsys):
    one = tmp_path / "one.safetensors"
    one.write_bytes(b"\x00")
    assert main(["info", str(one)]) == 2
    assert "only 1 byte long" in capsys.readouterr().err
    listed = tmp_path / "listed.safetensors"
    header = b"[1, 2]"
    listed.write_bytes(struct.pack("<Q", len(header)) + header)
    assert main(["info", str(listed)]) == 2
    err = capsys.readouterr().err
    assert "is JSON, but a list, not an object" in err and "not JSON" not in err


def test_a_comparison_without_significant_sigmas_says_so_in_a_sentence(capsys):
    from core.cli import print_comparison

    row = SimpleNamespace(pvalue=0.6, sigma=0.1, difference=0.001)
    comparison = SimpleNamespace(tolerances=[], scale_warning=None, main_noise="data-scale",
                                 paired=[SimpleNamespace(name_a="a", name_b="b", unit="token", rows=[row])])
    print_comparison(comparison)
    out = capsys.readouterr().out
    assert "nowhere" not in out and "not significant at p < 0.05 at any σ of the grid." in out
