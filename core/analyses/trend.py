"""Tolerance through a training run: sweep every checkpoint of a folder, in step order."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator

from core.codecs.checkpoint import load_codec
from core.errors import ChunkscopeError, SweepCancelled
from core.engine.sweep import SweepResult, SweepSettings, run_sweep
from core.engine.text import chunk_text
from core.engine.tolerance import ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, Tolerance

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


def checkpoints_in(folder: str | Path) -> list[Path]:
    folder = Path(folder)
    if not folder.is_dir():
        raise ChunkscopeError(f"{folder.name} is not a folder.")
    paths = sorted(folder.glob("*.safetensors"))
    if not paths:
        raise ChunkscopeError(f"{folder.name} holds no .safetensors checkpoints.")
    return paths


def trend(
    folder: str | Path,
    text: str,
    settings: SweepSettings,
    text_source: str = "",
    should_stop: Callable[[], bool] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> Iterator[TrendPoint]:
    """Yield one point per checkpoint as it finishes; a bad checkpoint yields a point with `error`."""
    paths = checkpoints_in(folder)
    for index, path in enumerate(paths):
        if should_stop is not None and should_stop():
            raise SweepCancelled()
        try:
            codec = load_codec(path)
        except ChunkscopeError as exc:
            step = step_from_name(path.stem)
            yield TrendPoint(str(path), path.stem, step, "file name" if step is not None else "none", error=str(exc))
            continue
        step = step_from_card(codec.card)
        source = "card"
        if step is None:
            step = step_from_name(path.stem)
            source = "file name" if step is not None else "none"
        try:
            chunks = chunk_text(text, codec, text_source or "the text")
            result = run_sweep(
                codec, chunks, settings, text_source=text_source, should_stop=should_stop,
                progress=(lambda d, t, i=index: progress(i * t + d, len(paths) * t)) if progress else None,
            )
        except ChunkscopeError as exc:
            yield TrendPoint(str(path), codec.name, step, source, sha256=codec.sha256, error=str(exc))
            continue
        acc0 = result.curves[0].token_accuracy if result.sigmas[0] == 0 else None
        yield TrendPoint(
            str(path), codec.name, step, source, sha256=codec.sha256, accuracy_at_zero=acc0,
            tolerances=list(result.tolerances), loss_tolerances=list(result.loss_tolerances),
            latent_rms=result.latent_rms, result=result,
        )


def sort_points(points: list[TrendPoint]) -> list[TrendPoint]:
    return sorted(points, key=lambda p: (p.step is None, p.step if p.step is not None else 0, p.name))


def trend_csv(points: list[TrendPoint]) -> str:
    levels = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]
    head = ",".join(f"{'tol' if kind == ABSOLUTE else 'loss_tol'}_{level * 100:g}" for kind, level in levels)  # % or points
    lines = [f"name,step,step_source,accuracy_at_sigma0,{head},latent_rms,sha256,error"]
    for p in sort_points(points):
        tol = [p.tolerance(level, kind) for kind, level in levels]
        cells = ["" if t is None or t.sigma is None else f"{t.sigma:.6g}{'+' if t.status == 'above_grid' else ''}" for t in tol]
        error = (p.error or "").replace('"', "'")
        lines.append(
            f"{p.name},{'' if p.step is None else p.step},{p.step_source},"
            f"{'' if p.accuracy_at_zero is None else f'{p.accuracy_at_zero:.6f}'},{','.join(cells)},"
            f"{'' if p.latent_rms is None else f'{p.latent_rms:.6g}'},{p.sha256},\"{error}\""
        )
    return "\n".join(lines) + "\n"
