"""Compare checkpoints: accuracy curves overlaid, the paired difference with its McNemar
tests, tolerances side by side, and the text at one sigma marked where they disagree.

Everything shown comes from `core.analyses.compare` (and `core.analyses.compare_view` for the
text); this panel holds the choice of checkpoints and settings, runs the comparison in a
worker, and lays out the plots (app.panel_compare_plots), the table (app.panel_compare_table)
and the text view (app.panel_compare_text)."""

from __future__ import annotations

from typing import Sequence

import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QColor, QIcon, QPixmap
from PySide6.QtWidgets import (
    QAbstractItemView, QCheckBox, QComboBox, QFrame, QHBoxLayout, QLabel, QListWidget, QListWidgetItem, QSplitter,
    QWidget,
)

from app.controls import GridControls, caption, card, page_layout, run_controls
from app.panel_compare_plots import ComparePlots
from app.panel_compare_table import ToleranceTable
from app.panel_compare_text import CompareTextView
from app.style import PALETTE, codec_colour
from app.workers import LatestTask, Runner, Task
from core.codecs.contract import opened
from core.analyses.compare import COMPARISON_NOISES, Comparison, compare_codecs
from core.analyses.compare_view import SideBySide
from core.engine.cluster import Where
from core.errors import SettingsError
from core.outputs.report import provenance_caption
from core.engine.noise import NOISE_MODELS
from core.engine.sweep import DEFAULT_NOISE, DEFAULT_REPEATS, DEFAULT_SEED
from core.engine.text import text_sha256

DEFAULTS = {"start": 0.01, "stop": 2.0, "points": 16, "spacing": "log", "zero": True, "repeats": DEFAULT_REPEATS,
            "seed": DEFAULT_SEED, "main_noise": DEFAULT_NOISE}


def _swatch(colour: str, size: int = 10) -> QIcon:
    pixmap = QPixmap(size, size)
    pixmap.fill(QColor(colour))
    return QIcon(pixmap)


def _compare(task: Task, codecs: list, text: str, sigmas: tuple[float, ...], repeats: int, seed: int, main_noise: str,
             source: str, where: Where = Where()) -> Comparison:
    return compare_codecs(
        codecs, text, sigmas=sigmas, repeats=repeats, seed=seed, main_noise=main_noise, text_source=source,
        progress=task.report, should_stop=task.should_stop, where=where,
        on_sweep=lambda noise, result: task.partial.emit(f"{result.codec_name} swept under {noise} noise"),
    )


class ComparePanel(QWidget):
    """Compare two or more loaded checkpoints on the current text.

    The window feeds it with `set_inputs(codecs, text, text_source)` whenever what is loaded
    changes, and shows `error` messages verbatim. `set_comparison` shows a saved result."""

    where_of = Where  # where the sweeps run: app/run_on.py points this at the window's setting

    error = Signal(str)
    comparison_ready = Signal(object)  # the Comparison just computed
    running_changed = Signal(bool)
    text_view_ready = Signal()  # the side-by-side text was redrawn

    def __init__(self, runner: Runner | None = None, parent: QWidget | None = None):
        super().__init__(parent)
        self.setObjectName("page")
        self.runner = runner or Runner(self)
        self.codecs: list = []
        self.text = ""
        self.text_source = ""
        self.comparison: Comparison | None = None
        self.runs = LatestTask(self.runner, self)
        self._build()
        self.restore(DEFAULTS)
        self._sync_controls()
        self.show_comparison(None)

    # ---- layout --------------------------------------------------------------------------

    def _build(self) -> None:
        outer = page_layout(self, 8)

        controls, cv = card(spacing=6)
        pick = QHBoxLayout()
        pick.setSpacing(8)
        pick.addWidget(caption("compare"))
        self.picker = QListWidget()
        self.picker.setFlow(QListWidget.Flow.LeftToRight)
        self.picker.setWrapping(True)
        self.picker.setSelectionMode(QAbstractItemView.SelectionMode.NoSelection)
        self.picker.setFixedHeight(30)
        self.picker.setSpacing(2)
        self.picker.setToolTip("tick the checkpoints to compare; each is paired with the reference A")
        self.picker.itemChanged.connect(lambda _item: self._sync_controls())
        pick.addWidget(self.picker, 1)
        pick.addWidget(caption("against A ="))
        self.reference = QComboBox()
        self.reference.setMinimumWidth(160)
        self.reference.setToolTip("the reference checkpoint: differences are each other checkpoint minus this one")
        self.reference.currentIndexChanged.connect(lambda _i: self._sync_controls())
        self.reference_picked = False  # until the user picks A, A is the first checkpoint opened
        self.reference.activated.connect(lambda _i: setattr(self, "reference_picked", True))
        pick.addWidget(self.reference)
        cv.addLayout(pick)

        self.grid_controls = GridControls(
            DEFAULTS, noise_key="main_noise", noise_label="main noise", noise_choices=COMPARISON_NOISES,
            noise_tip="the noise model of the curves, the paired tests and the text view; "
                      "tolerances are shown under both",
            sigma_label=f"{NOISE_MODELS['data-scale'].unit} from", order=("repeats", "seed", "noise"))
        g = self.grid_controls
        self.start, self.stop, self.points, self.spacing, self.zero = g.start, g.stop, g.points, g.spacing, g.zero
        self.repeats, self.seed, self.main_noise = g.repeats, g.seed, g.noise
        row = g.layout()  # one row; the run controls follow the grid's
        row.addSpacing(10)
        self.run_button, self.cancel_button, self.progress = run_controls("Compare", self.run, self.cancel)
        row.addWidget(self.run_button)
        row.addWidget(self.cancel_button)
        row.addWidget(self.progress, 1)
        self.log_box = QCheckBox("log σ axis")
        self.log_box.setChecked(True)
        self.log_box.toggled.connect(lambda on: self.plot_pair.set_log_x(on))
        row.addWidget(self.log_box)
        cv.addWidget(g)
        outer.addWidget(controls)

        self.warning = QFrame()
        self.warning.setObjectName("messageBar")
        wl = QHBoxLayout(self.warning)
        wl.setContentsMargins(12, 6, 12, 6)
        icon = QLabel("⚠")
        icon.setStyleSheet(f"color: {PALETTE.accent}; font-size: 13pt; font-weight: 700;")
        wl.addWidget(icon)
        self.warning_label = QLabel("")
        self.warning_label.setWordWrap(True)
        self.warning_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.warning_label.setStyleSheet(f"color: {PALETTE.accent_ink}; font-weight: 600;")
        wl.addWidget(self.warning_label, 1)
        self.warning.setStyleSheet(f"QFrame#messageBar {{ background: {PALETTE.accent_soft}; border: 1px solid {PALETTE.accent};"
                                   " border-radius: 5px; }")
        self.warning.hide()
        outer.addWidget(self.warning)

        self.status = caption("")
        self.status.setWordWrap(True)
        outer.addWidget(self.status)

        top = QWidget()
        tl = QHBoxLayout(top)
        tl.setContentsMargins(0, 0, 0, 0)
        tl.setSpacing(10)
        self.plot_pair = ComparePlots(self.caption, lambda index: self.sigma_box.setCurrentIndex(index))
        self.accuracy_plot, self.difference_plot = self.plot_pair.widgets()
        tl.addWidget(self.accuracy_plot, 5)
        tl.addWidget(self.difference_plot, 5)
        self.tolerance_table = ToleranceTable()
        self.table = self.tolerance_table.table
        self.table_note = self.tolerance_table.note
        tl.addWidget(self.tolerance_table, 5)

        self.text_view = CompareTextView(self.runner)
        self.text_view.error.connect(self.error)
        self.text_view.ready.connect(self.text_view_ready)
        self.text_view.sigma_changed.connect(self.plot_pair.move_selected)
        tv = self.text_view
        self.sigma_box, self.pair_box, self.texts = tv.sigma_box, tv.pair_box, tv.texts
        self.legend_a, self.legend_b, self.legend_both = tv.legend_a, tv.legend_b, tv.legend_both

        split = QSplitter(Qt.Orientation.Vertical)
        split.setChildrenCollapsible(False)
        split.addWidget(top)
        split.addWidget(self.text_view)
        split.setStretchFactor(0, 5)
        split.setStretchFactor(1, 4)
        split.setSizes([470, 290])
        outer.addWidget(split, 1)
        self.plot_pair.add_selected_lines()

    # ---- inputs and settings -------------------------------------------------------------

    def set_inputs(self, codecs: Sequence, text: str, text_source: str = "") -> None:
        """The loaded checkpoints (Codec objects) and the evaluation text to compare them on."""
        ticked = {self._codec_key(c) for c in self.selected_codecs()} if self.codecs else None
        known = {self._codec_key(c) for c in self.codecs}  # a newly loaded checkpoint arrives ticked
        reference = self.reference.currentText()
        self.codecs = [opened(c) for c in codecs]
        self.text, self.text_source = text, text_source
        self.picker.blockSignals(True)
        self.reference.blockSignals(True)
        self.picker.clear()
        self.reference.clear()
        for i, codec in enumerate(self.codecs):
            item = QListWidgetItem(_swatch(codec_colour(i)), f"{codec.name}  ·  {codec.sha256[:8]}")
            item.setFlags(Qt.ItemFlag.ItemIsEnabled | Qt.ItemFlag.ItemIsUserCheckable)
            on = ticked is None or self._codec_key(codec) in ticked or self._codec_key(codec) not in known
            item.setCheckState(Qt.CheckState.Checked if on else Qt.CheckState.Unchecked)
            item.setToolTip(codec.path or codec.name)
            self.picker.addItem(item)
            self.reference.addItem(codec.name)
        # the first checkpoint in the order they were opened, not the first to finish loading,
        # unless the user chose another
        at = self.reference.findText(reference) if self.reference_picked else -1
        self.reference.setCurrentIndex(at if at >= 0 else 0)
        self.picker.blockSignals(False)
        self.reference.blockSignals(False)
        self._sync_controls()

    @staticmethod
    def _codec_key(codec) -> tuple:
        return (codec.name, codec.sha256, codec.path)

    def selected_codecs(self) -> list:
        """The codecs to compare, the reference A first."""
        ticked = [c for i, c in enumerate(self.codecs) if self.picker.item(i) is not None
                  and self.picker.item(i).checkState() == Qt.CheckState.Checked]
        ref = self.reference.currentIndex()
        if 0 <= ref < len(self.codecs):
            a = self.codecs[ref]
            return [a] + [c for c in ticked if c is not a]
        return ticked

    def settings_dict(self) -> dict:
        return self.grid_controls.settings_dict()

    def restore(self, values: dict) -> None:
        self.grid_controls.restore(values)

    def sigmas(self) -> tuple[float, ...]:
        return self.grid_controls.sigmas()

    def _inputs_key(self, codecs: Sequence) -> tuple:
        return (text_sha256(self.text) if self.text else "", tuple(self._codec_key(c) for c in codecs))

    # ---- running -------------------------------------------------------------------------

    def is_running(self) -> bool:
        return self.runs.running()

    def run(self) -> bool:
        """Start a comparison of the ticked checkpoints; a running one is superseded."""
        codecs = self.selected_codecs()
        if len(codecs) < 2:
            self.error.emit("tick at least two checkpoints to compare.")
            return False
        if not self.text:
            self.error.emit("there is no evaluation text to compare on yet.")
            return False
        try:
            sigmas = self.sigmas()
        except SettingsError as exc:
            self.error.emit(str(exc))
            return False
        key = self._inputs_key(codecs)
        s = self.settings_dict()
        task = Task("the comparison", _compare, codecs, self.text, sigmas, s["repeats"], s["seed"], s["main_noise"],
                    self.text_source, self.where_of())
        self.runs.start(task, progress=self._progress, partial=self._partial,
                        finished=lambda result, k=key: self._finished(k, result), failed=self._failed,
                        cancelled=self._cancelled)
        self.progress.setValue(0)
        self.status.setText(f"comparing {len(codecs)} checkpoints on {len(sigmas)} σ × {s['repeats']} repeats, "
                            "under data-scale and isotropic noise…")
        self._sync_controls()
        self.running_changed.emit(True)
        return True

    def cancel(self) -> None:
        self.runs.cancel()

    def _progress(self, done: int, total: int) -> None:
        self.progress.setMaximum(max(total, 1))
        self.progress.setValue(min(done, max(total, 1)))

    def _partial(self, message: str) -> None:
        self.status.setText(f"comparing… {message}")

    def _over(self) -> None:
        self._sync_controls()
        self.running_changed.emit(False)

    def _finished(self, key: tuple, comparison: Comparison) -> None:
        self._over()
        self.progress.setValue(self.progress.maximum())
        if key[0] != (text_sha256(self.text) if self.text else ""):
            self.status.setText("the text changed while comparing, so that result was dropped; compare again.")
            return
        self.show_comparison(comparison)
        self.comparison_ready.emit(comparison)

    def _failed(self, message: str) -> None:
        self._over()
        self.progress.setValue(0)
        self.status.setText("the comparison stopped with an error.")
        self.error.emit(message)

    def _cancelled(self) -> None:
        self._over()
        self.progress.setValue(0)
        self.status.setText("comparison cancelled; nothing was kept." +
                            (" Showing the previous comparison." if self.comparison is not None else ""))

    def _sync_controls(self) -> None:
        n = len(self.selected_codecs())
        self.run_button.setEnabled(n >= 2 and bool(self.text))
        self.run_button.setToolTip("" if n >= 2 else "tick at least two checkpoints")
        self.cancel_button.setEnabled(self.runs.running())

    # ---- showing a result ----------------------------------------------------------------

    def set_comparison(self, comparison: Comparison | None) -> None:
        """Show a ready-made comparison (a reopened workspace), without recomputing."""
        if self.runs.drop():
            self._over()
        self.show_comparison(comparison)

    def show_comparison(self, comparison: Comparison | None) -> None:
        self.comparison = comparison
        self.plot_pair.draw(comparison)
        self.tolerance_table.fill(comparison)
        self.text_view.show_comparison(comparison)
        if comparison is None:
            self.warning.hide()
            self.status.setText("Tick two or more checkpoints and press Compare: each is swept on the same text and "
                                "noise draws, and every other checkpoint is paired with A." if self.codecs else
                                "Open two or more checkpoints to compare them.")
            return
        self.warning_label.setText(comparison.scale_warning or "")
        self.warning.setVisible(bool(comparison.scale_warning))
        s = comparison.settings
        main = comparison.main_sweeps()
        self.status.setText(
            f"A = {comparison.names[0]} · main noise {comparison.main_noise} · {len(main[0].sigmas)} σ × {s['repeats']} "
            f"repeats · seed {s['seed']} · text {s['text_sha256'][:10]}"
            + (f" ({s['text_source']})" if s.get("text_source") else "")
            + f" · {main[0].chunks.num_tokens:,} tokens for A"
        )

    # ---- the side-by-side text -----------------------------------------------------------

    @property
    def table_rows(self) -> list[tuple[str, str, float] | None]:
        """(noise, kind, level) of each tolerance table row, None for the other rows."""
        return self.tolerance_table.rows

    @property
    def view(self) -> SideBySide | None:
        return self.text_view.view

    def set_sigma_index(self, index: int) -> None:
        self.sigma_box.setCurrentIndex(index)

    def set_pair_index(self, index: int) -> None:
        self.pair_box.setCurrentIndex(index)

    def text_view_busy(self) -> bool:
        return self.text_view.busy()

    def marked_counts(self) -> tuple[int, int]:
        """How many tokens the text view marks, in A's pane, as only-A-right and only-B-right."""
        return self.text_view.marked_counts()

    # ---- for export and reports ----------------------------------------------------------

    def caption(self) -> str:
        """Provenance of what is shown, for a saved plot."""
        if self.comparison is None:
            return ""
        c = self.comparison
        return provenance_caption(c.main_sweeps()) + f"; paired on repeat 0 per {c.paired[0].unit if c.paired else 'token'}"

    def plots(self) -> list[pg.PlotWidget]:
        return [self.accuracy_plot, self.difference_plot]
