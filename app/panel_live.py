"""Live view: move the noise, watch which tokens break.

A slider move asks for the part of the text on screen first, then the rest; requests
are coalesced (at most one in flight, the newest wins) and a result made for an older
slider position is dropped by its generation number."""

from __future__ import annotations

import html
import time

import numpy as np
from PySide6.QtCore import Qt, QTimer, Signal
from PySide6.QtGui import QStandardItemModel
from PySide6.QtWidgets import (
    QAbstractSpinBox, QComboBox, QGridLayout, QHBoxLayout, QLabel, QPushButton, QSpinBox, QWidget,
)
from superqt import QLabeledDoubleSlider

from app.controls import card, figure_box, page_layout
from app.state import Workbench
from app.style import PALETTE, fmt_percent, show_piece
from app.tokentext import TokenText, wrong_decoded_format, wrong_original_format
from app.workers import Task
from core.engine.noise import NOISE_MODELS
from core.engine.sweep import DEFAULT_NOISE
from core.analyses.live import LivePerturbation
from core.engine.text import Chunks
from core.codecs.tokenizer import token_display
from core.analyses.views import LiveWindow, decoded_pieces, perturb_on_screen_first

RELATIVE_MAX = 2.0
TOP_K = 5  # alternatives shown when hovering a token (core.analyses.views.perturb_window's default)
MAX_MARKED = 4000  # beyond this many wrong tokens the panes stop marking each one


def _live(task: Task, codec, chunks: Chunks, encoded, sigma: float, noise: str, seed: int, draw: int,
          first_token: int, last_token: int):
    """The chunks on screen first (reported as soon as they are decoded), then the whole text."""
    return perturb_on_screen_first(codec, chunks, encoded, sigma, noise, seed, draw, first_token, last_token, TOP_K,
                                   on_screen=task.partial.emit, should_stop=task.should_stop)


# where the slider starts: at data-scale σ 0.35 the plain sample already loses about 7 % of the demo
# text's tokens while tolerant loses none, so the first screen shows what the tool is for
START_SIGMA = 0.35

class LivePanel(QWidget):
    decoded_updated = Signal(int)  # generation shown (window or whole text)
    result_ready = Signal(object)  # a whole-text LivePerturbation

    def __init__(self, workbench: Workbench):
        super().__init__()
        self.setObjectName("page")
        self.workbench = workbench
        self.generation = 0
        self.task: Task | None = None
        self.window_pending = False  # a request's on-screen part has not come back yet
        self.dirty = False  # the controls changed since the last launch
        self.draw = 0
        self.result: LivePerturbation | None = None  # last whole-text result
        self.result_params: tuple = ()
        self.shown: dict[str, np.ndarray] | None = None  # what the panes show now
        self.layout_spans: np.ndarray | None = None
        self.shown_key: tuple = ()
        self.requested_at = 0.0
        self.last_latency_ms = float("nan")
        self._build()
        self.debounce = QTimer(self)
        self.debounce.setSingleShot(True)
        self.debounce.setInterval(0)  # coalesces the moves of one event-loop turn; a running request coalesces the rest
        self.debounce.timeout.connect(self._launch)
        workbench.current_changed.connect(self._entry_switched)
        workbench.entry_changed.connect(self._entry_updated)
        workbench.text_changed.connect(self._entry_switched)

    # ---- layout --------------------------------------------------------------------------

    def _build(self) -> None:
        outer = page_layout(self, 10)

        controls, grid = card(QGridLayout, margins=(14, 10))
        grid.setHorizontalSpacing(12)
        grid.setVerticalSpacing(4)

        label = QLabel("Noise σ")
        label.setObjectName("title")
        self.slider = QLabeledDoubleSlider(Qt.Orientation.Horizontal)
        self.slider.setRange(0.0, RELATIVE_MAX)
        self.slider.setDecimals(4)
        self.slider.setSingleStep(0.001)
        self.slider.setValue(START_SIGMA)
        self.slider.setMinimumWidth(240)
        self.slider.valueChanged.connect(self._controls_changed)
        self.scale_note = QLabel("")
        self.scale_note.setObjectName("faint")

        self.noise = QComboBox()
        self.noise.addItems(list(NOISE_MODELS))
        self.noise.setCurrentText(DEFAULT_NOISE)
        self.noise.setToolTip("\n".join(f"{m.name}: {m.description}" + (" (variational codecs)" if m.needs_variational else "")
                                        for m in NOISE_MODELS.values()))
        self.noise.currentTextChanged.connect(self._noise_changed)
        self.seed = QSpinBox()
        self.seed.setButtonSymbols(QAbstractSpinBox.ButtonSymbols.NoButtons)
        self.seed.setRange(0, 2**31 - 1)
        self.seed.valueChanged.connect(self._controls_changed)
        self.redraw = QPushButton("Draw new noise")
        self.redraw.setToolTip("Keep σ, draw a fresh ε (the next repeat of the sweep's noise)")
        self.redraw.clicked.connect(self.new_draw)

        grid.addWidget(label, 0, 0)
        grid.addWidget(self.slider, 0, 1, 1, 5)
        grid.addWidget(self.scale_note, 1, 1, 1, 5)
        small = QLabel("noise model")
        small.setObjectName("caption")
        grid.addWidget(small, 2, 0)
        grid.addWidget(self.noise, 2, 1)
        small = QLabel("seed")
        small.setObjectName("caption")
        grid.addWidget(small, 2, 2, Qt.AlignmentFlag.AlignRight)
        grid.addWidget(self.seed, 2, 3)
        grid.addWidget(self.redraw, 2, 4)
        grid.setColumnStretch(5, 1)

        stats = QHBoxLayout()
        stats.setSpacing(0)
        box, self.accuracy_value, self.accuracy_note = figure_box("token accuracy", 18)
        stats.addWidget(box)
        box, self.exact_value, self.exact_note = figure_box("chunk exact match", 18)
        stats.addWidget(box)
        box, self.wrong_value, self.wrong_note = figure_box("wrong tokens", 18)
        self.wrong_value.setObjectName("figureAccent")
        stats.addWidget(box)
        grid.addLayout(stats, 0, 6, 3, 1)
        grid.setColumnMinimumWidth(6, 380)
        outer.addWidget(controls)

        panes = QGridLayout()
        panes.setHorizontalSpacing(10)
        panes.setVerticalSpacing(4)
        self.original_title = QLabel("Original")
        self.original_title.setObjectName("title")
        self.decoded_title = QLabel("Decoded")
        self.decoded_title.setObjectName("title")
        self.state_note = QLabel("")
        self.state_note.setObjectName("faint")
        head = QHBoxLayout()
        head.addWidget(self.decoded_title)
        head.addStretch(1)
        head.addWidget(self.state_note)
        panes.addWidget(self.original_title, 0, 0)
        panes.addLayout(head, 0, 1)
        self.original = TokenText("The evaluation text appears here once a checkpoint is loaded.")
        self.decoded = TokenText("")
        self.original.tooltip_for = self._tooltip
        self.decoded.tooltip_for = self._tooltip
        panes.addWidget(self.original, 1, 0)
        panes.addWidget(self.decoded, 1, 1)
        hint = QLabel("Tokens that decode wrong are marked in both panes. Hover a token for the decoder's top alternatives.")
        hint.setObjectName("faint")
        panes.addWidget(hint, 2, 0, 1, 2)
        outer.addLayout(panes, 1)
        self._syncing = False
        self.original.scrolled.connect(self._original_scrolled)
        self.decoded.scrolled.connect(self._decoded_scrolled)

    # ---- public --------------------------------------------------------------------------

    def sigma(self) -> float:
        return float(self.slider.value())

    def noise_model(self) -> str:
        return self.noise.currentText()

    def set_sigma(self, sigma: float, noise: str | None = None) -> None:
        if noise is not None and noise != self.noise_model():
            self.noise.setCurrentText(noise)
        if sigma > self.slider.maximum():
            self.slider.setMaximum(float(sigma) * 1.25)
        self.slider.setValue(float(sigma))

    def new_draw(self) -> None:
        self.draw += 1
        self._controls_changed()

    def settings_dict(self) -> dict:
        return {"sigma": self.sigma(), "noise": self.noise_model(), "seed": self.seed.value()}

    def restore(self, values: dict) -> None:
        try:
            self.noise.setCurrentText(str(values.get("noise", DEFAULT_NOISE)))
            self.seed.setValue(int(values.get("seed", 0)))
            self.set_sigma(float(values.get("sigma", START_SIGMA)))
        except (TypeError, ValueError):
            pass

    # ---- requests ------------------------------------------------------------------------

    def _noise_changed(self, noise: str) -> None:
        self._update_scale()
        self._controls_changed()

    def _update_scale(self) -> None:
        entry = self.workbench.entry()
        noise = self.noise_model()
        value = self.sigma()
        if NOISE_MODELS[noise].in_latent_units and entry is not None and entry.encoded is not None:
            rms = entry.encoded.latent_rms
            top = float(f"{RELATIVE_MAX * rms:.2g}") or RELATIVE_MAX
            self.slider.setMaximum(max(top, 1e-3))
            self.scale_note.setText(f"{NOISE_MODELS[noise].unit}; this codec's latent RMS is {rms:.4g}")
        else:
            self.slider.setMaximum(RELATIVE_MAX)
            self.scale_note.setText(NOISE_MODELS[noise].axis_label if noise in NOISE_MODELS else "")
        if value > self.slider.maximum():
            self.slider.setValue(self.slider.maximum())

    def _controls_changed(self, *_args) -> None:
        self.generation += 1
        self.dirty = True
        self.requested_at = time.perf_counter()
        if not self.debounce.isActive():
            self.debounce.start()

    def _launch(self) -> None:
        entry = self.workbench.entry()
        if entry is None or not entry.ready or not self.dirty:
            return
        if self.window_pending:
            return  # launched again when the on-screen part of the running request arrives
        if NOISE_MODELS[self.noise_model()].needs_variational and not entry.codec.variational:
            self.state_note.setText(f"{self.noise_model()} noise needs a variational codec")
            self.dirty = False
            return
        if self.task is not None:
            self.task.cancel()
        self.dirty = False
        first, last = self.original.visible_tokens()
        gen = self.generation
        key = (entry.path, entry.text_sha)
        task = Task("the live perturbation", _live, entry.codec, entry.chunks, entry.encoded, self.sigma(),
                    self.noise_model(), self.seed.value(), self.draw, first, last)
        task.partial.connect(lambda window, g=gen, k_=key: self._window_arrived(g, k_, window))
        task.finished.connect(lambda result, g=gen, k_=key: self._whole_arrived(g, k_, result))
        task.failed.connect(self._failed)
        task.ended.connect(lambda t=task: self._ended(t))
        self.task = task
        self.window_pending = True
        self.state_note.setText("decoding…")
        self.workbench.runner.start(task)

    def _ended(self, task: Task) -> None:
        if task is self.task:
            self.task = None
            self.window_pending = False
        if self.dirty:
            self._launch()

    def _window_arrived(self, gen: int, key: tuple, window: LiveWindow) -> None:
        self.window_pending = False
        if gen == self.generation and key == self._key():
            self._show_window(window, gen)
        if self.dirty:
            self._launch()

    def _whole_arrived(self, gen: int, key: tuple, result: LivePerturbation) -> None:
        if gen != self.generation or key != self._key() or result is None:
            return
        self.result = result
        self.result_params = self._params()
        self._show(result.predicted, result.correct, result.top_ids, result.top_probs, gen, whole=True)
        self._show_numbers(result)
        self.result_ready.emit(result)

    def _failed(self, message: str) -> None:
        self.state_note.setText("")
        self.workbench.error.emit(message)

    def _params(self) -> tuple:
        return (self._key(), self.sigma(), self.noise_model(), self.seed.value(), self.draw)

    def _key(self) -> tuple:
        entry = self.workbench.entry()
        return (entry.path, entry.text_sha) if entry is not None else ()

    # ---- display -------------------------------------------------------------------------

    def _entry_switched(self, *_args) -> None:
        self.result = None
        self.result_params = ()
        self.shown = None
        self.shown_key = ()
        entry = self.workbench.entry()
        noise_model = self.noise.model()
        if isinstance(noise_model, QStandardItemModel):
            variational = entry is not None and entry.codec is not None and entry.codec.variational
            for i, model in enumerate(NOISE_MODELS.values()):
                if model.needs_variational:
                    item = noise_model.item(i)
                    item.setEnabled(variational)
                    item.setToolTip("" if variational else "needs a variational codec; this one is plain")
            if not variational and NOISE_MODELS[self.noise_model()].needs_variational:
                self.noise.setCurrentText(DEFAULT_NOISE)
        if entry is None or not entry.ready:
            self.original.set_content("", np.zeros((0, 2), dtype=np.int64))
            self.decoded.set_content("", np.zeros((0, 2), dtype=np.int64))
            self.state_note.setText("loading…" if entry is not None else "")
            for value in (self.accuracy_value, self.exact_value, self.wrong_value):
                value.setText("—")
            return
        self._update_scale()
        self.original.set_content(entry.chunks.text, entry.chunks.spans)
        self.decoded.set_content(entry.chunks.text, entry.chunks.spans)
        self.original_title.setText(f"Original · {entry.chunks.num_tokens:,} tokens")
        self.decoded_title.setText(f"Decoded by {entry.name}")
        self._controls_changed()

    def _entry_updated(self, path: str) -> None:
        if path != self.workbench.current:
            return
        entry = self.workbench.entry()
        if entry is not None and entry.ready and self.shown_key != self._key() and self.original.pieces.text != entry.chunks.text:
            self._entry_switched()

    def _show_window(self, window: LiveWindow, gen: int) -> None:
        """Show the on-screen part at once; off-screen tokens keep what they showed before."""
        entry = self.workbench.entry()
        n = entry.chunks.num_tokens
        if self.shown is not None and self.shown_key == self._key():
            base = {k: v.copy() for k, v in self.shown.items()}
        else:
            truth = entry.chunks.token_ids
            base = {
                "predicted": truth.copy(), "correct": np.ones(n, dtype=bool),
                "top_ids": np.repeat(truth[:, None], TOP_K, 1), "top_probs": np.zeros((n, TOP_K), dtype=np.float32),
            }
        a, b = window.token_start, window.token_stop
        base["predicted"][a:b] = window.predicted
        base["correct"][a:b] = window.correct
        width = window.top_ids.shape[1]  # 0 for the quick on-screen pass: no alternatives until the whole text is in
        base["top_ids"][a:b, :width] = window.top_ids
        base["top_probs"][a:b] = 0.0
        base["top_probs"][a:b, :width] = window.top_probs
        self._show(base["predicted"], base["correct"], base["top_ids"], base["top_probs"], gen, whole=False,
                   token_range=(a, b))

    def _show(self, predicted, correct, top_ids, top_probs, gen: int, whole: bool,
              token_range: tuple[int, int] | None = None) -> None:
        entry = self.workbench.entry()
        chunks = entry.chunks
        anchor = self.original.first_visible_token()
        self.shown = {"predicted": predicted, "correct": correct, "top_ids": top_ids, "top_probs": top_probs}
        self.shown_key = self._key()
        pieces = decoded_pieces(entry.codec, chunks, predicted, correct)  # laid out a window at a time, by the pane
        wrong = np.flatnonzero(~correct)
        if token_range is not None:  # the on-screen part first: mark only there, the rest follows
            wrong = wrong[(wrong >= token_range[0]) & (wrong < token_range[1])]
        marked = wrong[:MAX_MARKED]
        self._syncing = True
        self.decoded.set_pieces(pieces, at_token=anchor)
        self.decoded.mark(marked, wrong_decoded_format())
        self.original.mark(marked, wrong_original_format())
        self.decoded.scroll_to_token(anchor)
        self._syncing = False
        self.state_note.setText("" if whole else "decoding the rest of the text…")
        if whole and len(wrong) > MAX_MARKED:
            self.state_note.setText(f"marking the first {MAX_MARKED:,} of {len(wrong):,} wrong tokens")
        if not whole:
            for note in (self.accuracy_note, self.exact_note, self.wrong_note):
                note.setText("updating…")
        self.last_latency_ms = (time.perf_counter() - self.requested_at) * 1000
        self.decoded_updated.emit(gen)

    def _show_numbers(self, result: LivePerturbation) -> None:
        self.accuracy_value.setText(fmt_percent(result.token_accuracy, 2))
        self.accuracy_note.setText(f"of {result.tokens:,} tokens at σ {result.sigma:.4g}")
        self.exact_value.setText(fmt_percent(result.chunk_exact_rate, 2))
        self.exact_note.setText(f"of {result.chunks:,} chunks")
        wrong = int((~result.correct).sum())
        self.wrong_value.setText(f"{wrong:,}")
        self.wrong_note.setText(f"{result.noise} noise, seed {result.seed}, draw {result.draw}")

    # ---- scrolling and tooltips ----------------------------------------------------------

    def _original_scrolled(self) -> None:
        if self._syncing:
            return
        self._syncing = True
        self.decoded.scroll_to_token(self.original.first_visible_token())
        self._syncing = False
        if self.shown is not None and self.result_params != self._params():
            self._controls_changed()  # decode what just came on screen first

    def _decoded_scrolled(self) -> None:
        if self._syncing:
            return
        self._syncing = True
        self.original.scroll_to_token(self.decoded.first_visible_token())
        self._syncing = False

    def _tooltip(self, token: int) -> str:
        entry = self.workbench.entry()
        if entry is None or self.shown is None or not entry.ready or token >= entry.chunks.num_tokens:
            return ""
        p = PALETTE
        tokenizer = entry.codec.tokenizer
        chunks = entry.chunks
        truth = int(chunks.token_ids[token])
        ok = bool(self.shown["correct"][token])
        k = chunks.chunk_size

        def show(tid: int) -> str:
            return html.escape(show_piece(token_display(tokenizer, tid)))

        head = (f"<b>{show(truth)}</b> &nbsp;<span style='color:{p.ink_soft}'>token {token:,} · chunk {token // k:,}, "
                f"position {token % k}</span>")
        if ok:
            verdict = f"<span style='color:{p.ink_soft}'>decoded right</span>"
        else:
            verdict = (f"<span style='color:{p.accent}'>decoded as <b>{show(int(self.shown['predicted'][token]))}</b></span>")
        rows = []
        if float(self.shown["top_probs"][token].sum()) > 0:
            for tid, prob in zip(self.shown["top_ids"][token].tolist(), self.shown["top_probs"][token].tolist()):
                colour = p.ink if tid == truth else p.ink_soft
                bar = int(round(prob * 80))
                rows.append(
                    f"<tr><td style='color:{colour}; padding-right:8px; font-family:monospace'>{show(tid)}</td>"
                    f"<td align='right' style='color:{colour}; padding-right:6px'>{prob * 100:.1f}%</td>"
                    f"<td><table cellspacing='0' cellpadding='0'><tr><td style='background:{p.accent if tid != truth else p.ink}' "
                    f"width='{max(bar, 1)}' height='6'></td></tr></table></td></tr>"
                )
        table = f"<table cellspacing='0' style='margin-top:4px'>{''.join(rows)}</table>" if rows else ""
        return f"<div style='white-space:nowrap'>{head}<br>{verdict}{table}</div>"
