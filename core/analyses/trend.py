"""Tolerance through a training run: sweep every checkpoint of a folder, in step order."""

from __future__ import annotations

import csv
import io
import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator

from core.codecs.open import checkpoints_in_folder, open_checkpoint
from core.errors import ChunkscopeError, SweepCancelled
from core.engine.sweep import TOLERANCE_LEVELS, SweepResult, SweepSettings, run_sweep
from core.engine.text import chunk_text
from core.engine.tolerance import ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, Tolerance
from core.outputs.files import Outputs, OutputRefusedError, check_target, check_writable
from core.outputs.reading import Damaged, json_kind, need

STEP_KEYS = ("step", "steps_done", "global_step", "steps")
_STEP_IN_NAME = re.compile(r"(?:step|iter|it|ckpt|checkpoint)?[-_ ]?(\d+)(?!.*\d)", re.IGNORECASE)


def step_from_card(card: dict) -> int | None:
    """The training step a checkpoint's card records, looked up at the top and one level down."""
    for source in [card] + [v for v in card.values() if isinstance(v, dict)]:
        for key in STEP_KEYS:
            value = source.get(key)
            if isinstance(value, int) and not isinstance(value, bool):
                return value
    return None


def step_from_name(stem: str) -> int | None:
    match = _STEP_IN_NAME.search(stem)
    return int(match.group(1)) if match else None


@dataclass
class TrendPoint:
    path: str
    name: str
    step: int | None
    step_source: str  # "card", "file name" or "none"
    sha256: str = ""
    accuracy_at_zero: float | None = None
    tolerances: list[Tolerance] = field(default_factory=list)  # kind "absolute"
    latent_rms: float | None = None
    error: str | None = None
    result: SweepResult | None = None
    loss_tolerances: list[Tolerance] = field(default_factory=list)  # kind "loss"
    kl: float | None = None  # mean over chunks of KL(q(z|x) || N(0, I)), nats; variational codecs only
    active_dims: int | None = None  # dimensions whose posterior mean varies over chunks by more than ACTIVE_THRESHOLD

    def tolerance(self, level: float, kind: str = ABSOLUTE) -> Tolerance | None:
        for t in self.loss_tolerances if kind == LOSS else self.tolerances:
            if abs(t.level - level) < 1e-12:
                return t
        return None

    def to_dict(self) -> dict:
        return {
            "path": self.path, "name": self.name, "step": self.step, "step_source": self.step_source,
            "sha256": self.sha256, "accuracy_at_zero": self.accuracy_at_zero, "latent_rms": self.latent_rms,
            "tolerances": [t.to_dict() for t in self.tolerances],
            "loss_tolerances": [t.to_dict() for t in self.loss_tolerances], "error": self.error,
            "kl": self.kl, "active_dims": self.active_dims,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "TrendPoint":
        """A point of trend.json back; older files keyed the tolerances by level and had no loss tolerances."""
        data = dict(data)
        tolerances = data.pop("tolerances", [])
        if isinstance(tolerances, dict):
            tolerances = [{"level": float(k), **v} for k, v in tolerances.items()]
        loss = data.pop("loss_tolerances", [])
        return cls(**data, tolerances=[Tolerance.from_dict(t) for t in tolerances],
                   loss_tolerances=[Tolerance.from_dict(t, LOSS) for t in loss])


def latent_stats(codec, chunks) -> tuple[float | None, int]:
    """KL to N(0, I) (summed over dimensions, mean over chunks; None without a posterior std) and the
    number of active dimensions (variance of the posterior mean over chunks > ACTIVE_THRESHOLD)."""
    from core.engine.health import ACTIVE_THRESHOLD, kl_to_standard_normal
    from core.engine.noise import encode_chunks

    encoded = encode_chunks(codec, chunks)
    mean = encoded.mean
    variance = mean.var(0, unbiased=False) if mean.shape[0] > 1 else mean.new_zeros(mean.shape[1])
    kl = None if encoded.std is None else float(kl_to_standard_normal(mean, encoded.std).sum(1).mean())
    return kl, int((variance > ACTIVE_THRESHOLD).sum())


def checkpoints_in(folder: str | Path, adapter: str | None = None) -> list[Path]:
    folder = Path(folder)
    if not folder.exists():
        raise ChunkscopeError(f"{folder} does not exist.")
    if not folder.is_dir():
        raise ChunkscopeError(f"{folder} is not a folder.")
    paths = checkpoints_in_folder(folder, adapter)
    if not paths:
        what = "checkpoints" if adapter else ".safetensors checkpoints or ONNX codec folders"
        raise ChunkscopeError(f"{folder} holds no {what}.")
    return paths


def trend(
    folder: str | Path,
    text: str,
    settings: SweepSettings,
    text_source: str = "",
    should_stop: Callable[[], bool] | None = None,
    progress: Callable[[int, int], None] | None = None,
    adapter: str | None = None,
    where=None,
) -> Iterator[TrendPoint]:
    """Yield one point per checkpoint as it finishes; a bad checkpoint yields a point with `error`.

    `adapter` opens every checkpoint that is not built-in or ONNX (`open_checkpoint`). `where`
    (a core.engine.cluster.Where) shards every checkpoint's sweep over a Dask cluster; points then
    come in the order their sweeps finish."""
    paths = checkpoints_in(folder, adapter)
    if where is not None and not where.here:
        yield from _trend_on_cluster(paths, text, settings, text_source, should_stop, progress, adapter, where)
        return
    for index, path, opened in _opened_points(paths, adapter, should_stop):
        if isinstance(opened, TrendPoint):
            yield opened
            continue
        codec, step, source = opened
        try:
            chunks = chunk_text(text, codec, text_source or "the text")
            result = run_sweep(
                codec, chunks, settings, text_source=text_source, should_stop=should_stop,
                progress=(lambda d, t, i=index: progress(i * t + d, len(paths) * t)) if progress else None,
            )
        except ChunkscopeError as exc:
            yield TrendPoint(str(path), codec.name, step, source, sha256=codec.sha256, error=str(exc))
            continue
        yield _point_of(path, codec, step, source, result, *latent_stats(codec, chunks))


def _opened_points(paths, adapter: str | None, should_stop):
    """(index, path, what _opened_point gives) per checkpoint, stopping when asked."""
    for index, path in enumerate(paths):
        if should_stop is not None and should_stop():
            raise SweepCancelled()
        yield index, path, _opened_point(path, adapter)


def _opened_point(path: Path, adapter: str | None):
    """(codec, step, step source), or a TrendPoint with the error when the checkpoint does not open."""
    try:
        codec = open_checkpoint(path, adapter)
    except ChunkscopeError as exc:
        step = step_from_name(path.stem)
        return TrendPoint(str(path), path.stem, step, "file name" if step is not None else "none", error=str(exc))
    step, source = step_from_card(codec.card), "card"
    if step is None:
        step = step_from_name(path.stem)
        source = "file name" if step is not None else "none"
    return codec, step, source


def _point_of(path: Path, codec, step, source: str, result: SweepResult, kl: float | None = None,
              active: int | None = None) -> TrendPoint:
    acc0 = result.curves[0].token_accuracy if result.sigmas[0] == 0 else None
    return TrendPoint(
        str(path), codec.name, step, source, sha256=codec.sha256, accuracy_at_zero=acc0,
        tolerances=list(result.tolerances), loss_tolerances=list(result.loss_tolerances),
        latent_rms=result.latent_rms, result=result, kl=kl, active_dims=active,
    )


def _trend_on_cluster(paths, text, settings, text_source, should_stop, progress, adapter, where) -> Iterator[TrendPoint]:
    from core.engine.cluster import SweepJob, sweeps_as_completed
    from core.codecs.open import uses_adapter

    jobs, about = [], []
    for _, path, opened in _opened_points(paths, adapter, should_stop):
        if isinstance(opened, TrendPoint):
            yield opened
            continue
        codec, step, source = opened
        try:
            checked = settings.validated(codec)
            chunks = chunk_text(text, codec, text_source or "the text")
        except ChunkscopeError as exc:
            yield TrendPoint(str(path), codec.name, step, source, sha256=codec.sha256, error=str(exc))
            continue
        jobs.append(SweepJob(codec, chunks, checked, text_source, adapter=adapter if adapter and uses_adapter(path) else None))
        about.append((path, codec, step, source))
    for i, result in sweeps_as_completed(jobs, where, progress, should_stop):
        # KL and active dimensions: one encoding pass on the client, done while the workers sweep the
        # other checkpoints (before any sweep, it held the whole cluster up by one pass per checkpoint)
        stats = latent_stats(jobs[i].codec, jobs[i].chunks)
        point = _point_of(*about[i], result, *stats)
        jobs[i] = about[i] = None  # the client keeps the point, not the codec
        yield point


def sort_points(points: list[TrendPoint]) -> list[TrendPoint]:
    return sorted(points, key=lambda p: (p.step is None, p.step if p.step is not None else 0, p.name))


TREND_LEVELS = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]


def _column(kind: str, level: float) -> str:
    return f"{'tol' if kind == ABSOLUTE else 'loss_tol'}_{level * 100:g}"  # accuracy in % or a loss in points


TREND_CSV_COLUMNS = (
    ["name", "step", "step_source", "status", "accuracy_at_sigma0"]
    + [name for kind, level in TREND_LEVELS for name in (_column(kind, level), _column(kind, level) + "_status")]
    + ["latent_rms", "kl", "active_dims", "sha256", "error"]
)
NOT_MEASURED = "not measured"


def trend_csv(points: list[TrendPoint]) -> str:
    """One row per checkpoint, in step order. Numeric columns hold numbers or nothing; each
    tolerance's status column says what a number means ("above_grid": a lower bound) or why
    there is none ("below_at_zero", "not measured" when the checkpoint failed)."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(TREND_CSV_COLUMNS)
    for p in sort_points(points):
        cells: list = []
        for kind, level in TREND_LEVELS:
            t = p.tolerance(level, kind)
            if p.error is not None or t is None:
                cells += ["", NOT_MEASURED]
            else:
                cells += ["" if t.sigma is None else f"{t.sigma:.6g}", t.status]
        writer.writerow(
            [p.name, "" if p.step is None else p.step, p.step_source, "error" if p.error is not None else "ok",
             "" if p.accuracy_at_zero is None else f"{p.accuracy_at_zero:.6f}"]
            + cells
            + ["" if p.latent_rms is None else f"{p.latent_rms:.6g}", "" if p.kl is None else f"{p.kl:.6g}",
               "" if p.active_dims is None else p.active_dims, p.sha256, p.error or ""]
        )
    return out.getvalue()


def _is_trend_csv(path: Path) -> bool:
    try:
        with open(path, encoding="utf-8", newline="") as handle:
            return handle.readline().startswith("name,step,step_source,")
    except (OSError, UnicodeDecodeError):
        return False


def _is_trend_json(path: Path) -> bool:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, list) and all(isinstance(p, dict) and "name" in p and "step" in p for p in data)


def write_trend(folder: str | Path, points: list[TrendPoint], force: bool = False) -> list[Path]:
    """trend.csv and trend.json in `folder`, written together or not at all."""
    folder = Path(folder)
    with Outputs(force) as outputs:
        outputs.file(folder / "trend.csv", _is_trend_csv).write_text(trend_csv(points), encoding="utf-8")
        outputs.file(folder / "trend.json", _is_trend_json).write_text(
            json.dumps([p.to_dict() for p in sort_points(points)], indent=1), encoding="utf-8")
        return outputs.targets


def check_trend_output(folder: str | Path, force: bool = False) -> None:
    """Before any work: refuse now what `write_trend` would refuse at the end."""
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise OutputRefusedError(f"{folder} is a file, and trend results go into a folder; choose another name.")
    for name, recognise in (("trend.csv", _is_trend_csv), ("trend.json", _is_trend_json)):
        check_target(folder / name, force, recognise)
    check_writable(folder / "trend.csv")


_POINT_FIELDS = {"path", "name", "step", "step_source", "sha256", "accuracy_at_zero", "latent_rms", "tolerances",
                 "loss_tolerances", "error", "kl", "active_dims"}


def _tolerances_from(raw: object, name: str, kind: str) -> list[Tolerance]:
    """The tolerances of a point: a list of Tolerance JSON forms, or (older files, accuracy
    levels only) an object keyed by level; Damaged when they are neither."""
    key = "tolerances" if kind == ABSOLUTE else "loss_tolerances"
    if isinstance(raw, dict) and kind == ABSOLUTE:
        entries = []
        for level, t in raw.items():
            try:
                float(level)
            except ValueError:
                raise Damaged(f"{name!r} has a tolerance at level {level!r}, which is not a number") from None
            entries.append((level, {"level": level, **t} if isinstance(t, dict) else t))
    elif isinstance(raw, list):
        entries = [(t.get("level") if isinstance(t, dict) else None, t) for t in raw]
    else:
        raise Damaged(f'the "{key}" of {name!r} are {json_kind(raw)}, not a list')
    tolerances = []
    for level, t in entries:
        if not isinstance(t, dict) or not isinstance(t.get("sigma", None), (int, float, type(None))) \
                or isinstance(t.get("sigma"), bool) or not isinstance(t.get("status", ""), str) \
                or isinstance(t.get("level"), bool) or not isinstance(t.get("level"), (int, float, str)):
            raise Damaged(f"the {level} tolerance of {name!r} is not a sigma and a status")
        try:
            tolerances.append(Tolerance.from_dict({"status": "ok", **t}, kind))
        except (TypeError, ValueError):
            raise Damaged(f"the {level} tolerance of {name!r} is not a sigma and a status") from None
    return tolerances


def _point_from_dict(row: object) -> TrendPoint:
    """A TrendPoint from its `to_dict` form; Damaged when it is not one."""
    if not isinstance(row, dict):
        raise Damaged(f"it lists {json_kind(row)} where a checkpoint's point should be")
    unknown = sorted(set(row) - _POINT_FIELDS)
    if unknown:
        raise Damaged(f"a point has an unknown entry, {unknown[0]!r}")
    name = need(row, "name", str)
    for key, kind in (("path", str), ("step_source", str), ("sha256", str), ("error", str)):
        if row.get(key) is not None and not isinstance(row[key], kind):
            raise Damaged(f'the "{key}" of {name!r} is {json_kind(row[key])}, not a string')
    step = row.get("step")
    if step is not None and (isinstance(step, bool) or not isinstance(step, int)):
        raise Damaged(f'the "step" of {name!r} is {json_kind(step)}, not a whole number')
    if row.get("active_dims") is not None and (isinstance(row["active_dims"], bool) or not isinstance(row["active_dims"], int)):
        raise Damaged(f'the "active_dims" of {name!r} is {json_kind(row["active_dims"])}, not a whole number')
    for key in ("accuracy_at_zero", "latent_rms", "kl"):
        value = row.get(key)
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))):
            raise Damaged(f'the "{key}" of {name!r} is {json_kind(value)}, not a number')
    tolerances = _tolerances_from(row.get("tolerances", []), name, ABSOLUTE)
    loss_tolerances = _tolerances_from(row.get("loss_tolerances", []), name, LOSS)
    return TrendPoint(
        path=row.get("path") or "", name=name, step=step, step_source=row.get("step_source") or "none",
        sha256=row.get("sha256") or "", accuracy_at_zero=row.get("accuracy_at_zero"), tolerances=tolerances,
        latent_rms=row.get("latent_rms"), error=row.get("error"), loss_tolerances=loss_tolerances,
        kl=row.get("kl"), active_dims=row.get("active_dims"),
    )


def read_trend(path: str | Path) -> list[TrendPoint]:
    """The points of a trend.json written by `write_trend` (or its folder), without their sweeps."""
    path = Path(path)
    if path.is_dir():
        path = path / "trend.json"
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ChunkscopeError(f"{path} does not exist.") from None
    except IsADirectoryError:
        raise ChunkscopeError(f"{path} is a folder, not a trend.json written by chunkscope trend.") from None
    except UnicodeDecodeError:
        raise ChunkscopeError(f"{path} is not a trend.json written by chunkscope trend: it is not UTF-8 text.") from None
    except ValueError:
        raise ChunkscopeError(f"{path} is not a trend.json written by chunkscope trend: it is not valid JSON.") from None
    except OSError as exc:
        raise ChunkscopeError(f"{path} cannot be read: {exc.strerror or 'the system refused'}.") from None
    try:
        if not isinstance(data, list):
            raise Damaged(f"it holds {json_kind(data)}, not a list of points")
        return [_point_from_dict(row) for row in data]
    except Damaged as exc:
        raise ChunkscopeError(f"{path} is not a trend.json written by chunkscope trend: {exc}.") from None
