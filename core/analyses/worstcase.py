"""Worst case: per chunk, the smallest perturbation of its mean found that changes its decode.

The *reference* of a chunk is the decode of its mean (argmax at every real position);
"the chunk breaks" means some real position decodes to another token. For each chunk,
batched over chunks:

1. **Search** (minimal-perturbation attack, DeepFool-style multiclass step). The margin of
   position p against rival token k is f_ref(p) − f_k(p) (logits). At the current point the
   `candidates` (position, rival) pairs with the smallest margins are linearised (one
   backward pass each); the step goes to the nearest of their linearised boundaries,
   m / ‖∇m‖ away along −∇m. Steps accumulate into δ; the chunk is checked at
   mean + (1 + overshoot)·δ, and the search stops for it once that point breaks it. On a
   decoder whose logits are linear in z this is exact in one step when the nearest
   boundary is among the candidates (min over p, k of m / ‖w_ref − w_k‖).
2. **Line search to the boundary** along u = δ / ‖δ‖ between t = 0 (the mean: unbroken)
   and the breaking point: false position on the smallest margin, evaluated in pairs
   around the estimate, until the bracket [lo, hi] is narrower than `tolerance`·hi
   (lo unbroken, hi broken).
3. **Verification**: mean + hi·u is decoded once more; only a perturbation that really
   breaks the chunk is reported. A chunk whose search found no breaking point, or whose
   verification failed, is counted as failed, with NaN radius.

Beside it the **random radius**: the same data-scale sweep as `run_sweep` (ε from
`draw_eps(seed, repeat, ...)`, perturbation σ·r ⊙ ε, the grid ascending). For each repeat,
the first grid σ at which the chunk breaks gives the noise norm σ·‖r ⊙ ε‖ (absolute) and
σ·‖ε‖ (relative); `random_radius` is the smallest absolute one over the repeats and
`random_relative_radius` the smallest relative one; NaN when no repeat breaks the chunk
on the grid. Since the chunk breaks at that point, the boundary along that ray is at most
that far, so a worst-case radius above it means the search missed a closer boundary.

Limits: the search is exact on a linear decoder only when the nearest (position, rival) pair is
among the `candidates` smallest margins; with few tokens and rivals of very different gradient
norms it can miss it (a linear decoder with 8 tokens and 4 candidates: 1 chunk in 300 came out
2 % above the closed form; with every pair a candidate, none). Every reported radius is still a
verified breaking perturbation, so an error is always an overestimate.

Decoder calls are counted per chunk: each latent decoded is one forward, each gradient of
one margin one backward.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from core.codecs.contract import GradientsUnavailable, opened
from core.deferred import torch
from core.engine.noise import Encoded, Progress, ShouldStop, draw_eps, encode_chunks
from core.engine.sweep import DEFAULT_REPEATS, DEFAULT_SEED, DEFAULT_SIGMAS, provenance, token_texts
from core.engine.text import Chunks
from core.errors import SettingsError, SweepCancelled
from core.outputs.files import Outputs, result_folder

if TYPE_CHECKING:
    from core.engine.cluster import Where

DEFAULT_CANDIDATES = 4
DEFAULT_ITERATIONS = 6
DEFAULT_OVERSHOOT = 0.02
DEFAULT_TOLERANCE = 0.005
DEFAULT_BATCH = 512
LINE_SEARCH_ROUNDS = 12
EXPANSIONS = 4  # doublings of the step when the search's last point still does not break the chunk

WORST_CASE_FOLDER = result_folder("worst_case.json", "worst_case.csv")
CSV_COLUMNS = ("chunk", "radius", "relative_radius", "random_radius", "random_relative_radius", "random_sigma",
               "position", "from_token", "to_token", "from_id", "to_id", "verified", "forward_calls", "backward_calls")


@dataclass(frozen=True)
class WorstCaseSettings:
    seed: int = DEFAULT_SEED
    sigmas: tuple[float, ...] = DEFAULT_SIGMAS  # the data-scale grid of the random radius
    repeats: int = DEFAULT_REPEATS
    candidates: int = DEFAULT_CANDIDATES
    iterations: int = DEFAULT_ITERATIONS
    overshoot: float = DEFAULT_OVERSHOOT
    tolerance: float = DEFAULT_TOLERANCE
    batch_chunks: int = DEFAULT_BATCH

    def validated(self) -> "WorstCaseSettings":
        """The one validator of worst-case settings: a cleaned copy, or one sentence."""
        def whole(name: str, value, low: int, high: int) -> int:
            if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
                raise SettingsError(f"{name} must be a whole number from {low} to {high}, not {value!r}.")
            return value

        whole("the seed", self.seed, 0, 2**63 - 1)
        whole("repeats", self.repeats, 1, 10_000)
        whole("the number of candidate rivals", self.candidates, 1, 64)
        whole("the number of search iterations", self.iterations, 1, 100)
        whole("the batch", self.batch_chunks, 1, 1_000_000)
        for name, value, high in (("the overshoot", self.overshoot, 1.0), ("the tolerance", self.tolerance, 0.1)):
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= high:
                raise SettingsError(f"{name} must be a number above 0 and at most {high}, not {value!r}.")
        try:
            sigmas = tuple(sorted({float(s) for s in self.sigmas}))
        except (TypeError, ValueError):
            raise SettingsError("the sigma grid must be a list of numbers.") from None
        if not any(s > 0 for s in sigmas) or any(not math.isfinite(s) or s < 0 for s in sigmas):
            raise SettingsError("the sigma grid of the random radius needs finite sigmas >= 0, at least one above 0.")
        return WorstCaseSettings(self.seed, sigmas, self.repeats, self.candidates, self.iterations, float(self.overshoot),
                                 float(self.tolerance), self.batch_chunks)

    def to_dict(self) -> dict[str, Any]:
        return {"seed": self.seed, "sigmas": list(self.sigmas), "repeats": self.repeats, "noise": "data-scale",
                "candidates": self.candidates, "iterations": self.iterations, "overshoot": self.overshoot,
                "tolerance": self.tolerance}


def _nan(n: int) -> np.ndarray:
    return np.full(n, np.nan)


@dataclass
class WorstCaseResult:
    settings: WorstCaseSettings
    provenance: dict[str, Any]
    chunks: Chunks
    radius: np.ndarray  # [N] ‖δ‖ of the verified perturbation, NaN where the search failed
    relative_radius: np.ndarray  # [N] ‖δ / r‖
    random_radius: np.ndarray  # [N] smallest σ·‖r ⊙ ε‖ over repeats at the first breaking grid σ; NaN: never broke
    random_relative_radius: np.ndarray  # [N] smallest σ·‖ε‖ likewise
    random_sigma: np.ndarray  # [N] the grid σ of the repeat giving random_radius
    position: np.ndarray  # [N] position whose token flipped (-1 where failed)
    from_id: np.ndarray  # [N] the token decoded at the mean there
    to_id: np.ndarray  # [N] what it became
    perturbation: np.ndarray  # [N, D] float32, the verified δ (zeros where failed)
    forward_calls: np.ndarray  # [N] latents decoded for this chunk by the search (verification included)
    backward_calls: np.ndarray  # [N] margin gradients taken for this chunk
    random_calls: int  # latents decoded by the random sweep, all chunks
    latent_rms: float
    elapsed_s: float
    token_text: dict[int, str] = field(default_factory=dict)
    generator: "GeneratorComparison | None" = None  # set by with_generator when predictions are held against it

    @property
    def num_chunks(self) -> int:
        return int(len(self.radius))

    @property
    def verified(self) -> np.ndarray:
        return ~np.isnan(self.radius)

    @property
    def failed(self) -> int:
        return int((~self.verified).sum())

    def display(self, token_id: int) -> str:
        return self.token_text.get(int(token_id), f"#{int(token_id)}")

    def below_random(self) -> tuple[int, int]:
        """(chunks whose worst-case radius is below their random radius, chunks where both are known)."""
        both = self.verified & ~np.isnan(self.random_radius)
        return int((self.radius[both] < self.random_radius[both]).sum()), int(both.sum())

    def summary(self) -> dict[str, Any]:
        ok = self.verified
        below, both = self.below_random()
        broke = ~np.isnan(self.random_radius)
        calls = self.forward_calls + self.backward_calls

        def median(values: np.ndarray) -> float | None:
            values = values[~np.isnan(values)]
            return float(np.median(values)) if len(values) else None

        ratio = self.radius[ok & broke] / self.random_radius[ok & broke]
        return {
            "chunks": self.num_chunks,
            "verified": int(ok.sum()),
            "failed": self.failed,
            "radius_median": median(self.radius),
            "radius_min": float(np.nanmin(self.radius)) if ok.any() else None,
            "relative_radius_median": median(self.relative_radius),
            "random_radius_median": median(self.random_radius),
            "random_relative_radius_median": median(self.random_relative_radius),
            "broke_on_grid": int(broke.sum()),
            "below_random": below,
            "compared": both,
            "below_random_rate": below / both if both else None,
            "radius_over_random_median": float(np.median(ratio)) if len(ratio) else None,
            "calls_per_chunk": float(calls.mean()) if len(calls) else 0.0,
            "forward_calls_per_chunk": float(self.forward_calls.mean()) if len(calls) else 0.0,
            "backward_calls_per_chunk": float(self.backward_calls.mean()) if len(calls) else 0.0,
            "random_calls_per_chunk": self.random_calls / self.num_chunks if self.num_chunks else 0.0,
            "latent_rms": self.latent_rms,
            "elapsed_s": self.elapsed_s,
            **(self.generator.summary() if self.generator is not None else {}),
        }

    def fragile(self, count: int = 20) -> list[int]:
        """Chunk indices with the smallest verified radii, most fragile first."""
        ok = np.flatnonzero(self.verified)
        return [int(i) for i in ok[np.argsort(self.radius[ok], kind="stable")][:count]]

    def chunk_text(self, chunk: int) -> str:
        """The characters of the text that chunk `chunk` covers."""
        k = self.chunks.chunk_size
        spans = self.chunks.spans[chunk * k : (chunk + 1) * k]
        return self.chunks.text[int(spans[0, 0]) : int(spans[-1, 1])] if len(spans) else ""

    def to_json_dict(self) -> dict[str, Any]:
        return {"kind": "worst case", "provenance": self.provenance, "settings": self.settings.to_dict(), "summary": self.summary()}

    def csv_text(self) -> str:
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\n")
        gen = self.generator
        writer.writerow(CSV_COLUMNS + (("generator_error_norm",) if gen is not None else ()))

        def num(x: float) -> str:
            return "nan" if np.isnan(x) else f"{x:.6g}"

        for i in range(self.num_chunks):
            ok = not np.isnan(self.radius[i])
            writer.writerow([
                i, num(self.radius[i]), num(self.relative_radius[i]), num(self.random_radius[i]),
                num(self.random_relative_radius[i]), num(self.random_sigma[i]), int(self.position[i]),
                self.display(self.from_id[i]) if ok else "", self.display(self.to_id[i]) if ok else "",
                int(self.from_id[i]), int(self.to_id[i]), int(ok), int(self.forward_calls[i]), int(self.backward_calls[i]),
                *((num(gen.error_norm[i]),) if gen is not None else ()),
            ])
        return out.getvalue()

    def write(self, directory: str | os.PathLike, force: bool = False) -> Path:
        """DIR/worst_case.json and DIR/worst_case.csv, staged and put in place together."""
        directory = Path(directory)
        with Outputs(force) as outputs:
            self.write_into(outputs.folder(directory, WORST_CASE_FOLDER))
        return directory

    def write_into(self, folder: Path) -> None:
        (folder / "worst_case.json").write_text(json.dumps(self.to_json_dict(), indent=1, allow_nan=True), encoding="utf-8")
        (folder / "worst_case.csv").write_text(self.csv_text(), encoding="utf-8")


def refuse_without_gradients(codec) -> None:
    codec = opened(codec)
    if not codec.supports_gradients:
        raise GradientsUnavailable(
            f"the worst-case search follows gradients through the decoder, and {codec.name} (opened as "
            f"{codec.source.opened_as}) cannot give them; open its torch checkpoint or a Python adapter instead."
        )


def _margins(logits: "torch.Tensor", ref: "torch.Tensor", mask: "torch.Tensor") -> "torch.Tensor":
    """[n, K, V]: f_ref − f_k per position and rival; +inf at the reference token itself and at padding."""
    f_ref = logits.gather(-1, ref.unsqueeze(-1))
    diff = f_ref - logits
    diff.scatter_(-1, ref.unsqueeze(-1), math.inf)
    return diff.masked_fill(~mask.unsqueeze(-1), math.inf)


def _broken(logits: "torch.Tensor", ref: "torch.Tensor", mask: "torch.Tensor") -> "torch.Tensor":
    return ((logits.argmax(-1) != ref) & mask).any(1)


class _Search:
    """The search, line search and verification for one batch of chunks."""

    def __init__(self, codec, settings: WorstCaseSettings, should_stop: ShouldStop | None):
        self.codec = codec
        self.s = settings
        self.should_stop = should_stop

    def _check(self):
        if self.should_stop is not None and self.should_stop():
            raise SweepCancelled()

    def decode(self, z, rows, forward):
        self._check()
        forward[rows] += 1
        return self.codec.decode(z)

    def run(self, mean, mask):
        """The search for chunks `mean` [n, D]; their reference (the mean's decode) comes from its first decode."""
        s = self.s
        n, dim = mean.shape
        forward = np.zeros(n, dtype=np.int64)
        backward = np.zeros(n, dtype=np.int64)
        delta = torch.zeros(n, dim)
        found = torch.zeros(n, dtype=torch.bool)
        h_hi = torch.full((n,), math.nan)
        h_zero = torch.full((n,), math.inf)
        active = torch.arange(n)
        grow = 1.0 + s.overshoot
        for iteration in range(s.iterations + 1):
            if len(active) == 0:
                break
            self._check()
            forward[active.numpy()] += 1
            z = (mean[active] + grow * delta[active]).requires_grad_(True)
            logits = self.codec.decode_with_grad(z)
            if iteration == 0:
                ref = logits.detach().argmax(-1)
            diff = _margins(logits.detach(), ref[active], mask[active])
            low = diff.flatten(1).amin(1)
            if iteration == 0:
                h_zero[active] = low
            broke = low < 0
            found[active[broke]] = True
            h_hi[active[broke]] = low[broke]
            if iteration == s.iterations or bool(broke.all()):
                break
            keep = torch.nonzero(~broke).squeeze(1)
            c = min(s.candidates, diff.shape[1] * diff.shape[2])
            values, where = diff[keep].flatten(1).topk(c, dim=1, largest=False)
            positions, rivals = where // diff.shape[2], where % diff.shape[2]
            rows = keep.unsqueeze(1).expand(-1, c)
            refs = ref[active][rows, positions]
            chosen = logits[rows, positions, refs] - logits[rows, positions, rivals]  # [m, c], margins with a graph
            grads = []
            for j in range(c):
                self._check()
                (g,) = torch.autograd.grad(chosen[:, j].sum(), z, retain_graph=j < c - 1)
                grads.append(g[keep])
            backward[active[keep].numpy()] += c
            grads = torch.stack(grads, 1)  # [m, c, D]
            norms = grads.norm(dim=-1)
            ratio = torch.where(torch.isfinite(values) & (norms > 0), values / norms, torch.full_like(values, math.inf))
            best = ratio.argmin(1)
            pick = torch.arange(len(keep))
            g, m, gn = grads[pick, best], values[pick, best], norms[pick, best]
            usable = torch.isfinite(ratio[pick, best])
            step = torch.where(usable.unsqueeze(1), -(m / gn.clamp_min(1e-30) ** 2).unsqueeze(1) * g, torch.zeros_like(g))
            delta[active[keep]] += step.detach()
            active = active[keep]
        # not broken after the iterations: try farther along the same direction
        length = delta.norm(dim=1)
        lo = torch.zeros(n)
        hi = grow * length
        for _ in range(EXPANSIONS):
            todo = torch.nonzero(~found & (length > 0)).squeeze(1)
            if len(todo) == 0:
                break
            lo[todo] = hi[todo]
            hi[todo] = hi[todo] * 2
            direction = delta[todo] / length[todo].unsqueeze(1)
            logits = self.decode(mean[todo] + hi[todo].unsqueeze(1) * direction, todo.numpy(), forward)
            low = _margins(logits, ref[todo], mask[todo]).flatten(1).amin(1)
            broke = low < 0
            found[todo[broke]] = True
            h_hi[todo[broke]] = low[broke]
        rows = torch.nonzero(found).squeeze(1)
        h_lo = torch.where(lo == 0, h_zero, torch.full((n,), math.nan))  # NaN: no margin known at lo
        lo, hi = self._line_search(mean, ref, mask, delta, length, rows, lo, hi, h_lo, h_hi, forward)
        return ref, self._verify(mean, ref, mask, delta, length, rows, hi, forward, backward)

    def _line_search(self, mean, ref, mask, delta, length, rows, lo, hi, h_lo, h_hi, forward):
        tol = self.s.tolerance
        for round_ in range(LINE_SEARCH_ROUNDS):
            todo = rows[(hi[rows] - lo[rows]) > tol * hi[rows]]
            if len(todo) == 0:
                break
            a, b = lo[todo], hi[todo]
            width = b - a
            fa, fb = h_lo[todo], h_hi[todo]
            guess = a + width * fa / (fa - fb)
            use_mid = ~torch.isfinite(guess) | (round_ >= 6)
            guess = torch.where(use_mid, a + width / 2, guess)
            half = 0.4 * tol * b
            t1 = torch.maximum(guess - half, a + 0.05 * width)
            t2 = torch.maximum(torch.minimum(guess + half, b - 0.05 * width), t1)
            direction = delta[todo] / length[todo].unsqueeze(1)
            z = torch.cat([mean[todo] + t1.unsqueeze(1) * direction, mean[todo] + t2.unsqueeze(1) * direction])
            forward[todo.numpy()] += 1  # one of the two latents; the other is counted by decode()
            logits = self.decode(z, todo.numpy(), forward)
            both = _margins(logits, torch.cat([ref[todo]] * 2), torch.cat([mask[todo]] * 2)).flatten(1).amin(1)
            h1, h2 = both[: len(todo)], both[len(todo):]
            first_broke = h1 < 0
            # t1 broke: the bracket becomes [a, t1]; else lo = t1, and t2 decides the other end
            new_lo = torch.where(first_broke, a, torch.where(h2 < 0, t1, t2))
            new_hi = torch.where(first_broke, t1, torch.where(h2 < 0, t2, b))
            new_h_lo = torch.where(first_broke, fa, torch.where(h2 < 0, h1, h2))
            new_h_hi = torch.where(first_broke, h1, torch.where(h2 < 0, h2, fb))
            lo[todo], hi[todo], h_lo[todo], h_hi[todo] = new_lo, new_hi, new_h_lo, new_h_hi
        return lo, hi

    def _verify(self, mean, ref, mask, delta, length, rows, hi, forward, backward):
        n, dim = mean.shape
        perturbation = torch.zeros(n, dim)
        position = np.full(n, -1, dtype=np.int64)
        from_id = np.full(n, -1, dtype=np.int64)
        to_id = np.full(n, -1, dtype=np.int64)
        verified = np.zeros(n, dtype=bool)
        if len(rows):
            d = delta[rows] / length[rows].unsqueeze(1) * hi[rows].unsqueeze(1)
            logits = self.decode(mean[rows] + d, rows.numpy(), forward)
            broke = _broken(logits, ref[rows], mask[rows])
            diff = _margins(logits, ref[rows], mask[rows])
            per_position = diff.amin(-1)  # the most negative margin marks the position that flipped
            pos = per_position.argmin(1)
            pick = torch.arange(len(rows))
            r = rows[broke].numpy()
            perturbation[rows[broke]] = d[broke]
            verified[r] = True
            position[r] = pos[broke].numpy()
            from_id[r] = ref[rows, pos][broke].numpy()
            to_id[r] = logits[pick, pos].argmax(-1)[broke].numpy()
        return perturbation, verified, position, from_id, to_id, forward, backward


def random_radii(codec, encoded: Encoded, ref: "torch.Tensor", mask: "torch.Tensor", start: int, stop: int,
                 settings: WorstCaseSettings, should_stop: ShouldStop | None = None, first: int = 0):
    """Per chunk start..stop: (random_radius, random_relative_radius, random_sigma, latents decoded), see the module.
    Row 0 of `encoded` is chunk `first` of the text (a shard's own latents; ε is drawn for the text's chunks)."""
    n = stop - start
    scale = encoded.rms_per_dim.unsqueeze(0)
    mean = encoded.mean[start - first : stop - first]
    best_abs, best_rel, best_sigma = _nan(n), _nan(n), _nan(n)
    decoded = 0
    sigmas = [s for s in settings.sigmas if s > 0]
    for repeat in range(settings.repeats):
        eps = draw_eps(settings.seed, repeat, start, stop, mean.shape[1])
        step = eps * scale
        abs_norm, rel_norm = step.norm(dim=1).numpy().astype(np.float64), eps.norm(dim=1).numpy().astype(np.float64)
        alive = torch.arange(n)
        for sigma in sigmas:
            if len(alive) == 0:
                break
            if should_stop is not None and should_stop():
                raise SweepCancelled()
            logits = codec.decode(mean[alive] + float(np.float32(sigma)) * step[alive])
            decoded += len(alive)
            broke = _broken(logits, ref[alive], mask[alive])
            hit = alive[broke].numpy()
            norm_abs, norm_rel = sigma * abs_norm[hit], sigma * rel_norm[hit]
            better = np.isnan(best_abs[hit]) | (norm_abs < best_abs[hit])
            best_abs[hit[better]] = norm_abs[better]
            best_sigma[hit[better]] = sigma
            best_rel[hit] = np.fmin(best_rel[hit], norm_rel)
            alive = alive[~broke]
    return best_abs, best_rel, best_sigma, decoded


PIECE_FLOATS = ("radius", "relative_radius", "random_radius", "random_relative_radius", "random_sigma")
PIECE_INTS = ("position", "from_id", "to_id", "forward_calls", "backward_calls")


@dataclass
class WorstCasePiece:
    """Chunks start..stop searched: NumPy only, picklable (a cluster's shard); `assemble` joins pieces."""

    start: int
    stop: int
    arrays: dict[str, np.ndarray]  # PIECE_FLOATS, PIECE_INTS and "perturbation" [n, D], rows of chunks start..stop
    random_calls: int


def worst_case_piece(codec, mean: "torch.Tensor", mask: "torch.Tensor", data_scale: "torch.Tensor", start: int, stop: int,
                     settings: WorstCaseSettings, should_stop: ShouldStop | None = None,
                     progress: Progress | None = None) -> WorstCasePiece:
    """Search chunks start..stop, whose means and masks are `mean`, `mask` (rows start..stop); `data_scale` is the
    whole text's r. Batches lie on the text's grid of `batch_chunks` (start must be on it), so a piece is
    searched exactly as the same chunks are in one whole-text run, and pieces join into that run's result."""
    if start % settings.batch_chunks:
        raise SettingsError(f"a worst-case piece must start at a multiple of {settings.batch_chunks} chunks, not {start}.")
    n, dim = stop - start, mean.shape[1]
    encoded = Encoded(mean, None, data_scale=data_scale)
    search = _Search(codec, settings, should_stop)
    arrays = {key: _nan(n) for key in PIECE_FLOATS}
    arrays.update({key: np.zeros(n, dtype=np.int64) for key in PIECE_INTS})
    arrays["perturbation"] = np.zeros((n, dim), dtype=np.float32)
    random_calls = 0
    for a in range(start, stop, settings.batch_chunks):
        b = min(a + settings.batch_chunks, stop)
        rows = slice(a - start, b - start)
        batch_mean, batch_mask = mean[rows].float(), mask[rows]
        ref, (d, verified, position, from_id, to_id, forward, backward) = search.run(batch_mean, batch_mask)
        d_np = d.numpy()
        relative = torch.where(d == 0, torch.zeros_like(d), d / data_scale.unsqueeze(0)).norm(dim=1).numpy()
        arrays["radius"][rows] = np.where(verified, np.linalg.norm(d_np.astype(np.float64), axis=1), np.nan)
        arrays["relative_radius"][rows] = np.where(verified, relative, np.nan)
        arrays["perturbation"][rows] = d_np
        arrays["position"][rows] = position
        arrays["from_id"][rows] = from_id
        arrays["to_id"][rows] = to_id
        arrays["forward_calls"][rows] += forward
        arrays["backward_calls"][rows] += backward
        ra, rr, rs, calls = random_radii(codec, encoded, ref, batch_mask, a, b, settings, should_stop, first=start)
        arrays["random_radius"][rows], arrays["random_relative_radius"][rows], arrays["random_sigma"][rows] = ra, rr, rs
        random_calls += calls
        if progress is not None:
            progress(b - start, n)
    return WorstCasePiece(start, stop, arrays, random_calls)


def assemble(codec, chunks: Chunks, settings: WorstCaseSettings, pieces: list[WorstCasePiece], latent_rms: float,
             elapsed: float, text_source: str = "") -> WorstCaseResult:
    """The WorstCaseResult of pieces covering the text's chunks once (in any order)."""
    codec = opened(codec)
    pieces = sorted(pieces, key=lambda piece: piece.start)
    if [p.start for p in pieces] != [0] + [p.stop for p in pieces[:-1]] or pieces[-1].stop != chunks.num_chunks:
        raise SettingsError(f"the worst-case pieces of {codec.name} do not cover chunks 0..{chunks.num_chunks} exactly once.")
    joined = {key: np.concatenate([p.arrays[key] for p in pieces]) for key in pieces[0].arrays}
    prov = provenance(codec, chunks, settings, text_source)
    prov["analysis"] = "worst case"
    prov["elapsed_s"] = elapsed
    used = joined["from_id"][joined["from_id"] >= 0], joined["to_id"][joined["to_id"] >= 0]
    return WorstCaseResult(
        settings=settings, provenance=prov, chunks=chunks, random_calls=sum(p.random_calls for p in pieces),
        latent_rms=latent_rms, elapsed_s=elapsed, token_text=token_texts(codec.tokenizer, *used, vocab_size=codec.vocab_size),
        **joined,
    )


def worst_case(
    codec,
    chunks: Chunks,
    settings: WorstCaseSettings = WorstCaseSettings(),
    progress: Progress | None = None,
    should_stop: ShouldStop | None = None,
    encoded: Encoded | None = None,
    text_source: str = "",
    where: Where | None = None,
    adapter: str | None = None,
) -> WorstCaseResult:
    """The worst-case radius of every chunk of a text, beside its random radius (see the module).

    `where` (core.engine.cluster.Where) shards the chunks over a Dask cluster; the result is the one of
    this process. Raises GradientsUnavailable for a codec without gradients, SweepCancelled when stopped."""
    codec = opened(codec)
    refuse_without_gradients(codec)
    settings = settings.validated()
    if chunks.chunk_size != codec.chunk_size:
        raise SettingsError(f"the text was cut into chunks of {chunks.chunk_size}, but {codec.name} takes {codec.chunk_size}.")
    if where is not None and not where.here:
        from core.engine.cluster import run_worst_case

        return run_worst_case(codec, chunks, settings, where, adapter=adapter, progress=progress, should_stop=should_stop,
                              encoded=encoded, text_source=text_source)
    started = time.perf_counter()
    if encoded is None:
        encoded = encode_chunks(codec, chunks, should_stop=should_stop)
    piece = worst_case_piece(codec, encoded.mean, chunks.mask(), encoded.rms_per_dim, 0, encoded.num_chunks, settings,
                             should_stop, progress)
    return assemble(codec, chunks, settings, [piece], encoded.latent_rms, time.perf_counter() - started, text_source)


# ---- view-shaped numbers (the workbench and the report draw these) -----------------------------


def radii(result: WorstCaseResult, relative: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """(worst-case, random) radii per chunk in one unit: relative (data-scale) or absolute."""
    if relative:
        return result.relative_radius, result.random_relative_radius
    return result.radius, result.random_radius


def log_edges(*values: np.ndarray, bins: int = 40) -> np.ndarray:
    """Log-spaced bin edges covering every finite positive value given (one decade when there is none)."""
    pooled = np.concatenate([np.asarray(v, dtype=np.float64).ravel() for v in values]) if values else np.zeros(0)
    pooled = pooled[np.isfinite(pooled) & (pooled > 0)]
    if not len(pooled):
        return np.geomspace(0.1, 1.0, bins + 1)
    lo, hi = float(pooled.min()), float(pooled.max())
    if hi <= lo * 1.0001:
        lo, hi = lo / 1.5, hi * 1.5
    return np.geomspace(lo, hi * 1.0001, bins + 1)


def radius_histogram(result: WorstCaseResult, relative: bool = False, bins: int = 40):
    """(edges, worst-case counts, random counts) on shared log-spaced bins; failed / unbroken chunks left out."""
    worst, random = radii(result, relative)
    edges = log_edges(worst, random, bins=bins)
    count = lambda v: np.histogram(v[np.isfinite(v)], bins=edges)[0]  # noqa: E731
    return edges, count(worst), count(random)


def radius_levels(result: WorstCaseResult, levels: int = 10, relative: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Per token: the level (0 = most fragile … levels-1) of its chunk's worst-case radius among equal shares
    of the chunks (quantiles), -1 where the search failed; and the level edges [levels + 1]."""
    worst, _ = radii(result, relative)
    finite = worst[np.isfinite(worst)]
    edges = np.quantile(finite, np.linspace(0, 1, levels + 1)) if len(finite) else np.linspace(0, 1, levels + 1)
    per_chunk = np.full(len(worst), -1, dtype=np.int64)
    ok = np.isfinite(worst)
    per_chunk[ok] = np.clip(np.searchsorted(edges, worst[ok], side="right") - 1, 0, levels - 1)
    k = result.chunks.chunk_size
    return np.repeat(per_chunk, k)[: result.chunks.num_tokens], edges


@dataclass(frozen=True)
class FragileChunk:
    chunk: int
    text: str
    radius: float
    relative_radius: float
    random_radius: float
    position: int
    from_text: str
    to_text: str


def fragile_chunks(result: WorstCaseResult, count: int = 50) -> list[FragileChunk]:
    """The chunks with the smallest worst-case radius, with what they flip to."""
    return [FragileChunk(i, result.chunk_text(i), float(result.radius[i]), float(result.relative_radius[i]),
                         float(result.random_radius[i]), int(result.position[i]), result.display(result.from_id[i]),
                         result.display(result.to_id[i])) for i in result.fragile(count)]


def report_section(result: WorstCaseResult, fragile_rows: int = 15):
    """The report's worst-case section (core.outputs.report's section API): summary, the radii against random
    noise (histogram and per-chunk scatter with the diagonal, relative units), and the most fragile chunks."""
    from html import escape

    from core.outputs.figures import NamedFigure, ReportSection, histogram, scatter

    s = result.summary()
    codec = result.provenance["codec"]
    name = codec["name"]
    slug = "".join(c if c.isalnum() else "-" for c in name.lower()).strip("-") or "codec"
    slug = "-".join(part for part in slug.split("-") if part)
    caption = (f"{name} ({codec.get('sha256', '')[:10]}); text {result.chunks.text_sha256[:10]} "
               f"({result.chunks.num_tokens:,} tokens); random radius: data-scale noise, seed {result.settings.seed}, "
               f"{result.settings.repeats} repeats")

    def num(x) -> str:
        return "—" if x is None or (isinstance(x, float) and not math.isfinite(x)) else f"{x:.3g}"

    rate = "—" if s["below_random_rate"] is None else f"{100 * s['below_random_rate']:.1f} %"
    html = (
        f"<p>Per chunk of the text, the smallest perturbation of its mean found that changes the decoded chunk "
        f"(a gradient-guided search, a line search to the boundary, and a decode that verifies it), beside the noise "
        f"norm at which a data-scale sweep with the same seed first breaks that chunk. {s['verified']:,} of "
        f"{s['chunks']:,} chunks verified" + (f", {s['failed']:,} where the search found nothing" if s["failed"] else "")
        + f". Median worst-case radius {num(s['relative_radius_median'])} relative ({num(s['radius_median'])} absolute; "
        f"latent RMS {num(s['latent_rms'])}); median random radius {num(s['random_relative_radius_median'])} relative. "
        f"The worst case is below the random radius for {s['below_random']:,} of {s['compared']:,} chunks ({rate}); "
        f"median ratio {num(s['radius_over_random_median'])}.</p>"
    )
    figures = [
        NamedFigure(f"worst-case-{slug}-radii", histogram(
            f"{name}: radius of the nearest failure per chunk", "radius, relative (‖δ / r‖)",
            {"worst case (verified)": result.relative_radius, "random noise (first break on the grid)": result.random_relative_radius},
            bins=40, ylabel="chunks", logx=True), caption),
        NamedFigure(f"worst-case-{slug}-scatter", scatter(
            f"{name}: worst case against random noise, per chunk", "random radius, relative", "worst-case radius, relative",
            {"chunks": (result.random_relative_radius, result.relative_radius)}, logx=True, logy=True), caption),
    ]
    rows = ["<table><tr><th>chunk</th><th class=l>text</th><th>radius</th><th>relative</th><th>random, relative</th>"
            "<th class=l>flips</th></tr>"]
    for row in fragile_chunks(result, fragile_rows):
        rows.append(f"<tr><td>{row.chunk}</td><td class=l><code>{escape(row.text)}</code></td><td>{num(row.radius)}</td>"
                    f"<td>{num(row.relative_radius)}</td><td>{num(float(result.random_relative_radius[row.chunk]))}</td>"
                    f"<td class=l><code>{escape(row.from_text)}</code> → <code>{escape(row.to_text)}</code> "
                    f"(position {row.position})</td></tr>")
    rows.append("</table>")
    after = "<h3>Most fragile chunks</h3>" + "".join(rows)
    return ReportSection(f"worst-case-{slug}", f"Worst case: {name}", html=html, figures=figures, html_after=after)


# ---- against a generator's errors -----------------------------------------------------------------


@dataclass(frozen=True)
class GeneratorComparison:
    error_norm: np.ndarray  # [N] ‖predicted − encoder mean‖; for S > 1 samples the median over samples per chunk
    below: int  # verified chunks whose worst-case radius is below their error norm
    verified: int
    interval: tuple[float, float]  # Wilson 95 % interval of below / verified
    samples: int

    @property
    def share(self) -> float | None:
        return self.below / self.verified if self.verified else None

    def summary(self) -> dict[str, Any]:
        return {"generator_below": self.below, "generator_compared": self.verified, "generator_below_rate": self.share,
                "generator_below_interval": list(self.interval) if self.verified else None,
                "generator_error_norm": "median over samples per chunk" if self.samples > 1 else "one sample per chunk",
                "generator_error_norm_median": float(np.median(self.error_norm)) if len(self.error_norm) else None}

    def line(self) -> str:
        if not self.verified:
            return "No verified chunk to hold against the generator's errors."
        lo, hi = self.interval
        per = " (median over its samples)" if self.samples > 1 else ""
        return (f"The worst-case radius is below the generator's error norm{per} for {self.below:,} of "
                f"{self.verified:,} verified chunks ({100 * self.share:.1f} %, 95 % interval "
                f"{100 * lo:.1f}–{100 * hi:.1f} %).")


def against_generator(result: WorstCaseResult, predictions, encoder_mean: np.ndarray) -> GeneratorComparison:
    """Per chunk the generator's error norm ‖predicted − encoder mean‖ (median over samples when S > 1), and the
    share of verified chunks whose worst-case radius is below it (Wilson 95 % interval).

    `encoder_mean` [N, D] is the encoder mean of the result's chunks. Raises PredictionsError in one sentence when
    the file is for another codec or other chunks."""
    norms = np.linalg.norm(predictions.latents.astype(np.float64) - np.asarray(encoder_mean, np.float64)[:, None, :], axis=2) \
        if _same_chunks(result, predictions.path, predictions.codec_sha256, predictions.token_ids) else None
    return _compare(result, norms)


def against_predictions_result(result: WorstCaseResult, analysis) -> GeneratorComparison:
    """The same from a finished predictions analysis (its error norms [N, S] of the same codec and chunks)."""
    prov = analysis.provenance
    ids = np.asarray(analysis.chunks.token_ids)
    k = result.chunks.chunk_size
    padded = np.full(-(-len(ids) // k) * k, -1, dtype=np.int64)
    padded[: len(ids)] = ids
    _same_chunks(result, prov["predictions"]["path"], prov["codec"]["sha256"], padded.reshape(-1, k))
    return _compare(result, np.asarray(analysis.error_norm, dtype=np.float64))


def _same_chunks(result: WorstCaseResult, label: str, codec_sha256: str, token_ids: np.ndarray) -> bool:
    from core.analyses.prediction_file import PredictionsError

    sha = result.provenance.get("codec", {}).get("sha256", "")
    if sha and codec_sha256 != sha:
        raise PredictionsError(f"{label} was made for the codec with sha256 {codec_sha256[:12]}…, but the "
                               f"worst-case result is for sha256 {sha[:12]}…; use predictions for the same codec.")
    n, k = result.num_chunks, result.chunks.chunk_size
    ids = np.asarray(result.chunks.token_ids)
    flat = token_ids.reshape(-1)[: len(ids)]
    if token_ids.shape[0] != n or token_ids.shape[1] != k or not np.array_equal(flat, ids):
        raise PredictionsError(f"{label} holds {token_ids.shape[0]:,} chunks of K = {token_ids.shape[1]} whose "
                               f"token ids are not the {n:,} chunks of the worst-case text; use predictions for the same text.")
    return True


def _compare(result: WorstCaseResult, norms: np.ndarray) -> GeneratorComparison:
    from core.engine.metrics import wilson_interval

    error = np.median(norms, axis=1)
    ok = result.verified
    below = int((result.radius[ok] < error[ok]).sum())
    return GeneratorComparison(error, below, int(ok.sum()), wilson_interval(below, int(ok.sum())), int(norms.shape[1]))
