"""The README's "Bring your own model" section, run verbatim: its adapter file, its command
lines and its ONNX export recipe, on a small model of the kind the adapter expects (a
`my_project.model.ChunkAutoencoder`, a state dict saved with torch.save, and a byte-level
BPE tokenizer.json with a <pad> token trained with the tokenizers library). A user who
copies the section should succeed on the first try."""

from __future__ import annotations

import json
import re
import runpy
import shlex
import sys
import textwrap
from pathlib import Path

import pytest
import torch

from core.cli import main
from core.codecs.checkpoint import file_sha256

README = Path(__file__).resolve().parent.parent / "README.md"

# The user's own project: what the README's adapter imports (`from my_project.model import ChunkAutoencoder`).
USER_MODEL = '''
import torch


class ChunkAutoencoder(torch.nn.Module):
    def __init__(self, vocab_size, chunk_size=4, latent_dim=16, width=96):
        super().__init__()
        self.chunk_size, self.latent_dim, self.vocab_size = chunk_size, latent_dim, vocab_size
        self.embed = torch.nn.Embedding(vocab_size, 16)
        self.enc = torch.nn.Sequential(torch.nn.Linear(16 * chunk_size, width), torch.nn.GELU(), torch.nn.Linear(width, latent_dim))
        self.dec = torch.nn.Sequential(torch.nn.Linear(latent_dim, width), torch.nn.GELU(), torch.nn.Linear(width, chunk_size * vocab_size))

    def encode(self, ids):
        return self.enc(self.embed(ids).flatten(1))

    def decode(self, z):
        return self.dec(z).view(z.shape[0], self.chunk_size, self.vocab_size)
'''

NOTES = ("Tuesday: the 06:45 left on time, sleepers 41 to 44 checked, the water tower filled twice.\n"
         "Wednesday: fishplates tightened near the viaduct; the café opened late; coal delivered.\n") * 5


def section() -> str:
    text = README.read_text(encoding="utf-8")
    start = text.index("## Bring your own model")
    end = text.find("\n## ", start + 1)
    return text[start:end if end > 0 else None]


def blocks(kind: str) -> list[str]:
    return re.findall(rf"```{kind}\n(.*?)```", section(), flags=re.S)


def python_block(first_line_starts: str) -> str:
    (block,) = [b for b in blocks("python") if b.startswith(first_line_starts)]
    return block


def shell_lines() -> list[str]:
    return [line.strip() for block in blocks("sh") for line in block.splitlines() if line.strip()]


@pytest.fixture()
def user_project(tmp_path, monkeypatch):
    """A working directory laid out as the README's lines expect, with a briefly trained model."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

    monkeypatch.chdir(tmp_path)
    monkeypatch.syspath_prepend(str(tmp_path))  # "run chunkscope where my_project imports"
    for name in [m for m in sys.modules if m == "my_project" or m.startswith("my_project.") or m == "my_codec"]:
        monkeypatch.delitem(sys.modules, name)
    (tmp_path / "my_project").mkdir()
    (tmp_path / "my_project" / "__init__.py").write_text("", encoding="utf-8")
    (tmp_path / "my_project" / "model.py").write_text(textwrap.dedent(USER_MODEL), encoding="utf-8")
    (tmp_path / "notes.txt").write_text(NOTES, encoding="utf-8")

    tokenizer = Tokenizer(models.BPE())
    tokenizer.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tokenizer.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(vocab_size=300, special_tokens=["<pad>"], initial_alphabet=pre_tokenizers.ByteLevel.alphabet())
    tokenizer.train_from_iterator([NOTES], trainer=trainer)
    run = tmp_path / "runs" / "ae-7"
    run.mkdir(parents=True)
    tokenizer.save(str(run / "tokenizer.json"))

    from my_project.model import ChunkAutoencoder

    torch.manual_seed(0)
    model = ChunkAutoencoder(vocab_size=tokenizer.get_vocab_size())
    ids = torch.tensor(tokenizer.encode(NOTES, add_special_tokens=False).ids)
    chunks = ids[: len(ids) // 4 * 4].view(-1, 4)
    optimiser = torch.optim.Adam(model.parameters(), lr=3e-3)
    for _ in range(300):  # enough to reconstruct most of this short text at sigma 0
        loss = torch.nn.functional.cross_entropy(model.decode(model.encode(chunks)).flatten(0, 1), chunks.flatten())
        optimiser.zero_grad()
        loss.backward()
        optimiser.step()
    torch.save(model.state_dict(), run / "step_40000.pt")
    (tmp_path / "my_codec.py").write_text(python_block("# my_codec.py"), encoding="utf-8")
    (tmp_path / "export_onnx.py").write_text(python_block("# export_onnx.py"), encoding="utf-8")
    return tmp_path, model.eval(), tokenizer


def correct_at_sigma0(model, tokenizer) -> int:
    """Independently of chunkscope: tokens of notes.txt cut into chunks of 4 (the last padded),
    decoded from the encoder's mean, argmax right over the real tokens (common practice)."""
    ids = tokenizer.encode(NOTES, add_special_tokens=False).ids
    pad = tokenizer.token_to_id("<pad>")
    padded = torch.tensor(ids + [pad] * (-len(ids) % 4)).view(-1, 4)
    with torch.no_grad():
        decoded = model.decode(model.encode(padded)).argmax(-1).flatten()[: len(ids)]
    return int((decoded == torch.tensor(ids)).sum())


def curve0(folder: Path) -> dict:
    (sweep,) = list(folder.glob("*/sweep.json"))
    data = json.loads(sweep.read_text(encoding="utf-8"))
    return data, next(c for c in data["curves"] if c["sigma"] == 0)


def test_the_adapter_in_the_readme_is_about_twenty_lines():
    code = [line for line in python_block("# my_codec.py").splitlines() if line.strip()]
    assert 15 <= len(code) <= 25, len(code)  # issue 10: "a complete adapter of about 20 lines"


@pytest.mark.filterwarnings("ignore::DeprecationWarning")  # the TorchScript ONNX exporter (dynamo=False) warns it is legacy
def test_the_readme_section_runs_as_written(user_project, capsys):
    pytest.importorskip("onnxruntime")
    pytest.importorskip("onnx")
    root, model, tokenizer = user_project
    lines = shell_lines()
    assert lines[0] == "chunkscope sweep runs/ae-7/step_40000.pt --adapter my_codec.py --text notes.txt --out results/"
    assert "python export_onnx.py" in lines
    for line in lines:
        argv = shlex.split(line)
        if argv[0] == "chunkscope":
            assert main(argv[1:] + ["--quiet"]) == 0, capsys.readouterr().err
        else:
            assert argv == ["python", "export_onnx.py"]
            runpy.run_path(str(root / "export_onnx.py"), run_name="__main__")
    err = capsys.readouterr().err
    assert f"running the adapter code in {root / 'my_codec.py'} (sha256 {file_sha256(root / 'my_codec.py')})" in err

    data, zero = curve0(root / "results")
    assert data["provenance"]["codec"]["adapter_sha256"] == file_sha256(root / "my_codec.py")
    correct, tokens = correct_at_sigma0(model, tokenizer), len(tokenizer.encode(NOTES, add_special_tokens=False).ids)
    assert correct > tokens / 2  # the little model learned something, so the comparison below means something
    repeats = data["settings"]["repeats"]  # at sigma 0 every repeat decodes the same
    assert (zero["tokens"], zero["correct"]) == (tokens * repeats, correct * repeats)

    onnx, onnx_zero = curve0(root / "results-onnx")
    assert onnx["provenance"]["codec"]["opened_as"] == "onnx"
    manifest = json.loads((root / "exported" / "ae-7-onnx" / "codec.json").read_text(encoding="utf-8"))
    assert manifest["pad_id"] == tokenizer.token_to_id("<pad>") and manifest["variational"] is False
    # the same model two ways in: accuracies within 1e-3 at every sigma (issue 10)
    adapter_curves = {c["sigma"]: c["token_accuracy"] for c in data["curves"]}
    for c in onnx["curves"]:
        assert abs(c["token_accuracy"] - adapter_curves[c["sigma"]]) <= 1e-3
