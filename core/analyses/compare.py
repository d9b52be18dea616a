"""Compare checkpoints on one text: paired tests per sigma, tolerances side by side, and
a character-level footing when the checkpoints tokenize differently.

Pairing uses repeat 0 of each sweep (same text, same noise seed): per unit (token, or
character when tokenizers or K differ) "A right / B right" at each sigma, tested with
McNemar's test — exact binomial when the discordant count is below 25, else the
chi-square form with continuity correction (common practice; both as in statsmodels).
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from core.codecs.contract import opened
from core.errors import ChunkscopeError
from core.outputs.files import result_folder, staged_folder
from core.engine.noise import encode_chunks
from core.engine.sweep import (
    DEFAULT_NOISE, DEFAULT_REPEATS, DEFAULT_SEED, DEFAULT_SIGMAS, SweepResult, SweepSettings, read_sweep, run_sweep,
)
from core.outputs.reading import Damaged, json_kind, need
from core.engine.text import chunk_text
from core.engine.tolerance import LOSS, Tolerance

ALPHA = 0.05  # the significance level of every paired test the tool reports
SIGNIFICANT = f"p < {ALPHA:g}"
COMPARISON_NOISES = ("data-scale", "isotropic")  # a comparison sweeps under both; either can be the main one
EXACT_BELOW = 25
SCALE_WARNING_RATIO = 1.5


def _binomial_cdf_half(k: int, n: int) -> float:
    """P(X <= k) for X ~ Binomial(n, 1/2), summed in log space."""
    if k >= n:
        return 1.0
    log_terms = [math.lgamma(n + 1) - math.lgamma(i + 1) - math.lgamma(n - i + 1) - n * math.log(2) for i in range(k + 1)]
    top = max(log_terms)
    return min(1.0, math.exp(top) * sum(math.exp(t - top) for t in log_terms))


@dataclass
class McNemar:
    statistic: float
    pvalue: float
    method: str  # "exact" or "chi-square"


def mcnemar(b: int, c: int, exact: bool | None = None, correction: bool = True) -> McNemar:
    """McNemar's test on the discordant counts b (A right, B wrong) and c (A wrong, B right)."""
    n = b + c
    if exact is None:
        exact = n < EXACT_BELOW
    if exact:
        if n == 0:
            return McNemar(0.0, 1.0, "exact")
        return McNemar(float(min(b, c)), min(1.0, 2.0 * _binomial_cdf_half(min(b, c), n)), "exact")
    if n == 0:
        return McNemar(0.0, 1.0, "chi-square")
    diff = abs(b - c) - (1.0 if correction else 0.0)
    stat = diff * diff / n  # as statsmodels: Edwards' correction, not clipped at zero
    return McNemar(stat, math.erfc(math.sqrt(stat / 2.0)), "chi-square")


def character_correctness(text_length: int, spans: np.ndarray, token_correct: np.ndarray) -> np.ndarray:
    """Per character: correct when every token holding any of its bytes decoded correctly."""
    chars = np.ones(text_length, dtype=bool)
    lengths = spans[:, 1] - spans[:, 0]
    owner = np.repeat(np.arange(len(spans)), lengths)
    chars[: len(owner)] = token_correct[owner] if len(owner) else chars[:0]
    empty = np.flatnonzero(lengths == 0)
    for t in empty:  # a token holding part of a character: its failure spoils that character
        if not token_correct[t]:
            start = int(spans[t, 0])
            if start < text_length:
                chars[start] = False
    return chars


def unit_correctness(result: SweepResult, sigma_index: int, unit: str) -> np.ndarray:
    correct = result.decoded[:, sigma_index].astype(np.int64) == result.chunks.token_ids
    if unit == "token":
        return correct
    return character_correctness(len(result.chunks.text), result.chunks.spans, correct)


def comparison_unit(a: SweepResult, b: SweepResult) -> str:
    same = (
        a.chunks.chunk_size == b.chunks.chunk_size
        and len(a.chunks.token_ids) == len(b.chunks.token_ids)
        and np.array_equal(a.chunks.token_ids, b.chunks.token_ids)
        and np.array_equal(a.chunks.spans, b.chunks.spans)
    )
    return "token" if same else "character"


@dataclass
class PairedRow:
    sigma: float
    accuracy_a: float
    accuracy_b: float
    difference: float  # B - A, on the compared unit
    a_only: int  # units A got right and B wrong
    b_only: int
    units: int
    statistic: float
    pvalue: float
    method: str


@dataclass
class PairedComparison:
    name_a: str
    name_b: str
    unit: str
    rows: list[PairedRow]

    def significant(self, alpha: float = ALPHA) -> list[bool]:
        return [r.pvalue < alpha for r in self.rows]


def paired_comparison(a: SweepResult, b: SweepResult) -> PairedComparison:
    if a.chunks.text_sha256 != b.chunks.text_sha256:
        raise ChunkscopeError("the two sweeps were run on different texts, so they cannot be paired.")
    if tuple(a.sigmas) != tuple(b.sigmas) or a.settings.seed != b.settings.seed or a.settings.noise != b.settings.noise:
        raise ChunkscopeError("the two sweeps used different grids, seeds or noise models, so they cannot be paired.")
    unit = comparison_unit(a, b)
    rows = []
    for i, sigma in enumerate(a.sigmas):
        ca, cb = unit_correctness(a, i, unit), unit_correctness(b, i, unit)
        only_a = int(np.sum(ca & ~cb))
        only_b = int(np.sum(~ca & cb))
        test = mcnemar(only_a, only_b)
        rows.append(
            PairedRow(
                sigma=float(sigma), accuracy_a=float(ca.mean()), accuracy_b=float(cb.mean()),
                difference=float(cb.mean() - ca.mean()), a_only=only_a, b_only=only_b, units=int(len(ca)),
                statistic=test.statistic, pvalue=test.pvalue, method=test.method,
            )
        )
    return PairedComparison(a.codec_name, b.codec_name, unit, rows)


@dataclass
class ToleranceRow:
    """One codec's tolerances. "absolute" and "data_scale" name the noise (absolute σ under
    isotropic noise, relative σ under data-scale noise); each holds the accuracy-level
    tolerances, and the *_loss lists the loss tolerances."""

    name: str
    sha256: str
    latent_rms: float
    accuracy_at_zero: float
    absolute: list[Tolerance]  # isotropic noise, kind "absolute"
    data_scale: list[Tolerance]
    absolute_loss: list[Tolerance] = field(default_factory=list)  # isotropic noise, kind "loss"
    data_scale_loss: list[Tolerance] = field(default_factory=list)

    @classmethod
    def from_dict(cls, data: dict) -> "ToleranceRow":
        return cls(
            data["name"], data["sha256"], float(data["latent_rms"]), float(data["accuracy_at_zero"]),
            [Tolerance.from_dict(t) for t in data["absolute"]], [Tolerance.from_dict(t) for t in data["data_scale"]],
            [Tolerance.from_dict(t, LOSS) for t in data.get("absolute_loss", [])],
            [Tolerance.from_dict(t, LOSS) for t in data.get("data_scale_loss", [])],
        )


@dataclass
class Comparison:
    """Every codec swept on the same text with the same seed, under isotropic and data-scale noise."""

    settings: dict[str, Any]
    isotropic: list[SweepResult]
    data_scale: list[SweepResult]
    tolerances: list[ToleranceRow]
    paired: list[PairedComparison]  # each codec against the first, under the main noise model
    main_noise: str
    scale_warning: str | None

    @property
    def names(self) -> list[str]:
        return [r.codec_name for r in self.data_scale]

    def main_sweeps(self) -> list[SweepResult]:
        return self.data_scale if self.main_noise == "data-scale" else self.isotropic

    def to_json_dict(self) -> dict[str, Any]:
        return {
            "settings": self.settings,
            "main_noise": self.main_noise,
            "scale_warning": self.scale_warning,
            "tolerances": [asdict(t) for t in self.tolerances],
            "paired": [asdict(p) for p in self.paired],
            "sweeps": {
                "isotropic": [r.provenance for r in self.isotropic],
                "data-scale": [r.provenance for r in self.data_scale],
            },
        }

    def write(self, directory: str | os.PathLike, force: bool = False) -> Path:
        """compare.json, tolerances.csv, paired.csv and every sweep folder, written atomically."""
        directory = Path(directory)
        with staged_folder(directory, force, COMPARE_FOLDER) as staging:
            self.write_into(staging)
        return directory

    def write_into(self, folder: Path) -> None:
        """The comparison's files, written into an existing empty folder (a staging folder)."""
        (folder / "compare.json").write_text(json.dumps(self.to_json_dict(), indent=1), encoding="utf-8")
        (folder / "tolerances.csv").write_text(tolerance_csv(self), encoding="utf-8")
        (folder / "paired.csv").write_text(paired_csv(self), encoding="utf-8")
        for noise, sweeps in (("isotropic", self.isotropic), ("data-scale", self.data_scale)):
            for r in sweeps:
                r.write_into(folder / "sweeps" / noise / r.codec_name)


COMPARE_FOLDER = result_folder("compare.json")


def _csv_text(header: list[str], rows: list[list]) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return out.getvalue()


def _number(value: float | None, fmt: str = ".6g") -> str:
    return "" if value is None else format(value, fmt)


def tolerance_csv(comparison: Comparison) -> str:
    rows = []
    for t in comparison.tolerances:
        for noise, tols in (("isotropic", t.absolute + t.absolute_loss), ("data-scale", t.data_scale + t.data_scale_loss)):
            for row in tols:
                rows.append([t.name, t.sha256, _number(t.latent_rms), _number(t.accuracy_at_zero, ".6f"), noise,
                             row.kind, row.level, _number(row.sigma), row.status])
    return _csv_text(["checkpoint", "sha256", "latent_rms", "accuracy_at_sigma0", "noise", "kind", "level", "sigma", "status"], rows)


def paired_csv(comparison: Comparison) -> str:
    rows = []
    for p in comparison.paired:
        for r in p.rows:
            rows.append([p.name_a, p.name_b, p.unit, _number(r.sigma), _number(r.accuracy_a, ".6f"), _number(r.accuracy_b, ".6f"),
                         _number(r.difference, ".6f"), r.a_only, r.b_only, r.units, _number(r.statistic), _number(r.pvalue), r.method])
    header = ["a", "b", "unit", "sigma", "accuracy_a", "accuracy_b", "difference", "a_only", "b_only", "units", "statistic", "pvalue", "method"]
    return _csv_text(header, rows)


def scale_warning(names: Sequence[str], rms: Sequence[float]) -> str | None:
    if len(rms) < 2 or min(rms) <= 0:
        return None
    hi, lo = int(np.argmax(rms)), int(np.argmin(rms))
    ratio = rms[hi] / rms[lo]
    if ratio <= SCALE_WARNING_RATIO:
        return None
    return (
        f"latent scales differ {ratio:.2f}x ({names[hi]} RMS {rms[hi]:.3g} vs {names[lo]} RMS {rms[lo]:.3g}): "
        "an absolute-sigma win may be nothing but a larger latent; read the data-scale columns."
    )


def default_absolute_sigmas(relative: Sequence[float], rms: Sequence[float]) -> tuple[float, ...]:
    """The relative grid stretched by the largest latent RMS, so the absolute sweep covers every codec."""
    factor = float(max(rms)) if rms else 1.0
    return tuple(round(s * factor, 6) for s in relative)


def compare_codecs(
    codecs: Sequence,
    text: str,
    sigmas: Sequence[float] = DEFAULT_SIGMAS,
    absolute_sigmas: Sequence[float] | None = None,
    repeats: int = DEFAULT_REPEATS,
    seed: int = DEFAULT_SEED,
    main_noise: str = DEFAULT_NOISE,
    text_source: str = "",
    progress: Callable[[int, int], None] | None = None,
    should_stop: Callable[[], bool] | None = None,
    on_sweep: Callable[[str, SweepResult], None] | None = None,
    where=None,
    adapter: str | None = None,
) -> Comparison:
    """Sweep every codec under data-scale and isotropic noise on the same text and seed.

    `where` (a core.engine.cluster.Where) shards the sweeps over a Dask cluster, whose workers
    open each checkpoint from its path (through `adapter`, the spec the codecs were opened with)."""
    codecs = [opened(c) for c in codecs]
    if len(codecs) < 2:
        raise ChunkscopeError("a comparison needs at least two checkpoints.")
    if main_noise not in COMPARISON_NOISES:
        raise ChunkscopeError(f"a comparison's main noise model is {' or '.join(COMPARISON_NOISES)}, not {main_noise!r}.")
    chunked = [chunk_text(text, c, text_source or "the text") for c in codecs]
    encoded = []
    for codec, chunks in zip(codecs, chunked):
        encoded.append(encode_chunks(codec, chunks, should_stop=should_stop))
    rms = [e.latent_rms for e in encoded]
    if absolute_sigmas is None:
        absolute_sigmas = default_absolute_sigmas(sigmas, rms)
    relative = SweepSettings(sigmas=tuple(sigmas), repeats=repeats, noise="data-scale", seed=seed).validated()
    absolute = SweepSettings(sigmas=tuple(absolute_sigmas), repeats=repeats, noise="isotropic", seed=seed).validated()
    per_sweep = sum(e.num_chunks for e in encoded)
    total = per_sweep * (len(relative.sigmas) + len(absolute.sigmas)) * repeats
    offset = [0]

    def report(done_in_sweep: int, total_in_sweep: int, chunks_in_sweep: int, grid: int) -> None:
        if progress is not None:
            progress(offset[0] + done_in_sweep * chunks_in_sweep * grid * repeats // max(total_in_sweep, 1), total)

    results: dict[str, list[SweepResult]] = {"data-scale": [], "isotropic": []}
    if where is not None and not where.here:
        from core.engine.cluster import SweepJob, sweeps_as_completed

        jobs = [SweepJob(codec, chunks, settings, text_source, enc, adapter)
                for settings in (relative, absolute) for codec, chunks, enc in zip(codecs, chunked, encoded)]
        done: list = [None] * len(jobs)
        for i, result in sweeps_as_completed(jobs, where, progress, should_stop):
            done[i] = result
            if on_sweep is not None:
                on_sweep(jobs[i].settings.noise, result)
        for job, result in zip(jobs, done):
            results[job.settings.noise].append(result)
    for settings in (relative, absolute) if where is None or where.here else ():
        for codec, chunks, enc in zip(codecs, chunked, encoded):
            n_grid = len(settings.sigmas)
            result = run_sweep(
                codec, chunks, settings, encoded=enc, text_source=text_source, should_stop=should_stop,
                progress=lambda d, t, n=enc.num_chunks, g=n_grid: report(d, t, n, g),
            )
            offset[0] += enc.num_chunks * n_grid * repeats
            results[settings.noise].append(result)
            if on_sweep is not None:
                on_sweep(settings.noise, result)
    names = [c.name for c in codecs]
    rows = []
    for i, codec in enumerate(codecs):
        iso, ds = results["isotropic"][i], results["data-scale"][i]
        rows.append(ToleranceRow(codec.name, codec.sha256, rms[i], ds.accuracy_at_zero, list(iso.tolerances),
                                 list(ds.tolerances), list(iso.loss_tolerances), list(ds.loss_tolerances)))
    main = results[main_noise]
    paired = [paired_comparison(main[0], other) for other in main[1:]]
    settings_dict = {
        "relative_sigmas": list(relative.sigmas), "absolute_sigmas": list(absolute.sigmas), "repeats": repeats,
        "seed": seed, "text_sha256": chunked[0].text_sha256, "text_source": text_source,
        "checkpoints": [{"name": c.name, "sha256": c.sha256, "path": c.path} for c in codecs],
    }
    return Comparison(settings_dict, results["isotropic"], results["data-scale"], rows, paired, main_noise, scale_warning(names, rms))


def read_comparison(directory: str | os.PathLike, name: str | None = None) -> Comparison:
    """Reopen a comparison folder written by `Comparison.write`; `name` is how errors name it."""
    directory = Path(directory)
    label = name or str(directory)
    if not (directory / "compare.json").is_file():
        raise ChunkscopeError(f"{label} is not a comparison folder: compare.json is missing.")
    try:
        data = json.loads((directory / "compare.json").read_text(encoding="utf-8"))
    except OSError as exc:
        raise ChunkscopeError(f"{label}/compare.json cannot be read: {exc.strerror or exc}.") from None
    except ValueError:
        raise ChunkscopeError(f"{label}/compare.json is damaged: it is not valid JSON.") from None
    return _comparison_from_json(directory, label, data)


def _safe_folder_name(name: Any) -> bool:
    return isinstance(name, str) and name not in ("", ".", "..") and Path(name).name == name and "\\" not in name


def _comparison_from_json(directory: Path, label: str, data: Any) -> Comparison:
    """The one validator of a comparison folder: a Comparison, or one sentence naming the file."""
    try:
        if not isinstance(data, dict):
            raise Damaged(f"it holds {json_kind(data)}, not an object")
        settings = need(data, "settings", dict)
        checkpoints = need(settings, "checkpoints", list, "settings")
        names = [c.get("name") if isinstance(c, dict) else None for c in checkpoints]
        if len(names) < 2 or not all(_safe_folder_name(n) for n in names) or len(set(names)) != len(names):
            raise Damaged("the settings do not name two or more checkpoints, each once")
        main_noise = need(data, "main_noise", str)
        if main_noise not in ("data-scale", "isotropic"):
            raise Damaged(f"its main noise model {main_noise!r} is not data-scale or isotropic")
        warning = data.get("scale_warning")
        if warning is not None and not isinstance(warning, str):
            raise Damaged(f"its scale warning is {json_kind(warning)}, not a string")
        tolerances = []
        for t in need(data, "tolerances", list):
            try:
                row = ToleranceRow.from_dict(t)
            except (TypeError, KeyError, ValueError, AttributeError):
                raise Damaged("its tolerances are not rows of checkpoint tolerances with their levels, sigma and status") from None
            tolerances.append(row)
        paired = []
        for p in need(data, "paired", list):
            rows = []
            for r in need(p, "rows", list, "paired[]"):
                try:
                    rows.append(PairedRow(**r))
                except TypeError:
                    raise Damaged("its paired tests are not rows of McNemar tests") from None
                numbers = [v for k, v in vars(rows[-1]).items() if k != "method"]
                if any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in numbers):
                    raise Damaged("a paired test's row holds something other than numbers")
            paired.append(PairedComparison(need(p, "name_a", str, "paired[]"), need(p, "name_b", str, "paired[]"),
                                           need(p, "unit", str, "paired[]"), rows))
    except Damaged as exc:
        raise ChunkscopeError(f"{label}/compare.json is damaged: {exc}.") from None
    iso = [read_sweep(directory / "sweeps" / "isotropic" / n, f"{label}/sweeps/isotropic/{n}") for n in names]
    ds = [read_sweep(directory / "sweeps" / "data-scale" / n, f"{label}/sweeps/data-scale/{n}") for n in names]
    for row, a, d in zip(tolerances, iso, ds):  # written before the loss tolerance: take it from the sweeps
        row.absolute_loss = row.absolute_loss or list(a.loss_tolerances)
        row.data_scale_loss = row.data_scale_loss or list(d.loss_tolerances)
    return Comparison(settings, iso, ds, tolerances, paired, main_noise, warning)
