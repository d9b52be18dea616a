"""The main window: checkpoints on the left, four views on the right, messages on top."""

from __future__ import annotations

import json
from pathlib import Path

from PySide6.QtCore import QEvent, QSettings, Qt, QTimer
from PySide6.QtGui import QAction, QCloseEvent, QDragEnterEvent, QDropEvent, QKeySequence
from PySide6.QtWidgets import (
    QDialog, QDialogButtonBox, QFileDialog, QFrame, QHBoxLayout, QLabel, QLineEdit, QMainWindow, QPlainTextEdit,
    QPushButton, QSplitter, QTabWidget, QVBoxLayout, QWidget,
)

from app import adapters, report_actions
from app.messages import error_text
from app.panel_compare import ComparePanel
from app.run_on import RunOn
from app.panel_latent import LatentPanel
from app.panel_live import LivePanel
from app.panel_models import ModelsPanel
from app.panel_predictions import PredictionsPanel
from app.panel_sweep import SweepPanel
from app.panel_tokens import TokensPanel
from app.panel_trend import TrendPanel
from app.panel_worstcase import WorstCasePanel
from app.state import Workbench, default_text_path, sample_paths
from app.style import mono_font
from app.workers import Runner
from core.analyses.prediction_file import is_predictions_file
from core.codecs.onnx import MANIFEST, is_onnx_codec
from core.errors import ChunkscopeError
from core.engine.sweep import SweepResult
from core.engine.text import text_sha256

VIEWS = ("live", "sweep", "tokens", "latent", "compare", "trend", "worstcase", "predictions")
VIEW_TITLES = {"live": "Perturb live", "sweep": "Sweep", "tokens": "Token failures", "latent": "Latent space",
               "compare": "Compare", "trend": "Training run", "worstcase": "Worst case", "predictions": "Generator errors"}
MAX_RECENT = 10
START_AFTER_SHOW_MS = 1000  # queued work starts at the latest this long after the window is shown
TEXT_SUFFIXES = {".txt", ".md", ".text", ".rst", ".csv", ".json", ".py", ".html"}


class MessageBar(QFrame):
    """An inline message above the views: the problem in one sentence, dismissable."""

    def __init__(self):
        super().__init__()
        self.setObjectName("messageBar")
        layout = QHBoxLayout(self)
        layout.setContentsMargins(12, 6, 6, 6)
        self.label = QLabel("")
        self.label.setWordWrap(True)
        self.label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        layout.addWidget(self.label, 1)
        close = QPushButton("Dismiss")
        close.clicked.connect(self.hide)
        layout.addWidget(close)
        self.hide()

    def show_message(self, text: str) -> None:
        self.label.setText(text)
        self.show()

    def text(self) -> str:
        return self.label.text() if self.isVisible() else ""


class PasteTextDialog(QDialog):
    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self.setWindowTitle("Paste a text to evaluate on")
        self.resize(720, 480)
        layout = QVBoxLayout(self)
        self.name = QLineEdit("pasted text")
        self.editor = QPlainTextEdit()
        self.editor.setFont(mono_font(9.5))
        self.editor.setPlaceholderText("Paste or type the text the checkpoints should encode and decode.")
        caption = QLabel("name")
        caption.setObjectName("caption")
        row = QHBoxLayout()
        row.addWidget(caption)
        row.addWidget(self.name, 1)
        layout.addLayout(row)
        layout.addWidget(self.editor, 1)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        buttons.button(QDialogButtonBox.StandardButton.Ok).setText("Use this text")
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        layout.addWidget(buttons)


class MainWindow(QMainWindow):
    def __init__(self, settings: QSettings, samples: list[Path] | None = None, text_path: Path | None = None,
                 load_defaults: bool = True):
        super().__init__()
        self.settings = settings
        self.setWindowTitle("chunkscope")
        self.setAcceptDrops(True)
        self.resize(1500, 950)
        self.runner = Runner(self)
        # work queued while the window is built starts once its first paint is done (or, for a
        # window never shown, at the first turn of the event loop): the first task imports torch,
        # which would hold the GIL through that paint
        self.runner.hold()
        self.installEventFilter(self)
        QTimer.singleShot(0, lambda: None if self.isVisible() else self._start_queued_work())
        self.workbench = Workbench(self.runner, self)
        self.workbench.error.connect(self.show_error)
        self.workbench.opened.connect(self._checkpoint_opened)
        self.workbench.open_failed.connect(self._checkpoint_failed)
        self._opening: set[str] = set()  # checkpoints the user opened whose weights are still loading
        self.closing = False

        self.models = ModelsPanel(self.workbench)
        self.models.open_requested.connect(self.open_checkpoint_dialog)
        self.models.open_adapter_requested.connect(self.open_with_adapter_dialog)
        self.live = LivePanel(self.workbench)
        self.sweep = SweepPanel(self.workbench)
        self.tokens = TokensPanel(self.workbench)
        self.latent = LatentPanel(self.workbench)
        self.sweep.sigma_picked.connect(self._show_in_live)
        self.live.result_ready.connect(lambda r: self.sweep.show_live_sigma(r.sigma, r.noise))
        self.workbench.sweep_ended.connect(self._sweep_ended)
        self.compare = ComparePanel(self.runner)
        self.compare.error.connect(self.show_error)
        self.compare.comparison_ready.connect(
            lambda c: self.statusBar().showMessage(f"comparison of {', '.join(c.names)} finished", 6000))
        self.trend = TrendPanel(self.runner)
        self.trend.adapter_allowed = self.adapter_allowed
        self.trend.error.connect(self.show_error)
        self.trend.finished.connect(
            lambda points: self.statusBar().showMessage(f"training run measured: {len(points)} checkpoints", 6000))
        self.predictions = PredictionsPanel(self.workbench)
        self.predictions.error.connect(self.show_error)
        self._compare_key: tuple = ()
        self._pending_sweeps: list[SweepResult] = []
        self.workbench.entries_changed.connect(self._feed_compare)
        self.workbench.entry_changed.connect(self._entry_changed)
        self.workbench.text_changed.connect(self._text_changed)

        self.tabs = QTabWidget()
        self.tabs.setDocumentMode(True)
        self.panels = {"live": self.live, "sweep": self.sweep, "tokens": self.tokens, "latent": self.latent,
                       "compare": self.compare, "trend": self.trend, "worstcase": WorstCasePanel(self.workbench),
                       "predictions": self.predictions}
        worst = self.panels["worstcase"]
        worst.generator_source = lambda: self.predictions.result
        self.predictions.finished.connect(worst.predictions_changed)
        for name in VIEWS:
            self.tabs.addTab(self.panels[name], VIEW_TITLES[name])

        self.message = MessageBar()
        right = QWidget()
        right.setObjectName("page")
        rv = QVBoxLayout(right)
        rv.setContentsMargins(0, 6, 0, 0)
        rv.setSpacing(4)
        rv.addWidget(self.message)
        rv.addWidget(self.tabs, 1)

        left = QWidget()
        left.setObjectName("page")
        lv = QVBoxLayout(left)
        lv.setContentsMargins(12, 12, 4, 12)
        lv.addWidget(self.models)
        left.setMinimumWidth(290)
        left.setMaximumWidth(520)

        self.splitter = QSplitter(Qt.Orientation.Horizontal)
        self.splitter.addWidget(left)
        self.splitter.addWidget(right)
        self.splitter.setStretchFactor(0, 0)
        self.splitter.setStretchFactor(1, 1)
        self.splitter.setSizes([320, 1180])
        self.splitter.setChildrenCollapsible(False)
        self.setCentralWidget(self.splitter)
        self._build_menus()
        self.run_on = RunOn(self)  # where the sweep, compare and training-run views do their work
        self.statusBar().showMessage("ready")
        self._restore()
        if load_defaults:
            self.load_defaults(samples, text_path)

    # ---- menus ---------------------------------------------------------------------------

    def _build_menus(self) -> None:
        file_menu = self.menuBar().addMenu("&File")
        action = QAction("Open checkpoint…", self)
        action.setShortcut(QKeySequence.StandardKey.Open)
        action.triggered.connect(self.open_checkpoint_dialog)
        file_menu.addAction(action)
        action = QAction("Open checkpoint with adapter…", self)
        action.setToolTip(adapters.RUNS_CODE)
        action.triggered.connect(self.open_with_adapter_dialog)
        file_menu.addAction(action)
        action = QAction("Open ONNX codec folder…", self)
        action.triggered.connect(self.open_onnx_dialog)
        file_menu.addAction(action)
        self.recent_menu = file_menu.addMenu("Open recent")
        file_menu.addSeparator()
        action = QAction("Open text file…", self)
        action.triggered.connect(self.open_text_dialog)
        file_menu.addAction(action)
        action = QAction("Paste text…", self)
        action.triggered.connect(self.paste_text_dialog)
        file_menu.addAction(action)
        action = QAction("Use the demo text", self)
        action.triggered.connect(lambda: self.workbench.open_text_file(str(default_text_path())))
        file_menu.addAction(action)
        file_menu.addSeparator()
        action = QAction("Open training run folder…", self)
        action.triggered.connect(self.trend.choose_folder)
        file_menu.addAction(action)
        action = QAction("Open training run with adapter…", self)
        action.triggered.connect(self.open_run_with_adapter_dialog)
        file_menu.addAction(action)
        action = QAction("Open sweep results folder…", self)
        action.triggered.connect(self.open_sweep_folder_dialog)
        file_menu.addAction(action)
        action = QAction("Open predictions…", self)
        action.triggered.connect(self.open_predictions_dialog)
        file_menu.addAction(action)
        action = QAction("Open workspace…", self)
        action.triggered.connect(self.open_workspace_dialog)
        file_menu.addAction(action)
        action = QAction("Save workspace…", self)
        action.setShortcut(QKeySequence.StandardKey.Save)
        action.triggered.connect(self.save_workspace_dialog)
        file_menu.addAction(action)
        action = QAction("Save report…", self)
        action.triggered.connect(self.save_report_dialog)
        file_menu.addAction(action)
        file_menu.addSeparator()
        action = QAction("Close checkpoint", self)
        action.triggered.connect(lambda: self.workbench.close_checkpoint(self.workbench.current))
        file_menu.addAction(action)
        action = QAction("Quit", self)
        action.setShortcut(QKeySequence.StandardKey.Quit)
        action.triggered.connect(self.close)
        file_menu.addAction(action)
        view_menu = self.menuBar().addMenu("&View")
        for i, name in enumerate(VIEWS):
            action = QAction(VIEW_TITLES[name], self)
            action.setShortcut(QKeySequence(f"Ctrl+{i + 1}"))
            action.triggered.connect(lambda _=False, n=name: self.show_view(n))
            view_menu.addAction(action)
        sweep_menu = self.menuBar().addMenu("&Sweep")
        action = QAction("Run sweep", self)
        action.setShortcut(QKeySequence("Ctrl+R"))
        action.triggered.connect(self.sweep.run)
        sweep_menu.addAction(action)
        action = QAction("Cancel sweep", self)
        action.triggered.connect(lambda: self.workbench.cancel_sweep())
        sweep_menu.addAction(action)
        self._fill_recent()

    def _fill_recent(self) -> None:
        self.recent_menu.clear()
        recent = self.recent_files()
        for path in recent:
            action = QAction(path, self)
            action.triggered.connect(lambda _=False, p=path: self.open_checkpoint(p))
            self.recent_menu.addAction(action)
        if not recent:
            empty = QAction("(nothing yet)", self)
            empty.setEnabled(False)
            self.recent_menu.addAction(empty)

    def recent_files(self) -> list[str]:
        value = self.settings.value("recent", [])
        if isinstance(value, str):
            value = [value]
        return [str(v) for v in (value or [])][:MAX_RECENT]

    def _remember(self, path: str) -> None:
        recent = [path] + [p for p in self.recent_files() if p != path]
        self.settings.setValue("recent", recent[:MAX_RECENT])
        self._fill_recent()

    # ---- opening -------------------------------------------------------------------------

    def load_defaults(self, samples: list[Path] | None = None, text_path: Path | None = None) -> None:
        text_path = text_path or default_text_path()
        if not self.workbench.open_text_file(str(text_path)):
            return
        paths = sample_paths() if samples is None else samples
        if not paths:
            self.show_error("No sample checkpoints were found; open one with File ▸ Open checkpoint or drop it here.")
        for i, path in enumerate(paths):
            self.workbench.open_checkpoint(path, select=(i == 0))

    def open_checkpoint(self, path: str) -> None:
        """Open a checkpoint (or an ONNX codec folder) the user chose; it enters Recent files once
        its weights have loaded. No adapter: code lying next to a checkpoint is never run."""
        self.message.hide()
        resolved = self.workbench.checkpoint_key(path)
        self.workbench.open_checkpoint(path)
        entry = self.workbench.entries.get(resolved)
        if entry is not None and entry.codec is not None:  # it was open already
            self._remember(resolved)
        else:
            self._opening.add(resolved)

    def adapter_allowed(self, adapter: str) -> str:
        """The adapter's sha256 once the user allowed its code to run (asked before the first use of
        each file, remembered for that hash); "" if not allowed or unusable (said in the bar)."""
        try:
            return adapters.allowed(self, self.settings, adapter)
        except (ChunkscopeError, OSError) as exc:
            self.show_error(error_text(exc, adapter, "read"))
            return ""

    def open_with_adapter(self, checkpoint: str, adapter: str, select: bool = True) -> bool:
        """Open `checkpoint` through the user's adapter, after asking (see `adapter_allowed`);
        the adapter runs in a worker and its failure is core's sentence in the message bar."""
        self.message.hide()
        if not Path(checkpoint).exists():
            self.show_error(f"{checkpoint} does not exist.")
            return False
        adapter = adapters.adapter_file(adapter)
        sha = self.adapter_allowed(adapter)
        if not sha:
            return False
        self.settings.setValue("last_adapter", adapter)
        self.workbench.open_checkpoint(checkpoint, select=select, adapter=adapter,
                                       adapter_sha256=sha if not sha.startswith("entry point") else "")
        return True

    def open_with_adapter_dialog(self) -> None:
        picked = adapters.choose_with_adapter(self, str(self.settings.value("last_dir", "")),
                                              str(self.settings.value("last_adapter", "")))
        if picked:
            self.settings.setValue("last_dir", str(Path(picked[0]).parent))
            self.open_with_adapter(*picked)

    def open_onnx_dialog(self) -> None:
        folder = QFileDialog.getExistingDirectory(self, "Open an ONNX codec folder (codec.json, encoder.onnx, "
                                                  "decoder.onnx, tokenizer.json)", str(self.settings.value("last_dir", "")))
        if folder:
            self.settings.setValue("last_dir", str(Path(folder).parent))
            self.open_checkpoint(folder)

    def open_run_with_adapter_dialog(self) -> None:
        picked = adapters.choose_with_adapter(self, str(self.settings.value("last_dir", "")),
                                              str(self.settings.value("last_adapter", "")), folder_only=True)
        if picked:
            self.settings.setValue("last_adapter", picked[1])
            self.show_view("trend")
            self.trend.run_folder(picked[0], adapter=picked[1])

    def _checkpoint_opened(self, path: str) -> None:
        if path in self._opening:
            self._opening.discard(path)
            self._remember(path)

    def _checkpoint_failed(self, path: str) -> None:
        self._opening.discard(path)

    def open_checkpoint_dialog(self) -> None:
        paths, _ = QFileDialog.getOpenFileNames(self, "Open checkpoints", str(self.settings.value("last_dir", "")),
                                                f"Checkpoints (*.safetensors {MANIFEST});;All files (*)")
        for path in paths:
            self.settings.setValue("last_dir", str(Path(path).parent))
            self.open_checkpoint(path)

    def open_text_dialog(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open a text to evaluate on", str(self.settings.value("last_dir", "")),
                                              "Text (*.txt *.md);;All files (*)")
        if path:
            self.message.hide()
            self.workbench.open_text_file(path)

    def paste_text_dialog(self) -> None:
        dialog = PasteTextDialog(self)
        if dialog.exec() == QDialog.DialogCode.Accepted:
            self.message.hide()
            self.workbench.set_text(dialog.editor.toPlainText(), dialog.name.text().strip() or "pasted text")

    def dragEnterEvent(self, event: QDragEnterEvent) -> None:  # noqa: N802
        if event.mimeData().hasUrls():
            event.acceptProposedAction()

    def dropEvent(self, event: QDropEvent) -> None:  # noqa: N802
        for url in event.mimeData().urls():
            path = url.toLocalFile()
            if not path:
                continue
            if Path(path).name == MANIFEST or is_onnx_codec(path):
                self.open_checkpoint(path)
            elif Path(path).suffix.lower() in TEXT_SUFFIXES:
                self.workbench.open_text_file(path)
            elif is_predictions_file(path):
                self.open_predictions(path)
            else:
                self.open_checkpoint(path)
        event.acceptProposedAction()

    def open_predictions_dialog(self) -> None:
        self.show_view("predictions")
        self.predictions.choose_file()

    def open_predictions(self, path: str) -> None:
        self.show_view("predictions")
        self.message.hide()
        self.predictions.open_predictions(path)

    # ---- feeding the compare and training-run views -----------------------------------

    def _codecs(self) -> list:
        return [e.codec for e in self.workbench.entries.values() if e.codec is not None]

    def _feed_compare(self, *_args) -> None:
        codecs = self._codecs()
        key = (self.workbench.text_sha, tuple((c.name, c.sha256, c.path) for c in codecs))
        if key != self._compare_key:
            self._compare_key = key
            self.compare.set_inputs(codecs, self.workbench.text, self.workbench.text_source)

    def _entry_changed(self, _path: str) -> None:
        self._feed_compare()
        self._attach_pending()

    def _text_changed(self) -> None:
        self.trend.set_text(self.workbench.text, self.workbench.text_source)
        self._feed_compare()

    def _attach_pending(self) -> None:
        """Give saved sweeps (from a workspace) to their checkpoints once those are open."""
        pending, self._pending_sweeps = self._pending_sweeps, []
        # attaching emits entry_changed, which comes back here: only what is still unattached is retried
        self._pending_sweeps = [r for r in pending if self.workbench.attach_sweep(r) is None] + self._pending_sweeps

    # ---- reports, workspaces and saved results ------------------------------------------

    def shown_sweeps(self) -> list[SweepResult]:
        """Every sweep held (the checkpoints' and a saved one on show), the current first."""
        entry = self.workbench.entry()
        sweeps = [entry.sweep] if entry is not None and entry.sweep is not None else []
        sweeps += [e.sweep for e in self.workbench.entries.values() if e.sweep is not None and e.sweep not in sweeps]
        if self.sweep.result is not None and self.sweep.result not in sweeps:
            sweeps.insert(0, self.sweep.result)
        return sweeps

    def report_inputs(self) -> dict:
        sweeps = self.shown_sweeps()
        if sweeps:  # a report plots sweeps of one noise model together
            sweeps = [r for r in sweeps if r.settings.noise == sweeps[0].settings.noise]
        trend_noise = (self.trend.settings_used.noise if self.trend.settings_used is not None
                       else self.trend.settings_dict()["noise"])
        return {"sweeps": sweeps, "comparison": self.compare.comparison, "trend_points": list(self.trend.points),
                "trend_noise": trend_noise}

    def save_report(self, path: str | Path | None = None, force: bool = False) -> Path | None:
        """Write the HTML report (asking where when `path` is None); None if not written."""
        try:
            if path is None:
                written = report_actions.ask_save_report(self, **self.report_inputs())
            else:
                written = report_actions.save_report(path, force=force, **self.report_inputs())
        except (ChunkscopeError, OSError) as exc:
            self.show_error(error_text(exc, path or "the report", "saved"))
            return None
        if written is not None:
            self.statusBar().showMessage(f"report saved to {written}", 8000)
        return written

    def save_report_dialog(self) -> None:
        self.save_report()

    def make_workspace(self):
        sweeps: dict[str, SweepResult] = {}
        for path, entry in self.workbench.entries.items():
            if entry.sweep is not None:
                sweeps[path] = entry.sweep
        if self.sweep.result is not None and self.sweep.result not in sweeps.values():
            sweeps[f"saved {self.sweep.result.codec_name}"] = self.sweep.result
        settings = {"sweep": self.sweep.settings_dict(), "live": self.live.settings_dict(),
                    "compare": self.compare.settings_dict(), "trend": self.trend.settings_dict(),
                    "current": self.workbench.current, "view": self.current_view(),
                    "shown_sweep": next((k for k, v in sweeps.items() if v is self.sweep.result), ""),
                    "trend_adapter": self.trend.adapter}
        return report_actions.make_workspace(
            codecs=self._codecs(), text=self.workbench.text, text_source=self.workbench.text_source, settings=settings,
            sweeps=sweeps, comparison=self.compare.comparison, trend_points=self.trend.points,
            trend_folder=self.trend.folder)

    def save_workspace(self, path: str | Path | None = None, force: bool = False) -> Path | None:
        try:
            workspace = self.make_workspace()
            if path is None:
                written = report_actions.ask_save_workspace(self, workspace)
            else:
                written = report_actions.save_workspace_file(workspace, path, force=force)
        except (ChunkscopeError, OSError) as exc:
            self.show_error(error_text(exc, path or "the workspace", "saved"))
            return None
        if written is not None:
            self.statusBar().showMessage(f"workspace saved to {written}", 8000)
        return written

    def save_workspace_dialog(self) -> None:
        self.save_workspace()

    def open_workspace_dialog(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open workspace", str(self.settings.value("last_dir", "")),
                                              f"{report_actions.WORKSPACE_FILTER};;All files (*)")
        if path:
            self.open_workspace(path)

    def open_workspace(self, path: str | Path) -> bool:
        """Restore a saved workspace: its text, the checkpoints still there, and every saved
        result shown as saved (nothing is recomputed)."""
        try:
            workspace, problems = report_actions.open_workspace_file(path)
        except (ChunkscopeError, OSError) as exc:
            self.show_error(error_text(exc, path, "opened"))
            return False
        self.message.hide()
        settings = workspace.settings or {}
        for key, target in (("sweep", self.sweep), ("live", self.live), ("compare", self.compare), ("trend", self.trend)):
            if isinstance(settings.get(key), dict):
                target.restore(settings[key])
        if workspace.text and text_sha256(workspace.text) != self.workbench.text_sha:
            if not self.workbench.set_text(workspace.text, workspace.text_source or "workspace text"):
                return False
        self._pending_sweeps = list(workspace.sweeps.values())
        for checkpoint in workspace.checkpoints:
            if not Path(checkpoint["path"]).exists():
                continue
            if checkpoint.get("adapter"):  # asked again before its code runs, unless that exact file was allowed
                self.open_with_adapter(checkpoint["path"], checkpoint["adapter"], select=False)
            else:
                self.workbench.open_checkpoint(checkpoint["path"], select=False)
        self._attach_pending()
        current = str(settings.get("current", ""))
        if current in self.workbench.entries:
            self.workbench.select(current)
        shown = workspace.sweeps.get(str(settings.get("shown_sweep", ""))) or workspace.sweeps.get(current)
        if shown is None and workspace.sweeps:
            shown = next(iter(workspace.sweeps.values()))
        entry = self.workbench.entry()
        if shown is not None and (entry is None or entry.sweep is not shown):
            self.sweep.set_saved_result(shown)
        if workspace.comparison is not None:
            self.compare.set_comparison(workspace.comparison)
        if workspace.trend_points:
            self.trend.set_points(workspace.trend_points, workspace.trend_folder,
                                  adapter=str(settings.get("trend_adapter", "") or ""))
        view = str(settings.get("view", ""))
        if view in self.panels:
            self.show_view(view)
        if problems:
            self.show_error(" ".join(problems))
        self.statusBar().showMessage(f"workspace {Path(path).name} opened", 8000)
        return True

    def open_sweep_folder_dialog(self) -> None:
        folder = QFileDialog.getExistingDirectory(self, "Open a sweep folder (written by chunkscope sweep)",
                                                  str(self.settings.value("last_dir", "")))
        if folder:
            self.open_sweep_folder(folder)

    def open_sweep_folder(self, folder: str | Path) -> list[SweepResult]:
        """Show the sweep(s) in a folder written by `chunkscope sweep --out` (the folder of one
        checkpoint, or the --out folder holding one per checkpoint)."""
        folder = Path(folder)
        try:
            subfolders = [] if (folder / "sweep.json").is_file() or not folder.is_dir() else sorted(
                p for p in folder.iterdir() if (p / "sweep.json").is_file())
            results = [report_actions.open_sweep_folder(p) for p in (subfolders or [folder])]
        except (ChunkscopeError, OSError) as exc:
            self.show_error(error_text(exc, folder, "opened"))
            return []
        self.message.hide()
        attached = [self.workbench.attach_sweep(r) for r in results]
        first = results[0]
        if attached[0] is not None:
            self.workbench.select(attached[0])
            if self.sweep.result is not first:
                self.sweep.show_result(first)
        else:
            self.sweep.set_saved_result(first)
        self.show_view("sweep")
        loose = [r.codec_name for r, a in zip(results, attached) if a is None]
        if loose:
            self.statusBar().showMessage(
                f"{', '.join(loose)}: shown in the Sweep view only; open the same checkpoint on the same text to see "
                "its token failures and latent space.", 12000)
        else:
            self.statusBar().showMessage(f"opened {len(results)} saved sweep(s) from {folder.name}", 8000)
        return results

    # ---- views and messages --------------------------------------------------------------

    def show_view(self, name: str) -> None:
        if name not in self.panels:
            raise ValueError(f"unknown view {name!r}; choose one of {', '.join(VIEWS)}")
        self.tabs.setCurrentWidget(self.panels[name])

    def current_view(self) -> str:
        return VIEWS[self.tabs.currentIndex()]

    def show_error(self, message: str) -> None:
        self.message.show_message(message)
        self.statusBar().showMessage(message, 8000)

    def _show_in_live(self, sigma: float, noise: str, seed: int) -> None:
        self.live.seed.setValue(seed)
        self.live.draw = 0
        self.live.set_sigma(sigma, noise)
        self.show_view("live")
        self.statusBar().showMessage(f"live view at σ {sigma:.4g} ({noise} noise, the sweep's repeat 0)", 6000)

    def _sweep_ended(self, path: str, how: str) -> None:
        name = Path(path).stem
        if how == "done":
            self.statusBar().showMessage(f"sweep of {name} finished", 6000)
            self.settings.setValue("sweep", json.dumps(self.sweep.settings_dict()))
        elif how == "cancelled":
            self.statusBar().showMessage(f"sweep of {name} cancelled", 6000)
        elif not self.closing:
            self.show_error(how)

    # ---- persistence ---------------------------------------------------------------------

    def _restore(self) -> None:
        geometry = self.settings.value("geometry")
        if geometry is not None:
            self.restoreGeometry(geometry)
        splitter = self.settings.value("splitter")
        if splitter is not None:
            self.splitter.restoreState(splitter)
        view = str(self.settings.value("view", "live"))
        if view in self.panels:
            self.show_view(view)
        for key, target in (("sweep", self.sweep), ("live", self.live)):
            raw = self.settings.value(key)
            if raw:
                try:
                    target.restore(json.loads(str(raw)))
                except ValueError:
                    pass

    def save_state(self) -> None:
        self.settings.setValue("geometry", self.saveGeometry())
        self.settings.setValue("splitter", self.splitter.saveState())
        self.settings.setValue("view", self.current_view())
        self.settings.setValue("sweep", json.dumps(self.sweep.settings_dict()))
        self.settings.setValue("live", json.dumps(self.live.settings_dict()))
        self.settings.sync()

    def eventFilter(self, watched, event) -> bool:  # noqa: N802
        if watched is self and event.type() == QEvent.Type.Paint:
            QTimer.singleShot(0, self._start_queued_work)  # runs once this paint pass has finished
        elif watched is self and event.type() == QEvent.Type.Show:
            QTimer.singleShot(START_AFTER_SHOW_MS, self._start_queued_work)  # in case no paint comes
        return False

    def _start_queued_work(self) -> None:
        self.removeEventFilter(self)
        self.runner.release()

    def closeEvent(self, event: QCloseEvent) -> None:  # noqa: N802
        self.closing = True
        self.save_state()
        self.runner.shutdown(timeout_ms=10_000)
        event.accept()

    def shutdown_later(self) -> None:
        QTimer.singleShot(0, self.close)
