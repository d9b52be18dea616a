"""ONNX codec folders (DESIGN.md, "Three ways to open a codec"): the user's tiny torch
codec exported with torch.onnx.export opens with no code run, decodes like the torch model,
sweeps via the CLI, and every bad folder is one sentence naming it."""

from __future__ import annotations

import builtins
import json
import shutil
from pathlib import Path

import pytest
import torch

ort = pytest.importorskip("onnxruntime")
pytest.importorskip("onnx")

from core.cli import main
from core.codecs.adapter import load_with_adapter, path_sha256
from core.codecs.contract import GradientsUnavailable
from core.codecs.onnx import OnnxCodecError, load_onnx_codec
from core.codecs.open import open_codec
from core.errors import ChunkscopeError
from tests.test_core_adapter import TEXT, one_sentence, write_user_model

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")  # the TorchScript exporter (dynamo=False) warns it is legacy


class _Encoder(torch.nn.Module):
    def __init__(self, model, with_std: bool = False):
        super().__init__()
        self.model, self.with_std = model, with_std

    def forward(self, ids):
        mean = self.model.encode_mean(ids)
        return (mean, torch.nn.functional.softplus(mean) + 0.01) if self.with_std else mean


class _Decoder(torch.nn.Module):
    def __init__(self, model):
        super().__init__()
        self.model = model

    def forward(self, z):
        return self.model.decode_logits(z)


def export(module, example, path: Path, input_name: str, output_names: list[str], dynamic: bool = True) -> None:
    axes = {input_name: {0: "batch"}} | {name: {0: "batch"} for name in output_names}
    torch.onnx.export(module, (example,), str(path), input_names=[input_name], output_names=output_names,
                      dynamic_axes=axes if dynamic else None, dynamo=False)


def write_onnx_folder(folder: Path, user_codec, variational: bool = False, **manifest_changes) -> Path:
    """The README's export recipe: encoder.onnx, decoder.onnx, tokenizer.json, codec.json."""
    folder.mkdir(parents=True, exist_ok=True)
    model = user_codec.model
    k, d = user_codec.chunk_size, user_codec.latent_dim
    outputs = ["mean", "std"] if variational else ["mean"]
    export(_Encoder(model, variational), torch.zeros(2, k, dtype=torch.long), folder / "encoder.onnx", "ids", outputs)
    export(_Decoder(model), torch.zeros(2, d), folder / "decoder.onnx", "z", ["logits"])
    user_codec.tokenizer.save(str(folder / "tokenizer.json"))
    manifest = {"format": "chunkscope-onnx", "version": 1, "chunk_size": k, "latent_dim": d,
                "vocab_size": user_codec.vocab_size, "pad_id": 0, "variational": variational, "card": {"note": "tiny export"}}
    manifest |= manifest_changes
    (folder / "codec.json").write_text(json.dumps(manifest), encoding="utf-8")
    return folder


@pytest.fixture(scope="module")
def exported(tmp_path_factory, tokenizer):
    root = tmp_path_factory.mktemp("onnx")
    adapter, checkpoint = write_user_model(root / "run", tokenizer)
    torch_codec = load_with_adapter(checkpoint, str(adapter))
    folder = write_onnx_folder(root / "tiny-onnx", torch_codec.codec)
    return torch_codec, folder


@pytest.fixture()
def bad_copy(exported, tmp_path):
    """A fresh copy of the good folder to break."""
    copy = tmp_path / "broken-onnx"
    shutil.copytree(exported[1], copy)
    return copy


def test_onnx_folder_decodes_like_the_torch_model(exported):
    torch_codec, folder = exported
    codec = load_onnx_codec(folder)
    assert codec.source.opened_as == "onnx" and codec.source.sha256 == path_sha256(folder) and not codec.supports_gradients
    assert codec.card == {"note": "tiny export"} and codec.name == "tiny-onnx"
    ids = torch.randint(0, codec.vocab_size, (37, codec.chunk_size), generator=torch.Generator().manual_seed(1))
    mean, std = codec.encode(ids)
    want, _ = torch_codec.encode(ids)
    assert std is None and torch.allclose(mean, want, atol=1e-4)
    z = want + 0.3 * torch.randn(want.shape, generator=torch.Generator().manual_seed(2))
    assert torch.allclose(codec.decode(z), torch_codec.decode(z), atol=1e-4)  # same model, two runtimes
    with pytest.raises(GradientsUnavailable):
        codec.decode_with_grad(z)


def test_codec_json_opens_the_folder_and_open_codec_dispatches(exported):
    _, folder = exported
    assert load_onnx_codec(folder / "codec.json").source.sha256 == path_sha256(folder)
    assert open_codec(folder).source.opened_as == "onnx"
    assert open_codec(folder / "codec.json").source.opened_as == "onnx"


def test_variational_export(exported, tmp_path):
    torch_codec, _ = exported
    codec = load_onnx_codec(write_onnx_folder(tmp_path / "vae", torch_codec.codec, variational=True))
    _, std = codec.encode(torch.zeros(3, codec.chunk_size, dtype=torch.long))
    assert codec.variational and std is not None and bool((std > 0).all())


def test_sweep_onnx_folder_via_cli_matches_the_adapter(exported, tmp_path, capsys):
    torch_codec, folder = exported
    text = tmp_path / "notes.txt"
    text.write_text(TEXT, encoding="utf-8")
    args = ["--text", str(text), "--sigmas", "0,0.5,2", "--repeats", "2", "--quiet", "--force"]
    assert main(["sweep", str(folder), "--out", str(tmp_path / "a"), *args]) == 0
    err = capsys.readouterr().err
    assert "running the adapter" not in err  # no code runs for an ONNX folder
    run = Path(torch_codec.path).parent
    assert main(["sweep", str(run / "step_100.pt"), "--adapter", str(run / "my_codec.py"), "--out", str(tmp_path / "b"), *args]) == 0
    a = json.loads((tmp_path / "a" / "tiny-onnx" / "sweep.json").read_text(encoding="utf-8"))
    b = json.loads((tmp_path / "b" / "step_100" / "sweep.json").read_text(encoding="utf-8"))
    assert "onnx" in json.dumps(a)

    def accuracies(data):
        found = []

        def walk(x):
            if isinstance(x, dict):
                for key, value in x.items():
                    if key == "token_accuracy" and isinstance(value, float):
                        found.append(value)
                    walk(value)
            elif isinstance(x, list):
                for value in x:
                    walk(value)

        walk(data)
        return found

    acc_a, acc_b = accuracies(a), accuracies(b)
    assert acc_a and len(acc_a) == len(acc_b)
    assert max(abs(x - y) for x, y in zip(acc_a, acc_b)) <= 1e-3  # issue 10: the two ways in agree within 1e-3


def _edit_manifest(folder: Path, **changes) -> None:
    data = json.loads((folder / "codec.json").read_text(encoding="utf-8")) | changes
    (folder / "codec.json").write_text(json.dumps(data), encoding="utf-8")


def _expect(folder: Path, *words: str, path=None) -> str:
    with pytest.raises(ChunkscopeError) as info:
        load_onnx_codec(path or folder)
    one_sentence(str(info.value), str(path or folder), *words)
    return str(info.value)


@pytest.mark.parametrize("missing", ["codec.json", "encoder.onnx", "decoder.onnx", "tokenizer.json"])
def test_missing_file(bad_copy, missing):
    (bad_copy / missing).unlink()
    _expect(bad_copy, f"has no {missing}")


@pytest.mark.parametrize("changes, words", [
    ({"format": "something-else"}, ["chunkscope-onnx"]),
    ({"version": 2}, ["newer than this tool", "update chunkscope"]),
    ({"latent_dim": 0}, ["latent_dim"]),
    ({"chunk_size": "4"}, ["chunk_size"]),
    ({"pad_id": 100000}, ["pad_id"]),
    ({"variational": "no"}, ["variational"]),
    ({"latent_dim": 9}, ["latent_dim = 9", "encoder.onnx"]),  # the manifest disagrees with the models
    ({"chunk_size": 5}, ["chunk_size = 5"]),
    ({"variational": True}, ["mean, std", "encoder.onnx"]),
])
def test_bad_manifest(bad_copy, changes, words):
    _edit_manifest(bad_copy, **changes)
    _expect(bad_copy, *words)


def test_manifest_not_json(bad_copy):
    (bad_copy / "codec.json").write_text("{format: onnx", encoding="utf-8")
    _expect(bad_copy, "not JSON")


def test_corrupt_onnx(bad_copy):
    data = (bad_copy / "decoder.onnx").read_bytes()
    (bad_copy / "decoder.onnx").write_bytes(data[: len(data) // 3])
    _expect(bad_copy, "decoder.onnx", "onnxruntime can load")


def test_vocabulary_differs(bad_copy):
    from core.codecs.tokenizer import train_byte_bpe

    train_byte_bpe([TEXT], 280).save(str(bad_copy / "tokenizer.json"))
    _expect(bad_copy, "tokenizer.json has", "vocab_size")


def test_wrong_names_and_shapes(exported, bad_copy):
    torch_codec, _ = exported
    model = torch_codec.codec.model
    k, d = torch_codec.chunk_size, torch_codec.latent_dim
    export(_Decoder(model), torch.zeros(2, d), bad_copy / "decoder.onnx", "latent", ["logits"])
    _expect(bad_copy, "decoder.onnx", "inputs z", "latent")
    export(_Encoder(model), torch.zeros(2, k, dtype=torch.long), bad_copy / "encoder.onnx", "ids", ["mu"])
    _expect(bad_copy, "encoder.onnx", "outputs mean", "mu")
    export(_Encoder(model), torch.zeros(2, k, dtype=torch.long), bad_copy / "encoder.onnx", "ids", ["mean"], dynamic=False)
    _expect(bad_copy, "encoder.onnx", "fixed batch axis of 2")


def test_without_onnxruntime_one_sentence_naming_the_extra(exported, monkeypatch):
    _, folder = exported
    real_import = builtins.__import__

    def no_onnxruntime(name, *args, **kwargs):
        if name == "onnxruntime" or name.startswith("onnxruntime."):
            raise ImportError("No module named 'onnxruntime'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_onnxruntime)
    with pytest.raises(OnnxCodecError) as info:
        load_onnx_codec(folder)
    assert str(info.value) == "ONNX codecs need onnxruntime: pip install chunkscope[onnx]."


def test_info_and_trend_open_onnx_folders(exported, tmp_path, capsys):
    _, folder = exported
    assert main(["info", str(folder), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["codec"]["opened_as"] == "onnx" and data["codec"]["sha256"] == path_sha256(folder)
    run = tmp_path / "run"
    shutil.copytree(folder, run / "step_300")
    text = tmp_path / "notes.txt"
    text.write_text(TEXT, encoding="utf-8")
    assert main(["trend", str(run), "--text", str(text), "--sigmas", "0,1", "--repeats", "1"]) == 0
    assert "step_300" in capsys.readouterr().out
