"""Streaming metrics at one sigma: `update(logits, targets, mask)` batch by batch, then `compute()`.

State is a few counters, so any amount of text streams in bounded memory and two
partial accumulators merge. Definitions follow DESIGN.md.
"""

from __future__ import annotations

import heapq
import math
from collections import Counter
from dataclasses import asdict, dataclass, field

import numpy as np

from core.deferred import inference_mode, torch

ECE_BINS = 15
EXP_FLOOR = -80.0
SQUARE_FLOOR = 2.0 ** -60
WILSON_Z = 1.959963984540054  # two-sided 95 %: the 0.975 quantile of N(0, 1)
FREQUENCY_EDGES = (1, 2, 4, 16, 64, 256)  # occurrences of a token type in the evaluated text


def wilson_interval(successes: int, n: int, z: float = WILSON_Z) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion (Wilson 1927)."""
    if n <= 0:
        return (float("nan"), float("nan"))
    p = successes / n
    denom = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    low = 0.0 if successes == 0 else max(0.0, centre - half)
    high = 1.0 if successes == n else min(1.0, centre + half)
    return (low, high)


def frequency_bucket_labels() -> list[str]:
    labels = []
    for lo, hi in zip(FREQUENCY_EDGES, FREQUENCY_EDGES[1:]):
        labels.append(f"{lo}" if hi - lo == 1 else f"{lo}–{hi - 1}")
    labels.append(f"≥{FREQUENCY_EDGES[-1]}")
    return labels


def frequency_buckets(token_ids: np.ndarray) -> np.ndarray:
    """Bucket index of each token by how often its type occurs in the same text."""
    _, inverse, counts = np.unique(token_ids, return_inverse=True, return_counts=True)
    per_token = counts[inverse]
    return (np.searchsorted(np.asarray(FREQUENCY_EDGES), per_token, side="right") - 1).astype(np.int64)


def ece_bin_index(confidence: torch.Tensor, bins: int = ECE_BINS) -> torch.Tensor:
    """Equal-width bins ((m-1)/M, m/M]-style via bucketize; confidence 1.0 joins the top bin."""
    boundaries = torch.linspace(0, 1, bins + 1, dtype=confidence.dtype)
    return (torch.bucketize(confidence, boundaries, right=True) - 1).clamp_(0, bins - 1)


@dataclass
class TokenScores:
    """Per-token outputs of one scored batch, flattened over real tokens."""

    predicted: torch.Tensor  # [B, K] argmax ids
    correct: torch.Tensor  # [B, K] bool


@inference_mode
def log_partition(logits: torch.Tensor, top: torch.Tensor) -> torch.Tensor:
    """log Σ exp(logits) over the last axis, given its max `top`; overwrites `logits`.

    Terms below e^-80 of the top are floored (they change nothing in float32 and would
    otherwise make exp produce slow subnormals)."""
    return top + logits.sub_(top.unsqueeze(-1)).clamp_(min=EXP_FLOOR).exp_().sum(-1).log()


@inference_mode
def score_logits(logits: torch.Tensor, targets: torch.Tensor, inplace: bool = False):
    """argmax, top-1 confidence, NLL of the truth and Brier score per token.

    Few passes over the vocabulary: max, exp, sum, norm. With inplace=True the logits
    buffer is reused for the exponentials (the sweep owns its logits; this keeps the
    metrics' cost small beside the decoder's).
    """
    top, predicted = logits.max(-1)
    true_logit = logits.gather(-1, targets.unsqueeze(-1)).squeeze(-1)
    shifted = logits.sub_(top.unsqueeze(-1)) if inplace else logits - top.unsqueeze(-1)
    # below e^-80 (~2e-35, relative to the top token) a probability changes nothing in float32 sums,
    # and leaving it in makes exp produce subnormals, which are many times slower on x86
    e = shifted.clamp_(min=EXP_FLOOR).exp_()
    s = e.sum(-1)
    # Σ p² for the Brier score: squares of terms below 2^-60 (~1e-18) are subnormal in float32 and make the
    # norm several times slower, yet each adds under 1e-36 to a sum >= 1; raise them to 2^-60 first
    sq = torch.linalg.vector_norm(e.clamp_(min=SQUARE_FLOOR), dim=-1).square()
    nll = s.log() - (true_logit - top)
    p_true = torch.exp(-nll)
    confidence = 1.0 / s
    brier = sq / (s * s) - 2.0 * p_true + 1.0
    return predicted, confidence, nll, brier


@dataclass
class SigmaMetrics:
    sigma: float
    tokens: int
    correct: int
    token_accuracy: float
    accuracy_low: float
    accuracy_high: float
    chunks: int
    chunks_exact: int
    chunk_exact_rate: float
    position_accuracy: list[float]
    nll: float
    brier: float
    ece: float
    bucket_labels: list[str]
    bucket_tokens: list[int]
    bucket_accuracy: list[float]
    confusions: list[tuple[int, int, int]] = field(default_factory=list)  # (true, decoded, count), most first

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> "SigmaMetrics":
        data = dict(data)
        data["confusions"] = [tuple(c) for c in data.get("confusions", [])]
        return cls(**data)


class SigmaAccumulator:
    """Accumulates every metric of DESIGN.md at one sigma over real tokens and repeats."""

    def __init__(self, sigma: float, chunk_size: int, vocab_size: int, buckets: int = len(FREQUENCY_EDGES)):
        self.sigma = float(sigma)
        self.vocab_size = vocab_size
        self.tokens = 0
        self.correct = 0
        self.chunks = 0
        self.chunks_exact = 0
        self.position_correct = np.zeros(chunk_size, dtype=np.int64)
        self.position_total = np.zeros(chunk_size, dtype=np.int64)
        self.nll_sum = 0.0
        self.brier_sum = 0.0
        self.bin_count = np.zeros(ECE_BINS, dtype=np.int64)
        self.bin_confidence = np.zeros(ECE_BINS, dtype=np.float64)
        self.bin_correct = np.zeros(ECE_BINS, dtype=np.int64)
        self.bucket_correct = np.zeros(buckets, dtype=np.int64)
        self.bucket_total = np.zeros(buckets, dtype=np.int64)
        self.confusions: Counter[int] = Counter()

    def update(
        self,
        logits: torch.Tensor,
        targets: torch.Tensor,
        mask: torch.Tensor,
        bucket: torch.Tensor | None = None,
        inplace: bool = False,
        times: int = 1,
    ) -> TokenScores:
        predicted, confidence, nll, brier = score_logits(logits, targets, inplace=inplace)
        correct = predicted == targets
        self.add(predicted, correct, confidence, nll, brier, targets, mask, bucket, times)
        return TokenScores(predicted, correct)

    def add(self, predicted, correct, confidence, nll, brier, targets, mask, bucket=None, times: int = 1) -> None:
        """Add one scored batch, `times` over (repeats that are identical, as at σ = 0, count once each)."""
        n = int(times)
        real_correct = correct & mask
        self.tokens += n * int(mask.sum())
        self.correct += n * int(real_correct.sum())
        self.chunks += n * int(mask.shape[0])
        self.chunks_exact += n * int((correct | ~mask).all(1).sum())
        self.position_correct += n * real_correct.sum(0).numpy()
        self.position_total += n * mask.sum(0).numpy()
        self.nll_sum += n * float(nll[mask].double().sum())
        self.brier_sum += n * float(brier[mask].double().sum())
        conf = confidence[mask]
        bins = ece_bin_index(conf).numpy()
        self.bin_count += n * np.bincount(bins, minlength=ECE_BINS)
        self.bin_confidence += n * np.bincount(bins, weights=conf.double().numpy(), minlength=ECE_BINS)
        self.bin_correct += n * np.bincount(bins, weights=real_correct[mask].numpy(), minlength=ECE_BINS).astype(np.int64)
        if bucket is not None:
            b = bucket[mask].numpy()
            nb = len(self.bucket_total)
            self.bucket_total += n * np.bincount(b, minlength=nb)
            self.bucket_correct += n * np.bincount(b, weights=real_correct[mask].numpy(), minlength=nb).astype(np.int64)
        wrong = mask & ~correct
        if bool(wrong.any()):
            keys = targets[wrong] * self.vocab_size + predicted[wrong]
            values, counts = torch.unique(keys, return_counts=True)
            self.confusions.update(dict(zip(values.tolist(), (n * counts).tolist())))

    _SCALARS = ("tokens", "correct", "chunks", "chunks_exact", "nll_sum", "brier_sum")
    _ARRAYS = ("position_correct", "position_total", "bin_count", "bin_confidence", "bin_correct", "bucket_correct", "bucket_total")

    def merge(self, other: "SigmaAccumulator") -> None:
        """Add another accumulator's state at the same sigma (counts add exactly, sums to float rounding)."""
        if other.sigma != self.sigma or len(other.position_total) != len(self.position_total):
            raise ValueError(f"an accumulator at σ = {other.sigma} does not merge into one at σ = {self.sigma}.")
        for name in self._SCALARS:
            setattr(self, name, getattr(self, name) + getattr(other, name))
        for name in self._ARRAYS:
            getattr(self, name).__iadd__(getattr(other, name))
        self.confusions.update(other.confusions)

    def state(self) -> dict:
        """Everything this accumulator holds, as numbers and NumPy arrays (picklable, no torch)."""
        keys = np.fromiter(self.confusions.keys(), dtype=np.int64, count=len(self.confusions))
        counts = np.fromiter(self.confusions.values(), dtype=np.int64, count=len(self.confusions))
        return {"sigma": self.sigma, "vocab_size": self.vocab_size,
                **{name: getattr(self, name) for name in self._SCALARS},
                **{name: getattr(self, name).copy() for name in self._ARRAYS},
                "confusion_keys": keys, "confusion_counts": counts}

    @classmethod
    def from_state(cls, state: dict) -> "SigmaAccumulator":
        acc = cls(state["sigma"], len(state["position_total"]), int(state["vocab_size"]), len(state["bucket_total"]))
        for name in cls._SCALARS:
            setattr(acc, name, state[name])
        for name in cls._ARRAYS:
            setattr(acc, name, np.array(state[name], dtype=getattr(acc, name).dtype))
        acc.confusions = Counter(dict(zip(state["confusion_keys"].tolist(), state["confusion_counts"].tolist())))
        return acc

    def ece(self) -> float:
        total = self.bin_count.sum()
        if total == 0:
            return float("nan")
        used = self.bin_count > 0
        acc = self.bin_correct[used] / self.bin_count[used]
        conf = self.bin_confidence[used] / self.bin_count[used]
        return float(np.sum(np.abs(acc - conf) * self.bin_count[used]) / total)

    def compute(self, max_confusions: int = 200) -> SigmaMetrics:
        n = self.tokens
        low, high = wilson_interval(self.correct, n)
        with np.errstate(invalid="ignore", divide="ignore"):
            position = np.where(self.position_total > 0, self.position_correct / np.maximum(self.position_total, 1), np.nan)
            bucket = np.where(self.bucket_total > 0, self.bucket_correct / np.maximum(self.bucket_total, 1), np.nan)
        # most frequent first, ties by (true, decoded) id: the same list however the counts were gathered
        top = heapq.nsmallest(max_confusions, self.confusions.items(), key=lambda kv: (-kv[1], kv[0]))
        confusions = [(key // self.vocab_size, key % self.vocab_size, count) for key, count in top]
        return SigmaMetrics(
            sigma=self.sigma,
            tokens=n,
            correct=self.correct,
            token_accuracy=self.correct / n if n else float("nan"),
            accuracy_low=low,
            accuracy_high=high,
            chunks=self.chunks,
            chunks_exact=self.chunks_exact,
            chunk_exact_rate=self.chunks_exact / self.chunks if self.chunks else float("nan"),
            position_accuracy=[float(x) for x in position],
            nll=self.nll_sum / n if n else float("nan"),
            brier=self.brier_sum / n if n else float("nan"),
            ece=self.ece(),
            bucket_labels=frequency_bucket_labels(),
            bucket_tokens=[int(x) for x in self.bucket_total],
            bucket_accuracy=[float(x) for x in bucket],
            confusions=confusions,
        )
