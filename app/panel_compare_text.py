"""The compare view's text: A's and B's decodes at one sigma side by side, marked where only
one of them is right. The layout and the marks come from `core.analyses.compare_view`,
built in a worker; this card only paints them and keeps the two panes scrolled together."""

from __future__ import annotations

import numpy as np
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QTextCharFormat
from PySide6.QtWidgets import QComboBox, QFrame, QHBoxLayout, QLabel, QSplitter, QVBoxLayout, QWidget

from app.controls import caption
from app.style import PALETTE, codec_colour, fmt_percent
from app.tokentext import TokenText, char_format
from app.workers import LatestTask, Runner, Task
from core.analyses.compare import ALPHA, SIGNIFICANT, Comparison
from core.analyses.compare_view import BOTH, ONLY_A, ONLY_B, SideBySide, comparison_side_by_side, first_sigma_to_show

WASH = {ONLY_A: "#d9e6f6", ONLY_B: "#f8e6bd", BOTH: "#ecebe6"}
UNIT_PLURAL = {"token": "tokens", "character": "characters"}


def mark_formats() -> dict[int, QTextCharFormat]:
    """Only-A-right: blue wash, solid underline; only-B-right: amber wash, wavy underline
    (colour and line shape both differ, so neither depends on seeing hue); both wrong: faint."""
    a = char_format(WASH[ONLY_A], PALETTE.ink, underline=codec_colour(0))
    b = char_format(WASH[ONLY_B], PALETTE.ink, underline=codec_colour(1))
    b.setUnderlineStyle(QTextCharFormat.UnderlineStyle.WaveUnderline)
    both = char_format(None, PALETTE.ink_faint)
    return {ONLY_A: a, ONLY_B: b, BOTH: both}


def _side_by_side(task: Task, comparison: Comparison, sigma_index: int, pair_index: int) -> SideBySide:
    return comparison_side_by_side(comparison, sigma_index, pair_index)


class CompareTextView(QFrame):
    """The "Where they differ" card: which sigma, which B, the legend, and the two panes."""

    ready = Signal()  # the side-by-side text was redrawn
    sigma_changed = Signal(int)  # the sigma shown (an index into the grid), or -1
    error = Signal(str)

    def __init__(self, runner: Runner, parent: QWidget | None = None):
        super().__init__(parent)
        self.setObjectName("card")  # app.controls.card's frame
        self.comparison: Comparison | None = None
        self.view: SideBySide | None = None
        self.views = LatestTask(runner, self)
        self._syncing_scroll = False
        bl = QVBoxLayout(self)
        bl.setContentsMargins(12, 8, 12, 8)
        bl.setSpacing(6)
        head = QHBoxLayout()
        head.setSpacing(8)
        head.addWidget(caption("Where they differ", "title"))
        head.addSpacing(6)
        head.addWidget(caption("at σ"))
        self.sigma_box = QComboBox()
        self.sigma_box.setMinimumWidth(90)
        self.sigma_box.currentIndexChanged.connect(lambda _i: self.request())
        head.addWidget(self.sigma_box)
        head.addWidget(caption("B ="))
        self.pair_box = QComboBox()
        self.pair_box.setMinimumWidth(150)
        self.pair_box.currentIndexChanged.connect(lambda _i: self.request())
        head.addWidget(self.pair_box)
        head.addStretch(1)
        self.legend_a = QLabel("")
        self.legend_b = QLabel("")
        self.legend_both = QLabel("")
        for label in (self.legend_a, self.legend_b, self.legend_both):
            label.setTextFormat(Qt.TextFormat.RichText)
            head.addWidget(label)
        bl.addLayout(head)
        self.note = caption("")
        bl.addWidget(self.note)
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
            self.texts[side].scrolled.connect(lambda s=side: self._sync_scroll(s))
        bl.addWidget(panes, 1)

    # ---- what to show --------------------------------------------------------------------

    def show_comparison(self, comparison: Comparison | None) -> None:
        """Fill the sigma and B choices for a comparison and draw its text."""
        self.comparison = c = comparison
        for box in (self.sigma_box, self.pair_box):
            box.blockSignals(True)
            box.clear()
        if c is not None:
            for s in c.main_sweeps()[0].sigmas:
                self.sigma_box.addItem(f"{s:.4g}")
            for pair in c.paired:
                self.pair_box.addItem(pair.name_b)
            self.sigma_box.setCurrentIndex(first_sigma_to_show(c.paired[0] if c.paired else None))
            self.pair_box.setCurrentIndex(0)
        for box in (self.sigma_box, self.pair_box):
            box.blockSignals(False)
        self.pair_box.setEnabled(c is not None and len(c.paired) > 1)
        self.request()

    def busy(self) -> bool:
        """The text for the current choice is still being built."""
        return self.views.busy()

    def request(self) -> None:
        """Build the text for the chosen sigma and B in a worker (a newer choice supersedes it)."""
        self.views.drop()
        c = self.comparison
        i, j = self.sigma_box.currentIndex(), self.pair_box.currentIndex()
        if c is None or i < 0 or j < 0 or j >= len(c.paired):
            self.view = None
            for side in range(2):
                self.texts[side].set_content("", np.zeros((0, 2), dtype=np.int64))
                self.pane_titles[side].setText("")
            for label in (self.legend_a, self.legend_b, self.legend_both):
                label.setText("")
            self.note.setText("")
            self.sigma_changed.emit(i)
            return
        self.note.setText("decoding the text at this σ…")
        self.views.start(Task("the side-by-side text", _side_by_side, c, i, j),
                         finished=lambda view, cmp=c: self._arrived(cmp, view), failed=self.error.emit)
        self.sigma_changed.emit(i)

    def _arrived(self, comparison: Comparison, view: SideBySide) -> None:
        if comparison is not self.comparison:
            return
        self.view = view
        pair = comparison.paired[view.pair_index]
        row = pair.rows[view.sigma_index]
        formats = mark_formats()
        names = (pair.name_a, pair.name_b)
        for side, pane in enumerate((view.a, view.b)):
            widget = self.texts[side]
            fraction = widget.scroll_fraction()
            widget.set_content(pane.text, pane.spans)
            widget.paint_levels(pane.levels, formats)
            role = "A" if side == 0 else "B"
            self.pane_titles[side].setText(
                f"<span style='color:{codec_colour(0 if side == 0 else view.pair_index + 1)}'>■</span> "
                f"<b>{role} · {names[side]}</b> <span style='color:{PALETTE.ink_soft}'>— as decoded at σ "
                f"{row.sigma:.4g} (repeat 0): {pane.wrong:,} of {len(pane.correct):,} tokens wrong</span>"
            )
            self._syncing_scroll = True
            widget.set_scroll_fraction(fraction)
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
        self.note.setText(note)
        self.ready.emit()

    def marked_counts(self) -> tuple[int, int]:
        """How many tokens the text view marks, in A's pane, as only-A-right and only-B-right."""
        return self.view.marked_counts() if self.view is not None else (0, 0)

    # ---- hover and scrolling -------------------------------------------------------------

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
        self._syncing_scroll = True
        self.texts[1 - side].set_scroll_fraction(self.texts[side].scroll_fraction())
        self._syncing_scroll = False
