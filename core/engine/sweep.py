"""The sweep: encode once, then for each sigma and repeat perturb, decode and score.

Loop order is chunk batch -> repeat -> sigma, so each (chunk, repeat) draws ε once and
reuses it across the grid. Nothing holds all logits: per sigma a streaming accumulator,
per token a small count of wrong repeats and the decode of repeat 0.
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
from core.deferred import torch
from core.errors import SettingsError, SweepCancelled
from core.outputs.files import staged_folder
from core.engine.noise import NOISE_BLOCK, Encoded, Progress, ShouldStop, check_noise, draw_eps, encode_chunks, noise_model, noise_scale
from core.engine.metrics import SigmaAccumulator, SigmaMetrics, frequency_buckets
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
        """The one validator for sweep settings: returns a cleaned copy or raises SettingsError."""
        sigmas = tuple(float(s) for s in self.sigmas)
        if not sigmas:
            raise SettingsError("the sigma grid is empty.")
        if any(not math.isfinite(s) or s < 0 for s in sigmas):
            raise SettingsError("every sigma must be a finite number >= 0.")
        sigmas = tuple(sorted(set(sigmas)))
        if not isinstance(self.repeats, int) or not 1 <= self.repeats <= 10_000:
            raise SettingsError(f"repeats must be a whole number from 1 to 10000, not {self.repeats!r}.")
        noise_model(self.noise)
        if not isinstance(self.seed, int) or self.seed < 0:
            raise SettingsError(f"the seed must be a whole number >= 0, not {self.seed!r}.")
        if codec is not None:
            check_noise(self.noise, codec)
        batch = max(NOISE_BLOCK, (int(self.batch_chunks) // NOISE_BLOCK) * NOISE_BLOCK)
        return SweepSettings(sigmas=sigmas, repeats=self.repeats, noise=self.noise, seed=self.seed, batch_chunks=batch)

    def to_dict(self) -> dict:
        return {"sigmas": list(self.sigmas), "repeats": self.repeats, "noise": self.noise, "seed": self.seed}


def critical_sigmas(sigmas: Sequence[float], wrong_counts: np.ndarray, repeats: int) -> np.ndarray:
    """Per token: the smallest grid sigma at which it is wrong in at least half the repeats (NaN: never)."""
    broken = wrong_counts.astype(np.int64) * 2 >= repeats
    first = np.argmax(broken, axis=1)
    out = np.asarray(sigmas, dtype=np.float64)[first]
    out[~broken.any(axis=1)] = np.nan
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
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(["index", "token_id", "text", "char_start", "char_end", "chunk", "position", "critical_sigma"])
        text, spans, k = self.chunks.text, self.chunks.spans, self.chunks.chunk_size
        for t in range(self.chunks.num_tokens):
            a, b = int(spans[t, 0]), int(spans[t, 1])
            crit = self.critical_sigma[t]
            writer.writerow([t, int(self.chunks.token_ids[t]), text[a:b], a, b, t // k, t % k, "" if np.isnan(crit) else f"{crit:.6g}"])
        return out.getvalue()

    def write(self, directory: str | os.PathLike, force: bool = False) -> Path:
        """Write sweep.json, curves.csv, tokens.csv and arrays.npz into a fresh directory, atomically."""
        directory = Path(directory)
        with staged_folder(directory, force) as staging:
            (staging / "sweep.json").write_text(json.dumps(self.to_json_dict(), indent=1, allow_nan=True), encoding="utf-8")
            (staging / "curves.csv").write_text(self.curves_csv(), encoding="utf-8")
            (staging / "tokens.csv").write_text(self.tokens_csv(), encoding="utf-8")
            (staging / "text.txt").write_text(self.chunks.text, encoding="utf-8")
            (staging / "vocab.json").write_text(json.dumps({str(k): v for k, v in self.token_text.items()}), encoding="utf-8")
            np.savez_compressed(
                staging / "arrays.npz",
                token_ids=self.chunks.token_ids,
                spans=self.chunks.spans,
                wrong_counts=self.wrong_counts,
                decoded=self.decoded,
                critical_sigma=self.critical_sigma,
            )
        return directory


def read_sweep(directory: str | os.PathLike) -> SweepResult:
    """Reopen a sweep written by `SweepResult.write` (from the command line or the workbench)."""
    from core.errors import ChunkscopeError

    directory = Path(directory)
    try:
        data = json.loads((directory / "sweep.json").read_text(encoding="utf-8"))
        with np.load(directory / "arrays.npz") as npz:
            arrays = {key: npz[key] for key in npz.files}
        text = (directory / "text.txt").read_text(encoding="utf-8")
        vocab_path = directory / "vocab.json"
        token_text = {int(k): v for k, v in json.loads(vocab_path.read_text(encoding="utf-8")).items()} if vocab_path.exists() else {}
    except FileNotFoundError as exc:
        raise ChunkscopeError(f"{directory.name} is not a sweep folder: {Path(exc.filename).name} is missing.") from None
    except (ValueError, OSError, KeyError) as exc:
        raise ChunkscopeError(f"{directory.name} holds a damaged sweep: {exc}.") from None
    s = data["settings"]
    settings = SweepSettings(sigmas=tuple(s["sigmas"]), repeats=int(s["repeats"]), noise=s["noise"], seed=int(s["seed"]))
    prov = data["provenance"]
    chunks = Chunks(
        text=text,
        text_sha256=prov["text"]["sha256"],
        token_ids=arrays["token_ids"],
        spans=arrays["spans"],
        chunk_size=int(prov["codec"]["config"]["chunk_size"]),
        pad_id=int(prov["codec"]["config"]["pad_id"]),
    )
    curves = [SigmaMetrics.from_dict(c) for c in data["curves"]]
    if "loss_tolerances" in data:
        loss = [Tolerance.from_dict(t, LOSS) for t in data["loss_tolerances"]]
    else:  # written before the loss tolerance: measure it from the stored curve
        loss = tolerances_of(settings.sigmas, [c.token_accuracy for c in curves], chunks.num_tokens)[1]
    return SweepResult(
        settings=settings,
        provenance=prov,
        curves=curves,
        tolerances=[Tolerance.from_dict(t) for t in data["tolerances"]],
        loss_tolerances=loss,
        chunks=chunks,
        wrong_counts=arrays["wrong_counts"],
        decoded=arrays["decoded"],
        critical_sigma=arrays["critical_sigma"],
        latent_rms=float(data["latent_rms"]),
        elapsed_s=float(data["elapsed_s"]),
        decoded_chunks=int(data["decoded_chunks"]),
        token_text=token_text,
    )


def token_texts(tokenizer, *id_arrays: np.ndarray, vocab_size: int) -> dict[int, str]:
    present = np.zeros(vocab_size, dtype=bool)
    for ids in id_arrays:
        present |= np.bincount(ids.ravel().astype(np.int64), minlength=vocab_size)[:vocab_size] > 0
    return {int(i): token_display(tokenizer, int(i)) for i in np.flatnonzero(present)}


def provenance(codec, chunks: Chunks, settings: SweepSettings, text_source: str = "") -> dict[str, Any]:
    return {
        "tool": "chunkscope",
        "version": core.__version__,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "codec": {"name": codec.name, "sha256": codec.sha256, "path": codec.path, "config": codec.config.to_dict()},
        "text": {"sha256": chunks.text_sha256, "characters": len(chunks.text), "tokens": chunks.num_tokens, "source": text_source},
        "settings": settings.to_dict(),
        "torch": torch.__version__,
        "python": platform.python_version(),
    }


def run_sweep(
    codec,
    chunks: Chunks,
    settings: SweepSettings = SweepSettings(),
    progress: Progress | None = None,
    should_stop: ShouldStop | None = None,
    encoded: Encoded | None = None,
    text_source: str = "",
) -> SweepResult:
    """Sweep one codec over one text. Raises SweepCancelled (and returns nothing) if stopped."""
    settings = settings.validated(codec)
    if chunks.chunk_size != codec.chunk_size:
        raise SettingsError(f"the text was cut into chunks of {chunks.chunk_size}, but {codec.name} takes {codec.chunk_size}.")
    started = time.perf_counter()
    if encoded is None:
        encoded = encode_chunks(codec, chunks, should_stop=should_stop)
    sigmas = settings.sigmas
    n_sigma, repeats, k = len(sigmas), settings.repeats, codec.chunk_size
    n_chunks, dim = encoded.num_chunks, codec.latent_dim
    accumulators = [SigmaAccumulator(s, k, codec.vocab_size) for s in sigmas]
    n_tokens = chunks.num_tokens
    count_dtype = np.uint8 if repeats < 256 else np.uint16 if repeats < 65536 else np.uint32
    wrong_counts = np.zeros((n_tokens, n_sigma), dtype=count_dtype)
    decoded_dtype = np.int16 if codec.vocab_size <= 32767 else np.int32
    decoded = np.zeros((n_tokens, n_sigma), dtype=decoded_dtype)
    buckets_all = torch.from_numpy(frequency_buckets(chunks.token_ids))
    batch = settings.batch_chunks
    total = -(-n_chunks // batch) * repeats * n_sigma
    done = 0
    sigma_tensor = torch.tensor(sigmas, dtype=torch.float32)
    for start in range(0, n_chunks, batch):
        stop = min(start + batch, n_chunks)
        ids = chunks.ids(start, stop)
        mask = chunks.mask(start, stop)
        t0, t1 = start * k, min(stop * k, n_tokens)
        bucket = torch.zeros(stop - start, k, dtype=torch.int64)
        bucket.view(-1)[: t1 - t0] = buckets_all[t0:t1]
        mean = encoded.mean[start:stop]
        scale = noise_scale(settings.noise, encoded, start, stop)
        for r in range(repeats):
            step = draw_eps(settings.seed, r, start, stop, dim) * scale
            for si in range(n_sigma):
                if should_stop is not None and should_stop():
                    raise SweepCancelled()
                z = mean + sigma_tensor[si] * step if sigmas[si] > 0 else mean
                logits = codec.decode(z)
                scores = accumulators[si].update(logits, ids, mask, bucket, inplace=True)
                flat_wrong = (~scores.correct).reshape(-1)[: t1 - t0].numpy()
                wrong_counts[t0:t1, si] += flat_wrong.astype(count_dtype)
                if r == 0:
                    decoded[t0:t1, si] = scores.predicted.reshape(-1)[: t1 - t0].numpy().astype(decoded_dtype)
                done += 1
                if progress is not None:
                    progress(done, total)
    curves = [acc.compute() for acc in accumulators]
    tolerances, loss_tolerances = tolerances_of(sigmas, [c.token_accuracy for c in curves], chunks.num_tokens)
    elapsed = time.perf_counter() - started
    prov = provenance(codec, chunks, settings, text_source)
    prov["elapsed_s"] = elapsed
    prov["decoded_chunks"] = n_chunks * repeats * n_sigma
    return SweepResult(
        settings=settings,
        provenance=prov,
        curves=curves,
        tolerances=tolerances,
        loss_tolerances=loss_tolerances,
        chunks=chunks,
        wrong_counts=wrong_counts,
        decoded=decoded,
        critical_sigma=critical_sigmas(sigmas, wrong_counts, repeats),
        latent_rms=encoded.latent_rms,
        elapsed_s=elapsed,
        decoded_chunks=n_chunks * repeats * n_sigma,
        token_text=token_texts(codec.tokenizer, chunks.token_ids, decoded, vocab_size=codec.vocab_size),
    )
