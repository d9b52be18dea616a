"""An ONNX codec folder (DESIGN.md, "Three ways to open a codec"): loading runs no code.

The folder holds `codec.json`, `encoder.onnx`, `decoder.onnx` and `tokenizer.json`, run
with onnxruntime on the CPU (an optional extra: `pip install chunkscope[onnx]`).
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np

from core.codecs.adapter import path_sha256
from core.codecs.conformance import check_codec
from core.codecs.contract import CodecSource, OpenedCodec
from core.deferred import torch
from core.errors import ChunkscopeError

ONNX_FORMAT = "chunkscope-onnx"
ONNX_VERSION = 1
MANIFEST = "codec.json"
FILES = (MANIFEST, "encoder.onnx", "decoder.onnx", "tokenizer.json")
SIZES = ("chunk_size", "latent_dim", "vocab_size", "pad_id")


class OnnxCodecError(ChunkscopeError):
    """An ONNX codec folder cannot be used; the message names the folder and the problem."""


def is_onnx_codec(path: str | os.PathLike) -> bool:
    """A folder holding codec.json, or a file named codec.json: what `open_codec` opens as ONNX."""
    path = Path(path)
    return (path.is_dir() and (path / MANIFEST).is_file()) or (path.name == MANIFEST and path.is_file())


def _onnxruntime():
    try:
        import onnxruntime
    except ImportError:
        raise OnnxCodecError("ONNX codecs need onnxruntime: pip install chunkscope[onnx].") from None
    return onnxruntime


def _threads() -> int:
    try:
        return max(1, int(torch.get_num_threads()))
    except Exception:
        return 2


class OnnxCodec:
    """Meets `ChunkCodec` by running two onnxruntime sessions; torch in, torch out."""

    supports_gradients = False

    def __init__(self, manifest: dict[str, Any], encoder, decoder, tokenizer, name: str):
        self.chunk_size = int(manifest["chunk_size"])
        self.latent_dim = int(manifest["latent_dim"])
        self.vocab_size = int(manifest["vocab_size"])
        self.pad_id = int(manifest["pad_id"])
        self.variational = bool(manifest["variational"])
        self.card = dict(manifest.get("card") or {})
        self.name = name
        self.tokenizer = tokenizer
        self._encoder = encoder
        self._decoder = decoder
        self._outputs = ["mean", "std"] if self.variational else ["mean"]

    def encode(self, ids: "torch.Tensor") -> "tuple[torch.Tensor, torch.Tensor | None]":
        feed = {"ids": np.ascontiguousarray(ids.detach().cpu().numpy().astype(np.int64, copy=False))}
        out = self._encoder.run(self._outputs, feed)
        mean = torch.from_numpy(np.asarray(out[0], dtype=np.float32))
        std = torch.from_numpy(np.asarray(out[1], dtype=np.float32)) if self.variational else None
        return mean, std

    def decode(self, z: "torch.Tensor") -> "torch.Tensor":
        feed = {"z": np.ascontiguousarray(z.detach().cpu().float().numpy())}
        (logits,) = self._decoder.run(["logits"], feed)
        return torch.from_numpy(np.asarray(logits, dtype=np.float32))

    def describe(self) -> dict[str, Any]:
        return {"architecture": "ONNX export", "runtime": "onnxruntime (CPU)"}


def _read_manifest(folder: Path, shown: str) -> dict[str, Any]:
    file = folder / MANIFEST
    try:
        manifest = json.loads(file.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, ValueError):
        raise OnnxCodecError(f"{shown}: {MANIFEST} is not JSON.") from None
    except OSError as exc:
        raise OnnxCodecError(f"{shown}: {MANIFEST} cannot be read ({exc.strerror or exc}).") from None
    if not isinstance(manifest, dict):
        raise OnnxCodecError(f"{shown}: {MANIFEST} should hold a JSON object.")
    if manifest.get("format") != ONNX_FORMAT:
        raise OnnxCodecError(f"{shown}: {MANIFEST} should say \"format\": \"{ONNX_FORMAT}\", but it says {manifest.get('format')!r}.")
    version = manifest.get("version")
    if not isinstance(version, int) or isinstance(version, bool) or version < 1:
        raise OnnxCodecError(f"{shown}: {MANIFEST} has an unreadable version {version!r}.")
    if version > ONNX_VERSION:
        raise OnnxCodecError(f"{shown} uses ONNX codec format {version}, newer than this tool reads (up to {ONNX_VERSION}); update chunkscope.")
    for key in SIZES:
        value = manifest.get(key)
        if key not in manifest:
            raise OnnxCodecError(f"{shown}: {MANIFEST} has no {key}.")
        if not isinstance(value, int) or isinstance(value, bool) or value < (0 if key == "pad_id" else 1):
            raise OnnxCodecError(f"{shown}: {MANIFEST} has {key} = {value!r}, which should be a whole number {'>= 0' if key == 'pad_id' else '>= 1'}.")
    if manifest["pad_id"] >= manifest["vocab_size"]:
        raise OnnxCodecError(f"{shown}: {MANIFEST} has pad_id {manifest['pad_id']}, outside the vocabulary of {manifest['vocab_size']} tokens.")
    if not isinstance(manifest.get("variational"), bool):
        raise OnnxCodecError(f"{shown}: {MANIFEST} should say \"variational\": true or false, but it says {manifest.get('variational')!r}.")
    if "card" in manifest and not isinstance(manifest["card"], dict):
        raise OnnxCodecError(f"{shown}: {MANIFEST} has a card that is not a JSON object.")
    return manifest


def _check_io(shown: str, model: str, kind: str, found: list, want: list[tuple[str, str, tuple]]) -> None:
    """Each expected input/output, by name, element type and shape (None = the dynamic batch axis)."""
    names = [x.name for x in found]
    if names != [w[0] for w in want]:
        label = "inputs" if kind == "input" else "outputs"
        raise OnnxCodecError(
            f"{shown}: {model} should have the {label} {', '.join(w[0] for w in want)} (DESIGN.md), but it has {', '.join(names) or 'none'}."
        )
    for arg, (name, dtype, shape) in zip(found, want):
        if arg.type != dtype:
            raise OnnxCodecError(f"{shown}: {model}'s {kind} {name} should be {dtype}, but it is {arg.type}.")
        dims = list(arg.shape or [])
        if len(dims) != len(shape):
            raise OnnxCodecError(f"{shown}: {model}'s {kind} {name} should have {len(shape)} axes, but it has {len(dims)}.")
        if isinstance(dims[0], int) and dims[0] > 0:
            raise OnnxCodecError(f"{shown}: {model}'s {kind} {name} has a fixed batch axis of {dims[0]}; export it with a dynamic batch axis.")
        for axis, (got, expected) in enumerate(zip(dims[1:], shape[1:]), start=1):
            if isinstance(got, int) and got > 0 and got != expected[1]:
                raise OnnxCodecError(
                    f"{shown}: {model}'s {kind} {name} has {got} on axis {axis}, but {MANIFEST} says {expected[0]} = {expected[1]}."
                )


def load_onnx_codec(path: str | os.PathLike) -> OpenedCodec:
    """Open an ONNX codec folder (or its codec.json); every problem is one sentence naming it."""
    given = Path(path)
    folder = given.parent if given.name == MANIFEST and not given.is_dir() else given
    shown = str(path)
    if not given.exists():
        raise OnnxCodecError(f"{shown} does not exist.")
    if not folder.is_dir():
        raise OnnxCodecError(f"{shown} is not an ONNX codec folder (a folder holding {', '.join(FILES)}).")
    for file in FILES:
        if not (folder / file).is_file():
            raise OnnxCodecError(f"{shown} has no {file} (an ONNX codec folder holds {', '.join(FILES)}).")
    manifest = _read_manifest(folder, shown)
    k, d, v = manifest["chunk_size"], manifest["latent_dim"], manifest["vocab_size"]
    from tokenizers import Tokenizer

    try:
        tokenizer = Tokenizer.from_file(str(folder / "tokenizer.json"))
    except Exception:
        raise OnnxCodecError(f"{shown}: tokenizer.json is not a tokenizer the tokenizers library can read.") from None
    if tokenizer.get_vocab_size() != v:
        raise OnnxCodecError(f"{shown}: tokenizer.json has {tokenizer.get_vocab_size()} tokens, but {MANIFEST} says vocab_size = {v}.")

    ort = _onnxruntime()
    options = ort.SessionOptions()
    options.intra_op_num_threads = _threads()
    options.inter_op_num_threads = 1
    options.log_severity_level = 3  # errors only: a bad model becomes our sentence, not a log dump
    sessions = {}
    for file in ("encoder.onnx", "decoder.onnx"):
        try:
            sessions[file] = ort.InferenceSession(str(folder / file), sess_options=options, providers=["CPUExecutionProvider"])
        except Exception as exc:
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
            raise OnnxCodecError(f"{shown}: {file} is not a model onnxruntime can load ({first[:200]}).") from None
    enc, dec = sessions["encoder.onnx"], sessions["decoder.onnx"]
    batch = ("N", None)
    _check_io(shown, "encoder.onnx", "input", enc.get_inputs(), [("ids", "tensor(int64)", (batch, ("chunk_size", k)))])
    outs = [("mean", "tensor(float)", (batch, ("latent_dim", d)))]
    if manifest["variational"]:
        outs.append(("std", "tensor(float)", (batch, ("latent_dim", d))))
    _check_io(shown, "encoder.onnx", "output", enc.get_outputs(), outs)
    _check_io(shown, "decoder.onnx", "input", dec.get_inputs(), [("z", "tensor(float)", (batch, ("latent_dim", d)))])
    _check_io(shown, "decoder.onnx", "output", dec.get_outputs(),
              [("logits", "tensor(float)", (batch, ("chunk_size", k), ("vocab_size", v)))])

    name = folder.resolve().name
    codec = OnnxCodec(manifest, enc, dec, tokenizer, name)
    check_codec(codec, shown)
    return OpenedCodec(codec, CodecSource(path=str(folder), sha256=path_sha256(folder), opened_as="onnx"))
