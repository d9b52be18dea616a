"""Compare checkpoints: accuracy curves overlaid, the paired difference with its McNemar
tests, tolerances side by side, and the text at one sigma marked where they disagree.

Everything shown comes from `core.analyses.compare`; the panel only runs it in a worker and draws."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QColor, QIcon, QPixmap, QTextCharFormat
from PySide6.QtWidgets import (
    QAbstractItemView, QCheckBox, QComboBox, QFrame, QHBoxLayout, QHeaderView, QLabel, QListWidget, QListWidgetItem,
    QSplitter, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget,
)

from app.controls import GridControls, caption, card, page_layout, run_controls
from app.export import add_export_menu
from app.plotaxes import use_sigma_axis
from app.style import PALETTE, faded, fmt_percent, legend, pen, plot_widget
from app.tokentext import TokenText, char_format
from app.workers import Runner, Task
from core.codecs.contract import opened
from core.analyses.compare import ALPHA, COMPARISON_NOISES, SIGNIFICANT, Comparison, compare_codecs, unit_correctness
from core.errors import SettingsError
from core.outputs.report import provenance_caption
from core.engine.noise import NOISE_MODELS, sigma_unit
from core.engine.sweep import DEFAULT_NOISE, DEFAULT_REPEATS, DEFAULT_SEED, SweepResult
from core.engine.text import text_sha256
from core.engine.tolerance import ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, level_name, status_notes, tolerance_text

DEFAULTS = {"start": 0.01, "stop": 2.0, "points": 16, "spacing": "log", "zero": True, "repeats": DEFAULT_REPEATS,
            "seed": DEFAULT_SEED, "main_noise": DEFAULT_NOISE}
# one colour per checkpoint; the first two (blue, amber) stay apart under red-green colour blindness
CODEC_COLOURS = ("#2f6db5", "#c98a12", "#3b8f7c", "#8a5aa8", "#5d626a", "#b5527e")
ONLY_A, ONLY_B, BOTH = 1, 2, 3
WASH = {ONLY_A: "#d9e6f6", ONLY_B: "#f8e6bd", BOTH: "#ecebe6"}
UNIT_PLURAL = {"token": "tokens", "character": "characters"}


def codec_colour(index: int) -> str:
    return CODEC_COLOURS[index % len(CODEC_COLOURS)]




def _swatch(colour: str, size: int = 10) -> QIcon:
    pixmap = QPixmap(size, size)
    pixmap.fill(QColor(colour))
    return QIcon(pixmap)


def tolerance_label(t) -> str:
    """How a tolerance (a Tolerance or its JSON form) reads in a table cell."""
    return tolerance_text(t)


def mark_formats() -> dict[int, QTextCharFormat]:
    """Only-A-right: blue wash, solid underline; only-B-right: amber wash, wavy underline
    (colour and line shape both differ, so neither depends on seeing hue); both wrong: faint."""
    a = char_format(WASH[ONLY_A], PALETTE.ink, underline=codec_colour(0))
    b = char_format(WASH[ONLY_B], PALETTE.ink, underline=codec_colour(1))
    b.setUnderlineStyle(QTextCharFormat.UnderlineStyle.WaveUnderline)
    both = char_format(None, PALETTE.ink_faint)
    return {ONLY_A: a, ONLY_B: b, BOTH: both}


# ---- the side-by-side text, built in a worker ---------------------------------------------

@dataclass
class SidePane:
    text: str  # the text as this checkpoint decoded it (right tokens keep their characters)
    spans: np.ndarray  # [T, 2] each token's characters in `text`
    levels: np.ndarray  # [T] 0, ONLY_A, ONLY_B or BOTH
    correct: np.ndarray  # [T] bool, this checkpoint at this sigma (repeat 0)


@dataclass
class SideBySide:
    sigma_index: int
    pair_index: int
    unit: str
    a: SidePane
    b: SidePane


def _token_levels(unit_levels: np.ndarray, result: SweepResult, unit: str) -> np.ndarray:
    """Marks on one checkpoint's tokens: the unit's own mark, or for characters the strongest
    mark among the characters the token holds (only-A, then only-B, then both)."""
    if unit == "token":
        return unit_levels.astype(np.int8)
    spans = result.chunks.spans
    n = len(unit_levels)
    levels = np.zeros(len(spans), dtype=np.int8)
    starts, ends = spans[:, 0].astype(np.int64), spans[:, 1].astype(np.int64)
    empty = ends <= starts
    probe_start = np.where(empty, np.minimum(starts, max(n - 1, 0)), starts)
    probe_end = np.where(empty, np.minimum(starts, max(n - 1, 0)) + 1, ends)
    for mark in (BOTH, ONLY_B, ONLY_A):  # later marks win
        has = np.concatenate([[0], np.cumsum(unit_levels == mark)])
        hit = has[np.minimum(probe_end, n)] - has[np.minimum(probe_start, n)] > 0
        levels[hit] = mark
    return levels


def _pane(result: SweepResult, sigma_index: int, levels: np.ndarray) -> SidePane:
    correct = unit_correctness(result, sigma_index, "token")
    text, spans = result.chunks.text, result.chunks.spans
    decoded = result.decoded[:, sigma_index]
    pieces = [text[a:b] if ok else result.display(d) for (a, b), ok, d in zip(spans.tolist(), correct.tolist(), decoded.tolist())]
    lengths = np.fromiter((len(p) for p in pieces), dtype=np.int64, count=len(pieces))
    ends = np.cumsum(lengths)
    out_spans = np.stack([ends - lengths, ends], axis=1) if len(pieces) else np.zeros((0, 2), dtype=np.int64)
    return SidePane("".join(pieces), out_spans, levels, correct)


def side_by_side(task: Task | None, a: SweepResult, b: SweepResult, sigma_index: int, pair_index: int,
                 unit: str) -> SideBySide:
    ca, cb = unit_correctness(a, sigma_index, unit), unit_correctness(b, sigma_index, unit)
    unit_levels = np.zeros(len(ca), dtype=np.int8)
    unit_levels[ca & ~cb] = ONLY_A
    unit_levels[~ca & cb] = ONLY_B
    unit_levels[~ca & ~cb] = BOTH
    return SideBySide(sigma_index, pair_index, unit,
                      _pane(a, sigma_index, _token_levels(unit_levels, a, unit)),
                      _pane(b, sigma_index, _token_levels(unit_levels, b, unit)))


def _compare(task: Task, codecs: list, text: str, sigmas: tuple[float, ...], repeats: int, seed: int, main_noise: str,
             source: str) -> Comparison:
    return compare_codecs(
        codecs, text, sigmas=sigmas, repeats=repeats, seed=seed, main_noise=main_noise, text_source=source,
        progress=task.report, should_stop=task.should_stop,
        on_sweep=lambda noise, result: task.partial.emit(f"{result.codec_name} swept under {noise} noise"),
    )


# ---- the panel ----------------------------------------------------------------------------

class ComparePanel(QWidget):
    """Compare two or more loaded checkpoints on the current text.

    The window feeds it with `set_inputs(codecs, text, text_source)` whenever what is loaded
    changes, and shows `error` messages verbatim. `set_comparison` shows a saved result."""

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
        self.table_rows: list[tuple[str, str, float] | None] = []  # (noise, kind, level) per table row
        self.view: SideBySide | None = None
        self.log_x = True
        self._run_task: Task | None = None
        self._run_generation = 0
        self._run_key: tuple = ()
        self._view_task: Task | None = None
        self._view_generation = 0
        self._syncing_scroll = False
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
        self.log_box.toggled.connect(self._log_toggled)
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
        self.accuracy_plot = plot_widget("Token accuracy (Wilson 95 % band)", "σ", "token accuracy")
        self.difference_plot = plot_widget("Paired difference B − A", "σ", "B − A, percentage points")
        for plot in (self.accuracy_plot, self.difference_plot):
            use_sigma_axis(plot)
        self.difference_plot.getPlotItem().setXLink(self.accuracy_plot.getPlotItem())
        for plot, name in ((self.accuracy_plot, "compare-accuracy"), (self.difference_plot, "compare-difference")):
            plot.setObjectName("card")
            add_export_menu(plot, self.caption, name)
            plot.scene().sigMouseClicked.connect(lambda ev, p=plot: self._plot_clicked(p, ev))
        tl.addWidget(self.accuracy_plot, 5)
        tl.addWidget(self.difference_plot, 5)
        table_box = QVBoxLayout()
        table_box.setSpacing(4)
        table_box.addWidget(caption("Tolerances side by side", "title"))
        self.table = QTableWidget()
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.NoSelection)
        self.table.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        self.table.verticalHeader().setDefaultSectionSize(18)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        self.table.horizontalHeader().setTextElideMode(Qt.TextElideMode.ElideMiddle)
        self.table.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAsNeeded)
        self.table.setToolTip("σ at accuracy ≥ a level: the largest σ before token accuracy first drops below it; σ at "
                              "loss ≤ a level: the largest σ before it falls that many points below its σ = 0 value. Both "
                              "interpolated on the grid; absolute σ depends on the latent's scale, relative (data-scale) σ "
                              "does not")
        table_box.addWidget(self.table)
        self.table_note = caption("")
        self.table_note.setWordWrap(True)
        table_box.addWidget(self.table_note)
        table_box.addStretch(1)
        table_widget = QWidget()
        table_widget.setLayout(table_box)
        table_widget.setMinimumWidth(430)
        tl.addWidget(table_widget, 5)

        bottom, bl = card(margins=(12, 8), spacing=6)
        head = QHBoxLayout()
        head.setSpacing(8)
        head.addWidget(caption("Where they differ", "title"))
        head.addSpacing(6)
        head.addWidget(caption("at σ"))
        self.sigma_box = QComboBox()
        self.sigma_box.setMinimumWidth(90)
        self.sigma_box.currentIndexChanged.connect(lambda _i: self._request_view())
        head.addWidget(self.sigma_box)
        head.addWidget(caption("B ="))
        self.pair_box = QComboBox()
        self.pair_box.setMinimumWidth(150)
        self.pair_box.currentIndexChanged.connect(lambda _i: self._request_view())
        head.addWidget(self.pair_box)
        head.addStretch(1)
        self.legend_a = QLabel("")
        self.legend_b = QLabel("")
        self.legend_both = QLabel("")
        for label in (self.legend_a, self.legend_b, self.legend_both):
            label.setTextFormat(Qt.TextFormat.RichText)
            head.addWidget(label)
        bl.addLayout(head)
        self.view_note = caption("")
        bl.addWidget(self.view_note)
        panes = QSplitter(Qt.Orientation.Horizontal)
        panes.setChildrenCollapsible(False)
        self.pane_titles: list[QLabel] = []
        self.texts: list[TokenText] = []
        for side in range(2):
            box = QWidget()
            v = QVBoxLayout(box)
            v.setContentsMargins(0, 0, 0, 0)
            v.setSpacing(3)
            title = QLabel("")
            title.setTextFormat(Qt.TextFormat.RichText)
            v.addWidget(title)
            text = TokenText("Run a comparison to see the text each checkpoint decodes.")
            text.tooltip_for = lambda token, s=side: self._tooltip(s, token)
            v.addWidget(text, 1)
            panes.addWidget(box)
            self.pane_titles.append(title)
            self.texts.append(text)
        for side in range(2):
            self.texts[side].verticalScrollBar().valueChanged.connect(lambda _v, s=side: self._sync_scroll(s))
        bl.addWidget(panes, 1)

        split = QSplitter(Qt.Orientation.Vertical)
        split.setChildrenCollapsible(False)
        split.addWidget(top)
        split.addWidget(bottom)
        split.setStretchFactor(0, 5)
        split.setStretchFactor(1, 4)
        split.setSizes([470, 290])
        outer.addWidget(split, 1)

        self.selected_lines = []
        for plot in (self.accuracy_plot, self.difference_plot):
            line = pg.InfiniteLine(angle=90, movable=False, pen=pen(PALETTE.ink_soft, 1, Qt.PenStyle.DashLine))
            line.setVisible(False)
            plot.getPlotItem().addItem(line, ignoreBounds=True)
            self.selected_lines.append(line)

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
        return self._run_task is not None

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
        if self._run_task is not None:
            self._run_task.cancel()
        self._run_generation += 1
        gen = self._run_generation
        self._run_key = self._inputs_key(codecs)
        s = self.settings_dict()
        task = Task("the comparison", _compare, codecs, self.text, sigmas, s["repeats"], s["seed"], s["main_noise"],
                    self.text_source)
        task.progress.connect(lambda done, total, g=gen: self._progress(g, done, total))
        task.partial.connect(lambda message, g=gen: self._partial(g, message))
        task.finished.connect(lambda result, g=gen, key=self._run_key: self._finished(g, key, result))
        task.failed.connect(lambda message, g=gen: self._failed(g, message))
        task.cancelled.connect(lambda g=gen: self._cancelled(g))
        self._run_task = task
        self.progress.setValue(0)
        self.status.setText(f"comparing {len(codecs)} checkpoints on {len(sigmas)} σ × {s['repeats']} repeats, "
                            "under data-scale and isotropic noise…")
        self.runner.start(task)
        self._sync_controls()
        self.running_changed.emit(True)
        return True

    def cancel(self) -> None:
        if self._run_task is not None:
            self._run_task.cancel()

    def _current(self, gen: int) -> bool:
        return gen == self._run_generation

    def _progress(self, gen: int, done: int, total: int) -> None:
        if self._current(gen):
            self.progress.setMaximum(max(total, 1))
            self.progress.setValue(min(done, max(total, 1)))

    def _partial(self, gen: int, message: str) -> None:
        if self._current(gen):
            self.status.setText(f"comparing… {message}")

    def _over(self) -> None:
        self._run_task = None
        self._sync_controls()
        self.running_changed.emit(False)

    def _finished(self, gen: int, key: tuple, comparison: Comparison) -> None:
        if not self._current(gen):
            return  # a newer run superseded this one
        self._over()
        self.progress.setValue(self.progress.maximum())
        if key[0] != (text_sha256(self.text) if self.text else ""):
            self.status.setText("the text changed while comparing, so that result was dropped; compare again.")
            return
        self.show_comparison(comparison)
        self.comparison_ready.emit(comparison)

    def _failed(self, gen: int, message: str) -> None:
        if self._current(gen):
            self._over()
            self.progress.setValue(0)
            self.status.setText("the comparison stopped with an error.")
            self.error.emit(message)

    def _cancelled(self, gen: int) -> None:
        if self._current(gen):
            self._over()
            self.progress.setValue(0)
            self.status.setText("comparison cancelled; nothing was kept." +
                                (" Showing the previous comparison." if self.comparison is not None else ""))

    def _sync_controls(self) -> None:
        running = self._run_task is not None
        n = len(self.selected_codecs())
        self.run_button.setEnabled(n >= 2 and bool(self.text))
        self.run_button.setToolTip("" if n >= 2 else "tick at least two checkpoints")
        self.cancel_button.setEnabled(running)

    # ---- showing a result ----------------------------------------------------------------

    def set_comparison(self, comparison: Comparison | None) -> None:
        """Show a ready-made comparison (a reopened workspace), without recomputing."""
        if self._run_task is not None:
            self._run_task.cancel()
            self._run_generation += 1
            self._over()
        self.show_comparison(comparison)

    def show_comparison(self, comparison: Comparison | None) -> None:
        self.comparison = comparison
        self._draw_plots()
        self._fill_table()
        self._fill_view_controls()
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

    def _sigma_unit(self) -> str:
        return sigma_unit(self.comparison.main_noise if self.comparison is not None else DEFAULT_NOISE)

    def _draw_plots(self) -> None:
        p = PALETTE
        acc_item, diff_item = self.accuracy_plot.getPlotItem(), self.difference_plot.getPlotItem()
        for item, keep_line in ((acc_item, self.selected_lines[0]), (diff_item, self.selected_lines[1])):
            for child in list(item.items):
                if child is not keep_line:
                    item.removeItem(child)
            if item.legend is not None:
                item.legend.clear()
        c = self.comparison
        if c is None:
            for item in (acc_item, diff_item):
                item.setLogMode(x=False)
            return
        main = c.main_sweeps()
        log = self.log_x and any(s > 0 for s in main[0].sigmas)
        for item in (acc_item, diff_item):
            item.setLogMode(x=log)
            item.setLabel("bottom", f"{self._sigma_unit()} ({c.main_noise} noise)", color=p.ink_soft, **{"font-size": "8pt"})
        legend(acc_item, offset=(10, -10))
        for level in TOLERANCE_LEVELS:
            acc_item.addItem(pg.InfiniteLine(pos=level, angle=0, movable=False, pen=pen(p.ink_faint, 1, Qt.PenStyle.DotLine)),
                             ignoreBounds=True)
        for i, r in enumerate(main):
            sigmas = np.asarray(r.sigmas, dtype=np.float64)
            keep = sigmas > 0 if log else np.ones(len(sigmas), dtype=bool)
            x = sigmas[keep]
            acc = np.array([cv.token_accuracy for cv in r.curves])[keep]
            low = np.array([cv.accuracy_low for cv in r.curves])[keep]
            high = np.array([cv.accuracy_high for cv in r.curves])[keep]
            colour = codec_colour(i)
            lo_item = pg.PlotDataItem(x, low, pen=pen(faded(colour, 0), 0))
            hi_item = pg.PlotDataItem(x, high, pen=pen(faded(colour, 0), 0))
            acc_item.addItem(lo_item)
            acc_item.addItem(hi_item)
            acc_item.addItem(pg.FillBetweenItem(lo_item, hi_item, brush=faded(colour, 55)))
            role = "A" if i == 0 else ("B" if len(main) == 2 else f"B{i}")
            acc_item.addItem(pg.PlotDataItem(x, acc, pen=pen(colour, 2), symbol="o", symbolSize=4, symbolBrush=colour,
                                             symbolPen=None, name=f"{role}: {r.codec_name}"))
        acc_item.setYRange(0, 1.02, padding=0)

        if len(c.paired) > 1:
            legend(diff_item, offset=(-10, 10))
        diff_item.addItem(pg.InfiniteLine(pos=0, angle=0, movable=False, pen=pen(p.ink_faint, 1)), ignoreBounds=True)
        for j, pair in enumerate(c.paired):
            colour = codec_colour(j + 1)
            sigmas = np.array([row.sigma for row in pair.rows])
            keep = sigmas > 0 if log else np.ones(len(sigmas), dtype=bool)
            x = sigmas[keep]
            diff = np.array([row.difference * 100 for row in pair.rows])[keep]
            significant = np.array(pair.significant(ALPHA))[keep]
            diff_item.addItem(pg.PlotDataItem(x, diff, pen=pen(colour, 2), name=f"{pair.name_b} − {pair.name_a}"))
            if (~significant).any():
                diff_item.addItem(pg.PlotDataItem(x[~significant], diff[~significant], pen=None, symbol="o", symbolSize=6,
                                                  symbolBrush=p.surface, symbolPen=pen(colour, 1.2)))
            if significant.any():
                diff_item.addItem(pg.PlotDataItem(x[significant], diff[significant], pen=None, symbol="d", symbolSize=11,
                                                  symbolBrush=p.ink, symbolPen=pen(p.surface, 1)))
        unit = c.paired[0].unit if c.paired else "token"
        diff_item.setLabel("left", f"B − A, percentage points (per {unit})", color=p.ink_soft, **{"font-size": "8pt"})
        any_significant = any(any(pair.significant(ALPHA)) for pair in c.paired)
        diff_item.setTitle(
            f"<span style='color:{p.ink}; font-size:9pt; font-weight:600'>Paired difference B − A</span>"
            f"<span style='color:{p.ink_soft}; font-size:8pt'>&nbsp;&nbsp;&nbsp;◆ McNemar {SIGNIFICANT.replace('<', '&lt;')}"
            f"{'' if any_significant else ' (none on this grid)'}&nbsp;&nbsp;○ not significant</span>", justify="left")
        acc_item.enableAutoRange(x=True)
        diff_item.enableAutoRange(y=True)
        self._move_selected_line()

    def _fill_table(self) -> None:
        t = self.table
        t.clear()
        c = self.comparison
        self.table_rows = []
        if c is None:
            t.setRowCount(0)
            t.setColumnCount(0)
            t.setFixedHeight(60)
            self.table_note.setText("")
            return
        # rows: the facts, then per noise a heading row and its accuracy-level and loss tolerances
        kinds = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]
        labels = ["sha256", "latent RMS", "accuracy, σ = 0"]
        self.table_rows = [None, None, None]  # (noise, kind, level) of each tolerance row, None for the others
        for noise in COMPARISON_NOISES[::-1]:  # absolute σ first, the fair relative σ last and bold
            labels.append(f"{sigma_unit(noise)} ({noise})")
            self.table_rows.append(None)
            for kind, level in kinds:
                labels.append(level_name(level, kind))
                self.table_rows.append((noise, kind, level))
        t.setRowCount(len(labels))
        t.setColumnCount(len(c.tolerances))
        t.setVerticalHeaderLabels(labels)
        for i, key in enumerate(self.table_rows):
            if i >= 3 and key is None:  # a heading row: the noise, its σ unit, over a band of the header colour
                if len(c.tolerances) > 1:
                    t.setSpan(i, 0, 1, len(c.tolerances))
                band = QTableWidgetItem("")
                band.setBackground(QColor(PALETTE.sunken))
                t.setItem(i, 0, band)
        for j, row in enumerate(c.tolerances):
            role = "A" if j == 0 else ("B" if len(c.tolerances) == 2 else f"B{j}")
            header = QTableWidgetItem(f"{role}\n{row.name}")
            header.setToolTip(f"{row.name}\nsha256 {row.sha256}")
            t.setHorizontalHeaderItem(j, header)
            lists = {("isotropic", ABSOLUTE): row.absolute, ("isotropic", LOSS): row.absolute_loss,
                     ("data-scale", ABSOLUTE): row.data_scale, ("data-scale", LOSS): row.data_scale_loss}
            for i, key in enumerate(self.table_rows):
                if key is None:
                    if i >= 3:
                        continue
                    value = [row.sha256[:10], f"{row.latent_rms:.4g}", fmt_percent(row.accuracy_at_zero, 3)][i]
                else:
                    noise, kind, level = key
                    value = tolerance_label(next((x for x in lists[(noise, kind)] if abs(x.level - level) < 1e-12), None))
                item = QTableWidgetItem(value)
                item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                if key is not None and key[0] == "data-scale":
                    font = item.font()
                    font.setBold(True)
                    item.setFont(font)
                if key is not None and key[0] == "isotropic" and c.scale_warning:
                    item.setForeground(QColor(PALETTE.ink_faint))
                    item.setToolTip("absolute σ: not comparable across these checkpoints, their latent scales differ")
                t.setItem(i, j, item)
        height = t.horizontalHeader().sizeHint().height() + sum(t.rowHeight(i) for i in range(t.rowCount())) + 2 * t.frameWidth()
        t.setFixedHeight(height + 2)
        notes = status_notes([x for row in c.tolerances for x in row.absolute + row.absolute_loss + row.data_scale
                              + row.data_scale_loss])
        self.table_note.setText(
            "Relative σ compares fairly; absolute σ grows with the latent's RMS (hover the table for the definitions)."
            + "".join(f" {n}." for n in notes) + (" Absolute rows greyed: the scales differ." if c.scale_warning else "")
        )

    # ---- the side-by-side text -----------------------------------------------------------

    def _fill_view_controls(self) -> None:
        c = self.comparison
        for box in (self.sigma_box, self.pair_box):
            box.blockSignals(True)
            box.clear()
        if c is not None:
            main = c.main_sweeps()
            for s in main[0].sigmas:
                self.sigma_box.addItem(f"{s:.4g}")
            for pair in c.paired:
                self.pair_box.addItem(pair.name_b)
            # start at the first σ where A and B differ significantly, else where they disagree most
            rows = c.paired[0].rows if c.paired else []
            significant = [i for i, r in enumerate(rows) if r.pvalue < ALPHA]
            start = significant[0] if significant else (int(np.argmax([r.a_only + r.b_only for r in rows])) if rows else 0)
            self.sigma_box.setCurrentIndex(start)
            self.pair_box.setCurrentIndex(0)
        for box in (self.sigma_box, self.pair_box):
            box.blockSignals(False)
        self.pair_box.setEnabled(c is not None and len(c.paired) > 1)
        self._request_view()

    def set_sigma_index(self, index: int) -> None:
        self.sigma_box.setCurrentIndex(index)

    def set_pair_index(self, index: int) -> None:
        self.pair_box.setCurrentIndex(index)

    def _request_view(self) -> None:
        self._view_generation += 1
        gen = self._view_generation
        if self._view_task is not None:
            self._view_task.cancel()
        c = self.comparison
        i, j = self.sigma_box.currentIndex(), self.pair_box.currentIndex()
        if c is None or i < 0 or j < 0 or j >= len(c.paired):
            self.view = None
            for side in range(2):
                self.texts[side].set_content("", np.zeros((0, 2), dtype=np.int64))
                self.pane_titles[side].setText("")
            for label in (self.legend_a, self.legend_b, self.legend_both):
                label.setText("")
            self.view_note.setText("")
            self._move_selected_line()
            return
        main = c.main_sweeps()
        a, b = main[0], main[j + 1]
        self.view_note.setText("decoding the text at this σ…")
        task = Task("the side-by-side text", side_by_side, a, b, i, j, c.paired[j].unit)
        task.finished.connect(lambda view, g=gen, cmp=c: self._view_arrived(g, cmp, view))
        task.failed.connect(self.error)
        self._view_task = task
        self.runner.start(task)
        self._move_selected_line()

    def _view_arrived(self, gen: int, comparison: Comparison, view: SideBySide) -> None:
        if gen != self._view_generation or comparison is not self.comparison:
            return
        self._view_task = None
        self.view = view
        c = comparison
        pair = c.paired[view.pair_index]
        row = pair.rows[view.sigma_index]
        formats = mark_formats()
        names = (pair.name_a, pair.name_b)
        for side, pane in enumerate((view.a, view.b)):
            widget = self.texts[side]
            bar = widget.verticalScrollBar()
            fraction = bar.value() / bar.maximum() if bar.maximum() > 0 else 0.0
            widget.set_content(pane.text, pane.spans)
            widget.paint_levels(pane.levels, formats)
            wrong = int((~pane.correct).sum())
            role = "A" if side == 0 else "B"
            self.pane_titles[side].setText(
                f"<span style='color:{codec_colour(0 if side == 0 else view.pair_index + 1)}'>■</span> "
                f"<b>{role} · {names[side]}</b> <span style='color:{PALETTE.ink_soft}'>— as decoded at σ "
                f"{row.sigma:.4g} (repeat 0): {wrong:,} of {len(pane.correct):,} tokens wrong</span>"
            )
            self._syncing_scroll = True
            widget.verticalScrollBar().setValue(int(round(fraction * widget.verticalScrollBar().maximum())))
            self._syncing_scroll = False
        units = UNIT_PLURAL[pair.unit]
        self.legend_a.setText(
            f"<span style='background:{WASH[ONLY_A]}'>&nbsp;only A right&nbsp;</span>"
            f" <span style='color:{PALETTE.ink_soft}'>{row.a_only:,} {units}</span>")
        self.legend_b.setText(
            f"&nbsp;&nbsp;<span style='background:{WASH[ONLY_B]}'>&nbsp;only B right&nbsp;</span>"
            f" <span style='color:{PALETTE.ink_soft}'>{row.b_only:,} {units}</span>")
        self.legend_both.setText(f"&nbsp;&nbsp;<span style='color:{PALETTE.ink_faint}'>faint: both wrong</span>")
        stars = f"significant, {SIGNIFICANT}" if row.pvalue < ALPHA else "not significant"
        note = (f"paired per {pair.unit}: accuracy A {fmt_percent(row.accuracy_a, 3)}, B {fmt_percent(row.accuracy_b, 3)}; "
                f"McNemar ({row.method}) p = {row.pvalue:.3g}, {stars}")
        if pair.unit == "character":
            note += (" · the checkpoints cut the text differently, so disagreement is marked on every token holding a "
                     "character one got right and the other wrong")
        self.view_note.setText(note)
        self.text_view_ready.emit()

    def marked_counts(self) -> tuple[int, int]:
        """How many tokens the text view marks, in A's pane, as only-A-right and only-B-right."""
        if self.view is None:
            return 0, 0
        levels = self.view.a.levels
        return int((levels == ONLY_A).sum()), int((levels == ONLY_B).sum())

    def _tooltip(self, side: int, token: int) -> str:
        view, c = self.view, self.comparison
        if view is None or c is None or token is None:
            return ""
        main = c.main_sweeps()
        result = main[0] if side == 0 else main[view.pair_index + 1]
        pane = view.a if side == 0 else view.b
        if not 0 <= token < len(pane.correct):
            return ""
        a, b = result.chunks.spans[token]
        original = result.chunks.text[int(a):int(b)]
        decoded = result.display(int(result.decoded[token, view.sigma_index]))
        verdict = {ONLY_A: "only A got this right", ONLY_B: "only B got this right", BOTH: "both got this wrong"}.get(
            int(pane.levels[token]), "")
        line = f"{original!r}" + ("" if pane.correct[token] else f" → decoded {decoded!r}")
        return f"{result.codec_name}: {line}" + (f"\n{verdict}" if verdict else "")

    def _sync_scroll(self, side: int) -> None:
        if self._syncing_scroll:
            return
        source, target = self.texts[side].verticalScrollBar(), self.texts[1 - side].verticalScrollBar()
        if source.maximum() <= 0:
            return
        self._syncing_scroll = True
        target.setValue(int(round(source.value() / source.maximum() * target.maximum())))
        self._syncing_scroll = False

    # ---- plot interaction ----------------------------------------------------------------

    def _log_toggled(self, on: bool) -> None:
        self.log_x = on
        self._draw_plots()

    def _move_selected_line(self) -> None:
        c = self.comparison
        i = self.sigma_box.currentIndex()
        visible = c is not None and i >= 0
        if visible:
            sigma = c.main_sweeps()[0].sigmas[i]
            log = self.log_x and any(s > 0 for s in c.main_sweeps()[0].sigmas)
            visible = sigma > 0 or not log
            if visible:
                for line in self.selected_lines:
                    line.setPos(np.log10(sigma) if log else sigma)
        for line in self.selected_lines:
            line.setVisible(visible)

    def _plot_clicked(self, plot: pg.PlotWidget, event) -> None:
        if event.button() != Qt.MouseButton.LeftButton or self.comparison is None:
            return
        vb = plot.getPlotItem().getViewBox()
        if not vb.sceneBoundingRect().contains(event.scenePos()):
            return
        sigmas = np.asarray(self.comparison.main_sweeps()[0].sigmas, dtype=np.float64)
        log = self.log_x and (sigmas > 0).any()
        xv = vb.mapSceneToView(event.scenePos()).x()
        xs = np.where(sigmas > 0, np.log10(np.maximum(sigmas, 1e-300)), -np.inf) if log else sigmas
        self.sigma_box.setCurrentIndex(int(np.argmin(np.abs(xs - xv))))

    # ---- for export and reports ----------------------------------------------------------

    def caption(self) -> str:
        """Provenance of what is shown, for a saved plot."""
        if self.comparison is None:
            return ""
        c = self.comparison
        return provenance_caption(c.main_sweeps()) + f"; paired on repeat 0 per {c.paired[0].unit if c.paired else 'token'}"

    def plots(self) -> list[pg.PlotWidget]:
        return [self.accuracy_plot, self.difference_plot]
