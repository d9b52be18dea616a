"""Bring your own model through a Python adapter (DESIGN.md, "Three ways to open a codec"):
a user's own PyTorch MLP codec in a .py file sweeps end to end, and every bad input is one
sentence naming the path."""

from __future__ import annotations

import json
import textwrap
from pathlib import Path
from types import SimpleNamespace

import pytest
import torch

from core.cli import main
from core.codecs.adapter import AdapterError, load_with_adapter, path_sha256
from core.codecs.checkpoint import file_sha256
from core.codecs.conformance import CodecContractError
from core.codecs.open import open_codec
from core.errors import ChunkscopeError

# A user's codec, written the way a researcher would: their own module, a state dict saved
# with torch.save, and a tokenizer.json beside it. Used by the ONNX tests too.
USER_ADAPTER = '''
import json
from pathlib import Path

import torch
from tokenizers import Tokenizer


class TinyCodec(torch.nn.Module):
    def __init__(self, vocab, k=4, d=8, width=32):
        super().__init__()
        self.k, self.d, self.vocab = k, d, vocab
        self.embed = torch.nn.Embedding(vocab, 8)
        self.enc = torch.nn.Sequential(torch.nn.Linear(8 * k, width), torch.nn.GELU(), torch.nn.Linear(width, d))
        self.dec = torch.nn.Sequential(torch.nn.Linear(d, width), torch.nn.GELU(), torch.nn.Linear(width, k * vocab))

    def encode_mean(self, ids):
        return self.enc(self.embed(ids).flatten(1))

    def decode_logits(self, z):
        return self.dec(z).view(z.shape[0], self.k, self.vocab)


class Adapter:
    variational = False
    pad_id = 0

    def __init__(self, model, tokenizer):
        self.model = model.eval()
        self.tokenizer = tokenizer
        self.chunk_size, self.latent_dim, self.vocab_size = model.k, model.d, model.vocab

    def encode(self, ids):
        return self.model.encode_mean(ids), None

    def decode(self, z):
        return self.model.decode_logits(z)


def load(path):
    folder = Path(path).parent
    tokenizer = Tokenizer.from_file(str(folder / "tokenizer.json"))
    model = TinyCodec(tokenizer.get_vocab_size())
    model.load_state_dict(torch.load(path, weights_only=True))
    return Adapter(model, tokenizer)
'''

TEXT = "The 06:45 left Ober-Ränk on time; the café was shut, and the tower was checked twice.\n" * 6


def write_user_model(folder: Path, tokenizer, seed: int = 0) -> tuple[Path, Path]:
    """The user's files: my_codec.py, tokenizer.json and a torch.save state dict."""
    folder.mkdir(parents=True, exist_ok=True)
    adapter = folder / "my_codec.py"
    adapter.write_text(USER_ADAPTER, encoding="utf-8")
    tokenizer.save(str(folder / "tokenizer.json"))
    namespace: dict = {}
    exec(compile(USER_ADAPTER, str(adapter), "exec"), namespace)
    torch.manual_seed(seed)
    model = namespace["TinyCodec"](tokenizer.get_vocab_size())
    checkpoint = folder / "step_100.pt"
    torch.save(model.state_dict(), checkpoint)
    return adapter, checkpoint


@pytest.fixture()
def user_model(tmp_path, tokenizer):
    return write_user_model(tmp_path / "run", tokenizer)


def one_sentence(message: str, *names: str) -> None:
    assert "Traceback" not in message and "\n" not in message.strip(), message
    assert message.strip().endswith("."), message
    for name in names:
        assert name in message, (name, message)


def test_adapter_opens_with_provenance(user_model):
    adapter, checkpoint = user_model
    codec = load_with_adapter(checkpoint, str(adapter))
    assert (codec.chunk_size, codec.latent_dim, codec.supports_gradients) == (4, 8, True)
    src = codec.source
    assert src.opened_as == "adapter" and src.path == str(checkpoint)
    assert src.sha256 == file_sha256(checkpoint)  # a file: its own sha256
    assert src.adapter == str(adapter.absolute()) and src.adapter_sha256 == file_sha256(adapter)
    assert codec.describe()["adapter_sha256"] == src.adapter_sha256


def test_named_function_and_open_codec(user_model):
    adapter, checkpoint = user_model
    text = adapter.read_text(encoding="utf-8").replace("def load(path):", "def open_mine(path):")
    other = adapter.with_name("other.py")
    other.write_text(text, encoding="utf-8")
    codec = open_codec(checkpoint, f"{other}:open_mine")
    assert codec.source.opened_as == "adapter"
    with pytest.raises(AdapterError) as info:
        open_codec(checkpoint, str(other))  # no load() in that file
    one_sentence(str(info.value), str(other), "load(path)")


def test_folder_checkpoint_hash_covers_names_and_contents(tmp_path):
    folder = tmp_path / "ck"
    (folder / "sub").mkdir(parents=True)
    (folder / "a.bin").write_bytes(b"one")
    (folder / "sub" / "b.bin").write_bytes(b"two")
    first = path_sha256(folder)
    (folder / "sub" / "b.bin").rename(folder / "sub" / "c.bin")
    assert path_sha256(folder) != first  # a renamed file changes the hash
    (folder / "sub" / "c.bin").rename(folder / "sub" / "b.bin")
    assert path_sha256(folder) == first
    (folder / "a.bin").write_bytes(b"One")
    assert path_sha256(folder) != first


def test_sweep_through_adapter_via_cli(user_model, tmp_path, capsys):
    adapter, checkpoint = user_model
    text = tmp_path / "notes.txt"
    text.write_text(TEXT, encoding="utf-8")
    out = tmp_path / "results"
    assert main(["sweep", str(checkpoint), "--adapter", str(adapter), "--text", str(text), "--out", str(out),
                 "--sigmas", "0,0.5,2", "--repeats", "2", "--quiet"]) == 0
    err = capsys.readouterr().err
    assert f"{adapter.absolute()} (sha256 {file_sha256(adapter)})" in err  # the code that runs is named first
    data = json.loads((out / "step_100" / "sweep.json").read_text(encoding="utf-8"))
    blob = json.dumps(data)
    assert "adapter" in blob and file_sha256(adapter) in blob and file_sha256(checkpoint) in blob


def test_compare_adapter_checkpoint_with_builtin(user_model, small_checkpoint, tmp_path, capsys):
    """`--adapter` opens the checkpoints that are not chunkscope's own; the safetensors file opens as always."""
    adapter, checkpoint = user_model
    text = tmp_path / "notes.txt"
    text.write_text(TEXT, encoding="utf-8")
    out = tmp_path / "cmp"
    assert main(["compare", str(checkpoint), str(small_checkpoint), "--adapter", str(adapter), "--text", str(text),
                 "--out", str(out), "--sigmas", "0,0.5", "--repeats", "1", "--quiet"]) == 0
    assert (out / "compare.json").exists()


def test_trend_over_a_run_folder_with_an_adapter(tokenizer, tmp_path, capsys):
    run = tmp_path / "run"
    adapter, _ = write_user_model(run, tokenizer, seed=0)
    torch.save(torch.load(run / "step_100.pt", weights_only=True), run / "step_200.pt")
    text = tmp_path / "notes.txt"
    text.write_text(TEXT, encoding="utf-8")
    assert main(["trend", str(run), "--adapter", str(adapter), "--text", str(text), "--sigmas", "0,1", "--repeats", "1"]) == 0
    out = capsys.readouterr().out
    assert "step_100" in out and "step_200" in out and "tokenizer" not in out and "my_codec" not in out


def test_entry_point_adapter(user_model, monkeypatch):
    adapter, checkpoint = user_model
    namespace: dict = {}
    exec(compile(adapter.read_text(encoding="utf-8"), str(adapter), "exec"), namespace)

    def entry_points(group=None, name=None):
        found = [SimpleNamespace(name="tinycodec", group="chunkscope.adapters", load=lambda: namespace["load"])]
        return [e for e in found if (group is None or e.group == group) and (name is None or e.name == name)]

    monkeypatch.setattr("importlib.metadata.entry_points", entry_points)
    codec = open_codec(checkpoint, "tinycodec")
    assert codec.source.adapter == "entry point tinycodec" and codec.source.opened_as == "adapter"
    with pytest.raises(AdapterError) as info:
        open_codec(checkpoint, "nosuchcodec")
    one_sentence(str(info.value), "nosuchcodec", "chunkscope.adapters")


BAD_ADAPTERS = {
    "syntax": ("def load(path)\n    return 1\n", ["line 1"]),
    "no_load": ("def something(path):\n    return 1\n", ["load(path)"]),
    "raises": ("def load(path):\n    raise FileNotFoundError('no weights.bin beside ' + path)\n", ["FileNotFoundError: no weights.bin beside", ":2"]),
    "import_fails": ("import nosuchmodule_xyz\n", ["ModuleNotFoundError", ":1"]),
}


@pytest.mark.parametrize("case", sorted(BAD_ADAPTERS))
def test_bad_adapter_files_are_one_sentence(case, user_model, tmp_path, capsys):
    source, words = BAD_ADAPTERS[case]
    _, checkpoint = user_model
    bad = tmp_path / f"{case}.py"
    bad.write_text(source, encoding="utf-8")
    with pytest.raises(AdapterError) as info:
        load_with_adapter(checkpoint, str(bad))
    one_sentence(str(info.value), str(bad), *words)
    assert main(["info", str(checkpoint), "--adapter", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and str(bad) in err


def test_missing_or_non_python_adapter(user_model, tmp_path):
    _, checkpoint = user_model
    for spec, words in ((tmp_path / "gone.py", ["does not exist"]), (tmp_path / "notes.txt", ["not a Python file"])):
        if spec.suffix == ".txt":
            spec.write_text("hello", encoding="utf-8")
        with pytest.raises(AdapterError) as info:
            load_with_adapter(checkpoint, str(spec))
        one_sentence(str(info.value), str(spec), *words)


def test_missing_checkpoint_is_said_before_the_adapter_runs(user_model, tmp_path):
    adapter, _ = user_model
    marker = tmp_path / "ran"
    spy = tmp_path / "spy.py"
    spy.write_text(f"from pathlib import Path\nPath({str(marker)!r}).write_text('x')\ndef load(path):\n    return None\n", encoding="utf-8")
    gone = tmp_path / "nothing_here.pt"
    with pytest.raises(AdapterError) as info:
        load_with_adapter(gone, str(spy))
    one_sentence(str(info.value), str(gone), "does not exist")
    assert not marker.exists()


def test_cli_names_no_adapter_when_no_checkpoint_exists(user_model, tmp_path, capsys):
    adapter, _ = user_model
    assert main(["info", str(tmp_path / "nothing_here.pt"), "--adapter", str(adapter)]) == 2
    err = capsys.readouterr().err
    assert "running the adapter" not in err and err.strip() == f"chunkscope: {tmp_path / 'nothing_here.pt'} does not exist."


def test_checkpoint_the_adapter_cannot_read(user_model, tmp_path):
    adapter, checkpoint = user_model
    junk = tmp_path / "junk.pt"
    junk.write_bytes(b"not a state dict at all")
    with pytest.raises(AdapterError) as info:
        load_with_adapter(junk, str(adapter))
    one_sentence(str(info.value), str(adapter), str(junk), "my_codec.py:")


def test_adapter_returning_a_non_conforming_codec(user_model, tmp_path):
    adapter, checkpoint = user_model
    wrong = tmp_path / "wrong.py"  # latent_dim says 9, the encoder gives 8: the validator's sentence
    wrong.write_text(adapter.read_text(encoding="utf-8").replace("return Adapter(model, tokenizer)",
                     "a = Adapter(model, tokenizer)\n    a.latent_dim = 9\n    return a"), encoding="utf-8")
    with pytest.raises(CodecContractError) as info:
        load_with_adapter(checkpoint, str(wrong))
    one_sentence(str(info.value), str(wrong), str(checkpoint), "x9, but it has shape", "x8")
    nothing = tmp_path / "nothing.py"
    nothing.write_text("def load(path):\n    return None\n", encoding="utf-8")
    with pytest.raises(AdapterError) as info:
        load_with_adapter(checkpoint, str(nothing))
    one_sentence(str(info.value), str(nothing), "returned nothing")


def test_code_beside_a_checkpoint_never_runs(user_model, small_checkpoint, tmp_path):
    """Without --adapter, a .py lying beside a checkpoint is not run (DESIGN.md)."""
    marker = tmp_path / "ran"
    (small_checkpoint.parent / "load.py").write_text(f"open({str(marker)!r}, 'w').write('x')\ndef load(p):\n    pass\n", encoding="utf-8")
    assert open_codec(small_checkpoint).source.opened_as == "built-in"
    _, checkpoint = user_model
    with pytest.raises(ChunkscopeError):
        open_codec(checkpoint)  # a .pt without an adapter: the built-in loader refuses it in one sentence
    assert not marker.exists()


def test_report_through_adapter(user_model, tmp_path, capsys):
    adapter, checkpoint = user_model
    text = tmp_path / "notes.txt"
    text.write_text(TEXT, encoding="utf-8")
    out = tmp_path / "r.html"
    assert main(["report", str(checkpoint), "--adapter", str(adapter), "--text", str(text), "--out", str(out),
                 "--sigmas", "0,1", "--repeats", "1", "--quiet"]) == 0
    assert out.read_text(encoding="utf-8").lstrip().lower().startswith("<!doctype html")
    assert "running the adapter code in" in capsys.readouterr().err


def test_adapter_line_is_printed_before_its_code_runs(user_model, tmp_path, capsys):
    """The command line names the file whose code it runs even when that code then fails."""
    _, checkpoint = user_model
    bad = tmp_path / "fails.py"
    bad.write_text("def load(path):\n    raise RuntimeError('boom')\n", encoding="utf-8")
    assert main(["sweep", str(checkpoint), "--adapter", str(bad), "--out", str(tmp_path / "o"), "--quiet"]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert lines[0] == f"chunkscope: running the adapter code in {bad.absolute()} (sha256 {file_sha256(bad)})"
    assert lines[1].startswith("chunkscope: The adapter") and "RuntimeError: boom" in lines[1] and len(lines) == 2


def test_an_adapter_changed_after_opening_is_not_shipped_to_workers(user_model):
    """The workers must run the code that opened the checkpoint here (its sha256 is in the provenance),
    never a file edited since (common practice: pin code by content hash)."""
    from core.engine.cluster import ClusterError, codec_ticket

    adapter, checkpoint = user_model
    codec = load_with_adapter(checkpoint, str(adapter))
    ticket = codec_ticket(codec, str(adapter))
    assert ticket.adapter.sha256 == codec.source.adapter_sha256 == file_sha256(adapter)
    adapter.write_text(adapter.read_text(encoding="utf-8") + "\nprint('new code')\n", encoding="utf-8")
    for spec in (str(adapter), None):  # named again (the command line) or as recorded (the workbench)
        with pytest.raises(ClusterError) as info:
            codec_ticket(codec, spec)
        one_sentence(str(info.value), str(adapter), "changed")
