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
from core.codecs.adapter import path_sha256
from core.codecs.checkpoint import file_sha256
from core.analyses.compare import Comparison, read_comparison
from core.errors import ChunkscopeError
from core.outputs.files import refuse_existing, staged_file
from core.outputs.reading import Damaged, json_kind
from core.engine.sweep import SweepResult, read_sweep
from core.analyses.trend import TrendPoint

WORKSPACE_FORMAT = 1
WORKSPACE_SUFFIX = ".chunkscope"


@dataclass
class Workspace:
    # {"path", "sha256", "name"}, and "opened_as"; opened through an adapter: "adapter", "adapter_sha256"
    checkpoints: list[dict[str, str]] = field(default_factory=list)
    text: str = ""
    text_source: str = ""
    settings: dict[str, Any] = field(default_factory=dict)
    sweeps: dict[str, SweepResult] = field(default_factory=dict)
    comparison: Comparison | None = None
    trend_points: list[TrendPoint] = field(default_factory=list)
    trend_folder: str = ""

    def checkpoint_problems(self) -> list[str]:
        """One sentence per referenced checkpoint (a file, or a folder: ONNX, or what an adapter
        opened) that is gone or changed since the save, and per adapter file gone or changed."""
        problems = []
        for c in self.checkpoints:
            path = Path(c["path"])
            if not path.exists():
                problems.append(f"{path.name} is no longer at {path.parent}.")
            elif c.get("sha256") and path_sha256(path) != c["sha256"]:
                problems.append(f"{path.name} has changed since the workspace was saved (its sha256 differs).")
            adapter = Path(c["adapter"]) if c.get("adapter") and c.get("adapter_sha256") else None
            if adapter is not None and not adapter.is_file():
                problems.append(f"The adapter {adapter} that opened {path.name} is no longer there.")
            elif adapter is not None and file_sha256(adapter) != c["adapter_sha256"]:
                problems.append(f"The adapter {adapter} has changed since the workspace was saved (its sha256 differs).")
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
        raise ChunkscopeError(f"{path} does not exist or is not a file.")
    staging = Path(tempfile.mkdtemp(prefix=".workspace-"))
    try:
        try:
            with zipfile.ZipFile(path) as archive:
                for name in archive.namelist():
                    if name.startswith("/") or ".." in Path(name).parts:
                        raise ChunkscopeError(f"{path} holds an unsafe path {name!r}.")
                archive.extractall(staging)
        except ChunkscopeError:
            raise
        except zipfile.BadZipFile:
            raise ChunkscopeError(f"{path} is not a chunkscope workspace (not a zip file, or a damaged one).") from None
        except OSError as exc:
            raise ChunkscopeError(f"{path} cannot be read: {exc.strerror or exc}.") from None
        except Exception:  # zlib.error, EOFError: a damaged member
            raise ChunkscopeError(f"{path} is damaged: a file inside it cannot be unpacked.") from None
        try:
            manifest = json.loads((staging / "workspace.json").read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ChunkscopeError(f"{path} is not a chunkscope workspace (workspace.json is missing).") from None
        except ValueError:
            raise ChunkscopeError(f"{path} has a damaged workspace.json: it is not valid JSON.") from None
        try:
            text = (staging / "text.txt").read_text(encoding="utf-8")
        except FileNotFoundError:
            raise ChunkscopeError(f"{path} is damaged: text.txt is missing.") from None
        except ValueError:
            raise ChunkscopeError(f"{path} is damaged: text.txt is not UTF-8 text.") from None
        return _workspace_from_files(path, staging, manifest, text)
    finally:
        shutil.rmtree(staging, ignore_errors=True)


def _workspace_from_files(path: Path, staging: Path, manifest: Any, text: str) -> Workspace:
    """The one validator of a workspace's contents (its sweeps and comparison by their own readers)."""
    try:
        if not isinstance(manifest, dict):
            raise Damaged(f"it holds {json_kind(manifest)}, not an object")
        version = manifest.get("format", 0)
        if isinstance(version, bool) or not isinstance(version, int):
            raise Damaged(f"its format is {json_kind(version)}, not a whole number")
        if version > WORKSPACE_FORMAT:
            raise ChunkscopeError(f"{path} was saved by a newer chunkscope (workspace format {version}).")
        sweep_folders = manifest.get("sweeps", {})
        if not isinstance(sweep_folders, dict) or not all(isinstance(v, str) for v in sweep_folders.values()):
            raise Damaged("its sweeps are not a map from names to folders")
        comparison_folder = manifest.get("comparison")
        if comparison_folder is not None and not isinstance(comparison_folder, str):
            raise Damaged(f"its comparison is {json_kind(comparison_folder)}, not a folder name")
        for folder in list(sweep_folders.values()) + [comparison_folder or ""]:
            if folder.startswith("/") or ".." in Path(folder).parts:
                raise Damaged(f"it names a folder outside the workspace, {folder!r}")
        checkpoints = manifest.get("checkpoints", [])
        if not isinstance(checkpoints, list) or not all(isinstance(c, dict) and isinstance(c.get("path"), str) for c in checkpoints):
            raise Damaged("its checkpoints are not a list of paths")
        settings = manifest.get("settings", {})
        if not isinstance(settings, dict):
            raise Damaged(f"its settings are {json_kind(settings)}, not an object")
        for key in ("text_source", "trend_folder"):
            if not isinstance(manifest.get(key, ""), str):
                raise Damaged(f"its {key.replace('_', ' ')} is {json_kind(manifest[key])}, not a string")
        points = []
        for p in manifest.get("trend_points", []) if isinstance(manifest.get("trend_points", []), list) else [None]:
            if not isinstance(p, dict) or not isinstance(p.get("tolerances", {}), dict):
                raise Damaged("its training-run points are not points")
            p = dict(p)
            try:
                p["tolerances"] = {float(k): v for k, v in p.get("tolerances", {}).items()}
                points.append(TrendPoint(**p))
            except (TypeError, ValueError):
                raise Damaged("its training-run points are not points") from None
    except Damaged as exc:
        raise ChunkscopeError(f"{path} has a damaged workspace.json: {exc}.") from None
    sweeps = {key: read_sweep(staging / folder, f"{path} ({folder})") for key, folder in sweep_folders.items()}
    comparison = read_comparison(staging / comparison_folder, f"{path} ({comparison_folder})") if comparison_folder else None
    return Workspace(
        checkpoints=checkpoints,
        text=text,
        text_source=manifest.get("text_source", ""),
        settings=settings,
        sweeps=sweeps,
        comparison=comparison,
        trend_points=points,
        trend_folder=manifest.get("trend_folder", ""),
    )
