"""Where heavy work runs: this process, a local Dask cluster of N processes, or a scheduler's address.

One setting for the sweep, compare and training-run views (Sweep menu → Run on…), kept in
QSettings. The views read it through their `where_of` hook when they start a task; the
work itself (core.engine.cluster) reports progress and stops on cancel as before."""

from __future__ import annotations

import importlib.util
import json

from PySide6.QtCore import QObject
from PySide6.QtGui import QAction
from PySide6.QtWidgets import (
    QButtonGroup, QDialog, QDialogButtonBox, QGridLayout, QLabel, QLineEdit, QRadioButton, QSpinBox, QVBoxLayout,
)

from core.engine.cluster import INSTALL_HINT, Where
from core.errors import ChunkscopeError

SETTING = "run_on"


def where_from_setting(raw) -> Where:
    try:
        data = json.loads(raw) if raw else {}
        return Where(workers=int(data.get("workers", 0)), address=str(data.get("address", ""))).validated()
    except (ValueError, TypeError, AttributeError, ChunkscopeError):
        return Where()  # a damaged or now-unusable setting (e.g. distributed uninstalled): run here


def has_distributed() -> bool:
    return importlib.util.find_spec("distributed") is not None


class RunOnDialog(QDialog):
    """Choose where heavy work runs; `where()` is the choice."""

    def __init__(self, current: Where, parent=None):
        super().__init__(parent)
        self.setWindowTitle("Run heavy work on")
        layout = QVBoxLayout(self)
        grid = QGridLayout()
        self.here = QRadioButton("This process")
        self.local = QRadioButton("A local Dask cluster of")
        self.remote = QRadioButton("The Dask scheduler at")
        self.group = QButtonGroup(self)
        for button in (self.here, self.local, self.remote):
            self.group.addButton(button)
        self.workers = QSpinBox()
        self.workers.setRange(1, 256)
        self.workers.setValue(current.workers or 2)
        self.workers.setSuffix(" processes")
        self.address = QLineEdit(current.address)
        self.address.setPlaceholderText("tcp://10.1.2.3:8786")
        self.address.setMinimumWidth(240)
        grid.addWidget(self.here, 0, 0)
        grid.addWidget(self.local, 1, 0)
        grid.addWidget(self.workers, 1, 1)
        grid.addWidget(self.remote, 2, 0)
        grid.addWidget(self.address, 2, 1)
        layout.addLayout(grid)
        note = QLabel(
            "Sweeps, comparisons and training runs are cut into shards. Each worker opens the checkpoints from "
            "their paths (a remote cluster must see the same paths) and checks each file's sha256; an adapter's "
            "code runs on every worker. Results are the same as in this process."
        )
        note.setWordWrap(True)
        layout.addWidget(note)
        self.problem = QLabel("")
        self.problem.setWordWrap(True)
        layout.addWidget(self.problem)
        if not has_distributed():
            for widget in (self.local, self.remote, self.workers, self.address):
                widget.setEnabled(False)
            self.problem.setText(f"Running on a cluster needs Dask's distributed package: {INSTALL_HINT}.")
        (self.remote if current.address else self.local if current.workers else self.here).setChecked(True)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        buttons.accepted.connect(self._accept)
        buttons.rejected.connect(self.reject)
        layout.addWidget(buttons)

    def where(self) -> Where:
        if self.local.isChecked():
            return Where(workers=self.workers.value()).validated()
        if self.remote.isChecked():
            if not self.address.text().strip():
                raise ChunkscopeError("give the scheduler's address, e.g. tcp://10.1.2.3:8786.")
            return Where(address=self.address.text()).validated()
        return Where()

    def _accept(self) -> None:
        try:
            self.where()
        except ChunkscopeError as exc:
            self.problem.setText(str(exc)[:1].upper() + str(exc)[1:])
            return
        self.accept()


class RunOn(QObject):
    """The window's "Run on" setting, hooked into the views that shard their work."""

    def __init__(self, window):
        super().__init__(window)
        self.window = window
        self.current = where_from_setting(window.settings.value(SETTING, ""))
        for view in (window.workbench, window.compare, window.trend):
            view.where_of = self.get
        menu = next((a.menu() for a in window.menuBar().actions() if a.menu() and a.text() == "&Sweep"), None)
        self.action = QAction("Run on…", window)
        self.action.triggered.connect(self.choose)
        if menu is not None:
            menu.addSeparator()
            menu.addAction(self.action)
        self._show()

    def get(self) -> Where:
        return self.current

    def set(self, where: Where) -> None:
        self.current = where
        self.window.settings.setValue(SETTING, json.dumps({"workers": where.workers, "address": where.address}))
        self._show()

    def _show(self) -> None:
        self.action.setToolTip(f"heavy work runs on {self.current.label()}")
        self.action.setText(f"Run on… ({self.current.label()})")

    def choose(self) -> None:
        dialog = RunOnDialog(self.current, self.window)
        if dialog.exec() == QDialog.DialogCode.Accepted:
            self.set(dialog.where())
