"""A read-only text pane that knows where each token sits: marks tokens, reports the
token under the mouse (hover tooltips, clicks) and scrolls to a token. Its document holds
only a window of the text's tokens around what is on screen, so a big text costs one small
document per pane however long it is."""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
from PySide6.QtCore import QEvent, QPoint, Qt, QTimer, Signal
from PySide6.QtGui import QColor, QTextCharFormat, QTextCursor, QTextOption
from PySide6.QtWidgets import QPlainTextEdit, QScrollBar, QToolTip

from app.style import PALETTE, mono_font
from core.analyses.views import TextPieces, token_at


def _utf16_offsets(text: str) -> np.ndarray | None:
    """Python index -> Qt (UTF-16) position, or None when the two agree (no astral characters)."""
    if text.isascii() or max(text, default="\0") <= "\uffff":  # both in C, no copy of the text
        return None
    astral = np.frombuffer(text.encode("utf-32-le", "surrogatepass"), dtype="<u4") > 0xFFFF
    if not astral.any():
        return None
    return np.concatenate([[0], np.cumsum(astral, dtype=np.int64)]) + np.arange(len(text) + 1)


class TokenText(QPlainTextEdit):
    """The pane's document holds a window of at most WINDOW_TOKENS tokens around what is on
    screen, never the whole text: a text over that size gets a scroll bar of its own over all
    its tokens (the document's bar is hidden), and the window moves when the view nears its
    edge. Marks and levels are kept per token and painted on the window's characters only."""

    token_clicked = Signal(int)
    scrolled = Signal()
    WINDOW_TOKENS = 6000  # tokens in the document at once; tests make it small

    def __init__(self, placeholder: str = ""):
        super().__init__()
        self.setReadOnly(True)
        self.setFont(mono_font(9.5))
        self.setWordWrapMode(QTextOption.WrapMode.WrapAtWordBoundaryOrAnywhere)
        self.setPlaceholderText(placeholder)
        self.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.document().setDocumentMargin(10)
        self.document().setUndoRedoEnabled(False)
        self.pieces: TextPieces = TextPieces("", np.zeros((0, 2), dtype=np.int64))
        self.window_start = self.window_stop = 0  # tokens in the document
        self._local = np.zeros((0, 2), dtype=np.int64)  # their spans in the document's text
        self._map: np.ndarray | None = None
        self._marked = np.zeros(0, dtype=np.int64)
        self._mark_format = QTextCharFormat()
        self._levels: np.ndarray | None = None
        self._level_formats: dict[int, QTextCharFormat] = {}
        self.marked_count = 0
        self._rendering = False
        self.viewport().setMouseTracking(True)
        self.viewport().installEventFilter(self)
        self.bar = QScrollBar(Qt.Orientation.Vertical, self)  # over all tokens, when the text is over one window
        self.bar.hide()
        self.bar.valueChanged.connect(self._bar_moved)
        self.verticalScrollBar().valueChanged.connect(self._document_scrolled)
        self._move_soon = QTimer(self)
        self._move_soon.setSingleShot(True)
        self._move_soon.setInterval(0)
        self._move_soon.timeout.connect(self._move_window)
        self.tooltip_for: Callable[[int], str] | None = None
        self._press: QPoint | None = None

    # ---- content -------------------------------------------------------------------------

    @property
    def num_tokens(self) -> int:
        return self.pieces.num_tokens

    @property
    def paged(self) -> bool:
        """The text is over one window: the pane's own bar scrolls it."""
        return self.num_tokens > self.WINDOW_TOKENS

    def set_content(self, text: str, spans: np.ndarray, at_token: int = 0) -> None:
        self.set_pieces(TextPieces(text, spans), at_token)

    def set_pieces(self, pieces: TextPieces, at_token: int = 0) -> None:
        """Show these pieces (held by reference), the window around `at_token`; marks and levels are cleared."""
        self.pieces = pieces
        self._marked = np.zeros(0, dtype=np.int64)
        self._levels = None
        self.marked_count = 0
        paged = self.paged
        self.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff if paged
                                        else Qt.ScrollBarPolicy.ScrollBarAsNeeded)
        self.bar.setVisible(paged)
        self.setViewportMargins(0, 0, self.bar.sizeHint().width() if paged else 0, 0)
        self._place_bar()
        self.bar.blockSignals(True)
        self.bar.setRange(0, max(0, self.num_tokens - 1))
        self.bar.setSingleStep(8)
        self.bar.setPageStep(400)
        self.bar.setValue(0)
        self.bar.blockSignals(False)
        self._window_around(at_token, force=True)

    def shown_text(self) -> str:
        """The whole text the pane shows (its document holds only a window of it)."""
        return self.pieces.whole()

    def _window_around(self, token: int, force: bool = False) -> None:
        n, size = self.num_tokens, self.WINDOW_TOKENS
        if n <= size:
            start, stop = 0, n
        else:
            start = max(0, token - size // 3)
            aligned = self.pieces.line_start(start)  # a window begins on a line when one begins near
            start = aligned if aligned >= token - size // 2 else start
            start = max(0, min(start, n - size))
            stop = min(n, start + size)
        if not force and (start, stop) == (self.window_start, self.window_stop):
            return
        layout = self.pieces.window(start, stop)
        self.window_start, self.window_stop = start, stop
        self._local = layout.spans
        self._map = _utf16_offsets(layout.text)
        was, self._rendering = self._rendering, True
        try:
            self.setPlainText(layout.text)
            self._paint()
        finally:
            self._rendering = was

    def doc_pos(self, index: int) -> int:
        """Document position of character `index` of the window's text."""
        return int(self._map[index]) if self._map is not None else int(index)

    def text_pos(self, position: int) -> int:
        if self._map is None:
            return position
        return int(np.searchsorted(self._map, position, side="right") - 1)

    def token_document_range(self, token: int) -> tuple[int, int] | None:
        """Where token `token` sits in the document now, or None when it is outside the window."""
        if not self.window_start <= token < self.window_stop:
            return None
        a, b = self._local[token - self.window_start]
        return self.doc_pos(int(a)), self.doc_pos(int(b))

    def _runs(self, firsts: np.ndarray, lasts: np.ndarray) -> tuple[list[int], list[int]]:
        """Document ranges of runs of window tokens (local indices firsts[i]..lasts[i])."""
        starts, ends = self._local[firsts, 0], self._local[lasts, 1]
        if self._map is not None:
            starts, ends = self._map[starts], self._map[ends]
        return starts.tolist(), ends.tolist()

    def _paint(self) -> None:
        """Format the window's characters from the levels and marks (runs found with numpy)."""
        a, b = self.window_start, self.window_stop
        cursor = QTextCursor(self.document())
        cursor.beginEditBlock()
        cursor.select(QTextCursor.SelectionType.Document)
        cursor.setCharFormat(QTextCharFormat())
        if self._levels is not None and b > a:
            levels = self._levels[a:b]
            firsts = np.concatenate([[0], np.flatnonzero(levels[1:] != levels[:-1]) + 1])
            lasts = np.concatenate([firsts[1:], [len(levels)]]) - 1
            for level, s, e in zip(levels[firsts].tolist(), *self._runs(firsts, lasts)):
                fmt = self._level_formats.get(int(level))
                if fmt is not None:
                    cursor.setPosition(s)
                    cursor.setPosition(e, QTextCursor.MoveMode.KeepAnchor)
                    cursor.setCharFormat(fmt)
        lo, hi = np.searchsorted(self._marked, [a, b])
        tokens = self._marked[lo:hi] - a
        if len(tokens):
            firsts = np.concatenate([[0], np.flatnonzero(np.diff(tokens) != 1) + 1])
            lasts = np.concatenate([firsts[1:] - 1, [len(tokens) - 1]])
            for s, e in zip(*self._runs(tokens[firsts], tokens[lasts])):
                cursor.setPosition(s)
                cursor.setPosition(e, QTextCursor.MoveMode.KeepAnchor)
                cursor.setCharFormat(self._mark_format)
        cursor.endEditBlock()

    def mark(self, tokens: Sequence[int], fmt: QTextCharFormat) -> None:
        """Format the given tokens, and clear the tokens marked before.

        Written into the document rather than as extra selections: thousands of
        ExtraSelection objects corrupt reference counts in some PySide6 versions."""
        self._marked = np.unique(np.asarray(tokens, dtype=np.int64))
        self._mark_format = fmt
        self.marked_count = int(len(self._marked))
        self._paint()

    def marked_tokens(self) -> np.ndarray:
        return self._marked

    def paint_levels(self, levels: np.ndarray, formats: dict[int, QTextCharFormat]) -> None:
        """Format every token by its level (a level without a format stays plain)."""
        self._levels = np.asarray(levels)
        self._level_formats = dict(formats)
        self._paint()

    # ---- geometry ------------------------------------------------------------------------

    def token_at_point(self, point: QPoint) -> int | None:
        cursor = self.cursorForPosition(point)
        rect = self.cursorRect(cursor)
        if abs(rect.center().y() - point.y()) > rect.height():
            return None  # below the last line
        pos = self.text_pos(cursor.position())
        # cursorForPosition snaps to the nearest gap; pick the character under the point
        if rect.x() > point.x() and pos > 0:
            pos -= 1
        local = token_at(self._local, pos)
        return None if local is None else self.window_start + local

    def point_of_token(self, token: int) -> QPoint | None:
        """The viewport point over the token's first character, or None when it is not in the window."""
        where = self.token_document_range(token)
        if where is None or where[1] <= where[0]:
            return None
        start, end = QTextCursor(self.document()), QTextCursor(self.document())
        start.setPosition(where[0])
        end.setPosition(where[0] + 1)  # the first character, wherever its line wraps
        left, right = self.cursorRect(start), self.cursorRect(end)
        return QPoint((left.x() + right.x()) // 2, left.center().y())

    def visible_tokens(self) -> tuple[int, int]:
        """First and last token index on screen."""
        n = len(self._local)
        if n == 0:
            return 0, 0
        top = self.text_pos(self.cursorForPosition(QPoint(0, 0)).position())
        vp = self.viewport().rect()
        bottom = self.text_pos(self.cursorForPosition(QPoint(vp.width() - 1, vp.height() - 1)).position())
        ends = self._local[:, 1]
        first = min(int(np.searchsorted(ends, top, side="right")), n - 1)
        last = min(max(int(np.searchsorted(ends, bottom, side="left")), first), n - 1)
        return self.window_start + first, self.window_start + last

    def first_visible_token(self) -> int:
        return self.visible_tokens()[0]

    def _near_edge(self, first: int, last: int | None = None) -> bool:
        """Tokens first..last on screen come within a quarter window of an edge the text goes on past."""
        quarter = self.WINDOW_TOKENS // 4
        last = first if last is None else last
        return ((self.window_start > 0 and first < self.window_start + quarter)
                or (self.window_stop < self.num_tokens and last >= self.window_stop - quarter))

    def scroll_to_token(self, token: int, top: bool = True, move_window: bool = False) -> None:
        if not 0 <= token < self.num_tokens:
            return
        if move_window or not self.window_start <= token < self.window_stop or self._near_edge(token):
            self._window_around(token)
        local = token - self.window_start
        cursor = QTextCursor(self.document())
        cursor.setPosition(self.doc_pos(int(self._local[local, 0])))
        if top:
            bar = self.verticalScrollBar()
            block = cursor.block()
            line = block.layout().lineForTextPosition(cursor.position() - block.position())
            # QPlainTextEdit scrolls by lines: count wrapped lines of the blocks before this one
            lines = 0
            b = self.document().firstBlock()
            while b.isValid() and b != block:
                lines += max(1, b.lineCount()) if b.isVisible() else 0
                b = b.next()
            bar.setValue(lines + (line.lineNumber() if line.isValid() else 0))
        else:
            self.setTextCursor(cursor)
            self.ensureCursorVisible()
        self._sync_bar()

    def scroll_fraction(self) -> float:
        """How far down the whole text the view is, 0 to 1."""
        if self.paged:
            return self.bar.value() / self.bar.maximum() if self.bar.maximum() > 0 else 0.0
        bar = self.verticalScrollBar()
        return bar.value() / bar.maximum() if bar.maximum() > 0 else 0.0

    def set_scroll_fraction(self, fraction: float) -> None:
        fraction = min(max(float(fraction), 0.0), 1.0)
        if self.paged:
            self.scroll_to_token(int(round(fraction * (self.num_tokens - 1))))
        else:
            bar = self.verticalScrollBar()
            bar.setValue(int(round(fraction * bar.maximum())))

    def _sync_bar(self) -> None:
        if self.paged:
            first, last = self.visible_tokens()
            self.bar.blockSignals(True)
            self.bar.setPageStep(max(1, last - first))
            self.bar.setValue(first)
            self.bar.blockSignals(False)

    def _bar_moved(self, value: int) -> None:
        was, self._rendering = self._rendering, True
        try:
            self.scroll_to_token(int(value))
        finally:
            self._rendering = was
        self.scrolled.emit()

    def _document_scrolled(self, _value: int) -> None:
        if self._rendering:
            return
        if self.paged:
            if self._near_edge(*self.visible_tokens()):
                self._move_soon.start()  # not inside the document's own scrolling: it must not change under it
            self._sync_bar()
        self.scrolled.emit()

    def _move_window(self) -> None:
        """Move the window around what is on screen, keeping the same token at the top."""
        first, last = self.visible_tokens()
        if self.paged and self._near_edge(first, last):
            was, self._rendering = self._rendering, True  # the same token stays at the top: nothing scrolled
            try:
                self.scroll_to_token(first, move_window=True)
            finally:
                self._rendering = was

    def _place_bar(self) -> None:
        rect = self.contentsRect()
        width = self.bar.sizeHint().width()
        self.bar.setGeometry(rect.right() - width + 1, rect.top(), width, rect.height())

    def resizeEvent(self, event) -> None:  # noqa: N802 (Qt naming)
        super().resizeEvent(event)
        self._place_bar()

    # ---- mouse ---------------------------------------------------------------------------

    def eventFilter(self, obj, event) -> bool:  # noqa: N802 (Qt naming)
        if obj is self.viewport():
            kind = event.type()
            if kind == QEvent.Type.ToolTip and self.tooltip_for is not None:
                token = self.token_at_point(event.pos())
                text = self.tooltip_for(token) if token is not None else ""
                if text:
                    QToolTip.showText(event.globalPos(), text, self.viewport())
                else:
                    QToolTip.hideText()
                return True
            if kind == QEvent.Type.MouseButtonPress and event.button() == Qt.MouseButton.LeftButton:
                self._press = event.position().toPoint()
            elif kind == QEvent.Type.MouseButtonRelease and event.button() == Qt.MouseButton.LeftButton:
                if self._press is not None and (event.position().toPoint() - self._press).manhattanLength() < 4:
                    token = self.token_at_point(event.position().toPoint())
                    if token is not None:
                        self.token_clicked.emit(token)
                self._press = None
        return super().eventFilter(obj, event)


def char_format(background: str | QColor | None = None, foreground: str | None = None, underline: str | None = None,
                bold: bool = False) -> QTextCharFormat:
    fmt = QTextCharFormat()
    if background is not None:
        fmt.setBackground(QColor(background))
    if foreground is not None:
        fmt.setForeground(QColor(foreground))
    if underline is not None:
        fmt.setUnderlineStyle(QTextCharFormat.UnderlineStyle.SingleUnderline)
        fmt.setUnderlineColor(QColor(underline))
    if bold:
        fmt.setFontWeight(700)
    return fmt


def wrong_original_format() -> QTextCharFormat:
    return char_format(PALETTE.accent_soft, PALETTE.ink, underline=PALETTE.accent)


def wrong_decoded_format() -> QTextCharFormat:
    return char_format(PALETTE.accent_soft, PALETTE.accent_ink, underline=PALETTE.accent)
