"""What the window's File menu calls to save and reopen results: thin wrappers over core.

Each function returns data or raises a ChunkscopeError whose message the window shows
verbatim; a system error core did not already put into words (OSError) becomes one
sentence naming the user's path (`error_text`). The `ask_*` helpers add the file dialogs
and the question before replacing a file."""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

from PySide6.QtWidgets import QFileDialog, QWidget

from app.export import confirm_overwrite
from app.messages import user_path
from core.analyses.compare import Comparison, read_comparison
from core.errors import ChunkscopeError
from core.outputs.report import build_report
from core.outputs.files import write_text_atomic
from core.engine.sweep import DEFAULT_NOISE, SweepResult, read_sweep
from core.analyses.trend import TrendPoint, read_trend
from core.outputs.workspace import WORKSPACE_SUFFIX, Workspace, load_workspace, save_workspace

REPORT_FILTER = "HTML report (*.html)"
WORKSPACE_FILTER = f"chunkscope workspace (*{WORKSPACE_SUFFIX})"


# ---- without dialogs (tests and scripts call these) ---------------------------------------

def save_report(path: str | Path, sweeps: Sequence[SweepResult] = (), comparison: Comparison | None = None,
                trend_points: Sequence[TrendPoint] = (), trend_noise: str = DEFAULT_NOISE,
                title: str = "chunkscope report", force: bool = False) -> Path:
    """Write a self-contained HTML report of what is loaded and computed, atomically."""
    try:
        html = build_report(sweeps=sweeps, comparison=comparison, trend_points=trend_points, trend_noise=trend_noise,
                            title=title)
    except ChunkscopeError:
        raise
    except ValueError:
        raise ChunkscopeError("there is nothing to report yet: run a sweep, a comparison or a training-run trend first.") from None
    with user_path(path, "saved"):
        return write_text_atomic(path, html, force=force)


def make_workspace(codecs: Sequence = (), text: str = "", text_source: str = "", settings: dict | None = None,
                   sweeps: dict[str, SweepResult] | None = None, comparison: Comparison | None = None,
                   trend_points: Sequence[TrendPoint] = (), trend_folder: str = "") -> Workspace:
    """A Workspace from what the window holds; checkpoints are referenced by path and sha256."""
    return Workspace(
        checkpoints=[_checkpoint_record(c) for c in codecs if getattr(c, "path", "")],
        text=text, text_source=text_source, settings=dict(settings or {}), sweeps=dict(sweeps or {}),
        comparison=comparison, trend_points=list(trend_points), trend_folder=trend_folder,
    )


def _checkpoint_record(codec) -> dict[str, str]:
    """Path, sha256 and name; how it was opened; for an adapter, the adapter file and its sha256
    (reopening asks again before that code runs, unless the user allowed that exact hash)."""
    record = {"path": str(codec.path), "sha256": codec.sha256, "name": codec.name}
    source = getattr(codec, "source", None)
    if source is not None:
        record["opened_as"] = source.opened_as
        if source.adapter:
            record["adapter"] = source.adapter
            record["adapter_sha256"] = source.adapter_sha256
    return record


def save_workspace_file(workspace: Workspace, path: str | Path, force: bool = False) -> Path:
    path = Path(path)
    if path.suffix != WORKSPACE_SUFFIX:
        path = path.with_name(path.name + WORKSPACE_SUFFIX)
    with user_path(path, "saved"):
        return save_workspace(workspace, path, force=force)


def open_workspace_file(path: str | Path) -> tuple[Workspace, list[str]]:
    """The workspace and one sentence per referenced checkpoint that is gone or changed."""
    with user_path(path, "opened"):
        workspace = load_workspace(path)
        return workspace, workspace.checkpoint_problems()


def open_sweep_folder(path: str | Path) -> SweepResult:
    """A sweep folder written by `chunkscope sweep --out` (or by the workbench)."""
    with user_path(path, "opened"):
        return read_sweep(path)


def open_comparison_folder(path: str | Path) -> Comparison:
    """A comparison folder written by `chunkscope compare --out`."""
    with user_path(path, "opened"):
        return read_comparison(path)


def open_trend_file(path: str | Path) -> list[TrendPoint]:
    """trend.json written by `chunkscope trend --out` (points without their sweeps)."""
    with user_path(path, "opened"):
        return read_trend(path)


# ---- with dialogs (the window's menu actions) ---------------------------------------------

def ask_save_path(parent: QWidget | None, title: str, name_filter: str, suffix: str, suggested: str = "") -> tuple[Path, bool] | None:
    """A save dialog, then the question before replacing: (path, force) or None if abandoned."""
    path_text, _ = QFileDialog.getSaveFileName(parent, title, suggested, name_filter,
                                               options=QFileDialog.Option.DontConfirmOverwrite)
    if not path_text:
        return None
    path = Path(path_text)
    if path.suffix.lower() != suffix:
        path = path.with_name(path.name + suffix)
    if path.exists():
        if not confirm_overwrite(parent, path):
            return None
        return path, True
    return path, False


def ask_save_report(parent: QWidget | None, suggested: str = "chunkscope-report.html", **report) -> Path | None:
    """Ask where, then `save_report(**report)`; raises the core error for the window to show."""
    chosen = ask_save_path(parent, "Save report", REPORT_FILTER, ".html", suggested)
    if chosen is None:
        return None
    path, force = chosen
    return save_report(path, force=force, **report)


def ask_save_workspace(parent: QWidget | None, workspace: Workspace, suggested: str = f"workspace{WORKSPACE_SUFFIX}") -> Path | None:
    chosen = ask_save_path(parent, "Save workspace", WORKSPACE_FILTER, WORKSPACE_SUFFIX, suggested)
    if chosen is None:
        return None
    path, force = chosen
    return save_workspace_file(workspace, path, force=force)


def ask_open_workspace(parent: QWidget | None, start: str = "") -> tuple[Workspace, list[str]] | None:
    path, _ = QFileDialog.getOpenFileName(parent, "Open workspace", start, f"{WORKSPACE_FILTER};;All files (*)")
    return open_workspace_file(path) if path else None


def ask_open_sweep_folder(parent: QWidget | None, start: str = "") -> SweepResult | None:
    folder = QFileDialog.getExistingDirectory(parent, "Open a sweep folder (written by chunkscope sweep)", start)
    return open_sweep_folder(folder) if folder else None


def ask_open_comparison_folder(parent: QWidget | None, start: str = "") -> Comparison | None:
    folder = QFileDialog.getExistingDirectory(parent, "Open a comparison folder (written by chunkscope compare)", start)
    return open_comparison_folder(folder) if folder else None
