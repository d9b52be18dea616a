"""What the workbench's views need beyond the engine's results, computed without Qt.

The live view decodes the part of the text on screen first and the rest after, so a
slider move shows up quickly; both parts use the sweep's ε (core.engine.noise.draw_eps), and
merging them gives exactly what `core.analyses.live.perturb_once` gives for the whole text.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from core.codecs.contract import opened
from core.deferred import inference_mode, torch
from core.errors import SettingsError
from core.engine.noise import NOISE_BLOCK, Encoded, check_noise, draw_eps, noise_scale
from core.engine.metrics import log_partition
from core.engine.text import Chunks
from core.codecs.tokenizer import display_table, token_display


@dataclass
class LivePerturbation:
    sigma: float
    noise: str
    seed: int
    draw: int
    predicted: np.ndarray  # [T] decoded token ids
    correct: np.ndarray  # [T] bool
    top_ids: np.ndarray  # [T, top_k]
    top_probs: np.ndarray  # [T, top_k]
    token_accuracy: float
    chunk_exact_rate: float
    tokens: int
    chunks: int

    def wrong_indices(self) -> np.ndarray:
        return np.flatnonzero(~self.correct)


@dataclass
class LiveWindow:
    """One perturbation of chunks [chunk_start, chunk_stop): the live view's unit of work."""

    sigma: float
    noise: str
    seed: int
    draw: int
    chunk_start: int
    chunk_stop: int
    token_start: int
    token_stop: int
    predicted: np.ndarray  # [n] decoded ids of tokens token_start..token_stop
    correct: np.ndarray  # [n] bool
    top_ids: np.ndarray  # [n, top_k]
    top_probs: np.ndarray  # [n, top_k]
    exact_chunks: int


@inference_mode
def perturb_window(
    codec,
    chunks: Chunks,
    encoded: Encoded,
    sigma: float,
    noise: str,
    seed: int,
    draw: int,
    chunk_start: int,
    chunk_stop: int,
    top_k: int = 5,
    should_stop: Callable[[], bool] | None = None,
) -> LiveWindow | None:
    """Perturb and decode chunks [chunk_start, chunk_stop); None if stopped.

    Any range gives the same result as the same chunks inside a larger range (ε comes
    from draw_eps). With top_k=0 only the argmax is taken (the quickest answer for the
    screen); top_ids and top_probs are then empty [n, 0] arrays."""
    codec = opened(codec)
    check_noise(noise, codec)
    n, k, dim = encoded.num_chunks, codec.chunk_size, codec.latent_dim
    chunk_start, chunk_stop = max(0, min(chunk_start, n)), max(0, min(chunk_stop, n))
    chunk_stop = max(chunk_stop, chunk_start)
    t_total = chunks.num_tokens
    t0, t1 = chunk_start * k, min(chunk_stop * k, t_total)
    predicted = np.empty(t1 - t0, dtype=np.int64)
    top_ids = np.empty((t1 - t0, top_k), dtype=np.int64)
    top_probs = np.empty((t1 - t0, top_k), dtype=np.float32)
    exact = 0
    for start in range(chunk_start, chunk_stop, NOISE_BLOCK):
        if should_stop is not None and should_stop():
            return None
        stop = min(start + NOISE_BLOCK, chunk_stop)
        mean = encoded.mean[start:stop]
        if sigma > 0:
            eps = draw_eps(seed, draw, start, stop, dim)
            z = mean + float(sigma) * eps * noise_scale(noise, encoded, start, stop)
        else:
            z = mean
        logits = codec.decode(z)
        a, b = start * k - t0, min(stop * k, t_total) - t0
        m = b - a
        if top_k > 0:
            # top-k on logits and probabilities from the log-partition: same ranking as softmax, fewer passes
            values, ids = logits.topk(top_k, dim=-1)
            probs = torch.exp(values - log_partition(logits, values[..., 0]).unsqueeze(-1))
            best = ids[..., 0]
            top_ids[a:b] = ids.reshape(-1, top_k)[:m].numpy()
            top_probs[a:b] = probs.reshape(-1, top_k)[:m].numpy()
        else:
            best = logits.argmax(-1)
        predicted[a:b] = best.reshape(-1)[:m].numpy()
        truth, mask = chunks.ids(start, stop), chunks.mask(start, stop)
        exact += int(((best == truth) | ~mask).all(1).sum())
    correct = predicted == chunks.token_ids[t0:t1]
    return LiveWindow(
        sigma=float(sigma), noise=noise, seed=seed, draw=draw, chunk_start=chunk_start, chunk_stop=chunk_stop,
        token_start=t0, token_stop=t1, predicted=predicted, correct=correct, top_ids=top_ids,
        top_probs=top_probs, exact_chunks=exact,
    )


def merge_windows(chunks: Chunks, windows: Sequence[LiveWindow]) -> LivePerturbation:
    """Join windows that tile the whole text into the LivePerturbation of the whole text."""
    if not windows:
        raise ValueError("nothing to merge")
    windows = sorted(windows, key=lambda w: w.chunk_start)
    first = windows[0]
    n = chunks.num_chunks
    covered = 0
    for w in windows:
        if w.chunk_start != covered:
            raise ValueError("live windows must tile the text without gaps or overlaps")
        covered = w.chunk_stop
    if covered != n:
        raise ValueError("live windows must cover the whole text")
    predicted = np.concatenate([w.predicted for w in windows])
    correct = np.concatenate([w.correct for w in windows])
    return LivePerturbation(
        sigma=first.sigma, noise=first.noise, seed=first.seed, draw=first.draw, predicted=predicted, correct=correct,
        top_ids=np.concatenate([w.top_ids for w in windows]), top_probs=np.concatenate([w.top_probs for w in windows]),
        token_accuracy=float(correct.mean()), chunk_exact_rate=sum(w.exact_chunks for w in windows) / n,
        tokens=chunks.num_tokens, chunks=n,
    )


def remaining_ranges(num_chunks: int, done_start: int, done_stop: int) -> list[tuple[int, int]]:
    """The ranges of the text outside [done_start, done_stop), the part below it first."""
    out = []
    if done_stop < num_chunks:
        out.append((done_stop, num_chunks))
    if done_start > 0:
        out.append((0, done_start))
    return out


@dataclass(frozen=True)
class WindowStep:
    """One step of the live view's plan: decode chunks [start, stop) keeping `top_k`
    alternatives; `show` marks the quick on-screen pass that is shown before the rest."""

    start: int
    stop: int
    top_k: int
    show: bool = False


def on_screen_first(num_chunks: int, chunk_size: int, first_token: int, last_token: int,
                    top_k: int = 5) -> list[WindowStep]:
    """Which chunk windows the live view decodes, in which order: the chunks holding tokens
    first_token..last_token argmax only (the quickest answer for the screen), then the same
    chunks with their top-k alternatives, then the rest of the text below, then above.
    The steps after the first tile the text, so their windows merge into the whole text."""
    if num_chunks <= 0:
        return []
    first = max(0, first_token // chunk_size)
    stop = min(max(last_token // chunk_size + 1, first + 1), num_chunks)
    first = min(first, stop - 1)
    steps = [WindowStep(first, stop, 0, show=True), WindowStep(first, stop, top_k)]
    steps += [WindowStep(a, b, top_k) for a, b in remaining_ranges(num_chunks, first, stop)]
    return steps


def perturb_on_screen_first(
    codec,
    chunks: Chunks,
    encoded: Encoded,
    sigma: float,
    noise: str,
    seed: int,
    draw: int,
    first_token: int,
    last_token: int,
    top_k: int = 5,
    on_screen: Callable[[LiveWindow], None] | None = None,
    should_stop: Callable[[], bool] | None = None,
) -> LivePerturbation | None:
    """The whole-text perturbation, decoded in the order of `on_screen_first`; the quick
    on-screen window goes to `on_screen` as soon as it is decoded. None if stopped."""
    windows = []
    for step in on_screen_first(encoded.num_chunks, codec.chunk_size, first_token, last_token, top_k):
        window = perturb_window(codec, chunks, encoded, sigma, noise, seed, draw, step.start, step.stop, step.top_k,
                                should_stop=should_stop)
        if window is None:
            return None
        if step.show:
            if on_screen is not None:
                on_screen(window)
        else:
            windows.append(window)
    return merge_windows(chunks, windows) if windows else None


@dataclass
class DecodedLayout:
    """The decoded text for display: original text for right tokens, the decoded piece for wrong ones."""

    text: str
    spans: np.ndarray  # [T, 2] character spans of each token in `text`


def token_layout(text: str, spans: np.ndarray, predicted: np.ndarray, correct: np.ndarray,
                 display: Callable[[int], str]) -> DecodedLayout:
    """The text as decoded: token i is text[spans[i]] when correct[i], else display(predicted[i]).

    Vectorised: every output character is gathered, by one index array, from the text
    followed by the distinct wrong pieces (each looked up once), as UTF-32 code units."""
    spans = np.clip(np.asarray(spans, dtype=np.int64).reshape(-1, 2), 0, len(text))  # as slicing would
    n = len(spans)
    if n == 0:
        return DecodedLayout("", np.zeros((0, 2), dtype=np.int64))
    low, high = int(spans.min()), int(spans.max())
    if low > 0 or high < len(text):  # only the characters these tokens cover are gathered
        text, spans = text[low:high], spans - low
    wrong = ~np.asarray(correct, dtype=bool)
    piece_ids, which = np.unique(np.asarray(predicted, dtype=np.int64)[wrong], return_inverse=True)
    pieces = [display(int(t)) for t in piece_ids.tolist()]
    piece_lengths = np.fromiter(map(len, pieces), dtype=np.int64, count=len(pieces))
    piece_starts = np.cumsum(piece_lengths) - piece_lengths + len(text)
    source = np.frombuffer((text + "".join(pieces)).encode("utf-32-le", "surrogatepass"), dtype="<u4")
    starts = spans[:, 0].copy()
    lengths = spans[:, 1] - spans[:, 0]
    starts[wrong] = piece_starts[which]
    lengths[wrong] = piece_lengths[which]
    ends = np.cumsum(lengths)
    out_starts = ends - lengths
    index = np.repeat(starts - out_starts, lengths) + np.arange(int(ends[-1]), dtype=np.int64)
    out = source[index].tobytes().decode("utf-32-le", "surrogatepass")
    return DecodedLayout(out, np.stack([out_starts, ends], axis=1))


def decoded_layout(codec, chunks: Chunks, predicted: np.ndarray, correct: np.ndarray, token_start: int = 0) -> DecodedLayout:
    """Text of tokens token_start..token_start+len(predicted) as decoded; right tokens keep their exact characters."""
    spans = chunks.spans[token_start : token_start + len(predicted)]
    return token_layout(chunks.text, spans, predicted, correct, display_table(codec.tokenizer).__getitem__)


class TextPieces:
    """A text as token pieces, read a window of tokens at a time: what a text pane shows.

    The text and the per-token arrays are held by reference (shared with the Chunks or
    result they come from), so a pane over a big text holds no copy of it; `window` makes
    only the characters of the tokens asked for."""

    def __init__(self, text: str, spans: np.ndarray):
        self.text = text
        self.spans = np.asarray(spans, dtype=np.int64).reshape(-1, 2)

    @property
    def num_tokens(self) -> int:
        return int(len(self.spans))

    def window(self, start: int, stop: int) -> DecodedLayout:
        """Tokens start..stop: their text (with the characters between them) and their spans in it.
        The first window starts at the text's start, the last ends at its end."""
        n = self.num_tokens
        start, stop = max(0, start), min(n, stop)
        if stop <= start:
            return DecodedLayout(self.text if n == 0 else "", np.zeros((0, 2), dtype=np.int64))
        low = 0 if start == 0 else int(self.spans[start, 0])
        high = len(self.text) if stop == n else int(self.spans[stop - 1, 1])
        high = max(high, low)
        spans = np.clip(self.spans[start:stop], low, high) - low
        return DecodedLayout(self.text[low:high], spans)

    def whole(self) -> str:
        return self.text

    def line_start(self, token: int, reach: int = 2000) -> int:
        """The first token of the line holding `token` if that line begins within `reach` characters, else `token`."""
        if not 0 < token < self.num_tokens:
            return token
        at = int(self.spans[token, 0])
        newline = self.text.rfind("\n", max(0, at - reach), at)
        if newline < 0:
            return token
        return min(token, int(np.searchsorted(self.spans[:, 0], newline + 1, side="left")))


class DecodedPieces(TextPieces):
    """The text as decoded (token_layout's definition), made a window at a time: right tokens
    keep their characters, wrong ones show the decoded piece. No whole-text layout is built."""

    def __init__(self, text: str, spans: np.ndarray, predicted: np.ndarray, correct: np.ndarray,
                 display: Callable[[int], str]):
        super().__init__(text, spans)
        self.predicted, self.correct, self.display = predicted, correct, display

    def window(self, start: int, stop: int) -> DecodedLayout:
        start, stop = max(0, start), min(self.num_tokens, stop)
        return token_layout(self.text, self.spans[start:stop], self.predicted[start:stop], self.correct[start:stop],
                            self.display)

    def whole(self) -> str:
        return token_layout(self.text, self.spans, self.predicted, self.correct, self.display).text


def decoded_pieces(codec, chunks: Chunks, predicted: np.ndarray, correct: np.ndarray) -> DecodedPieces:
    """The decoded text of a whole text, as pieces a pane shows a window at a time."""
    return DecodedPieces(chunks.text, chunks.spans, predicted, correct, display_table(codec.tokenizer).__getitem__)


def token_at(spans: np.ndarray, char_pos: int) -> int | None:
    """Index of the token whose span holds character char_pos (None outside the text)."""
    if len(spans) == 0 or char_pos < 0:
        return None
    i = int(np.searchsorted(spans[:, 1], char_pos, side="right"))
    while i < len(spans) and spans[i, 1] <= spans[i, 0]:
        i += 1  # empty spans (partial characters) hold nothing
    if i >= len(spans) or not spans[i, 0] <= char_pos < spans[i, 1]:
        return None
    return i


def sigma_grid(start: float, stop: float, points: int, spacing: str = "log", include_zero: bool = True) -> tuple[float, ...]:
    """A sweep grid of `points` sigmas from start to stop, evenly or geometrically spaced, optionally with 0."""
    if points < 1 or points > 10_000:
        raise SettingsError(f"the number of grid points must be from 1 to 10000, not {points}.")
    if not (math.isfinite(start) and math.isfinite(stop)) or start < 0 or stop < start:
        raise SettingsError(f"the sigma range must satisfy 0 <= from <= to, not {start:g} to {stop:g}.")
    if spacing == "log":
        if start <= 0:
            raise SettingsError("a log-spaced grid needs 'from' above 0 (zero can be added separately).")
        values = np.geomspace(start, stop, points) if points > 1 else np.array([start])
    elif spacing == "linear":
        values = np.linspace(start, stop, points) if points > 1 else np.array([start])
    else:
        raise SettingsError(f"grid spacing must be log or linear, not {spacing!r}.")
    grid = {round(float(v), 6) for v in values}
    if include_zero:
        grid.add(0.0)
    return tuple(sorted(grid))


def critical_sigma_levels(critical_sigma: np.ndarray, sigmas: Sequence[float]) -> np.ndarray:
    """Per token: the index of its critical sigma on the grid (-1 where it never broke)."""
    grid = np.asarray(sigmas, dtype=np.float64)
    out = np.full(len(critical_sigma), -1, dtype=np.int64)
    broke = ~np.isnan(critical_sigma)
    out[broke] = np.clip(np.searchsorted(grid, critical_sigma[broke] - 1e-12, side="left"), 0, len(grid) - 1)
    return out


@dataclass
class TokenStory:
    """One token across a sweep: accuracy per sigma and what repeat 0 decoded it to."""

    index: int
    text: str
    critical_sigma: float
    accuracy: np.ndarray  # [S]
    decoded_as: list[tuple[float, str, int]]  # (first sigma, decoded text, sigmas at which it appeared)


def token_story(result, tokenizer, token_index: int) -> TokenStory:
    chunks = result.chunks
    a, b = chunks.spans[token_index]
    truth = int(chunks.token_ids[token_index])
    decoded = result.decoded[token_index].astype(np.int64)
    seen: dict[int, list[float]] = {}
    for sigma, tid in zip(result.sigmas, decoded.tolist()):
        if tid != truth:
            seen.setdefault(tid, []).append(sigma)
    stories = sorted(((v[0], token_display(tokenizer, k), len(v)) for k, v in seen.items()), key=lambda x: x[0])
    return TokenStory(
        index=token_index,
        text=chunks.text[a:b] or token_display(tokenizer, truth),
        critical_sigma=float(result.critical_sigma[token_index]),
        accuracy=result.token_accuracy_curve(token_index),
        decoded_as=stories,
    )


def error_rate_floor(result) -> float:
    """Half of one error among all scored tokens: where a log axis draws a sigma with no errors."""
    tokens = max((c.tokens for c in result.curves), default=1)
    return 0.5 / max(tokens, 1)


def bucket_accuracy_table(result) -> tuple[list[str], list[int], np.ndarray]:
    """Frequency-bucket labels, tokens per bucket (at the first sigma) and accuracy [buckets, S]."""
    if not result.curves:
        return [], [], np.zeros((0, 0))
    labels = list(result.curves[0].bucket_labels)
    counts = [t // result.settings.repeats for t in result.curves[0].bucket_tokens]
    acc = np.array([c.bucket_accuracy for c in result.curves], dtype=np.float64).T
    return labels, counts, acc
