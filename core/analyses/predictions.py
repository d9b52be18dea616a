"""Generator errors (DESIGN.md, "Generator errors"): a generator's predictions held against the decoder's tolerance.

For predictions (S samples per chunk, `core.analyses.prediction_file`) and the codec they
were made for: e = predicted − encoder mean of the true chunk; its effective sigma in
data-scale units sqrt(mean_j mean_chunks,samples (e_j / r_j)²); the accuracy of decoding
the predictions; the accuracy a data-scale sweep of the same chunks reaches at that
sigma; and the structured-error factor (1 − accuracy of predictions) / (1 − sweep
accuracy at the effective sigma).

How the sweep accuracy at the effective sigma is found: the sweep's grid holds the
effective sigma itself, 16 more points from half to twice it (steps of 2^(1/8)), and the
default grid (for the curve and the 99 % tolerance). The accuracy curve is interpolated
linearly in log σ between neighbouring points of the fine grid; at the point estimate
that returns the value measured at the effective sigma itself. The interpolation serves
the bootstrap: each resample of chunks has its own effective sigma (r_j stays the full
text's), read off that resample's curve.

Intervals: decoded accuracy, Wilson 95 % over tokens × samples; everything else, the
percentile interval of BOOTSTRAP resamples over chunks (a chunk's samples, tokens and
sweep repeats stay together).

With S ≥ 2: the energy score (β = 1) per chunk, unbiased with all sample pairs,
    ES = 1/S Σ_i ‖x_i − y‖ − 1/(2 S (S − 1)) Σ_{i≠j} ‖x_i − x_j‖,   y = encoder mean,
and the sample-based Brier estimate of the decoded tokens, per pair of samples
1[x_i = x_j] − 1[x_i = y] − 1[x_j = y] + 1, averaged over all pairs (unbiased for the
multiclass Brier score of the decoded-token distribution), per token, per position and
over consecutive-token n-grams inside a chunk (n = 1..4, an n-gram counted as one
outcome). `brier_ngram_geometric_mean` is the geometric mean of the n = 1..4 estimates
(losses, lower is better); `brier_skill_ngram_geometric_mean` that of the positive
orientation 1 − Brier (= 2 p_y − Σ p², higher is better), null when one of them is ≤ 0.
"""

from __future__ import annotations

import csv
import io
import json
import math
import platform
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

import core
from core.analyses.prediction_file import (  # noqa: F401 (re-exported: the format's reader and writer)
    Predictions, PredictionsError, check_against, is_predictions_file, read_predictions, write_predictions,
)
from core.codecs.contract import opened
from core.deferred import torch
from core.engine.metrics import wilson_interval
from core.engine.noise import Encoded, Progress, ShouldStop, encode_chunks
from core.engine.sweep import DEFAULT_SIGMAS, SweepResult, SweepSettings, run_sweep
from core.engine.text import Chunks, chunk_text, text_sha256
from core.errors import SweepCancelled
from core.outputs.files import Outputs, result_folder

BOOTSTRAP = 1000
BOOTSTRAP_SEED = 0
FINE_STEPS = 8  # points per octave around the effective sigma
TOP_DIRECTIONS = 10
MAX_NGRAM = 4
WORST_TOKENS = 20
PREDICTIONS_FOLDER = result_folder("predictions.json")


def energy_score(samples: np.ndarray, observed: np.ndarray) -> np.ndarray:
    """Per row: the unbiased energy score (β = 1, all sample pairs) of samples [N, S, D] at observed [N, D]; S >= 2."""
    x = torch.as_tensor(np.asarray(samples, dtype=np.float64))
    y = torch.as_tensor(np.asarray(observed, dtype=np.float64))
    s = x.shape[1]
    first = (x - y.unsqueeze(1)).norm(dim=-1).mean(1)
    second = torch.cdist(x, x).sum((1, 2)) / (2 * s * (s - 1))
    return (first - second).numpy()


def brier_estimate(decoded: np.ndarray, truth: np.ndarray) -> np.ndarray:
    """Per outcome: the mean over all sample pairs i < j of 1[x_i = x_j] − 1[x_i = y] − 1[x_j = y] + 1.

    decoded [..., S] outcomes of S >= 2 independent samples, truth [...]; unbiased for Σ_v p_v² − 2 p_y + 1."""
    decoded = np.asarray(decoded)
    s = decoded.shape[-1]
    hit = (decoded == np.asarray(truth)[..., None]).mean(-1)
    same = np.zeros(decoded.shape[:-1])
    for i in range(s):
        same += (decoded[..., i + 1:] == decoded[..., i:i + 1]).sum(-1)
    same /= s * (s - 1) / 2
    return same - 2 * hit + 1


def _ngram_ids(x: np.ndarray, n: int, vocab: int) -> np.ndarray:
    """[..., K] token ids -> [..., K - n + 1] one id per consecutive n-gram (exact: mixed radix in object-free int64 when it fits)."""
    k = x.shape[-1]
    out = np.zeros(x.shape[:-1] + (k - n + 1,), dtype=np.int64)
    if vocab ** n < 2 ** 62:
        for i in range(n):
            out = out * vocab + x[..., i:k - n + 1 + i]
        return out
    # too many n-grams for one int64: rank the n-gram tuples
    windows = np.lib.stride_tricks.sliding_window_view(x, n, axis=-1)
    flat = windows.reshape(-1, n)
    _, inverse = np.unique(flat, axis=0, return_inverse=True)
    return inverse.reshape(out.shape)


@dataclass
class PredictionsResult:
    summary: dict[str, Any]  # the keys of predictions.json's top level
    provenance: dict[str, Any]
    chunks: Chunks
    sweep: SweepResult
    positions: list[dict[str, Any]]
    worst_tokens: list[dict[str, Any]]
    ngrams: list[dict[str, Any]]
    dims: dict[str, np.ndarray]  # error_rms, data_scale, posterior_std (variational)
    error_norm: np.ndarray  # [N, S]
    half_distance: np.ndarray  # [N]
    cosine: np.ndarray  # [N, S] cosine between e and the direction to the nearest distinct neighbour
    token_wrong_rate: np.ndarray  # [T] share of the S samples whose decode of token t is wrong
    decoded_first: np.ndarray  # [T] the decode of sample 0
    token_text: dict[int, str] = field(default_factory=dict)
    verdict: str = ""

    def to_json_dict(self) -> dict[str, Any]:
        return {**self.summary, "verdict": self.verdict, "provenance": self.provenance, "positions": self.positions,
                "ngrams": self.ngrams, "worst_tokens": self.worst_tokens,
                "sweep_curve": [{"sigma": c.sigma, "token_accuracy": c.token_accuracy, "accuracy_low": c.accuracy_low,
                                 "accuracy_high": c.accuracy_high} for c in self.sweep.curves]}

    def _csv(self, header: list[str], rows) -> str:
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
        return out.getvalue()

    def csv_files(self) -> dict[str, str]:
        pos_keys = list(self.positions[0]) if self.positions else []
        tok_keys = list(self.worst_tokens[0]) if self.worst_tokens else ["token_id"]
        ngram_keys = list(self.ngrams[0]) if self.ngrams else ["n"]
        d = self.dims
        dim_rows = [[j, float(d["error_rms"][j]), float(d["data_scale"][j])]
                    + ([float(d["posterior_std"][j])] if "posterior_std" in d else []) for j in range(len(d["error_rms"]))]
        n, s = self.error_norm.shape
        errors = [[c, i, float(self.error_norm[c, i]), float(self.half_distance[c]), float(self.cosine[c, i])]
                  for c in range(n) for i in range(s)]
        curve = [[c.sigma, c.token_accuracy, c.accuracy_low, c.accuracy_high, c.tokens] for c in self.sweep.curves]
        return {
            "positions.csv": self._csv(pos_keys, [[r[k] for k in pos_keys] for r in self.positions]),
            "worst_tokens.csv": self._csv(tok_keys, [[r[k] for k in tok_keys] for r in self.worst_tokens]),
            "ngrams.csv": self._csv(ngram_keys, [[r[k] for k in ngram_keys] for r in self.ngrams]),
            "dims.csv": self._csv(["dim", "error_rms", "data_scale_r"] + (["posterior_std"] if "posterior_std" in d else []), dim_rows),
            "errors.csv": self._csv(["chunk", "sample", "error_norm", "nn_half_distance", "cosine_to_neighbour"], errors),
            "sweep_curve.csv": self._csv(["sigma", "token_accuracy", "accuracy_low", "accuracy_high", "tokens"], curve),
        }

    def write(self, directory, force: bool = False) -> Path:
        """predictions.json and the CSVs into one folder, atomically; an existing one is replaced only with force."""
        directory = Path(directory)
        with Outputs(force) as outputs:
            folder = outputs.folder(directory, PREDICTIONS_FOLDER)
            self.write_into(folder)
        return directory

    def write_into(self, folder: Path) -> None:
        folder.mkdir(parents=True, exist_ok=True)
        (folder / "predictions.json").write_text(json.dumps(_plain(self.to_json_dict()), indent=1), encoding="utf-8")
        for name, content in self.csv_files().items():
            (folder / name).write_text(content, encoding="utf-8")


def _plain(value):
    """JSON-safe: NaN and infinities become null, numpy scalars Python numbers."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (np.floating, float)):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    return value


def chunks_of(predictions: Predictions, codec) -> Chunks:
    """The true chunks: from the file's text when it has one (and it must give exactly its token_ids), else
    from token_ids, the trailing pad ids of the last chunk being padding."""
    codec = opened(codec)
    ids = predictions.token_ids
    if predictions.text is not None:
        chunks = chunk_text(predictions.text, codec, f"the text in {predictions.path}")
        if chunks.num_chunks != predictions.num_chunks:
            raise PredictionsError(f"{predictions.path} holds N = {predictions.num_chunks} chunks, but its text cuts into "
                                   f"{chunks.num_chunks} chunks of {codec.chunk_size} tokens with {codec.name}'s tokenizer.")
        if not np.array_equal(chunks.ids().numpy(), ids):
            first = int(np.argwhere(chunks.ids().numpy() != ids)[0][0])
            raise PredictionsError(f"{predictions.path}: its token_ids are not the chunks of its text with {codec.name}'s "
                                   f"tokenizer (they differ first in chunk {first}).")
        return chunks
    from core.codecs.tokenizer import token_display

    flat = ids.reshape(-1)
    last = ids[-1]
    real_last = len(last)
    while real_last > 1 and last[real_last - 1] == codec.pad_id:
        real_last -= 1
    flat = flat[: (len(ids) - 1) * codec.chunk_size + real_last]
    pieces = [token_display(codec.tokenizer, int(t)) for t in flat]
    ends = np.cumsum([len(p) for p in pieces])
    spans = np.stack([ends - np.array([len(p) for p in pieces]), ends], axis=1).astype(np.int64)
    text = "".join(pieces)
    return Chunks(text=text, text_sha256=text_sha256(text), token_ids=flat.astype(np.int64), spans=spans,
                  chunk_size=codec.chunk_size, pad_id=codec.pad_id)


def nearest_distinct_neighbours(means: torch.Tensor, ids: np.ndarray, block: int = 2048) -> tuple[np.ndarray, np.ndarray]:
    """Per chunk: the index of the nearest chunk with different tokens, and half the distance to it (inf: none)."""
    _, first, inverse = np.unique(ids, axis=0, return_index=True, return_inverse=True)
    inverse = inverse.reshape(-1)
    distinct = means[torch.from_numpy(first)].double()
    m = len(first)
    half = np.full(m, np.inf)
    nearest = np.full(m, -1, dtype=np.int64)
    for start in range(0, m, block):
        d = torch.cdist(distinct[start:start + block], distinct)
        rows = torch.arange(d.shape[0])
        d[rows, rows + start] = float("inf")
        if m > 1:
            value, where = d.min(1)
            half[start:start + block] = value.numpy() / 2
            nearest[start:start + block] = first[where.numpy()]
    return nearest[inverse], half[inverse]


def top_direction_share(errors: np.ndarray, top: int = TOP_DIRECTIONS) -> float:
    """Share of Σ‖e‖² along the `top` principal directions of the error vectors (eigenvalues of Σ e eᵀ)."""
    e = np.asarray(errors, dtype=np.float64).reshape(-1, errors.shape[-1])
    eig = np.sort(np.linalg.eigvalsh(e.T @ e))[::-1]
    total = eig.sum()
    return float(eig[:top].sum() / total) if total > 0 else float("nan")


def _interp_log(sigmas: np.ndarray, values: np.ndarray, at: np.ndarray) -> np.ndarray:
    """values [..., G] on increasing sigmas > 0, interpolated linearly in log σ at `at` [...] (clamped to the grid)."""
    x = np.log(sigmas)
    t = np.clip(np.log(np.maximum(at, 1e-300)), x[0], x[-1])
    i = np.clip(np.searchsorted(x, t, side="right") - 1, 0, len(x) - 2)
    w = (t - x[i]) / (x[i + 1] - x[i])
    v = np.asarray(values)
    lo = np.take_along_axis(v, i[..., None], -1)[..., 0]
    hi = np.take_along_axis(v, (i + 1)[..., None], -1)[..., 0]
    return lo + w * (hi - lo)


def _percentile(values: np.ndarray) -> tuple[float, float]:
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if len(v) == 0:
        return (float("nan"), float("nan"))
    return (float(np.quantile(v, 0.025)), float(np.quantile(v, 0.975)))


def sweep_grid(effective_sigma: float) -> tuple[float, ...]:
    """The default grid, plus the effective sigma and FINE_STEPS points per octave from half to twice it."""
    fine = [effective_sigma * 2 ** (k / FINE_STEPS) for k in range(-FINE_STEPS, FINE_STEPS + 1)] if effective_sigma > 0 else []
    return tuple(sorted(set(DEFAULT_SIGMAS) | set(fine)))


def verdict_text(s: dict[str, Any]) -> str:
    """The one-line verdict in plain words (the view and the command line show it as is)."""
    sigma = s["effective_sigma"]
    real = 100 * (1 - s["decoded_accuracy"])
    noise = s["noise_accuracy_at_effective_sigma"]
    head = f"the generator's errors are the size of data-scale σ {sigma:.3g}; "
    if noise is None or not math.isfinite(noise):
        return head + f"its decoded tokens are {real:.2f} % wrong."
    cost = 100 * (1 - noise)
    factor = s["structured_error_factor"]
    if factor is None or not math.isfinite(factor):
        return head + f"random noise of that size costs {cost:.2g} points, the real errors cost {real:.2g} points."
    low, high = s["structured_error_factor_low"], s["structured_error_factor_high"]
    interval = f" ({low:.2g}–{high:.2g}×)" if low is not None and high is not None and math.isfinite(low) and math.isfinite(high) else ""
    if low is not None and low > 1:
        word = "they hurt more than random noise of their size"
    elif high is not None and high < 1:
        word = "they hurt less than random noise of their size"
    else:
        word = "no different from random noise of their size"
    return head + f"random noise of that size costs {cost:.2g} points, the real errors cost {real:.2g} points: " \
                  f"{factor:.2g}×{interval}, {word}."


def analyse_predictions(codec, predictions: Predictions, repeats: int = 4, seed: int = 0, bootstrap: int = BOOTSTRAP,
                        progress: Progress | None = None, should_stop: ShouldStop | None = None,
                        sweep_progress: Progress | None = None, where=None, adapter: str | None = None) -> PredictionsResult:
    """Everything of DESIGN.md's "Generator errors" for one predictions file and its codec."""
    codec = opened(codec)
    check_against(predictions, codec)
    started = time.perf_counter()
    chunks = chunks_of(predictions, codec)
    encoded = encode_chunks(codec, chunks, should_stop=should_stop)
    n, s, d = predictions.latents.shape
    k = codec.chunk_size
    mean = encoded.mean.double().numpy()
    r = encoded.rms_per_dim.double().numpy()
    latents = predictions.latents.astype(np.float64)
    e = latents - mean[:, None, :]
    scaled_sq = ((e / np.maximum(r, 1e-12)) ** 2).sum((1, 2))  # [N]
    effective_sigma = float(math.sqrt(scaled_sq.sum() / (n * s * d)))

    # decode every predicted vector
    ids = chunks.ids().numpy()
    mask = chunks.mask().numpy()
    decoded = np.zeros((n, s, k), dtype=np.int64)
    flat = torch.from_numpy(predictions.latents.reshape(n * s, d))
    out = decoded.reshape(n * s, k)
    for start in range(0, n * s, 2048):
        if should_stop is not None and should_stop():
            raise SweepCancelled()
        out[start:start + 2048] = codec.decode(flat[start:start + 2048]).argmax(-1).numpy()
        if progress is not None:
            progress(min(start + 2048, n * s), n * s)
    wrong = (decoded != ids[:, None, :]) & mask[:, None, :]  # [N, S, K]
    real_per_chunk = mask.sum(1)
    pred_wrong = wrong.sum((1, 2)).astype(np.float64)
    pred_total = (real_per_chunk * s).astype(np.float64)
    total_wrong, total = int(pred_wrong.sum()), int(pred_total.sum())
    decoded_accuracy = 1 - total_wrong / total
    acc_low, acc_high = wilson_interval(total - total_wrong, total)

    # the data-scale sweep of the same chunks
    settings = SweepSettings(sigmas=sweep_grid(effective_sigma), repeats=repeats, noise="data-scale", seed=seed)
    source = f"the chunks of {predictions.path}"
    if where is None or where.here:
        sweep = run_sweep(codec, chunks, settings, progress=sweep_progress, should_stop=should_stop, encoded=encoded,
                          text_source=source)
    else:  # the same sweep's shards on Dask (core.engine.cluster); workers open the checkpoint themselves
        from core.engine.cluster import SweepJob, run_sweeps

        (sweep,) = run_sweeps([SweepJob(codec, chunks, settings, source, encoded, adapter)], where,
                              progress=sweep_progress, should_stop=should_stop)
    grid = np.asarray(sweep.sigmas)
    t = chunks.num_tokens
    sweep_wrong_tok = np.zeros((n * k, len(grid)))
    sweep_wrong_tok[:t] = sweep.wrong_counts
    sweep_wrong = sweep_wrong_tok.reshape(n, k, len(grid)).sum(1)  # [N, G]
    sweep_total = (real_per_chunk * repeats).astype(np.float64)
    fine = grid > 0
    fine_sigmas = grid[fine]
    curve = 1 - sweep_wrong[:, fine].sum(0) / sweep_total.sum()
    noise_accuracy = float(_interp_log(fine_sigmas, curve, np.asarray(effective_sigma))) if effective_sigma > 0 else \
        sweep.curves[0].token_accuracy
    factor = (1 - decoded_accuracy) / (1 - noise_accuracy) if noise_accuracy < 1 else float("nan")

    # bootstrap over chunks
    rng = np.random.default_rng(BOOTSTRAP_SEED)
    weights = rng.multinomial(n, np.full(n, 1.0 / n), size=bootstrap).astype(np.float64)  # [B, N]
    sigma_b = np.sqrt(weights @ scaled_sq / (weights.sum(1) * s * d))
    pred_acc_b = 1 - (weights @ pred_wrong) / (weights @ pred_total)
    curve_b = 1 - (weights @ sweep_wrong[:, fine]) / (weights @ sweep_total)[:, None]
    noise_b = _interp_log(fine_sigmas, curve_b, sigma_b) if effective_sigma > 0 else np.full(bootstrap, noise_accuracy)
    with np.errstate(divide="ignore", invalid="ignore"):
        factor_b = (1 - pred_acc_b) / (1 - noise_b)
    factor_low, factor_high = _percentile(np.where(noise_b < 1, factor_b, np.nan))
    sigma_low, sigma_high = _percentile(sigma_b)

    # error vectors
    norms = np.linalg.norm(e, axis=-1)  # [N, S]
    nearest, half = nearest_distinct_neighbours(encoded.mean, ids)
    direction = np.where(nearest[:, None] >= 0, mean[np.maximum(nearest, 0)] - mean, 0.0)
    dnorm = np.linalg.norm(direction, axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        cosine = (e @ direction[:, :, None])[..., 0] / (norms * dnorm[:, None])
    noise_rng = np.random.default_rng(seed + 1)
    iso = noise_rng.standard_normal(e.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        iso_cos = (iso @ direction[:, :, None])[..., 0] / (np.linalg.norm(iso, axis=-1) * dnorm[:, None])
    from core.engine.health import expected_noise_norm

    tol99 = sweep.tolerance(0.99)
    tol_norm = expected_noise_norm(tol99.sigma, "data-scale", encoded) if tol99.sigma is not None else float("nan")
    finite_half = np.isfinite(half)
    error_rms = np.sqrt((e ** 2).mean((0, 1)))
    dims = {"error_rms": error_rms, "data_scale": r}
    if encoded.std is not None:
        dims["posterior_std"] = encoded.std.double().mean(0).numpy()
    ratio = error_rms / np.maximum(r, 1e-12)

    # per position, beside the noise at the effective sigma
    at = int(np.argmin(np.abs(grid - effective_sigma)))
    noise_wrong_pos = sweep_wrong_tok.reshape(n, k, len(grid))[:, :, at]
    positions = []
    for p in range(k):
        real = mask[:, p]
        positions.append({
            "position": p,
            "tokens": int(real.sum()),
            "generator_wrong_rate": float(wrong[:, :, p].sum() / max(1, real.sum() * s)),
            "noise_wrong_rate": float(noise_wrong_pos[:, p].sum() / max(1, real.sum() * repeats)),
        })

    # tokens it breaks most
    token_wrong = wrong.transpose(0, 2, 1).reshape(n * k, s)[:t]  # [T, S]
    token_wrong_rate = token_wrong.mean(1)
    decoded_tok = decoded.transpose(0, 2, 1).reshape(n * k, s)[:t]
    true_ids = chunks.token_ids
    noise_rate_tok = sweep.wrong_counts[:, at] / repeats
    from core.engine.sweep import token_texts

    token_text = token_texts(codec.tokenizer, true_ids, decoded_tok, vocab_size=codec.vocab_size)
    worst = []
    order = np.argsort(true_ids, kind="stable")
    bounds = np.flatnonzero(np.diff(true_ids[order])) + 1
    for group in np.split(order, bounds):
        wrong_here = int(token_wrong[group].sum())
        if wrong_here == 0:
            continue
        bad = decoded_tok[group][token_wrong[group]]
        values, counts = np.unique(bad, return_counts=True)
        common = int(values[np.argmax(counts)])
        tid = int(true_ids[group[0]])
        worst.append({"token_id": tid, "text": token_text.get(tid, f"#{tid}"), "count": int(len(group)),
                      "generator_wrong": wrong_here, "generator_wrong_rate": wrong_here / (len(group) * s),
                      "noise_wrong_rate": float(noise_rate_tok[group].mean()), "common_wrong_id": common,
                      "common_wrong_text": token_text.get(common, f"#{common}"), "common_wrong_count": int(counts.max())})
    worst.sort(key=lambda row: (-row["generator_wrong"], -row["generator_wrong_rate"], row["token_id"]))
    worst = worst[:WORST_TOKENS]

    # sample-based scores
    es_mean = es_low = es_high = brier = brier_low = brier_high = geo = geo_low = geo_high = skill_geo = None
    ngrams: list[dict[str, Any]] = []
    if s >= 2:
        es = energy_score(latents, mean)
        es_mean = float(es.mean())
        es_low, es_high = _percentile(weights @ es / weights.sum(1))
        skills_b = []
        for m in range(1, min(MAX_NGRAM, k) + 1):
            x = _ngram_ids(decoded, m, codec.vocab_size)  # [N, S, K-m+1]
            y = _ngram_ids(ids, m, codec.vocab_size)  # [N, K-m+1]
            valid = mask[:, m - 1:]  # an n-gram counts when its last token is real
            b = brier_estimate(np.moveaxis(x, 1, -1), y)  # [N, K-m+1]
            sums, counts = (b * valid).sum(1), valid.sum(1).astype(np.float64)
            value = float(sums.sum() / counts.sum())
            boot = (weights @ sums) / (weights @ counts)
            low, high = _percentile(boot)
            skills_b.append(1 - boot)
            ngrams.append({"n": m, "brier_estimate": value, "brier_estimate_low": low, "brier_estimate_high": high,
                           "brier_skill": 1 - value, "outcomes": int(counts.sum())})
            if m == 1:
                brier, brier_low, brier_high = value, low, high
                for p in range(k):
                    real = valid[:, p]
                    pos_boot = (weights @ (b[:, p] * real)) / np.maximum(weights @ real.astype(np.float64), 1e-300)
                    lo_p, hi_p = _percentile(pos_boot)
                    positions[p].update({"brier_estimate": float((b[:, p] * real).sum() / max(1, real.sum())),
                                         "brier_estimate_low": lo_p, "brier_estimate_high": hi_p})
        losses = np.asarray([g["brier_estimate"] for g in ngrams])
        losses_b = 1 - np.stack(skills_b)  # [n, B]
        if (losses > 0).all():
            geo = float(np.exp(np.log(losses).mean()))
            ok = (losses_b > 0).all(0)
            geo_low, geo_high = _percentile(np.exp(np.log(np.where(losses_b > 0, losses_b, 1)).mean(0))[ok])
        skills = 1 - losses
        if (skills > 0).all():
            skill_geo = float(np.exp(np.log(skills).mean()))

    summary = {
        "effective_sigma": effective_sigma,
        "effective_sigma_low": sigma_low,
        "effective_sigma_high": sigma_high,
        "decoded_accuracy": decoded_accuracy,
        "decoded_accuracy_low": acc_low,
        "decoded_accuracy_high": acc_high,
        "noise_accuracy_at_effective_sigma": noise_accuracy,
        "accuracy_at_zero": sweep.accuracy_at_zero,
        "structured_error_factor": factor,
        "structured_error_factor_low": factor_low,
        "structured_error_factor_high": factor_high,
        "energy_score": es_mean,
        "energy_score_low": es_low,
        "energy_score_high": es_high,
        "brier_estimate": brier,
        "brier_estimate_low": brier_low,
        "brier_estimate_high": brier_high,
        "brier_ngram_geometric_mean": geo,
        "brier_ngram_geometric_mean_low": geo_low,
        "brier_ngram_geometric_mean_high": geo_high,
        "brier_skill_ngram_geometric_mean": skill_geo,
        "samples": s,
        "chunks": n,
        "tokens": t,
        "latent_rms": encoded.latent_rms,
        "error_norm_median": float(np.median(norms)),
        "error_norm_rms": float(np.sqrt((norms ** 2).mean())),
        "noise_norm_at_effective_sigma": expected_noise_norm(effective_sigma, "data-scale", encoded),
        "tolerance_99_sigma": tol99.sigma,
        "tolerance_99_status": tol99.status,
        "noise_norm_at_tolerance_99": tol_norm,
        "nn_half_distance_median": float(np.median(half[finite_half])) if finite_half.any() else None,
        "share_errors_past_half_distance": float((norms[finite_half] > half[finite_half, None]).mean()) if finite_half.any() else None,
        "share_errors_past_tolerance_norm": float((norms > tol_norm).mean()) if math.isfinite(tol_norm) else None,
        "error_rms_over_data_scale_median": float(np.median(ratio)),
        "error_rms_vs_data_scale_correlation": float(np.corrcoef(error_rms, r)[0, 1]) if d > 1 else None,
        "top10_direction_share": top_direction_share(e),
        "top10_direction_share_isotropic": top_direction_share(iso * norms.mean() / math.sqrt(d)),
        "top10_direction_share_data_scale": top_direction_share(iso * r),
        "cosine_to_neighbour_mean": float(np.nanmean(cosine)),
        "cosine_to_neighbour_mean_isotropic": float(np.nanmean(iso_cos)),
        "abs_cosine_to_neighbour_mean": float(np.nanmean(np.abs(cosine))),
        "abs_cosine_to_neighbour_mean_isotropic": float(np.nanmean(np.abs(iso_cos))),
        "noise_accuracy_method": "data-scale sweep of the same chunks on a grid holding the effective sigma and "
                                 f"{FINE_STEPS} points per octave from half to twice it; accuracy interpolated linearly "
                                 "in log σ (exact at the effective sigma, used for the bootstrap's resampled sigmas)",
        "interval_method": f"decoded accuracy: Wilson 95 % over tokens × samples; others: percentile 95 % of {bootstrap} "
                           "bootstrap resamples over chunks",
    }
    if "posterior_std" in dims:
        summary["error_rms_over_posterior_std_median"] = float(np.median(error_rms / np.maximum(dims["posterior_std"], 1e-12)))
    prov = {
        "tool": "chunkscope",
        "version": core.__version__,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "codec": {key: v for key, v in codec.describe().items() if key != "card"},
        "predictions": predictions.provenance(),
        "codec_sha256_checked": bool(codec.sha256),
        "text": {"sha256": chunks.text_sha256, "tokens": t, "from": "the file's text" if predictions.text is not None else "its token_ids"},
        "sweep": settings.to_dict() | {"sigmas": list(grid)},
        "bootstrap": {"resamples": bootstrap, "seed": BOOTSTRAP_SEED},
        "elapsed_s": time.perf_counter() - started,
        "torch": torch.__version__,
        "python": platform.python_version(),
    }
    result = PredictionsResult(summary=summary, provenance=prov, chunks=chunks, sweep=sweep, positions=positions,
                               worst_tokens=worst, ngrams=ngrams, dims=dims, error_norm=norms, half_distance=half,
                               cosine=cosine, token_wrong_rate=token_wrong_rate, decoded_first=decoded_tok[:, 0],
                               token_text=token_text | sweep.token_text)
    result.verdict = verdict_text(_plain(summary))
    return result


def norm_histograms(result: PredictionsResult, bins: int = 40) -> dict[str, np.ndarray]:
    """For the view: counts of ‖e‖ (all samples) and of the half-distances on one shared set of bin edges."""
    norms = result.error_norm.reshape(-1)
    half = result.half_distance[np.isfinite(result.half_distance)]
    hi = float(max(norms.max(initial=0), half.max(initial=0), result.summary.get("noise_norm_at_tolerance_99") or 0)) * 1.05
    edges = np.linspace(0, hi if hi > 0 else 1, bins + 1)
    return {"edges": edges, "errors": np.histogram(norms, edges)[0] / max(1, len(norms)),
            "half_distances": np.histogram(half, edges)[0] / max(1, len(half))}


def wrong_levels(result: PredictionsResult) -> np.ndarray:
    """Per token, for colouring the text: 0 right in every sample, 1 wrong in some, 2 wrong in at least half."""
    rate = result.token_wrong_rate
    return np.where(rate >= 0.5, 2, np.where(rate > 0, 1, 0)).astype(np.int8)


def report_section(result: PredictionsResult):
    """The HTML report's section for one predictions analysis: the numbers, the verdict and two figures."""
    from html import escape

    from core.outputs.figures import Guide, Line, NamedFigure, ReportSection, histogram, line_plot

    s, prov = result.summary, result.provenance
    curves = [c for c in result.sweep.curves if c.sigma > 0]
    lines = [Line("random data-scale noise", [c.sigma for c in curves], [c.token_accuracy for c in curves],
                  band=([c.accuracy_low for c in curves], [c.accuracy_high for c in curves]), points=False)]
    if s["effective_sigma"] > 0:
        lines.append(Line("generator", [s["effective_sigma"]], [s["decoded_accuracy"]], line=False))
    caption = (f"{prov['codec']['name']} ({prov['codec']['sha256'][:10]}); predictions "
               f"{Path(prov['predictions']['path']).name} ({prov['predictions']['sha256'][:10]}); "
               f"{prov['sweep']['repeats']} repeats, seed {prov['sweep']['seed']}; chunkscope {prov['version']}")
    curve = line_plot("Token accuracy: random noise and the generator", "σ (data-scale)", "token accuracy", lines,
                      logx=True, fraction_y=True, vlines=[Guide(s["effective_sigma"], "effective σ")] if s["effective_sigma"] > 0 else ())
    half = result.half_distance[np.isfinite(result.half_distance)]
    guides = []
    if s.get("noise_norm_at_tolerance_99") is not None and math.isfinite(s["noise_norm_at_tolerance_99"]):
        guides.append(Guide(s["noise_norm_at_tolerance_99"], "noise norm at the 99 % tolerance"))
    norms = histogram("Error length against the nearest-neighbour half-distance", "distance in latent space",
                      {"generator error ‖e‖": result.error_norm.reshape(-1), "half-distance to nearest chunk": half},
                      density=True, ylabel="density", vlines=guides)

    def cell(key: str, scale: float = 1.0, digits: str = ".4g") -> str:
        v, lo, hi = s.get(key), s.get(f"{key}_low"), s.get(f"{key}_high")
        if v is None or not math.isfinite(v):
            return "—"
        out = f"{v * scale:{digits}}"
        if lo is not None and hi is not None and math.isfinite(lo) and math.isfinite(hi):
            out += f" ({lo * scale:{digits}} – {hi * scale:{digits}})"
        return out

    rows = [("effective σ (data-scale)", cell("effective_sigma")),
            ("decoded accuracy, %", cell("decoded_accuracy", 100, ".3f")),
            ("random noise of that size, %", cell("noise_accuracy_at_effective_sigma", 100, ".3f")),
            ("structured-error factor", cell("structured_error_factor", 1, ".3g")),
            ("energy score (latent units)", cell("energy_score")),
            ("Brier estimate (tokens)", cell("brier_estimate")),
            ("Brier, geometric mean over n-grams 1..4", cell("brier_ngram_geometric_mean")),
            ("share of ‖e‖² in the top 10 directions (isotropic noise)",
             f"{s['top10_direction_share']:.3g} ({s['top10_direction_share_isotropic']:.3g})"),
            ("chunks × samples", f"{s['chunks']:,} × {s['samples']}")]
    table = "<table>" + "".join(f"<tr><td class=l>{escape(a)}</td><td>{escape(b)}</td></tr>" for a, b in rows) + "</table>"
    html = f"<p>{escape(result.verdict[0].upper() + result.verdict[1:])}</p>{table}"
    after = f"<p class=muted>{escape(s['noise_accuracy_method'])}; {escape(s['interval_method'])}.</p>"
    return ReportSection("predictions", "Generator errors", html,
                         [NamedFigure("predictions-accuracy", curve, caption), NamedFigure("predictions-error-norms", norms, caption)],
                         after)
