"""A workspace file: what is loaded, the settings and every computed result, in one zip.

Reopening restores the results exactly, without recomputing. Checkpoints are referenced
by path and sha256 (not copied); a changed or missing file is reported, not trusted.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
import zipfile
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import core
from core.codecs.checkpoint import file_sha256
from core.analyses.compare import Comparison, read_comparison
from core.errors import ChunkscopeError
from core.outputs.files import refuse_existing, staged_file
from core.engine.sweep import SweepResult, read_sweep
from core.analyses.trend import TrendPoint

WORKSPACE_FORMAT = 1
WORKSPACE_SUFFIX = ".chunkscope"


@dataclass
class Workspace:
    checkpoints: list[dict[str, str]] = field(default_factory=list)  # {"path", "sha256", "name"}
    text: str = ""
    text_source: str = ""
    settings: dict[str, Any] = field(default_factory=dict)
    sweeps: dict[str, SweepResult] = field(default_factory=dict)
    comparison: Comparison | None = None
    trend_points: list[TrendPoint] = field(default_factory=list)
    trend_folder: str = ""

    def checkpoint_problems(self) -> list[str]:
        """One sentence per referenced checkpoint that is gone or changed since the save."""
        problems = []
        for c in self.checkpoints:
            path = Path(c["path"])
            if not path.is_file():
                problems.append(f"{path.name} is no longer at {path.parent}.")
            elif c.get("sha256") and file_sha256(path) != c["sha256"]:
                problems.append(f"{path.name} has changed since the workspace was saved (its sha256 differs).")
        return problems


def _safe_key(key: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in key)


def save_workspace(workspace: Workspace, path: str | os.PathLike, force: bool = False) -> Path:
    path = Path(path)
    refuse_existing(path, force)
    staging = Path(tempfile.mkdtemp(prefix=".workspace-"))
    try:
        sweeps_index = {}
        for i, (key, result) in enumerate(workspace.sweeps.items()):
            folder = f"sweeps/{i:03d}-{_safe_key(key)}"
            result.write(staging / folder)
            sweeps_index[key] = folder
        if workspace.comparison is not None:
            workspace.comparison.write(staging / "comparison")
        manifest = {
            "format": WORKSPACE_FORMAT,
            "tool": "chunkscope",
            "version": core.__version__,
            "saved": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "checkpoints": workspace.checkpoints,
            "text_source": workspace.text_source,
            "settings": workspace.settings,
            "sweeps": sweeps_index,
            "comparison": "comparison" if workspace.comparison is not None else None,
            "trend_folder": workspace.trend_folder,
            "trend_points": [p.to_dict() for p in workspace.trend_points],
        }
        (staging / "workspace.json").write_text(json.dumps(manifest, indent=1), encoding="utf-8")
        (staging / "text.txt").write_text(workspace.text, encoding="utf-8")
        with staged_file(path, force) as tmp_zip:
            with zipfile.ZipFile(tmp_zip, "w", compression=zipfile.ZIP_DEFLATED) as archive:
                for file in sorted(staging.rglob("*")):
                    if file.is_file():
                        archive.write(file, file.relative_to(staging).as_posix())
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return path


def load_workspace(path: str | os.PathLike) -> Workspace:
    path = Path(path)
    if not path.is_file():
        raise ChunkscopeError(f"{path.name} does not exist or is not a file.")
    staging = Path(tempfile.mkdtemp(prefix=".workspace-"))
    try:
        try:
            with zipfile.ZipFile(path) as archive:
                for name in archive.namelist():
                    if name.startswith("/") or ".." in Path(name).parts:
                        raise ChunkscopeError(f"{path.name} holds an unsafe path {name!r}.")
                archive.extractall(staging)
        except zipfile.BadZipFile:
            raise ChunkscopeError(f"{path.name} is not a chunkscope workspace (not a zip file).") from None
        try:
            manifest = json.loads((staging / "workspace.json").read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ChunkscopeError(f"{path.name} is not a chunkscope workspace (workspace.json is missing).") from None
        except ValueError:
            raise ChunkscopeError(f"{path.name} has a damaged workspace.json.") from None
        if int(manifest.get("format", 0)) > WORKSPACE_FORMAT:
            raise ChunkscopeError(f"{path.name} was saved by a newer chunkscope (workspace format {manifest['format']}).")
        sweeps = {key: read_sweep(staging / folder) for key, folder in manifest.get("sweeps", {}).items()}
        comparison = read_comparison(staging / manifest["comparison"]) if manifest.get("comparison") else None
        points = [TrendPoint.from_dict(p) for p in manifest.get("trend_points", [])]
        return Workspace(
            checkpoints=manifest.get("checkpoints", []),
            text=(staging / "text.txt").read_text(encoding="utf-8"),
            text_source=manifest.get("text_source", ""),
            settings=manifest.get("settings", {}),
            sweeps=sweeps,
            comparison=comparison,
            trend_points=points,
            trend_folder=manifest.get("trend_folder", ""),
        )
    finally:
        shutil.rmtree(staging, ignore_errors=True)
