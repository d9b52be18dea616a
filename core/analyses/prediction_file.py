"""The generator predictions file of DESIGN.md ("Generator predictions"): write it, read it, check it.

One safetensors file: tensor `latents` float32 [N, S, D] (S predicted vectors per chunk),
tensor `token_ids` int64 [N, K] (the true chunks, the ragged last one padded with the
codec's pad id), metadata `chunkscope.predictions` = JSON {"version": 1, "codec_sha256",
"note"} and optional `chunkscope.text` (the text the chunks were cut from, UTF-8).

`write_predictions` needs only numpy and safetensors: a user can copy it beside their
own generator. `read_predictions` is the one validator of such a file; `check_against`
holds it against the codec it is meant for. Each failure is one sentence naming the file.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from core.errors import ChunkscopeError

PREDICTIONS_KEY = "chunkscope.predictions"
TEXT_KEY = "chunkscope.text"
PREDICTIONS_VERSION = 1


class PredictionsError(ChunkscopeError):
    """A predictions file cannot be used; the message names the file and what is wrong."""


def write_predictions(path, latents, token_ids, codec_sha256: str, note: str, text: str | None = None) -> None:
    """Write a predictions file (DESIGN.md "Generator predictions").

    latents: [N, S, D] (S samples per chunk, S = 1 for a point predictor), stored as float32;
    token_ids: [N, K] true chunks, the last one padded with the codec's pad id, stored as int64;
    codec_sha256: sha256 of the codec file the latents belong to; note: free text (your generator's name);
    text: optionally the text the chunks were cut from.
    Copy this function beside your own generator: it needs numpy and safetensors only.
    """
    from safetensors.numpy import save_file

    latents = np.ascontiguousarray(np.asarray(latents, dtype=np.float32))
    token_ids = np.ascontiguousarray(np.asarray(token_ids, dtype=np.int64))
    if latents.ndim != 3 or token_ids.ndim != 2 or latents.shape[0] != token_ids.shape[0]:
        raise ValueError(f"latents must be [N, S, D] and token_ids [N, K] with the same N, not {latents.shape} and {token_ids.shape}")
    metadata = {PREDICTIONS_KEY: json.dumps({"version": PREDICTIONS_VERSION, "codec_sha256": str(codec_sha256), "note": str(note)})}
    if text is not None:
        metadata[TEXT_KEY] = text
    path = Path(path)
    staging = path.with_name(f".{path.name}.partial")
    save_file({"latents": latents, "token_ids": token_ids}, str(staging), metadata=metadata)
    os.replace(staging, path)


@dataclass
class Predictions:
    """A validated predictions file."""

    path: str
    latents: np.ndarray  # float32 [N, S, D]
    token_ids: np.ndarray  # int64 [N, K]
    codec_sha256: str
    note: str
    text: str | None
    file_sha256: str

    @property
    def num_chunks(self) -> int:
        return int(self.latents.shape[0])

    @property
    def samples(self) -> int:
        return int(self.latents.shape[1])

    @property
    def latent_dim(self) -> int:
        return int(self.latents.shape[2])

    @property
    def chunk_size(self) -> int:
        return int(self.token_ids.shape[1])

    def provenance(self) -> dict:
        return {"path": self.path, "sha256": self.file_sha256, "codec_sha256": self.codec_sha256, "note": self.note,
                "chunks": self.num_chunks, "samples": self.samples, "has_text": self.text is not None}


def is_predictions_file(path) -> bool:
    """A safetensors file whose header carries the predictions metadata (for drag and drop)."""
    try:
        with open(path, "rb") as handle:
            size = int.from_bytes(handle.read(8), "little")
            if not 0 < size < 100_000_000:
                return False
            header = json.loads(handle.read(size))
    except (OSError, ValueError):
        return False
    return isinstance(header, dict) and PREDICTIONS_KEY in (header.get("__metadata__") or {})


def read_predictions(path) -> Predictions:
    """The one validator of a predictions file's own contents (not yet held against a codec)."""
    from safetensors import SafetensorError, safe_open

    from core.codecs.checkpoint import file_sha256

    path = Path(path)
    label = str(path)
    if not path.is_file():
        raise PredictionsError(f"{label} does not exist or is not a file.")
    try:
        with safe_open(str(path), framework="numpy") as handle:
            keys = set(handle.keys())
            metadata = handle.metadata() or {}
            for key in ("latents", "token_ids"):
                if key not in keys:
                    raise PredictionsError(f"{label} is not a predictions file: it holds no tensor '{key}'.")
            latents = handle.get_tensor("latents")
            token_ids = handle.get_tensor("token_ids")
    except PredictionsError:
        raise
    except (SafetensorError, OSError, ValueError, TypeError) as exc:
        raise PredictionsError(f"{label} is not a readable safetensors file ({str(exc).rstrip('.')}).") from None
    if PREDICTIONS_KEY not in metadata:
        raise PredictionsError(f"{label} is not a predictions file: its metadata has no '{PREDICTIONS_KEY}' entry.")
    try:
        meta = json.loads(metadata[PREDICTIONS_KEY])
    except ValueError:
        raise PredictionsError(f"{label} has damaged '{PREDICTIONS_KEY}' metadata: it is not valid JSON.") from None
    if not isinstance(meta, dict) or not isinstance(meta.get("codec_sha256"), str) or not isinstance(meta.get("version"), int):
        raise PredictionsError(f"{label} has '{PREDICTIONS_KEY}' metadata without a version number and a codec_sha256 string.")
    if meta["version"] > PREDICTIONS_VERSION:
        raise PredictionsError(f"{label} is predictions format version {meta['version']}, newer than this tool reads "
                               f"({PREDICTIONS_VERSION}); update chunkscope.")
    if latents.dtype != np.float32 or latents.ndim != 3:
        raise PredictionsError(f"{label}: 'latents' must be float32 [N, S, D], not {latents.dtype} {list(latents.shape)}.")
    if not np.issubdtype(token_ids.dtype, np.integer) or token_ids.ndim != 2:
        raise PredictionsError(f"{label}: 'token_ids' must be int64 [N, K], not {token_ids.dtype} {list(token_ids.shape)}.")
    n, s, _ = latents.shape
    if s == 0:
        raise PredictionsError(f"{label} holds S = 0 samples per chunk; it needs at least one predicted vector per chunk.")
    if n == 0:
        raise PredictionsError(f"{label} holds no chunks (N = 0).")
    if token_ids.shape[0] != n:
        raise PredictionsError(f"{label} holds latents for N = {n} chunks but token_ids for {token_ids.shape[0]}.")
    bad = ~np.isfinite(latents)
    if bad.any():
        chunk = int(np.argwhere(bad)[0][0])
        raise PredictionsError(f"{label} holds {int(bad.sum())} non-finite latent values (the first in chunk {chunk}).")
    text = metadata.get(TEXT_KEY)
    return Predictions(label, latents, token_ids.astype(np.int64), meta["codec_sha256"], str(meta.get("note", "")),
                       text, file_sha256(path))


def check_against(predictions: Predictions, codec) -> None:
    """The file belongs to this codec: same sha256, K, D, and token ids inside its vocabulary."""
    label = predictions.path
    sha = getattr(codec, "sha256", "")
    if sha and predictions.codec_sha256 != sha:
        raise PredictionsError(f"{label} was made for the codec with sha256 {predictions.codec_sha256[:12]}…, but "
                               f"{codec.name} has sha256 {sha[:12]}…; regenerate the predictions with this codec.")
    if predictions.chunk_size != codec.chunk_size:
        raise PredictionsError(f"{label} holds chunks of K = {predictions.chunk_size} tokens, but {codec.name} "
                               f"takes K = {codec.chunk_size}.")
    if predictions.latent_dim != codec.latent_dim:
        raise PredictionsError(f"{label} holds latents of D = {predictions.latent_dim} dimensions, but {codec.name} "
                               f"has D = {codec.latent_dim}.")
    ids = predictions.token_ids
    outside = (ids < 0) | (ids >= codec.vocab_size)
    if outside.any():
        where = np.argwhere(outside)[0]
        raise PredictionsError(f"{label} holds token id {int(ids[tuple(where)])} (chunk {int(where[0])}), outside "
                               f"{codec.name}'s vocabulary of {codec.vocab_size}.")
