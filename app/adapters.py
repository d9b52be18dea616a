"""Opening through a user's Python adapter: the question before its code first runs, and the
dialog that picks a checkpoint (file or folder) and its adapter.

An adapter runs the user's code, so the workbench asks before the first use of each adapter
file, showing its path and sha256, and remembers a yes for that hash (a changed file has a
new hash and is asked about again). Nothing here runs the adapter; the window does, in a
worker, after `allowed` said yes.
"""

from __future__ import annotations

import json
from pathlib import Path

from PySide6.QtCore import QSettings, Qt
from PySide6.QtWidgets import (
    QDialog, QDialogButtonBox, QFileDialog, QGridLayout, QHBoxLayout, QLabel, QLineEdit, QPushButton, QVBoxLayout,
    QWidget,
)

from app.style import mono_font
from core.codecs.adapter import adapter_identity, parse_spec
from core.codecs.checkpoint import file_sha256

TRUSTED_KEY = "adapters/trusted"  # sha256 -> the path it was allowed at
RUNS_CODE = ("An adapter is a Python file of your own: opening a checkpoint with it runs the code in that file, "
             "with your permissions.")


def trusted(settings: QSettings) -> dict[str, str]:
    """The adapter hashes the user allowed, each with the path it was allowed at."""
    try:
        value = json.loads(str(settings.value(TRUSTED_KEY, "{}") or "{}"))
    except ValueError:
        return {}
    return {str(k): str(v) for k, v in value.items()} if isinstance(value, dict) else {}


def remember(settings: QSettings, sha256: str, path: str) -> None:
    table = trusted(settings)
    table[sha256] = path
    settings.setValue(TRUSTED_KEY, json.dumps(table))
    settings.sync()


class RunAdapterQuestion(QDialog):
    """"This runs the Python code in FILE": its full path and sha256, yes or no."""

    def __init__(self, path: str, sha256: str, parent: QWidget | None = None):
        super().__init__(parent)
        self.setWindowTitle("Run this adapter's code?")
        self.setMinimumWidth(640)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(20, 18, 20, 14)
        layout.setSpacing(10)
        head = QLabel("Opening this checkpoint runs the Python code in this file:")
        head.setObjectName("title")
        head.setWordWrap(True)
        layout.addWidget(head)
        grid = QGridLayout()
        grid.setHorizontalSpacing(12)
        grid.setVerticalSpacing(6)
        for row, (key, value) in enumerate((("file", path), ("sha256", sha256))):
            caption = QLabel(key)
            caption.setObjectName("caption")
            shown = QLabel(value)
            shown.setFont(mono_font(9.5))
            shown.setWordWrap(True)
            shown.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
            grid.addWidget(caption, row, 0, Qt.AlignmentFlag.AlignTop)
            grid.addWidget(shown, row, 1)
        grid.setColumnStretch(1, 1)
        layout.addLayout(grid)
        layout.addSpacing(4)
        note = QLabel("The code runs with your permissions and can do anything you can. Run it only if you wrote it "
                      "or trust where it came from. Your answer is remembered for this exact file: if it changes, "
                      "you are asked again.")
        note.setWordWrap(True)
        layout.addWidget(note)
        buttons = QDialogButtonBox()
        self.run_button = buttons.addButton("Run this adapter", QDialogButtonBox.ButtonRole.AcceptRole)
        cancel = buttons.addButton(QDialogButtonBox.StandardButton.Cancel)
        cancel.setDefault(True)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        layout.addWidget(buttons)


def ask_to_run(parent: QWidget | None, path: str, sha256: str) -> bool:
    """The question itself (tests replace this function)."""
    return RunAdapterQuestion(path, sha256, parent).exec() == QDialog.DialogCode.Accepted


def allowed(parent: QWidget | None, settings: QSettings, adapter: str) -> str:
    """The adapter file's sha256 if the user allows its code to run (asked unless that hash was
    allowed before); "" if not. A missing or unusable file raises core's AdapterError."""
    path, sha = adapter_identity(adapter)
    if not sha:  # an installed entry point: named by the user, no file to hash
        sha = "entry point " + path
    if sha in trusted(settings):
        return sha
    if not ask_to_run(parent, path, sha):
        return ""
    remember(settings, sha, path)
    return sha


def changed_since(adapter: str, sha256: str) -> bool:
    """Whether the adapter file no longer has the sha256 the user allowed (checked in the worker,
    just before its code runs)."""
    spec = parse_spec(adapter)
    return bool(sha256 and spec.file is not None and spec.file.is_file() and file_sha256(spec.file) != sha256)


ENTRY_POINT_LABEL = "entry point "  # how core's CodecSource names an installed adapter


def adapter_file(adapter: str) -> str:
    """What to open with: the adapter file's absolute path (and :FUNC), or an entry point's name;
    also for what a workspace recorded (core writes an entry point as "entry point NAME")."""
    adapter = str(adapter)
    if adapter.startswith(ENTRY_POINT_LABEL):
        adapter = adapter[len(ENTRY_POINT_LABEL):]
    spec = parse_spec(adapter)
    if spec.entry_point:
        return spec.entry_point
    return str(spec.file) + (f":{spec.function}" if spec.function != "load" else "")


class OpenWithAdapterDialog(QDialog):
    """Pick a checkpoint (a file or a folder) and the adapter .py that opens it."""

    def __init__(self, parent: QWidget | None = None, start_dir: str = "", adapter: str = "",
                 title: str = "Open a checkpoint with an adapter", what: str = "checkpoint", folder_only: bool = False):
        super().__init__(parent)
        self.setWindowTitle(title)
        self.setMinimumWidth(680)
        self.start_dir = start_dir
        layout = QVBoxLayout(self)
        layout.setContentsMargins(20, 18, 20, 14)
        layout.setSpacing(12)
        intro = QLabel("Your own model, opened by your own code: the adapter's load(path) builds the codec from "
                       f"the {what}.")
        intro.setWordWrap(True)
        layout.addWidget(intro)
        grid = QGridLayout()
        grid.setHorizontalSpacing(10)
        grid.setVerticalSpacing(8)
        self.checkpoint = QLineEdit()
        self.checkpoint.setPlaceholderText("a folder of checkpoints from one run" if folder_only
                                           else "a .pt file, a safetensors file, a folder…")
        self.adapter = QLineEdit(adapter)
        self.adapter.setPlaceholderText("my_codec.py  (or my_codec.py:FUNC)")
        buttons_row = QHBoxLayout()
        buttons_row.setSpacing(6)
        if not folder_only:
            file_button = QPushButton("File…")
            file_button.clicked.connect(self._pick_checkpoint_file)
            buttons_row.addWidget(file_button)
        folder_button = QPushButton("Folder…")
        folder_button.clicked.connect(self._pick_checkpoint_folder)
        buttons_row.addWidget(folder_button)
        adapter_button = QPushButton("Choose…")
        adapter_button.clicked.connect(self._pick_adapter)
        for row, (label, field, right) in enumerate(((what, self.checkpoint, buttons_row), ("adapter", self.adapter, None))):
            caption = QLabel(label)
            caption.setObjectName("caption")
            grid.addWidget(caption, row, 0)
            grid.addWidget(field, row, 1)
            if isinstance(right, QHBoxLayout):
                grid.addLayout(right, row, 2)
        grid.addWidget(adapter_button, 1, 2, Qt.AlignmentFlag.AlignLeft)
        grid.setColumnStretch(1, 1)
        layout.addLayout(grid)
        warning = QLabel(RUNS_CODE + " You are asked before a file's code first runs.")
        warning.setObjectName("caption")
        warning.setWordWrap(True)
        layout.addWidget(warning)
        box = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        self.ok = box.button(QDialogButtonBox.StandardButton.Ok)
        self.ok.setText("Open")
        box.accepted.connect(self.accept)
        box.rejected.connect(self.reject)
        layout.addWidget(box)
        self.checkpoint.textChanged.connect(self._sync)
        self.adapter.textChanged.connect(self._sync)
        self._sync()

    def _sync(self) -> None:
        self.ok.setEnabled(bool(self.checkpoint.text().strip() and self.adapter.text().strip()))

    def _pick_checkpoint_file(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Choose the checkpoint", self.start_dir, "All files (*)")
        if path:
            self.checkpoint.setText(path)

    def _pick_checkpoint_folder(self) -> None:
        path = QFileDialog.getExistingDirectory(self, "Choose the checkpoint folder", self.start_dir)
        if path:
            self.checkpoint.setText(path)

    def _pick_adapter(self) -> None:
        start = str(Path(self.adapter.text()).parent) if self.adapter.text().strip() else self.start_dir
        path, _ = QFileDialog.getOpenFileName(self, "Choose the adapter (Python code that runs)", start,
                                              "Python adapter (*.py);;All files (*)")
        if path:
            self.adapter.setText(path)

    def values(self) -> tuple[str, str]:
        return self.checkpoint.text().strip(), self.adapter.text().strip()


def choose_with_adapter(parent: QWidget | None, start_dir: str = "", adapter: str = "", folder_only: bool = False) -> tuple[str, str] | None:
    """(checkpoint, adapter) the user picked, or None (tests replace this function)."""
    kwargs = {"title": "Open a training run with an adapter", "what": "run folder", "folder_only": True} if folder_only else {}
    dialog = OpenWithAdapterDialog(parent, start_dir, adapter, **kwargs)
    if dialog.exec() != QDialog.DialogCode.Accepted:
        return None
    return dialog.values()
