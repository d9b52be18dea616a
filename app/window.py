"""The main window: checkpoints on the left, four views on the right, messages on top."""

from __future__ import annotations

import json
from pathlib import Path

from PySide6.QtCore import QSettings, Qt, QTimer
from PySide6.QtGui import QAction, QCloseEvent, QDragEnterEvent, QDropEvent, QKeySequence
from PySide6.QtWidgets import (
    QDialog, QDialogButtonBox, QFileDialog, QFrame, QHBoxLayout, QLabel, QLineEdit, QMainWindow, QPlainTextEdit,
    QPushButton, QSplitter, QTabWidget, QVBoxLayout, QWidget,
)

from app.panel_latent import LatentPanel
from app.panel_live import LivePanel
from app.panel_models import ModelsPanel
from app.panel_sweep import SweepPanel
from app.panel_tokens import TokensPanel
from app.state import Workbench, default_text_path, sample_paths
from app.style import mono_font
from app.workers import Runner

VIEWS = ("live", "sweep", "tokens", "latent")
VIEW_TITLES = {"live": "Perturb live", "sweep": "Sweep", "tokens": "Token failures", "latent": "Latent space"}
MAX_RECENT = 10
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
        self.workbench = Workbench(self.runner, self)
        self.workbench.error.connect(self.show_error)
        self.closing = False

        self.models = ModelsPanel(self.workbench)
        self.models.open_requested.connect(self.open_checkpoint_dialog)
        self.live = LivePanel(self.workbench)
        self.sweep = SweepPanel(self.workbench)
        self.tokens = TokensPanel(self.workbench)
        self.latent = LatentPanel(self.workbench)
        self.sweep.sigma_picked.connect(self._show_in_live)
        self.live.result_ready.connect(lambda r: self.sweep.show_live_sigma(r.sigma, r.noise))
        self.workbench.sweep_ended.connect(self._sweep_ended)

        self.tabs = QTabWidget()
        self.tabs.setDocumentMode(True)
        self.panels = {"live": self.live, "sweep": self.sweep, "tokens": self.tokens, "latent": self.latent}
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
        left.setMinimumWidth(270)
        left.setMaximumWidth(520)

        self.splitter = QSplitter(Qt.Orientation.Horizontal)
        self.splitter.addWidget(left)
        self.splitter.addWidget(right)
        self.splitter.setStretchFactor(0, 0)
        self.splitter.setStretchFactor(1, 1)
        self.splitter.setSizes([300, 1200])
        self.splitter.setChildrenCollapsible(False)
        self.setCentralWidget(self.splitter)
        self._build_menus()
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
        self.message.hide()
        self.workbench.open_checkpoint(path)
        self._remember(str(Path(path).resolve()))

    def open_checkpoint_dialog(self) -> None:
        paths, _ = QFileDialog.getOpenFileNames(self, "Open checkpoints", str(self.settings.value("last_dir", "")),
                                                "Checkpoints (*.safetensors);;All files (*)")
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
            if Path(path).suffix.lower() in TEXT_SUFFIXES:
                self.workbench.open_text_file(path)
            else:
                self.open_checkpoint(path)
        event.acceptProposedAction()

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

    def closeEvent(self, event: QCloseEvent) -> None:  # noqa: N802
        self.closing = True
        self.save_state()
        self.runner.shutdown(timeout_ms=10_000)
        event.accept()

    def shutdown_later(self) -> None:
        QTimer.singleShot(0, self.close)
