"""The sweep: for each chunk batch, encode, then per repeat and sigma perturb, decode and score.

Loop order is chunk batch -> repeat -> sigma, so each (chunk, repeat) draws ε once and
reuses it across the grid. At σ = 0 every repeat decodes the same latent, so it is decoded
once per batch and counted `repeats` times. Nothing holds all logits: per sigma a streaming
accumulator, per token a small count of wrong repeats and the decode of repeat 0.

Shards (for running a sweep on several processes or machines)
-------------------------------------------------------------
A sweep is a sum over chunk ranges. Three steps, all NumPy-only and picklable in between:

    plan = plan_sweep(codec, chunks, settings)          # once, on the client
    shard = sweep_shard(codec, ids, plan, start, stop)  # per range, anywhere
    result = merge_shards(plan, shards, chunks, codec)  # once, on the client: a SweepResult

- `plan_sweep` validates the settings and measures all that needs the whole text: the
  frequency bucket of each token type, and for data-scale noise the text's r (one encoding
  pass, block by block, keeping no latent). A SweepPlan is O(vocabulary + latent dim). That pass
  shards too: `scale_parts` (core.engine.noise) over ENCODE_BATCH-aligned ranges, the parts added
  in order by `LatentScale.of_parts`, then `plan_sweep(..., scale=)`: the same plan bit for bit.
- `sweep_shard` sweeps chunks start..stop. `start` must be a multiple of NOISE_BLOCK and `stop`
  one too or the text's last chunk, so draw_eps gives the noise of the whole-text sweep.
  `ids` is the whole Chunks or just token_ids[start*K : stop*K]. The shard encodes its own
  batches unless `encoded=` (the whole text's Encoded) is given. It returns a SweepShard:
  per-sigma accumulator states, the range's per-token wrong_counts/decoded rows, Σ mean².
- `merge_shards` takes shards in any order; they must cover 0..n_chunks exactly once. Counts
  equal the one-process sweep exactly; float sums agree to rounding. `plan.shard_ranges(n)`
  cuts on whole `batch_chunks` batches, so every decode batch is the one-process sweep's own
  (decodes are then bitwise the same even on a BLAS whose rows depend on the batch size).
- `run_sweep` is exactly plan + one shard + merge in this process.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import platform
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Sequence

import numpy as np

import core
from core.codecs.contract import opened
from core.deferred import inference_mode, torch
from core.errors import ChunkscopeError, SettingsError, SweepCancelled
from core.outputs.files import result_folder, staged_folder
from core.outputs.reading import Damaged, json_kind, need
from core.engine.noise import (
    NOISE_BLOCK, NOISE_MODELS, Encoded, LatentScale, Progress, ShouldStop, check_noise, draw_eps, encode_chunks, measure_scale,
    noise_model, noise_scale,
)
from core.engine.metrics import FREQUENCY_EDGES, SigmaAccumulator, SigmaMetrics, frequency_buckets  # noqa: F401
from core.engine.text import Chunks
from core.engine.tolerance import (  # noqa: F401 (re-exported; the vocabulary lives in core.engine.tolerance)
    LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, Tolerance, loss_tolerance_at, tolerance_at, tolerance_text, tolerances_of,
)
from core.codecs.tokenizer import token_display

DEFAULT_NOISE = "data-scale"
DEFAULT_REPEATS = 4
DEFAULT_SEED = 0
# relative (data-scale) sigmas: 0, then 24 steps growing by a factor ~1.26 from 0.01 to 2
DEFAULT_SIGMAS = (0.0,) + tuple(round(0.01 * (200 ** (i / 23)), 5) for i in range(24))
DEFAULT_BATCH_CHUNKS = 512


def parse_sigmas(spec: str) -> tuple[float, ...]:
    """'a:b:step' (b included when it lies on the grid) or a comma-separated list."""
    spec = spec.strip()
    try:
        if ":" in spec:
            parts = [float(x) for x in spec.split(":")]
            if len(parts) != 3:
                raise ValueError
            a, b, step = parts
            if step <= 0 or b < a:
                raise SettingsError(f"the sigma range {spec!r} needs start <= stop and a positive step.")
            count = int(math.floor((b - a) / step + 1e-9)) + 1
            if count > 10_000:
                raise SettingsError(f"the sigma range {spec!r} has {count} points; at most 10000 are allowed.")
            return tuple(round(a + i * step, 10) for i in range(count))
        return tuple(float(x) for x in spec.replace(" ", "").split(",") if x)
    except SettingsError:
        raise
    except ValueError:
        raise SettingsError(f"sigmas must look like 0:1:0.05 or 0,0.1,0.2, not {spec!r}.") from None


@dataclass(frozen=True)
class SweepSettings:
    sigmas: tuple[float, ...] = DEFAULT_SIGMAS
    repeats: int = DEFAULT_REPEATS
    noise: str = DEFAULT_NOISE
    seed: int = DEFAULT_SEED
    batch_chunks: int = DEFAULT_BATCH_CHUNKS

    def validated(self, codec=None) -> "SweepSettings":
        """The one validator for sweep settings: returns a cleaned copy or raises SettingsError.

        σ = 0 is always on the cleaned grid (added when missing): every tolerance and loss is then
        read against a measured σ = 0, never against a grid that starts above it. It costs one
        decode per chunk batch, since every repeat is the same there."""
        sigmas = tuple(float(s) for s in self.sigmas)
        if not sigmas:
            raise SettingsError("the sigma grid is empty.")
        if any(not math.isfinite(s) or s < 0 for s in sigmas):
            raise SettingsError("every sigma must be a finite number >= 0.")
        sigmas = tuple(sorted(set(sigmas) | {0.0}))
        if not isinstance(self.repeats, int) or not 1 <= self.repeats <= 10_000:
            raise SettingsError(f"repeats must be a whole number from 1 to 10000, not {self.repeats!r}.")
        noise_model(self.noise)
        if not isinstance(self.seed, int) or self.seed < 0:
            raise SettingsError(f"the seed must be a whole number >= 0, not {self.seed!r}.")
        if isinstance(self.batch_chunks, bool) or not isinstance(self.batch_chunks, int) or self.batch_chunks < 1:
            raise SettingsError(f"the batch must be a whole number of chunks >= 1, not {self.batch_chunks!r}.")
        if codec is not None:
            check_noise(self.noise, codec)
        batch = max(NOISE_BLOCK, (int(self.batch_chunks) // NOISE_BLOCK) * NOISE_BLOCK)
        return SweepSettings(sigmas=sigmas, repeats=self.repeats, noise=self.noise, seed=self.seed, batch_chunks=batch)

    def to_dict(self) -> dict:
        return {"sigmas": list(self.sigmas), "repeats": self.repeats, "noise": self.noise, "seed": self.seed}


def critical_sigmas(sigmas: Sequence[float], wrong_counts: np.ndarray, repeats: int) -> np.ndarray:
    """Per token: the smallest grid sigma at which it is wrong in at least half the repeats (NaN: never)."""
    grid = np.asarray(sigmas, dtype=np.float64)
    out = np.empty(len(wrong_counts), dtype=np.float64)
    threshold = (int(repeats) + 1) // 2  # 2·w >= repeats  <=>  w >= ceil(repeats / 2)
    for a in range(0, len(wrong_counts), 1 << 20):  # in row blocks: no [T, S] temporary of int64
        broken = wrong_counts[a : a + (1 << 20)] >= threshold
        first = np.argmax(broken, axis=1)
        block = grid[first]
        block[~broken.any(axis=1)] = np.nan
        out[a : a + len(block)] = block
    return out


@dataclass
class SweepResult:
    settings: SweepSettings
    provenance: dict[str, Any]
    curves: list[SigmaMetrics]
    tolerances: list[Tolerance]
    chunks: Chunks
    wrong_counts: np.ndarray  # [T, S] repeats in which token t decoded wrong at sigma s
    decoded: np.ndarray  # [T, S] token decoded in repeat 0
    critical_sigma: np.ndarray  # [T], NaN where the token never broke on the grid
    latent_rms: float
    elapsed_s: float
    decoded_chunks: int
    token_text: dict[int, str] = field(default_factory=dict)  # readable form of every id in the text or decoded
    loss_tolerances: list[Tolerance] = field(default_factory=list)  # kind "loss", one per LOSS_LEVELS

    def display(self, token_id: int) -> str:
        return self.token_text.get(int(token_id), f"#{int(token_id)}")

    @property
    def sigmas(self) -> tuple[float, ...]:
        return self.settings.sigmas

    @property
    def codec_name(self) -> str:
        return self.provenance["codec"]["name"]

    @property
    def accuracy_at_zero(self) -> float:
        """Token accuracy at σ = 0 (NaN when the grid has no σ = 0)."""
        return self.curves[0].token_accuracy if self.curves and self.sigmas[0] == 0 else float("nan")

    def tolerance(self, level: float, kind: str = "absolute") -> Tolerance:
        for t in self.loss_tolerances if kind == LOSS else self.tolerances:
            if abs(t.level - level) < 1e-12:
                return t
        accuracy = [c.token_accuracy for c in self.curves]
        if kind == LOSS:
            return loss_tolerance_at(self.sigmas, accuracy, level, self.chunks.num_tokens)
        return tolerance_at(self.sigmas, accuracy, level, self.chunks.num_tokens)

    def token_accuracy_curve(self, token_index: int) -> np.ndarray:
        return 1.0 - self.wrong_counts[token_index].astype(np.float64) / self.settings.repeats

    def to_json_dict(self) -> dict[str, Any]:
        return {
            "provenance": self.provenance,
            "settings": self.settings.to_dict(),
            "latent_rms": self.latent_rms,
            "elapsed_s": self.elapsed_s,
            "decoded_chunks": self.decoded_chunks,
            "chunks_per_second": self.decoded_chunks / self.elapsed_s if self.elapsed_s > 0 else None,
            "tolerances": [t.to_dict() for t in self.tolerances],
            "loss_tolerances": [t.to_dict() for t in self.loss_tolerances],
            "curves": [c.to_dict() for c in self.curves],
        }

    def curves_csv(self) -> str:
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        k = len(self.curves[0].position_accuracy) if self.curves else 0
        writer.writerow(
            ["sigma", "token_accuracy", "accuracy_low", "accuracy_high", "chunk_exact_rate", "nll", "brier", "ece", "tokens"]
            + [f"position_{i}_accuracy" for i in range(k)]
        )
        for c in self.curves:
            writer.writerow(
                [c.sigma, c.token_accuracy, c.accuracy_low, c.accuracy_high, c.chunk_exact_rate, c.nll, c.brier, c.ece, c.tokens]
                + c.position_accuracy
            )
        return out.getvalue()

    def tokens_csv(self) -> str:
        out = io.StringIO()
        self.write_tokens_csv(out)
        return out.getvalue()

    def write_tokens_csv(self, stream) -> None:
        """tokens.csv into an open text stream, block by block (a long text never becomes one string)."""
        writer = csv.writer(stream, lineterminator="\n")
        writer.writerow(["index", "token_id", "text", "char_start", "char_end", "chunk", "position", "critical_sigma"])
        text, k = self.chunks.text, self.chunks.chunk_size
        for a0 in range(0, self.chunks.num_tokens, 65536):
            b0 = min(a0 + 65536, self.chunks.num_tokens)
            spans = self.chunks.spans[a0:b0].tolist()
            ids = self.chunks.token_ids[a0:b0].tolist()
            crit = [("" if c != c else f"{c:.6g}") for c in self.critical_sigma[a0:b0].tolist()]
            writer.writerows([t, i, text[a:b], a, b, t // k, t % k, c]
                             for t, i, (a, b), c in zip(range(a0, b0), ids, spans, crit))

    def write(self, directory: str | os.PathLike, force: bool = False) -> Path:
        """Write sweep.json, curves.csv, tokens.csv and arrays.npz into a fresh directory, atomically."""
        directory = Path(directory)
        with staged_folder(directory, force, SWEEP_FOLDER) as staging:
            self.write_into(staging)
        return directory

    def write_into(self, folder: Path) -> None:
        """The sweep's files, written into an existing empty folder (a staging folder)."""
        folder.mkdir(parents=True, exist_ok=True)
        (folder / "sweep.json").write_text(json.dumps(self.to_json_dict(), indent=1, allow_nan=True), encoding="utf-8")
        (folder / "curves.csv").write_text(self.curves_csv(), encoding="utf-8")
        with open(folder / "tokens.csv", "w", encoding="utf-8", newline="") as stream:
            self.write_tokens_csv(stream)
        (folder / "text.txt").write_text(self.chunks.text, encoding="utf-8")
        (folder / "vocab.json").write_text(json.dumps({str(k): v for k, v in self.token_text.items()}), encoding="utf-8")
        np.savez_compressed(
            folder / "arrays.npz",
            token_ids=self.chunks.token_ids,
            spans=self.chunks.spans,
            wrong_counts=self.wrong_counts,
            decoded=self.decoded,
            critical_sigma=self.critical_sigma,
        )


SWEEP_FOLDER = result_folder("sweep.json", "arrays.npz")
SWEEP_ARRAYS = {"token_ids": "integer", "spans": "integer", "wrong_counts": "integer", "decoded": "integer", "critical_sigma": "floating"}


def read_sweep(directory: str | os.PathLike, name: str | None = None) -> SweepResult:
    """Reopen a sweep written by `SweepResult.write` (from the command line or the workbench).

    `name` is how errors name the folder (a workspace passes its own file's name, not the
    temporary folder it unpacked into)."""
    directory = Path(directory)
    label = name or str(directory)
    if not directory.is_dir():
        raise ChunkscopeError(f"{label} is not a sweep folder: it is not a folder.")
    raw = {}
    for file in ("sweep.json", "arrays.npz", "text.txt"):
        if not (directory / file).is_file():
            raise ChunkscopeError(f"{label} is not a sweep folder: {file} is missing.")
    try:
        raw["sweep.json"] = json.loads((directory / "sweep.json").read_text(encoding="utf-8"))
    except OSError as exc:
        raise ChunkscopeError(f"{label}/sweep.json cannot be read: {exc.strerror or exc}.") from None
    except ValueError:
        raise ChunkscopeError(f"{label}/sweep.json is damaged: it is not valid JSON.") from None
    raw["arrays.npz"] = _read_npz(directory / "arrays.npz", f"{label}/arrays.npz")
    try:
        raw["text.txt"] = (directory / "text.txt").read_text(encoding="utf-8")
        vocab_path = directory / "vocab.json"
        raw["vocab.json"] = json.loads(vocab_path.read_text(encoding="utf-8")) if vocab_path.exists() else {}
    except OSError as exc:
        raise ChunkscopeError(f"{label} cannot be read: {exc.strerror or exc}.") from None
    except ValueError:
        raise ChunkscopeError(f"{label} holds a damaged text.txt or vocab.json: it is not valid UTF-8 text or JSON.") from None
    return _sweep_from_files(label, raw)


def _read_npz(path: Path, label: str) -> dict[str, np.ndarray]:
    """Every array of an .npz, never unpickling anything."""
    try:
        with np.load(path, allow_pickle=False) as npz:
            return {key: npz[key] for key in npz.files}
    except ValueError as exc:
        if "pickle" in str(exc):
            raise ChunkscopeError(
                f"{label} is damaged or was not written by chunkscope: it holds Python objects, which are never loaded."
            ) from None
        raise ChunkscopeError(f"{label} is damaged: it is not a NumPy archive chunkscope can read.") from None
    except AttributeError:  # a bare .npy array, not an archive
        raise ChunkscopeError(f"{label} is damaged or was not written by chunkscope: it is not a NumPy archive.") from None
    except Exception:  # zipfile.BadZipFile, zlib.error, EOFError, OSError: a broken archive
        raise ChunkscopeError(f"{label} is damaged: it is not a NumPy archive chunkscope can read.") from None


def _sweep_from_files(label: str, raw: dict[str, Any]) -> SweepResult:
    """The one validator of a sweep folder's contents: a SweepResult, or one sentence naming the file."""
    file = "sweep.json"
    try:
        data = raw[file]
        if not isinstance(data, dict):
            raise Damaged(f"it holds {json_kind(data)}, not an object")
        s = need(data, "settings", dict)
        sigmas = need(s, "sigmas", list, "settings")
        if not sigmas or any(isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x) or x < 0 for x in sigmas):
            raise Damaged("the settings' sigmas are not a list of numbers >= 0")
        if any(b <= a for a, b in zip(sigmas, sigmas[1:])):
            raise Damaged("the settings' sigmas are not in increasing order")
        repeats = need(s, "repeats", int, "settings")
        noise = need(s, "noise", str, "settings")
        seed = need(s, "seed", int, "settings")
        if repeats < 1 or seed < 0 or noise not in NOISE_MODELS:
            raise Damaged("its settings hold a repeat count, seed or noise model no sweep can have")
        prov = need(data, "provenance", dict)
        codec = need(prov, "codec", dict, "provenance")
        need(codec, "name", str, "provenance.codec")
        config = need(codec, "config", dict, "provenance.codec")
        chunk_size = need(config, "chunk_size", int, "provenance.codec.config")
        pad_id = need(config, "pad_id", int, "provenance.codec.config")
        if chunk_size < 1 or pad_id < 0:
            raise Damaged("the codec's chunk size or pad id is out of range")
        text_info = need(prov, "text", dict, "provenance")
        text_sha = need(text_info, "sha256", str, "provenance.text")
        curves_raw = need(data, "curves", list)
        if len(curves_raw) != len(sigmas):
            raise Damaged(f"it has {len(curves_raw)} curve points for {len(sigmas)} sigmas")
        try:
            curves = [SigmaMetrics.from_dict(c) for c in curves_raw]
        except (TypeError, ValueError, AttributeError):
            raise Damaged("its curves do not hold the metrics of a sweep") from None
        try:
            tolerances = [Tolerance.from_dict(t) for t in need(data, "tolerances", list)]
            loss = None
            if "loss_tolerances" in data:
                loss = [Tolerance.from_dict(t, LOSS) for t in need(data, "loss_tolerances", list)]
        except (TypeError, KeyError, ValueError, AttributeError):
            raise Damaged("its tolerances are not tolerances") from None
        latent_rms = need(data, "latent_rms", (int, float))
        elapsed = need(data, "elapsed_s", (int, float))
        decoded_chunks = need(data, "decoded_chunks", int)

        file = "arrays.npz"
        arrays = raw[file]
        for key, kind in SWEEP_ARRAYS.items():
            if key not in arrays:
                raise Damaged(f"the array {key} is missing")
            if not np.issubdtype(arrays[key].dtype, getattr(np, kind)):
                raise Damaged(f"the array {key} holds {arrays[key].dtype} values, not {kind} numbers")
        if arrays["token_ids"].ndim != 1:
            raise Damaged(f"the array token_ids has shape {list(arrays['token_ids'].shape)}, not one id per token")
        n_tokens, n_sigma = len(arrays["token_ids"]), len(sigmas)
        shapes = {"spans": (n_tokens, 2), "wrong_counts": (n_tokens, n_sigma), "decoded": (n_tokens, n_sigma),
                  "critical_sigma": (n_tokens,)}
        for key, shape in shapes.items():
            if arrays[key].shape != shape:
                raise Damaged(f"the array {key} has shape {list(arrays[key].shape)}, not {list(shape)} "
                               f"({n_tokens} tokens, {n_sigma} sigmas)")

        file = "text.txt"
        text = raw[file]
        if n_tokens and (int(arrays["spans"].min()) < 0 or int(arrays["spans"].max()) > len(text)):
            raise Damaged("it does not match the token spans in arrays.npz")

        file = "vocab.json"
        vocab = raw[file]
        if not isinstance(vocab, dict) or not all(isinstance(v, str) for v in vocab.values()):
            raise Damaged("it is not a map from token ids to their text")
        try:
            token_text = {int(k): v for k, v in vocab.items()}
        except ValueError:
            raise Damaged("it is not a map from token ids to their text") from None
    except Damaged as exc:
        raise ChunkscopeError(f"{label}/{file} is damaged: {exc}.") from None
    settings = SweepSettings(sigmas=tuple(float(x) for x in sigmas), repeats=repeats, noise=noise, seed=seed)
    chunks = Chunks(
        text=text,
        text_sha256=text_sha,
        token_ids=arrays["token_ids"],
        spans=arrays["spans"],
        chunk_size=chunk_size,
        pad_id=pad_id,
    )
    if loss is None:  # written before the loss tolerance: measure it from the stored curve
        loss = tolerances_of(settings.sigmas, [c.token_accuracy for c in curves], chunks.num_tokens)[1]
    return SweepResult(
        settings=settings,
        provenance=prov,
        curves=curves,
        tolerances=tolerances,
        loss_tolerances=loss,
        chunks=chunks,
        wrong_counts=arrays["wrong_counts"],
        decoded=arrays["decoded"],
        critical_sigma=arrays["critical_sigma"],
        latent_rms=float(latent_rms),
        elapsed_s=float(elapsed),
        decoded_chunks=decoded_chunks,
        token_text=token_text,
    )


def token_texts(tokenizer, *id_arrays: np.ndarray, vocab_size: int) -> dict[int, str]:
    present = np.zeros(vocab_size, dtype=bool)
    for ids in id_arrays:
        if ids.size == 0:  # e.g. no flipped token at all: nothing to name (and no shape to reshape)
            continue
        columns = ids.reshape(len(ids), -1) if ids.ndim else ids.reshape(1, 1)
        for j in range(columns.shape[1]):  # column by column: no int64 copy of a [T, S] array
            present |= np.bincount(columns[:, j].astype(np.int64), minlength=vocab_size)[:vocab_size] > 0
    return {int(i): token_display(tokenizer, int(i)) for i in np.flatnonzero(present)}


def provenance(codec, chunks: Chunks, settings: SweepSettings, text_source: str = "") -> dict[str, Any]:
    return {
        "tool": "chunkscope",
        "version": core.__version__,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "codec": {k: v for k, v in opened(codec).describe().items() if k != "card"},
        "text": {"sha256": chunks.text_sha256, "characters": len(chunks.text), "tokens": chunks.num_tokens, "source": text_source},
        "settings": settings.to_dict(),
        "torch": torch.__version__,
        "python": platform.python_version(),
    }


@dataclass(frozen=True)
class SweepPlan:
    """What every shard of one sweep shares: the validated settings and all that needs the whole text.

    Small (O(vocabulary + latent dim)), NumPy only, picklable."""

    settings: SweepSettings
    codec_name: str
    text_sha256: str
    n_chunks: int
    n_tokens: int
    chunk_size: int
    pad_id: int
    vocab_size: int
    latent_dim: int
    bucket_of_type: np.ndarray  # [V] int8: frequency bucket of each token type in this text (-1: absent)
    data_scale: np.ndarray | None  # [D] float32 r, when the noise model needs it or the latents were given
    latent_rms: float | None  # None: measured from the shards' sums

    def shard_ranges(self, shards: int) -> list[tuple[int, int]]:
        """About `shards` contiguous (start_chunk, stop_chunk) ranges covering the text, each a whole
        number of the settings' batches (so every decode batch is the one-process sweep's)."""
        return chunk_ranges(self.n_chunks, self.settings.batch_chunks, shards)


def chunk_ranges(n_chunks: int, unit: int, parts: int) -> list[tuple[int, int]]:
    """About `parts` contiguous (start, stop) ranges covering chunks 0..n_chunks, each a whole number of `unit` chunks
    (the last one ragged)."""
    units = -(-n_chunks // unit)
    parts = max(1, min(int(parts), units))
    edges = [round(i * units / parts) * unit for i in range(parts + 1)]
    return [(a, min(b, n_chunks)) for a, b in zip(edges, edges[1:]) if a < min(b, n_chunks)]


@dataclass
class SweepShard:
    """One NOISE_BLOCK-aligned range of chunks, swept: NumPy only, picklable; merge with merge_shards."""

    start_chunk: int
    stop_chunk: int
    accumulators: list[dict]  # SigmaAccumulator.state() per sigma
    wrong_counts: np.ndarray  # [tokens of the range, S]
    decoded: np.ndarray  # [tokens of the range, S]
    latent_sumsq: np.ndarray  # [D] float64, Σ mean² over the range's chunks
    decoded_chunks: int
    elapsed_s: float


def _count_dtype(repeats: int):
    return np.uint8 if repeats < 256 else np.uint16 if repeats < 65536 else np.uint32


def _decoded_dtype(vocab_size: int):
    return np.int16 if vocab_size <= 32767 else np.int32


def plan_sweep(
    codec,
    chunks: Chunks,
    settings: SweepSettings = SweepSettings(),
    encoded: Encoded | None = None,
    should_stop: ShouldStop | None = None,
    progress: Progress | None = None,
    scale: LatentScale | None = None,
) -> SweepPlan:
    """Validate the settings and measure what needs the whole text. Encodes the text once, block by
    block and keeping no latent, only when the noise model needs the data scale r and neither `encoded`
    nor `scale` (the text's LatentScale, measured elsewhere: a cluster's workers, by scale_parts) is given."""
    codec = opened(codec)
    settings = settings.validated(codec)
    if plan_needs_scale(codec, chunks, settings, encoded) and scale is not None and scale.chunks != chunks.num_chunks:
        raise SettingsError(f"the latent scale given was measured over {scale.chunks} chunks, but the text has {chunks.num_chunks}.")
    ids = chunks.token_ids.astype(np.int64, copy=False)
    counts = np.bincount(ids, minlength=codec.vocab_size)
    bucket_of_type = (np.searchsorted(np.asarray(FREQUENCY_EDGES), counts, side="right") - 1).astype(np.int8)
    if encoded is not None:
        if encoded.num_chunks != chunks.num_chunks:
            raise SettingsError(f"the latents given hold {encoded.num_chunks} chunks, but the text has {chunks.num_chunks}.")
        scale = encoded.scale
    elif settings.noise == "data-scale":
        if scale is None:
            scale = measure_scale(codec, chunks, progress=progress, should_stop=should_stop)
    else:
        scale = None
    return SweepPlan(
        settings=settings, codec_name=codec.name, text_sha256=chunks.text_sha256, n_chunks=chunks.num_chunks,
        n_tokens=chunks.num_tokens, chunk_size=codec.chunk_size, pad_id=codec.pad_id, vocab_size=codec.vocab_size,
        latent_dim=codec.latent_dim, bucket_of_type=bucket_of_type,
        data_scale=None if scale is None else (encoded.rms_per_dim if encoded is not None else scale.rms_per_dim).numpy(),
        latent_rms=None if scale is None else scale.latent_rms,
    )


def plan_needs_scale(codec, chunks: Chunks, settings: SweepSettings, encoded: Encoded | None = None) -> bool:
    """Validate as plan_sweep does; True when its plan must measure the text's latent scale (an encoding pass)."""
    codec = opened(codec)
    settings = settings.validated(codec)
    if chunks.chunk_size != codec.chunk_size:
        raise SettingsError(f"the text was cut into chunks of {chunks.chunk_size}, but {codec.name} takes {codec.chunk_size}.")
    return settings.noise == "data-scale" and encoded is None


class _Range:
    """Token ids of chunks start..stop (from a whole Chunks, or the range's own ids) cut into batches."""

    def __init__(self, plan: SweepPlan, chunks_or_ids, start: int, stop: int):
        k = plan.chunk_size
        t0, t1 = start * k, min(stop * k, plan.n_tokens)
        if isinstance(chunks_or_ids, Chunks):
            if chunks_or_ids.text_sha256 != plan.text_sha256 or chunks_or_ids.num_tokens != plan.n_tokens:
                raise SettingsError("this shard's text is not the text its sweep was planned for.")
            ids = chunks_or_ids.token_ids[t0:t1]
        else:
            ids = np.asarray(chunks_or_ids)
            if ids.shape != (t1 - t0,):
                raise SettingsError(f"chunks {start}..{stop} hold {t1 - t0} tokens, but {ids.shape} ids were given.")
        self.ids_flat = torch.from_numpy(ids.astype(np.int64))
        self.buckets_flat = torch.from_numpy(plan.bucket_of_type[ids].astype(np.int64))
        self.k, self.start, self.t0 = k, start, t0


def _check_range(plan: SweepPlan, start: int, stop: int) -> None:
    if not (0 <= start < stop <= plan.n_chunks) or start % NOISE_BLOCK or (stop % NOISE_BLOCK and stop != plan.n_chunks):
        raise SettingsError(
            f"a shard must cover chunks start..stop with 0 <= start < stop <= {plan.n_chunks}, both multiples of "
            f"{NOISE_BLOCK} (or stop the last chunk), not {start}..{stop}."
        )


@inference_mode
def sweep_shard(
    codec,
    chunks_or_ids,
    plan: SweepPlan,
    start_chunk: int,
    stop_chunk: int,
    should_stop: ShouldStop | None = None,
    progress: Progress | None = None,
    encoded: Encoded | None = None,
) -> SweepShard:
    """Sweep chunks start_chunk..stop_chunk of the planned text. `chunks_or_ids` is the whole Chunks or
    the range's own token ids (token_ids[start*K : stop*K]); `encoded`, if given, holds the whole
    text's latents (else each batch is encoded here). Raises SweepCancelled if stopped."""
    started = time.perf_counter()
    codec = opened(codec)
    _check_range(plan, start_chunk, stop_chunk)
    settings = plan.settings
    sigmas, repeats, k, dim = settings.sigmas, settings.repeats, plan.chunk_size, plan.latent_dim
    n_sigma = len(sigmas)
    rows = _Range(plan, chunks_or_ids, start_chunk, stop_chunk)
    n_rows = len(rows.ids_flat)
    count_dtype, decoded_dtype = _count_dtype(repeats), _decoded_dtype(plan.vocab_size)
    wrong_counts = np.zeros((n_rows, n_sigma), dtype=count_dtype)
    decoded = np.zeros((n_rows, n_sigma), dtype=decoded_dtype)
    accumulators = [SigmaAccumulator(sg, k, plan.vocab_size) for sg in sigmas]
    data_scale = None if plan.data_scale is None else torch.from_numpy(plan.data_scale)
    sumsq = np.zeros(dim, dtype=np.float64)
    zero_first = sigmas[0] == 0
    noisy = [si for si in range(n_sigma) if sigmas[si] > 0]
    per_chunk = int(zero_first) + repeats * len(noisy)
    total, done = (stop_chunk - start_chunk) * per_chunk, 0
    sigma_tensor = torch.tensor(sigmas, dtype=torch.float32)
    batch = settings.batch_chunks
    a = start_chunk
    while a < stop_chunk:
        b = min((a // batch + 1) * batch, stop_chunk)  # batches on the one-process sweep's grid
        if should_stop is not None and should_stop():
            raise SweepCancelled()
        n = b - a
        lo = (a - start_chunk) * k
        real = min(n * k, n_rows - lo)
        ids = torch.full((n * k,), plan.pad_id, dtype=torch.int64)
        ids[:real] = rows.ids_flat[lo : lo + real]
        ids = ids.view(n, k)
        mask = torch.zeros(n * k, dtype=torch.bool)
        mask[:real] = True
        mask = mask.view(n, k)
        bucket = torch.zeros(n * k, dtype=torch.int64)
        bucket[:real] = rows.buckets_flat[lo : lo + real]
        bucket = bucket.view(n, k)
        if encoded is not None:
            mean = encoded.mean[a:b]
            std = None if encoded.std is None else encoded.std[a:b]
        else:
            mean, std = codec.encode(ids)
            mean, std = mean.float(), None if std is None else std.float()
        sumsq += mean.double().square().sum(0).numpy()
        scale = noise_scale(settings.noise, Encoded(mean, std, data_scale=data_scale), 0, n)
        wrong_rows = np.zeros((n_sigma, real), dtype=count_dtype)  # sigma-major here, one transposed write per batch
        decoded_rows = np.zeros((n_sigma, real), dtype=decoded_dtype)
        if zero_first:  # every repeat decodes the same latent at σ = 0: decode once, count it `repeats` times
            if should_stop is not None and should_stop():
                raise SweepCancelled()
            scores = accumulators[0].update(codec.decode(mean), ids, mask, bucket, inplace=True, times=repeats)
            wrong_rows[0] = (~scores.correct).reshape(-1)[:real].numpy().astype(count_dtype) * count_dtype(repeats)
            decoded_rows[0] = scores.predicted.reshape(-1)[:real].numpy()
            done += n
            if progress is not None:
                progress(done, total)
        for r in range(repeats):
            step = draw_eps(settings.seed, r, a, b, dim) * scale if noisy else None
            for si in noisy:
                if should_stop is not None and should_stop():
                    raise SweepCancelled()
                logits = codec.decode(mean + sigma_tensor[si] * step)
                scores = accumulators[si].update(logits, ids, mask, bucket, inplace=True)
                wrong_rows[si] += (~scores.correct).reshape(-1)[:real].numpy()
                if r == 0:
                    decoded_rows[si] = scores.predicted.reshape(-1)[:real].numpy()
                done += n
                if progress is not None:
                    progress(done, total)
        wrong_counts[lo : lo + real] = wrong_rows.T
        decoded[lo : lo + real] = decoded_rows.T
        a = b
    return SweepShard(
        start_chunk=start_chunk, stop_chunk=stop_chunk, accumulators=[acc.state() for acc in accumulators],
        wrong_counts=wrong_counts, decoded=decoded, latent_sumsq=sumsq,
        decoded_chunks=(stop_chunk - start_chunk) * per_chunk, elapsed_s=time.perf_counter() - started,
    )


def merge_shards(
    plan: SweepPlan,
    shards: Sequence[SweepShard],
    chunks: Chunks,
    codec,
    text_source: str = "",
    elapsed_s: float | None = None,
) -> SweepResult:
    """The SweepResult of shards that together cover the planned text once (in any order): counts
    exactly the one-process sweep's, sums to float rounding. `codec` gives the provenance and token texts."""
    codec = opened(codec)
    shards = sorted(shards, key=lambda sh: sh.start_chunk)
    edge = 0
    for sh in shards:
        if sh.start_chunk != edge:
            raise ChunkscopeError(f"the shards of the sweep of {plan.codec_name} do not cover chunks {edge}..{sh.start_chunk} exactly once.")
        edge = sh.stop_chunk
        tokens = min(sh.stop_chunk * plan.chunk_size, plan.n_tokens) - sh.start_chunk * plan.chunk_size
        if len(sh.accumulators) != len(plan.settings.sigmas) or sh.wrong_counts.shape != (tokens, len(plan.settings.sigmas)):
            raise ChunkscopeError(f"the shard of chunks {sh.start_chunk}..{sh.stop_chunk} was not swept by this plan of "
                                  f"{plan.codec_name}: it holds other sigmas or other tokens.")
    if edge != plan.n_chunks:
        raise ChunkscopeError(f"the shards of the sweep of {plan.codec_name} stop at chunk {edge} of {plan.n_chunks}.")
    if chunks.text_sha256 != plan.text_sha256:
        raise SettingsError("the text given to merge is not the text the sweep was planned for.")
    settings, sigmas = plan.settings, plan.settings.sigmas
    accumulators = [SigmaAccumulator.from_state(st) for st in shards[0].accumulators]
    for sh in shards[1:]:
        for acc, st in zip(accumulators, sh.accumulators):
            acc.merge(SigmaAccumulator.from_state(st))
    if len(shards) == 1:
        wrong_counts, decoded = shards[0].wrong_counts, shards[0].decoded
    else:
        wrong_counts = np.empty((plan.n_tokens, len(sigmas)), dtype=shards[0].wrong_counts.dtype)
        decoded = np.empty((plan.n_tokens, len(sigmas)), dtype=shards[0].decoded.dtype)
        for sh in shards:
            t0 = sh.start_chunk * plan.chunk_size
            wrong_counts[t0 : t0 + len(sh.wrong_counts)] = sh.wrong_counts
            decoded[t0 : t0 + len(sh.decoded)] = sh.decoded
    if plan.latent_rms is not None:
        latent_rms = plan.latent_rms
    else:
        latent_rms = LatentScale(sum(sh.latent_sumsq for sh in shards), plan.n_chunks).latent_rms
    curves = [acc.compute() for acc in accumulators]
    tolerances, loss_tolerances = tolerances_of(sigmas, [c.token_accuracy for c in curves], plan.n_tokens)
    elapsed = elapsed_s if elapsed_s is not None else sum(sh.elapsed_s for sh in shards)
    decoded_chunks = sum(sh.decoded_chunks for sh in shards)
    prov = provenance(codec, chunks, settings, text_source)
    prov["elapsed_s"] = elapsed
    prov["decoded_chunks"] = decoded_chunks
    return SweepResult(
        settings=settings,
        provenance=prov,
        curves=curves,
        tolerances=tolerances,
        loss_tolerances=loss_tolerances,
        chunks=chunks,
        wrong_counts=wrong_counts,
        decoded=decoded,
        critical_sigma=critical_sigmas(sigmas, wrong_counts, settings.repeats),
        latent_rms=latent_rms,
        elapsed_s=elapsed,
        decoded_chunks=decoded_chunks,
        token_text=token_texts(codec.tokenizer, chunks.token_ids, decoded, vocab_size=codec.vocab_size),
    )


def run_sweep(
    codec,
    chunks: Chunks,
    settings: SweepSettings = SweepSettings(),
    progress: Progress | None = None,
    should_stop: ShouldStop | None = None,
    encoded: Encoded | None = None,
    text_source: str = "",
) -> SweepResult:
    """Sweep one codec over one text, in this process: plan, one shard, merge.
    Raises SweepCancelled (and returns nothing) if stopped."""
    started = time.perf_counter()
    codec = opened(codec)
    plan = plan_sweep(codec, chunks, settings, encoded=encoded, should_stop=should_stop)
    shard = sweep_shard(codec, chunks, plan, 0, plan.n_chunks, should_stop=should_stop, progress=progress, encoded=encoded)
    return merge_shards(plan, [shard], chunks, codec, text_source, elapsed_s=time.perf_counter() - started)
